"""spread.py: the deep kernel's scale factor, measured on history."""

from __future__ import annotations

import numpy as np
import pytest

from forebear.core.space import Space
from forebear.engine.spread import CAP, Spread
from forebear.engine.warmstart import gp_imputer
from forebear.records.history import Task

SPACE = Space.from_dict({"a": {"float": [0.0, 1.0]}, "b": {"float": [0.0, 1.0]}})


def _bowls(n_tasks: int = 6, n: int = 120, seed: int = 0) -> list[Task]:
    """Earlier tasks: shifted 2-D bowls, each seen at random points (invented data)."""
    rng = np.random.default_rng(seed)
    tasks = []
    for j in range(n_tasks):
        c = 0.5 + rng.uniform(-0.1, 0.1, 2)
        X = rng.random((n, 2))
        tasks.append(Task(f"bowl-{j}", [{"a": float(a), "b": float(b)} for a, b in X], X, ((X - c) ** 2).sum(1) * (1 + 0.2 * j)))
    return tasks


def _uniform(n: int, seed: int = 9) -> np.ndarray:
    return np.random.default_rng(seed).random((n, 2))


@pytest.fixture(scope="module")
def spread() -> Spread:
    tasks = _bowls()
    return Spread(SPACE, tasks, gp_imputer(tasks, seed=0), seed=0, reference=_uniform(256))


def test_random_configurations_get_about_one(spread: Spread) -> None:
    # Configurations drawn as the meta-training episodes draw them (uniformly here) spread on
    # the earlier tasks as random subsets do: the factor is 1 up to the estimate's noise.
    rng = np.random.default_rng(5)
    factors = [spread.factor(rng.random((n, 2))) for n in (3, 5, 10, 20) for _ in range(3)]
    assert np.median(factors) < 1.5
    assert all(1.0 <= f <= CAP for f in factors)


def test_configurations_near_the_earlier_optima_get_a_large_factor(spread: Spread) -> None:
    # Points gathered near the bowls' optima score alike on every earlier task, so their
    # observed spread understates a task's: the factor widens it. The expected size: on a bowl
    # centred within 0.1 of (0.5, 0.5), points within 0.05 of it differ by a slope of at most
    # 0.2 per coordinate over that box (sd at most about 0.2 * 0.029 * sqrt(2) = 0.008), against
    # the bowl's sd of about 0.105 over the square: more than 10 before the cap (62 measured).
    rng = np.random.default_rng(6)
    near = 0.5 + rng.uniform(-0.05, 0.05, (4, 2))
    far = rng.random((4, 2))
    assert spread.factor(near) == CAP
    assert spread.factor(near) > 3 * spread.factor(far)


def test_a_history_without_information_does_not_widen() -> None:
    # The same bowls with each task's scores shuffled among its points: each task's GP then
    # smooths towards its mean at new configurations, so points gathered at (0.5, 0.5) are
    # widened little (with the tasks' observed scores as the reference they got the cap, 10:
    # the reason the reference is imputed too). Ten clusters, the median; single clusters
    # measured 1-2.3 here, against 10 for each on the unshuffled bowls.
    rng = np.random.default_rng(1)
    tasks = [Task(t.name, t.configs, t.X, rng.permutation(t.y)) for t in _bowls()]
    s = Spread(SPACE, tasks, gp_imputer(tasks, seed=0), seed=0, reference=_uniform(256))
    clusters = np.random.default_rng(3).uniform(-0.05, 0.05, (10, 4, 2)) + 0.5
    assert np.median([s.factor(c) for c in clusters]) < 1.5


def test_no_history_or_one_point_is_one() -> None:
    tasks = _bowls(2)
    s = Spread(SPACE, tasks, gp_imputer(tasks), seed=0, reference=_uniform(64))
    assert s.factor(np.array([[0.5, 0.5]])) == 1.0
    assert Spread(SPACE, [], gp_imputer([]), reference=_uniform(64)).factor(np.random.default_rng(0).random((5, 2))) == 1.0


def test_the_factor_widens_the_deep_kernels_predictions() -> None:
    # MetaModel.posterior(spread=F) standardises on F times the scores' spread: the mean at
    # an observed point is kept, the predictive spread away from the points grows.
    from forebear.engine.surrogate.deep_kernel import MetaModel, Settings

    tasks = _bowls(4, 60)
    meta = MetaModel(2, Settings(max_steps=20, eval_every=10, width=16, features=4))
    meta.meta_train([(t.X, t.y) for t in tasks])
    X = np.array([[0.45, 0.5], [0.55, 0.52], [0.5, 0.45]])
    y = np.array([0.010, 0.012, 0.011])
    far = np.array([[0.0, 1.0], [1.0, 0.0]])
    p1, p4 = meta.posterior(X, y), meta.posterior(X, y, spread=4.0)
    sd1 = np.sqrt(p1.predict(far)[1])
    sd4 = np.sqrt(p4.predict(far)[1])
    assert np.all(sd4 > 2 * sd1)
    assert np.allclose(p4.predict(X)[0], y, atol=2 * y.std())
