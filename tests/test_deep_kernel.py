"""surrogate/deep_kernel.py: episodic meta-training, the closed-form refit, state for the cache."""

from __future__ import annotations

import io

import numpy as np
import pytest
import torch
from scipy.stats import spearmanr

from forebear.bench.proposal import SPACE3, make_history, shifted_hartmann3
from forebear.engine.surrogate.deep_kernel import (
    FORMAT,
    MetaModel,
    MetaPosterior,
    Settings,
    cache_key,
)
from forebear.engine.surrogate.gp import fit_gp
from forebear.engine.surrogate.meta_train import _augment

FAST = Settings(max_steps=300, eval_every=50, patience=3, tasks_per_step=4, seed=0)


@pytest.fixture(scope="module")
def trained() -> MetaModel:
    hist = make_history(10, 60, seed=0)
    meta = MetaModel(SPACE3.dim, FAST)
    meta.meta_train([(t.X, t.y) for t in hist.tasks])
    return meta


def new_task(seed: int = 5, n: int = 6):
    rng = np.random.default_rng(seed)
    f = shifted_hartmann3(rng)
    X = rng.random((n, 3))
    Xs = rng.random((400, 3))
    return X, np.array([f(x) for x in X]), Xs, np.array([f(x) for x in Xs])


def test_meta_training_beats_the_untrained_model_on_held_out_tasks(trained: MetaModel) -> None:
    # Six observations of an unseen task of the family: per-point test log-likelihood and rank
    # correlation of the meta-trained model against the same network untrained (3 tasks).
    untrained = MetaModel(SPACE3.dim, FAST)
    ll_meta, ll_raw, r_meta, r_gp = [], [], [], []
    for seed in (5, 6, 7):
        X, y, Xs, ys = new_task(seed)
        pm, pr = trained.posterior(X, y), untrained.posterior(X, y)
        ll_meta.append(np.mean(pm.log_predictive(Xs, ys)))
        ll_raw.append(np.mean(pr.log_predictive(Xs, ys)))
        r_meta.append(spearmanr(pm.predict(Xs)[0], ys)[0])
        r_gp.append(spearmanr(fit_gp(X, y, restarts=2).posterior.predict(Xs)[0], ys)[0])
    assert np.mean(ll_meta) > np.mean(ll_raw) + 0.3
    assert np.mean(r_meta) > np.mean(r_gp)
    rep = trained.report
    assert rep is not None and rep.holdout_tasks == 2
    assert rep.best_holdout_nll is not None and rep.initial_holdout_nll is not None
    assert rep.best_holdout_nll < rep.initial_holdout_nll  # early stopping kept an improved state


