"""How an attempt ended: the child's exit status and result file read into its final record.

:func:`finish` decides between ``scored``, ``failed`` and ``halted``, names the
cause of a failure (a signal, an exit status, a bad score line, the address-space
limit), writes the record where the logbook is reachable and refuses a late
result for an attempt a controller already settled as lost.
"""

from __future__ import annotations

import json
import os
import signal
from pathlib import Path
from typing import Any

from forebear.cluster.capture import read_log, read_text, with_tail
from forebear.cluster.scoring import BadScore, score_of_stdout
from forebear.cluster.steps import StepWatcher, without_marks
from forebear.cluster.task import AttemptResult, AttemptTask
from forebear.records.logbook import Logbook, record


def _exit_reason(status: int) -> str:
    if os.WIFSIGNALED(status):
        sig = os.WTERMSIG(status)
        try:
            name = signal.Signals(sig).name
        except ValueError:
            name = f"signal {sig}"
        hint = " (out of memory, or killed from outside?)" if sig == signal.SIGKILL else ""
        return f"the objective process was killed by {name} ({sig}){hint}"
    return f"the objective process exited with status {os.waitstatus_to_exitcode(status)} before returning a result"


def finish(
    task: AttemptTask,
    result: AttemptResult,
    logbook: Logbook | None,
    started: dict[str, Any],
    status: int | None,
    error: str | None,
    seconds: float,
    log: Path,
    out: Path | None,
    result_file: Path | None = None,
    since: int = 0,
    watcher: StepWatcher | None = None,
) -> AttemptResult:
    """Fill ``result`` with the attempt's final record; write it when ``logbook`` is reachable."""
    score: float | None = None
    metrics: dict[str, Any] = {}
    dropped: dict[str, str] = {}
    payload: dict[str, Any] | None = None
    if error is None and result_file is not None and result_file.exists():
        try:
            payload = json.loads(result_file.read_text())
        except (OSError, ValueError):
            payload = None
    halted = None
    if watcher is not None and error is None and (result.outcome == "halted" or (payload or {}).get("halted")):
        halted = watcher.halted_record(seconds)
    if halted is None and error is None:
        if status is None:
            error = "the objective process could not be reaped after SIGKILL"
        elif payload is not None and not payload.get("ok"):
            error = str(payload.get("error"))
        elif task.command:
            code = os.waitstatus_to_exitcode(status)
            if code != 0:
                error = _exit_reason(status) if code < 0 else f"the command exited with status {code}"
            else:
                try:
                    score, metrics = score_of_stdout(without_marks(read_text(out)), task.metric, dropped)
                except BadScore as exc:
                    error = f"bad result: {exc}"
        elif payload is not None:
            score, metrics = float(payload["score"]), dict(payload.get("metrics") or {})
            dropped = dict(payload.get("dropped") or {})
        else:
            error = _exit_reason(status)
    if error is not None and task.memory_limit and _memory_like(error):
        error += f" (the attempt's address space is limited to {task.memory_limit / 2**20:.0f} MiB by cluster.local.memory_limit)"
    steps = watcher.records if watcher is not None else []
    if halted is not None:
        final = halted
        result.outcome = "halted"
    elif error is None and score is not None:
        extra = {"dropped": dropped} if dropped else {}
        final = record("scored", trial=task.trial, attempt=task.attempt, score=score, metrics=metrics, seconds=round(seconds, 6), **extra)
        result.outcome = "scored"
    else:
        result.error = with_tail(error or "no result", log, out)
        final = record("failed", trial=task.trial, attempt=task.attempt, error=result.error, retryable=task.retryable)
        result.outcome = "failed"
    result.seconds = seconds
    if logbook is not None:
        if not logbook.append_result(final, since):
            # A controller settled this attempt as lost (and resubmitted its trial) while it ran:
            # the late result is not recorded, so the trial is never scored twice.
            result.outcome = "superseded"
            result.error = "the attempt was settled as lost while it ran; its result was not recorded"
            result.records = [started]
            result.written = True
            result.seconds = seconds
            return result
        result.records = [started, final]
        result.written = True
    else:
        result.records = [started, *steps, final]
        result.log_text = read_log(log, out)
    return result


def _memory_like(error: str) -> bool:
    """Whether a failure reads like an allocation refused by the attempt's address-space limit."""
    return any(w in error for w in ("MemoryError", "SIGSEGV", "SIGABRT", "SIGKILL", "Cannot allocate memory", "bad_alloc"))
