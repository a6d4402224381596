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
``restart``) and are resubmitted; results recorded meanwhile are kept. These
opening steps are :mod:`forebear.loop.opening`; submitting and collecting
attempts :mod:`forebear.loop.attempts`; proposing :mod:`forebear.loop.proposing`.
"""

from __future__ import annotations

import logging
import secrets
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future
from typing import Any

from distributed import as_completed

from forebear.cluster.dashboard import publish
from forebear.cluster.dispatch import Dispatch, connect
from forebear.cluster.shipping import ObjectiveError, pack
from forebear.core.spec import Spec
from forebear.engine.proposer import Proposer
from forebear.loop.attempts import Attempts
from forebear.loop.book import Book, SearchResult
from forebear.loop.halting import Halting
from forebear.loop.opening import Opening, load_history
from forebear.loop.proposing import ProposalEngine, Rounds
from forebear.loop.schedule import Timing
from forebear.loop.stopping import Stop, StopNow, deadline
from forebear.records.logbook import (
    ControllerLock,
    Logbook,
    LogbookError,
    TrialTable,
    record,
)

log = logging.getLogger("forebear.loop.controller")

RESOURCE_CHECK_EVERY = 5.0  # seconds between checks that some worker still offers the trials' resources


# --------------------------------------------------------------------------
# the loop


class Controller(Attempts, Rounds, Opening):
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
        Install the two-stage Ctrl-C / SIGTERM handler (only possible in the main thread;
        see :mod:`forebear.loop.stopping`).
    proposer
        A :class:`Proposer` to use instead of the default one for the spec (benchmarks
        configure the engine this way; the spec's history is then not loaded).
    display
        Makes the live progress display: called as ``display(trials, metric=..., quiet=...,
        done=...)``, it returns an object with ``message``, ``update`` and ``close``
        (:class:`forebear.face.progress.Progress`). Without it, messages go to stderr
        unless ``quiet``.
    objective
        The Python callable to evaluate, for a spec whose objective names a ``function``
        (``forebear.run(spec, objective=fn)``); it is shipped to the workers with each attempt.
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
        objective: Callable[..., Any] | None = None,
    ) -> None:
        if (objective is None) != (spec.objective.function is None):
            raise ObjectiveError("a spec whose objective is a function needs that function (objective=), and only such a spec")
        self.function = None if objective is None else pack(objective)
        self.link: str | None = None  # the search's page on the Dask dashboard, once it is served
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
        self.stop = Stop(self.say, lambda: len(self.inflight))
        self.stop.cancel_running = cancel_running
        self.session = secrets.token_hex(4)
        self.token = secrets.token_hex(16)
        self.progress: Any = None  # the live display, made by ``display`` when the loop starts
        self.book = Book()
        self.inflight: dict[Any, tuple[int, int, dict[str, Any]]] = {}
        self.retry_queue: deque[int] = deque()
        self.shared: bool | None = None
        self.ready: deque[int] = deque()  # proposed, recorded, not yet submitted
        self._job: Future[list[Any]] | None = None
        self._job_size = 0
        self._job_started = 0.0
        self.timing = Timing()  # trial and refit durations: how far to propose ahead (loop/schedule.py)
        self._exhausted = False
        self._ac: as_completed | None = None
        self._next_resource_check = time.monotonic() + RESOURCE_CHECK_EVERY
        self.halting = Halting(spec, self.logbook, self.session, self.say)
        self._read_at = 0  # the logbook's size when the controller read it at start

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
        table, new_header = self._read()
        self.book = Book.from_table(table)
        if table.closed and self.book.finished >= spec.budget.trials and new_header is None:
            self.say(f"search {spec.name} is already complete ({self.book.finished} trials finished); nothing to do")
            return SearchResult.from_table(table, spec.logbook, str(table.closed.get("reason")))
        proposer = self._proposer or Proposer(spec.space, history=load_history(spec, self.say), seed=spec.seed)
        check = getattr(proposer, "check_history", None)  # before the proposer leaves for its process
        note = check() if callable(check) else None
        if note:
            self.say(note)
        engine = ProposalEngine(proposer, self.say)
        try:
            if self._dispatch is None:
                self._dispatch = connect(spec, self.say)
            self._dispatch.check_resources(spec.resources)
            self.link = publish(self._dispatch, spec, self.say)
            if new_header is not None:
                self.logbook.append(new_header)
            return self._drive(engine, table)
        finally:
            engine.shutdown()
            if self._own_dispatch and self._dispatch is not None:
                self._dispatch.close()
                self._dispatch = None

    # -- the loop -------------------------------------------------------------

    def _drive(self, engine: ProposalEngine, table: TrialTable) -> SearchResult:
        spec = self.spec
        budget = spec.budget
        self._probe()
        self._check_shared()
        self._reconcile(table)
        self.halting.replay(self.logbook.records())
        assert self._dispatch is not None
        self.halting.listen(self._dispatch.client, lambda: self._wake(None))
        if self._display is not None:
            self.progress = self._display(budget.trials, metric=spec.objective.metric, quiet=self.quiet, done=self.book.finished)
        ends = deadline(budget.wall_time)
        ac = as_completed(with_results=False)
        self._ac = ac
        restore = self.stop.install() if self.handle_signals else None
        closed = "budget"
        try:
            while True:
                self.stop.check()
                if ends is not None and time.monotonic() >= ends and self.stop.reason is None:
                    self.stop.reason = "wall_time"
                    self.stop.cancel = True
                    self.say(f"wall time {budget.wall_time:g} s reached: cancelling {len(self.inflight)} running attempt(s)")
                if self.stop.cancel and self.inflight:
                    self._cancel_all()
                self._drain_steps()
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
                wait = 0.5 if ends is None else max(0.0, min(0.5, ends - time.monotonic()))
                events = [self._collect(self._timed(fut)) for fut in _ready(ac, wait, self)]
                if events and self.stop.reason is None:
                    self._harvest()
                    self._fill(ac)  # refill before showing, so "running" counts the new attempts
                for event in events:
                    if event:
                        self._show(event)
        except KeyboardInterrupt as exc:
            closed = "interrupted"
            self.say(f"stopping at once ({exc.why})" if isinstance(exc, StopNow) else "stopping at once")
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
            self.halting.close()
            if restore is not None:
                restore()
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
            + (f", {table.counts()['halted']} halted" if table.counts().get("halted") else "")
            + (f"; best trial {best.trial}: {self.spec.objective.metric} = {best.score:.6g}" if best else "; nothing scored")
        )
        return SearchResult.from_table(table, self.spec.logbook, reason)

    def request_stop(self, cancel: bool = False) -> None:
        """Stop proposing (and cancel running attempts with ``cancel``), as the first Ctrl-C does."""
        self.stop.reason = "interrupted"
        self.stop.cancel = cancel

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
    """Futures that completed, waiting up to ``timeout`` s for the first one, a finished round or a score."""
    # Check and wait under the iterator's condition: as_completed puts a future in its queue and
    # then notifies under this condition (as the halting handler does after queueing a score), so a
    # completion or a score cannot slip between the check and the wait.
    with ac.thread_condition:
        job = controller._job
        if not ac.has_ready() and not (job is not None and job.done()) and not controller.halting.pending():
            ac.thread_condition.wait(timeout)
    return ac.next_batch(block=False) if ac.has_ready() else []
