"""The plain GP on few points, integrated over its hyperparameters.

On three to eight scores the marginal likelihood barely constrains a
lengthscale that the scores do not inform, and the fitted (MAP) value sits at
the prior's median; on the 2-D bowl of tests/test_async_bowl.py the y
lengthscale stayed at 5.8, the model was nearly linear in y and EI went to the
edges (docs/engine.md, "The bowl through `forebear run`"). The integrated
acquisition of Snoek, Larochelle & Adams ("Practical Bayesian Optimization of
Machine Learning Algorithms", NeurIPS 2012) averages EI over the
hyperparameter posterior instead of plugging in one point of it.

The cheap form here is importance sampling with the prior as proposal:
``draws`` lengthscale vectors from the lengthscale prior of
:mod:`forebear.engine.surrogate.gp` and as many noise-to-signal ratios from its
noise prior (read as a prior on the ratio, since targets are standardised),
with the constant mean and the outputscale profiled out in closed form (their
maximum-likelihood values given the rest). Each draw is weighted by its
marginal likelihood; ``keep`` of them are then drawn by systematic resampling
(Kitagawa 1996), and a draw picked ``c`` times gets weight ``c / keep``. The
acquisition scores the weighted mixture of their posteriors
(:class:`forebear.engine.acquisition.Scorer`).
"""

from __future__ import annotations

import math

import gpytorch
import numpy as np
import torch

from forebear.engine.surrogate.gp import (
    DTYPE,
    LENGTHSCALE_SIGMA2,
    NOISE_FLOOR,
    NOISE_MU,
    NOISE_SIGMA2,
    Posterior,
    as_tensor,
    lengthscale_mu,
    standardise,
)

DRAWS = 512  # hyperparameter vectors drawn from the prior
KEEP = 8  # resampled components of the mixture
_LS = (5e-3, 20.0)  # the plain GP's lengthscale bounds (gp._ExactGP)
_OUTPUTSCALE = (0.05, 20.0)  # and its outputscale bounds
_LOG_2PI = math.log(2 * math.pi)


def matern52(X: torch.Tensor, ls: torch.Tensor) -> torch.Tensor:
    """Unit-variance Matérn 5/2 correlation matrices ``(S, n, n)`` of ``X`` ``(n, d)`` for
    lengthscales ``ls`` ``(S, d)`` (Rasmussen & Williams 2006, eq. 4.17)."""
    Z = X.unsqueeze(0) / ls.unsqueeze(1)
    r = torch.cdist(Z, Z)
    s5 = math.sqrt(5.0) * r
    return (1.0 + s5 + s5 * s5 / 3.0) * torch.exp(-s5)


def profiled(X: torch.Tensor, t: torch.Tensor, ls: torch.Tensor, ratio: torch.Tensor
             ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Log marginal likelihood of standardised scores ``t`` for each draw, with the constant
    mean and the outputscale at their maximum-likelihood values; returns ``(loglik, mean,
    outputscale)``, each ``(S,)``. A draw whose matrix is not positive definite gets ``-inf``."""
    n = len(t)
    A = matern52(X, ls) + ratio.view(-1, 1, 1) * torch.eye(n, dtype=X.dtype, device=X.device)
    L, info = torch.linalg.cholesky_ex(A)
    ok = info == 0
    L = torch.where(ok.view(-1, 1, 1), L, torch.eye(n, dtype=X.dtype, device=X.device).expand_as(L))
    ones = torch.ones(n, 1, dtype=X.dtype, device=X.device).expand(len(ls), n, 1)
    ty = t.view(1, n, 1).expand(len(ls), n, 1)
    a1 = torch.cholesky_solve(ones, L)
    mean = (a1 * ty).sum((1, 2)) / (a1 * ones).sum((1, 2))  # generalised least squares
    r = ty - mean.view(-1, 1, 1)
    quad = (r * torch.cholesky_solve(r, L)).sum((1, 2))
    s2 = (quad / n).clamp(*_OUTPUTSCALE)
    logdet = 2.0 * torch.log(torch.diagonal(L, dim1=1, dim2=2)).sum(1)
    ll = -0.5 * (quad / s2 + n * torch.log(s2) + logdet + n * _LOG_2PI)
    return torch.where(ok & torch.isfinite(ll), ll, torch.full_like(ll, -math.inf)), mean, s2


def resample(logw: np.ndarray, keep: int, rng: np.random.Generator) -> dict[int, float]:
    """Systematic resampling of ``keep`` indices by log weights ``logw``: index -> weight
    (its count over ``keep``); the weights sum to 1."""
    w = np.exp(logw - np.max(logw))
    cdf = np.cumsum(w / w.sum())
    u = (rng.uniform() + np.arange(keep)) / keep
    picks = np.minimum(np.searchsorted(cdf, u, side="right"), len(w) - 1)
    idx, counts = np.unique(picks, return_counts=True)
    return {int(i): float(c) / keep for i, c in zip(idx, counts, strict=True)}


def mixture(
    X: np.ndarray,
    y: np.ndarray,
    *,
    draws: int = DRAWS,
    keep: int = KEEP,
    seed: int = 0,
    device: torch.device | str = "cpu",
) -> tuple[list[Posterior], list[float]]:
    """Posteriors of the plain GP at ``keep`` resampled hyperparameter draws and their weights
    (summing to 1), for scores ``y`` (lower is better) at encoded points ``X``.

    Raises ``ValueError`` when no draw has a finite likelihood.
    """
    y = np.asarray(y, dtype=float)
    Xt = as_tensor(X, device)
    shift, scale = standardise(y)
    t = as_tensor((y - shift) / scale, device)
    d = Xt.shape[-1]
    gen = torch.Generator().manual_seed(int(seed))
    z = torch.randn(draws, d, generator=gen, dtype=DTYPE)
    ls = torch.exp(lengthscale_mu(d) + math.sqrt(LENGTHSCALE_SIGMA2) * z).clamp(*_LS).to(device)
    zn = torch.randn(draws, generator=gen, dtype=DTYPE)
    # The noise floor holds even at the smallest outputscale.
    ratio = torch.exp(NOISE_MU + math.sqrt(NOISE_SIGMA2) * zn).clamp_min(NOISE_FLOOR / _OUTPUTSCALE[0]).to(device)
    with torch.no_grad():
        ll, mean, s2 = profiled(Xt, t, ls, ratio)
    logw = ll.cpu().numpy()
    if not np.isfinite(logw).any():
        raise ValueError("no hyperparameter draw has a finite marginal likelihood")
    picked = resample(logw, keep, np.random.default_rng([int(seed), len(y)]))
    models, weights = [], []
    for i, w in picked.items():
        kernel = gpytorch.kernels.ScaleKernel(gpytorch.kernels.MaternKernel(nu=2.5, ard_num_dims=d))
        kernel = kernel.to(device=device, dtype=DTYPE)
        kernel.base_kernel.lengthscale = ls[i].view(1, d)
        kernel.outputscale = s2[i]
        kernel.requires_grad_(False)
        noise = float(ratio[i] * s2[i])
        models.append(Posterior(kernel, float(mean[i]), noise, Xt, as_tensor(y, device), shift, scale, name="gp"))
        weights.append(w)
    return models, weights
