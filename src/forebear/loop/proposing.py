"""The proposer's own process: proposal rounds computed off the controller's loop.

One spawned process per controller process is started once and reused (torch
imports take seconds); each running search registers its proposer there under
a key. A proposer that cannot be pickled runs in a thread instead.
"""

from __future__ import annotations

import multiprocessing
import os
import pickle
import secrets
import signal
import threading
import time
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from forebear.engine.proposer import Observation, Proposer

_REMOTE: dict[str, Proposer] = {}  # in the proposer process: the proposer of each search, by key
_POOL: ProcessPoolExecutor | None = None  # in the controller's process: one proposer process, reused
_POOL_LOCK = threading.Lock()
_ACTIVE: set[str] = set()  # keys of the engines of this process's running searches


def _init_remote() -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the controller's to handle
    parent = os.getppid()

    def orphaned() -> None:
        # A controller killed with SIGKILL cannot stop its proposer process, which would idle on
        # with torch loaded; it leaves when its parent is gone (PR_SET_PDEATHSIG would fire when
        # the thread that started it ends, which for a reused pool is too early).
        while os.getppid() == parent:
            time.sleep(1.0)
        os._exit(0)

    threading.Thread(target=orphaned, name="forebear-orphan-watch", daemon=True).start()


def _remote_add(key: str, proposer: Proposer) -> bool:
    _REMOTE[key] = proposer
    return True


def _remote_drop(key: str) -> None:
    _REMOTE.pop(key, None)


def _remote_propose(key: str, n: int, observed: list[Observation], failed: list[dict[str, Any]], pending: list[dict[str, Any]]) -> list[Any]:
    return _REMOTE[key].propose(n, observed, failed=failed, pending=pending)


def _proposer_pool(fresh: bool = False) -> ProcessPoolExecutor:
    """The controller process's proposer process (started once: torch imports take seconds)."""
    global _POOL
    with _POOL_LOCK:
        if _POOL is not None and fresh:
            _kill_pool(_POOL)
            _POOL = None
        if _POOL is None:
            ctx = multiprocessing.get_context("spawn")
            _POOL = ProcessPoolExecutor(max_workers=1, mp_context=ctx, initializer=_init_remote)
        return _POOL


def _kill_pool(pool: ProcessPoolExecutor) -> None:
    procs = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in procs:
        proc.terminate()  # a round still being computed is of no use to anyone


class ProposalEngine:
    """Runs proposal rounds off the controller's loop.

    By default in a child process: a refit is mostly Python (torch autograd, optimiser loops)
    and in the controller's process it would hold the GIL against the Dask client and the
    embedded scheduler, delaying every result and submission. A proposer that cannot be
    pickled runs in a thread instead.
    """

    def __init__(self, proposer: Proposer, say: Any) -> None:
        self.key = secrets.token_hex(8)
        self.original = proposer
        self.proposer: Proposer | None = None
        self.thread: ThreadPoolExecutor | None = None
        self.last: Future[Any] | None = None
        try:
            pickle.dumps(proposer)
        except Exception as exc:  # noqa: BLE001 - any pickling failure means: run it here
            say(f"note: the proposer runs in a thread of the controller ({type(exc).__name__}: {exc})")
            self.proposer = proposer
            self.thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix="forebear-proposer")
            return
        try:
            self.last = _proposer_pool().submit(_remote_add, self.key, proposer)
        except BrokenProcessPool:
            self.last = _proposer_pool(fresh=True).submit(_remote_add, self.key, proposer)
        _ACTIVE.add(self.key)

    def submit(self, n: int, observed: list[Observation], failed: list[dict[str, Any]], pending: list[dict[str, Any]]) -> Future[list[Any]]:
        if self.thread is not None and self.proposer is not None:
            self.last = self.thread.submit(self.proposer.propose, n, observed, failed, pending)
        else:
            try:
                self.last = _proposer_pool().submit(_remote_propose, self.key, n, observed, failed, pending)
            except BrokenProcessPool:
                # The proposer process died (killed, out of memory): start another one.
                pool = _proposer_pool(fresh=True)
                pool.submit(_remote_add, self.key, self.original)
                self.last = pool.submit(_remote_propose, self.key, n, observed, failed, pending)
        return self.last

    def shutdown(self) -> None:
        if self.thread is not None:
            self.thread.shutdown(wait=False, cancel_futures=True)
            return
        _ACTIVE.discard(self.key)
        if self.last is not None and not self.last.done() and not _ACTIVE:
            _proposer_pool(fresh=True)  # do not make the next search wait for this round
            return
        try:
            _proposer_pool().submit(_remote_drop, self.key)
        except BrokenProcessPool:
            pass
