"""The trial table: the state of a search folded from its logbook records.

:func:`fold` turns records into a :class:`TrialTable` of :class:`Trial` s.
The first ``scored`` of a trial wins; later duplicates are counted and
ignored. A record whose fields have the wrong types is skipped and counted
(with its line number when the records came from a file), as unparseable
lines are, so a hand-edited or foreign line never breaks or misleads a reader.
"""

from __future__ import annotations

import contextlib
import gc
import math
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

KINDS = ("search", "proposed", "started", "scored", "failed", "lost", "closed")
STATES = ("queued", "running", "scored", "failed")
TERMINAL = ("scored", "failed")


@contextlib.contextmanager
def _gc_paused() -> Iterator[None]:
    """Pause the cyclic garbage collector while building many acyclic objects.

    Parsing and folding 10^5 records allocates millions of containers, which
    triggers repeated full collections that find nothing to free (records hold
    no reference cycles); pausing it halves the time of a large fold.
    """
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()



# --------------------------------------------------------------------------
# the fold


@dataclass
class Attempt:
    """One execution of a trial on a worker."""

    attempt: int
    worker: str | None = None
    host: str | None = None
    pid: int | None = None
    started_at: float | None = None
    ended_at: float | None = None
    outcome: str = "running"  # running, scored, failed, lost
    detail: str | None = None


@dataclass
class Trial:
    """A trial folded from its records."""

    trial: int
    config: dict[str, Any]
    round: int = 0
    source: str = "initial"
    model: str | None = None
    acquisition: float | None = None
    state: str = "queued"
    score: float | None = None
    metrics: dict[str, Any] = field(default_factory=dict)
    seconds: float | None = None
    error: str | None = None
    retryable: bool = False
    proposed_at: float | None = None
    started_at: float | None = None
    finished_at: float | None = None
    attempts: list[Attempt] = field(default_factory=list)

    @property
    def terminal(self) -> bool:
        return self.state in TERMINAL

    @property
    def last_attempt(self) -> int:
        return self.attempts[-1].attempt if self.attempts else 0

    def to_dict(self) -> dict[str, Any]:
        return {
            "trial": self.trial,
            "state": self.state,
            "config": self.config,
            "score": self.score,
            "metrics": self.metrics,
            "seconds": self.seconds,
            "round": self.round,
            "source": self.source,
            "model": self.model,
            "attempts": len(self.attempts),
            "error": self.error,
        }


@dataclass
class TrialTable:
    """The state of a search folded from its logbook."""

    trials: dict[int, Trial] = field(default_factory=dict)
    header: dict[str, Any] | None = None
    closed: dict[str, Any] | None = None
    skipped: int = 0
    invalid: list[tuple[int, str]] = field(default_factory=list)  # (record number from 1, what is wrong), skipped
    bad_lines: list[int] = field(default_factory=list)  # line numbers of skipped lines, set by Logbook.fold
    unknown: int = 0
    duplicates: int = 0
    first_at: float | None = None
    last_at: float | None = None

    @property
    def sense(self) -> str:
        obj = (self.header or {}).get("objective") or {}
        return "maximize" if "maximize" in obj else "minimize"

    @property
    def metric(self) -> str | None:
        obj = (self.header or {}).get("objective") or {}
        return obj.get(self.sense)

    def by_state(self, state: str) -> list[Trial]:
        return [t for t in self.trials.values() if t.state == state]

    def counts(self) -> dict[str, int]:
        out = dict.fromkeys(STATES, 0)
        for t in self.trials.values():
            out[t.state] += 1
        return out

    @property
    def finished(self) -> int:
        return sum(1 for t in self.trials.values() if t.terminal)

    def scored(self) -> list[Trial]:
        return [t for t in self.trials.values() if t.state == "scored"]

    def best(self) -> Trial | None:
        """The best scored trial in the search's sense (lowest trial id on ties)."""
        scored = self.scored()
        if not scored:
            return None
        sign = -1.0 if self.sense == "maximize" else 1.0
        return min(scored, key=lambda t: (sign * float(t.score), t.trial))  # type: ignore[arg-type]

    def ranked(self) -> list[Trial]:
        sign = -1.0 if self.sense == "maximize" else 1.0
        return sorted(self.scored(), key=lambda t: (sign * float(t.score), t.trial))  # type: ignore[arg-type]

    def __iter__(self) -> Iterator[Trial]:
        return iter(sorted(self.trials.values(), key=lambda t: t.trial))

    def __len__(self) -> int:
        return len(self.trials)

    def _repr_html_(self) -> str:
        """The table as Jupyter shows it: counts, best trial, trials."""
        from forebear.records.html import trial_table_html  # the renderer imports this module

        return trial_table_html(self)


def fold(records: Iterable[Mapping[str, Any]]) -> TrialTable:
    """Fold records into a :class:`TrialTable`. The first ``scored`` of a trial wins."""
    with _gc_paused():
        return _fold(records)


