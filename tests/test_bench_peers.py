"""Peer methods of the quality benchmark, each against a worked property of its paper."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from forebear.bench import peers
from forebear.bench.families import analytic_family, unit_space
from forebear.bench.peers import _gp
from forebear.bench.peers.rgpe import RGPE, loo_loss, ranking_loss, weights_from_losses
from forebear.bench.peers.tpe import TPE, Parzen1D, ei_from_ratio, split
from forebear.bench.peers.warmstart_gp import WarmStartGP, warm_start
from forebear.engine import acquisition
from forebear.engine.proposer import Observation
from forebear.engine.surrogate.gp import as_tensor, fit_gp
from forebear.records.history import Task


def _task(name: str, X: np.ndarray, y: np.ndarray) -> Task:
    space = unit_space(X.shape[1])
    return Task(name, space.decode_many(X), X, np.asarray(y, dtype=float))


def _bowl(X: np.ndarray) -> np.ndarray:
    return ((X - 0.3) ** 2).sum(axis=1)


# -- TPE (Bergstra, Bardenet, Bengio & Kegl, NeurIPS 2011) -------------------


def test_parzen_widths_follow_the_neighbour_rule_and_the_density_integrates_to_one() -> None:
    # Bergstra et al. 2011, sec. 4 (adaptive Parzen estimator, from memory): each width is the
    # larger distance to a neighbour, clipped to [1 / min(100, n + 1), 1]; the prior keeps width 1.
    est = Parzen1D.fit(np.array([0.2, 0.3, 0.9]))
    assert est.mus.tolist() == [0.2, 0.3, 0.5, 0.9]
    assert est.sigmas.tolist() == pytest.approx([0.25, 0.25, 1.0, 0.4])
    x = np.linspace(0.0, 1.0, 20001)
    assert np.trapezoid(np.exp(est.logpdf(x)), x) == pytest.approx(1.0, abs=1e-6)
    draws = est.sample(4000, np.random.default_rng(0))
    assert draws.min() >= 0.0 and draws.max() <= 1.0


def test_tpe_pick_maximises_l_over_g_and_so_the_papers_ei() -> None:
    # Bergstra et al. 2011, eqs. 4-6: with p(x|y) = l(x) below y* and g(x) above, and
    # p(y < y*) = gamma, EI_{y*}(x) = int (y* - y) p(y|x) dy is proportional to
    # (gamma + (1 - gamma) g/l)^-1. Here EI is integrated over the observed scores directly.
    space = unit_space(2)
    rng = np.random.default_rng(1)
    X = rng.random((20, 2))
    y = _bowl(X)
    obs = [Observation(c, float(v)) for c, v in zip(space.decode_many(X), y, strict=True)]
    tpe = TPE(space, seed=3, n_startup=5)
    [p] = tpe.propose(1, obs)
    assert p.source == "model"
    cand, log_l, log_g = tpe.last["X"], tpe.last["log_l"], tpe.last["log_g"]
    good = split(y)
    assert len(good) == 3  # ceil(0.15 * 20): gamma = 3/20 exactly
    ystar = y[np.argsort(y)][2:4].mean()
    gamma = 3 / 20
    lx, gx = np.exp(log_l), np.exp(log_g)
    px = gamma * lx + (1 - gamma) * gx
    below = y < ystar
    ei = lx * np.mean(np.where(below, ystar - y, 0.0)) / gamma * gamma / px
    assert np.allclose(ei / ei_from_ratio(lx / gx, gamma), (ei / ei_from_ratio(lx / gx, gamma))[0])
    chosen = np.flatnonzero(np.all(np.isclose(cand, space.encode(p.config)), axis=1))[0]
    assert np.argmax(log_l - log_g) == chosen == np.argmax(ei)
    assert np.all(np.diff(ei_from_ratio(np.linspace(0.1, 10, 50))) > 0)


def test_tpe_starts_at_random_then_concentrates_near_the_minimum() -> None:
    space = unit_space(2)
    tpe = TPE(space, seed=0)
    obs: list[Observation] = []
    while len(obs) < 40:
        for p in tpe.propose(1, obs):
            obs.append(Observation(p.config, float(_bowl(space.encode(p.config)[None])[0])))
    y = np.array([o.score for o in obs])
    # The last 15 proposals sit nearer the minimiser than the 10 random ones (median distance).
    assert np.median(y[-15:]) < 0.5 * np.median(y[:10])


# -- RGPE (Feurer, Letham & Bakshy 2018) ------------------------------------


def test_ranking_loss_counts_misranked_pairs() -> None:
    # Feurer et al. 2018, eq. 3 (from memory): ordered pairs ranked differently from the scores.
    y = np.array([1.0, 2.0, 3.0])
    assert ranking_loss(np.array([[1.0, 2.0, 3.0], [3.0, 2.0, 1.0], [2.0, 1.0, 3.0]]), y).tolist() == [0, 6, 2]
    # Leave-one-out: the draw for row j only ranks x_j against the others.
    G = np.tile(np.array([1.0, 2.0, 3.0]), (3, 1, 1))
    G[1, 0, 1] = 5.0  # f^{-1}(x_1) = 5 puts x_1 above x_2: pair (1, 2) misranked; (2, 1) uses f^{-2}
    assert loo_loss(G, y).tolist() == [1]


def test_weights_count_wins_ties_at_random_and_dilution_drops_bad_models() -> None:
    rng = np.random.default_rng(0)
    S = 4000
    tie = weights_from_losses(np.zeros((3, S)), rng, target=False)
    assert tie == pytest.approx([1 / 3] * 3, abs=0.03)
    # A history model whose median loss is above the target's 95th percentile gets no weight,
    # even in the samples where it would win (Feurer et al. 2018, sec. 4.2, from memory).
    losses = np.vstack([np.r_[np.zeros(S // 10), np.full(S - S // 10, 20.0)], np.full(S, 5.0)])
    assert weights_from_losses(losses, rng).tolist() == [0.0, 1.0]
    assert weights_from_losses(losses, rng, target=False)[0] == pytest.approx(0.1)


def _rgpe_weights(history: list[Task], X: np.ndarray, seed: int = 0) -> np.ndarray:
    space = unit_space(X.shape[1])
    r = RGPE(space, history, seed=seed, samples=512)
    y = _bowl(X)
    obs = [Observation(c, float(v)) for c, v in zip(space.decode_many(X), y, strict=True)]
    r.propose(1, obs)
    return r.last_weights


def test_rgpe_gives_the_target_all_weight_when_history_is_anti_correlated() -> None:
    rng = np.random.default_rng(2)
    Xh = [rng.random((30, 1)) for _ in range(2)]
    history = [_task(f"h{i}", Xi, -_bowl(Xi)) for i, Xi in enumerate(Xh)]
    w = _rgpe_weights(history, rng.random((8, 1)))
    assert w.tolist() == [0.0, 0.0, 1.0]


def test_rgpe_gives_identical_history_tasks_equal_weight() -> None:
    # Two history tasks with the same data rank every sample alike: ties, broken uniformly at random.
    rng = np.random.default_rng(3)
    Xh = rng.random((30, 1))
    history = [_task("a", Xh, _bowl(Xh)), _task("b", Xh.copy(), _bowl(Xh))]
    w = _rgpe_weights(history, rng.random((6, 1)))
    assert abs(w[0] - w[1]) < 0.12 and w[0] > 0.2, w
    assert w.sum() == pytest.approx(1.0)


def test_ensemble_of_one_gp_is_the_engines_ei_and_moments_add_with_squared_weights() -> None:
    rng = np.random.default_rng(4)
    X = rng.random((12, 2))
    a = fit_gp(X, _bowl(X), restarts=1).posterior
    b = fit_gp(X, -X[:, 0], restarts=1).posterior
    Xs = as_tensor(rng.random((50, 2)))
    one = _gp.Ensemble([a], [1.0], 0.01)
    with torch.no_grad():
        assert torch.allclose(one(Xs), acquisition.Scorer([a], [1.0], 0.01)(Xs))
        mean, var = _gp.Ensemble([a, b], [0.3, 0.7], 0.0).moments(Xs)
        (ma, va), (mb, vb) = a.predict_t(Xs), b.predict_t(Xs)
        assert torch.allclose(mean, 0.3 * ma + 0.7 * mb) and torch.allclose(var, 0.09 * va + 0.49 * vb)
    m, cov = _gp.joint(a, Xs.numpy()[:5])
    assert np.allclose(np.diag(cov), va.numpy()[:5], rtol=1e-3, atol=1e-9) and np.allclose(m, ma.numpy()[:5])


# -- history warm start (Feurer, Springenberg & Hutter, AAAI 2015) ---------------


def test_warm_start_proposes_the_history_bests_in_order_then_the_gp() -> None:
    # Feurer et al. 2015: the first t trials are the best configurations of earlier tasks.
    # Without meta-features the tasks are ranked by the standardised score of their best.
    X = np.array([[0.1], [0.2], [0.3], [0.4]])
    history = [
        _task("a", X, [3.0, 1.0, 2.0, 2.0]),  # best x=0.2 (z -1.41), second x=0.3 (z 0)
        _task("b", X + 0.5, [0.0, 5.0, 5.0, 5.0]),  # best x=0.6 (z -1.73), second x=0.7 (z 0.58)
        _task("c", X + 0.05, [9.0, 8.0, 7.0, 0.0]),  # best x=0.45 (z -1.70), second x=0.35 (z 0.28)
    ]
    first = [c["x0"] for c in warm_start(history, 5)]
    assert first == pytest.approx([0.6, 0.45, 0.2, 0.3, 0.35])
    space = unit_space(1)
    ws = WarmStartGP(space, history, seed=0, n_initial=4)
    obs: list[Observation] = []
    for _ in range(4):
        [p] = ws.propose(1, obs)
        assert p.source == "initial"
        obs.append(Observation(p.config, float(_bowl(space.encode(p.config)[None])[0])))
    assert [o.config["x0"] for o in obs] == pytest.approx(first[:4])
    batch = ws.propose(2, obs, pending=[{"x0": 0.31}])
    assert [p.source for p in batch] == ["model", "model"] and all(p.model == "gp" for p in batch)
    keys = acquisition.keys(space.encode_many([p.config for p in batch] + [o.config for o in obs] + [{"x0": 0.31}]))
    assert len(set(keys)) == len(keys)


# -- the proposer's interface ---------------------------------------------------


@pytest.mark.parametrize("name", sorted(peers.PEERS))
def test_every_peer_answers_the_proposers_call(name: str) -> None:
    fam = analytic_family("branin", n_tasks=3, n_points=32, seed=0)
    space, task = fam.space, fam.tasks[0]
    p = peers.make(name, space, fam.history_for(0), seed=1)
    obs: list[Observation] = []
    while len(obs) < 6:
        for q in p.propose(2, obs):
            obs.append(Observation(q.config, task.objective(q.config)))
    failed = [space.sample(1, 5)[0]]
    pending = space.sample(2, 6)
    out = p.propose(3, obs + [Observation(space.sample(1, 7)[0], math.nan)], failed, pending)
    assert len(out) == 3 and all(space.contains(q.config) for q in out)
    keys = acquisition.keys(space.encode_many([q.config for q in out] + [o.config for o in obs] + failed + pending))
    assert len(set(keys)) == len(keys)
    assert p.propose(0, obs) == []


def test_rgpe_without_history_is_refused() -> None:
    with pytest.raises(ValueError, match="rgpe needs a history"):
        RGPE(unit_space(2), None)
    with pytest.raises(ValueError, match="unknown peer 'bogus'"):
        peers.make("bogus", unit_space(2))
