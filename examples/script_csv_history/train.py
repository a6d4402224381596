#!/usr/bin/env python3
"""Train one delivery-time model for one warehouse; print the validation scores as JSON.

A logistics team predicts how long each parcel takes from a warehouse to the
customer, one model per warehouse. This script is what they already had: it
reads its hyperparameters from the command line, trains an extra-trees
regressor on the warehouse's parcels (invented here, generated from the
warehouse id, the same on every run) and prints progress lines, then one JSON
line with the scores. forebear reads the last line of stdout.

    python train.py --warehouse W4 --max-features sqrt --min-samples-leaf 3 --max-depth 12 --n-estimators 80
"""

from __future__ import annotations

import argparse
import json
import sys
import time

import numpy as np
from sklearn.ensemble import ExtraTreesRegressor
from sklearn.metrics import mean_absolute_error, r2_score

WAREHOUSES = {"W1": 1, "W2": 2, "W3": 3, "W4": 4}


def parcels(warehouse: str) -> tuple[np.ndarray, np.ndarray]:
    """Distance, weight, hour, weekday, region one-hot, carrier one-hot, noise -> delivery hours."""
    seed = WAREHOUSES[warehouse]
    rng = np.random.default_rng(seed)
    n = 1500
    distance = rng.gamma(2.0, 60.0 + 10 * seed, n)
    weight = rng.lognormal(0.5, 0.8, n)
    hour = rng.integers(0, 24, n)
    weekday = rng.integers(0, 7, n)
    region = rng.integers(0, 5, n)
    carrier = rng.integers(0, 3, n)
    late_cutoff = (hour >= 15 + seed % 3).astype(float)
    hours = (
        6 + distance / (45 + 5 * seed) + 1.5 * np.log1p(weight) + 14 * late_cutoff
        + 10 * (weekday >= 5) * (1 + 0.2 * seed) + 3 * np.array([0, 1, 2, 0.5, 4])[region] + 2 * carrier
    ) * rng.lognormal(0, 0.15, n)
    noise = rng.normal(0, 1, (n, 8))
    X = np.column_stack([distance, weight, hour, weekday, np.eye(5)[region], np.eye(3)[carrier], noise])
    return X, hours


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--warehouse", required=True, choices=sorted(WAREHOUSES))
    ap.add_argument("--max-features", required=True, choices=["sqrt", "log2", "all"])
    ap.add_argument("--min-samples-leaf", type=int, required=True)
    ap.add_argument("--max-depth", type=int, required=True)
    ap.add_argument("--n-estimators", type=int, required=True)
    args = ap.parse_args(argv)
    X, y = parcels(args.warehouse)
    cut = 1000
    t0 = time.time()
    print(f"warehouse {args.warehouse}: {cut} training parcels, {len(y) - cut} validation parcels", flush=True)
    model = ExtraTreesRegressor(
        n_estimators=args.n_estimators,
        max_features=None if args.max_features == "all" else args.max_features,
        min_samples_leaf=args.min_samples_leaf,
        max_depth=args.max_depth,
        n_jobs=1,
        random_state=0,
    )
    model.fit(X[:cut], y[:cut])
    pred = model.predict(X[cut:])
    print(f"trained in {time.time() - t0:.2f} s", flush=True)
    print(json.dumps({"val_mae": float(mean_absolute_error(y[cut:], pred)), "val_r2": float(r2_score(y[cut:], pred))}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
