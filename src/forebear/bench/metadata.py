"""Build the real-training meta-dataset used by the quality benchmark.

Every task is one classification problem made from a dataset that ships with
scikit-learn (iris, wine, breast_cancer, digits) or a documented variant of
one (a subset of its classes, features or rows). On every task the same
Sobol design of configurations of ``HistGradientBoostingClassifier`` is scored
by stratified k-fold cross-validation; the table of (task, configuration,
validation error) is written as a compressed CSV.

Run ``python -m forebear.bench.metadata --out src/forebear/bench/data/hgb_tasks.csv.gz``.
Nothing is downloaded: the four datasets are bundled with scikit-learn.
"""

from __future__ import annotations

import argparse
import csv
import gzip
import os
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy.stats import qmc

from forebear.core.space import Space

#: The tuned hyperparameters of HistGradientBoostingClassifier (six, mixed types).
HGB_SPACE: dict[str, dict[str, Any]] = {
    "learning_rate": {"float": [0.01, 1.0], "log": True},
    "max_leaf_nodes": {"int": [2, 64], "log": True},
    "l2_regularization": {"float": [1.0e-4, 10.0], "log": True},
    "min_samples_leaf": {"int": [1, 64], "log": True},
    "max_iter": {"int": [5, 80], "log": True},
    "max_features": {"categories": [0.3, 0.6, 1.0]},
}

#: Columns of the table, in order.
COLUMNS = ("task", "config", *HGB_SPACE, "error", "error_sd", "seconds")

DEFAULT_OUT = Path(__file__).parent / "data" / "hgb_tasks.csv.gz"


def hgb_space() -> Space:
    """The search space of the meta-dataset."""
    return Space.from_dict(HGB_SPACE)


@dataclass(frozen=True)
class TaskDef:
    """One task: a name, what it is, and how to build its (X, y)."""

    name: str
    description: str
    build: Callable[[], tuple[np.ndarray, np.ndarray]]


def _dataset(name: str) -> tuple[np.ndarray, np.ndarray]:
    from sklearn import datasets

    loaders = {
        "iris": datasets.load_iris,
        "wine": datasets.load_wine,
        "breast_cancer": datasets.load_breast_cancer,
        "digits": datasets.load_digits,
    }
    X, y = loaders[name](return_X_y=True)
    return np.asarray(X, dtype=float), np.asarray(y)


def _classes(name: str, keep: Sequence[int]) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
    def build() -> tuple[np.ndarray, np.ndarray]:
        X, y = _dataset(name)
        m = np.isin(y, keep)
        return X[m], y[m]

    return build


def _features(name: str, cols: Sequence[int]) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
    def build() -> tuple[np.ndarray, np.ndarray]:
        X, y = _dataset(name)
        return X[:, list(cols)], y

    return build


def _rows(name: str, fraction: float, seed: int, keep: Sequence[int] | None = None) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
    def build() -> tuple[np.ndarray, np.ndarray]:
        X, y = _classes(name, keep)() if keep is not None else _dataset(name)
        rng = np.random.default_rng(seed)
        idx = np.sort(rng.choice(len(y), size=int(round(fraction * len(y))), replace=False))
        return X[idx], y[idx]

    return build


def _parity(fraction: float, seed: int) -> Callable[[], tuple[np.ndarray, np.ndarray]]:
    def build() -> tuple[np.ndarray, np.ndarray]:
        X, y = _rows("digits", fraction, seed)()
        return X, y % 2

    return build


# digits pixels are an 8 x 8 image, row-major: the left half is columns 0-3 of every row.
_LEFT_HALF = [r * 8 + c for r in range(8) for c in range(4)]

