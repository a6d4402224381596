"""The demo's scenario: a fleet of regional daily-demand forecasting models.

A retailer retrains one gradient-boosted forecaster per region. Regions share
the same kind of demand (a trend, a weekly cycle, a yearly cycle, promotions,
a temperature effect, noise) in different proportions, so good
hyperparameters for one region are a good start for the next: the searches
of earlier regions are the history of a new one.

The data are invented for this demo and generated here, deterministically
per region: two years of daily demand. The model is scikit-learn's
``HistGradientBoostingRegressor`` on calendar, lag and weather features,
trained on the first 21 months and scored on the last 3 (``val_mape``, the
mean absolute percentage error in percent, lower is better).

``evaluate_<region>(config)`` are the objectives a spec names, e.g.
``call: forebear.face.demo_forecast:evaluate_coast``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np

# Imported at module level on purpose: a worker's fork server imports this module once,
# and every attempt's child process then starts with scikit-learn already loaded.
from sklearn.ensemble import HistGradientBoostingRegressor
from threadpoolctl import threadpool_limits

DAYS = 730
VALIDATION_DAYS = 91
MAX_ITER = 120  # boosting rounds; fixed so that learning_rate matters, as it does in practice


@dataclass(frozen=True)
class Region:
    """How one region's demand is made up (all invented)."""

    name: str
    seed: int
    level: float  # mean daily units
    trend: float  # relative growth over the two years
    weekly: float  # amplitude of the weekly cycle, relative to the level
    yearly: float  # amplitude of the yearly cycle
    promo_lift: float  # relative lift on promotion days
    heat: float  # relative change per degree above 20 C
    noise: float  # relative noise (log-normal sigma)


REGIONS: dict[str, Region] = {
    r.name: r
    for r in (
        Region("north", 11, 420.0, 0.10, 0.25, 0.20, 0.35, 0.010, 0.10),
        Region("south", 12, 610.0, 0.18, 0.18, 0.30, 0.45, 0.022, 0.13),
        Region("east", 13, 300.0, 0.05, 0.32, 0.15, 0.30, 0.006, 0.09),
        Region("west", 14, 520.0, 0.14, 0.22, 0.26, 0.55, 0.015, 0.15),
        Region("coast", 15, 380.0, 0.12, 0.28, 0.34, 0.40, 0.025, 0.12),
    )
}

SPACE: dict[str, dict[str, Any]] = {
    "learning_rate": {"float": [0.01, 0.5], "log": True},
    "max_leaf_nodes": {"int": [4, 64], "log": True},
    "min_samples_leaf": {"int": [2, 60]},
    "l2_regularization": {"float": [1.0e-4, 10.0], "log": True},
}


@lru_cache(maxsize=8)
def dataset(region: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(X_train, y_train, X_val, y_val)`` for ``region``, the same on every call and machine."""
    r = REGIONS[region]
    rng = np.random.default_rng(r.seed)
    t = np.arange(DAYS)
    dow = t % 7
    doy = t % 365
    temp = 14 + 9 * np.sin(2 * np.pi * (doy - 110) / 365) + rng.normal(0, 2.5, DAYS)
    promo = (rng.random(DAYS) < 0.08).astype(float)
    weekly_shape = np.array([0.85, 0.9, 0.95, 1.0, 1.15, 1.3, 0.85])  # Monday .. Sunday
    mean = (
        r.level
        * (1 + r.trend * t / DAYS)
        * (1 + r.weekly * (weekly_shape[dow] - 1) / 0.3)
        * (1 + r.yearly * np.sin(2 * np.pi * (doy - 200) / 365))
        * (1 + r.promo_lift * promo)
        * (1 + r.heat * np.clip(temp - 20, 0, None))
    )
    demand = mean * rng.lognormal(0.0, r.noise, DAYS)
    feats = _features(demand, dow, doy, temp, promo)
    start = 28  # the longest lag and window
    X, y = feats[start:], demand[start:]
    cut = len(y) - VALIDATION_DAYS
    return X[:cut], y[:cut], X[cut:], y[cut:]


def _features(demand: np.ndarray, dow: np.ndarray, doy: np.ndarray, temp: np.ndarray, promo: np.ndarray) -> np.ndarray:
    def lag(k: int) -> np.ndarray:
        out = np.full_like(demand, np.nan)
        out[k:] = demand[:-k]
        return out

    def rolling(k: int) -> np.ndarray:
        c = np.concatenate([[0.0], np.cumsum(demand)])
        out = np.full_like(demand, np.nan)
        out[k:] = (c[k:-1] - c[:-k - 1]) / k  # mean of the k days before each day
        return out

    return np.column_stack([dow, doy, temp, promo, lag(1), lag(7), lag(14), lag(28), rolling(7), rolling(28)])


def evaluate(region: str, config: dict[str, Any]) -> dict[str, float]:
    """Train the region's forecaster with ``config``; validation MAPE (%) and RMSE."""
    X_tr, y_tr, X_va, y_va = dataset(region)
    model = HistGradientBoostingRegressor(
        learning_rate=float(config["learning_rate"]),
        max_leaf_nodes=int(config["max_leaf_nodes"]),
        min_samples_leaf=int(config["min_samples_leaf"]),
        l2_regularization=float(config["l2_regularization"]),
        max_iter=MAX_ITER,
        early_stopping=False,
        random_state=0,
    )
    # One thread per attempt: the cluster already runs one attempt per core.
    with threadpool_limits(limits=1):
        model.fit(X_tr, y_tr)
        pred = model.predict(X_va)
    mape = float(np.mean(np.abs(pred - y_va) / y_va) * 100.0)
    rmse = float(np.sqrt(np.mean((pred - y_va) ** 2)))
    return {"val_mape": mape, "val_rmse": rmse}


def evaluate_north(config: dict[str, Any]) -> dict[str, float]:
    """The north region's objective."""
    return evaluate("north", config)


def evaluate_south(config: dict[str, Any]) -> dict[str, float]:
    """The south region's objective."""
    return evaluate("south", config)


def evaluate_east(config: dict[str, Any]) -> dict[str, float]:
    """The east region's objective."""
    return evaluate("east", config)


def evaluate_west(config: dict[str, Any]) -> dict[str, float]:
    """The west region's objective."""
    return evaluate("west", config)


def evaluate_coast(config: dict[str, Any]) -> dict[str, float]:
    """The coast region's objective."""
    return evaluate("coast", config)
