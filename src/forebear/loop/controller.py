"""The controller: fold the logbook, propose, submit, collect, record.

One controller drives a logbook at a time (:class:`forebear.records.logbook.ControllerLock`).
It keeps at most ``concurrency`` attempts in flight; when slots free up it
asks the proposer for a round of up to ``batch`` configurations (running
trials are its pending points), records them as ``proposed`` and submits one
attempt each. Results come back through ``as_completed``. A worker death
(KilledWorker or a lost future) or a timeout is a ``lost`` attempt and is
retried up to ``retries`` times, then the trial is ``failed``; an objective
error is retried only with ``retry_errors``.

Resuming: a logbook that already holds the search is continued. A spec that
changed is refused with the list of changes (``extend`` allows a larger
``trials`` or ``wall_time`` only). Attempts that were running when the last
controller died and have no result in the logbook become ``lost`` (reason
``restart``) and are resubmitted; results recorded meanwhile are kept.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import pickle
import secrets
import signal
import threading
import time
from collections import deque
from collections.abc import Callable, Mapping
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from distributed import as_completed
from distributed.client import FutureCancelledError
from distributed.scheduler import KilledWorker

from forebear.cluster.dispatch import KEY_PREFIX, Dispatch, connect
from forebear.cluster.runner import PROBE_NAME, AttemptResult, AttemptTask, run_attempt
from forebear.core.spec import Spec
from forebear.engine.proposer import Observation, Proposer
from forebear.records.logbook import (
    ControllerLock,
    Logbook,
    LogbookError,
    LogbookMismatch,
    Trial,
    TrialTable,
    check_header,
    ensure_folder,
    fold,
    record,
)

log = logging.getLogger("forebear.loop.controller")

RETRY_REASONS = ("worker", "timeout")  # lost attempts that use up a retry; restarts and interrupts do not
BUDGET_KEYS = ("trials", "batch", "concurrency", "trial_timeout", "retries", "retry_errors", "wall_time")
EXTENDABLE = ("trials", "wall_time")
LOOKAHEAD = 2  # a new round starts when fewer proposals than free slots + this are ready
RESOURCE_CHECK_EVERY = 5.0  # seconds between checks that some worker still offers the trials' resources


class SpecChanged(ValueError):
    """The spec differs from the one the logbook's search was started with."""

    def __init__(self, path: str, changes: list[str]) -> None:
        self.path = path
        self.changes = list(changes)
        lines = "; ".join(self.changes)
        super().__init__(f"logbook {path} holds a search started from a different spec: {lines}")

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, (self.path, self.changes))


@dataclass
class SearchResult:
    """What a search came to: the best trial, every trial, the logbook and why it closed."""

    best: Trial | None
    trials: list[Trial]
    logbook: Path
    closed: str
    counts: dict[str, int] = field(default_factory=dict)
    sense: str = "minimize"  # the spec's objective: "minimize" or "maximize" ...
    metric: str | None = None  # ... this metric

    def to_dict(self) -> dict[str, Any]:
        return {
            self.sense: self.metric,
            "best": self.best.to_dict() if self.best else None,
            "closed": self.closed,
            "logbook": str(self.logbook),
            "counts": self.counts,
            "trials": [t.to_dict() for t in self.trials],
        }

    @classmethod
    def from_table(cls, table: TrialTable, logbook: Path, closed: str) -> SearchResult:
        return cls(table.best(), list(table), logbook, closed, table.counts(), table.sense, table.metric)


# --------------------------------------------------------------------------
# spec comparison on resume


def budget_dict(spec: Spec) -> dict[str, Any]:
    b = spec.budget
    return {k: getattr(b, k) for k in BUDGET_KEYS}


def search_record(spec: Spec) -> dict[str, Any]:
    return record(
        "search",
        name=spec.name,
        spec_hash=spec.hash(),
        space=spec.space.to_dict(),
        objective=spec.objective.to_dict(),
        seed=spec.seed,
        budget=budget_dict(spec),
    )


