"""acquisition.py: log-EI against scipy and Monte Carlo, constant-liar batches, pending points."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.stats import norm

from forebear.bench.functions import branin
from forebear.core.space import Space
from forebear.engine.acquisition import (
    POSTERIOR,
    Scorer,
    batch,
    keys,
    lie_value,
    log_ei,
    log_h,
    project,
)
from forebear.engine.surrogate.gp import as_tensor, fit_gp
from tests.test_gp import fixed_gp


def closed_form_ei(mu: np.ndarray, s: np.ndarray, best: float) -> np.ndarray:
    # Jones, Schonlau & Welch (1998), with scipy.stats.norm for phi and Phi.
    z = (best - mu) / s
    return s * (norm.pdf(z) + z * norm.cdf(z))


def test_log_ei_equals_log_of_closed_form() -> None:
    mu = np.linspace(-3, 8, 400)
    s = np.full_like(mu, 0.7)
    ref = np.log(closed_form_ei(mu, s, 1.0))
    got = log_ei(as_tensor(mu), as_tensor(s**2), 1.0).numpy()
    # Down to z = -10 the closed form is still accurate in float64 (EI about 1e-24 here).
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-9)


def test_log_h_matches_scipy_in_the_representable_range() -> None:
    z = np.linspace(-8, 10, 1000)
    ref = np.log(norm.pdf(z) + z * norm.cdf(z))
    np.testing.assert_allclose(log_h(as_tensor(z)).numpy(), ref, rtol=1e-8)


def test_log_ei_finite_and_monotone_where_ei_underflows() -> None:
    # z from 5 down to -40: EI underflows to 0 near z = -38 in float64, log-EI must not.
    z = np.linspace(5, -40, 5000)
    mu = 1.0 - z  # best = 1, s = 1
    got = log_ei(as_tensor(mu), torch.ones(len(mu), dtype=torch.float64), 1.0).numpy()
    assert np.all(np.isfinite(got))
    assert np.all(np.diff(got) < 0)  # strictly decreasing in the mean
    assert closed_form_ei(np.array([41.0]), np.array([1.0]), 1.0)[0] == 0.0  # scipy's EI has underflowed
    # Far tail: h(z) = phi(z) / z^2 * (1 - 3/z^2 + 15/z^4 - ...), the asymptotic series of the
    # Mills ratio (Abramowitz & Stegun 26.2.12, from memory); Ament et al. (2023) use its first term.
    zt = -40.0
    series = -zt * zt / 2 - 0.5 * np.log(2 * np.pi) - 2 * np.log(40) + np.log(1 - 3 / zt**2 + 15 / zt**4)
    assert float(log_h(as_tensor([zt]))[0]) == pytest.approx(series, abs=1e-6)


def test_log_ei_gradient_is_finite_in_the_tail() -> None:
    mu = as_tensor([10.0, 30.0, 45.0]).requires_grad_(True)
    log_ei(mu, as_tensor([1.0, 1.0, 1.0]), 0.0).sum().backward()
    assert torch.all(torch.isfinite(mu.grad)) and torch.all(mu.grad < 0)


@pytest.mark.parametrize(("mu", "s", "best"), [(0.0, 1.0, 0.5), (1.0, 0.5, 0.2), (-0.3, 2.0, -1.0)])
def test_ei_matches_monte_carlo(mu: float, s: float, best: float) -> None:
    rng = np.random.default_rng(0)
    draws = rng.normal(mu, s, size=1_000_000)
    mc = np.mean(np.maximum(best - draws, 0.0))
    ei = float(torch.exp(log_ei(as_tensor([mu]), as_tensor([s * s]), best))[0])
    assert ei == pytest.approx(mc, rel=0.01)


def branin_gp(n: int = 20, seed: int = 0):
    rng = np.random.default_rng(seed)
    X = rng.random((n, 2))
    y = np.array([branin(x) for x in X])
    return X, y, fit_gp(X, y, restarts=1, seed=seed).posterior


SPACE2 = Space.from_dict({"a": {"float": [0.0, 1.0]}, "b": {"float": [0.0, 1.0]}})


def test_batch_points_are_distinct_and_new() -> None:
    X, y, post = branin_gp()
    picks = batch(SPACE2, Scorer([post], [1.0], float(y.min())), 8, lie_value(y, "max"), taken=X, anchors=X[:3], rng=np.random.default_rng(1), n_sobol=512)
    pts = np.array([p for p, _ in picks])
    assert len(picks) == 8
    assert len(set(keys(pts))) == 8
    assert not set(keys(pts)) & set(keys(X))
    assert all(np.isfinite(v) for _, v in picks)


def test_pending_point_lowers_ei_around_it() -> None:
    X, y, post = branin_gp()
    scorer = Scorer([post], [1.0], float(y.min()))
    grid = as_tensor(np.random.default_rng(2).random((2000, 2)))
    with torch.no_grad():
        v = scorer(grid)
    x0 = grid[int(torch.argmax(v))][None, :]
    near = x0 + as_tensor(np.random.default_rng(3).normal(0, 0.01, size=(20, 2)))
    lied = scorer.condition(x0, as_tensor([lie_value(y, "mean")]))
    with torch.no_grad():
        assert float(lied(x0)[0]) < float(scorer(x0)[0]) - 1.0
        assert torch.all(lied(near) < scorer(near))


def test_mixture_ei_is_the_weighted_sum() -> None:
    X, y, a = branin_gp(seed=0)
    _, _, b = branin_gp(seed=1)
    pts = as_tensor(np.random.default_rng(4).random((50, 2)))
    with torch.no_grad():
        mix = torch.exp(Scorer([a, b], [0.3, 0.7], 5.0)(pts))
        parts = 0.3 * torch.exp(Scorer([a], [1.0], 5.0)(pts)) + 0.7 * torch.exp(Scorer([b], [1.0], 5.0)(pts))
    np.testing.assert_allclose(mix.numpy(), parts.numpy(), rtol=1e-10)


def test_project_equals_round_trip_on_a_mixed_space() -> None:
    space = Space.from_dict({
        "lr": {"float": [1e-4, 0.3], "log": True},
        "depth": {"int": [2, 12]},
        "leaves": {"int": [4, 512], "log": True},
        "booster": {"categories": ["tree", "linear", "dart"]},
    })
    X = np.random.default_rng(5).random((300, space.dim))
    np.testing.assert_allclose(project(space, X), space.round_trip(X), atol=1e-12)


def test_lie_values() -> None:
    # CL-min, CL-mean and CL-max of Ginsbourger, Le Riche and Carraro (2010), sec. 4: the lie is
    # the minimum, mean or maximum of the scores observed so far (from memory). Unsorted, with a
    # negative score and a mean that is no observation, so position or rounding would show.
    y = np.array([0.5, -1.25, 4.0, 2.0])
    assert [lie_value(y, k) for k in ("min", "mean", "max")] == [-1.25, 1.3125, 4.0]
    assert lie_value(y, "posterior") == POSTERIOR
    with pytest.raises(ValueError, match="lie must be one of"):
        lie_value(y, "median")


@pytest.mark.parametrize("lie", ["posterior", "max"])
def test_a_pending_point_under_the_lie_is_an_observation_of_that_value(lie: str) -> None:
    # Reference: scikit-learn's GaussianProcessRegressor with optimizer=None and the same fixed
    # kernel (ConstantKernel * Matern(nu=2.5), alpha = noise), fitted with the pending points added
    # as observations of the lie: a lie conditions the GP exactly as such an observation would
    # (Ginsbourger, Le Riche & Carraro 2010, "Kriging is well-suited to parallelize
    # optimization"; "posterior" is their kriging believer, "max" the constant liar CL-max).
    # Targets are standardised once with the scores seen before the lie, as Posterior keeps
    # them, so the reference uses normalize_y=False on the same standardised targets.
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    rng = np.random.default_rng(11)
    X, Xp, Xs = rng.random((15, 2)), rng.random((3, 2)), rng.random((40, 2))
    y = np.array([branin(x) for x in X])
    ls, amp, noise = np.array([0.25, 0.4]), 1.3, 1e-4
    post = fixed_gp(X, y, ls, amp, noise)
    shift, scale = post.shift, post.scale
    kernel = ConstantKernel(amp, "fixed") * Matern(length_scale=ls, length_scale_bounds="fixed", nu=2.5)
    before = GaussianProcessRegressor(kernel, alpha=noise, optimizer=None).fit(X, (y - shift) / scale)
    if lie == "posterior":
        lies = shift + scale * before.predict(Xp)  # the model's own mean at each pending point
    else:
        lies = np.full(len(Xp), float(lie_value(y, lie)))
    ref = GaussianProcessRegressor(kernel, alpha=noise, optimizer=None)
    ref.fit(np.vstack([X, Xp]), (np.concatenate([y, lies]) - shift) / scale)
    m_ref, s_ref = ref.predict(Xs, return_std=True)
    scorer = Scorer([post], [1.0], float(y.min())).lie(as_tensor(Xp), lie_value(y, lie))
    m, v = scorer.models[0].predict(Xs)
    np.testing.assert_allclose(m, shift + scale * m_ref, rtol=1e-6, atol=1e-6 * scale)
    np.testing.assert_allclose(v, (scale * s_ref) ** 2, rtol=1e-6, atol=1e-6 * scale**2)
    assert scorer.best == float(y.min())  # neither lie is better than the best observed score
