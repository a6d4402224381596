"""Quality searches through ``forebear.run`` itself (``python -m forebear.bench.quality --live``).

The asynchronous mode (``simulated.py``) drives the proposer with the loop's
schedule under a simulated clock. This mode runs the same held-out tasks the way
a user runs a search: a spec with the family's space, the other tasks of the
family as a CSV history table, a callable objective that sleeps a log-normal
trial duration (median ``trial_seconds``) before it scores, the spec's embedded
Dask cluster of ``q`` workers (``cluster: {local: {workers: q}}``, started per
search as ``forebear run`` starts it, on 127.0.0.1), and the regret
curve read back from the logbook in the order the scores arrived. Time is real
here, so proposals depend on the machine's load as they do for a user; the
meta-trained model is trained (into the run's own cache folder) before a search
with history starts, as a team's second search with one history finds it.

Only what a spec can say runs here: forebear with or without history, at any
concurrency (``forebear-full``, ``forebear-cold``, ``gp``, their ``-q4`` / ``-q8``
forms) and random search, which has no schedule and runs in process as in the
other modes. Ablations and peers are not forebear's ``run`` path and are refused.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

#: The score column of the history table and the spec's metric.
METRIC = "score"


@dataclass(frozen=True)
class Timed:
    """An objective that sleeps a trial duration first; the duration is fixed per configuration and seed."""

    objective: Callable[[Mapping[str, Any]], float]
    seconds: float
    sigma: float
    seed: int

    def __call__(self, config: Mapping[str, Any]) -> float:
        key = hashlib.sha256(json.dumps(dict(config), sort_keys=True, default=str).encode()).digest()
        rng = np.random.default_rng([self.seed, int.from_bytes(key[:8], "little")])
        time.sleep(self.seconds * math.exp(self.sigma * rng.standard_normal()))
        return float(self.objective(config))


def supported(method: Any) -> bool:
    """Whether a benchmark method is something a spec can ask ``forebear run`` for."""
    if method.kind in ("random", "lhs-random"):
        return True
    if method.kind != "proposer":
        return False
    settings = dict(method.settings)
    return not settings or (settings == {"model": "gp"} and not method.history)


def write_history(history: Any, space: Any, path: Path) -> None:
    """The history tasks as one CSV table: a column per parameter, ``task`` and ``score``."""
    names = space.names
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([*names, "task", METRIC])
        for task in history.tasks:
            for config, y in zip(task.configs, task.y, strict=True):
                w.writerow([repr(config[n]) if isinstance(config[n], float) else config[n] for n in names]
                           + [task.name, repr(float(y))])


def spec_for(family: Any, method: Any, seed: int, trials: int, folder: Path, history_csv: Path | None) -> dict[str, Any]:
    """The spec of one search: the family's space, ``q`` workers and a batch of ``q``, its own logbook."""
    spec: dict[str, Any] = {
        "name": f"{family.name}-{method.name}-{seed}",
        "objective": {"minimize": METRIC},
        "space": family.space.to_dict(),
        "budget": {"trials": trials, "batch": method.q, "concurrency": method.q, "trial_timeout": "10m"},
        "cluster": {"local": {"workers": method.q, "dashboard": False}},
        "logbook": str(folder / "search.jsonl"),
        "seed": seed,
    }
    if history_csv is not None:
        spec["history"] = [{"csv": str(history_csv), "task": "task", "score": METRIC}]
    return spec


def curve_of(logbook: Path, trials: int) -> tuple[list[float], dict[str, int], dict[str, int], float]:
    """Scores in the order they arrived, proposals by model and source, mean trials pending per proposal."""
    from collections import Counter

    from forebear.records import logbook as book

    table = book.load(logbook)
    scored = sorted((t for t in table.trials.values() if t.state == "scored"), key=lambda t: (t.finished_at or 0.0, t.trial))
    if len(scored) < trials:
        states = Counter(t.state for t in table.trials.values())
        msg = f"{logbook}: {len(scored)} of {trials} trials scored ({dict(states)})"
        raise RuntimeError(msg)
    scored = scored[:trials]
    models = Counter(str(t.model) for t in scored)
    sources = Counter(t.source for t in scored)
    # Pending at each proposal: trials proposed before it and not yet finished when it was made.
    made = [(t.proposed_at or 0.0, t.finished_at or math.inf) for t in table.trials.values()]
    pending = [sum(1 for p, f in made if p < at <= f) for at, _ in made]
    return [float(t.score) for t in scored], dict(models), dict(sources), float(np.mean(pending)) if pending else 0.0


