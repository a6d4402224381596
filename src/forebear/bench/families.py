"""Task families for the quality benchmark.

A family is a set of related tasks over one space. For a held-out task, the
history is the other tasks of its family, each seen through a fixed design
of earlier results; the held-out task's objective is then searched from
scratch by each method.

Two kinds of family:

* analytic transfer families: ``s * f(x - t)`` for a published test function
  ``f`` on the unit cube, a shift ``t`` uniform in ``[-0.25, 0.25]^D`` clipped so
  that a minimiser of ``f`` stays inside the cube, a scale ``s`` uniform in
  ``[0.75, 1.25]``. The parametrisation follows the meta-learning BO
  literature (few-shot BO with deep-kernel surrogates, ICLR 2021);
  ``f`` is evaluated at ``clip(x - t, 0, 1)`` so it never leaves its
  published domain, which leaves its minimum and minimiser (shifted) intact.
* the real-training family: tasks of the committed table
  ``data/hgb_tasks.csv.gz`` (see ``metadata.py`` and ``data/DATA_CARD.md``),
  each task's objective a random forest fitted to its tabled results, as in
  surrogate benchmarks (Eggensperger et al. 2015).

Normalised regret of a value ``y`` on a task is ``(y - low) / (high - low)``.

What a history task holds (``history_kind``): ``"sobol"``, its design above;
or ``"searches"``, what a user's earlier search of it would have left: 20-50
trials (drawn per task) of forebear's plain-GP search (``Proposer`` with
``model="gp"``, run synchronously one trial at a time), so the points cluster
near that task's optimum. Those searches are cached on disk (see
``searched``). ``"shuffled"`` is the Sobol design with each task's scores
permuted among its points (a fixed permutation per task): history with the
right format and no information, for the unrelated-history check.
``history_tasks`` sets how many other tasks a held-out task's
history holds (the first ones of the family, in order, so a smaller history
is part of a larger one); an analytic family grows to hold them, while the
held-out tasks stay among the first ``n_tasks``.
"""

from __future__ import annotations

import csv
import gzip
import hashlib
import json
import math
import os
import tempfile
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.stats import qmc

from forebear.bench import functions
from forebear.core.param import Param
from forebear.core.space import Space
from forebear.records.history import History, Task

DATA = Path(__file__).parent / "data" / "hgb_tasks.csv.gz"
HISTORY_KINDS = ("sobol", "searches", "shuffled")
#: Trials of one searched history task, drawn per task from this range (inclusive).
SEARCH_TRIALS = (20, 50)
#: Bump when the way searched histories are made changes: older cache entries are then ignored.
_SEARCH_FORMAT = 1

# name -> (function, dimension, published minimum, one published minimiser in unit coordinates)
_BRANIN_ARGMIN_UNIT = tuple(((a + 5.0) / 15.0, b / 15.0) for a, b in functions.BRANIN_ARGMIN)
ANALYTIC: dict[str, tuple[Callable[[np.ndarray], float], int, float, tuple[float, ...]]] = {
    # Branin has three minimisers; the shift is clipped so that the one
    # nearest the centre of the square, (pi, 2.275), stays inside.
    "branin": (functions.branin, 2, functions.BRANIN_MIN, _BRANIN_ARGMIN_UNIT[1]),
    "hartmann3": (functions.hartmann3, 3, functions.HARTMANN3_MIN, functions.HARTMANN3_ARGMIN),
    "hartmann6": (functions.hartmann6, 6, functions.HARTMANN6_MIN, functions.HARTMANN6_ARGMIN),
}
FAMILIES = (*ANALYTIC, "hgb")


@dataclass
class BenchTask:
    """One task: an objective over configurations and its normalisation bounds."""

    name: str
    objective: Callable[[Mapping[str, Any]], float]
    low: float
    high: float
    configs: list[dict[str, Any]]
    y: np.ndarray
    notes: dict[str, Any] = field(default_factory=dict)

    def regret(self, value: float | np.ndarray) -> float | np.ndarray:
        """Normalised regret of ``value`` (0 = best known, 1 = worst known)."""
        return (np.asarray(value, dtype=float) - self.low) / (self.high - self.low)


