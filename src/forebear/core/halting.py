"""The spec's ``stopping:`` section: which rule halts trials early from their intermediate scores.

A trial reports intermediate scores at steps (an epoch, a few hundred
batches: the objective's own unit). The rule decides at *rungs*, the steps
``min_step * eta**k`` below ``steps`` (the last step a full trial reports):

* ``none`` (the default): no trial is halted; intermediate scores are still recorded;
* ``halving``: asynchronous successive halving; a trial goes on past a rung only
  while it is in the top ``1/eta`` of the trials that reached that rung;
* ``history``: earlier searches' curves predict where a partial curve ends; a
  trial halts when its chance of beating the current best at step ``steps``
  is below ``threshold`` (halving where there is no curve history yet).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

from forebear.core._yaml import Doc

RULES = ("none", "halving", "history")
KEYS = ("rule", "steps", "min_step", "eta", "threshold", "partial_counts")
MAX_RUNGS = 64  # min_step * eta**k passes any sensible step count long before this


@dataclass(frozen=True)
class Stopping:
    """A validated ``stopping:`` section (see the module docstring)."""

    rule: str = "none"
    steps: int | None = None
    min_step: int = 1
    eta: float = 3.0
    threshold: float = 0.05
    partial_counts: bool = False

    @property
    def active(self) -> bool:
        """True when a rule may halt trials."""
        return self.rule != "none"

    def rungs(self) -> list[int]:
        """The steps at which the rule decides: ``min_step * eta**k`` rounded, below ``steps``."""
        if self.steps is None:
            return []
        out: list[int] = []
        for k in range(MAX_RUNGS):
            level = int(round(self.min_step * self.eta**k))
            if level >= self.steps:
                break
            if not out or level > out[-1]:
                out.append(level)
        return out

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def _bad(doc: Doc, key: str, message: str) -> None:
    doc.error(("stopping", key), message)


def _what(v: Any) -> str:
    if v is None:
        return "nothing"
    if isinstance(v, bool):
        return f"a boolean ({v})"
    return f"{type(v).__name__} ({v!r})"


def parse_stopping(doc: Doc, data: Any, defaults: Mapping[str, Any]) -> Stopping | None:
    """The ``stopping:`` section from spec data; errors go to ``doc`` with key and line."""
    if data is None:
        data = {}
    if not isinstance(data, dict):
        doc.error(("stopping",), f"must be a mapping, got {_what(data)}")
        return None
    for key in data:
        if key not in KEYS:
            doc.error(("stopping", key), f"unknown key; valid keys: {', '.join(KEYS)}")
    merged = {**defaults, **data}
    ok = True
    rule = merged["rule"]
    if rule not in RULES:
        _bad(doc, "rule", f"must be one of {', '.join(RULES)}, got {_what(rule)}")
        ok = False
    steps = merged["steps"]
    if steps is not None and (not isinstance(steps, int) or isinstance(steps, bool) or steps < 2):
        _bad(doc, "steps", f"must be a whole number >= 2 (the last step a full trial reports), got {_what(steps)}")
        ok = False
    elif steps is None and rule in RULES and rule != "none":
        _bad(doc, "steps", f"is required with rule {rule}: the last step a full trial reports")
        ok = False
    min_step = merged["min_step"]
    if not isinstance(min_step, int) or isinstance(min_step, bool) or min_step < 1:
        _bad(doc, "min_step", f"must be a whole number >= 1, got {_what(min_step)}")
        ok = False
    elif isinstance(steps, int) and not isinstance(steps, bool) and steps >= 2 and min_step >= steps:
        _bad(doc, "min_step", f"must be below steps ({steps}), got {min_step}")
        ok = False
    eta = merged["eta"]
    if isinstance(eta, bool) or not isinstance(eta, (int, float)) or not math.isfinite(eta) or eta <= 1:
        _bad(doc, "eta", f"must be a number > 1 (the reduction factor), got {_what(eta)}")
        ok = False
    threshold = merged["threshold"]
    if isinstance(threshold, bool) or not isinstance(threshold, (int, float)) or not 0 < threshold < 1:
        _bad(doc, "threshold", f"must be a probability strictly between 0 and 1, got {_what(threshold)}")
        ok = False
    partial = merged["partial_counts"]
    if not isinstance(partial, bool):
        _bad(doc, "partial_counts", f"must be true or false, got {_what(partial)}")
        ok = False
    if not ok:
        return None
    return Stopping(str(rule), steps, int(min_step), float(eta), float(threshold), bool(partial))