TASKS: tuple[TaskDef, ...] = (
    TaskDef("iris", "iris, all 150 rows, 3 classes, 4 features", lambda: _dataset("iris")),
    TaskDef("iris-versicolor-virginica", "iris, classes 1 and 2 only (100 rows)", _classes("iris", [1, 2])),
    TaskDef("iris-sepal", "iris, sepal length and width only (features 0, 1)", _features("iris", [0, 1])),
    TaskDef("iris-petal", "iris, petal length and width only (features 2, 3)", _features("iris", [2, 3])),
    TaskDef("wine", "wine, all 178 rows, 3 classes, 13 features", lambda: _dataset("wine")),
    TaskDef("wine-0v1", "wine, classes 0 and 1 only", _classes("wine", [0, 1])),
    TaskDef("wine-1v2", "wine, classes 1 and 2 only", _classes("wine", [1, 2])),
    TaskDef("wine-first7", "wine, features 0-6 only", _features("wine", range(7))),
    TaskDef("wine-last6", "wine, features 7-12 only", _features("wine", range(7, 13))),
    TaskDef("breast_cancer-half-a", "breast_cancer, a random half of the rows (seed 1)", _rows("breast_cancer", 0.5, 1)),
    TaskDef("breast_cancer-mean", "breast_cancer, the 10 'mean' features (0-9), half the rows (seed 2)", lambda: _sub(_features("breast_cancer", range(10)), 0.5, 2)),
    TaskDef("breast_cancer-se", "breast_cancer, the 10 'standard error' features (10-19), half the rows (seed 3)", lambda: _sub(_features("breast_cancer", range(10, 20)), 0.5, 3)),
    TaskDef("breast_cancer-worst", "breast_cancer, the 10 'worst' features (20-29), half the rows (seed 4)", lambda: _sub(_features("breast_cancer", range(20, 30)), 0.5, 4)),
    TaskDef("breast_cancer-quarter", "breast_cancer, a random quarter of the rows (seed 5)", _rows("breast_cancer", 0.25, 5)),
    TaskDef("digits-3v8", "digits, classes 3 and 8 only", _classes("digits", [3, 8])),
    TaskDef("digits-1v7", "digits, classes 1 and 7 only", _classes("digits", [1, 7])),
    TaskDef("digits-4v9", "digits, classes 4 and 9 only", _classes("digits", [4, 9])),
    TaskDef("digits-2v3", "digits, classes 2 and 3 only", _classes("digits", [2, 3])),
    TaskDef("digits-5v9", "digits, classes 5 and 9 only", _classes("digits", [5, 9])),
    TaskDef("digits-3v5v8", "digits, classes 3, 5 and 8, a random half of their rows (seed 6)", _rows("digits", 0.5, 6, keep=[3, 5, 8])),
    TaskDef("digits-0to4", "digits, classes 0-4, a random fifth of their rows (seed 7)", _rows("digits", 0.2, 7, keep=[0, 1, 2, 3, 4])),
    TaskDef("digits-parity", "digits relabelled odd/even, a random fifth of all rows (seed 8)", _parity(0.2, 8)),
    TaskDef("digits-3v8-left", "digits, classes 3 and 8, left half of the image only (32 pixels)", lambda: _sub(_classes("digits", [3, 8]), 1.0, 0, cols=_LEFT_HALF)),
    TaskDef("digits-1v7-top", "digits, classes 1 and 7, top half of the image only (pixels 0-31)", lambda: _sub(_classes("digits", [1, 7]), 1.0, 0, cols=range(32))),
)


