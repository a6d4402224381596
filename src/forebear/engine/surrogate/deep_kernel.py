"""The few-shot surrogate: a GP on a deep kernel, meta-trained across history tasks.

A small MLP maps the encoded space to a low-dimensional feature space; a
Matérn-5/2 (or RBF) kernel acts on the features. Meta-training samples a
history task and a batch of its points, rescales the task's scores to a random
interval ``[l, u]`` inside the meta-data's range (task augmentation, so that
only rankings carry over), and takes an Adam step on the negative marginal
likelihood with respect to the network weights and kernel hyperparameters;
held-out history tasks decide when to stop. On the current search, each refit
fine-tunes a copy of the meta-trained state for a few steps (no augmentation).
This module never touches files: the proposer caches ``state_dict()``.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import gpytorch
import numpy as np
import torch
from gpytorch.constraints import Interval
from torch import nn

from forebear.engine.surrogate.gp import (
    DTYPE,
    MAX_EXACT,
    NOISE_FLOOR,
    Posterior,
    as_tensor,
    dense_kernel,
    subset,
)

FORMAT = 1  # bump when the state layout changes, so old cache entries are not reused


@dataclass(frozen=True)
class Settings:
    """Deep-kernel settings (docs/engine.md explains the defaults)."""

    width: int = 32  # hidden units per layer
    depth: int = 2  # hidden layers
    features: int = 4  # dimension of the feature space the kernel sees
    kernel: str = "matern"  # matern (Matérn 5/2) or rbf
    augment: bool = True  # task augmentation during meta-training
    max_steps: int = 2000  # Adam steps of meta-training at most
    batch: int = 64  # points per meta-training step
    lr: float = 3e-3  # Adam learning rate of meta-training
    eval_every: int = 50  # steps between held-out evaluations
    patience: int = 6  # evaluations without improvement before stopping
    holdout: float = 0.2  # share of history tasks held out for early stopping
    fine_tune_steps: int = 10  # Adam steps on the current search at each refit
    fine_tune_lr: float = 1e-3  # Adam learning rate of fine-tuning
    seed: int = 0

    def __post_init__(self) -> None:
        if self.kernel not in ("matern", "rbf"):
            msg = f"deep-kernel kernel must be 'matern' or 'rbf', got {self.kernel!r}"
            raise ValueError(msg)
        for name in ("width", "depth", "features", "batch", "eval_every", "patience"):
            if getattr(self, name) < 1:
                msg = f"deep-kernel {name} must be >= 1, got {getattr(self, name)}"
                raise ValueError(msg)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


class DeepKernel(nn.Module):
    """Feature map, kernel, constant mean and noise of the deep-kernel GP."""

    def __init__(self, dim: int, settings: Settings) -> None:
        super().__init__()
        layers: list[nn.Module] = []
        width_in = dim
        for _ in range(settings.depth):
            layers += [nn.Linear(width_in, settings.width), nn.Tanh()]
            width_in = settings.width
        layers.append(nn.Linear(width_in, settings.features))
        self.features = nn.Sequential(*layers)
        if settings.kernel == "matern":
            base: gpytorch.kernels.Kernel = gpytorch.kernels.MaternKernel(nu=2.5, ard_num_dims=settings.features)
        else:
            base = gpytorch.kernels.RBFKernel(ard_num_dims=settings.features)
        self.covar = gpytorch.kernels.ScaleKernel(base, outputscale_constraint=Interval(1e-3, 20.0))
        self.mean = gpytorch.means.ConstantMean()
        self.likelihood = gpytorch.likelihoods.GaussianLikelihood(noise_constraint=Interval(NOISE_FLOOR, 1.0))
        # Interval constraints start at their midpoint; start where [0, 1] targets are instead.
        self.covar.outputscale = 0.2
        self.likelihood.noise = 1e-2
        self.to(DTYPE)

    def nll(self, X: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
        """Negative log marginal likelihood per point of targets ``t`` at ``X``."""
        Z = self.features(X)
        K = dense_kernel(self.covar, Z, Z)
        K = K + self.likelihood.noise * torch.eye(len(X), dtype=X.dtype, device=X.device)
        L, info = torch.linalg.cholesky_ex(K)
        if int(info) != 0:
            L = torch.linalg.cholesky(K + 1e-6 * torch.eye(len(X), dtype=X.dtype, device=X.device))
        r = (t - self.mean.constant).unsqueeze(-1)
        a = torch.cholesky_solve(r, L)
        n = len(X)
        return (0.5 * (r * a).sum() + torch.log(torch.diagonal(L)).sum() + 0.5 * n * math.log(2 * math.pi)) / n

    def posterior(self, X: torch.Tensor, y: torch.Tensor, shift: float, scale: float) -> Posterior:
        """The posterior at the current weights (frozen copies), conditioned on ``(X, y)``."""
        feats = copy.deepcopy(self.features).requires_grad_(False)
        return Posterior(
            self.covar, float(self.mean.constant.detach()), float(self.likelihood.noise.detach()),
            X, y, shift, scale, embed=feats, name="deep-kernel",
        )


@dataclass
class MetaReport:
    """What meta-training did."""

    steps: int
    seconds: float
    holdout_tasks: int
    best_holdout_nll: float | None


def minmax(y: np.ndarray) -> tuple[float, float]:
    """Shift and scale mapping ``y`` onto [0, 1] (scale 1 for constant or single scores)."""
    lo, hi = float(np.min(y)), float(np.max(y))
    return lo, (hi - lo if hi - lo > 1e-12 else 1.0)


class MetaModel:
    """A meta-trained deep kernel and what it does for the proposer.

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
        self.report: MetaReport | None = None

    # -- meta-training ------------------------------------------------------

    def meta_train(self, tasks: Sequence[tuple[np.ndarray, np.ndarray]]) -> MetaReport:
        """Meta-train on history tasks ``[(X, y), ...]`` (lower is better)."""
        s = self.settings
        start = time.perf_counter()
        rng = np.random.default_rng(s.seed)
        torch.manual_seed(s.seed)
        tasks = [(np.asarray(X, float), np.asarray(y, float)) for X, y in tasks if len(y) >= 2]
        if not tasks:
            msg = "meta-training needs at least one history task with two or more scored trials"
            raise ValueError(msg)
        # The meta-data's range: every score mapped by one global affine map onto [0, 1].
        allv = np.concatenate([y for _, y in tasks])
        glo, gscale = minmax(allv)
        data = [(as_tensor(X, self.device), (y - glo) / gscale) for X, y in tasks]
        n_hold = int(round(s.holdout * len(data))) if len(data) >= 4 else 0
        order = rng.permutation(len(data))
        hold = [data[i] for i in order[:n_hold]]
        train = [data[i] for i in order[n_hold:]]
        val = [self._val_set(X, y, rng) for X, y in hold]
        opt = torch.optim.Adam(self.net.parameters(), lr=s.lr)
        max_steps = s.max_steps if val else min(s.max_steps, 300)
        best_nll, best_state, since, step = math.inf, None, 0, 0
        for step in range(1, max_steps + 1):
            X, y = train[int(rng.integers(len(train)))]
            idx = rng.choice(len(y), size=min(s.batch, len(y)), replace=False)
            t = y[idx]
            if s.augment:
                t = _augment(t, rng)
            self.net.train()
            opt.zero_grad()
            loss = self.net.nll(X[idx], as_tensor(t, self.device))
            loss.backward()
            opt.step()
            if val and step % s.eval_every == 0:
                v = self._val_nll(val)
                if v < best_nll - 1e-4:
                    best_nll, best_state, since = v, copy.deepcopy(self.net.state_dict()), 0
                else:
                    since += 1
                    if since >= s.patience:
                        break
        if best_state is not None:
            self.net.load_state_dict(best_state)
        self.net.eval()
        self.report = MetaReport(step, time.perf_counter() - start, len(val), best_nll if val else None)
        return self.report

    def _val_set(self, X: torch.Tensor, y: np.ndarray, rng: np.random.Generator) -> tuple[torch.Tensor, torch.Tensor]:
        idx = rng.choice(len(y), size=min(128, len(y)), replace=False)
        shift, scale = minmax(y[idx])
        return X[idx], as_tensor((y[idx] - shift) / scale, self.device)

    def _val_nll(self, val: list[tuple[torch.Tensor, torch.Tensor]]) -> float:
        with torch.no_grad():
            return float(np.mean([float(self.net.nll(X, t)) for X, t in val]))

    # -- the current search -------------------------------------------------

    def posterior(self, X: np.ndarray, y: np.ndarray, *, fine_tune: bool = True, max_exact: int = MAX_EXACT, seed: int = 0) -> Posterior:
        """Posterior on the current search's observations, after fine-tuning a copy of the state."""
        y = np.asarray(y, float)
        idx = subset(y, max_exact, np.random.default_rng(seed))
        Xt, yv = as_tensor(np.asarray(X)[idx], self.device), y[idx]
        shift, scale = minmax(yv)
        net = self.net
        s = self.settings
        if fine_tune and s.fine_tune_steps > 0 and len(yv) >= 2:
            net = copy.deepcopy(self.net)
            net.train()
            opt = torch.optim.Adam(net.parameters(), lr=s.fine_tune_lr)
            t = as_tensor((yv - shift) / scale, self.device)
            for _ in range(s.fine_tune_steps):
                opt.zero_grad()
                net.nll(Xt, t).backward()
                opt.step()
            net.eval()
        return net.posterior(Xt, as_tensor(yv, self.device), shift, scale)

    def impute(self, X: np.ndarray, y: np.ndarray, X_query: np.ndarray) -> np.ndarray:
        """Task-normalised ([0, 1]) predicted scores at ``X_query`` for a task observed at ``(X, y)``."""
        shift, scale = minmax(np.asarray(y, float))
        post = self.net.posterior(as_tensor(X, self.device), as_tensor((np.asarray(y) - shift) / scale, self.device), 0.0, 1.0)
        return post.predict(X_query)[0]

    # -- state --------------------------------------------------------------

    def state_dict(self) -> dict[str, torch.Tensor]:
        """Tensors only, so that the cache loads with ``torch.load(weights_only=True)``."""
        return {k: v.detach().cpu() for k, v in self.net.state_dict().items()}

    def load_state_dict(self, state: Mapping[str, torch.Tensor]) -> None:
        self.net.load_state_dict(dict(state))
        self.net.eval()


def _augment(t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Rescale scores to a random ``[l, u]`` inside [0, 1] (the normalised meta-data range)."""
    lo, hi = float(t.min()), float(t.max())
    if hi - lo < 1e-12:
        return t
    low, up = np.sort(rng.random(2))
    if up - low < 1e-3:  # a vanishing interval would make the batch pure noise
        up = min(1.0, low + 1e-3)
        low = up - 1e-3
    return low + (t - lo) / (hi - lo) * (up - low)


def cache_key(history_hash: str, space: Mapping[str, Any], settings: Settings) -> str:
    """Key of a meta-trained state: hash of (history contents, space, settings, format)."""
    body = {"history": history_hash, "space": space, "settings": settings.to_dict(), "format": FORMAT}
    return hashlib.sha256(json.dumps(body, sort_keys=True, default=str).encode()).hexdigest()[:24]
