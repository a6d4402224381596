"""warmstart.py: the evolutionary warm start over history, and the Latin hypercube without it."""

from __future__ import annotations

import itertools
from collections import Counter

import numpy as np
import pytest

from forebear.core.space import Space
from forebear.engine.warmstart import covered_size, evolve, gp_imputer, initial_design, set_score
from forebear.records.history import Task

SPACE = Space.from_dict({"a": {"float": [0.0, 1.0]}, "b": {"int": [1, 9]}, "c": {"categories": ["x", "y"]}})


def test_without_history_a_latin_hypercube() -> None:
    # The defining property of a Latin hypercube (McKay, Beckman and Conover 1979): cut each
    # coordinate's range into n equal strata; every stratum holds exactly one of the n points.
    # Checked on the configurations themselves, each parameter mapped to its own scale here.
    space = Space.from_dict({
        "a": {"float": [-2.0, 3.0]},
        "lr": {"float": [1e-4, 1e-1], "log": True},
        "b": {"int": [1, 9]},
        "c": {"categories": ["x", "y", "z"]},
    })
    for n, seed in ((9, 3), (27, 11)):
        design = initial_design(space, n, seed=seed)
        assert len(design) == n
        a = np.array([c["a"] for c in design])
        lr = np.log10([c["lr"] for c in design])
        for u in ((a + 2.0) / 5.0, (lr + 4.0) / 3.0):
            assert sorted(np.floor(u * n).astype(int)) == list(range(n))
        # Integers carry equal mass (each owns a step of the range widened by half a step), so
        # n = 9 strata put each of 1..9 once and n = 27 each three times; categories likewise.
        assert Counter(c["b"] for c in design) == {v: n // 9 for v in range(1, 10)}
        assert Counter(c["c"] for c in design) == {"x": n // 3, "y": n // 3, "z": n // 3}
    # Another seed, another design with the same property.
    assert initial_design(space, 9, seed=4) != initial_design(space, 9, seed=3)


def test_evolve_finds_the_best_set_on_a_small_problem() -> None:
    rng = np.random.default_rng(0)
    S = rng.random((12, 6))
    best = min(set_score(S, np.array(c)) for c in itertools.combinations(range(12), 3))
    got = evolve(S, 3, np.random.default_rng(1), generations=60)
    assert len(set(got)) == 3
    assert set_score(S, np.array(got)) == pytest.approx(best)


def tasks_with_a_shared_good_config() -> list[Task]:
    rng = np.random.default_rng(2)
    tasks = []
    shared = {"a": 0.5, "b": 5, "c": "y"}
    for t in range(4):
        configs = [shared] + SPACE.sample(20, rng)
        y = rng.random(21) + 0.2
        y[0] = 0.0  # the shared configuration is the best on every task
        tasks.append(Task(f"t{t}", configs, SPACE.encode_many(configs), y))
    return tasks


def test_history_design_takes_history_configurations() -> None:
    tasks = tasks_with_a_shared_good_config()
    design = initial_design(SPACE, 4, tasks=tasks, seed=0)
    assert design[0] == {"a": 0.5, "b": 5, "c": "y"}
    pool = {repr(sorted(c.items())) for t in tasks for c in t.configs}
    assert all(repr(sorted(c.items())) in pool for c in design)
    assert len({repr(sorted(c.items())) for c in design}) == 4


def test_imputation_decides_for_configurations_a_task_did_not_see() -> None:
    rng = np.random.default_rng(4)
    tasks = []
    for t in range(4):
        configs = SPACE.sample(15, rng)
        tasks.append(Task(f"t{t}", configs, SPACE.encode_many(configs), rng.random(15)))
    for j in (0, 1):
        target = tasks[j].configs[int(np.argmin(tasks[j].y))]
        x_target = SPACE.encode(target)

        def impute(_: int, Xq: np.ndarray, x_target: np.ndarray = x_target) -> np.ndarray:
            # Calls one configuration excellent wherever it was not observed, the rest poor.
            return np.where(np.all(np.isclose(Xq, x_target), axis=1), 0.0, 1.0)

        assert initial_design(SPACE, 1, tasks=tasks, impute=impute, seed=0) == [target]


def test_the_gp_imputer_predicts_a_task_in_its_own_normalised_units() -> None:
    # Branin (Surjanovic & Bingham's library of test functions) on the unit square, 40
    # observed points: the imputer's predictions at 200 unseen points are on the task's
    # [min, max] scale of the observed scores and rank the points as Branin does.
    from scipy.stats import spearmanr

    from forebear.bench.functions import branin

    rng = np.random.default_rng(0)
    X, Xq = rng.random((40, 2)), rng.random((200, 2))
    y = np.array([branin(x) for x in X])
    impute = gp_imputer([Task("b", [{}] * 40, X, y)], seed=0)
    pred = impute(0, Xq)
    truth = (np.array([branin(x) for x in Xq]) - y.min()) / (y.max() - y.min())
    assert np.all(np.isfinite(pred)) and spearmanr(pred, truth)[0] > 0.9
    np.testing.assert_allclose(impute(0, X), (y - y.min()) / (y.max() - y.min()), atol=0.02)  # it interpolates
    assert impute(0, Xq) is not pred and np.array_equal(impute(0, Xq), pred)  # fitted once, same answer


def test_share_and_fill_from_a_latin_hypercube() -> None:
    tasks = tasks_with_a_shared_good_config()[:1]
    tasks[0] = Task("t0", tasks[0].configs[:3], tasks[0].X[:3], tasks[0].y[:3])
    design = initial_design(SPACE, 6, tasks=tasks, seed=0)
    assert len(design) == 6 and design[:3] != SPACE.latin_hypercube(3, seed=0)
    assert len({repr(sorted(c.items())) for c in design}) == 6
    half = initial_design(SPACE, 6, tasks=tasks_with_a_shared_good_config(), seed=0, share=0.5)
    assert half[0] == {"a": 0.5, "b": 5, "c": "y"} and len(half) == 6
    with pytest.raises(ValueError, match="share must be in"):
        initial_design(SPACE, 2, tasks=tasks, share=1.5)


def test_the_design_is_cut_to_the_size_that_covers_every_history_task() -> None:
    # One configuration best on every task (score 0 there): the smallest allowed size covers
    # them all.
    shared = tasks_with_a_shared_good_config()
    assert covered_size(shared, 9, 3) == 3
    assert covered_size(shared, 9, 1) == 1
    # Six tasks, each with its own optimum among configurations no other task has seen (an
    # unseen configuration counts as the task's worst, 1, without an imputer): a set covers a
    # task only by holding its optimum, so k members leave a mean best score of (6 - k) / 6.
    rng = np.random.default_rng(5)
    own = []
    for t in range(6):
        configs = SPACE.sample(12, rng)
        y = rng.random(12) * 0.8 + 0.2
        y[t] = 0.0
        own.append(Task(f"t{t}", configs, SPACE.encode_many(configs), y))
    # Six members would cover them (0), but a set as large as the tasks always does: not a cut.
    assert covered_size(own, 9, 3) == 9
    assert covered_size(own, 9, 3, tol=0.17) == 5  # 1/6 = 0.1667 passes a bar of 0.17
    assert covered_size(own, 9, 3, tol=0.16) == 9
    assert covered_size(own, 5, 3, tol=0.17) == 5 and covered_size(own, 4, 3, tol=0.17) == 4  # never above k_max
    assert covered_size([], 7, 3) == 7 and covered_size(own, 3, 3) == 3
    assert covered_size(shared[:1], 9, 3) == 9  # one earlier search: its best covers it trivially


def test_the_proposer_runs_the_cut_design_and_says_its_size() -> None:
    from forebear.engine.proposer import Proposer
    from forebear.records.history import History

    p = Proposer(SPACE, History(tasks_with_a_shared_good_config()), seed=0, model="gp", cache_dir=False)
    assert p.initial_size(1) == 3 and p.initial_size(4) == 4  # dim 4: min(dim + 1, 10) = 5 without the cut
    first = p.propose(3, [])
    assert [q.source for q in first] == ["initial"] * 3
    assert {"a": 0.5, "b": 5, "c": "y"} in [q.config for q in first]
    assert Proposer(SPACE, History(tasks_with_a_shared_good_config()), n_initial=5, cache_dir=False).initial_size(1) == 5
    assert Proposer(SPACE, cache_dir=False).initial_size(1) == 5