def _sub(build: Callable[[], tuple[np.ndarray, np.ndarray]], fraction: float, seed: int, cols: Sequence[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
    X, y = build()
    if cols is not None:
        X = X[:, list(cols)]
    if fraction < 1.0:
        rng = np.random.default_rng(seed)
        idx = np.sort(rng.choice(len(y), size=int(round(fraction * len(y))), replace=False))
        X, y = X[idx], y[idx]
    return X, y


def design(n: int, seed: int = 0) -> list[dict[str, Any]]:
    """``n`` configurations from a scrambled Sobol design over the space (Sobol 1967).

    A power-of-two Sobol block is drawn and its first ``n`` points kept, so the
    same seed gives the same design for every task.
    """
    space = hgb_space()
    m = int(np.ceil(np.log2(max(n, 2))))
    base = qmc.Sobol(d=len(space.params), scramble=True, seed=seed).random_base2(m)[:n]
    return [space._from_base(row) for row in base]


def score(task: TaskDef, config: dict[str, Any], folds: int = 3, seed: int = 0) -> tuple[float, float, float]:
    """Mean and sd of the k-fold validation error of one configuration, and its seconds."""
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.model_selection import StratifiedKFold, cross_val_score
    from threadpoolctl import threadpool_limits

    X, y = task.build()
    clf = HistGradientBoostingClassifier(early_stopping=False, random_state=seed, **config)
    t0 = time.perf_counter()
    # One thread per fit: the datasets are tiny (OpenMP start-up would dominate) and
    # the table stays reproducible whatever the machine's core count.
    with threadpool_limits(1):
        acc = cross_val_score(clf, X, y, cv=StratifiedKFold(folds, shuffle=True, random_state=seed))
    return float(1.0 - acc.mean()), float(acc.std()), time.perf_counter() - t0


def _score_task(args: tuple[int, list[dict[str, Any]], int]) -> list[dict[str, Any]]:
    index, configs, folds = args
    task = TASKS[index]
    rows = []
    for i, config in enumerate(configs):
        err, sd, sec = score(task, config, folds)
        rows.append({"task": task.name, "config": i, **config, "error": err, "error_sd": sd, "seconds": sec})
    return rows


def build(out: Path, n_configs: int = 300, folds: int = 3, workers: int = 2, tasks: Sequence[str] | None = None) -> dict[str, Any]:
    """Score the design on every task and write the table; returns what it did."""
    chosen = [i for i, t in enumerate(TASKS) if tasks is None or t.name in tasks]
    if tasks is not None and len(chosen) != len(set(tasks)):
        unknown = sorted(set(tasks) - {t.name for t in TASKS})
        msg = f"unknown task names: {', '.join(unknown)}"
        raise ValueError(msg)
    configs = design(n_configs)
    t0 = time.perf_counter()
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    with ProcessPoolExecutor(max_workers=workers) as pool:
        parts = list(pool.map(_score_task, [(i, configs, folds) for i in chosen]))
    wall = time.perf_counter() - t0
    out.parent.mkdir(parents=True, exist_ok=True)
    with gzip.open(out, "wt", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(COLUMNS))
        w.writeheader()
        for rows in parts:
            for row in rows:
                w.writerow({k: (f"{v:.6g}" if isinstance(v, float) and k in ("error", "error_sd", "seconds", "learning_rate", "l2_regularization") else v) for k, v in row.items()})
    return {"tasks": len(chosen), "configs": n_configs, "folds": folds, "workers": workers, "wall_s": round(wall, 1), "out": str(out)}


def main(argv: Sequence[str] | None = None) -> dict[str, Any]:
    ap = argparse.ArgumentParser(prog="python -m forebear.bench.metadata", description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT, help="Where the .csv.gz table goes.")
    ap.add_argument("--configs", type=int, default=300, help="Configurations per task (Sobol design).")
    ap.add_argument("--folds", type=int, default=3, help="Cross-validation folds.")
    ap.add_argument("--workers", type=int, default=2, help="Processes (one task per process at a time).")
    ap.add_argument("--tasks", nargs="*", default=None, help="Only these task names.")
    ns = ap.parse_args(argv)
    if ns.configs < 1 or ns.folds < 2 or ns.workers < 1:
        ap.error("--configs must be >= 1, --folds >= 2, --workers >= 1")
    result = build(ns.out, ns.configs, ns.folds, ns.workers, ns.tasks)
    print(result)
    return result


if __name__ == "__main__":
    main()
