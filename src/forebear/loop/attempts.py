"""Submitting attempts to the cluster and recording what they came to.

A worker death (KilledWorker or a lost future) or a timeout is a ``lost``
attempt and is retried up to ``retries`` times, then the trial is ``failed``;
an objective error is retried only with ``retry_errors``.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

from distributed import as_completed
from distributed.client import FutureCancelledError
from distributed.scheduler import KilledWorker

from forebear.cluster.dispatch import KEY_PREFIX, attempt_memory
from forebear.cluster.runner import AttemptResult, AttemptTask, run_attempt
from forebear.loop.book import RETRY_REASONS
from forebear.records.logbook import ensure_folder, record


class Attempts:
    """The controller's submitting and collecting half (a mixin of :class:`forebear.loop.controller.Controller`).

    It uses the controller's ``spec``, ``book``, ``logbook``, ``inflight``,
    ``retry_queue``, ``ready``, ``stop``, ``shared``, ``logs``, ``token``,
    ``session``, ``function`` and ``_dispatch``.
    """

    spec: Any
    book: Any
    logbook: Any
    inflight: dict[Any, tuple[int, int, dict[str, Any]]]
    retry_queue: Any
    ready: Any
    stop: Any
    shared: bool | None
    logs: Path
    token: str
    session: str
    halting: Any
    function: bytes | None
    _dispatch: Any

    # -- submitting -----------------------------------------------------------

    def _fill(self, ac: as_completed) -> None:
        """Submit retries first, then proposed trials, while slots are free."""
        budget = self.spec.budget
        while len(self.inflight) < budget.concurrency and self.retry_queue:
            self._submit(self.retry_queue.popleft(), ac)
        while len(self.inflight) < budget.concurrency and self.ready:
            self._submit(self.ready.popleft(), ac)

    def _submit(self, tid: int, ac: as_completed) -> None:
        assert self._dispatch is not None
        spec = self.spec
        attempt = self.book.attempts.get(tid, 0) + 1
        self.book.attempts[tid] = attempt
        retry_left = self.book.charged.get(tid, 0) < spec.budget.retries
        key = f"{KEY_PREFIX}{spec.name}-{self.session}-{tid}-{attempt}"
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
            memory_limit=attempt_memory(spec),
            function=self.function,
            function_name=spec.objective.function,
            **self.halting.task_fields(key),
        )
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

    def _drain_steps(self) -> None:
        """Hand the intermediate scores that arrived to the stopping rule (:mod:`forebear.loop.halting`)."""
        running = {tid: (att, str(fut.key)) for fut, (tid, att, _) in self.inflight.items()}
        for line in self.halting.drain(running):
            self.say(line)  # type: ignore[attr-defined]

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
                self.halting.ended(str(fut.key), tid, res.outcome, self.book.scores.get(tid))
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
                self.logbook.append_many(self.halting.unwritten(res.records))
            if res.log_text is not None and res.log_name:
                _write_private(self.logs / res.log_name, res.log_text)
        if res.outcome == "scored":
            score = float(res.records[-1]["score"])
            self.book.state[tid] = "scored"
            self.book.scores[tid] = score
            return f"trial {tid} scored {score:.6g}"
        if res.outcome == "halted":
            final = res.records[-1]
            self.book.state[tid] = "halted"
            self.book.partial[tid] = float(final["score"])
            return f"trial {tid} halted at step {final.get('step')} with {float(final['score']):.6g}"
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
        if res.outcome == "superseded":
            return f"trial {tid} attempt {attempt}: {res.error}"  # its lost record is already written
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
        final = next((r for r in mine if r.get("kind") in ("scored", "failed", "halted")), None)
        if final is not None and final["kind"] == "halted":
            self.book.state[tid] = "halted"
            self.book.partial[tid] = float(final["score"])
            return f"trial {tid} halted at step {final.get('step')} (its worker died after recording it)"
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


def _write_private(path: Path, text: str) -> None:
    ensure_folder(path.parent)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(fd, text.encode("utf-8", errors="replace"))
    finally:
        os.close(fd)
