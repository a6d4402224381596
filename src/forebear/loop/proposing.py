"""Proposal rounds: when the loop starts one, and the proposer's own process that computes it.

:class:`Rounds` (a mixin of the controller) starts a round when
:mod:`forebear.loop.schedule` asks for one and records it when it comes back.
:class:`ProposalEngine` computes rounds off the loop: one spawned process per
controller process is started once and reused (torch imports take seconds);
each running search registers its proposer there under a key. A proposer that
cannot be pickled runs in a thread instead.
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
from forebear.loop.schedule import Timing, round_size
from forebear.records.logbook import record

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


class Rounds:
    """The controller's proposing half: start rounds by the schedule, record them when done.

    It uses the controller's ``spec``, ``book``, ``logbook``, ``inflight``, ``ready``,
    ``retry_queue`` and ``_ac``, and keeps ``timing`` (trial and refit durations).
    """

    spec: Any
    book: Any
    logbook: Any
    inflight: dict[Any, tuple[int, int, dict[str, Any]]]
    ready: Any
    retry_queue: Any
    _ac: Any
    _job: Future[list[Any]] | None
    _job_size: int
    _job_started: float
    _exhausted: bool
    timing: Timing

    def _propose_ahead(self, engine: ProposalEngine) -> None:
        """Start a round off the loop when :func:`forebear.loop.schedule.round_size` asks for one.

        The round is computed while the workers run. It proposes ahead of the free slots only
        as far as keeps the workers busy for a refit's time (``Timing.lead``); when waiting
        for results costs little, it asks only for the slots that are free now, so the
        proposer sees as many results and as few pending points as it can.
        """
        if self._job is not None or self._exhausted:
            return
        budget = self.spec.budget
        planned = len(self.book.configs)
        sizer = getattr(engine.original, "initial_size", None)
        initial = max(0, sizer(budget.batch) - planned) if callable(sizer) else 0
        n = round_size(
            batch=budget.batch, concurrency=budget.concurrency, running=len(self.inflight),
            queued=len(self.ready) + len(self.retry_queue), left=budget.trials - planned,
            lead=self.timing.lead(budget.concurrency), initial=initial,
        )
        if n <= 0:
            return
        sign = self.spec.objective.sign
        observed = [Observation(self.book.configs[t], sign * s) for t, s in self.book.scores.items()]
        observed += [Observation(self.book.configs[t], sign * s) for t, s in self.book.partial.items()]
        failed = [self.book.configs[t] for t, s in self.book.state.items() if s == "failed"]
        pending = [self.book.configs[t] for t, s in self.book.state.items() if s in ("queued", "running")]
        self._job_started = time.monotonic()
        self._job = engine.submit(n, observed, failed, pending)
        self._job_size = n
        self._job.add_done_callback(self._wake)

    def _timed(self, fut: Any) -> Any:
        """Note how long a finished attempt took from submission (the schedule's trial time)."""
        entry = self.inflight.get(fut)
        if entry is not None and getattr(fut, "status", None) == "finished":
            self.timing.trial(time.monotonic() - entry[2]["submitted"])
        return fut

    def _wake(self, _job: Any) -> None:
        ac = self._ac
        if ac is not None:
            with ac.thread_condition:
                ac.thread_condition.notify_all()

    def _harvest(self) -> None:
        """Record a finished round as ``proposed`` and queue its trials."""
        job = self._job
        if job is None or not job.done():
            return
        self._job = None
        proposals = job.result()[: self._job_size]
        if any(p.source == "model" for p in proposals):
            # Rounds of the initial design are no refit (the first also starts the proposer's process).
            self.timing.refit(time.monotonic() - self._job_started)
        if not proposals:
            self._exhausted = True
            return
        round_no = self.book.rounds
        self.book.rounds += 1
        first = max(self.book.configs, default=-1) + 1
        recs = []
        for i, p in enumerate(proposals):
            tid = first + i
            recs.append(record("proposed", trial=tid, round=round_no, config=p.config, source=p.source, model=p.model, acquisition=p.acquisition))
        self.logbook.append_many(recs)
        for rec in recs:
            tid = rec["trial"]
            self.book.configs[tid] = dict(rec["config"])
            self.book.state[tid] = "queued"
            self.book.attempts[tid] = 0
            self.book.charged[tid] = 0
            self.ready.append(tid)
