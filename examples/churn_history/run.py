"""The same example through the Python API: run the searches, read the result."""

from __future__ import annotations

from pathlib import Path

import forebear

HERE = Path(__file__).resolve().parent

if __name__ == "__main__":  # the embedded cluster starts worker processes; keep this guard
    for name in ("earlier-smb.yaml", "earlier-enterprise.yaml"):
        forebear.run(HERE / name)
    result = forebear.run(HERE / "consumer.yaml")
    best = result.best
    print(f"best trial {best.trial}: val_auc = {best.score:.4f}")
    print(best.config)
    print(f"{len(result.trials)} trials, logbook {result.logbook}, closed: {result.closed}")
    # The logbook can be read back at any time, also while a search runs:
    table = forebear.load(result.logbook)
    print("sources of the trials:", sorted({t.source for t in table}))