def test_refit_follows_an_affine_transform_of_a_meta_trained_task(trained: MetaModel) -> None:
    # The same observations under y -> 5 + 3 y: offset and amplitude are refitted in closed
    # form and nothing else moves, so predictions transform exactly.
    X, y, Xs, ys = new_task(11, n=10)
    m1, v1 = trained.posterior(X, y).predict(Xs)
    m2, v2 = trained.posterior(X, 5.0 + 3.0 * y).predict(Xs)
    np.testing.assert_allclose(m2, 5.0 + 3.0 * m1, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(v2, 9.0 * v1, rtol=1e-8, atol=1e-12)
    # The model's own prior mean m(x), affinely transformed: offset and amplitude are in the
    # model, so ten points pin it down everywhere. (Five random points of this surface have
    # a quarter of its spread, more than the amplitude prior learned in episodes stretches.)
    with torch.no_grad():
        m_all = trained.net.parts(torch.as_tensor(Xs))[1].numpy()
    yt = 5.0 + 3.0 * m_all
    pred = trained.posterior(Xs[:10], yt[:10]).predict(Xs[10:])[0]
    assert np.sqrt(np.mean((pred - yt[10:]) ** 2)) < 0.1 * np.std(yt)
    # A history task it was meta-trained on, rescaled: ten points predict it better than the
    # untrained network does.
    task = make_history(10, 60, seed=0).tasks[3]
    Xh, yh = task.X, -2.0 + 4.0 * task.y
    err = yh[10:] - trained.posterior(Xh[:10], yh[:10]).predict(Xh[10:])[0]
    err_raw = yh[10:] - MetaModel(SPACE3.dim, FAST).posterior(Xh[:10], yh[:10]).predict(Xh[10:])[0]
    assert np.sqrt(np.mean(err**2)) < 0.8 * np.sqrt(np.mean(err_raw**2))


def test_the_refit_leaves_the_meta_state_alone_and_the_grid_moves(trained: MetaModel) -> None:
    X, y, Xs, _ = new_task(8, n=15)
    before = {k: v.clone() for k, v in trained.state_dict().items()}
    refit = trained.posterior(X, y, fine_tune=True)
    plain = trained.posterior(X, y, fine_tune=False)
    # The grid maximises marginal likelihood plus the log-normal prior (zero at lam = 1).
    assert plain.lam == 1.0
    assert float(refit.lml) - 0.5 * np.log(refit.lam) ** 2 >= float(plain.lml) - 1e-9
    for k, v in trained.state_dict().items():
        torch.testing.assert_close(v, before[k])


def test_conditioning_on_a_lie_pins_the_prediction(trained: MetaModel) -> None:
    X, y, Xs, _ = new_task(12, n=8)
    post = trained.posterior(X, y)
    x = torch.as_tensor(Xs[:1])
    cond = post.condition(x, torch.as_tensor([float(y.min())], dtype=torch.float64))
    m, v = cond.predict(Xs[:1])
    assert abs(m[0] - y.min()) < 0.2 * np.std(y) and v[0] < post.predict(Xs[:1])[1][0]
    # Extending the stored blocks gives the posterior built from scratch on all points.
    fresh = MetaPosterior(trained.net, torch.cat([post.X, x]), torch.cat([post.y, cond.y[-1:]]), post.shift, post.scale, post.lam,
                           noise_scale=post.noise_scale)
    np.testing.assert_allclose(cond.predict(Xs)[0], fresh.predict(Xs)[0], rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(cond.predict(Xs)[1], fresh.predict(Xs)[1], rtol=1e-6, atol=1e-10)


def test_state_round_trips_through_weights_only_load(trained: MetaModel) -> None:
    buf = io.BytesIO()
    torch.save(trained.state_dict(), buf)
    buf.seek(0)
    other = MetaModel(SPACE3.dim, FAST)
    other.load_state_dict(torch.load(buf, weights_only=True))
    X, y, Xs, _ = new_task(9)
    np.testing.assert_allclose(other.posterior(X, y).predict(Xs)[0], trained.posterior(X, y).predict(Xs)[0])


def test_augmentation_keeps_ranking() -> None:
    rng = np.random.default_rng(0)
    t = torch.as_tensor(rng.random(30) * 0.4 + 0.3)
    for _ in range(20):
        a = _augment(t, rng)
        assert abs(float(a.mean())) < 1e-9 and abs(float(a.std(unbiased=False)) - 1.0) < 1e-9
        np.testing.assert_array_equal(np.argsort(a.numpy()), np.argsort(t.numpy()))


def test_cache_key_follows_history_space_settings_and_format() -> None:
    space = SPACE3.to_dict()
    k = cache_key("h1", space, Settings())
    assert FORMAT >= 3  # the least-squares prior mean's layout; entries of older layouts must not load
    assert k == cache_key("h1", space, Settings())
    assert k != cache_key("h2", space, Settings())
    assert k != cache_key("h1", {**space, "extra": {"float": [0, 1]}}, Settings())
    assert k != cache_key("h1", space, Settings(augment=False))
    assert k != cache_key("h1", space, Settings(raw_kernel=False))


def test_bad_settings_and_too_little_history() -> None:
    with pytest.raises(ValueError, match="kernel must be"):
        Settings(kernel="cosine")
    with pytest.raises(ValueError, match="width must be >= 1"):
        Settings(width=0)
    with pytest.raises(ValueError, match="noise_floor must be in"):
        Settings(noise_floor=0.0)
    with pytest.raises(ValueError, match="at least one history task"):
        MetaModel(3, FAST).meta_train([(np.zeros((1, 3)), np.zeros(1))])


def test_rbf_kernel_variant_trains() -> None:
    hist = make_history(3, 30, seed=1)
    meta = MetaModel(3, Settings(kernel="rbf", max_steps=40, seed=0))
    report = meta.meta_train([(t.X, t.y) for t in hist.tasks])
    assert report.steps == 40 and report.holdout_tasks == 0  # too few tasks to hold any out
    X, y, Xs, _ = new_task(3)
    m, v = meta.posterior(X, y).predict(Xs)
    assert np.all(np.isfinite(m)) and np.all(v > 0)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
def test_cuda_matches_cpu(trained: MetaModel) -> None:
    gpu = MetaModel(SPACE3.dim, FAST, device="cuda")
    gpu.load_state_dict(trained.state_dict())
    X, y, Xs, _ = new_task(10)
    np.testing.assert_allclose(gpu.posterior(X, y).predict(Xs)[0], trained.posterior(X, y).predict(Xs)[0], atol=1e-8)


def test_the_model_matern_equals_gpytorchs() -> None:
    # Rasmussen & Williams 2006, eq. 4.17, against gpytorch's MaternKernel(nu=2.5); the
    # training form (clamped distances) and the prediction form (cdist) agree.
    import gpytorch

    from forebear.engine.surrogate.deep_kernel import _cdist, _dist, _matern_r

    rng = np.random.default_rng(0)
    A, B = torch.as_tensor(rng.random((7, 3))), torch.as_tensor(rng.random((5, 3)))
    ls = torch.tensor([0.2, 0.5, 1.3], dtype=torch.float64)
    ref = gpytorch.kernels.MaternKernel(nu=2.5, ard_num_dims=3).double()
    ref.lengthscale = ls
    want = ref.forward(A, B).detach()
    torch.testing.assert_close(_matern_r(_dist(A / ls, B / ls)), want, rtol=1e-6, atol=1e-9)
    torch.testing.assert_close(_matern_r(_cdist(A / ls, B / ls)), want, rtol=1e-6, atol=1e-9)
