"""surrogate/select.py: the transfer guard."""

from __future__ import annotations

import gpytorch
import numpy as np
import pytest

from forebear.bench.functions import BRANIN_MIN, branin
from forebear.bench.proposal import SPACE2, _vec
from forebear.engine.proposer import Observation, Proposer
from forebear.engine.surrogate.gp import Posterior, as_tensor, fit_gp
from forebear.engine.surrogate.select import choose
from forebear.records.history import History, Task

DK = {"max_steps": 300, "eval_every": 25, "patience": 4, "batch": 40}


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


def test_choose_prefers_history_model_below_five_observations() -> None:
    rng = np.random.default_rng(0)
    X = rng.random((4, 2))
    a = fixed(X, X.sum(1), 0.5, "gp")
    b = fixed(X, -X.sum(1), 0.5, "deep-kernel")
    c = choose({"gp": a, "deep-kernel": b})
    assert c.name == "deep-kernel" and c.weights == [1.0] and c.loglik == {}


def test_choose_picks_the_model_that_predicts_held_out_points() -> None:
    rng = np.random.default_rng(1)
    X = rng.random((20, 2))
    y = np.array([branin(x) for x in X])
    good = fit_gp(X, y, restarts=1).posterior
    # The same points under a lengthscale far too short for Branin: it predicts held-out points badly.
    bad = fixed(X, y, 0.01, "deep-kernel")
    c = choose({"gp": good, "deep-kernel": bad})
    assert c.name == "gp"
    assert c.loglik["gp"] > c.loglik["deep-kernel"]
    mixed = choose({"gp": good, "deep-kernel": good}, alone=0.95)
    assert mixed.name == "mix" and mixed.weights == pytest.approx([0.5, 0.5])


def test_guard_turns_to_the_plain_gp_when_history_misleads(tmp_path) -> None:
    hist = quadratic_history()
    models = []
    for seed in range(2):
        p = Proposer(SPACE2, hist, seed=seed, deep_kernel=DK, cache_dir=tmp_path)
        _, m = branin_search(p, trials=15)
        models.append(m)
        assert p.last_choice is not None and p.last_choice.loglik["gp"] > p.last_choice.loglik["deep-kernel"]
    assert all(m[0] is None and m[-1] == "gp" for m in models)


@pytest.mark.slow
def test_unrelated_history_costs_at_most_ten_percent_regret(tmp_path) -> None:
    # Measured (docs/engine.md): mean regret after 15 trials over 8 seeds, 3.24 with the sine
    # history vs 3.56 for the plain GP with a Latin hypercube start (ratio 0.91).
    hist = sine_history()
    ours = [branin_search(Proposer(SPACE2, hist, seed=s, deep_kernel=DK, cache_dir=tmp_path))[0] for s in range(8)]
    plain = [branin_search(Proposer(SPACE2, None, seed=s))[0] for s in range(8)]
    assert np.mean(ours) <= 1.10 * np.mean(plain)