def spec_changes(header: Mapping[str, Any], spec: Spec, extend: bool) -> tuple[list[str], bool]:
    """Differences between the logbook's search record and ``spec``: (refused changes, budget grew)."""
    changes: list[str] = []
    if header.get("name") not in (None, spec.name):
        changes.append(f"name: {header.get('name')!r} -> {spec.name!r}")
    if header.get("objective") != spec.objective.to_dict():
        changes.append(f"objective: {header.get('objective')} -> {spec.objective.to_dict()}")
    if header.get("seed") != spec.seed:
        changes.append(f"seed: {header.get('seed')} -> {spec.seed}")
    old_space = header.get("space") or {}
    new_space = spec.space.to_dict()
    for name in old_space:
        if name not in new_space:
            changes.append(f"space.{name}: removed")
        elif old_space[name] != new_space[name]:
            changes.append(f"space.{name}: {old_space[name]} -> {new_space[name]}")
    for name in new_space:
        if name not in old_space:
            changes.append(f"space.{name}: added")
    if not changes and header.get("spec_hash") not in (None, spec.hash()):
        changes.append(f"spec hash {header.get('spec_hash')} -> {spec.hash()}")
    grew = False
    old_budget = header.get("budget")
    if isinstance(old_budget, Mapping):
        new_budget = budget_dict(spec)
        for key in BUDGET_KEYS:
            old, new = old_budget.get(key), new_budget[key]
            if old == new:
                continue
            larger = key in EXTENDABLE and (new is None or (old is not None and new > old))
            if extend and larger:
                grew = True
                continue
            hint = " (give --extend to allow a larger budget)" if larger else ""
            changes.append(f"budget.{key}: {old} -> {new}{hint}")
    return changes, grew


# --------------------------------------------------------------------------
# the controller's own view of the trials


@dataclass
class _Book:
    """Per-trial state the loop needs, updated from every record it writes or receives."""

    configs: dict[int, dict[str, Any]] = field(default_factory=dict)
    state: dict[int, str] = field(default_factory=dict)
    scores: dict[int, float] = field(default_factory=dict)
    attempts: dict[int, int] = field(default_factory=dict)
    charged: dict[int, int] = field(default_factory=dict)
    errors: dict[int, str] = field(default_factory=dict)
    rounds: int = 0

    @classmethod
    def from_table(cls, table: TrialTable) -> _Book:
        book = cls()
        for t in table:
            book.configs[t.trial] = dict(t.config)
            book.state[t.trial] = t.state
            if t.state == "scored" and t.score is not None:
                book.scores[t.trial] = float(t.score)
            book.attempts[t.trial] = max((a.attempt for a in t.attempts), default=0)
            # An attempt lost before it started (no started record) used up no retry.
            charged = sum(1 for a in t.attempts if a.outcome == "lost" and a.detail in RETRY_REASONS and a.started_at is not None)
            charged += sum(1 for a in t.attempts[:-1] if a.outcome == "failed")
            book.charged[t.trial] = charged
            if t.error:
                book.errors[t.trial] = t.error
            book.rounds = max(book.rounds, t.round + 1)
        return book

    def count(self, state: str) -> int:
        return sum(1 for s in self.state.values() if s == state)

    @property
    def finished(self) -> int:
        return sum(1 for s in self.state.values() if s in ("scored", "failed"))


# --------------------------------------------------------------------------
# the loop


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


class _Engine:
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


class _Stop:
    """Why the loop stops proposing: None while running."""

    def __init__(self) -> None:
        self.reason: str | None = None
        self.presses = 0
        self.cancel = False


