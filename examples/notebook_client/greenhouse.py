"""A notebook-style search on your own Dask client with a function as the objective.

A greenhouse logs its irrigation water per hour. We fit a small kernel ridge
model of water use from the hour of day and the air temperature, and tune its
regularisation, length scale and feature set. The measurements are invented
and generated below; every trial really fits the model (numpy only).

Run it as a script (``python examples/notebook_client/greenhouse.py``) or
paste the cells (``# %%``) into a notebook: there ``search`` and ``result``
show as HTML tables, and ``search.link`` opens the search's live page on the
Dask dashboard.
"""

# %% The client you already have: here a LocalCluster on this machine.
from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

import forebear

HERE = Path(__file__).resolve().parent


# %% The objective: a plain function of the notebook. forebear ships it to the
# workers the way Dask ships functions (by value when it is defined here).
def water_use_error(config: dict[str, Any]) -> dict[str, float]:
    """Validation RMSE (litres per hour) of a kernel ridge model of the greenhouse's water use."""
    rng = np.random.default_rng(17)
    hours = rng.uniform(0, 24, 360)
    temp = 18 + 9 * np.sin((hours - 9) / 24 * 2 * np.pi) + rng.normal(0, 1.5, hours.size)
    water = 40 + 3.2 * np.clip(temp - 20, 0, None) ** 1.3 + 12 * np.exp(-((hours - 7) ** 2) / 2) + rng.normal(0, 2.0, hours.size)
    cols = [np.sin(hours / 24 * 2 * np.pi), np.cos(hours / 24 * 2 * np.pi)]
    if config["features"] == "hour+temperature":
        cols.append((temp - temp.mean()) / temp.std())
    x = np.column_stack(cols)
    train, valid = slice(0, 270), slice(270, None)

    def kernel(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        d2 = ((a[:, None, :] - b[None, :, :]) ** 2).sum(-1)
        return np.exp(-d2 / (2 * config["length_scale"] ** 2))

    k = kernel(x[train], x[train])
    mean = water[train].mean()
    coef = np.linalg.solve(k + config["alpha"] * np.eye(k.shape[0]), water[train] - mean)
    pred = kernel(x[valid], x[train]) @ coef + mean
    rmse = float(np.sqrt(np.mean((pred - water[valid]) ** 2)))
    return {"val_rmse": rmse, "val_mae": float(np.mean(np.abs(pred - water[valid])))}


def spec(trials: int = 16, folder: Path = HERE) -> dict[str, Any]:
    """The search: no cluster section (the client is given) and no call (the function is given)."""
    return {
        "name": "greenhouse-water",
        "objective": {"minimize": "val_rmse"},
        "space": {
            "alpha": {"float": [1.0e-4, 10.0], "log": True},
            "length_scale": {"float": [0.05, 5.0], "log": True},
            "features": {"categories": ["hour", "hour+temperature"]},
        },
        "budget": {"trials": trials, "batch": 4, "concurrency": 2, "trial_timeout": "2m"},
        "logbook": str(folder / "runs" / "greenhouse-water.jsonl"),
        "seed": 5,
    }


def main(client: Any, trials: int = 16, folder: Path = HERE) -> Any:
    # %% Start the search in the background; the notebook stays usable.
    search = forebear.start(spec(trials, folder), client=client, objective=water_use_error)

    # %% A moment later, look at it while it runs (in Jupyter, `search` alone shows the tables).
    time.sleep(3)
    print(f"live page: {search.link}", file=sys.stderr)
    print(search.status()["counts"], file=sys.stderr)

    # %% Wait for the budget (or call search.stop() to end it early, cleanly).
    result = search.wait()
    print(f"best trial {result.best.trial}: val_rmse {result.best.score:.3f} with {result.best.config}", file=sys.stderr)
    return result


if __name__ == "__main__":
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", dashboard_address="127.0.0.1:0") as cluster, Client(cluster) as client:
        main(client)
