"""The initial design of a search.

With history: an evolutionary search over history configurations for the
``k`` configurations that minimise the sum over history tasks of the
task-normalised best score within the set. A set member that a task did not
observe gets that task's score imputed by a plain GP fitted to that task
(:func:`gp_imputer`; without imputation, the task's worst normalised score, 1). Mutation replaces one member with
another history configuration; crossover draws a child from the union of two
good sets. Without history: a Latin hypercube scaled to the space (log
parameters on their log scale).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from scipy.stats import qmc

from forebear.core.space import Space
from forebear.engine.acquisition import keys, project
from forebear.engine.surrogate.gp import fit_gp, subset

# impute(task_index, X_query) -> task-normalised predicted scores in [0, 1]
Imputer = Callable[[int, np.ndarray], np.ndarray]
IMPUTE_FIT_POINTS = 300  # a history task's GP fits its hyperparameters on at most this many points


class GPImputer:
    """Impute each history task's scores by a plain GP fitted to that task alone.

    Hyperparameters are fitted on at most :data:`IMPUTE_FIT_POINTS` of the task's
    points (its best half and a random draw from the rest, ``gp.subset``), the
    posterior conditions on all of them; each task is fitted once, when first asked.
    A per-task GP measured better than the meta-trained model's imputation on the
    hartmann families (docs/engine.md, "The warm start"). A class, not a closure, so
    that a proposer holding one still pickles.
    """

    def __init__(self, tasks: Sequence[Any], seed: int = 0) -> None:
        self.tasks, self.seed = tasks, seed
        self._posts: dict[int, Any] = {}

    def __call__(self, j: int, X_query: np.ndarray) -> np.ndarray:
        t = self.tasks[j]
        y = np.asarray(t.y, float)
        if j not in self._posts:
            idx = subset(y, IMPUTE_FIT_POINTS, np.random.default_rng([self.seed, j]))
            fit = fit_gp(t.X[idx], y[idx], restarts=1, seed=self.seed)
            self._posts[j] = fit_gp(t.X, y, init=fit.state, max_iter=0, seed=self.seed).posterior if len(idx) < len(y) else fit.posterior
        lo, hi = float(y.min()), float(y.max())
        mean = np.asarray(self._posts[j].predict(np.asarray(X_query, float))[0], float)
        return (mean - lo) / (hi - lo if hi - lo > 1e-12 else 1.0)


def gp_imputer(tasks: Sequence[Any], seed: int = 0) -> Imputer:
    """A :class:`GPImputer` of ``tasks``."""
    return GPImputer(tasks, seed)


def initial_design(
    space: Space,
    k: int,
    *,
    tasks: Sequence[Any] = (),
    impute: Imputer | None = None,
    seed: int = 0,
    generations: int = 120,
    population: int = 24,
    per_task: int | None = None,
    share: float = 1.0,
) -> list[dict[str, Any]]:
    """``k`` distinct configurations to evaluate first.

    Parameters
    ----------
    tasks
        History tasks (``forebear.records.history.Task``); empty for a Latin hypercube.
    impute
        Predicts a task's normalised scores where it has none.
    per_task
        Each task contributes its ``per_task`` best configurations to the pool
        (default ``max(2 k, 8)``).
    share
        Fraction of the ``k`` configurations taken from history (at least one);
        a Latin hypercube fills the rest.
    """
    if not 0.0 <= share <= 1.0:
        msg = f"share must be in [0, 1], got {share}"
        raise ValueError(msg)
    if k <= 0:
        return []
    tasks = [t for t in tasks if len(t.y)]
    if not tasks:
        return space.latin_hypercube(k, seed=seed)
    rng = np.random.default_rng(seed)
    pool_X, pool_cfg = _pool(tasks, per_task or max(2 * k, 8))
    S = _score_matrix(tasks, pool_X, impute)
    n_hist = max(1, int(round(share * k)))
    chosen = evolve(S, min(n_hist, len(pool_cfg)), rng, generations=generations, population=population)
    out = [pool_cfg[i] for i in chosen]
    if len(out) < k:
        # The share left to exploration, or too few distinct history configurations: a Latin hypercube.
        have = set(keys(space.encode_many(out)))
        for c in space.latin_hypercube(2 * k, seed=seed):
            if len(out) >= k:
                break
            key = keys(space.encode(c)[None, :])[0]
            if key not in have:
                have.add(key)
                out.append(c)
    return out


COVERED = 0.015  # mean normalised best score over history tasks at which a smaller design is enough


def covered_size(
    tasks: Sequence[Any],
    k_max: int,
    k_min: int = 3,
    *,
    seed: int = 0,
    tol: float = COVERED,
) -> int:
    """The smallest design size in ``[k_min, k_max]`` whose best history set already covers
    every history task: the mean over tasks of the set's best task-normalised score is at
    most ``tol``, with fewer members than there are tasks. ``k_max`` when no such set does
    (or without history, or with fewer tasks than ``k_min + 1``).

    Where one or two configurations do well on every earlier task (a homogeneous history),
    the rest of the default design repeats them and the model can propose sooner; where the
    tasks' optima differ, every member of the default design is needed (docs/engine.md,
    "The warm start", has the measurements that set ``tol``). Observed scores only: a
    configuration a task did not observe counts as its worst, which can only keep the design
    larger (the warm start's per-task GP imputer costs seconds per task).
    """
    tasks = [t for t in tasks if len(t.y)]
    if not tasks or k_min >= k_max:
        return k_max
    pool_X, _ = _pool(tasks, max(2 * k_max, 8))
    S = _score_matrix(tasks, pool_X, None)
    rng = np.random.default_rng(seed)
    # Only sets smaller than the number of tasks: k members always cover k tasks (each one's best).
    for k in range(max(1, k_min), min(k_max, S.shape[1])):
        if set_score(S, np.asarray(evolve(S, k, rng))) / S.shape[1] <= tol:
            return k
    return k_max


def _pool(tasks: Sequence[Any], per_task: int) -> tuple[np.ndarray, list[dict[str, Any]]]:
    seen: dict[bytes, int] = {}
    rows, cfgs = [], []
    for t in tasks:
        for i in np.argsort(t.y, kind="stable")[:per_task]:
            key = keys(t.X[i : i + 1])[0]
            if key not in seen:
                seen[key] = len(rows)
                rows.append(t.X[i])
                cfgs.append(dict(t.configs[i]))
    return np.asarray(rows), cfgs


def _score_matrix(tasks: Sequence[Any], pool_X: np.ndarray, impute: Imputer | None) -> np.ndarray:
    """``S[p, t]``: task-normalised score of pool member ``p`` on task ``t`` (observed or imputed)."""
    pool_keys = keys(pool_X)
    S = np.ones((len(pool_X), len(tasks)))
    for j, t in enumerate(tasks):
        lo, hi = float(t.y.min()), float(t.y.max())
        norm = (t.y - lo) / (hi - lo) if hi > lo else np.zeros_like(t.y)
        observed = dict(zip(keys(t.X), norm, strict=False))
        if impute is not None:
            S[:, j] = np.clip(impute(j, pool_X), 0.0, 1.0)
        for p, key in enumerate(pool_keys):
            if key in observed:
                S[p, j] = observed[key]
    return S


def set_score(S: np.ndarray, members: np.ndarray) -> float:
    """Sum over tasks of the best normalised score within the set."""
    return float(S[members].min(axis=0).sum())


def evolve(
    S: np.ndarray,
    k: int,
    rng: np.random.Generator,
    *,
    generations: int = 120,
    population: int = 24,
) -> list[int]:
    """Evolutionary search for the ``k`` rows of ``S`` with the lowest :func:`set_score`."""
    P = len(S)
    if k >= P:
        return list(range(P))
    pop = [_greedy(S, k)] + [rng.choice(P, size=k, replace=False) for _ in range(population - 1)]
    fit = [set_score(S, m) for m in pop]
    for _ in range(generations):
        children = []
        for _ in range(population):
            a, b = _tournament(fit, rng), _tournament(fit, rng)
            union = np.union1d(pop[a], pop[b])
            child = rng.choice(union, size=k, replace=False) if len(union) > k else pop[a].copy()
            # Mutation: one member replaced by a history configuration outside the set.
            outside = np.setdiff1d(np.arange(P), child)
            child[int(rng.integers(k))] = outside[int(rng.integers(len(outside)))]
            children.append(child)
        allp = pop + children
        allf = fit + [set_score(S, c) for c in children]
        order = np.argsort(allf, kind="stable")[:population]
        pop, fit = [allp[i] for i in order], [allf[i] for i in order]
    best = pop[int(np.argmin(fit))]
    return [int(i) for i in sorted(best, key=lambda i: S[i].sum())]


def _greedy(S: np.ndarray, k: int) -> np.ndarray:
    members: list[int] = []
    cur = np.full(S.shape[1], np.inf)
    for _ in range(k):
        gain = np.minimum(S, cur).sum(axis=1)
        gain[members] = np.inf
        i = int(np.argmin(gain))
        members.append(i)
        cur = np.minimum(cur, S[i])
    return np.asarray(members)


def _tournament(fit: list[float], rng: np.random.Generator) -> int:
    a, b = rng.integers(len(fit), size=2)
    return int(a if fit[a] <= fit[b] else b)


def extend_design(space: Space, n: int, taken: np.ndarray, seed: int = 0, n_candidates: int = 1024) -> list[dict[str, Any]]:
    """``n`` more space-filling configurations, each as far as possible from ``taken`` and each other.

    Greedy maximin over scrambled Sobol candidates in the encoded unit cube: what a search
    proposes when its model cannot yet (too few scores) and its initial design is used up,
    instead of uniform random points. Fewer than ``n`` when the space has no more distinct points.
    """
    if n <= 0:
        return []
    cand = project(space, qmc.Sobol(d=space.dim, scramble=True, seed=seed).random(n_candidates))
    cand_keys = keys(cand)
    used = set(keys(taken)) if len(taken) else set()
    fresh = [i for i, k in enumerate(cand_keys) if k not in used]
    cand = cand[fresh]
    cand_keys = [cand_keys[i] for i in fresh]
    near = np.full(len(cand), np.inf)
    if len(taken):
        near = np.min(np.linalg.norm(cand[:, None, :] - np.asarray(taken)[None, :, :], axis=2), axis=1)
    out: list[dict[str, Any]] = []
    for _ in range(n):
        i = int(np.argmax(near)) if len(cand) else -1
        if i < 0 or near[i] < 0:
            break
        used.add(cand_keys[i])
        out.append(space.decode(cand[i]))
        near = np.minimum(near, np.linalg.norm(cand - cand[i], axis=1))
        # Candidates equal to one already chosen (after rounding) are never picked again.
        near[[j for j, k in enumerate(cand_keys) if k in used]] = -1.0
    return out
