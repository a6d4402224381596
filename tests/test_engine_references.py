"""The proposal engine against outside references: the acquisition optimiser against a dense grid
of closed-form EI, and the feasibility classifier on a case whose boundary is known.

(The constant-liar batch against scikit-learn's GaussianProcessRegressor lives with the lie
rules in tests/test_acquisition.py.)
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from forebear.bench.functions import branin
from forebear.core.space import Space
from forebear.engine.acquisition import Scorer, batch, lie_value
from forebear.engine.proposer import Proposer
from forebear.engine.surrogate.gp import fit_gp

SPACE2 = Space.from_dict({"a": {"float": [0.0, 1.0]}, "b": {"float": [0.0, 1.0]}})


def grid_ei(post, best: float, n: int = 301) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form EI (Jones, Schonlau and Welch 1998, with scipy.stats.norm) on an n x n grid."""
    g = np.linspace(0.0, 1.0, n)
    G = np.array(np.meshgrid(g, g, indexing="ij")).reshape(2, -1).T
    mu, var = post.predict(G)
    s = np.sqrt(var)
    z = (best - mu) / s
    return G, s * (norm.pdf(z) + z * norm.cdf(z))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_optimiser_pick_reaches_the_dense_grid_ei_maximum(seed: int) -> None:
    rng = np.random.default_rng(seed)
    X = rng.random((10, 2))
    y = np.array([branin(x) for x in X])
    post = fit_gp(X, y, restarts=1, seed=seed).posterior
    best = float(y.min())
    G, ei = grid_ei(post, best)
    top = float(ei.max())
    [(x, value)] = batch(SPACE2, Scorer([post], [1.0], best), 1, lie_value(y, "min"), taken=X,
                         anchors=X[np.argsort(y)[:5]], rng=np.random.default_rng(seed + 10), n_sobol=1024)
    # The reported value is the log of the closed-form EI at the pick ...
    mu, var = post.predict(x[None, :])
    z = (best - mu[0]) / np.sqrt(var[0])
    assert value == pytest.approx(np.log(np.sqrt(var[0]) * (norm.pdf(z) + z * norm.cdf(z))), abs=1e-6)
    # ... and the optimiser (Sobol candidates, local mutations, gradient steps) finds at least
    # 98% of the best EI of a 301 x 301 grid (spacing 1/300).
    assert np.exp(value) >= 0.98 * top, (x, G[int(np.argmax(ei))], np.exp(value), top)
    # Where the grid maximum is clearly the only mode, the pick is next to it.
    far = np.linalg.norm(G - G[int(np.argmax(ei))], axis=1) > 0.1
    if ei[far].max() < 0.5 * top:
        assert np.linalg.norm(x - G[int(np.argmax(ei))]) < 0.03


def test_feasibility_classifier_finds_a_known_boundary() -> None:
    # Least-squares classification (Rasmussen and Williams 2006, sec. 6.5): GP regression on
    # +1 / -1 labels, the probability of the +1 class read through the probit of the predictive
    # mean over its standard deviation. Labels from a known boundary, x_a + x_b = 1: every
    # configuration above the line failed.
    rng = np.random.default_rng(0)
    X = rng.random((80, 2))
    ok = X.sum(axis=1) < 1.0
    feas = Proposer(SPACE2, seed=0)._feasibility(X[ok], X[~ok])
    T = np.random.default_rng(1).random((2000, 2))
    margin = T.sum(axis=1) - 1.0  # signed distance to the boundary times sqrt(2)
    mu, var = feas.predict(T)
    p = norm.cdf(mu / np.sqrt(var))
    clear = np.abs(margin) > 0.15
    # Away from the boundary the classifier is right on (nearly) every point ...
    agree = (p[clear] > 0.5) == (margin[clear] < 0)
    assert agree.mean() >= 0.98, agree.mean()
    # ... confident deep inside each side ...
    assert np.median(p[margin < -0.4]) > 0.8 and np.median(p[margin > 0.4]) < 0.2
    # ... and along the diagonal x_a = x_b its 0.5 crossing sits near the true one at 0.5.
    d = np.linspace(0.05, 0.95, 181)
    mu_d, var_d = feas.predict(np.column_stack([d, d]))
    crossing = d[int(np.argmin(np.abs(norm.cdf(mu_d / np.sqrt(var_d)) - 0.5)))]
    assert abs(crossing - 0.5) < 0.06, crossing