def search(family: Any, index: int, method: Any, seed: int, trials: int, folder: Path,
           trial_seconds: float, sigma: float) -> dict[str, Any]:
    """One search of held-out task ``index`` through ``forebear.run``; the same keys as ``quality.search``."""
    from forebear.engine.proposer import Proposer
    from forebear.face.api import as_spec, run
    from forebear.loop.opening import load_history

    task = family.tasks[index]
    folder.mkdir(parents=True, exist_ok=True)
    history_csv = None
    meta = 0.0
    if method.history:
        history_csv = folder / "history.csv"
        write_history(family.history_for(index), family.space, history_csv)
    objective = Timed(task.objective, trial_seconds, sigma, seed)
    spec = as_spec(spec_for(family, method, seed, trials, folder, history_csv), objective)
    if method.history:
        # Train (or load) the meta-trained model as the controller's proposer will: same spec, same cache.
        t0 = time.perf_counter()
        Proposer(spec.space, history=load_history(spec, lambda _msg: None), seed=spec.seed).meta_model()
        meta = time.perf_counter() - t0
    t0 = time.perf_counter()
    run(spec, objective=objective)
    seconds = time.perf_counter() - t0
    scores, models, sources, pending = curve_of(folder / "search.jsonl", trials)
    best = np.minimum.accumulate(np.asarray(scores, dtype=float))
    regret = np.maximum(np.asarray(task.regret(best), dtype=float), 0.0)
    return {"regret": regret.tolist(), "models": models, "sources": sources, "seconds": seconds,
            "meta_seconds": meta, "pending_mean": pending}


def run(proto: Any, progress: bool = False, partial: Path | None = None) -> list[dict[str, Any]]:
    """Every (family, held-out task, seed) job of ``proto`` through ``forebear.run``, in ``quality.run``'s format.

    Jobs run one at a time (``proto.workers`` is not used: parallel searches would
    share the cores the trials and the proposer need).
    """
    from forebear.bench import quality
    from forebear.bench.families import held_out

    refused = [m for m in proto.methods if not supported(quality.METHODS[m])]
    if refused or proto.proposer:
        what = f"methods {', '.join(refused)}" if refused else "extra proposer settings"
        msg = f"--live runs what a spec can ask forebear run for; {what} cannot (drop them or leave out --live)"
        raise ValueError(msg)
    families = {f: quality.family_of(proto, f) for f in proto.families}
    jobs = [(f, i, s) for s in range(proto.first_seed, proto.first_seed + proto.seeds)
            for f in proto.families for i in held_out(families[f], proto.tasks)]
    results: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="forebear-live-") as tmp, \
            _environment({"FOREBEAR_CACHE": str(Path(tmp) / "cache"), "OMP_NUM_THREADS": "1"}):
        root = Path(tmp)
        for n, (fam, index, seed) in enumerate(jobs):
            family = families[fam]
            out: dict[str, Any] = {"family": fam, "task": family.tasks[index].name, "seed": seed, "runs": {}}
            for name in proto.methods:
                method = quality.METHODS[name]
                if method.kind != "proposer":
                    out["runs"][name] = quality.search(family, index, method, seed, proto.trials)
                    continue
                folder = root / f"{fam}-{index}-{seed}-{name}"
                out["runs"][name] = search(family, index, method, seed, proto.trials, folder, proto.trial_seconds, proto.sigma)
            results.append(out)
            quality.finished(out, n + 1, len(jobs), progress, partial)
    return results


@contextmanager
def _environment(values: Mapping[str, str]) -> Iterator[None]:
    """Environment variables set for a ``with`` block (the embedded workers inherit them)."""
    saved = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
