"""Learning curves: the intermediate scores of a search's trials, and those of history logbooks.

A curve is a trial's ``step`` records (of the attempt that went furthest),
as ``(step, score)`` pairs in step order. :class:`CurveSet` holds one search's
curves with their final step, in lower-is-better form (scores times the sign
of the reading spec's sense), which is what the stopping rules consume.
"""

from __future__ import annotations

import glob
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from forebear.records.logbook import LogbookError, TrialTable, fold, parse


@dataclass
class CurveSet:
    """One search's curves: ``curves[i]`` is complete when its trial scored (it ran to its end)."""

    name: str
    final: int  # the last step a full trial reports
    curves: list[list[tuple[int, float]]] = field(default_factory=list)
    complete: list[bool] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.curves)


def final_step(table: TrialTable) -> int | None:
    """The search's full-trial step count: its spec's ``stopping.steps``, else the longest scored curve."""
    stopping = (table.header or {}).get("stopping") or {}
    steps = stopping.get("steps") if isinstance(stopping, dict) else None
    if isinstance(steps, int) and not isinstance(steps, bool) and steps > 0:
        return steps
    ends = [t.curve[-1][0] for t in table if t.state == "scored" and t.curve]
    return max(ends) if ends else None


def curve_set(table: TrialTable, sign: float, name: str = "search") -> CurveSet | None:
    """The curves of a folded logbook, or None when it holds none."""
    final = final_step(table)
    if final is None:
        return None
    out = CurveSet(name, final)
    for t in table:
        curve = t.curve
        if not curve:
            continue
        out.curves.append([(s, sign * v) for s, v in curve])
        out.complete.append(t.state == "scored" and curve[-1][0] >= final)
    return out if out.curves else None


def history_curves(sources: Iterable[Any], sign: float, exclude: Sequence[str | Path] = ()) -> tuple[list[CurveSet], list[str]]:
    """Curve sets of the history logbooks among ``sources`` (CSV history has no curves), and warnings.

    A history logbook that cannot be read is left out with a warning: the
    search still runs, its history model is then built without that file.
    """
    skip = {str(Path(p).resolve()) for p in exclude}
    sets: list[CurveSet] = []
    warnings: list[str] = []
    for src in sources:
        pattern = getattr(src, "logbook", None)
        if not pattern:
            continue
        for p in sorted(glob.glob(str(pattern), recursive=True)):
            path = Path(p)
            if str(path.resolve()) in skip or not path.is_file():
                continue
            try:
                table = fold(parse(path.read_bytes())[0])
            except (OSError, LogbookError) as exc:
                warnings.append(f"history logbook {path}: cannot read its curves: {exc}")
                continue
            cs = curve_set(table, sign, str((table.header or {}).get("name") or path.stem))
            if cs is not None:
                sets.append(cs)
    return sets, warnings


def value_at(curve: Sequence[tuple[int, float]], step: float) -> float | None:
    """The curve's score at the first recorded step >= ``step`` (None when it stopped before)."""
    for s, v in curve:
        if s >= step:
            return v
    return None
