"""surrogate/select.py: the transfer guard."""

from __future__ import annotations

import gpytorch
import numpy as np
import pytest

from forebear.bench.functions import BRANIN_MIN, branin
from forebear.bench.proposal import SPACE2, _vec
from forebear.engine.proposer import Observation, Proposer
from forebear.engine.surrogate.gp import Posterior, as_tensor
from forebear.engine.surrogate.select import MARGIN, Prequential, choose, weights
from forebear.records.history import History, Task

DK = {"max_steps": 300, "eval_every": 50, "patience": 3, "tasks_per_step": 4}


def quadratic_history(seed: int = 0) -> History:
    """Bowls centred near (0.35, 0.35): misleading for Branin, whose minima lie elsewhere."""
    rng = np.random.default_rng(seed)
    tasks = []
    for t in range(8):
        c, a = rng.uniform(0.3, 0.4, size=2), rng.uniform(1, 3)
        configs = SPACE2.sample(40, rng)
        X = SPACE2.encode_many(configs)
        tasks.append(Task(f"bowl-{t}", configs, X, a * np.sum((X - c) ** 2, 1)))
    return History(tasks)


def sine_history(seed: int = 0) -> History:
    """Random sums of sines: a task family with no relation to Branin."""
    rng = np.random.default_rng(seed)
    tasks = []
    for t in range(8):
        W, ph, a = rng.normal(0, 3, size=(3, 2)), rng.uniform(0, 2 * np.pi, 3), rng.uniform(0.5, 1.5, 3)
        configs = SPACE2.sample(40, rng)
        X = SPACE2.encode_many(configs)
        tasks.append(Task(f"sines-{t}", configs, X, (a * np.sin(X @ W.T + ph)).sum(1)))
    return History(tasks)


def branin_search(p: Proposer, trials: int = 15, batch: int = 5) -> tuple[float, list[str | None]]:
    obs: list[Observation] = []
    models = []
    while len(obs) < trials:
        props = p.propose(batch, obs)
        models.append(props[0].model)
        obs += [Observation(pr.config, branin(_vec(SPACE2, pr.config))) for pr in props]
    return min(o.score for o in obs) - BRANIN_MIN, models


def fixed(X: np.ndarray, y: np.ndarray, ls: float, name: str) -> Posterior:
    kernel = gpytorch.kernels.ScaleKernel(gpytorch.kernels.MaternKernel(nu=2.5)).double()
    kernel.base_kernel.lengthscale = ls
    return Posterior(kernel, 0.0, 1e-4, as_tensor(X), as_tensor(y), float(y.mean()), float(y.std()), name=name)


def test_the_rule_trusts_history_until_the_gp_leads_by_the_margin() -> None:
    w = weights({"deep-kernel": -10.0, "gp": 0.0}, count=2)
    assert w == {"deep-kernel": 1.0, "gp": 0.0}  # too few scored observations
    assert weights({"deep-kernel": -3.0, "gp": -5.0}, count=8) == {"deep-kernel": 1.0, "gp": 0.0}
    w = weights({"deep-kernel": -4.0, "gp": -4.0 + MARGIN / 3}, count=8)
    assert w["gp"] == pytest.approx(1 / 3) and w["deep-kernel"] == pytest.approx(2 / 3)
    assert weights({"deep-kernel": -9.0, "gp": -9.0 + MARGIN}, count=8)["gp"] == 1.0


def test_prequential_score_prefers_the_model_that_predicted_the_new_points() -> None:
    rng = np.random.default_rng(1)
    X = rng.random((20, 2))
    y = np.array([branin(x) for x in X])
    X_new = rng.random((6, 2))
    y_new = np.array([branin(x) for x in X_new])
    # Both interpolate the 20 points they saw; only the one with a sensible lengthscale
    # predicts the 6 it did not.
    good = fixed(X, y, 0.4, "gp")
    bad = fixed(X, y, 0.01, "deep-kernel")
    preq = Prequential()
    preq.keep({"gp": good, "deep-kernel": bad})
    preq.score(X_new, y_new)
    assert preq.count == 6
    assert preq.total["gp"] == pytest.approx(float(np.sum(good.log_predictive(X_new, y_new))))
    assert preq.total["gp"] > preq.total["deep-kernel"] + MARGIN
    c = choose({"gp": good, "deep-kernel": bad}, preq)
    assert c.name == "gp" and c.loglik == preq.total
    # Swap the roles: the history model predicted well and keeps the round.
    swapped = Prequential()
    swapped.keep({"gp": bad, "deep-kernel": good})
    swapped.score(X_new, y_new)
    assert choose({"gp": bad, "deep-kernel": good}, swapped).name == "deep-kernel"
    # Without scores (or with one model) the preferred model is used alone.
    assert choose({"gp": good, "deep-kernel": bad}).name == "deep-kernel"
    assert choose({"gp": good}, preq).name == "gp"