def _fold(records: Iterable[Mapping[str, Any]]) -> TrialTable:
    table = TrialTable()
    trials = table.trials
    for number, rec in enumerate(records, 1):
        kind = rec.get("kind")
        check = _CHECKS.get(kind)  # type: ignore[arg-type]
        wrong = check(rec) if check is not None else None
        if wrong is not None:
            table.invalid.append((number, f"{kind} record: {wrong}"))
            continue
        at = rec.get("at")
        if isinstance(at, (int, float)):
            if table.first_at is None:
                table.first_at = at
            table.last_at = at
        if kind == "search":
            if table.header is None:
                table.header = dict(rec)
            continue
        if kind == "closed":
            table.closed = dict(rec)
            continue
        tid = rec.get("trial")
        if kind not in KINDS or not isinstance(tid, int):
            table.unknown += 1
            continue
        if kind == "proposed":
            if tid in trials:
                table.duplicates += 1
                continue
            trials[tid] = Trial(
                trial=tid,
                config=dict(rec.get("config") or {}),
                round=int(rec.get("round") or 0),
                source=str(rec.get("source") or "initial"),
                model=rec.get("model"),
                acquisition=rec.get("acquisition"),
                proposed_at=at,
            )
            continue
        t = trials.get(tid)
        if t is None:
            table.unknown += 1
            continue
        attempt_no = int(rec.get("attempt") or 1)
        att = _attempt(t, attempt_no)
        if kind == "started":
            att.worker, att.host, att.pid = rec.get("worker"), rec.get("host"), rec.get("pid")
            att.started_at = at
            if t.started_at is None:
                t.started_at = at
            if not t.terminal:
                t.state = "running"
        elif kind == "scored":
            if t.state == "scored":
                table.duplicates += 1
                continue
            att.outcome, att.ended_at = "scored", at
            t.state = "scored"
            t.score = rec.get("score")
            t.metrics = dict(rec.get("metrics") or {})
            t.seconds = rec.get("seconds")
            t.finished_at = at
            t.error = None
        elif kind == "failed":
            if att.outcome == "running":
                att.outcome, att.ended_at, att.detail = "failed", at, rec.get("error")
            if t.state == "scored":
                continue
            t.error = rec.get("error")
            t.retryable = bool(rec.get("retryable"))
            if t.retryable:
                t.state = "queued"
            else:
                t.state = "failed"
                t.finished_at = at
        elif kind == "lost":
            if att.outcome == "running":
                att.outcome, att.ended_at, att.detail = "lost", at, rec.get("reason")
            if not t.terminal:
                t.state = "queued"
                t.error = f"attempt {attempt_no} lost ({rec.get('reason')})"
    return table


# --------------------------------------------------------------------------
# field types: a record that breaks them is skipped, as an unparseable line is


def _is_int(x: Any) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def _is_num(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _fields(rec: Mapping[str, Any], rules: tuple[tuple[str, Any, str, bool], ...]) -> str | None:
    """The first rule ``rec`` breaks, as words; rules are (field, test, what it must be, required)."""
    if not _is_num(rec.get("at", 0)):
        return f"'at' must be a finite number, got {_short(rec.get('at'))}"
    for name, test, what, required in rules:
        if name not in rec:
            if required:
                return f"no {name!r}"
            continue
        value = rec[name]
        if not test(value):
            return f"{name!r} must be {what}, got {_short(value)}"
    return None


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


_TRIAL = ("trial", _is_int, "an integer", True)
_ATTEMPT = ("attempt", lambda x: _is_int(x) and x >= 1, "an integer >= 1", False)


def _text_or_none(x: Any) -> bool:
    return x is None or isinstance(x, str)


_RULES: dict[str, tuple[tuple[str, Any, str, bool], ...]] = {
    "search": (("objective", lambda x: isinstance(x, dict), "a mapping", False), ("name", _text_or_none, "text", False)),
    "proposed": (_TRIAL, ("config", lambda x: isinstance(x, dict), "a mapping", True),
                 ("round", lambda x: _is_int(x) and x >= 0, "an integer >= 0", False),
                 ("source", _text_or_none, "text", False), ("model", _text_or_none, "text", False),
                 ("acquisition", lambda x: x is None or _is_num(x), "a finite number or null", False)),
    "started": (_TRIAL, _ATTEMPT),
    "scored": (_TRIAL, _ATTEMPT, ("score", _is_num, "a finite number", True),
               ("metrics", lambda x: x is None or isinstance(x, dict), "a mapping", False),
               ("seconds", lambda x: x is None or _is_num(x), "a finite number or null", False)),
    "failed": (_TRIAL, _ATTEMPT, ("error", _text_or_none, "text", False),
               ("retryable", lambda x: isinstance(x, bool), "true or false", False)),
    "lost": (_TRIAL, _ATTEMPT, ("reason", _text_or_none, "text", False)),
    "closed": (("reason", _text_or_none, "text", False), ("best", lambda x: x is None or _is_int(x), "a trial number or null", False)),
}
_CHECKS = {kind: (lambda rec, rules=rules: _fields(rec, rules)) for kind, rules in _RULES.items()}


def _attempt(t: Trial, n: int) -> Attempt:
    for a in t.attempts:
        if a.attempt == n:
            return a
    a = Attempt(attempt=n)
    t.attempts.append(a)
    return a


def finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)
