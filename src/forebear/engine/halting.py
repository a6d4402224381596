"""Stopping rules: decide from intermediate scores whether a running trial goes on.

Values are lower-is-better (the score times the spec's sign). A rule sees
each trial's scores as they arrive (:meth:`observe`) and the final scores of
finished trials (:meth:`finished`); ``observe`` returns the reason to halt the
trial, or None. Decisions are made at rungs only (``Stopping.rungs()``), so a
trial faces a handful of decisions whatever its reporting frequency.

:class:`HalvingRule` is asynchronous successive halving (Li et al., "A system
for massively parallel hyperparameter tuning", MLSys 2020) in its stopping
form: a trial that reaches rung k goes on only while it is in the top
``max(1, floor(n / eta))`` of the ``n`` trials that have reached rung k so
far. Trials arriving at an empty rung go on, as in the paper's asynchronous
version, which promotes without waiting for a full rung.

:class:`HistoryRule` learns from earlier searches how a partial curve
continues, and uses that as a second opinion on halving's decisions. Per
history search, scores are put on a common scale by the median and spread of
that search's scores at the first rung (every trial reaches it). For each
rung it keeps the pairs (scaled score at the rung, scaled final score) of the
history trials that ran to the end, and predicts a running trial's final
score as a least-squares line through them plus the empirical distribution of
the line's residuals. With ``p`` the predicted chance of ending below the
best final score so far, a trial halts when ``p`` is under ``threshold``;
a trial halving would halt goes on when ``p`` is at least ``RESCUE``. Before
any trial of the search has finished there is no best final score: then a
trial halving would halt goes on when its chance of ending below the
predicted final of the rung's leader (the line's median at the leader's
score) is at least ``RESCUE_EARLY``; asynchronous halving's first rungs hold
only a few trials, and most of its halts of the eventual best configuration
happen there (docs/benchmarks.md). Without enough history pairs at a rung, or
before enough trials reached the first rung to set the scale, it decides as
:class:`HalvingRule`.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from forebear.core.halting import Stopping
from forebear.records.curves import CurveSet, value_at

MIN_PAIRS = 20  # history pairs per rung below which the line and its residuals are too rough to trust
MIN_SCALE_TRIALS = 3  # trials at the first rung before the current search's scale is set (3 and 5 measured)
RESCUE = 0.5  # chance of beating the best final at which a trial halving would halt goes on (measured)
RESCUE_EARLY = 0.4  # the same before any trial finished, against the rung leader's predicted final
SPREAD_FLOOR = 1e-9  # a search whose first-rung scores are all equal has no usable scale


class HalvingRule:
    """Asynchronous successive halving over ``rungs`` with reduction factor ``eta``."""

    name = "halving"

    def __init__(self, rungs: Sequence[int], eta: float) -> None:
        self.rungs = list(rungs)
        self.eta = float(eta)
        self.values: list[dict[int, float]] = [{} for _ in self.rungs]  # rung -> trial -> value there
        self.passed: dict[int, int] = {}  # trial -> rungs it has reached

    def keep(self, k: int) -> int:
        """How many of the trials at rung ``k`` are in its top 1/eta (at least one)."""
        return max(1, int(len(self.values[k]) // self.eta))

    def survivors(self, k: int) -> list[int]:
        """The trials at rung ``k`` now in its top 1/eta, best first (ties: the earlier trial)."""
        ranked = sorted(self.values[k].items(), key=lambda kv: (kv[1], kv[0]))
        return [t for t, _ in ranked[: self.keep(k)]]

    def new_rungs(self, trial: int, step: int, value: float) -> list[int]:
        """Record ``value`` at every rung the trial reaches with ``step``; the indices of those rungs."""
        k = self.passed.get(trial, 0)
        reached = []
        while k < len(self.rungs) and step >= self.rungs[k]:
            self.values[k][trial] = value
            reached.append(k)
            k += 1
        self.passed[trial] = k
        return reached

    def verdict(self, trial: int, k: int) -> str | None:
        rung = self.values[k]
        value = rung[trial]
        better = sum(1 for t, v in rung.items() if t != trial and v < value)
        keep = self.keep(k)
        if better < keep:
            return None
        return f"halving: at step {self.rungs[k]} it ranks {better + 1} of {len(rung)}; the top {keep} go on"

    def observe(self, trial: int, step: int, value: float) -> str | None:
        """Take one intermediate score; the reason to halt the trial, or None."""
        for k in self.new_rungs(trial, step, value):
            reason = self.verdict(trial, k)
            if reason is not None:
                return reason
        return None

    def finished(self, trial: int, value: float) -> None:
        """A trial's final score (halving does not use it)."""


