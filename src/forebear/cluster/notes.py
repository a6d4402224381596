"""Intermediate scores of a callable objective: the note function and ``forebear.Halted``.

Standard library only: the attempt child (:mod:`forebear.cluster.child`) loads
this file as a sibling. A callable objective that accepts a second argument
gets a :class:`Note`; ``note(step, value)`` appends the score to a file the
runner reads (:mod:`forebear.cluster.steps`) and raises :class:`Halted` once
the runner has written the attempt's halt file.
"""

from __future__ import annotations

import inspect
import json
import os
from collections.abc import Callable
from typing import Any

HALTED = {"ok": False, "halted": True, "error": "halted"}  # the result payload of a halted attempt


class Halted(Exception):
    """Raised by the note function once forebear has halted the trial (``forebear.Halted``).

    An objective may catch it to clean up (close files, free a GPU); whatever it
    does next, the trial ends halted with its last intermediate score.
    """

    def __init__(self, step: int | None = None) -> None:
        self.step = step
        super().__init__(f"forebear halted this trial after step {step}")

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, (self.step,))


class Note:
    """The second argument of a callable objective: ``note(step, value)`` records an intermediate score.

    ``value`` is a number or a metrics mapping holding the spec's metric, read by
    ``score_of`` (the scoring module's); ``step`` a whole number that increases.
    """

    def __init__(self, steps_path: str, halt_path: str, metric: str, score_of: Callable[[Any, str], tuple[float, dict[str, Any]]]) -> None:
        self._fd = os.open(steps_path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
        self._halt = halt_path
        self._metric = metric
        self._score_of = score_of
        self.last: int | None = None
        self.halted = False

    def __call__(self, step: int, value: Any) -> None:
        if isinstance(step, bool) or not hasattr(step, "__index__"):
            raise TypeError(f"note: step must be a whole number, got {type(step).__name__} {step!r:.60}")
        step = int(step.__index__())
        if step < 0 or (self.last is not None and step <= self.last):
            after = f" after step {self.last}" if self.last is not None else ""
            raise ValueError(f"note: steps must be >= 0 and increasing, got {step}{after}")
        score, metrics = self._score_of(value, self._metric)
        os.write(self._fd, (json.dumps({"step": step, "score": score, "metrics": metrics}, default=str) + "\n").encode())
        self.last = step
        if self.halted or os.path.exists(self._halt):
            self.halted = True
            raise Halted(step)


def takes_note(fn: Callable[..., Any]) -> bool:
    """True when ``fn`` accepts a second positional argument (the note function)."""
    try:
        params = list(inspect.signature(fn).parameters.values())
    except (TypeError, ValueError):
        return False
    if any(p.kind == p.VAR_POSITIONAL for p in params):
        return True
    return sum(1 for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)) >= 2
