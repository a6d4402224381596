"""The attempt side of early stopping: read intermediate scores, record them, learn of a halt.

A callable objective's note function appends its scores to a file in the
attempt's scratch folder; a command objective prints marked lines on stdout::

    forebear-step: 12 0.4187
    forebear-step: 12 {"val_loss": 0.4187, "val_acc": 0.871}

(the mark, the step, then a number or a JSON object with the spec's metric;
the last line of stdout is still the final score). The runner polls a
:class:`StepWatcher` while the attempt runs. Each new score becomes a ``step``
record: appended to the logbook here when the worker shares its filesystem,
kept for the attempt's result otherwise, and sent to the controller as a Dask
event either way, since the controller decides from every trial's curve. Its
decision comes back as a ``distributed.Event`` named for the attempt, which a
thread of the watcher waits on while scores arrive (one wait held on the
scheduler at a time, renewed every ``WAIT_FOR`` s): the attempt learns of the
halt one round trip after the decision and, for a callable, its next
``note()`` raises ``forebear.Halted``.
"""

from __future__ import annotations

import contextvars
import json
import threading
import time
from pathlib import Path
from typing import Any

from forebear.cluster.scoring import BadScore, score_of
from forebear.records.logbook import Logbook, record

STEP_MARK = "forebear-step:"
WAIT_FOR = 5.0  # seconds one wait on the attempt's halt event lasts on the scheduler before it is renewed
CHECK_FOR = 30.0  # waiting stops this long after the last score: a decision takes a round trip to the controller
READ_LIMIT = 1 << 20  # bytes of new output read per poll


def parse_mark(line: str, metric: str) -> tuple[int, float, dict[str, Any]]:
    """(step, score, metrics) of one marked stdout line (without its newline).

    Raises
    ------
    BadScore
        When the step is not a whole number >= 0 or the value is not a usable score.
    """
    body = line.strip()[len(STEP_MARK) :].strip()
    head, _, rest = body.partition(" ")
    try:
        step = int(head)
    except ValueError:
        raise BadScore(f"{STEP_MARK} line: step {head!r} is not a whole number") from None
    if step < 0:
        raise BadScore(f"{STEP_MARK} line: step {step} is negative")
    rest = rest.strip()
    try:
        value: Any = json.loads(rest)
    except ValueError:
        raise BadScore(f"{STEP_MARK} line: {rest[:60]!r} is not a number or a JSON object") from None
    score, metrics = score_of(value, metric)
    return step, score, metrics


def without_marks(text: str) -> str:
    """stdout without its marked lines, so the final score stays the last other line."""
    return "\n".join(ln for ln in text.splitlines() if not ln.strip().startswith(STEP_MARK))