def _scale(values: Sequence[float]) -> tuple[float, float] | None:
    """Median and spread (interquartile range / 1.349, the normal's; else the standard deviation)."""
    if len(values) < 2:
        return None
    arr = np.asarray(values, dtype=float)
    q25, q50, q75 = np.percentile(arr, [25, 50, 75])
    spread = (q75 - q25) / 1.349
    if spread <= SPREAD_FLOOR:
        spread = float(arr.std())
    return (float(q50), float(spread)) if spread > SPREAD_FLOOR else None


class CurveModel:
    """Predicts a final scaled score from a scaled score at each of the given step fractions."""

    def __init__(self, sets: Sequence[CurveSet], fractions: Sequence[float]) -> None:
        self.fractions = list(fractions)
        self.lines: list[tuple[float, float, np.ndarray] | None] = []
        pairs: list[list[tuple[float, float]]] = [[] for _ in self.fractions]
        for cs in sets:
            first = [value_at(c, self.fractions[0] * cs.final) for c in cs.curves] if self.fractions else []
            scale = _scale([v for v in first if v is not None])
            if scale is None:
                continue
            loc, spread = scale
            for curve, complete in zip(cs.curves, cs.complete, strict=True):
                if not complete:
                    continue
                y = (value_at(curve, cs.final) - loc) / spread  # type: ignore[operator]
                for k, f in enumerate(self.fractions):
                    v = value_at(curve, f * cs.final)
                    if v is not None:
                        pairs[k].append(((v - loc) / spread, y))
        for ps in pairs:
            if len(ps) < MIN_PAIRS:
                self.lines.append(None)
                continue
            x, y = np.asarray(ps).T
            slope, intercept = np.polyfit(x, y, 1) if np.ptp(x) > 0 else (0.0, float(np.mean(y)))
            residuals = np.sort(y - (slope * x + intercept))
            self.lines.append((float(slope), float(intercept), residuals))

    @property
    def usable(self) -> bool:
        return any(line is not None for line in self.lines)

    def _line(self, k: int) -> tuple[float, float, np.ndarray] | None:
        return self.lines[k] if k < len(self.lines) else None

    def median_final(self, k: int, x: float) -> float | None:
        """The median predicted final scaled score for scaled score ``x`` at fraction ``k``."""
        line = self._line(k)
        if line is None:
            return None
        slope, intercept, residuals = line
        return slope * x + intercept + float(np.median(residuals))

    def chance_below(self, k: int, x: float, target: float) -> float | None:
        """P(final < target) for scaled score ``x`` at fraction ``k``; None without a line there."""
        line = self._line(k)
        if line is None:
            return None
        slope, intercept, residuals = line
        need = target - (slope * x + intercept)
        # Empirical CDF of the residuals, with half a count either side so it is never 0 or 1.
        below = float(np.searchsorted(residuals, need, side="left"))
        return (below + 0.5) / (len(residuals) + 1.0)


class HistoryRule(HalvingRule):
    """The history-informed rule (see the module docstring): halving, overruled by the curve model.

    It decides at rungs only: checking at every step was measured too (docs/benchmarks.md) and
    halted the best configuration more often, each extra look being one more chance of a false stop.
    """

    name = "history"

    def __init__(self, stopping: Stopping, sets: Sequence[CurveSet]) -> None:
        super().__init__(stopping.rungs(), stopping.eta)
        assert stopping.steps is not None
        self.threshold = stopping.threshold
        self.model = CurveModel(sets, [r / stopping.steps for r in self.rungs])
        self.best: float | None = None

    def finished(self, trial: int, value: float) -> None:
        self.best = value if self.best is None else min(self.best, value)

    def verdict(self, trial: int, k: int) -> str | None:
        halving = super().verdict(trial, k)
        scale = _scale(list(self.values[0].values())) if len(self.values[0]) >= MIN_SCALE_TRIALS else None
        if scale is None:
            return halving
        loc, spread = scale
        x = (self.values[k][trial] - loc) / spread
        if self.best is not None:
            chance = self.model.chance_below(k, x, (self.best - loc) / spread)
            if chance is None:
                return halving
            if chance < self.threshold:
                return f"history: at step {self.rungs[k]} its chance of beating the best ({chance:.3f}) is below {self.threshold:g}"
            return None if halving is None or chance >= RESCUE else f"{halving}; its chance of beating the best is {chance:.3f}"
        if halving is None:
            return None
        rivals = [v for t, v in self.values[k].items() if t != trial]
        leader = self.model.median_final(k, (min(rivals) - loc) / spread) if rivals else None
        chance = self.model.chance_below(k, x, leader) if leader is not None else None
        if chance is None or chance < RESCUE_EARLY:
            return halving
        return None


def make_rule(stopping: Stopping, sets: Sequence[CurveSet] = ()) -> HalvingRule | None:
    """The rule of a ``stopping:`` section (None for ``none``); ``history`` without usable curves is halving."""
    if not stopping.active:
        return None
    if stopping.rule == "history":
        rule = HistoryRule(stopping, sets)
        if rule.model.usable:
            return rule
    return HalvingRule(stopping.rungs(), stopping.eta)