class Controller:
    """Drives one search to its budget (see the module docstring).

    Parameters
    ----------
    spec
        The validated spec.
    extend
        Allow a larger ``trials`` / ``wall_time`` than the logbook's search had.
    quiet
        No progress display.
    cancel_running
        On Ctrl-C (or at the wall-time limit), kill running attempts instead of waiting.
    dispatch
        An existing :class:`Dispatch` to use instead of the spec's cluster (the plugin's).
    handle_signals
        Install the two-stage Ctrl-C handler (only possible in the main thread).
    proposer
        A :class:`Proposer` to use instead of the default one for the spec (benchmarks
        configure the engine this way; the spec's history is then not loaded).
    display
        Makes the live progress display: called as ``display(trials, metric=..., quiet=...,
        done=...)``, it returns an object with ``message``, ``update`` and ``close``
        (:class:`forebear.face.progress.Progress`). Without it, messages go to stderr
        unless ``quiet``.
    """

    def __init__(
        self,
        spec: Spec,
        *,
        extend: bool = False,
        quiet: bool = True,
        cancel_running: bool = False,
        dispatch: Dispatch | None = None,
        handle_signals: bool = True,
        proposer: Proposer | None = None,
        display: Callable[..., Any] | None = None,
    ) -> None:
        self.spec = spec
        self._display = display
        self._proposer = proposer
        self.extend = extend
        self.quiet = quiet
        self.cancel_running = cancel_running
        self.logbook = Logbook(spec.logbook, spec.lock, spec.lock_lifetime)
        self.logs = spec.logbook.with_name(spec.logbook.stem + ".logs")
        self._dispatch = dispatch
        self._own_dispatch = dispatch is None
        self.handle_signals = handle_signals and threading.current_thread() is threading.main_thread()
        self.stop = _Stop()
        self.session = secrets.token_hex(4)
        self.token = secrets.token_hex(16)
        self.progress: Any = None  # the live display, made by ``display`` when the loop starts
        self.book = _Book()
        self.inflight: dict[Any, tuple[int, int, dict[str, Any]]] = {}
        self.retry_queue: deque[int] = deque()
        self.shared: bool | None = None
        self.ready: deque[int] = deque()  # proposed, recorded, not yet submitted
        self._job: Future[list[Any]] | None = None
        self._job_size = 0
        self._exhausted = False
        self._ac: as_completed | None = None
        self._next_resource_check = time.monotonic() + RESOURCE_CHECK_EVERY

    # -- output ---------------------------------------------------------------

    def say(self, text: str) -> None:
        log.info(text)
        if self.progress is not None:
            self.progress.message(text)
        elif not self.quiet:
            import sys

            print(text, file=sys.stderr, flush=True)

    # -- entry ----------------------------------------------------------------

    def run(self) -> SearchResult:
        """Run or resume the search; returns the folded result when it closes."""
        lock = ControllerLock(self.logbook)
        lock.acquire()
        try:
            return self._run_locked()
        finally:
            lock.release()

    def _run_locked(self) -> SearchResult:
        spec = self.spec
        records, skipped = self.logbook.read()
        if skipped and not records and b"\n" in spec.logbook.read_bytes():
            # Whole lines and none of them ours: someone else's file. Writing would append to it and
            # cut its last line as a torn record. (A lone torn first record has no newline: resumable.)
            raise LogbookMismatch(
                f"logbook {spec.logbook}: holds no forebear records ({skipped} unreadable line(s)); "
                "not a forebear logbook, so nothing is written to it"
            )
        table = fold(records)
        table.skipped = skipped
        check_header(table, spec.logbook)
        headers = [r for r in records if r.get("kind") == "search"]
        new_header: dict[str, Any] | None = None
        if headers:
            changes, grew = spec_changes(headers[-1], spec, self.extend)
            if changes:
                raise SpecChanged(str(spec.logbook), changes)
            if grew:
                new_header = search_record(spec)
        else:
            new_header = search_record(spec)
        self.book = _Book.from_table(table)
        if table.closed and self.book.finished >= spec.budget.trials and new_header is None:
            self.say(f"search {spec.name} is already complete ({self.book.finished} trials finished); nothing to do")
            return SearchResult.from_table(table, spec.logbook, str(table.closed.get("reason")))
        proposer = self._proposer or Proposer(spec.space, history=load_history(spec, self.say), seed=spec.seed)
        engine = _Engine(proposer, self.say)
        try:
            if self._dispatch is None:
                self._dispatch = connect(spec, self.say)
            self._dispatch.check_resources(spec.resources)
            if new_header is not None:
                self.logbook.append(new_header)
            return self._drive(engine, table)
        finally:
            engine.shutdown()
            if self._own_dispatch and self._dispatch is not None:
                self._dispatch.close()
                self._dispatch = None

    # -- setup ----------------------------------------------------------------

    def _probe(self) -> None:
        """Write the token workers look for to decide whether they share the logbook's filesystem."""
        ensure_folder(self.logs)
        path = self.logs / PROBE_NAME
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            os.write(fd, self.token.encode())
        finally:
            os.close(fd)

    def _check_shared(self) -> None:
        from forebear.cluster.runner import reachable

        assert self._dispatch is not None
        fut = self._dispatch.client.submit(reachable, str(self.logs), self.token, pure=False, key=f"{KEY_PREFIX}probe-{self.session}")
        try:
            self.shared = bool(fut.result(timeout=30))
        except Exception:  # noqa: BLE001 - no worker yet, or it cannot tell: results come back either way
            self.shared = None
            return
        if not self.shared:
            self.say(
                f"note: the workers cannot see {self.logs.parent} (no shared filesystem); "
                "the controller writes their records and logs from the results it collects"
            )

    def _reconcile(self, table: TrialTable) -> list[dict[str, Any]]:
        """Records that settle what the last controller left: lost attempts and exhausted retries."""
        recs: list[dict[str, Any]] = []
        for t in table:
            if t.terminal:
                continue
            if t.state == "running":
                recs.append(record("lost", trial=t.trial, attempt=t.last_attempt, reason="restart"))
                self.say(f"trial {t.trial}: attempt {t.last_attempt} was running when the last controller stopped; resubmitting")
            self.book.state[t.trial] = "queued"
            self.retry_queue.append(t.trial)
        return recs

    # -- the loop -------------------------------------------------------------

    def _drive(self, engine: _Engine, table: TrialTable) -> SearchResult:
        spec = self.spec
        budget = spec.budget
        self._probe()
        self._check_shared()
        recs = self._reconcile(table)
        if recs:
            self.logbook.append_many(recs)
        if self._display is not None:
            self.progress = self._display(budget.trials, metric=spec.objective.metric, quiet=self.quiet, done=self.book.finished)
        deadline = None if budget.wall_time is None else time.monotonic() + budget.wall_time
        ac = as_completed(with_results=False)
        self._ac = ac
        previous = signal.getsignal(signal.SIGINT) if self.handle_signals else None
        if self.handle_signals:
            signal.signal(signal.SIGINT, self._on_sigint)
        closed = "budget"
        try:
            while True:
                if deadline is not None and time.monotonic() >= deadline and self.stop.reason is None:
                    self.stop.reason = "wall_time"
                    self.stop.cancel = True
                    self.say(f"wall time {budget.wall_time:g} s reached: cancelling {len(self.inflight)} running attempt(s)")
                if self.stop.cancel and self.inflight:
                    self._cancel_all()
                if self.stop.reason is None:
                    self._harvest()
                    self._fill(ac)
                    self._propose_ahead(engine)
                if not self.inflight:
                    if self.stop.reason is not None:
                        closed = self.stop.reason
                        break
                    if self._job is None and not self.ready and not self.retry_queue:
                        if len(self.book.configs) < budget.trials:
                            self.say("the proposer has no new configuration to offer (space exhausted); closing")
                        break
                self._watch_resources()
                wait = 0.5 if deadline is None else max(0.0, min(0.5, deadline - time.monotonic()))
                events = [self._collect(fut) for fut in _ready(ac, wait, self)]
                if events and self.stop.reason is None:
                    self._harvest()
                    self._fill(ac)  # refill before showing, so "running" counts the new attempts
                for event in events:
                    if event:
                        self._show(event)
        except KeyboardInterrupt:
            closed = "interrupted"
            self.say("stopping at once")
            self._cancel_all()
            self._close(closed)
            raise
        except LogbookError:
            # The logbook cannot be written: stop without writing more; what is recorded stays recorded.
            self._cancel_all(record_lost=False)
            raise
        except BaseException as exc:
            self._cancel_all(record_lost=False)
            try:
                self._close("error", error=f"{type(exc).__name__}: {exc}")
            except LogbookError:
                pass
            raise
        finally:
            if self.handle_signals:
                signal.signal(signal.SIGINT, previous)
            if self.progress is not None:
                self.progress.close()
        return self._close(closed)

    def _watch_resources(self) -> None:
        """Fail instead of waiting forever when the workers that could run a trial are gone."""
        if not self.spec.resources or self._dispatch is None:
            return
        now = time.monotonic()
        if now < self._next_resource_check:
            return
        self._next_resource_check = now + RESOURCE_CHECK_EVERY
        self._dispatch.check_resources(self.spec.resources)

    def _close(self, reason: str, error: str | None = None) -> SearchResult:
        table = self.logbook.fold()
        best = table.best()
        fields: dict[str, Any] = {"reason": reason, "best": best.trial if best else None}
        if error:
            fields["error"] = error
        self.logbook.append(record("closed", **fields))
        self.say(
            f"search {self.spec.name} closed ({reason}): {table.counts()['scored']} scored, {table.counts()['failed']} failed"
            + (f"; best trial {best.trial}: {self.spec.objective.metric} = {best.score:.6g}" if best else "; nothing scored")
        )
        return SearchResult.from_table(table, self.spec.logbook, reason)

    def _on_sigint(self, signum: int, frame: Any) -> None:
        self.stop.presses += 1
        if self.stop.presses > 1:
            raise KeyboardInterrupt
        self.stop.reason = "interrupted"
        if self.cancel_running:
            self.stop.cancel = True
            self.say("interrupted: cancelling running attempts (Ctrl-C again to stop at once)")
        else:
            self.say(f"interrupted: no new trials; waiting for {len(self.inflight)} running attempt(s) (Ctrl-C again to stop at once)")

    def request_stop(self, cancel: bool = False) -> None:
        """Stop proposing (and cancel running attempts with ``cancel``), as the first Ctrl-C does."""
        self.stop.reason = "interrupted"
        self.stop.cancel = cancel

    # -- submitting -----------------------------------------------------------

    def _fill(self, ac: as_completed) -> None:
        """Submit retries first, then proposed trials, while slots are free."""
        budget = self.spec.budget
        while len(self.inflight) < budget.concurrency and self.retry_queue:
            self._submit(self.retry_queue.popleft(), ac)
        while len(self.inflight) < budget.concurrency and self.ready:
            self._submit(self.ready.popleft(), ac)

    def _propose_ahead(self, engine: _Engine) -> None:
        """Start a round of up to ``batch`` proposals off the loop when few are ready.

        The round is computed while the workers run and starts while proposals are still
        ready (``LOOKAHEAD``), so a worker that finishes gets its next trial without waiting
        for a refit; a refit has about ``LOOKAHEAD`` trial completions' time to finish.
        """
        if self._job is not None or self._exhausted:
            return
        budget = self.spec.budget
        free = budget.concurrency - len(self.inflight) - len(self.retry_queue)
        left = budget.trials - len(self.book.configs)
        if left <= 0 or len(self.ready) >= max(0, free) + LOOKAHEAD:
            return
        n = min(budget.batch, left)
        sign = self.spec.objective.sign
        observed = [Observation(self.book.configs[t], sign * s) for t, s in self.book.scores.items()]
        failed = [self.book.configs[t] for t, s in self.book.state.items() if s == "failed"]
        pending = [self.book.configs[t] for t, s in self.book.state.items() if s in ("queued", "running")]
        self._job = engine.submit(n, observed, failed, pending)
        self._job_size = n
        self._job.add_done_callback(self._wake)

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

    def _submit(self, tid: int, ac: as_completed) -> None:
        assert self._dispatch is not None
        spec = self.spec
        attempt = self.book.attempts.get(tid, 0) + 1
        self.book.attempts[tid] = attempt
        retry_left = self.book.charged.get(tid, 0) < spec.budget.retries
        task = AttemptTask(
            search=spec.name,
            trial=tid,
            attempt=attempt,
            config=self.book.configs[tid],
            metric=spec.objective.metric,
            call=spec.objective.call,
            command=spec.objective.command,
            timeout=spec.budget.trial_timeout,
            logbook=str(spec.logbook),
            lock=spec.lock,
            lock_lifetime=spec.lock_lifetime,
            logs=str(self.logs),
            token=self.token,
            cwd=str(spec.base_dir),
            retryable=spec.budget.retry_errors and retry_left,
        )
        key = f"{KEY_PREFIX}{spec.name}-{self.session}-{tid}-{attempt}"
        fut = self._dispatch.submit(run_attempt, task, key=key, resources=spec.resources)
        self.inflight[fut] = (tid, attempt, {"submitted": time.monotonic()})
        self.book.state[tid] = "running"
        ac.add(fut)

    def _cancel_all(self, record_lost: bool = True) -> None:
        if not self.inflight or self._dispatch is None:
            return
        futures = list(self.inflight)
        try:
            self._dispatch.client.cancel(futures, force=True)
        except Exception:  # noqa: BLE001 - the client may already be gone; the runners notice either way
            pass
        if record_lost:
            recs = [record("lost", trial=tid, attempt=att, reason="interrupted") for tid, att, _ in self.inflight.values()]
            self.logbook.append_many(recs)
            for tid, _, _ in self.inflight.values():
                self.book.state[tid] = "queued"
        self.inflight.clear()

    # -- collecting -----------------------------------------------------------

    def _collect(self, fut: Any) -> str | None:
        """Record what a finished future came to; returns a line for the progress display."""
        entry = self.inflight.pop(fut, None)
        if entry is None:
            return None  # cancelled by us; already recorded
        tid, attempt, _ = entry
        event: str
        if fut.status == "finished":
            try:
                res: AttemptResult = fut.result()
            except FutureCancelledError:
                event = self._lost(tid, attempt, "worker", "the attempt's task was cancelled by the cluster")
            else:
                event = self._result(res)
        elif fut.status == "cancelled":
            event = self._lost(tid, attempt, "worker", "the cluster dropped the attempt's task")
        else:
            exc = fut.exception()
            if isinstance(exc, KilledWorker):
                event = self._worker_died(tid, attempt)
            else:
                error = f"the attempt could not run on the worker: {type(exc).__name__}: {exc}"
                self.logbook.append(record("failed", trial=tid, attempt=attempt, error=error, retryable=False))
                self.book.state[tid] = "failed"
                self.book.errors[tid] = error
                event = f"trial {tid} failed: {error}"
        return event

    def _result(self, res: AttemptResult) -> str:
        tid, attempt = res.trial, res.attempt
        if not res.written:
            if res.records:
                self.logbook.append_many(res.records)
            if res.log_text is not None and res.log_name:
                _write_private(self.logs / res.log_name, res.log_text)
        if res.outcome == "scored":
            score = float(res.records[-1]["score"])
            self.book.state[tid] = "scored"
            self.book.scores[tid] = score
            return f"trial {tid} scored {score:.6g}"
        if res.outcome == "failed":
            final = res.records[-1] if res.records else {}
            first_line = (res.error or "").split("\n", 1)[0]
            if final.get("retryable"):
                self.book.charged[tid] = self.book.charged.get(tid, 0) + 1
                self.book.state[tid] = "queued"
                self.retry_queue.append(tid)
                return f"trial {tid} attempt {attempt} failed ({first_line}); retrying"
            self.book.state[tid] = "failed"
            self.book.errors[tid] = res.error or ""
            return f"trial {tid} failed: {first_line}"
        if res.outcome == "timeout":
            return self._lost(tid, attempt, "timeout", (res.error or "timed out").split("\n", 1)[0])
        return self._lost(tid, attempt, "interrupted", "cancelled")

    def _worker_died(self, tid: int, attempt: int) -> str:
        """A KilledWorker: settle the attempt from what its runner already wrote to the shared logbook.

        The worker may die after appending the attempt's result but before Dask delivered it (then
        the result stands, and a retry would score the trial twice), or before the attempt started
        at all (then the trial's code never ran and the loss uses up no retry).
        """
        why = "the worker running it died"
        if not self.shared:
            return self._lost(tid, attempt, "worker", why)  # the logbook cannot tell: charge the retry
        mine = [r for r in self.logbook.records() if r.get("trial") == tid and r.get("attempt") == attempt]
        final = next((r for r in mine if r.get("kind") in ("scored", "failed")), None)
        if final is not None and final["kind"] == "scored":
            self.book.state[tid] = "scored"
            self.book.scores[tid] = float(final["score"])
            return f"trial {tid} scored {float(final['score']):.6g} (its worker died after recording it)"
        if final is not None and not final.get("retryable"):
            self.book.state[tid] = "failed"
            self.book.errors[tid] = str(final.get("error") or "")
            return f"trial {tid} failed: {str(final.get('error') or '').split(chr(10), 1)[0]}"
        started = any(r.get("kind") == "started" for r in mine)
        return self._lost(tid, attempt, "worker", why if started else "its worker died before the attempt started", charge=started)

    def _lost(self, tid: int, attempt: int, reason: str, why: str, charge: bool = True) -> str:
        recs = [record("lost", trial=tid, attempt=attempt, reason=reason)]
        charged = self.book.charged.get(tid, 0)
        charge = charge and reason in RETRY_REASONS
        if charge and charged >= self.spec.budget.retries:
            error = f"{why}; no retries left after {attempt} attempt(s) (budget.retries: {self.spec.budget.retries})"
            recs.append(record("failed", trial=tid, attempt=attempt, error=error, retryable=False))
            self.logbook.append_many(recs)
            self.book.state[tid] = "failed"
            self.book.errors[tid] = error
            return f"trial {tid} failed: {error}"
        self.logbook.append_many(recs)
        if charge:
            self.book.charged[tid] = charged + 1
        self.book.state[tid] = "queued"
        if self.stop.reason is None:
            self.retry_queue.append(tid)
        return f"trial {tid} attempt {attempt} lost ({why}); retrying"

    def _show(self, event: str) -> None:
        if self.progress is None:
            return
        best_trial = None
        best = None
        if self.book.scores:
            sign = self.spec.objective.sign
            best_trial = min(self.book.scores, key=lambda t: (sign * self.book.scores[t], t))
            best = self.book.scores[best_trial]
        self.progress.update(
            scored=self.book.count("scored"),
            failed=self.book.count("failed"),
            running=len(self.inflight),
            best=best,
            best_trial=best_trial,
            event=event,
        )