@dataclass
class Family:
    """Related tasks over one space; the history of a task is the others' designs or searches.

    ``pool``: held-out tasks are chosen among the first ``pool`` tasks (all when ``None``).
    """

    name: str
    space: Space
    tasks: list[BenchTask]
    source: str
    history_kind: str = "sobol"
    history_tasks: int | None = None
    pool: int | None = None
    search_trials: tuple[int, int] = SEARCH_TRIALS
    cache_dir: Path | None = None

    def history_for(self, index: int) -> History:
        """The other tasks of the family as a ``History`` (leave one task out)."""
        if not 0 <= index < len(self.tasks):
            msg = f"family {self.name}: task index {index} outside 0..{len(self.tasks) - 1}"
            raise IndexError(msg)
        others = [j for j in range(len(self.tasks)) if j != index]
        if self.history_tasks is not None:
            others = others[: self.history_tasks]
        out = []
        for j in others:
            t = self.tasks[j]
            configs, y = (t.configs, t.y) if self.history_kind != "searches" else searched(self, j)
            if self.history_kind == "shuffled":
                y = np.random.default_rng([7, j]).permutation(np.asarray(y, dtype=float))
            out.append(Task(t.name, [dict(c) for c in configs], self.space.encode_many(configs), np.asarray(y, dtype=float)))
        return History(out, [])


def searched(family: Family, index: int) -> tuple[list[dict[str, Any]], np.ndarray]:
    """Configurations and scores of a plain-GP search of task ``index``, as a user's earlier search.

    The trial count is drawn per task from ``family.search_trials``; the search
    seed is fixed per task. Cached as JSON in ``family.cache_dir`` (default
    ``$FOREBEAR_CACHE/bench-history``, see ``default_cache_dir``) under a key of
    the task, the space and the trial count, written atomically under a file
    lock, so parallel jobs and later runs reuse one search instead of repeating it.
    """
    from filelock import FileLock

    from forebear.engine.proposer import Observation, Proposer, default_cache_dir

    task = family.tasks[index]
    lo, hi = family.search_trials
    trials = int(np.random.default_rng([index, lo, hi]).integers(lo, hi + 1))
    seed = 7_000 + index
    ident = json.dumps([_SEARCH_FORMAT, family.name, task.name, task.notes, task.low, task.high,
                        family.space.to_dict(), trials, seed], sort_keys=True, default=str)
    folder = family.cache_dir or default_cache_dir() / "bench-history"
    path = folder / f"{family.name}-{task.name}-{hashlib.sha256(ident.encode()).hexdigest()[:16]}.json"
    folder.mkdir(parents=True, exist_ok=True)
    with FileLock(str(path) + ".lock"):
        if path.is_file():
            data = json.loads(path.read_text())
            return data["configs"], np.asarray(data["y"], dtype=float)
        proposer = Proposer(family.space, None, seed=seed, model="gp", cache_dir=False)
        observed: list[Observation] = []
        while len(observed) < trials:
            for p in proposer.propose(1, observed):
                observed.append(Observation(p.config, task.objective(p.config)))
        configs = [dict(o.config) for o in observed]
        y = [float(o.score) for o in observed]
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=".history-", suffix=".tmp")
        with os.fdopen(fd, "w") as fh:
            json.dump({"task": task.name, "trials": trials, "seed": seed, "configs": configs, "y": y}, fh)
        os.replace(tmp, path)
    return configs, np.asarray(y, dtype=float)


def unit_space(dim: int) -> Space:
    """The unit cube as a space of floats ``x0 .. x{dim-1}``."""
    return Space(tuple(Param(f"x{i}", "float", 0.0, 1.0) for i in range(dim)))


