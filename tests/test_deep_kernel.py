"""surrogate/deep_kernel.py: meta-training, task augmentation, fine-tuning, state for the cache."""

from __future__ import annotations

import io

import numpy as np
import pytest
import torch
from scipy.stats import spearmanr

from forebear.bench.proposal import SPACE3, make_history, shifted_hartmann3
from forebear.engine.surrogate.deep_kernel import MetaModel, Settings, _augment, cache_key
from forebear.engine.surrogate.gp import fit_gp

FAST = Settings(max_steps=250, eval_every=25, patience=4, batch=40, seed=0)


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


def test_meta_training_transfers_to_a_new_task_of_the_family(trained: MetaModel) -> None:
    # Six observations of an unseen task: the meta-trained model ranks test points better than
    # the same network untrained and than the plain GP (mean rank correlation over 3 tasks).
    untrained = MetaModel(SPACE3.dim, FAST)
    r_meta, r_raw, r_gp = [], [], []
    for seed in (5, 6, 7):
        X, y, Xs, ys = new_task(seed)
        r_meta.append(spearmanr(trained.posterior(X, y, fine_tune=False).predict(Xs)[0], ys)[0])
        r_raw.append(spearmanr(untrained.posterior(X, y, fine_tune=False).predict(Xs)[0], ys)[0])
        r_gp.append(spearmanr(fit_gp(X, y, restarts=2).posterior.predict(Xs)[0], ys)[0])
    assert np.mean(r_meta) > np.mean(r_raw) + 0.1
    assert np.mean(r_meta) > np.mean(r_gp)
    assert trained.report is not None and trained.report.holdout_tasks == 2
    assert np.isfinite(trained.report.best_holdout_nll)


def test_fine_tuning_moves_a_copy_not_the_meta_state(trained: MetaModel) -> None:
    X, y, Xs, _ = new_task(8, n=15)
    before = {k: v.clone() for k, v in trained.state_dict().items()}
    tuned = trained.posterior(X, y, fine_tune=True).predict(Xs)[0]
    plain = trained.posterior(X, y, fine_tune=False).predict(Xs)[0]
    assert not np.allclose(tuned, plain)
    for k, v in trained.state_dict().items():
        torch.testing.assert_close(v, before[k])


def test_state_round_trips_through_weights_only_load(trained: MetaModel) -> None:
    buf = io.BytesIO()
    torch.save(trained.state_dict(), buf)
    buf.seek(0)
    other = MetaModel(SPACE3.dim, FAST)
    other.load_state_dict(torch.load(buf, weights_only=True))
    X, y, Xs, _ = new_task(9)
    np.testing.assert_allclose(other.posterior(X, y, fine_tune=False).predict(Xs)[0], trained.posterior(X, y, fine_tune=False).predict(Xs)[0])


def test_augmentation_keeps_ranking_inside_the_unit_range() -> None:
    rng = np.random.default_rng(0)
    t = rng.random(30) * 0.4 + 0.3
    for _ in range(50):
        a = _augment(t, rng)
        assert a.min() >= 0.0 and a.max() <= 1.0 and a.max() - a.min() >= 1e-3 - 1e-12
        np.testing.assert_array_equal(np.argsort(a), np.argsort(t))


def test_cache_key_follows_history_space_and_settings() -> None:
    space = SPACE3.to_dict()
    k = cache_key("h1", space, Settings())
    assert k == cache_key("h1", space, Settings())
    assert k != cache_key("h2", space, Settings())
    assert k != cache_key("h1", {**space, "extra": {"float": [0, 1]}}, Settings())
    assert k != cache_key("h1", space, Settings(augment=False))


def test_bad_settings_and_too_little_history() -> None:
    with pytest.raises(ValueError, match="kernel must be"):
        Settings(kernel="cosine")
    with pytest.raises(ValueError, match="width must be >= 1"):
        Settings(width=0)
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
    np.testing.assert_allclose(gpu.posterior(X, y, fine_tune=False).predict(Xs)[0], trained.posterior(X, y, fine_tune=False).predict(Xs)[0], atol=1e-8)
