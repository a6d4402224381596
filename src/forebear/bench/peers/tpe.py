"""The tree-structured Parzen estimator, TPE (Bergstra, Bardenet, Bengio & Kegl, NeurIPS 2011).

"Algorithms for hyper-parameter optimization", section 4 (from memory):
split the observations at ``y*``, the ``gamma`` quantile of the scores; model
``p(x | y < y*) = l(x)`` and ``p(x | y >= y*) = g(x)`` by Parzen estimators;
with ``p(y < y*) = gamma``, EI at ``y*`` is proportional to
``(gamma + (1 - gamma) g(x) / l(x))^-1`` (eq. 6), so it grows with
``l(x) / g(x)``: draw candidates from ``l`` and propose the one with the
largest ratio. The search starts with random configurations.

Our space is flat (no conditional parameters), so the tree is a product of
one estimator per parameter, on the space's unit coordinates (a log
parameter is then modelled on the log scale, as in the paper):

* float and int: the adaptive Parzen estimator, a mixture with equal weights
  of Gaussians truncated to ``[0, 1]``, one per observation plus one for the
  prior (centre 0.5, width 1); each observation's width is the larger
  distance to its neighbours (the bounds for the outermost), clipped to
  ``[1 / min(100, n + 1), 1]``. Ints are rounded after drawing (the paper uses
  quantised distributions; rounding is our simplification).
* categorical: the prior's counts (one per category) plus the observed counts.

Pending trials and failed configurations join the worse group ``g``: the
next draw then avoids them (our choice, common practice, no source).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import ndtr, ndtri

from forebear.bench.peers._base import Peer
from forebear.core.space import Space
from forebear.engine import acquisition
from forebear.engine.proposals import Observation, Proposal

#: The paper's quantile for the good group (from memory).
GAMMA = 0.15
#: Random configurations before the model (the paper's runs used more; 10 fits a 25-50 trial budget: rule of thumb).
N_STARTUP = 10
#: Candidates drawn from l per proposal (our choice).
N_CANDIDATES = 24
_LOG_SQRT_2PI = 0.5 * math.log(2 * math.pi)


@dataclass(frozen=True)
class Parzen1D:
    """A mixture of Gaussians truncated to ``[0, 1]`` with equal weights."""

    mus: np.ndarray
    sigmas: np.ndarray

    @classmethod
    def fit(cls, points: np.ndarray, prior_mu: float = 0.5, prior_sigma: float = 1.0) -> Parzen1D:
        """The adaptive Parzen estimator of ``points`` (values in ``[0, 1]``) with the prior component."""
        pts = np.asarray(points, dtype=float)
        allm = np.append(pts, prior_mu)
        order = np.argsort(allm, kind="stable")
        mus = allm[order]
        edges = np.concatenate([[0.0], mus, [1.0]])
        sigmas = np.maximum(mus - edges[:-2], edges[2:] - mus)
        lo = prior_sigma / min(100.0, len(pts) + 1.0)
        sigmas = np.clip(sigmas, lo, prior_sigma)
        # The prior keeps its own width.
        sigmas[np.nonzero(order == len(pts))[0][0]] = prior_sigma
        return cls(mus, sigmas)

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        """log density at ``x`` ``(m,)``."""
        x = np.asarray(x, dtype=float)[:, None]
        a, b = (0.0 - self.mus) / self.sigmas, (1.0 - self.mus) / self.sigmas
        mass = ndtr(b) - ndtr(a)
        z = (x - self.mus) / self.sigmas
        logs = -0.5 * z * z - _LOG_SQRT_2PI - np.log(self.sigmas) - np.log(mass)
        top = logs.max(axis=1, keepdims=True)
        return (top + np.log(np.exp(logs - top).mean(axis=1, keepdims=True)))[:, 0]

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` draws: a component uniformly, then its truncated Gaussian (by inversion)."""
        k = rng.integers(len(self.mus), size=n)
        mu, s = self.mus[k], self.sigmas[k]
        lo, hi = ndtr((0.0 - mu) / s), ndtr((1.0 - mu) / s)
        u = lo + rng.random(n) * (hi - lo)
        return np.clip(mu + s * ndtri(np.clip(u, 1e-300, 1 - 1e-16)), 0.0, 1.0)


@dataclass(frozen=True)
class Categorical:
    """Category probabilities: prior count one each, plus the observed counts."""

    probs: np.ndarray

    @classmethod
    def fit(cls, onehot: np.ndarray, width: int) -> Categorical:
        counts = np.ones(width) + (np.asarray(onehot).reshape(-1, width).sum(axis=0) if len(onehot) else 0.0)
        return cls(counts / counts.sum())

    def logpdf(self, onehot: np.ndarray) -> np.ndarray:
        return np.log(self.probs[np.argmax(onehot, axis=1)])

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        return np.eye(len(self.probs))[rng.choice(len(self.probs), size=n, p=self.probs)]