def sobol(dim: int, n: int, seed: int) -> np.ndarray:
    """``n`` points of a scrambled Sobol sequence (first ``n`` of a power-of-two block)."""
    m = max(1, math.ceil(math.log2(max(n, 2))))
    return qmc.Sobol(d=dim, scramble=True, seed=seed).random_base2(m)[:n]


def analytic_family(name: str, n_tasks: int = 10, n_points: int = 300, seed: int = 0) -> Family:
    """A transfer family ``s * f(clip(x - t))`` of ``n_tasks`` tasks.

    Parameters
    ----------
    name
        ``branin``, ``hartmann3`` or ``hartmann6``.
    n_tasks
        Tasks in the family.
    n_points
        Sobol design points per task (what the history holds of it).
    seed
        Draws the shifts, scales and designs; fixed per family so every
        method and seed sees the same tasks.
    """
    if name not in ANALYTIC:
        msg = f"unknown analytic family {name!r}; expected one of {', '.join(ANALYTIC)}"
        raise ValueError(msg)
    if n_tasks < 2 or n_points < 1:
        msg = f"family {name}: need n_tasks >= 2 and n_points >= 1, got {n_tasks}, {n_points}"
        raise ValueError(msg)
    f, dim, fmin, argmin = ANALYTIC[name]
    space = unit_space(dim)
    rng = np.random.default_rng([seed, dim])
    xstar = np.asarray(argmin, dtype=float)
    probe = sobol(dim, 4096, seed=10_000 + seed)
    tasks = []
    for k in range(n_tasks):
        t = np.clip(rng.uniform(-0.25, 0.25, dim), -xstar, 1.0 - xstar)
        s = float(rng.uniform(0.75, 1.25))
        g = _shifted(f, t, s)
        design = sobol(dim, n_points, seed=1000 * (seed + 1) + k)
        y = np.array([g(x) for x in design])
        worst = max(float(np.max(y)), max(g(x) for x in probe))
        configs = space.decode_many(design)
        tasks.append(BenchTask(
            name=f"{name}-{k}",
            objective=_on_configs(g, space),
            low=s * fmin,
            high=worst,
            configs=configs,
            y=y,
            notes={"shift": t.round(4).tolist(), "scale": round(s, 4)},
        ))
    source = {
        "branin": "Branin-Hoo on [-5, 10] x [0, 15] mapped to the unit square",
        "hartmann3": "Hartmann-3 on [0, 1]^3",
        "hartmann6": "Hartmann-6 on [0, 1]^6",
    }[name] + " (definitions and minima from the Virtual Library of Simulation Experiments)"
    return Family(name, space, tasks, source)


def _shifted(f: Callable[[np.ndarray], float], t: np.ndarray, s: float) -> Callable[[np.ndarray], float]:
    def g(x: np.ndarray) -> float:
        return s * f(np.clip(np.asarray(x, dtype=float) - t, 0.0, 1.0))

    return g


def _on_configs(g: Callable[[np.ndarray], float], space: Space) -> Callable[[Mapping[str, Any]], float]:
    def objective(config: Mapping[str, Any]) -> float:
        return float(g(space.encode(config)))

    return objective


def read_table(path: Path = DATA) -> dict[str, list[dict[str, Any]]]:
    """Rows of the meta-dataset table grouped by task, values typed per the space."""
    from forebear.bench.metadata import hgb_space

    space = hgb_space()
    if not path.is_file():
        msg = f"meta-dataset table {path} does not exist; build it with python -m forebear.bench.metadata"
        raise FileNotFoundError(msg)
    out: dict[str, list[dict[str, Any]]] = {}
    with gzip.open(path, "rt", newline="") as fh:
        for line, row in enumerate(csv.DictReader(fh), start=2):
            config: dict[str, Any] = {}
            for p in space.params:
                cell = row.get(p.name)
                if cell is None or cell == "":
                    msg = f"{path}: line {line}: no value for {p.name}"
                    raise ValueError(msg)
                if p.kind == "categorical":
                    config[p.name] = p.categories[p.index(float(cell))]
                elif p.kind == "int":
                    config[p.name] = int(cell)
                else:
                    config[p.name] = float(cell)
            out.setdefault(row["task"], []).append({"config": config, "error": float(row["error"])})
    return out


