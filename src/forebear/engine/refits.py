"""The plain GP across the rounds of one search: when to refit its hyperparameters, from where.

Each round's plain GP is warm-started from the previous round's hyperparameters.
On few points (up to :data:`FEW`) every refit also tries gpytorch's default
start: a fit there costs milliseconds, and the optimum moves as points arrive
(on the bowl of tests/test_async_bowl.py a warm start from 3 points kept a
lengthscale of 0.1 where a fresh fit on 5 found 0.55). Past that, every fourth
refit tries it, so that a poor local optimum is not kept forever; and
hyperparameters fitted on ``n`` points are kept (only the posterior is rebuilt
on the current points) until the search has :data:`REFIT_GROWTH` more, since a
few more points barely move them and the fit was a fifth of a round's time at
200 points (docs/engine.md).

Without a meta-trained model, a search with up to :func:`integrate_upto` scores hands
the acquisition a mixture over the hyperparameter posterior instead
(:mod:`forebear.engine.surrogate.samples`; docs/engine.md, "The bowl through
`forebear run`").
"""

from __future__ import annotations

import math

import numpy as np
import torch

from forebear.engine.surrogate import samples
from forebear.engine.surrogate.gp import Posterior, fit_gp

FEW = 40  # observations up to which every refit also tries the default start
REFIT_GROWTH = 0.1  # past FEW, hyperparameters are refitted once the observations grew by this fraction


INTEGRATE_CAP = 20  # a cost bound: 512 draws of n x n matrices; unchanged for the measured d = 2, 3, 6


def integrate_upto(dim: int) -> int:
    """Scores up to which the plain GP alone is integrated over its hyperparameters, ``2 (dim + 1)``
    (a constant 10 measured worse on the smoke benchmark's branin, docs/engine.md), at most
    :data:`INTEGRATE_CAP`, so that a wide encoded space (one-hot categories) does not build
    512 matrices of a hundred points or more."""
    return min(2 * (dim + 1), INTEGRATE_CAP)


class Refits:
    """The plain GP of successive rounds, refitted by the rule of the module docstring."""

    def __init__(self, seed: int = 0, device: str = "cpu") -> None:
        self.seed, self.device = seed, device
        self.state: dict[str, torch.Tensor] | None = None
        self.fits = 0  # fits that optimised the hyperparameters
        self.n = 0  # observations of the last such fit

    def posterior(self, X: np.ndarray, y: np.ndarray) -> Posterior:
        """This round's plain-GP posterior on ``(X, y)``."""
        if self.state is not None and FEW < len(y) < (1.0 + REFIT_GROWTH) * self.n:
            kept = fit_gp(X, y, restarts=1, init=self.state, max_iter=0, seed=self.seed, device=self.device)
            if math.isfinite(kept.mll):
                return kept.posterior
        self.fits += 1
        if self.state is None:
            restarts = 3 if len(y) <= 100 else 1  # a cold fit on many points is slow; one start
        else:
            restarts = 2 if len(y) <= FEW or self.fits % 4 == 0 else 1
        fit = fit_gp(X, y, restarts=restarts, init=self.state, seed=self.seed, device=self.device)
        self.state, self.n = fit.state, len(y)
        return fit.posterior

    def mixture(self, X: np.ndarray, y: np.ndarray) -> tuple[list[Posterior], list[float]]:
        """This round's plain GP as the acquisition takes it: posteriors and weights.

        Up to :func:`integrate_upto` scores, the mixture of :func:`samples.mixture`;
        past that, the fitted posterior alone. The fit runs either way, so that
        its warm start is there when the mixture stops.
        """
        post = self.posterior(X, y)
        if len(y) > integrate_upto(X.shape[-1]):
            return [post], [1.0]
        try:
            return samples.mixture(X, y, seed=self.seed + len(y), device=self.device)
        except ValueError:
            return [post], [1.0]
