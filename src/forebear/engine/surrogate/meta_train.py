"""Meta-training of the deep kernel on history tasks, by episodes used as the proposer uses the model.

An episode is one history task: a support set of 1 .. ``max_support`` of its
points, standardised on their own mean and spread as the proposer standardises
a search, the closed-form refit of :mod:`.deep_kernel` (offset and amplitude
integrated out, the residual amplitude picked on its grid), and the loss the
negative predictive log-likelihood of a query set from the same task. Held-out
history tasks, scored the same way, decide when to stop. Split from
``deep_kernel.py``, which keeps the model and its posterior.
"""

from __future__ import annotations

import copy
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import torch

from forebear.engine.surrogate.gp import as_tensor, standardise

if TYPE_CHECKING:
    from forebear.engine.surrogate.deep_kernel import DeepKernel, MetaModel

_LOG_2PI = math.log(2 * math.pi)


@dataclass
class MetaReport:
    """What meta-training did."""

    steps: int
    seconds: float
    holdout_tasks: int
    best_holdout_nll: float | None  # held-out episodes' query NLL per point, task-standardised units
    initial_holdout_nll: float | None = None  # the same before the first step


def train(model: MetaModel, tasks: Sequence[tuple[np.ndarray, np.ndarray]]) -> MetaReport:
    """Meta-train ``model`` on history tasks ``[(X, y), ...]`` (lower is better)."""
    s = model.settings
    start = time.perf_counter()
    rng = np.random.default_rng(s.seed)
    torch.manual_seed(s.seed)
    tasks = [(np.asarray(X, float), np.asarray(y, float)) for X, y in tasks if len(y) >= 2]
    if not tasks:
        msg = "meta-training needs at least one history task with two or more scored trials"
        raise ValueError(msg)
    data = []
    for X, y in tasks:
        shift, scale = standardise(y)  # each task on its own scale
        data.append((as_tensor(X, model.device), as_tensor((y - shift) / scale, model.device)))
    n_hold = int(round(s.holdout * len(data))) if len(data) >= 4 else 0
    order = rng.permutation(len(data))
    hold = [data[i] for i in order[:n_hold]]
    rest = [data[i] for i in order[n_hold:]]
    val = val_episodes(hold, rng, s.max_support)
    first = val_nll(model.net, val) if val else None
    if s.prior_mean:
        fit_mean(model.net, rest)
    model.net.requires_grad_(True)
    model.net.mean_net.requires_grad_(False)  # fitted above; the episodes train the rest
    opt = torch.optim.Adam([p for p in model.net.parameters() if p.requires_grad], lr=s.lr)
    max_steps = s.max_steps if val else min(s.max_steps, 500)
    best_nll, best_state, since, step = math.inf, None, 0, 0
    for step in range(1, max_steps + 1):
        n_s = int(rng.integers(1, s.max_support + 1))
        picks = rng.integers(len(rest), size=s.tasks_per_step)
        episodes = [_episode(*rest[j], n_s, s.query, rng, s.augment) for j in picks]
        episodes = [e for e in episodes if e is not None]
        if not episodes:
            continue
        loss = -episode_ll(model.net, episodes).mean()
        opt.zero_grad()
        loss.backward()
        opt.step()
        if val and step % s.eval_every == 0:
            v = val_nll(model.net, val)
            if v < best_nll - 1e-4:
                best_nll, best_state, since = v, copy.deepcopy(model.net.state_dict()), 0
            else:
                since += 1
                if since >= s.patience:
                    break
    if best_state is not None and first is not None and best_nll < first:
        model.net.load_state_dict(best_state)
    model.net.requires_grad_(False)
    return MetaReport(step, time.perf_counter() - start, len(hold), best_nll if val else None, first)


MEAN_STEPS = 400  # Adam steps of the prior mean's least-squares fit
MEAN_BATCH = 3000  # points per step, drawn by the tasks' weights (the full data when smaller)
MEAN_LR = 1e-2


def fit_mean(net: DeepKernel, tasks: Sequence[tuple[torch.Tensor, torch.Tensor]]) -> float:
    """Fit the prior mean by least squares to every task's standardised scores; the final mean squared error.

    Each task weighs the same (its points are weighted by one over its size), so a long
    earlier search does not outweigh a short one. The result is the history's average
    standardised surface, which the episodes then scale and shift per task.
    """
    X = torch.cat([x for x, _ in tasks])
    t = torch.cat([tt for _, tt in tasks])
    w = torch.cat([torch.full((len(tt),), 1.0 / len(tt), dtype=t.dtype, device=t.device) for _, tt in tasks])
    w = w / w.sum()
    mean_net = net.mean_net
    mean_net.requires_grad_(True)
    opt = torch.optim.Adam(mean_net.parameters(), lr=MEAN_LR)
    u = 2.0 * X - 1.0
    gen = torch.Generator(device=X.device).manual_seed(net.settings.seed)
    for _ in range(MEAN_STEPS):
        if len(t) > MEAN_BATCH:  # a minibatch: full passes over 30 tasks x 300 points took 13 s of CPU
            idx = torch.multinomial(w, MEAN_BATCH, replacement=True, generator=gen)
            loss = ((mean_net(u[idx]).squeeze(-1) - t[idx]) ** 2).mean()
        else:
            loss = (w * (mean_net(u).squeeze(-1) - t) ** 2).sum()
        opt.zero_grad()
        loss.backward()
        opt.step()
    mean_net.requires_grad_(False)
    with torch.no_grad():
        return float((w * (mean_net(u).squeeze(-1) - t) ** 2).sum())


