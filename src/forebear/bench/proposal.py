"""`forebear bench proposal`: proposal latency, meta-training time, cache load time.

``main()`` measures the four figures of docs/benchmarks.md. The comparisons
behind the engine's defaults run from here too::

    python -m forebear.bench.proposal lies       # CL-min / CL-mean / CL-max
    python -m forebear.bench.proposal failures   # feasibility classifier vs worst-score imputation
    python -m forebear.bench.proposal subset     # subset-of-data accuracy vs the exact GP

The task family is our own: Hartmann-3 (Surjanovic & Bingham) with each task
shifted by up to 0.1 per coordinate and affinely rescaled.
"""

from __future__ import annotations

import json
import os
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from forebear.bench.functions import BRANIN_MIN, HARTMANN3_MIN, branin, hartmann3
from forebear.core.space import Space
from forebear.engine.proposer import Observation, Proposer
from forebear.records.history import History, Task

SPACE3 = Space.from_dict({f"x{i}": {"float": [0.0, 1.0]} for i in range(3)})
SPACE2 = Space.from_dict({f"x{i}": {"float": [0.0, 1.0]} for i in range(2)})


def _vec(space: Space, config: dict[str, Any]) -> np.ndarray:
    return np.array([config[n] for n in space.names], dtype=float)


def shifted_hartmann3(rng: np.random.Generator) -> Callable[[np.ndarray], float]:
    """One task of the family: a shifted, rescaled Hartmann-3."""
    shift = rng.uniform(-0.1, 0.1, size=3)
    a, b = rng.uniform(0.5, 2.0), rng.uniform(-1.0, 1.0)
    return lambda u: a * hartmann3(np.clip(np.asarray(u) + shift, 0.0, 1.0)) + b


def make_history(n_tasks: int, n_points: int, seed: int = 0, space: Space = SPACE3) -> History:
    """``n_tasks`` tasks of the shifted Hartmann-3 family, ``n_points`` uniform points each."""
    rng = np.random.default_rng(seed)
    tasks = []
    for t in range(n_tasks):
        f = shifted_hartmann3(rng)
        configs = space.sample(n_points, rng)
        X = space.encode_many(configs)
        tasks.append(Task(f"task-{t}", configs, X, np.array([f(x) for x in X])))
    return History(tasks)


def _observations(space: Space, f: Callable[[np.ndarray], float], n: int, rng: np.random.Generator) -> list[Observation]:
    return [Observation(c, f(_vec(space, c))) for c in space.sample(n, rng)]


class _Clock:
    """Wall and CPU seconds of a block; with one torch thread, CPU time is what an idle core would take."""

    def __enter__(self) -> _Clock:
        self.wall, self.cpu = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc: object) -> None:
        self.wall = time.perf_counter() - self.wall
        self.cpu = time.process_time() - self.cpu