def _ready(ac: as_completed, timeout: float, controller: Controller) -> list[Any]:
    """Futures that completed, waiting up to ``timeout`` s for the first one or a finished round."""
    # Check and wait under the iterator's condition: as_completed puts a future in its queue and
    # then notifies under this condition, so a completion cannot slip between the check and the wait.
    with ac.thread_condition:
        job = controller._job
        if not ac.has_ready() and not (job is not None and job.done()):
            ac.thread_condition.wait(timeout)
    return ac.next_batch(block=False) if ac.has_ready() else []


def _write_private(path: Path, text: str) -> None:
    ensure_folder(path.parent)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(fd, text.encode("utf-8", errors="replace"))
    finally:
        os.close(fd)


def load_history(spec: Spec, say: Any) -> Any:
    """The spec's history (``forebear.records.history.History``), or None for a cold start."""
    if not spec.history:
        return None
    try:
        from forebear.records import history as history_mod
    except ImportError:
        say("warning: forebear.records.history is not available in this build; starting without history")
        return None
    hist = history_mod.load(spec.history, spec.space, spec.objective.sense, exclude=[spec.logbook])
    for w in getattr(hist, "warnings", []) or []:
        say(f"history: {w}")
    say(f"history: {len(hist)} earlier search(es)")
    return hist if len(hist) else None


