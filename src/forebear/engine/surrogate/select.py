"""The transfer guard: choose between the meta-trained model and the plain GP.

History can mislead when the new search is unlike the earlier ones. The
guard scores each model on what it did not see: the prequential log score
(Dawid 1984), the sum over observations of the log predictive density the
model gave each score *before* that score was added. Each round the proposer
keeps the models it built; the next round, every observation that is new
scores those models, and only then do the models see it.

The scores sum over the last ``window`` observations scored by both models
(a sliding window: the guard asks which model predicts the search *now*; a
model's poor start, such as the plain GP's overconfidence at a handful of
points, is forgotten once ``window`` newer observations have been scored).
The rule, with ``d`` = (plain GP's score) - (meta-trained model's score) in
nats over that window:

- fewer than ``min_scored`` scored observations, or ``d <= 0``: the
  meta-trained model alone (the history is trusted until it is beaten);
- ``d >= margin``: the plain GP alone;
- in between: the mixture with the GP's weight ``d / margin`` (whose EI is
  the weighted sum of the components' EIs).

``margin`` = 3 nats is a log Bayes factor of 3, "strong" evidence on the
Kass & Raftery (1995) scale (2 ln B > 6; value from memory).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

MIN_SCORED = 3  # observations scored by both models before the guard may move away from history
MARGIN = 3.0  # nats by which the plain GP must lead to take over alone
WINDOW = 10  # most recent scored observations the scores sum over


@dataclass
class Choice:
    """The models of one round, their weights, and the name recorded with each proposal."""

    models: list[Any]
    weights: list[float]
    name: str
    loglik: dict[str, float] = field(default_factory=dict)  # prequential score of each model


class Prequential:
    """Running prequential log scores of named models over the same observations.

    ``total`` holds each model's score summed over the last ``window`` scored
    observations, ``count`` how many observations that covers.
    """

    def __init__(self, window: int = WINDOW) -> None:
        self.window = window
        self.rows: list[dict[str, float]] = []  # per scored observation: model -> log density
        self._prev: dict[str, Any] = {}

    @property
    def total(self) -> dict[str, float]:
        recent = self.rows[-self.window:]
        return {k: float(sum(r[k] for r in recent)) for k in (recent[0] if recent else {})}

    @property
    def count(self) -> int:
        return min(len(self.rows), self.window)

    def score(self, X_new: np.ndarray, y_new: np.ndarray) -> None:
        """Score the models kept by :meth:`keep` on observations they did not see."""
        if not len(y_new) or not self._prev:
            return
        lp = {name: np.maximum(np.asarray(post.log_predictive(X_new, y_new), float), -1e6) for name, post in self._prev.items()}
        self.rows += [{name: float(v[i]) for name, v in lp.items()} for i in range(len(y_new))]

    def keep(self, models: Mapping[str, Any]) -> None:
        """The models whose predictions the next new observations will score."""
        if len(models) >= 2:
            self._prev = dict(models)


def weights(scores: Mapping[str, float], count: int, *, prefer: str = "deep-kernel", other: str = "gp",
            min_scored: int = MIN_SCORED, margin: float = MARGIN) -> dict[str, float]:
    """The rule of the module docstring: weights of ``prefer`` and ``other`` from their scores."""
    if count < min_scored or prefer not in scores or other not in scores:
        return {prefer: 1.0, other: 0.0}
    d = scores[other] - scores[prefer]
    if not math.isfinite(d) or d <= 0:
        return {prefer: 1.0, other: 0.0}
    w = min(1.0, d / margin)
    return {prefer: 1.0 - w, other: w}


def choose(
    models: Mapping[str, Any],
    scores: Prequential | None = None,
    *,
    prefer: str = "deep-kernel",
    min_scored: int = MIN_SCORED,
    margin: float = MARGIN,
) -> Choice:
    """Pick or mix ``models`` (``{"gp": ..., "deep-kernel": ...}``) by their prequential scores.

    Parameters
    ----------
    models
        Posteriors conditioned on the same observations.
    scores
        The search's running prequential scores; ``None`` uses ``prefer`` alone.
    prefer
        The model trusted until the other leads by ``margin``.
    """
    if not models:
        raise ValueError("the transfer guard needs at least one model")
    if prefer not in models:
        prefer = next(iter(models))
    if len(models) == 1 or scores is None:
        return Choice([models[prefer]], [1.0], prefer)
    other = next(k for k in models if k != prefer)
    w = weights(scores.total, scores.count, prefer=prefer, other=other, min_scored=min_scored, margin=margin)
    ll = dict(scores.total)
    if w[other] >= 1.0:
        return Choice([models[other]], [1.0], other, ll)
    if w[other] <= 0.0:
        return Choice([models[prefer]], [1.0], prefer, ll)
    names = sorted(w)
    return Choice([models[k] for k in names], [w[k] for k in names], "mix", ll)