def main(repeats: int = 5) -> dict[str, Any]:
    """The four figures: median proposal (q=8, 200 observations, 30 history tasks; each timed
    round one observation more than the last, after a first round on the 200), meta-training
    (30 tasks x 300 points), loading the cached state, median proposal with 2000 observations.

    Wall-clock seconds are the figures; ``*_cpu`` companions give the process CPU time of the
    same runs, which a loaded machine inflates much less.
    """
    history = make_history(30, 300, seed=0)
    rng = np.random.default_rng(1)
    f = shifted_hartmann3(rng)
    obs200 = _observations(SPACE3, f, 200, rng)
    with tempfile.TemporaryDirectory() as cache:
        p = Proposer(SPACE3, history, seed=0, cache_dir=cache)
        # The history check (engine/agreement.py) comes first in a search and fits the history
        # tasks' imputing GPs, which the warm start and the spread factor then share: timed apart.
        with _Clock() as check:
            p.check_history()
        with _Clock() as meta_train:
            p.meta_model()
        steps = p.meta_model().report.steps  # type: ignore[union-attr]
        q = Proposer(SPACE3, history, seed=0, cache_dir=cache)
        q.check_history()
        with _Clock() as cached:
            q.meta_model()
        assert q.meta_cached, "the second proposer should have loaded the cache"
        with _Clock() as first:  # the round that meets the 200 observations (a cold GP fit)
            q.propose(8, obs200)
        clocks = []
        extra = _observations(SPACE3, f, repeats, rng)
        for i in range(repeats):
            # Each timed round has one result more than the last, as in a running search.
            with _Clock() as c:
                props = q.propose(8, obs200 + extra[: i + 1])
            clocks.append(c)
        models = sorted({str(pr.model) for pr in props})
    obs2000 = _observations(SPACE3, f, 2000, rng)
    big = Proposer(SPACE3, None, seed=0)
    big_clocks = []
    for _ in range(max(3, repeats // 2 + 1)):
        with _Clock() as c:
            big.propose(8, obs2000)
        big_clocks.append(c)

    def med(cs: list[_Clock], attr: str) -> float:
        return round(statistics.median(getattr(c, attr) for c in cs), 4)

    return {
        "proposal_seconds_median": med(clocks, "wall"),
        "meta_train_seconds": round(meta_train.wall, 3),
        "cached_load_seconds": round(cached.wall, 4),
        "proposal_seconds_2000": med(big_clocks[1:], "wall"),
        "proposal_seconds_median_cpu": med(clocks, "cpu"),
        "meta_train_seconds_cpu": round(meta_train.cpu, 3),
        "proposal_seconds_2000_cpu": med(big_clocks[1:], "cpu"),
        "proposal_seconds_2000_first": round(big_clocks[0].wall, 4),
        "proposal_seconds_first": round(first.wall, 4),
        "history_check_seconds": round(check.wall, 3),
        "meta_train_steps": steps,
        "proposal_models": ",".join(models),
        "load_average": round(os.getloadavg()[0], 2),
    }


# --------------------------------------------------------------------------
# comparisons behind the defaults


def run_search(
    proposer: Proposer,
    f: Callable[[dict[str, Any]], float | None],
    trials: int,
    batch: int,
) -> tuple[list[float], int]:
    """Synchronous batches until ``trials`` finish; ``f`` returns ``None`` for a crash.

    Returns the best-so-far curve over trials and the number of failed trials.
    """
    obs: list[Observation] = []
    failed: list[dict[str, Any]] = []
    curve: list[float] = []
    best = float("inf")
    while len(obs) + len(failed) < trials:
        for pr in proposer.propose(min(batch, trials - len(obs) - len(failed)), obs, failed):
            y = f(pr.config)
            if y is None:
                failed.append(pr.config)
            else:
                obs.append(Observation(pr.config, y))
                best = min(best, y)
            curve.append(best)
    return curve, len(failed)


def lies(seeds: int = 6, trials: int = 32, batch: int = 4) -> dict[str, Any]:
    """Mean final regret for each constant-liar value on Branin and Hartmann-3."""
    problems = {
        "branin": (SPACE2, lambda c: branin(_vec(SPACE2, c)), BRANIN_MIN),
        "hartmann3": (SPACE3, lambda c: hartmann3(_vec(SPACE3, c)), HARTMANN3_MIN),
    }
    out: dict[str, Any] = {}
    for name, (space, f, fmin) in problems.items():
        for lie in ("min", "mean", "max"):
            regrets = []
            for s in range(seeds):
                curve, _ = run_search(Proposer(space, seed=s, lie=lie), f, trials, batch)
                regrets.append(curve[-1] - fmin)
            out[f"{name}_{lie}"] = round(float(np.mean(regrets)), 5)
            out[f"{name}_{lie}_median"] = round(float(np.median(regrets)), 5)
    return out


def crashing_branin(c: dict[str, Any]) -> float | None:
    """Branin on the unit square that crashes where x0 + x1 > 1.3 (a quarter of the square)."""
    x = _vec(SPACE2, c)
    return None if x[0] + x[1] > 1.3 else branin(x)


def failures(seeds: int = 6, trials: int = 30, batch: int = 2) -> dict[str, Any]:
    """Failed trials and final regret: feasibility classifier vs worst-score imputation."""
    out: dict[str, Any] = {}
    # The crash-free minimum of crashing_branin is Branin's own: (pi, 2.275) and
    # (9.42478, 2.475) lie inside x0 + x1 <= 1.3 on the unit square.
    for mode in ("classifier", "impute"):
        wasted, regrets = [], []
        for s in range(seeds):
            curve, n_failed = run_search(Proposer(SPACE2, seed=s, failed=mode), crashing_branin, trials, batch)
            wasted.append(n_failed)
            regrets.append(curve[-1] - BRANIN_MIN)
        out[f"{mode}_failed_trials_mean"] = round(float(np.mean(wasted)), 2)
        out[f"{mode}_regret_mean"] = round(float(np.mean(regrets)), 5)
    return out


def subset(n: int = 2000, seed: int = 0) -> dict[str, Any]:
    """Subset-of-data posterior vs the exact posterior (same hyperparameters) on Hartmann-3."""
    from forebear.engine.surrogate.gp import MAX_EXACT, Posterior, as_tensor, fit_gp

    rng = np.random.default_rng(seed)
    X = rng.random((n, 3))
    y = np.array([hartmann3(x) for x in X])
    fit = fit_gp(X, y, restarts=1, seed=seed)  # hyperparameters from the subset
    sub = fit.posterior
    exact = Posterior(sub.kernel, sub.mean, sub.noise, as_tensor(X), as_tensor(y), sub.shift, sub.scale)
    Xt = rng.random((4000, 3))
    yt = np.array([hartmann3(x) for x in Xt])
    ms, vs = sub.predict(Xt)
    me, ve = exact.predict(Xt)
    good = yt < np.quantile(yt, 0.1)  # the region EI works in
    return {
        "n": n,
        "subset_size": MAX_EXACT,
        "rmse_exact": round(float(np.sqrt(np.mean((me - yt) ** 2))), 5),
        "rmse_subset": round(float(np.sqrt(np.mean((ms - yt) ** 2))), 5),
        "rmse_exact_best_decile": round(float(np.sqrt(np.mean((me[good] - yt[good]) ** 2))), 5),
        "rmse_subset_best_decile": round(float(np.sqrt(np.mean((ms[good] - yt[good]) ** 2))), 5),
        "y_std": round(float(np.std(yt)), 5),
    }


if __name__ == "__main__":
    what = sys.argv[1] if len(sys.argv) > 1 else "main"
    fn = {"main": main, "lies": lies, "failures": failures, "subset": subset}[what]
    print(json.dumps(fn(), indent=1))
