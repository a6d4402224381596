"""agreement.py: a history whose tasks do not rank configurations alike is not used."""

from __future__ import annotations

import numpy as np
import pytest

from forebear.core.space import Space
from forebear.engine.agreement import BEST_SHARE, MIN_TASKS, THRESHOLD, agreement, verdict
from forebear.engine.proposer import Observation, Proposer
from forebear.engine.warmstart import gp_imputer
from forebear.records.history import Task

SPACE = Space.from_dict({"a": {"float": [0.0, 1.0]}, "b": {"float": [0.0, 1.0]}})
SMALL = {"max_steps": 30, "eval_every": 10, "width": 16, "depth": 1, "features": 4}  # fast meta-training


def _bowls(n_tasks: int = 6, n: int = 60, seed: int = 0, shuffled: bool = False) -> list[Task]:
    """Earlier tasks: shifted 2-D bowls at random points (invented data); ``shuffled`` permutes
    each task's scores among its points, which keeps the format and removes the information."""
    rng = np.random.default_rng(seed)
    tasks = []
    for j in range(n_tasks):
        c = 0.4 + rng.uniform(-0.1, 0.1, 2)
        X = rng.random((n, 2))
        y = ((X - c) ** 2).sum(1) * (1 + 0.2 * j)
        if shuffled:
            y = rng.permutation(y)
        tasks.append(Task(f"bowl-{j}", [{"a": float(a), "b": float(b)} for a, b in X], X, y))
    return tasks


def test_rank_correlation_of_known_surfaces() -> None:
    # Spearman's coefficient of a variable with itself is 1 and with its negation -1 (any
    # statistics text; scipy.stats.spearmanr computes it here). Three tasks A, A and -A have
    # pairs (A, A) = 1 and (A, -A) = -1 twice: the mean over the three pairs is -1/3.
    surfaces = [lambda X: X[:, 0] + 2 * X[:, 1], lambda X: X[:, 0] + 2 * X[:, 1], lambda X: -(X[:, 0] + 2 * X[:, 1])]
    tasks = _bowls(3)
    assert agreement(SPACE, tasks, lambda j, X: surfaces[j](X)).correlation == pytest.approx(-1 / 3)
    assert agreement(SPACE, tasks, lambda j, X: surfaces[0](X) ** (j + 1)).correlation == pytest.approx(1.0)  # monotone maps keep ranks


def test_where_each_task_best_falls_on_the_others() -> None:
    # Three tasks score a + b at their own points, so each task's best is its point of least
    # a + b. Tasks 0 and 1 impute a + b, task 2 its negation. On a task that agrees, none of the
    # other points beats the best (share 0); on task 2 all of them do (share 1). Of the six ordered
    # pairs, (0, 2) and (1, 2) have share 1: the mean is 2 / 6 = 1/3.
    rng = np.random.default_rng(3)
    tasks = []
    for j in range(3):
        X = rng.random((12, 2))
        tasks.append(Task(f"t{j}", [{"a": a, "b": b} for a, b in X], X, X.sum(1)))
    same = agreement(SPACE, tasks, lambda j, Q: Q.sum(1))
    assert same.correlation == pytest.approx(1.0) and same.best == 0.0 and not same.disagrees
    mixed = agreement(SPACE, tasks, lambda j, Q: -Q.sum(1) if j == 2 else Q.sum(1))
    assert mixed.best == pytest.approx(1 / 3) and mixed.correlation == pytest.approx(-1 / 3)


def test_a_constant_task_counts_as_no_agreement() -> None:
    tasks = _bowls(3)
    value = agreement(SPACE, tasks, lambda j, X: np.zeros(len(X)) if j == 2 else X[:, 0]).correlation
    assert value == pytest.approx(1 / 3)  # pairs: 1, and 0 twice for the constant task


def test_related_history_agrees_and_shuffled_history_does_not() -> None:
    related, shuffled = _bowls(), _bowls(shuffled=True)
    a = agreement(SPACE, related, gp_imputer(related, seed=0))
    b = agreement(SPACE, shuffled, gp_imputer(shuffled, seed=0))
    assert a is not None and a.correlation > 0.8 and a.best < 0.1  # bowls centred within 0.2 of each other
    assert b is not None and abs(b.correlation) < THRESHOLD and b.best > BEST_SHARE and b.disagrees
    use, value, note = verdict(SPACE, shuffled, gp_imputer(shuffled, seed=0))
    assert not use and value == b and "without history" in str(note)
    assert verdict(SPACE, related, gp_imputer(related, seed=0))[0]


def test_tasks_that_agree_only_on_their_best_configuration_are_kept() -> None:
    # Noise everywhere but one configuration, the best on every task (invented data): the ranks of
    # the space disagree, the tasks' bests do not, and that is what the warm start uses.
    rng = np.random.default_rng(2)
    tasks = []
    for t in range(4):
        X = np.vstack([[0.5, 0.5], rng.random((20, 2))])
        y = rng.random(21) + 0.2
        y[0] = 0.0
        tasks.append(Task(f"t{t}", [{"a": a, "b": b} for a, b in X], X, y))
    a = agreement(SPACE, tasks, gp_imputer(tasks, seed=0))
    assert a.correlation < THRESHOLD and a.best < BEST_SHARE and not a.disagrees


def test_too_few_tasks_are_not_judged() -> None:
    tasks = _bowls(MIN_TASKS - 1, shuffled=True)
    assert agreement(SPACE, tasks, gp_imputer(tasks)) is None
    assert verdict(SPACE, tasks, gp_imputer(tasks)) == (True, None, None)


def test_proposer_searches_a_disagreeing_history_as_a_cold_search(tmp_path) -> None:
    shuffled = _bowls(shuffled=True)
    p = Proposer(SPACE, history=shuffled, seed=3, cache_dir=tmp_path, deep_kernel=SMALL)
    cold = Proposer(SPACE, seed=3)
    assert p.use_meta
    note = p.check_history()
    assert note is not None and "without history" in note and p.history_agreement is not None
    assert not p.use_meta and p.tasks == [] and p.meta_model() is None
    assert p.check_history() is None  # once
    first, reference = p.propose(3, []), cold.propose(3, [])
    assert [q.config for q in first] == [q.config for q in reference]  # the cold Latin hypercube
    obs = [Observation(q.config, float(sum(q.config.values()))) for q in first]
    more = p.propose(2, obs)
    assert {q.model for q in more if q.source == "model"} <= {"gp"}
    assert not list(tmp_path.iterdir())  # nothing was meta-trained


def test_proposer_keeps_an_agreeing_history_and_the_switch_turns_the_check_off(tmp_path) -> None:
    related, shuffled = _bowls(), _bowls(shuffled=True)
    p = Proposer(SPACE, history=related, seed=3, cache_dir=tmp_path, deep_kernel=SMALL)
    note = p.check_history()
    assert note is not None and "alike" in note and p.use_meta and len(p.tasks) == 6
    off = Proposer(SPACE, history=shuffled, seed=3, cache_dir=tmp_path, deep_kernel=SMALL, agreement=False)
    assert off.check_history() is None and off.use_meta
    forced = Proposer(SPACE, history=shuffled, seed=3, cache_dir=tmp_path, deep_kernel=SMALL, model="deep-kernel")
    assert forced.check_history() is None and forced.use_meta  # asked for by name: not second-guessed