class StepWatcher:
    """Follows one attempt's intermediate scores (see the module docstring).

    Parameters
    ----------
    task
        The :class:`forebear.cluster.runner.AttemptTask`.
    logbook
        The shared logbook, or None when the controller writes the records.
    scratch
        The attempt's scratch folder (the callable's score file and halt file live there).
    out
        A command's stdout file, None for a callable.
    log
        The attempt's log; problems with marked lines are noted there.
    """

    def __init__(self, task: Any, logbook: Logbook | None, scratch: Path, out: Path | None, log: Path) -> None:
        self.task = task
        self.logbook = logbook
        self.source = out if out is not None else scratch / "steps.jsonl"
        self.halt_file = scratch / "halt"
        self.log = log
        self.records: list[dict[str, Any]] = []  # step records (all of them, written or not)
        self.last: dict[str, Any] | None = None
        self.halted = False
        self._command = out is not None
        self._offset = 0
        self._buf = b""
        self._last_step: int | None = None
        self._last_seen = time.monotonic()  # the last score's arrival (the start until one arrives)
        self._started = False
        self._event: Any = None  # the distributed.Event, False when there is no scheduler to ask
        self._lock = threading.Lock()
        self._waiting = False  # a thread waits on the event
        self._decided = threading.Event()  # the event was found set
        self._over = threading.Event()  # the attempt ended

    # -- reading ------------------------------------------------------------

    def _new_lines(self) -> list[str]:
        try:
            with open(self.source, "rb") as fh:
                fh.seek(self._offset)
                chunk = fh.read(READ_LIMIT)
        except OSError:
            return []
        self._offset += len(chunk)
        data = self._buf + chunk
        lines = data.split(b"\n")
        self._buf = lines.pop()
        return [ln.decode("utf-8", errors="replace") for ln in lines]

    def _parse(self, line: str) -> tuple[int, float, dict[str, Any]] | None:
        if self._command:
            if not line.strip().startswith(STEP_MARK):
                return None
            try:
                step, score, metrics = parse_mark(line, self.task.metric)
            except BadScore as exc:
                self._note_problem(str(exc))
                return None
        else:
            try:
                entry = json.loads(line)
                step, score, metrics = int(entry["step"]), float(entry["score"]), dict(entry.get("metrics") or {})
            except (ValueError, KeyError, TypeError):
                return None
        if self._last_step is not None and step <= self._last_step:
            self._note_problem(f"step {step} ignored: steps must increase (last was {self._last_step})")
            return None
        return step, score, metrics

    def _note_problem(self, text: str) -> None:
        try:
            with open(self.log, "a", encoding="utf-8") as fh:
                fh.write(f"forebear: {text}\n")
        except OSError:
            pass

    # -- one poll -----------------------------------------------------------

    def poll(self, final: bool = False) -> bool:
        """Take in new scores; True when forebear has just decided to halt the attempt."""
        lines = self._new_lines()
        if final and self._buf:
            lines.append(self._buf.decode("utf-8", errors="replace"))
            self._buf = b""
        fresh = []
        for line in lines:
            parsed = self._parse(line)
            if parsed is None:
                continue
            step, score, metrics = parsed
            self._last_step = step
            rec = record("step", trial=self.task.trial, attempt=self.task.attempt, step=step, score=score, metrics=metrics)
            fresh.append(rec)
        if fresh:
            self._last_seen = time.monotonic()
            self.last = fresh[-1]
            self.records.extend(fresh)
            if self.logbook is not None:
                self.logbook.append_many(fresh)
            self._publish(fresh)
        if final:
            self.close()
            return False
        if self.halted or not self.task.halt_event:
            return False
        if fresh or not self._started:
            self._started = True
            self._keep_waiting()
        if not self._decided.is_set():
            return False
        self.halted = True
        return True

    def _publish(self, recs: list[dict[str, Any]]) -> None:
        if not self.task.topic:
            return
        try:
            from distributed.worker import get_worker

            worker = get_worker()
        except (ImportError, ValueError):
            return  # not on a Dask worker (a direct call): nobody to tell
        written = self.logbook is not None
        for rec in recs:
            worker.log_event(self.task.topic, {**rec, "written": written})

    # -- the halt event -------------------------------------------------------

    def _keep_waiting(self) -> None:
        """Make sure a thread waits on the attempt's halt event (from the first poll, and when scores arrive)."""
        with self._lock:
            if self._waiting or self._event is False:
                return
            self._waiting = True
        context = contextvars.copy_context()  # the task's, so that get_client() in the thread finds the worker
        threading.Thread(target=context.run, args=(self._wait,), name=f"forebear-halt-{self.task.trial}", daemon=True).start()

    def _wait(self) -> None:
        """Wait on the scheduler for the halt event, WAIT_FOR s at a time, while the attempt runs and scores arrive.

        The event is set the moment the controller decides, so the halt is learnt one round trip
        later, with one request per WAIT_FOR s instead of a check per poll. The worker's client
        is made here (the first attempt on a worker), while the objective starts, not when its
        first score is in.
        """
        if self._event is None:
            try:
                from distributed import Event, get_client

                self._event = Event(self.task.halt_event, client=get_client())
            except Exception:  # noqa: BLE001 - no scheduler to ask (a direct call): nobody will halt it
                with self._lock:
                    self._event = False
                    self._waiting = False
                return
        while True:
            with self._lock:
                if self._over.is_set():  # ended while the client was made: no wait to hold
                    self._waiting = False
                    return
            try:
                decided = bool(self._event.wait(timeout=WAIT_FOR))
            except Exception:  # noqa: BLE001 - a lost connection: run on, as without a decision
                decided = False
                self._over.wait(WAIT_FOR)
            if decided:
                self._decided.set()
                if not self._command and not self._over.is_set():
                    try:
                        self.halt_file.touch()  # the next note() call raises Halted
                    except OSError:
                        pass  # the attempt just ended and its scratch folder is gone
            with self._lock:
                if decided or self._over.is_set() or time.monotonic() - self._last_seen > CHECK_FOR:
                    self._waiting = False
                    return

    def close(self) -> None:
        """The attempt is over: a waiting thread stops, and a wait held on the scheduler is released."""
        self._over.set()
        self._release()

    def _release(self) -> None:
        """End a wait still held on the scheduler: set and clear the event (the attempt is over).

        A wait left pending would be cancelled when the search closes its cluster, and the
        scheduler logs every cancelled wait as an error with a traceback.
        """
        with self._lock:
            event = self._event if self._waiting else None
        if not event:
            return
        try:
            event.set()
            event.clear()  # the scheduler forgets an event that is clear and has no waiter
        except Exception:  # noqa: BLE001 - the scheduler is gone, and the wait with it
            pass

    # -- the end ------------------------------------------------------------

    def halted_record(self, seconds: float) -> dict[str, Any] | None:
        """The attempt's ``halted`` record (its last intermediate score and step)."""
        if self.last is None:
            return None
        t = self.task
        return record(
            "halted",
            trial=t.trial,
            attempt=t.attempt,
            step=self.last["step"],
            score=self.last["score"],
            metrics=self.last["metrics"],
            seconds=round(seconds, 6),
        )

