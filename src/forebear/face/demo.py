"""``forebear demo``: a regional demand-forecasting fleet, tuned with and without history.

The scenario (:mod:`forebear.face.demo_forecast`): a retailer retrains one
gradient-boosted demand forecaster per region. The demo

1. writes one spec per search into the demo folder,
2. runs short searches for three earlier regions (north, south, west); their
   logbooks are the history,
3. tunes a new region (coast) twice with the same budget and seed: once cold,
   once with the earlier regions' logbooks as history,
4. prints the best configuration, the gain from history and where the
   logbooks and the report are.

Every trial really trains a model. All searches run on one loopback Dask
cluster (scheduler and workers on 127.0.0.1) that the demo starts and stops,
so the cluster starts once instead of five times.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import os
import shutil
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

MARKER = ".forebear-demo"
HISTORY_REGIONS = ("north", "south", "west")
NEW_REGION = "coast"
CHECKPOINTS = (3, 6, 10, 14)


@dataclass(frozen=True)
class Plan:
    """The demo's sizes; tests run a smaller plan."""

    history_trials: int = 12
    trials: int = 14
    history_regions: tuple[str, ...] = HISTORY_REGIONS
    batch: int = 2
    workers: int = 2
    checkpoints: tuple[int, ...] = CHECKPOINTS


@dataclass
class Outcome:
    """What the demo found (returned by :func:`run_demo` for tests and printing)."""

    folder: Path
    cold_best: float
    warm_best: float
    cold_curve: list[float]
    warm_curve: list[float]
    best_config: dict[str, Any]
    default_score: float
    report: Path
    logbooks: dict[str, Path] = field(default_factory=dict)
    seconds: float = 0.0


def _say(text: str = "") -> None:
    print(text, file=sys.stderr, flush=True)


def spec_for(region: str, plan: Plan, logbook: str, history: list[str] | None, seed: int) -> dict[str, Any]:
    """The spec of one demo search (as written to the demo folder)."""
    from forebear.face.demo_forecast import SPACE

    trials = plan.trials if region == NEW_REGION else plan.history_trials
    spec: dict[str, Any] = {
        "name": f"region-{region}" + ("" if region != NEW_REGION else ("-history" if history else "-cold")),
        "objective": {"call": f"forebear.face.demo_forecast:evaluate_{region}", "minimize": "val_mape"},
        "space": SPACE,
        "budget": {"trials": trials, "batch": plan.batch, "concurrency": plan.workers, "trial_timeout": "2m", "retries": 1},
        "cluster": {"local": {"workers": plan.workers}},
        "logbook": logbook,
        "seed": seed,
    }
    if history:
        spec["history"] = history
    return spec


def _prepare(folder: Path) -> None:
    """Make the demo folder; clear the outputs of an earlier demo run there, touch nothing else."""
    if folder.exists() and not folder.is_dir():
        msg = f"demo folder {folder} is a file"
        raise FileExistsError(msg)
    if folder.exists() and any(folder.iterdir()) and not (folder / MARKER).exists():
        msg = f"demo folder {folder} is not empty and was not made by forebear demo; give another --folder"
        raise FileExistsError(msg)
    for sub in ("runs", "specs", "report"):
        shutil.rmtree(folder / sub, ignore_errors=True)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / MARKER).write_text("made by forebear demo; its runs/, specs/ and report/ are replaced on the next run\n")


def _best_curve(trials: list[Any]) -> list[float]:
    """Best val_mape after each finished trial, in the order they finished."""
    done = sorted((t for t in trials if t.state == "scored"), key=lambda t: (t.finished_at or 0.0, t.trial))
    out, best = [], float("inf")
    for t in done:
        best = min(best, float(t.score))
        out.append(best)
    return out


