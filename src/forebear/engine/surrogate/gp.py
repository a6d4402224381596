"""The plain GP: constant mean, ScaleKernel(Matérn 5/2, ARD), Gaussian noise with a floor.

Hyperparameters come from maximising the exact marginal likelihood
(gpytorch's ``ExactMarginalLogLikelihood``) plus a log-normal prior on each
lengthscale, with L-BFGS from a few starting points, in float64 on
standardised targets. The prior is the dimension-scaled one of "Vanilla
Bayesian Optimization Performs Great in High Dimensions" (ICML 2024):
``log l ~ N(sqrt(2) + log(d) / 2, 3)`` on the unit cube (as we recall the
paper), and a log-normal prior on the noise variance, ``log s2 ~ N(-7, 1)``
(about 1e-3 of the score variance, the deep kernel's relative noise floor):
without a noise term the longer lengthscales let a fit on three to five
points call every score noise, and the paper's ``N(-4, 1)`` (as we recall it)
blurred the last digits of deterministic families (docs/engine.md has the
figures). Without the lengthscale prior, a fit on
three to eight points often ends at a bound (lengthscales of 0.006 and 20 on
the 2-D bowl of tests/test_async_bowl.py), and EI then only looks beside the
observed points (docs/engine.md). Prediction and conditioning on
extra points (constant-liar lies, pending trials) go through
:class:`Posterior`, which holds the hyperparameters fixed and works from one
Cholesky factor; the deep kernel uses the same class with its feature map.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import gpytorch
import numpy as np
import torch
from gpytorch.constraints import Interval
from linear_operator.utils.errors import NotPSDError

DTYPE = torch.float64
NOISE_FLOOR = 1e-6  # on standardised targets; keeps the kernel matrix well conditioned
MAX_EXACT = 500  # past this many observations the posterior uses a subset of data (docs/engine.md)
_LOG_2PI = math.log(2 * math.pi)
LENGTHSCALE_SIGMA2 = 3.0  # variance of log l in the prior above
NOISE_MU, NOISE_SIGMA2 = -7.0, 1.0  # mean and variance of log noise (standardised units)


def lengthscale_mu(dim: int) -> float:
    """Mean of log l in the lengthscale prior for ``dim`` inputs (ICML 2024, see above)."""
    return math.sqrt(2.0) + 0.5 * math.log(max(1, dim))


def as_tensor(x: Any, device: torch.device | str = "cpu") -> torch.Tensor:
    """``x`` as a float64 tensor on ``device`` (no copy when it already is one)."""
    return torch.as_tensor(x, dtype=DTYPE, device=device)


class Predictive:
    """What every posterior derives from its ``predict_t``: numpy predictions and the
    predictive density the transfer guard scores. Needs ``X``, ``noise`` and ``scale``."""

    X: torch.Tensor
    noise: float
    scale: float

    def predict_t(self, Xs: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        raise NotImplementedError

    def predict(self, Xs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Mean and latent variance at ``Xs`` (numpy in, numpy out)."""
        with torch.no_grad():
            m, v = self.predict_t(as_tensor(Xs, self.X.device))
        return m.cpu().numpy(), v.cpu().numpy()

    def log_predictive(self, Xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
        """Log predictive density of scores ``ys`` at ``Xs`` (noise included), original units."""
        m, v = self.predict(Xs)
        return normal_logpdf(ys, m, v + self.noise * self.scale**2)


class Posterior(Predictive):
    """A GP posterior with fixed hyperparameters.

    Parameters
    ----------
    kernel
        A gpytorch kernel with an ``outputscale`` (a ``ScaleKernel``); copied and frozen.
    mean
        The constant prior mean, in normalised units.
    noise
        The Gaussian noise variance, in normalised units.
    X, y
        Conditioning points and their scores in original units (lower is better).
    shift, scale
        The affine map from normalised to original units: ``y = shift + scale * t``.
    embed
        Optional feature map applied to inputs before the kernel (the deep kernel's MLP).
    name
        ``"gp"`` or ``"deep-kernel"``; recorded with each proposal.
    """

    def __init__(
        self,
        kernel: gpytorch.kernels.Kernel,
        mean: float,
        noise: float,
        X: torch.Tensor,
        y: torch.Tensor,
        shift: float,
        scale: float,
        embed: Callable[[torch.Tensor], torch.Tensor] | None = None,
        name: str = "gp",
    ) -> None:
        # Conditioning on lies builds many posteriors from one frozen kernel: copy only once.
        frozen = not any(p.requires_grad for p in kernel.parameters())
        self.kernel = kernel if frozen else copy.deepcopy(kernel).requires_grad_(False)
        self.embed = embed
        self.mean = float(mean)
        self.noise = float(noise)
        self.shift, self.scale = float(shift), float(scale)
        self.name = name
        self.X = X
        self.y = y
        self.prior_var = float(self.kernel.outputscale.detach())
        self._fast = _closed_form(self.kernel)
        with torch.no_grad():
            self._Z = self._features(X)
            t = (y - self.shift) / self.scale - self.mean
            K = self._k(self._Z, self._Z) + self.noise * torch.eye(len(X), dtype=X.dtype, device=X.device)
            self._L = _cholesky(K)
            self._alpha = torch.cholesky_solve(t.unsqueeze(-1), self._L).squeeze(-1)

    @property
    def n(self) -> int:
        return len(self.X)

    def _features(self, X: torch.Tensor) -> torch.Tensor:
        return X if self.embed is None else self.embed(X)

    def _k(self, A: torch.Tensor, B: torch.Tensor) -> torch.Tensor:
        if self._fast is None:
            return dense_kernel(self.kernel, A, B)
        kind, ls = self._fast
        r = torch.cdist(A / ls, B / ls)
        if kind == "rbf":
            return self.prior_var * torch.exp(-0.5 * r * r)
        s5 = math.sqrt(5.0) * r
        return self.prior_var * (1.0 + s5 + s5 * s5 / 3.0) * torch.exp(-s5)

    def predict_t(self, Xs: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Mean and latent variance at ``Xs`` in original units (differentiable in ``Xs``)."""
        Zs = self._features(Xs)
        Ks = self._k(Zs, self._Z)
        mu = self.mean + Ks @ self._alpha
        v = torch.linalg.solve_triangular(self._L, Ks.T, upper=False)
        var = (self.prior_var - (v * v).sum(0)).clamp_min(1e-12)
        return self.shift + self.scale * mu, var * self.scale**2

    def condition(self, X_new: torch.Tensor, y_new: torch.Tensor) -> Posterior:
        """The posterior after also seeing ``(X_new, y_new)``, hyperparameters unchanged."""
        return Posterior(
            self.kernel, self.mean, self.noise, torch.cat([self.X, X_new]), torch.cat([self.y, y_new]),
            self.shift, self.scale, self.embed, self.name,
        )

    def loo_loglik(self) -> float:
        """Leave-one-out predictive log-likelihood of the conditioning scores, original units.

        Closed form for fixed hyperparameters (Rasmussen & Williams 2006, eqs. 5.10-5.12).
        """
        with torch.no_grad():
            Kinv = torch.cholesky_inverse(self._L)
            d = torch.diagonal(Kinv).clamp_min(1e-300)
            var = 1.0 / d
            resid = self._alpha / d  # y_i - mu_i in normalised units
            ll = -0.5 * (torch.log(var) + resid**2 / var + _LOG_2PI)
        return float(ll.sum()) - self.n * math.log(self.scale)


def normal_logpdf(y: Any, mean: np.ndarray, var: np.ndarray) -> np.ndarray:
    """Elementwise log density of ``y`` under ``N(mean, var)``."""
    return -0.5 * (np.log(var) + (np.asarray(y, float) - mean) ** 2 / var + _LOG_2PI)


def dense_kernel(kernel: gpytorch.kernels.Kernel, A: torch.Tensor, B: torch.Tensor) -> torch.Tensor:
    """``kernel(A, B)`` as a dense tensor, through ``forward`` (the lazy wrapper costs more
    than the arithmetic at these sizes)."""
    K = kernel.forward(A, B)
    return K.to_dense() if hasattr(K, "to_dense") else K


def _closed_form(kernel: gpytorch.kernels.Kernel) -> tuple[str, torch.Tensor] | None:
    """``(kind, lengthscale)`` when ``kernel`` is ScaleKernel(Matérn 5/2 or RBF).

    Predictions then evaluate the kernel in closed form (Rasmussen & Williams
    2006, eqs. 4.9 and 4.17), equal to gpytorch's and several times cheaper per
    call; tests/test_gp.py checks the two agree.
    """
    base = getattr(kernel, "base_kernel", None)
    if isinstance(base, gpytorch.kernels.MaternKernel) and base.nu == 2.5:
        return "matern", base.lengthscale.detach().reshape(-1)
    if isinstance(base, gpytorch.kernels.RBFKernel):
        return "rbf", base.lengthscale.detach().reshape(-1)
    return None


def _cholesky(K: torch.Tensor) -> torch.Tensor:
    jitter = 0.0
    for _ in range(6):
        L, info = torch.linalg.cholesky_ex(K + jitter * torch.eye(len(K), dtype=K.dtype, device=K.device))
        if int(info) == 0:
            return L
        jitter = 1e-9 if jitter == 0.0 else jitter * 10
    raise NotPSDError("kernel matrix is not positive definite even with jitter 1e-4")


def standardise(y: np.ndarray) -> tuple[float, float]:
    """Shift and scale that map ``y`` to zero mean and unit variance (scale 1 for constant ``y``)."""
    shift = float(np.mean(y)) if len(y) else 0.0
    scale = float(np.std(y)) if len(y) > 1 else 1.0
    return shift, (scale if scale > 1e-12 else 1.0)


def subset(y: np.ndarray, m: int, rng: np.random.Generator) -> np.ndarray:
    """Indices of a subset of data of size ``m``: the best half by score, a random draw from the rest.

    Keeping the best points where EI looks, and a random spread elsewhere, is
    our choice; docs/engine.md gives its measured accuracy.
    """
    n = len(y)
    if n <= m:
        return np.arange(n)
    order = np.argsort(y, kind="stable")
    best = order[: m // 2]
    rest = rng.choice(order[m // 2:], size=m - len(best), replace=False)
    return np.sort(np.concatenate([best, rest]))


class _ExactGP(gpytorch.models.ExactGP):
    def __init__(self, X: torch.Tensor, y: torch.Tensor, likelihood: gpytorch.likelihoods.GaussianLikelihood) -> None:
        super().__init__(X, y, likelihood)
        self.mean_module = gpytorch.means.ConstantMean()
        self.covar_module = gpytorch.kernels.ScaleKernel(
            gpytorch.kernels.MaternKernel(nu=2.5, ard_num_dims=X.shape[-1], lengthscale_constraint=Interval(5e-3, 20.0)),
            outputscale_constraint=Interval(0.05, 20.0),
        )
        # An Interval starts at its midpoint; start instead where standardised targets usually are.
        self.covar_module.outputscale = 1.0
        self.covar_module.base_kernel.lengthscale = 0.3
        likelihood.noise = 1e-3

    def forward(self, x: torch.Tensor) -> gpytorch.distributions.MultivariateNormal:
        return gpytorch.distributions.MultivariateNormal(self.mean_module(x), self.covar_module(x))


@dataclass
class GPFit:
    """A fitted plain GP: its posterior, its hyperparameters (for warm starts) and its MLL."""

    posterior: Posterior
    state: dict[str, torch.Tensor]
    mll: float


def fit_gp(
    X: np.ndarray | torch.Tensor,
    y: np.ndarray,
    *,
    restarts: int = 3,
    init: dict[str, torch.Tensor] | None = None,
    noise_floor: float = NOISE_FLOOR,
    max_iter: int = 50,
    seed: int = 0,
    max_exact: int = MAX_EXACT,
    device: torch.device | str = "cpu",
) -> GPFit:
    """Fit the plain GP to ``(X, y)`` by maximising the marginal likelihood.

    Parameters
    ----------
    X, y
        Encoded points ``(n, d)`` and scores ``(n,)``, lower is better.
    restarts
        Starting points for L-BFGS: ``init`` (when given), gpytorch's defaults,
        then random lengthscales; the best marginal likelihood wins.
    init
        Hyperparameters of an earlier fit (``GPFit.state``) to start from.
    max_exact
        Past this many points, hyperparameters and posterior use a subset of data.
    max_iter
        L-BFGS iterations per start; 0 keeps ``init`` as it is (one start) and only
        builds the posterior on ``(X, y)``.
    """
    y = np.asarray(y, dtype=float)
    rng = np.random.default_rng(seed)
    Xt_all = as_tensor(X, device)
    idx = subset(y, max_exact, rng)
    Xt = Xt_all[idx]
    shift, scale = standardise(y)
    yt = as_tensor((y[idx] - shift) / scale, device)
    likelihood = gpytorch.likelihoods.GaussianLikelihood(noise_constraint=Interval(noise_floor, 2.0))
    model = _ExactGP(Xt, yt, likelihood).to(device=device, dtype=DTYPE)
    mll = gpytorch.mlls.ExactMarginalLogLikelihood(likelihood, model)
    starts: list[dict[str, torch.Tensor] | None] = [init] if init is not None else []
    if max_iter <= 0 and init is not None:
        restarts = 1
    starts.append(None)
    gen = torch.Generator().manual_seed(seed)
    best_state, best_val = None, -math.inf
    default = copy.deepcopy(model.state_dict())
    for k in range(max(1, restarts)):
        start = starts[k] if k < len(starts) else "random"
        model.load_state_dict(default)
        if isinstance(start, dict):
            model.load_state_dict(start)
        elif start == "random":
            ls = torch.exp(torch.empty(Xt.shape[-1], dtype=DTYPE).uniform_(math.log(0.05), math.log(1.5), generator=gen))
            model.covar_module.base_kernel.lengthscale = ls.to(device)
            model.likelihood.noise = float(10 ** torch.empty(1).uniform_(-4, -1, generator=gen))
        value = _optimise(model, mll, Xt, yt, max_iter)
        if value > best_val:
            best_val, best_state = value, copy.deepcopy(model.state_dict())
    if best_state is None:
        best_state = default  # every start failed numerically: fall back to gpytorch's defaults
    model.load_state_dict(best_state)
    post = Posterior(
        model.covar_module, float(model.mean_module.constant.detach()), float(likelihood.noise.detach()),
        Xt, as_tensor(y[idx], device), shift, scale, name="gp",
    )
    return GPFit(post, best_state, best_val)


def exact_mll(model: _ExactGP, X: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """The exact log marginal likelihood per point, by one Cholesky factor.

    Equals gpytorch's ``ExactMarginalLogLikelihood`` (tests/test_gp.py checks it)
    without its lazy-operator machinery, which dominates the cost at our sizes.
    """
    K = dense_kernel(model.covar_module, X, X)
    K = K + model.likelihood.noise * torch.eye(len(X), dtype=X.dtype, device=X.device)
    L, info = torch.linalg.cholesky_ex(K)
    if int(info) != 0:
        raise NotPSDError("kernel matrix is not positive definite")
    r = (y - model.mean_module.constant).unsqueeze(-1)
    a = torch.cholesky_solve(r, L)
    n = len(X)
    return -(0.5 * (r * a).sum() + torch.log(torch.diagonal(L)).sum() + 0.5 * n * _LOG_2PI) / n


def log_posterior(model: _ExactGP, X: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """:func:`exact_mll` plus the log density of the lengthscale and noise priors (up to a
    constant), per point."""
    ls = model.covar_module.base_kernel.lengthscale.reshape(-1)
    z = torch.log(ls) - lengthscale_mu(X.shape[-1])
    zn = torch.log(model.likelihood.noise.reshape(-1)) - NOISE_MU
    prior = 0.5 * (z * z).sum() / LENGTHSCALE_SIGMA2 + 0.5 * (zn * zn).sum() / NOISE_SIGMA2
    return exact_mll(model, X, y) - prior / len(X)


def _optimise(model: _ExactGP, mll: Any, X: torch.Tensor, y: torch.Tensor, max_iter: int) -> float:
    """L-BFGS on the log posterior for ``max_iter`` iterations (none: the hyperparameters as given); its final value."""
    try:
        if max_iter > 0:
            model.train()
            opt = torch.optim.LBFGS(model.parameters(), lr=1.0, max_iter=max_iter, line_search_fn="strong_wolfe")

            def closure() -> torch.Tensor:
                opt.zero_grad()
                loss = -log_posterior(model, X, y)
                loss.backward()
                return loss

            opt.step(closure)
        with torch.no_grad():
            value = float(log_posterior(model, X, y))
    except (NotPSDError, RuntimeError, ValueError):
        return -math.inf
    model.eval()
    return value if math.isfinite(value) else -math.inf


def feasibility(X_ok: np.ndarray, X_bad: np.ndarray, *, seed: int = 0, device: torch.device | str = "cpu") -> Posterior:
    """GP regression on +1 (scored) / -1 (failed) labels (least-squares classification,
    Rasmussen & Williams 2006, sec. 6.5); its probit gives a probability of feasibility."""
    Xl = np.vstack([X_ok, X_bad])
    labels = np.concatenate([np.ones(len(X_ok)), -np.ones(len(X_bad))])
    return fit_gp(Xl, labels, restarts=1, seed=seed, device=device).posterior