class Density:
    """The product of one estimator per parameter over the space's unit coordinates."""

    def __init__(self, space: Space, X: np.ndarray) -> None:
        self.space = space
        self.parts: list[tuple[slice, Parzen1D | Categorical]] = []
        start = 0
        for p in space.params:
            cols = slice(start, start + p.width)
            if p.kind == "categorical":
                self.parts.append((cols, Categorical.fit(X[:, cols], p.width)))
            else:
                self.parts.append((cols, Parzen1D.fit(X[:, start])))
            start += p.width

    def logpdf(self, X: np.ndarray) -> np.ndarray:
        """log density of encoded points ``(m, dim)``."""
        X = np.atleast_2d(X)
        out = np.zeros(len(X))
        for cols, est in self.parts:
            out += est.logpdf(X[:, cols]) if isinstance(est, Categorical) else est.logpdf(X[:, cols.start])
        return out

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` encoded draws, snapped to valid configurations (ints rounded)."""
        X = np.zeros((n, self.space.dim))
        for cols, est in self.parts:
            if isinstance(est, Categorical):
                X[:, cols] = est.sample(n, rng)
            else:
                X[:, cols.start] = est.sample(n, rng)
        return acquisition.project(self.space, X)


def split(y: np.ndarray, gamma: float = GAMMA) -> np.ndarray:
    """Indices of the good group: the ``ceil(gamma * n)`` lowest scores (at least one)."""
    k = max(1, math.ceil(gamma * len(y)))
    return np.argsort(y, kind="stable")[:k]


def ei_from_ratio(ratio: np.ndarray, gamma: float = GAMMA) -> np.ndarray:
    """EI at ``y*`` up to a positive factor, ``(gamma + (1 - gamma) / ratio)^-1`` with ``ratio = l / g`` (eq. 6)."""
    return 1.0 / (gamma + (1.0 - gamma) / np.asarray(ratio, dtype=float))


class TPE(Peer):
    """``tpe``: cold search by the tree-structured Parzen estimator.

    Parameters
    ----------
    space
        The search space.
    history
        Ignored: TPE is the cold baseline (accepted so every method is built alike).
    seed
        Seed of the random start and of the draws.
    gamma, n_startup, n_candidates
        The quantile of the good group, the random start's size, the draws from ``l`` per proposal.
    """

    name = "tpe"

    def __init__(self, space: Space, history: Any = None, seed: int = 0, *, gamma: float = GAMMA,
                 n_startup: int = N_STARTUP, n_candidates: int = N_CANDIDATES) -> None:
        super().__init__(space, seed)
        if not 0.0 < gamma < 1.0:
            msg = f"gamma must be in (0, 1), got {gamma}"
            raise ValueError(msg)
        if n_startup < 1 or n_candidates < 1:
            msg = f"n_startup and n_candidates must be >= 1, got {n_startup}, {n_candidates}"
            raise ValueError(msg)
        self.gamma, self.n_startup, self.n_candidates = gamma, n_startup, n_candidates
        self.last: dict[str, np.ndarray] | None = None  # candidates and log l, log g of the last pick

    def densities(self, scored: Sequence[Observation], others: Sequence[dict[str, Any]]) -> tuple[Density, Density]:
        """``l`` and ``g``: the good group, and the rest plus ``others`` (failed, pending)."""
        X = self.encode([o.config for o in scored])
        y = np.array([float(o.score) for o in scored])
        good = np.zeros(len(y), dtype=bool)
        good[split(y, self.gamma)] = True
        bad = np.vstack([X[~good], self.encode(others)]) if others else X[~good]
        return Density(self.space, X[good]), Density(self.space, bad)

    def _propose(self, n: int, scored: list[Observation], failed: list[dict[str, Any]],
                 pending: list[dict[str, Any]], seen: set[bytes]) -> list[Proposal]:
        out: list[Proposal] = []
        extra = list(failed) + list(pending)
        tries = 0
        while len(out) < n and tries < 200 * n:
            tries += 1
            if len(scored) + len(failed) + len(pending) + len(out) < self.n_startup or not scored:
                config = self.space.sample(1, self._rng)[0]
                if self.claim(config, seen):
                    out.append(Proposal(config, "initial"))
                continue
            pick = self._pick(scored, extra + [p.config for p in out], seen)
            if pick is None:
                break
            out.append(pick)
        return out

    def _pick(self, scored: list[Observation], others: list[dict[str, Any]], seen: set[bytes]) -> Proposal | None:
        l_dens, g_dens = self.densities(scored, others)
        for _ in range(10):
            cand = l_dens.sample(self.n_candidates, self._rng)
            log_l, log_g = l_dens.logpdf(cand), g_dens.logpdf(cand)
            score = log_l - log_g
            self.last = {"X": cand, "log_l": log_l, "log_g": log_g}
            for i in np.argsort(-score, kind="stable"):
                config = self.space.decode(cand[i])
                if self.claim(config, seen):
                    value = float(np.log(ei_from_ratio(np.exp(score[i]), self.gamma)))
                    return Proposal(config, "model", self.name, value)
        return None
