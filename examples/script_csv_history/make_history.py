"""Regenerate past/warehouses.csv: earlier tuning results for warehouses W1-W3.

Stands in for results a team gathered before it used forebear (a spreadsheet
of runs): for each earlier warehouse, 12 configurations from a Latin
hypercube over the same space, each really trained with train.py's model.

    python make_history.py        # writes past/warehouses.csv (about 20 s)
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
from pathlib import Path

import train

from forebear.core.space import Space

HERE = Path(__file__).resolve().parent
SPACE = Space.from_dict({
    "max_features": {"categories": ["sqrt", "log2", "all"]},
    "min_samples_leaf": {"int": [1, 40], "log": True},
    "max_depth": {"int": [3, 24]},
    "n_estimators": {"int": [20, 200], "log": True},
})


def score(warehouse: str, config: dict) -> dict:
    argv = ["--warehouse", warehouse] + [a for k, v in config.items() for a in (f"--{k.replace('_', '-')}", str(v))]
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        train.main(argv)
    return json.loads(out.getvalue().strip().splitlines()[-1])


if __name__ == "__main__":
    rows = []
    for i, warehouse in enumerate(("W1", "W2", "W3")):
        for config in SPACE.latin_hypercube(12, seed=100 + i):
            rows.append({"warehouse": warehouse, **config, **score(warehouse, config)})
    path = HERE / "past" / "warehouses.csv"
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    print(f"wrote {len(rows)} rows to {path}")