def run_demo(folder: Path, plan: Plan = Plan(), quiet: bool = False) -> Outcome:
    """Run the whole demo in ``folder``; raises on failure (``main`` turns that into a message)."""
    from forebear.cluster.dispatch import connect
    from forebear.core import spec as spec_mod
    from forebear.face.api import run
    from forebear.face.demo_forecast import evaluate
    from forebear.face.report import write_report
    from forebear.records.logbook import Logbook

    started = time.monotonic()
    folder = folder.resolve()
    _prepare(folder)
    specs = folder / "specs"
    specs.mkdir()
    logbooks: dict[str, Path] = {}

    def write_spec(name: str, spec: dict[str, Any]) -> Path:
        path = specs / f"{name}.yaml"
        path.write_text(yaml.safe_dump(spec, sort_keys=False))
        return path

    # One loopback cluster for all five searches, made by forebear's own dispatch (every
    # listener on 127.0.0.1, worker deaths not retried behind forebear's back). The spec files
    # keep cluster: local, so `forebear run specs/X.yaml` works on its own later; here the
    # demo points them at the shared cluster.
    base = spec_mod.load(spec_for(NEW_REGION, plan, str(folder / "runs" / "unused.jsonl"), None, seed=0))
    base = dataclasses.replace(base, cluster=dataclasses.replace(base.cluster, options={"workers": plan.workers, "dashboard": False}))
    with connect(base) as shared:
        address = shared.cluster.scheduler_address

        def search(name: str, spec: dict[str, Any]) -> Any:
            path = write_spec(name, spec)
            loaded = yaml.safe_load(path.read_text())
            loaded["cluster"] = {"address": address}
            loaded["logbook"] = str(specs / loaded["logbook"])
            if "history" in loaded:
                loaded["history"] = [str(specs / h) for h in loaded["history"]]
            logbooks[name] = Path(loaded["logbook"]).resolve()
            return run(loaded, quiet=quiet)

        _say(f"forebear demo: regional demand forecasting, in {folder}")
        _say(f"  each trial trains a gradient-boosted forecaster on two years of generated daily demand; {plan.workers} workers on 127.0.0.1")
        steps = len(plan.history_regions) + 2
        for i, region in enumerate(plan.history_regions):
            _say(f"\n[{i + 1}/{steps}] earlier region {region}: {plan.history_trials} trials")
            res = search(f"region-{region}", spec_for(region, plan, f"../runs/history/region-{region}.jsonl", None, seed=10 + i))
            _say(f"  best val_mape {res.best.score:.3f}" if res.best else "  nothing scored")
        seed = 42  # the same seed for both coast searches, so only the history differs
        _say(f"\n[{steps - 1}/{steps}] new region {NEW_REGION}, cold start: {plan.trials} trials")
        cold = search(f"{NEW_REGION}-cold", spec_for(NEW_REGION, plan, f"../runs/{NEW_REGION}-cold.jsonl", None, seed))
        _say(f"\n[{steps}/{steps}] new region {NEW_REGION}, with the earlier regions as history: {plan.trials} trials")
        warm = search(f"{NEW_REGION}-history", spec_for(NEW_REGION, plan, f"../runs/{NEW_REGION}-history.jsonl", ["../runs/history/region-*.jsonl"], seed))

    if cold.best is None or warm.best is None:
        msg = "a coast search scored no trial; see the logs beside its logbook in runs/"
        raise RuntimeError(msg)
    # scikit-learn's own defaults (l2_regularization 0 is below the searched range) as a yardstick.
    default_score = evaluate(NEW_REGION, {"learning_rate": 0.1, "max_leaf_nodes": 31, "min_samples_leaf": 20, "l2_regularization": 0.0})["val_mape"]
    report = write_report(Logbook(logbooks[f"{NEW_REGION}-history"]).fold(), folder / "report", logbook=logbooks[f"{NEW_REGION}-history"])
    best = warm.best if warm.best.score <= cold.best.score else cold.best
    return Outcome(
        folder=folder,
        cold_best=float(cold.best.score),
        warm_best=float(warm.best.score),
        cold_curve=_best_curve(cold.trials),
        warm_curve=_best_curve(warm.trials),
        best_config=dict(best.config),
        default_score=float(default_score),
        report=report,
        logbooks=logbooks,
        seconds=time.monotonic() - started,
    )


def summary(out: Outcome, plan: Plan) -> list[str]:
    """The lines the demo prints at the end."""
    lines = ["", f"coast region, val_mape (%, lower is better); scikit-learn's default configuration scores {out.default_score:.3f}", ""]
    lines.append(f"  {'best after N trials':<22}" + "".join(f"{'N=' + str(k):>9}" for k in plan.checkpoints if k <= plan.trials))
    for label, curve in (("cold start", out.cold_curve), ("with history", out.warm_curve)):
        cells = [f"{curve[min(k, len(curve)) - 1]:9.3f}" if curve else f"{'-':>9}" for k in plan.checkpoints if k <= plan.trials]
        lines.append(f"  {label:<22}" + "".join(cells))
    gain = out.cold_best - out.warm_best
    first = out.warm_curve[0] - out.cold_curve[0] if out.cold_curve and out.warm_curve else 0.0
    lines.append("")
    if gain > 0:
        lines.append(f"gain from history: the final best is {gain:.3f} points of MAPE lower ({out.warm_best:.3f} against {out.cold_best:.3f})")
    else:
        lines.append(f"gain from history: none this time; the cold start ended {-gain:.3f} points lower ({out.cold_best:.3f} against {out.warm_best:.3f})")
    reach = next((i + 1 for i, v in enumerate(out.warm_curve) if v <= out.cold_best), None)
    if reach is not None:
        lines.append(f"  with history, the cold start's final best was reached after {reach} of {len(out.warm_curve)} trials")
    lines.append(f"  first trial: {'better' if first < 0 else 'worse'} by {abs(first):.3f} with history (the warm start's first pick)")
    lines.append("")
    lines.append("best configuration for coast:")
    for k, v in out.best_config.items():
        lines.append(f"  {k}: {v:.6g}" if isinstance(v, float) else f"  {k}: {v}")
    lines.append("")
    lines.append(f"logbooks:  {out.folder / 'runs'}")
    lines.append(f"specs:     {out.folder / 'specs'}   (forebear run {out.folder / 'specs' / 'coast-history.yaml'} resumes that search)")
    lines.append(f"report:    {out.report}")
    lines.append(f"next:      forebear best {out.logbooks.get(f'{NEW_REGION}-history', '')} --json")
    lines.append(f"demo took {out.seconds:.0f} s")
    return lines


def main(folder: Path, quiet: bool = False, plan: Plan | None = None) -> int:
    """Run the demo; the exit status (0 ok, 1 nothing scored, 2 cannot run)."""
    plan = plan or Plan()
    if importlib.util.find_spec("sklearn") is None:
        _say("forebear demo: needs scikit-learn for its models; pip install 'forebear[dev]' or pip install scikit-learn")
        return 2
    # The embedded workers start with the parent's environment; one BLAS/OpenMP thread each keeps
    # two workers from fighting over two cores.
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    try:
        out = run_demo(Path(folder), plan, quiet=quiet)
    except FileExistsError as exc:
        _say(f"forebear demo: {exc}")
        return 2
    except RuntimeError as exc:
        _say(f"forebear demo: {exc}")
        return 1
    for line in summary(out, plan):
        _say(line)
    return 0
