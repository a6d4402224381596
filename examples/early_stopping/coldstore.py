"""A cold-storage warehouse's hourly energy use, forecast by a small network trained epoch by epoch.

The data is our own scenario, generated here: energy use follows the outside
temperature, door openings during opening hours and a defrost cycle every
six hours, plus noise. ``evaluate`` trains scikit-learn's ``MLPRegressor`` one
``partial_fit`` pass per epoch and notes the validation error after each, so
forebear can halt configurations that are clearly behind.
"""

from __future__ import annotations

from typing import Any

import numpy as np

EPOCHS = 30


def _data(site: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(site)
    hours = np.arange(24 * 7 * 52)
    hour, day = hours % 24, (hours // 24) % 7
    outside = 12 + 3.6 * np.sin(2 * np.pi * (hours / 24 - 0.3)) + 6 * np.sin(2 * np.pi * hours / (24 * 365)) + rng.normal(0, 1.5, len(hours))
    doors = ((hour >= 7) & (hour <= 18) & (day < 6)) * rng.poisson(4 + site % 3, len(hours))
    defrost = (hours % 6 == 0).astype(float)
    energy = 40 + 1.8 * outside + 2.5 * doors + 15 * defrost + rng.normal(0, 3, len(hours))
    X = np.column_stack([np.sin(2 * np.pi * hour / 24), np.cos(2 * np.pi * hour / 24), day / 6, outside / 20, doors / 10, defrost])
    cut = int(0.75 * len(hours))
    return X[:cut], energy[:cut] / 100, X[cut:], energy[cut:] / 100


def evaluate(config: dict[str, Any], note: Any) -> dict[str, float]:
    """Validation RMSE (kWh) after EPOCHS epochs; ``note(epoch, {...})`` after each one."""
    from sklearn.neural_network import MLPRegressor

    Xt, yt, Xv, yv = _data(int(config.get("site", 17)))
    model = MLPRegressor(
        hidden_layer_sizes=(int(config["units"]),),
        learning_rate_init=float(config["learning_rate"]),
        alpha=float(config["alpha"]),
        batch_size=64,
        random_state=0,
    )
    rmse = float("inf")
    for epoch in range(1, EPOCHS + 1):
        model.partial_fit(Xt, yt)
        rmse = float(np.sqrt(np.mean((model.predict(Xv) - yv) ** 2)) * 100)
        note(epoch, {"val_rmse": rmse})
    return {"val_rmse": rmse}


def evaluate_site_3(config: dict[str, Any], note: Any) -> dict[str, float]:
    """The same model on an earlier site's data (the history search)."""
    return evaluate({**config, "site": 3}, note)
