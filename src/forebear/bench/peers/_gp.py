"""GP pieces the GP-based peers share, built on the engine's own GP and acquisition.

* :class:`Ensemble`: EI on a weighted sum of independent GP posteriors,
  ``N(sum_i w_i mu_i, sum_i w_i^2 s_i^2)`` (the RGPE model, Feurer, Letham &
  Bakshy 2018, eq. 5 from memory); one model of weight 1 is plain GP-EI.
  It has the interface :func:`forebear.engine.acquisition.batch` expects of
  a scorer, so candidate search and refinement are the engine's.
* pending points and earlier points of a batch enter by the kriging believer
  (Ginsbourger, Le Riche & Carraro 2010): each model is conditioned on its
  own posterior mean there. Means stay as they are, variance shrinks near the
  point, so the next pick moves away without any optimistic lie.
* :func:`joint` gives a posterior's joint mean and covariance at a few
  points (RGPE samples from it).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import torch

from forebear.core.space import Space
from forebear.engine import acquisition
from forebear.engine.surrogate.gp import Posterior, as_tensor, dense_kernel, fit_gp


class Ensemble:
    """log-EI of the weighted GP ensemble below ``best``; models of weight 0 are skipped."""

    def __init__(self, models: Sequence[Posterior], weights: Sequence[float], best: float) -> None:
        kept = [(m, float(w)) for m, w in zip(models, weights, strict=True) if w > 0]
        if not kept:
            raise ValueError("an ensemble needs at least one model of positive weight")
        self.models = [m for m, _ in kept]
        self.weights = [w for _, w in kept]
        self.best = float(best)

    def moments(self, X: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Mean and variance of the ensemble at ``X`` (differentiable)."""
        mean = torch.zeros(len(X), dtype=X.dtype, device=X.device)
        var = torch.zeros_like(mean)
        for m, w in zip(self.models, self.weights, strict=True):
            mu, v = m.predict_t(X)
            mean = mean + w * mu
            var = var + w * w * v
        return mean, var

    def __call__(self, X: torch.Tensor) -> torch.Tensor:
        mean, var = self.moments(X)
        return acquisition.log_ei(mean, var, self.best)

    @property
    def device(self) -> torch.device:
        return self.models[0].X.device

    def condition(self, X: torch.Tensor, y: torch.Tensor | None = None) -> Ensemble:
        """The ensemble after a kriging-believer fantasy at ``X``; ``y`` is ignored.

        :func:`forebear.engine.acquisition.batch` passes its constant lie here;
        the peers pass ``nan`` and every model believes its own mean instead.
        """
        if len(X) == 0:
            return self
        out = []
        with torch.no_grad():
            for m in self.models:
                mu, _ = m.predict_t(X)
                out.append(m.condition(X, mu))
        return Ensemble(out, self.weights, self.best)

    def lie(self, X: torch.Tensor, value: float | str) -> Ensemble:
        """What :func:`forebear.engine.acquisition.batch` calls between picks: the believer
        fantasy of :meth:`condition` whatever the lie (the peers' papers condition this way)."""
        return self.condition(X)


def fit(X: np.ndarray, y: np.ndarray, seed: int, state: dict[str, torch.Tensor] | None = None,
        restarts: int = 3) -> tuple[Posterior, dict[str, torch.Tensor]]:
    """The engine's plain GP on ``(X, y)`` (``fit_gp``), warm-started from ``state`` when given."""
    res = fit_gp(X, y, restarts=restarts, init=state, seed=seed)
    return res.posterior, res.state


def joint(post: Posterior, Xs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Joint latent mean ``(m,)`` and covariance ``(m, m)`` of ``post`` at ``Xs``, original units.

    The GP posterior covariance ``K** - K*x (Kxx + s^2 I)^-1 Kx*`` (Rasmussen &
    Williams 2006, eq. 2.24) with the posterior's own kernel and noise.
    """
    with torch.no_grad():
        Zs = as_tensor(Xs, post.X.device)
        mean, _ = post.predict_t(Zs)
        Kxx = dense_kernel(post.kernel, post.X, post.X)
        Kxx = Kxx + post.noise * torch.eye(len(post.X), dtype=Kxx.dtype, device=Kxx.device)
        Ksx = dense_kernel(post.kernel, Zs, post.X)
        L = torch.linalg.cholesky(Kxx + 1e-9 * torch.eye(len(Kxx), dtype=Kxx.dtype, device=Kxx.device))
        V = torch.linalg.solve_triangular(L, Ksx.T, upper=False)
        cov = dense_kernel(post.kernel, Zs, Zs) - V.T @ V
    return mean.cpu().numpy(), cov.cpu().numpy() * post.scale**2


def draws(mean: np.ndarray, cov: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """``n`` joint Gaussian draws, shape ``(n, len(mean))``; jitter grows until the factor exists."""
    m = len(mean)
    scale = max(float(np.max(np.diag(cov), initial=0.0)), 1e-12)
    for jitter in (1e-10, 1e-8, 1e-6, 1e-4):
        try:
            L = np.linalg.cholesky(cov + jitter * scale * np.eye(m))
            break
        except np.linalg.LinAlgError:
            continue
    else:
        L = np.diag(np.sqrt(np.clip(np.diag(cov), 0.0, None)))
    return mean + rng.standard_normal((n, m)) @ L.T


def ei_batch(
    space: Space,
    scorer: Ensemble,
    m: int,
    taken: np.ndarray,
    anchors: np.ndarray,
    rng: np.random.Generator,
    n_sobol: int = 2048,
) -> list[tuple[np.ndarray, float]]:
    """``m`` points by the engine's candidate search, the batch filled by the kriging believer."""
    return acquisition.batch(space, scorer, m, math.nan, taken=taken, anchors=anchors, rng=rng, n_sobol=n_sobol)
