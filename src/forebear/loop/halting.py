"""The controller's side of early stopping: collect intermediate scores, decide, tell the attempt.

Runners send every intermediate score to the controller as a Dask event on
the search's topic (:mod:`forebear.cluster.steps`). The handler only queues
it and wakes the loop; :meth:`Halting.drain`, called from the loop, writes the
``step`` records the workers could not write (no shared filesystem), feeds
the scores to the stopping rule and, when the rule says so, sets the
``distributed.Event`` named for the attempt, which its runner checks. The
attempt then ends with a ``halted`` record. On resume the rule is rebuilt
from the logbook's ``step`` records in the order they were written.
"""

from __future__ import annotations

import threading
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from typing import Any

from forebear.core.spec import Spec
from forebear.engine.halting import HalvingRule, make_rule
from forebear.records.curves import history_curves
from forebear.records.logbook import Logbook


def event_name(key: str) -> str:
    """The ``distributed.Event`` that tells the attempt with Dask key ``key`` to halt."""
    return f"forebear-halt-{key}"


class Halting:
    """Intermediate scores and stopping decisions of one controller's search (see the module docstring)."""

    def __init__(self, spec: Spec, logbook: Logbook, session: str, say: Callable[[str], None]) -> None:
        self.spec = spec
        self.logbook = logbook
        self.topic = f"forebear-steps-{spec.name}-{session}"
        self.say = say
        self.sign = spec.objective.sign
        sets = []
        if spec.stopping.rule == "history" and spec.history:
            sets, warnings = history_curves(spec.history, self.sign, exclude=[spec.logbook])
            for w in warnings:
                say(f"history: {w}")
        self.rule: HalvingRule | None = make_rule(spec.stopping, sets)
        if spec.stopping.rule == "history":
            if self.rule is not None and self.rule.name == "history":
                say(f"stopping: history rule from the curves of {len(sets)} earlier search(es)")
            else:
                say("stopping: no history with intermediate scores; the history rule decides by halving")
        self._client: Any = None
        self._queue: deque[dict[str, Any]] = deque()
        self._lock = threading.Lock()
        self._wake: Callable[[], None] = lambda: None
        self.written: set[tuple[int, int, int]] = set()
        self.decided: dict[int, str] = {}  # trial -> reason it was told to halt
        self._events: dict[str, Any] = {}

    # -- setup ----------------------------------------------------------------

    def replay(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Rebuild the rule's state from a logbook's records (a resumed search)."""
        halted: set[int] = set()
        for rec in records:
            kind, tid = rec.get("kind"), rec.get("trial")
            if not isinstance(tid, int):
                continue
            if kind == "step" and isinstance(rec.get("step"), int) and isinstance(rec.get("score"), (int, float)):
                self.written.add((tid, int(rec.get("attempt") or 1), rec["step"]))
                if self.rule is not None and tid not in halted and self.rule.observe(tid, rec["step"], self.sign * float(rec["score"])):
                    halted.add(tid)  # its curve after that point is the lag before the halt took effect
            elif kind == "scored" and self.rule is not None and isinstance(rec.get("score"), (int, float)):
                self.rule.finished(tid, self.sign * float(rec["score"]))
            elif kind == "halted":
                halted.add(tid)
            elif kind in ("lost", "failed"):
                halted.discard(tid)

    def listen(self, client: Any, wake: Callable[[], None]) -> None:
        """Subscribe to the search's topic on ``client``; ``wake`` rouses the loop when a score arrives."""
        self._client = client
        self._wake = wake
        client.subscribe_topic(self.topic, self._on_event)

    def close(self) -> None:
        if self._client is not None:
            try:
                self._client.unsubscribe_topic(self.topic)
            except Exception:  # noqa: BLE001 - the client may already be closed
                pass
        self._client = None

    def task_fields(self, key: str) -> dict[str, Any]:
        """The :class:`forebear.cluster.runner.AttemptTask` fields for the attempt with Dask key ``key``."""
        return {"topic": self.topic if self._client is not None else None, "halt_event": event_name(key) if self.rule is not None else None}

    # -- the loop's side --------------------------------------------------------

    def _on_event(self, event: Any) -> None:
        _, msg = event
        if isinstance(msg, dict):
            with self._lock:
                self._queue.append(msg)
            self._wake()

    def pending(self) -> bool:
        """True while scores wait to be drained: the loop must not sleep on them."""
        return bool(self._queue)

    def drain(self, running: Mapping[int, tuple[int, str]]) -> list[str]:
        """Handle queued scores; ``running`` maps a trial to its running (attempt, Dask key). Lines for the display."""
        with self._lock:
            msgs = list(self._queue)
            self._queue.clear()
        if not msgs:
            return []
        todo = []
        for msg in msgs:
            ident = (msg.get("trial"), msg.get("attempt"), msg.get("step"))
            if not msg.get("written") and ident not in self.written:
                todo.append({k: v for k, v in msg.items() if k != "written"})
            self.written.add(ident)  # type: ignore[arg-type]
        if todo:
            self.logbook.append_many(todo)
        lines = []
        for msg in msgs:
            tid, attempt = msg.get("trial"), msg.get("attempt")
            if self.rule is None or tid not in running or running[tid][0] != attempt or tid in self.decided:
                continue
            reason = self.rule.observe(tid, int(msg["step"]), self.sign * float(msg["score"]))
            if reason is not None:
                self.decided[tid] = reason
                self._signal(running[tid][1])
                lines.append(f"trial {tid}: halting after step {msg['step']} ({reason})")
        return lines

    def _signal(self, key: str) -> None:
        from distributed import Event

        event = Event(event_name(key), client=self._client)
        event.set()
        self._events[key] = event

    def unwritten(self, records: Iterable[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
        """The records of a collected result minus the ``step`` records already written from events."""
        out = []
        for rec in records:
            if rec.get("kind") == "step":
                ident = (rec.get("trial"), rec.get("attempt"), rec.get("step"))
                if ident in self.written:
                    continue
                self.written.add(ident)  # type: ignore[arg-type]
            out.append(rec)
        return out

    def ended(self, key: str, tid: int, outcome: str, score: float | None) -> None:
        """An attempt's result came back: tell the rule a final score, forget the attempt's event."""
        if outcome == "scored" and score is not None and self.rule is not None:
            self.rule.finished(tid, self.sign * score)
        if outcome != "halted":
            self.decided.pop(tid, None)  # a retry of the trial is judged afresh
        event = self._events.pop(key, None)
        if event is not None:
            try:
                event.clear()
            except Exception:  # noqa: BLE001 - the scheduler may be gone; the event dies with it
                pass
