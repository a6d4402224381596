"""``forebear bench overhead``: worker utilisation and per-trial overhead on a local cluster.

A search of ``trials`` trials runs on an embedded cluster of ``workers``
single-thread workers with ``concurrency = workers``. Each trial sleeps for a
duration drawn from a log-normal distribution (median ``median`` s, shape
``sigma``), keyed by the trial id, so the durations do not depend on what the
proposer proposes; the score is a quadratic of the configuration, so the
proposer does its ordinary work. Figures, from the logbook's records:

* ``utilization``: busy worker-seconds / available worker-seconds while trials
  remain to be started (for each worker, from its first to its last attempt
  start); the end of the search, where workers idle because the budget has no
  trial left for them, is excluded here and included in
  ``utilization_with_drain`` (from the first proposal to the last result);
* ``overhead_ms_per_trial``: the mean time a worker is not running the
  objective per trial in that window (gap between one result and the next
  attempt start on the same worker, plus the attempt's time beyond its sleep);
* ``noop_overhead_ms_per_trial`` and ``noop_trials_per_s``: the same search
  with an objective that returns at once (pure overhead).
"""

from __future__ import annotations

import os
import tempfile
import time
from collections import defaultdict
from pathlib import Path
from typing import Any

import numpy as np

DURATION_SEED = 20261201


def durations(n: int, median: float, sigma: float) -> np.ndarray:
    """The log-normal sleep of each trial id (median ``median`` s)."""
    rng = np.random.default_rng(DURATION_SEED)
    return np.exp(np.log(median) + sigma * rng.standard_normal(n)) if median > 0 else np.zeros(n)


def timed_sleep(config: dict[str, Any]) -> float:
    """The benchmark objective: sleep this trial's duration, return a quadratic of the configuration."""
    trial = int(os.environ.get("FOREBEAR_TRIAL", "0"))
    n, median, sigma = int(config["n"]), float(config["median"]), float(config["sigma"])
    seconds = float(durations(n, median, sigma)[trial % n])
    if seconds > 0:
        time.sleep(seconds)
    return (float(config["x"]) - 0.3) ** 2


def _search(folder: Path, name: str, trials: int, workers: int, median: float, sigma: float) -> dict[str, Any]:
    from forebear.cluster.runner import shutdown_servers
    from forebear.face.api import run
    from forebear.records.logbook import Logbook

    spec = {
        "name": name,
        "objective": {"call": "forebear.bench.overhead:timed_sleep", "minimize": "loss"},
        "space": {
            "x": {"float": [0.0, 1.0]},
            # Constant "parameters" carry the duration law to the workers with each configuration.
            "n": {"int": [trials, trials + 1]},
            "median": {"categories": [median]},
            "sigma": {"categories": [sigma]},
        },
        "budget": {"trials": trials, "batch": workers, "concurrency": workers, "retries": 0},
        "cluster": {"local": {"workers": workers, "dashboard": False}},
        "logbook": str(folder / f"{name}.jsonl"),
    }
    t0 = time.monotonic()
    result = run(spec, quiet=True)
    wall = time.monotonic() - t0
    shutdown_servers()
    records = Logbook(folder / f"{name}.jsonl").records()
    return {"records": records, "wall": wall, "result": result}


def _figures(records: list[dict[str, Any]], workers: int, n: int, median: float, sigma: float) -> dict[str, float]:
    sleep = durations(n, median, sigma)
    start: dict[int, tuple[float, str]] = {}
    end: dict[int, tuple[float, float]] = {}
    first_proposed = min(r["at"] for r in records if r["kind"] == "proposed")
    for r in records:
        if r["kind"] == "started":
            start[r["trial"]] = (r["at"], r["worker"])
        elif r["kind"] == "scored" and r["trial"] in start:
            end[r["trial"]] = (r["at"], float(r["seconds"]))
    per_worker: dict[str, list[int]] = defaultdict(list)
    for trial, (_, worker) in start.items():
        per_worker[worker].append(trial)
    busy_steady = window = 0.0
    gaps: list[float] = []
    extra: list[float] = []
    for trials in per_worker.values():
        trials.sort(key=lambda t: start[t][0])
        if len(trials) < 2:
            continue
        window += start[trials[-1]][0] - start[trials[0]][0]
        for a, b in zip(trials, trials[1:], strict=False):
            if a not in end:
                continue  # lost or failed: its time counts as idle
            busy_steady += float(sleep[a % n])
            gaps.append(start[b][0] - end[a][0])
            extra.append(end[a][1] - float(sleep[a % n]))
    last_end = max(at for at, _ in end.values())
    busy_all = float(sum(sleep[t % n] for t in end))
    overhead = (np.mean(gaps) + np.mean(extra)) if gaps else float("nan")
    return {
        "utilization": round(busy_steady / window, 4) if window else float("nan"),
        "utilization_with_drain": round(busy_all / (workers * (last_end - first_proposed)), 4),
        "overhead_ms_per_trial": round(1000 * float(overhead), 1),
        "gap_ms_per_trial": round(1000 * float(np.mean(gaps)), 1) if gaps else float("nan"),
        "in_attempt_ms_per_trial": round(1000 * float(np.mean(extra)), 1) if extra else float("nan"),
        "scored": len(end),
        "lost_attempts": sum(1 for r in records if r["kind"] == "lost"),
        "failed": sum(1 for r in records if r["kind"] == "failed"),
    }


def main(trials: int = 100, workers: int = 4, median: float = 2.0, sigma: float = 0.5, noop_trials: int = 100, **_: Any) -> dict[str, Any]:
    """Run both searches and return the figures (see the module docstring)."""
    with tempfile.TemporaryDirectory(prefix="forebear-bench-overhead-") as tmp:
        folder = Path(tmp)
        timed = _search(folder, "overhead", trials, workers, median, sigma)
        figures = _figures(timed["records"], workers, trials, median, sigma)
        noop = _search(folder, "noop", noop_trials, workers, 0.0, sigma)
        nf = _figures(noop["records"], workers, noop_trials, 0.0, sigma)
        noop_first = min(r["at"] for r in noop["records"] if r["kind"] == "proposed")
        noop_last = max(r["at"] for r in noop["records"] if r["kind"] == "scored")
    return {
        **figures,
        "target_utilization": 0.97,
        "trials": trials,
        "workers": workers,
        "median_s": median,
        "sigma": sigma,
        "search_wall_s": round(timed["wall"], 1),
        "noop_overhead_ms_per_trial": nf["overhead_ms_per_trial"],
        "noop_trials_per_s": round(nf["scored"] / (noop_last - noop_first), 2),
        "noop_trials": noop_trials,
        "lost_attempts": figures["lost_attempts"] + nf["lost_attempts"],
        "failed": figures["failed"] + nf["failed"],
        "cpu_count": os.cpu_count(),
    }
