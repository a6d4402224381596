"""The few-shot surrogate: a GP with a learned prior mean and a deep kernel, meta-trained on history.

The model of one task, in that task's standardised units ``t``::

    t(x) = c + a * m(x) + r(x),     c ~ N(0, v_c),  a ~ N(a_0, v_a),
    r ~ GP(0, lam * (s_f * k(phi(x), phi(x')) + s_x * k_x(x, x'))),  noise s_n >= floor

``phi`` is an MLP feature map and ``m`` a prior mean, a second small MLP
fitted by least squares to the history's task-standardised scores (the
history's average surface); ``k`` is a Matérn-5/2 (or RBF)
kernel on the features and ``k_x`` a small ARD Matérn-5/2 on the raw inputs
(so the kernel cannot collapse onto a few features). Offset ``c`` and
amplitude ``a`` have Gaussian priors and are integrated out in closed form,
which makes the whole model one GP with fixed hyperparameters; ``lam``, the
residual amplitude, is chosen per task on a small grid by marginal likelihood
plus a log-normal prior. Nothing else moves on a new task: no gradient step
touches the feature map.

Meta-training uses episodes exactly as proposals use the model: a history
task, a support set of 1-20 of its points, standardised on their own mean
and spread as the proposer does, the closed-form refit above, and the loss
the negative predictive log-likelihood of a query set from the same task.
Held-out history tasks, scored the same way, decide when to stop.
This module never touches files: the proposer caches ``state_dict()``.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.nn.functional import softplus

from forebear.engine.surrogate.gp import (
    DTYPE,
    MAX_EXACT,
    Predictive,
    as_tensor,
    standardise,
    subset,
)
from forebear.engine.surrogate.meta_train import MetaReport

FORMAT = 3  # bump when the state layout changes, so old cache entries are not reused
LAMBDAS = (0.25, 0.5, 1.0, 2.0, 4.0)  # grid of the per-task residual amplitude
LAMBDA_PRIOR_SD = 1.0  # sd of log(lam): a weak prior around the meta-trained amplitude
# Grid of the per-task noise, as multiples of the meta-trained noise (floored at the relative
# floor): meta-training learns the noise of warped, imperfectly fitted episodes, which for a
# noiseless objective blurs the refinement near the best point (docs/engine.md).
NOISE_SCALES = (1.0, 0.1, 0.01)
_LOG_2PI = math.log(2 * math.pi)
_SQRT5 = math.sqrt(5.0)


@dataclass(frozen=True)
class Settings:
    """Deep-kernel settings (docs/engine.md explains the defaults and the measurements behind them)."""

    width: int = 64  # hidden units per layer
    depth: int = 2  # hidden layers
    features: int = 16  # dimension of the feature space the kernel sees
    kernel: str = "matern"  # matern (Matérn 5/2) or rbf, on the features
    raw_kernel: bool = True  # add a small ARD Matérn-5/2 on the raw inputs
    prior_mean: bool = True  # learn a prior mean from history
    augment: bool = True  # task augmentation: a random monotone warp of each episode's scores
    noise_floor: float = 1e-3  # noise variance floor, relative to the task's score variance
    max_steps: int = 1500  # Adam steps of meta-training at most
    tasks_per_step: int = 8  # episodes per step
    max_support: int = 20  # support sets of 1 .. max_support points
    query: int = 32  # query points per episode
    lr: float = 3e-3  # Adam learning rate
    eval_every: int = 100  # steps between held-out evaluations
    patience: int = 4  # evaluations without improvement before stopping
    holdout: float = 0.2  # share of history tasks held out for early stopping
    seed: int = 0

    def __post_init__(self) -> None:
        if self.kernel not in ("matern", "rbf"):
            msg = f"deep-kernel kernel must be 'matern' or 'rbf', got {self.kernel!r}"
            raise ValueError(msg)
        for name in ("width", "depth", "features", "tasks_per_step", "max_support", "query", "eval_every", "patience"):
            if getattr(self, name) < 1:
                msg = f"deep-kernel {name} must be >= 1, got {getattr(self, name)}"
                raise ValueError(msg)
        if not 0.0 < self.noise_floor < 1.0:
            msg = f"deep-kernel noise_floor must be in (0, 1), got {self.noise_floor}"
            raise ValueError(msg)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def _dist(A: torch.Tensor, B: torch.Tensor) -> torch.Tensor:
    """Euclidean distances, batched over leading dims, clamped so the gradient stays finite at 0."""
    d2 = (A * A).sum(-1, keepdim=True) - 2 * A @ B.transpose(-1, -2) + (B * B).sum(-1).unsqueeze(-2)
    return d2.clamp_min(1e-12).sqrt()


def _cdist(A: torch.Tensor, B: torch.Tensor) -> torch.Tensor:
    return torch.cdist(A, B)


def _matern_r(r: torch.Tensor) -> torch.Tensor:
    """Matérn-5/2 of distance ``r`` at unit lengthscale (Rasmussen & Williams 2006, eq. 4.17)."""
    s5 = _SQRT5 * r
    return (1.0 + s5 + s5 * s5 / 3.0) * torch.exp(-s5)


def _rbf_r(r: torch.Tensor) -> torch.Tensor:
    return torch.exp(-0.5 * r * r)


class DeepKernel(nn.Module):
    """Feature map, prior mean and the kernel's few global hyperparameters."""

    def __init__(self, dim: int, settings: Settings) -> None:
        super().__init__()
        self.settings = settings
        layers: list[nn.Module] = []
        width_in = dim
        for _ in range(settings.depth):
            layers += [nn.Linear(width_in, settings.width), nn.Tanh()]
            width_in = settings.width
        self.trunk = nn.Sequential(*layers)
        self.head = nn.Linear(width_in, settings.features)
        # The prior mean: its own MLP, fitted by least squares to the history (meta_train.fit_mean),
        # not through the episodes' likelihood, which made it a basis rather than the average.
        self.mean_net = nn.Sequential(
            nn.Linear(dim, settings.width), nn.Tanh(), nn.Linear(settings.width, settings.width), nn.Tanh(),
            nn.Linear(settings.width, 1),
        )
        # Log-variances and the raw kernel's log-lengthscales; start where standardised tasks are.
        self.log_vf = nn.Parameter(torch.tensor(math.log(0.5)))
        self.log_vx = nn.Parameter(torch.tensor(math.log(0.2)))
        self.log_lx = nn.Parameter(torch.full((dim,), math.log(0.3)))
        self.log_vc = nn.Parameter(torch.tensor(math.log(0.5)))
        # The amplitude's prior mean starts at 1: the mean is the history's average, in task units.
        self.log_va = nn.Parameter(torch.tensor(math.log(0.2)))
        self.a0 = nn.Parameter(torch.tensor(1.0 if settings.prior_mean else 0.0))
        self.raw_noise = nn.Parameter(torch.tensor(-4.0))
        self.to(DTYPE)

    def parts(self, X: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Features ``phi(X)`` and prior mean ``m(X)`` (zero without a learned mean)."""
        u = 2.0 * X - 1.0
        m = self.mean_net(u).squeeze(-1) if self.settings.prior_mean else torch.zeros(X.shape[:-1], dtype=X.dtype, device=X.device)
        return self.head(self.trunk(u)), m

    def noise(self) -> torch.Tensor:
        return self.settings.noise_floor + softplus(self.raw_noise)

    def residual(self, XA: torch.Tensor, ZA: torch.Tensor, XB: torch.Tensor, ZB: torch.Tensor, fast: bool = False) -> torch.Tensor:
        """Residual covariance at ``lam = 1``.

        ``fast`` takes distances from ``torch.cdist`` (prediction, where points rarely
        coincide); training uses the clamped form, whose gradient is finite at distance 0.
        """
        dist = _cdist if fast else _dist
        k = _matern_r if self.settings.kernel == "matern" else _rbf_r
        K = torch.exp(self.log_vf) * k(dist(ZA, ZB))
        if self.settings.raw_kernel:
            ls = torch.exp(self.log_lx)
            K = K + torch.exp(self.log_vx) * _matern_r(dist(XA / ls, XB / ls))
        return K

    def residual_var(self) -> torch.Tensor:
        v = torch.exp(self.log_vf)
        return v + torch.exp(self.log_vx) if self.settings.raw_kernel else v

    def affine(self, mA: torch.Tensor, mB: torch.Tensor) -> torch.Tensor:
        """Covariance of the integrated-out offset and amplitude: ``v_c + v_a m(x) m(x')``."""
        return torch.exp(self.log_vc) + torch.exp(self.log_va) * mA.unsqueeze(-1) * mB.unsqueeze(-2)


def _lml(t: torch.Tensor, mean: torch.Tensor, K: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Log marginal likelihood (batched), the Cholesky factor and ``K^-1 (t - mean)``."""
    L = _chol(K)
    r = (t - mean).unsqueeze(-1)
    alpha = torch.cholesky_solve(r, L)
    ll = -0.5 * (r * alpha).sum((-1, -2)) - torch.log(torch.diagonal(L, dim1=-2, dim2=-1)).sum(-1) - 0.5 * t.shape[-1] * _LOG_2PI
    return ll, L, alpha.squeeze(-1)


def _chol(K: torch.Tensor) -> torch.Tensor:
    eye = torch.eye(K.shape[-1], dtype=K.dtype, device=K.device)
    jitter = 0.0
    for _ in range(6):
        L, info = torch.linalg.cholesky_ex(K + jitter * eye)
        if not bool((info != 0).any()):
            return L
        jitter = 1e-9 if jitter == 0.0 else jitter * 10
    return torch.linalg.cholesky(K + 1e-3 * eye)


GRID = tuple((lam, ns) for lam in LAMBDAS for ns in NOISE_SCALES)  # the refit's (lam, noise scale) pairs


def _pick_grid(ll_by_grid: torch.Tensor) -> torch.Tensor:
    """Index into :data:`GRID` with the best marginal likelihood plus the prior (last dim).

    The prior is log-normal on ``lam`` and flat over the noise scales.
    """
    prior = torch.tensor([-0.5 * (math.log(lam) / LAMBDA_PRIOR_SD) ** 2 for lam, _ in GRID], dtype=ll_by_grid.dtype, device=ll_by_grid.device)
    return torch.argmax(ll_by_grid + prior, dim=-1)


def grid_noise(net: DeepKernel, scale: float | torch.Tensor) -> torch.Tensor:
    """The noise variance at a grid scale, floored at the relative floor."""
    return (net.noise() * scale).clamp_min(net.settings.noise_floor)


class MetaPosterior(Predictive):
    """The model's posterior on one task's observations; the interface of ``gp.Posterior``.

    Predictions are in original units: ``y = shift + scale * t``.
    """

    def __init__(
        self, net: DeepKernel, X: torch.Tensor, y: torch.Tensor, shift: float, scale: float, lam: float,
        name: str = "deep-kernel", blocks: tuple[torch.Tensor, ...] | None = None, noise_scale: float = 1.0,
    ) -> None:
        self.net, self.X, self.y = net, X, y
        self.shift, self.scale, self.lam, self.name = float(shift), float(scale), float(lam), name
        self.noise_scale = float(noise_scale)
        with torch.no_grad():
            self.noise = float(grid_noise(net, self.noise_scale))
            # (features, prior mean, affine block, residual block) of X: shared by the refit's
            # grid and extended, not recomputed, when conditioning on lies.
            self.blocks = blocks if blocks is not None else _blocks(net, X)
            self._Z, self._m, A, R = self.blocks
            t = (y - self.shift) / self.scale
            K = A + self.lam * R + self.noise * torch.eye(len(X), dtype=X.dtype, device=X.device)
            self.lml, self._L, self._alpha = _lml(t, self._mean(self._m), K)
            self._prior_res = float(net.residual_var()) * self.lam

    @property
    def n(self) -> int:
        return len(self.X)

    def _mean(self, m: torch.Tensor) -> torch.Tensor:
        return self.net.a0 * m

    def _cov(self, XA: torch.Tensor, ZA: torch.Tensor, mA: torch.Tensor, XB: torch.Tensor, ZB: torch.Tensor, mB: torch.Tensor) -> torch.Tensor:
        return self.net.affine(mA, mB) + self.lam * self.net.residual(XA, ZA, XB, ZB, fast=True)

    def predict_t(self, Xs: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Mean and latent variance at ``Xs`` in original units (differentiable in ``Xs``)."""
        Zs, ms = self.net.parts(Xs)
        Ks = self._cov(Xs, Zs, ms, self.X, self._Z, self._m)
        mu = self._mean(ms) + Ks @ self._alpha
        v = torch.linalg.solve_triangular(self._L, Ks.T, upper=False)
        prior = torch.exp(self.net.log_vc) + torch.exp(self.net.log_va) * ms * ms + self._prior_res
        var = (prior - (v * v).sum(0)).clamp_min(1e-12)
        return self.shift + self.scale * mu, var * self.scale**2

    def condition(self, X_new: torch.Tensor, y_new: torch.Tensor) -> MetaPosterior:
        """The posterior after also seeing ``(X_new, y_new)``, hyperparameters unchanged."""
        net = self.net
        with torch.no_grad():
            Zn, mn = net.parts(X_new)
            A_on, R_on = net.affine(self._m, mn), net.residual(self.X, self._Z, X_new, Zn, fast=True)
            A_nn, R_nn = net.affine(mn, mn), net.residual(X_new, Zn, X_new, Zn)
            _, _, A, R = self.blocks
            blocks = (
                torch.cat([self._Z, Zn]), torch.cat([self._m, mn]),
                torch.cat([torch.cat([A, A_on], 1), torch.cat([A_on.T, A_nn], 1)]),
                torch.cat([torch.cat([R, R_on], 1), torch.cat([R_on.T, R_nn], 1)]),
            )
        return MetaPosterior(net, torch.cat([self.X, X_new]), torch.cat([self.y, y_new]), self.shift, self.scale, self.lam, self.name, blocks, self.noise_scale)


def _blocks(net: DeepKernel, X: torch.Tensor) -> tuple[torch.Tensor, ...]:
    Z, m = net.parts(X)
    return Z, m, net.affine(m, m), net.residual(X, Z, X, Z)


class MetaModel:
    """A meta-trained deep-kernel GP and what it does for the proposer.

    Parameters
    ----------
    dim
        Width of the encoded space.
    settings
        :class:`Settings`.
    device
        ``"cpu"`` or ``"cuda"``.
    """

    def __init__(self, dim: int, settings: Settings | None = None, device: str = "cpu") -> None:
        self.dim = dim
        self.settings = settings or Settings()
        self.device = torch.device(device)
        torch.manual_seed(self.settings.seed)
        self.net = DeepKernel(dim, self.settings).to(self.device)
        self.net.requires_grad_(False)
        self.report: MetaReport | None = None

    # -- meta-training ------------------------------------------------------

    def meta_train(self, tasks: Sequence[tuple[np.ndarray, np.ndarray]]) -> MetaReport:
        """Meta-train on history tasks ``[(X, y), ...]`` (lower is better); see :mod:`.meta_train`."""
        from forebear.engine.surrogate.meta_train import train

        self.report = train(self, tasks)
        return self.report

    # -- the current search -------------------------------------------------

    def posterior(
        self, X: np.ndarray, y: np.ndarray, *, fine_tune: bool = True, max_exact: int = MAX_EXACT, seed: int = 0, spread: float = 1.0,
    ) -> MetaPosterior:
        """Posterior on the current search's observations.

        Scores are standardised on their own mean and on ``spread`` times their own spread
        (``engine/spread.py`` measures the factor on history); offset and amplitude are
        integrated out; with ``fine_tune`` the residual amplitude is chosen on the grid
        ``LAMBDAS`` and the noise on ``NOISE_SCALES`` (otherwise both stay at the meta-trained values).
        """
        y = np.asarray(y, float)
        idx = subset(y, max_exact, np.random.default_rng(seed))
        Xt, yt = as_tensor(np.asarray(X)[idx], self.device), as_tensor(y[idx], self.device)
        shift, scale = standardise(y[idx])
        scale *= float(spread)
        if not fine_tune or len(idx) < 2:
            return MetaPosterior(self.net, Xt, yt, shift, scale, 1.0)
        with torch.no_grad():
            blocks = _blocks(self.net, Xt)
        posts = [MetaPosterior(self.net, Xt, yt, shift, scale, lam, blocks=blocks, noise_scale=ns) for lam, ns in GRID]
        best = int(_pick_grid(torch.stack([p.lml for p in posts])))
        return posts[best]

    # -- state --------------------------------------------------------------

    def state_dict(self) -> dict[str, torch.Tensor]:
        """Tensors only, so that the cache loads with ``torch.load(weights_only=True)``."""
        return {k: v.detach().cpu() for k, v in self.net.state_dict().items()}

    def load_state_dict(self, state: Mapping[str, torch.Tensor]) -> None:
        self.net.load_state_dict(dict(state))
        self.net.requires_grad_(False)


def cache_key(history_hash: str, space: Mapping[str, Any], settings: Settings) -> str:
    """Key of a meta-trained state: hash of (history contents, space, settings, format)."""
    body = {"history": history_hash, "space": space, "settings": settings.to_dict(), "format": FORMAT}
    return hashlib.sha256(json.dumps(body, sort_keys=True, default=str).encode()).hexdigest()[:24]