def hgb_family(path: Path = DATA, n_points: int | None = None, seed: int = 0) -> Family:
    """The real-training family: one task per table task, objective a random forest fit.

    ``n_points`` keeps only the first rows of each task's design in the
    history (the random forest always uses every row).
    """
    from forebear.bench.metadata import hgb_space

    space = hgb_space()
    table = read_table(path)
    tasks = []
    for name, rows in table.items():
        configs = [r["config"] for r in rows]
        y = np.array([r["error"] for r in rows])
        X = space.encode_many(configs)
        keep = len(rows) if n_points is None else n_points
        tasks.append(BenchTask(
            name=name,
            objective=_forest_objective(X, y, space, seed),
            low=float(y.min()),
            high=float(y.max()),
            configs=configs[:keep],
            y=y[:keep],
            notes={"rows": len(rows)},
        ))
    src = "HistGradientBoostingClassifier 3-fold CV error on scikit-learn's bundled datasets (see data/DATA_CARD.md)"
    return Family("hgb", space, tasks, src)


def _forest_objective(X: np.ndarray, y: np.ndarray, space: Space, seed: int) -> Callable[[Mapping[str, Any]], float]:
    from sklearn.ensemble import RandomForestRegressor

    forest: list[Any] = []

    def objective(config: Mapping[str, Any]) -> float:
        # Fitted on first use: only held-out tasks are ever evaluated.
        if not forest:
            forest.append(RandomForestRegressor(n_estimators=100, random_state=seed, n_jobs=1).fit(X, y))
        return float(forest[0].predict(space.encode(config)[None, :])[0])

    return objective


def make_family(
    name: str,
    n_tasks: int = 10,
    n_points: int = 300,
    seed: int = 0,
    history_kind: str = "sobol",
    history_tasks: int | None = None,
) -> Family:
    """A family by name (``branin``, ``hartmann3``, ``hartmann6`` or ``hgb``).

    ``history_kind`` and ``history_tasks``: what each held-out task's history
    holds (see the module's docstring). An analytic family is built with
    ``max(n_tasks, history_tasks + 1)`` tasks (task ``k`` is the same whatever
    the size) and its held-out tasks stay among the first ``n_tasks``.
    """
    if history_kind not in HISTORY_KINDS:
        msg = f"history_kind must be one of {', '.join(HISTORY_KINDS)}, got {history_kind!r}"
        raise ValueError(msg)
    if history_tasks is not None and history_tasks < 1:
        msg = f"history_tasks must be >= 1, got {history_tasks}"
        raise ValueError(msg)
    if name == "hgb":
        fam = hgb_family(n_points=n_points, seed=seed)
        if history_tasks is not None and history_tasks > len(fam.tasks) - 1:
            msg = f"family hgb has {len(fam.tasks)} tasks: at most {len(fam.tasks) - 1} history tasks, got {history_tasks}"
            raise ValueError(msg)
    else:
        size = max(n_tasks, (history_tasks or 0) + 1)
        fam = analytic_family(name, n_tasks=size, n_points=n_points, seed=seed)
        fam.pool = n_tasks
    fam.history_kind, fam.history_tasks = history_kind, history_tasks
    return fam


def held_out(family: Family, count: int) -> list[int]:
    """Indices of ``count`` held-out tasks, evenly spread over the family (all when it is smaller).

    Spread rather than the first ``count``: the meta-dataset's tasks are listed
    dataset by dataset, and every dataset should be held out.
    """
    n = len(family.tasks) if family.pool is None else min(family.pool, len(family.tasks))
    if count >= n:
        return list(range(n))
    return sorted({int(round(i)) for i in np.linspace(0, n - 1, count)})