def episode_ll(net: DeepKernel, episodes: Sequence[tuple[torch.Tensor, ...]]) -> torch.Tensor:
    """Query log-likelihood per point of a batch of same-size episodes, after the proposal-time refit."""
    from forebear.engine.surrogate.deep_kernel import (  # the module that imports this one
        GRID,
        _lml,
        _pick_grid,
        grid_noise,
    )

    Xs = torch.stack([e[0] for e in episodes])
    ts = torch.stack([e[1] for e in episodes])
    Xq = torch.stack([e[2] for e in episodes])
    tq = torch.stack([e[3] for e in episodes])
    log_scale = torch.stack([e[4] for e in episodes])
    Zs, ms = net.parts(Xs)
    Zq, mq = net.parts(Xq)
    A_ss, R_ss = net.affine(ms, ms), net.residual(Xs, Zs, Xs, Zs)
    eye = torch.eye(Xs.shape[1], dtype=Xs.dtype, device=Xs.device)
    mean_s = net.a0 * ms
    with torch.no_grad():  # the refit's grid choice, as at proposal time
        lls = torch.stack([_lml(ts, mean_s, A_ss + lam * R_ss + grid_noise(net, ns) * eye)[0] for lam, ns in GRID], -1)
        pick = _pick_grid(lls)
        lam = torch.tensor([g[0] for g in GRID], dtype=Xs.dtype, device=Xs.device)[pick]
        scales = torch.tensor([g[1] for g in GRID], dtype=Xs.dtype, device=Xs.device)[pick]
    lam3 = lam.view(-1, 1, 1)
    noise = grid_noise(net, scales)  # per episode, differentiable in the meta-trained noise
    _, L, alpha = _lml(ts, mean_s, A_ss + lam3 * R_ss + noise.view(-1, 1, 1) * eye)
    Kqs = net.affine(mq, ms) + lam3 * net.residual(Xq, Zq, Xs, Zs)
    mu = net.a0 * mq + (Kqs @ alpha.unsqueeze(-1)).squeeze(-1)
    v = torch.linalg.solve_triangular(L, Kqs.transpose(-1, -2), upper=False)
    prior = torch.exp(net.log_vc) + torch.exp(net.log_va) * mq * mq + lam.view(-1, 1) * net.residual_var()
    var = (prior - (v * v).sum(-2)).clamp_min(1e-9) + noise.view(-1, 1)
    ll = -0.5 * (torch.log(var) + (tq - mu) ** 2 / var + _LOG_2PI)
    return ll.mean(-1) - log_scale  # per point, in the task's standardised units


def val_episodes(hold: Sequence[tuple[torch.Tensor, torch.Tensor]], rng: np.random.Generator, max_support: int) -> list[list[tuple[torch.Tensor, ...]]]:
    """Fixed held-out episodes, grouped by support size."""
    sizes = sorted({1, 3, 5, 10, max_support})
    groups = []
    for n_s in sizes:
        eps = [e for X, t in hold for _ in range(2) if (e := _episode(X, t, n_s, 64, rng, False)) is not None]
        if eps:
            groups.append(eps)
    return groups


def val_nll(net: DeepKernel, val: Sequence[Sequence[tuple[torch.Tensor, ...]]]) -> float:
    with torch.no_grad():
        return float(np.mean([-float(episode_ll(net, g).mean()) for g in val]))


def _episode(X: torch.Tensor, t: torch.Tensor, n_s: int, n_q: int, rng: np.random.Generator, augment: bool) -> tuple[torch.Tensor, ...] | None:
    """Support and query of one task, scores standardised on the support as the proposer does.

    Returns ``(X_support, t_support, X_query, t_query, log_scale)``, ``log_scale`` the
    support's spread in the task's standardised units (the likelihood's Jacobian).
    """
    n = len(t)
    if n < 2:
        return None
    n_s = min(n_s, n - 1)
    idx = rng.permutation(n)
    s_idx, q_idx = idx[:n_s], idx[n_s:n_s + n_q]
    if len(q_idx) < n_q:  # small tasks: draw query points with replacement from the rest
        q_idx = rng.choice(idx[n_s:], size=n_q, replace=True)
    tt = t
    if augment and rng.random() < 0.5:
        tt = _augment(t, rng)
    ys = tt[s_idx].cpu().numpy()
    shift, scale = standardise(ys)
    return X[s_idx], (tt[s_idx] - shift) / scale, X[q_idx], (tt[q_idx] - shift) / scale, torch.tensor(math.log(scale), dtype=t.dtype, device=t.device)


def _augment(t: torch.Tensor, rng: np.random.Generator) -> torch.Tensor:
    """A random monotone warp of a task's scores: min-max onto [0, 1], then a power in [1/2, 2],
    then standardised again. Rankings are kept; the shape changes, so only rankings carry over."""
    lo, hi = t.min(), t.max()
    if float(hi - lo) < 1e-12:
        return t
    u = ((t - lo) / (hi - lo)) ** float(np.exp(rng.uniform(math.log(0.5), math.log(2.0))))
    return (u - u.mean()) / u.std(unbiased=False).clamp_min(1e-12)