def test_proposer_scores_each_observation_once_before_its_model_sees_it(tmp_path) -> None:
    hist = quadratic_history()
    p = Proposer(SPACE2, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path)
    obs: list[Observation] = []
    counts = []
    while len(obs) < 9:
        for pr in p.propose(2, obs):
            obs.append(Observation(pr.config, branin(_vec(SPACE2, pr.config))))
        counts.append(p._preq.count)
    # Rounds at 0, 2, 4, 6, 8 observations; the GP joins at 4 (>= 3), and from the next
    # round on each round scores exactly the observations that are new.
    assert counts == [0, 0, 0, 2, 4]
    p.propose(2, obs)
    assert p._preq.count == 6
    p.propose(2, obs)  # the same observations again (a propose-ahead call): nothing new to score
    assert p._preq.count == 6


def test_a_poor_start_is_forgotten_after_the_window() -> None:
    rng = np.random.default_rng(1)  # the points of the test above
    X = rng.random((20, 2))
    y = np.array([branin(x) for x in X])
    X_new = rng.random((6, 2))
    y_new = np.array([branin(x) for x in X_new])
    good = fixed(X, y, 0.4, "x")
    bad = fixed(X, y, 0.01, "x")
    preq = Prequential(window=6)
    # Three rounds in which the models' roles are swapped, then one round of 6 points.
    for i in range(3):
        preq.keep({"gp": bad, "deep-kernel": good})
        preq.score(X_new[i:i + 1], y_new[i:i + 1])
    preq.keep({"gp": good, "deep-kernel": bad})
    preq.score(X_new, y_new)
    assert preq.count == 6 and len(preq.rows) == 9
    assert preq.total["gp"] == pytest.approx(float(np.sum(good.log_predictive(X_new, y_new))))
    assert choose({"gp": good, "deep-kernel": bad}, preq).name == "gp"


def test_guard_follows_its_rule_in_a_search_with_misleading_history(tmp_path) -> None:
    # Bowls centred where Branin is poor: every round's choice is the rule applied to the
    # scores the proposer holds, over the same observations for both models.
    hist = quadratic_history()
    p = Proposer(SPACE2, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path)
    obs: list[Observation] = []
    while len(obs) < 14:
        props = p.propose(2, obs)
        if p.last_choice is not None and p._preq.count:
            w = weights(p._preq.total, p._preq.count)
            expect = "gp" if w["gp"] == 1.0 else "deep-kernel" if w["gp"] == 0.0 else "mix"
            assert p.last_choice.name == expect and {pr.model for pr in props} == {expect}
            assert set(p._preq.total) == {"gp", "deep-kernel"}
        obs += [Observation(pr.config, branin(_vec(SPACE2, pr.config))) for pr in props]
    assert p._preq.count == 8  # rounds at 6 .. 12 observations scored 2 each


@pytest.mark.slow
def test_unrelated_history_costs_at_most_ten_percent_regret(tmp_path) -> None:
    # Measured (docs/engine.md): mean regret after 15 trials over 8 seeds, 3.24 with the sine
    # history vs 3.56 for the plain GP with a Latin hypercube start (ratio 0.91). Since the history
    # check (engine/agreement.py) the sines' tasks disagree and the history is not used: ratio 1.
    hist = sine_history()
    ours = [branin_search(Proposer(SPACE2, hist, seed=s, deep_kernel=DK, cache_dir=tmp_path))[0] for s in range(8)]
    plain = [branin_search(Proposer(SPACE2, None, seed=s))[0] for s in range(8)]
    assert np.mean(ours) <= 1.10 * np.mean(plain)
