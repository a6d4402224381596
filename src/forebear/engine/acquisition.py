"""log-EI, candidate search over the mixed space, constant-liar batches.

Expected improvement for minimisation at a point with posterior mean ``mu``
and standard deviation ``s``, incumbent ``best``: with ``z = (best - mu) / s``,
``EI = s * h(z)``, ``h(z) = phi(z) + z * Phi(z)`` (Jones, Schonlau & Welch
1998). ``log EI = log s + log h(z)`` is computed in the numerically stable form
of Ament et al. (NeurIPS 2023), so that it stays finite and ordered where EI
itself underflows. A batch is built one point at a time; after each choice the
point joins the conditioning set with a lie (Ginsbourger, Le Riche & Carraro
2010), hyperparameters unchanged: a constant (the minimum, mean or maximum of
the observed scores: CL-min, CL-mean, CL-max) or each model's own posterior
mean at the point (``"posterior"``, their kriging believer), which leaves the
mean where it was and only shrinks the variance there. Pending trials enter
the same way, under their own lie (docs/engine.md has the measurements).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import torch
from scipy.stats import qmc

from forebear.core.space import Space
from forebear.engine.surrogate.gp import DTYPE, Posterior, as_tensor

POSTERIOR = "posterior"  # the lie that is each model's posterior mean at the point
LIES = ("min", "mean", "max", POSTERIOR)
DEFAULT_LIE = "min"  # inside one round; chosen by `python -m forebear.bench.proposal lies` (docs/engine.md)
DEFAULT_PENDING_LIE = POSTERIOR  # running trials; chosen under asynchronous timing (docs/engine.md)
_C1 = 0.5 * math.log(2 * math.pi)
_C2 = 0.5 * math.log(math.pi / 2)
_INV_SQRT_EPS = 1.0 / math.sqrt(torch.finfo(DTYPE).eps)
_SQRT2 = math.sqrt(2.0)


def log1mexp(x: torch.Tensor) -> torch.Tensor:
    """``log(1 - exp(x))`` for ``x < 0``, accurate at both ends (Maechler 2012)."""
    return torch.where(x > -math.log(2.0), torch.log(-torch.expm1(x)), torch.log1p(-torch.exp(x)))


def log_h(z: torch.Tensor) -> torch.Tensor:
    """``log(phi(z) + z Phi(z))``, stable for very negative ``z`` (Ament et al. 2023, eq. 9)."""
    z = as_tensor(z)
    upper = z > -1
    zu = torch.where(upper, z, torch.zeros_like(z))
    direct = torch.log(torch.exp(-0.5 * zu * zu) / math.sqrt(2 * math.pi) + zu * 0.5 * torch.erfc(-zu / _SQRT2))
    zl = torch.where(upper, -torch.ones_like(z), z)
    mid = -0.5 * zl * zl - _C1 + log1mexp(torch.log(torch.special.erfcx(-zl / _SQRT2) * zl.abs()) + _C2)
    tail = -0.5 * zl * zl - _C1 - 2 * torch.log(zl.abs())
    lower = torch.where(zl > -_INV_SQRT_EPS, mid, tail)
    return torch.where(upper, direct, lower)


def log_ei(mean: torch.Tensor, var: torch.Tensor, best: float) -> torch.Tensor:
    """log expected improvement below ``best`` (minimisation)."""
    s = var.clamp_min(1e-24).sqrt()
    return torch.log(s) + log_h((best - mean) / s)


@dataclass
class Scorer:
    """The acquisition of one round: a likelihood-weighted mixture of posteriors, optionally
    multiplied by a probability of feasibility.

    EI is linear in the predictive distribution, so the EI of a mixture is the
    weighted sum of the components' EIs; in logs, a log-sum-exp.
    """

    models: list[Posterior]
    weights: list[float]
    best: float
    feasibility: Posterior | None = None

    def __call__(self, X: torch.Tensor) -> torch.Tensor:
        parts = []
        for m, w in zip(self.models, self.weights, strict=False):
            if w <= 0:
                continue
            mu, var = m.predict_t(X)
            parts.append(math.log(w) + log_ei(mu, var, self.best))
        out = torch.logsumexp(torch.stack(parts), 0) if len(parts) > 1 else parts[0]
        if self.feasibility is not None:
            mu, var = self.feasibility.predict_t(X)
            out = out + torch.special.log_ndtr(mu / var.sqrt())
        return out

    @property
    def device(self) -> torch.device:
        return self.models[0].X.device

    def condition(self, X: torch.Tensor, y: torch.Tensor) -> Scorer:
        """The scorer after adding ``(X, y)`` (lies) to every model; the incumbent follows."""
        if len(X) == 0:
            return self
        models = [m.condition(X, y) for m in self.models]
        return Scorer(models, self.weights, min(self.best, float(y.min())), self.feasibility)

    def believe(self, X: torch.Tensor) -> Scorer:
        """The scorer after adding ``X`` to every model at that model's own posterior mean.

        Each model's mean stays where it was and its variance at ``X`` shrinks to the noise;
        the incumbent stays the best observed score (a belief is not a result).
        """
        if len(X) == 0:
            return self
        models = []
        for m in self.models:
            with torch.no_grad():
                mu, _ = m.predict_t(X)
            models.append(m.condition(X, mu))
        return Scorer(models, self.weights, self.best, self.feasibility)

    def lie(self, X: torch.Tensor, value: float | str) -> Scorer:
        """:meth:`condition` on the constant ``value``, or :meth:`believe` for ``"posterior"``."""
        if isinstance(value, str):
            if value != POSTERIOR:
                msg = f"a lie is a number or {POSTERIOR!r}, got {value!r}"
                raise ValueError(msg)
            return self.believe(X)
        return self.condition(X, torch.full((len(X),), float(value), dtype=X.dtype, device=X.device))


def lie_value(y: np.ndarray, lie: str) -> float | str:
    """The lie for :meth:`Scorer.lie`: the minimum, mean or maximum of the observed scores,
    or ``"posterior"`` (each model's mean at the point)."""
    if lie not in LIES:
        msg = f"lie must be one of {LIES}, got {lie!r}"
        raise ValueError(msg)
    if lie == POSTERIOR:
        return POSTERIOR
    return float({"min": np.min, "mean": np.mean, "max": np.max}[lie](y))


def project(space: Space, X: np.ndarray) -> np.ndarray:
    """Vectorised ``space.round_trip``: snap ints to whole values and categories to one-hot."""
    X = np.clip(np.array(X, dtype=float, copy=True), 0.0, 1.0)
    start = 0
    for p in space.params:
        cols = slice(start, start + p.width)
        if p.kind == "categorical":
            hot = np.argmax(X[:, cols], axis=1)
            X[:, cols] = 0.0
            X[np.arange(len(X)), start + hot] = 1.0
        elif p.kind == "int":
            lo, hi = (math.log(p.low), math.log(p.high)) if p.log else (float(p.low), float(p.high))  # type: ignore[arg-type]
            v = lo + X[:, start] * (hi - lo)
            v = np.clip(np.round(np.exp(v) if p.log else v), p.low, p.high)
            X[:, start] = ((np.log(v) if p.log else v) - lo) / (hi - lo)
        start += p.width
    return X


def keys(X: np.ndarray) -> list[bytes]:
    """Hashable keys of encoded points (equal configurations give equal keys)."""
    return [row.tobytes() for row in np.round(np.asarray(X, dtype=float), 9) + 0.0]


def candidates(
    space: Space,
    anchors: np.ndarray,
    rng: np.random.Generator,
    n_sobol: int = 2048,
    n_mutations: int = 256,
) -> np.ndarray:
    """Quasi-random (scrambled Sobol) points plus mutations of ``anchors`` (the best observed)."""
    sobol = qmc.Sobol(d=space.dim, scramble=True, seed=rng).random(n_sobol)
    parts = [project(space, sobol)]
    if len(anchors):
        parts.append(_mutations(space, anchors, rng, n_mutations))
    return np.vstack(parts)


def _mutations(space: Space, anchors: np.ndarray, rng: np.random.Generator, n: int) -> np.ndarray:
    """Local moves around ``anchors``: Gaussian steps on numeric coordinates, category swaps."""
    idx = rng.integers(len(anchors), size=n)
    X = anchors[idx].copy()
    scale = rng.choice([0.02, 0.05, 0.15], size=(n, 1))
    start = 0
    move = rng.random((n, len(space.params))) < max(0.3, 1.0 / len(space.params))
    move[np.arange(n), rng.integers(len(space.params), size=n)] = True
    for j, p in enumerate(space.params):
        rows = move[:, j]
        if p.kind == "categorical":
            if p.width > 1:
                pick = rng.integers(p.width, size=int(rows.sum()))
                X[rows, start:start + p.width] = np.eye(p.width)[pick]
        else:
            X[rows, start] = X[rows, start] + rng.normal(size=int(rows.sum())) * scale[rows, 0]
            X[:, start] = np.abs(X[:, start]) % 2.0
            X[:, start] = np.where(X[:, start] > 1.0, 2.0 - X[:, start], X[:, start])
        start += p.width
    return project(space, X)


def refine(scorer: Scorer, X0: np.ndarray, mask: np.ndarray, steps: int = 10, lr: float = 0.03) -> tuple[np.ndarray, np.ndarray]:
    """Gradient ascent of the acquisition over the continuous coordinates (``mask``) of ``X0``.

    Returns the best point seen for each row and its value; other coordinates stay fixed.
    """
    X = as_tensor(X0, scorer.device).clone()
    with torch.no_grad():
        best_v = scorer(X)
    best_x = X.clone()
    if not mask.any() or steps <= 0:
        return best_x.cpu().numpy(), best_v.cpu().numpy()
    m = torch.as_tensor(mask, device=scorer.device)
    free = X[:, m].clone().requires_grad_(True)
    opt = torch.optim.Adam([free], lr=lr)
    for _ in range(steps):
        opt.zero_grad()
        full = X.clone()
        full[:, m] = free
        v = scorer(full)
        better = v.detach() > best_v
        if better.any():
            best_v = torch.where(better, v.detach(), best_v)
            best_x[better] = full.detach()[better]
        (-v.sum()).backward()
        opt.step()
        with torch.no_grad():
            free.clamp_(0.0, 1.0)
    return best_x.cpu().numpy(), best_v.cpu().numpy()


def batch(
    space: Space,
    scorer: Scorer,
    q: int,
    lie: float | str,
    *,
    taken: Sequence[np.ndarray] = (),
    anchors: np.ndarray | None = None,
    rng: np.random.Generator,
    n_sobol: int = 2048,
    n_refine: int = 2,
    keep: int = 512,
) -> list[tuple[np.ndarray, float]]:
    """``q`` distinct points by constant liar; each comes with its log-acquisition value.

    Parameters
    ----------
    scorer
        The acquisition, already conditioned on pending points.
    lie
        The value each chosen point is conditioned on before the next choice, or
        ``"posterior"`` (:meth:`Scorer.believe`).
    taken
        Encoded points never to propose (observed, failed, pending).
    anchors
        Encoded best observed points, centres of the local mutations.
    keep
        After the first point, only this many leading candidates are rescored.
    """
    anchors = np.zeros((0, space.dim)) if anchors is None else anchors
    cand = candidates(space, anchors, rng, n_sobol=n_sobol)
    used = set(keys(np.asarray(taken).reshape(-1, space.dim))) if len(taken) else set()
    mask = space.continuous_mask
    out: list[tuple[np.ndarray, float]] = []
    dev = scorer.device
    Xc = as_tensor(cand, dev)
    for j in range(q):
        with torch.no_grad():
            v = scorer(Xc).cpu().numpy()
        if j == 0 and q > 1 and len(cand) > keep:
            # A lie changes the acquisition only near the chosen point; the rest of the batch is
            # picked from the leading candidates of the first full scoring (docs/engine.md).
            lead = np.argsort(-v, kind="stable")[:keep]
            cand, v = cand[lead], v[lead]
            Xc = as_tensor(cand, dev)
        ck = keys(cand)
        v = np.where([k in used for k in ck], -np.inf, v)
        order = np.argsort(-v, kind="stable")
        top = [i for i in order[: 4 * n_refine] if np.isfinite(v[i])][:n_refine]
        if not top:
            break
        # Mutations of the leading candidates sharpen the search where the acquisition is high.
        local = _mutations(space, cand[top], rng, 64)
        with torch.no_grad():
            lv = scorer(as_tensor(local, dev)).cpu().numpy()
        pool = np.vstack([cand[top], local[np.argsort(-lv)[:n_refine]]])
        # Later points of a batch sit in a landscape the first refinement already explored.
        xs, vs = refine(scorer, pool, mask, steps=10 if j == 0 else 5)
        xs = project(space, xs)
        choice = None
        for i in np.argsort(-vs, kind="stable"):
            k = keys(xs[i : i + 1])[0]
            if k not in used and np.isfinite(vs[i]):
                choice = (xs[i], float(vs[i]))
                break
        if choice is None:
            i = top[0]
            choice = (cand[i], float(v[i]))
        used.add(keys(choice[0][None, :])[0])
        out.append(choice)
        scorer = scorer.lie(as_tensor(choice[0][None, :], dev), lie)
    return out
