"""surrogate/samples.py: the plain GP integrated over its hyperparameters on few points."""

from __future__ import annotations

import math

import gpytorch
import numpy as np
import pytest
import torch

from forebear.core.space import Space
from forebear.engine.acquisition import Scorer, log_ei
from forebear.engine.proposer import Observation, Proposer
from forebear.engine.refits import integrate_upto
from forebear.engine.surrogate import samples
from forebear.engine.surrogate.gp import _ExactGP, as_tensor, exact_mll

BOWL = Space.from_dict({"x": {"float": [-1.0, 1.0]}, "y": {"float": [-1.0, 1.0]}})


def bowl_points(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    X = np.random.default_rng(seed).random((n, 2))
    u = 2 * X - 1
    return X, (u[:, 0] - 0.3) ** 2 + (u[:, 1] + 0.2) ** 2


@pytest.mark.parametrize("n", [3, 6])
def test_weights_sum_to_one_and_components_fit_the_scores(n: int) -> None:
    X, y = bowl_points(n, seed=n)
    models, weights = samples.mixture(X, y, seed=1)
    assert 1 <= len(models) <= samples.KEEP and len(models) == len(weights)
    assert sum(weights) == pytest.approx(1.0) and min(weights) > 0
    for m in models:
        assert m.name == "gp"
        mu, var = m.predict(X)
        # Each component is a GP posterior on the scores: near-interpolating (noise <= a few % of
        # the score variance) and with less variance at the data than its prior.
        assert np.abs(mu - y).max() < 0.3 * np.std(y)
        assert (var < m.prior_var * m.scale**2).all()


def test_mixture_ei_is_the_weighted_sum_of_the_components_ei() -> None:
    X, y = bowl_points(5)
    models, weights = samples.mixture(X, y, seed=2)
    assert len(models) > 1  # on 5 points the likelihood leaves several draws in play
    Xs = as_tensor(np.random.default_rng(3).random((50, 2)))
    best = float(y.min())
    by_hand = sum(w * torch.exp(log_ei(*m.predict_t(Xs), best)) for m, w in zip(models, weights, strict=True))
    with torch.no_grad():
        got = Scorer(models, weights, best)(Xs)
    assert torch.allclose(got, torch.log(by_hand), rtol=1e-9, atol=1e-9)


def test_profiled_likelihood_is_the_exact_one_at_its_own_mean_and_outputscale() -> None:
    X, y = bowl_points(7, seed=4)
    t = (y - y.mean()) / y.std()
    Xt, tt = as_tensor(X), as_tensor(t)
    ls = as_tensor([[0.4, 1.5], [0.1, 0.1], [3.0, 0.7]])
    ratio = as_tensor([1e-3, 1e-2, 1e-4])
    ll, mean, s2 = samples.profiled(Xt, tt, ls, ratio)
    lik = gpytorch.likelihoods.GaussianLikelihood()
    model = _ExactGP(Xt, tt, lik).double()
    for i in range(len(ls)):
        def at(m: float, s: float, i: int = i) -> float:
            # float64 tensors: a Python float is set through float32 by gpytorch's setters.
            model.mean_module.constant = as_tensor(m)
            model.covar_module.outputscale = as_tensor(s)
            model.covar_module.base_kernel.lengthscale = ls[i].view(1, -1)
            lik.noise = ratio[i] * s
            with torch.no_grad():
                return float(exact_mll(model, Xt, tt)) * len(t)  # exact_mll is per point

        assert float(ll[i]) == pytest.approx(at(float(mean[i]), float(s2[i])), rel=1e-8, abs=1e-8)
        # The closed-form mean and outputscale are the maximum over both (for a fixed noise ratio),
        # the outputscale within its bounds.
        lo, hi = samples._OUTPUTSCALE
        for dm, fs in ((0.05, 1.0), (-0.05, 1.0), (0.0, 1.1), (0.0, 0.9)):
            if not lo <= float(s2[i]) * fs <= hi:
                continue
            assert at(float(mean[i]) + dm, float(s2[i]) * fs) < float(ll[i])


def test_resample_follows_the_weights_and_skips_impossible_draws() -> None:
    logw = np.array([math.log(0.5), math.log(0.25), math.log(0.25), -math.inf])
    picked = samples.resample(logw, 8, np.random.default_rng(0))
    assert sum(picked.values()) == pytest.approx(1.0)
    assert 3 not in picked
    # Systematic resampling keeps each count within one of keep * weight.
    for i, w in enumerate([0.5, 0.25, 0.25]):
        assert abs(picked.get(i, 0.0) * 8 - 8 * w) <= 1.0


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_weighted_draws_centre_near_a_known_lengthscale(seed: int) -> None:
    # Scores drawn from a 1-D Matern 5/2 GP with lengthscale 0.1 (prior median exp(sqrt 2) = 4.1):
    # 25 points pull the weighted lengthscales to within a factor 2 of the truth.
    true = 0.1
    rng = np.random.default_rng(seed)
    X = rng.random((25, 1))
    K = samples.matern52(as_tensor(X), as_tensor([[true]]))[0].numpy() + 1e-6 * np.eye(25)
    y = np.linalg.cholesky(K) @ rng.standard_normal(25)
    models, weights = samples.mixture(X, y, seed=seed, draws=2048)
    log_ls = sum(w * math.log(float(m.kernel.base_kernel.lengthscale)) for m, w in zip(models, weights, strict=True))
    assert abs(log_ls - math.log(true)) < math.log(2.0), math.exp(log_ls)


def test_proposer_mixes_only_on_few_points_and_records_gp() -> None:
    p = Proposer(BOWL, seed=0, cache_dir=False)
    design = p.propose(3, [])
    obs = [Observation(d.config, (d.config["x"] - 0.3) ** 2 + (d.config["y"] + 0.2) ** 2) for d in design]
    [prop] = p.propose(1, obs)
    assert prop.source == "model" and prop.model == "gp"
    assert p.last_choice is not None and len(p.last_choice.models) > 1
    assert p.last_choice.name == "gp" and sum(p.last_choice.weights) == pytest.approx(1.0)
    rng = np.random.default_rng(1)
    many = [Observation({"x": float(a), "y": float(b)}, float(a * a + b * b)) for a, b in rng.uniform(-1, 1, (integrate_upto(2) + 1, 2))]
    [prop] = p.propose(1, many)
    assert prop.model == "gp" and len(p.last_choice.models) == 1
