"""examples/: every scenario's spec, objective and history are valid, and each runs end to end.

The default tests run the command-line example with a smaller budget (the cluster example
runs in tests/test_deploy.py against deploy/local); the full runs are marked slow.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

import forebear
from forebear.cluster.child import score_of_stdout
from forebear.core import spec as spec_mod
from forebear.records import history as history_mod
from forebear.records.logbook import Logbook

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"
FOLDERS = ("churn_history", "script_csv_history", "cluster_gpu")


def _import_from(folder: Path, module: str):  # noqa: ANN202 - returns a module
    import importlib.util

    spec = importlib.util.spec_from_file_location(f"example_{folder.name}_{module}", folder / f"{module}.py")
    mod = importlib.util.module_from_spec(spec)
    assert spec.loader is not None
    spec.loader.exec_module(mod)
    return mod


@pytest.mark.parametrize("name", FOLDERS)
def test_example_has_spec_readme_and_script(name: str) -> None:
    folder = EXAMPLES / name
    readme = (folder / "README.md").read_text()
    assert "## What the output looks like" in readme and "```json" in readme
    run_sh = folder / "run.sh"
    assert os.access(run_sh, os.X_OK)
    assert subprocess.run(["bash", "-n", str(run_sh)]).returncode == 0
    specs = sorted(folder.glob("*.yaml"))
    assert specs
    for path in specs:
        s = spec_mod.load(path)
        assert s.budget.trials <= 20, f"{path}: an example should stay short"
        assert s.logbook.is_relative_to(folder / "runs"), f"{path}: the logbook belongs in the example's runs/"
        assert f"forebear run {path.name}" in run_sh.read_text() or path.name in readme


def test_command_objective_prints_a_score_forebear_reads() -> None:
    folder = EXAMPLES / "script_csv_history"
    s = spec_mod.load(folder / "search.yaml")
    config = {"max_features": "log2", "min_samples_leaf": 5, "max_depth": 8, "n_estimators": 20}
    assert s.space.contains(config)
    # The spec's own argv with the placeholders filled the way the runner fills them.
    argv = [a.format(**config) if "{" in a else a for a in s.objective.command]
    argv[0] = sys.executable
    res = subprocess.run(argv, cwd=folder, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    score, metrics = score_of_stdout(res.stdout, s.objective.metric)
    assert 1.0 < score < 20.0 and set(metrics) == {"val_mae", "val_r2"}
    bad = subprocess.run([*argv[:4], "--max-features", "half", *argv[6:]], cwd=folder, capture_output=True, text=True, timeout=60)
    assert bad.returncode != 0 and "invalid choice" in bad.stderr


def test_csv_history_aligns_to_the_space_without_warnings() -> None:
    s = spec_mod.load(EXAMPLES / "script_csv_history" / "search.yaml")
    hist = history_mod.load(s.history, s.space, s.objective.sense)
    assert not hist.warnings, hist.warnings
    assert sorted(t.name for t in hist.tasks) == ["W1", "W2", "W3"]
    assert all(len(t.y) == 12 and t.X.shape == (12, s.space.dim) for t in hist.tasks)


def test_python_objectives_train_real_models() -> None:
    churn = _import_from(EXAMPLES / "churn_history", "churn")
    cfg = {"hidden_units": 16, "alpha": 1e-3, "learning_rate_init": 3e-3}
    a, b = churn.evaluate_consumer(cfg), churn.evaluate_consumer(cfg)
    assert a == b and 0.55 < a["val_auc"] < 0.95
    assert churn.evaluate_smb(cfg) != a
    returns = _import_from(EXAMPLES / "cluster_gpu", "returns_model")
    out = returns.evaluate({"lr": 3e-3, "hidden": 16, "dropout": 0.1, "weight_decay": 1e-4})
    assert math.isfinite(out["val_logloss"]) and 0.4 < out["val_accuracy"] <= 1.0


def _smaller(path: Path, tmp: Path, trials: int, **changes: object) -> spec_mod.Spec:
    s = spec_mod.load(path)
    budget = dataclasses.replace(s.budget, trials=trials, batch=min(s.budget.batch, 2), concurrency=2)
    return dataclasses.replace(s, budget=budget, logbook=tmp / "runs" / s.logbook.name, **changes)


def test_command_example_end_to_end(tmp_path: Path) -> None:
    import forebear.face.api as controller

    s = _smaller(EXAMPLES / "script_csv_history" / "search.yaml", tmp_path, trials=4)
    result = controller.run(s)
    assert result.closed == "budget"
    scored = [t for t in result.trials if t.state == "scored"]
    assert len(scored) == 4, [t.error for t in result.trials]
    assert all(t.config["max_features"] in ("sqrt", "log2", "all") for t in scored)
    assert {t.source for t in scored} >= {"initial"}
    logs = list((tmp_path / "runs" / "delivery-w4.logs").glob("trial-*"))
    assert logs, "the attempts' output was not kept"


@pytest.mark.slow
def test_churn_example_with_history_end_to_end(tmp_path: Path) -> None:
    import forebear.face.api as controller

    folder = EXAMPLES / "churn_history"
    for name in ("earlier-smb.yaml", "earlier-enterprise.yaml"):
        assert controller.run(_smaller(folder / name, tmp_path, trials=4)).closed == "budget"
    hist = (spec_mod.HistorySource(logbook=str(tmp_path / "runs" / "churn-*.jsonl")),)
    # Six trials: the first round is the warm start, the later ones come from the model.
    result = controller.run(_smaller(folder / "consumer.yaml", tmp_path, trials=6, history=hist))
    assert len([t for t in result.trials if t.state == "scored"]) == 6
    # History was used: the warm start proposed configurations that earlier searches scored ...
    earlier = [json.dumps(t.config, sort_keys=True) for name in ("churn-smb.jsonl", "churn-enterprise.jsonl")
               for t in forebear.load(tmp_path / "runs" / name) if t.state == "scored"]
    assert len(earlier) == 8
    proposed = [r for r in Logbook(result.logbook).records() if r["kind"] == "proposed"]
    initial = [r for r in proposed if r["source"] == "initial"]
    assert initial and any(json.dumps(r["config"], sort_keys=True) in earlier for r in initial), (initial, earlier)
    # ... and the model rounds were proposed by the deep kernel meta-trained on it (with under five
    # scores of its own the search has no plain GP to compare with), named in the records.
    model = [r for r in proposed if r["source"] == "model"]
    assert model and {r["model"] for r in model} == {"deep-kernel"}, model


@pytest.mark.slow
@pytest.mark.parametrize("name", FOLDERS)
def test_run_sh_in_a_copy(name: str, tmp_path: Path) -> None:
    """The full example exactly as a user runs it, in a copy so the checkout stays clean."""
    import shutil

    shutil.copytree(EXAMPLES, tmp_path / "examples", ignore=shutil.ignore_patterns("runs", "report", ".cluster"))
    shutil.copytree(ROOT / "deploy", tmp_path / "deploy")
    env = {**os.environ, "PYTHON": sys.executable, "PORT": str(_free_port())}
    if name == "cluster_gpu":
        spec = tmp_path / "examples" / name / "search.yaml"
        spec.write_text(spec.read_text().replace("tcp://127.0.0.1:8786", f"tcp://127.0.0.1:{env['PORT']}"))
    res = subprocess.run([str(tmp_path / "examples" / name / "run.sh")], capture_output=True, text=True, env=env, timeout=600)
    assert res.returncode == 0, res.stderr[-3000:]
    best = json.loads(res.stdout[res.stdout.index("{"):])
    assert best["config"] and math.isfinite(best["score"])


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]
