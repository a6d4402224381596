"""The command line: check, status, best, export, exit codes, no tracebacks."""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from forebear.face.cli import main
from forebear.records.logbook import Logbook, record

SPEC = """\
name: cli-test
objective: {call: mypkg.train:evaluate, minimize: loss}
space:
  lr: {float: [1e-4, 0.3], log: true}
  booster: {categories: [tree, linear]}
budget: {trials: 10, concurrency: 20}
"""


@pytest.fixture()
def logbook(tmp_path: Path) -> Path:
    j = Logbook(tmp_path / "runs" / "x.jsonl")
    j.append(record("search", name="cli-test", spec_hash="h", space={}, objective={"call": "m:f", "minimize": "loss"}, seed=0))
    for t, (lr, score) in enumerate([(0.01, 0.5), (0.02, 0.3), (0.03, None), (0.04, 0.4)]):
        j.append(record("proposed", trial=t, round=0, config={"lr": lr, "booster": "tree"}, source="initial", model=None, acquisition=None))
        j.append(record("started", trial=t, attempt=1, worker="w", host="h", pid=1))
        if score is None:
            j.append(record("failed", trial=t, attempt=1, error="ValueError: bad", retryable=False))
        else:
            j.append(record("scored", trial=t, attempt=1, score=score, metrics={"loss": score, "acc": 1 - score}, seconds=1.0))
    return j.path


def invoke(*args: str) -> tuple[int, str, str]:
    runner = CliRunner()
    res = runner.invoke(main, list(args))
    return res.exit_code, res.stdout, res.stderr


def test_check_ok(tmp_path: Path) -> None:
    p = tmp_path / "s.yaml"
    p.write_text(SPEC)
    code, out, err = invoke("check", str(p))
    assert code == 0, err
    assert "ok" in err and "lr" in err and "10 trials" in err
    assert "concurrency 20 is larger than budget.trials 10" in err
    assert out == ""


def test_check_errors_exit_2(tmp_path: Path) -> None:
    p = tmp_path / "s.yaml"
    p.write_text(SPEC.replace("[1e-4, 0.3]", "[0.3, 1e-4]").replace("trials: 10", "trials: 0"))
    code, _, err = invoke("check", str(p))
    assert code == 2
    assert "space.lr.float: inverted range" in err and "budget.trials: must be > 0" in err
    assert "Traceback" not in err


def test_status(logbook: Path) -> None:
    code, out, err = invoke("status", str(logbook), "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data["counts"] == {"queued": 0, "running": 0, "scored": 3, "failed": 1}
    assert data["best"]["trial"] == 1
    code, out, err = invoke("status", str(logbook))
    assert code == 0 and "best: trial 1" in err


def test_best_json(logbook: Path) -> None:
    code, out, _ = invoke("best", str(logbook), "--json")
    assert code == 0
    data = json.loads(out)
    assert data["trial"] == 1 and data["score"] == 0.3
    assert data["config"] == {"lr": 0.02, "booster": "tree"}
    assert data["minimize"] == "loss" and "metric" not in data and "sense" not in data


def test_best_nothing_scored_exit_1(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "e.jsonl")
    j.append(record("search", name="e", spec_hash="h", space={}, objective={"minimize": "loss"}, seed=0))
    j.append(record("proposed", trial=0, round=0, config={"x": 1}, source="initial", model=None, acquisition=None))
    code, _, err = invoke("best", str(j.path))
    assert code == 1 and "no trial has scored" in err


def test_export_csv(logbook: Path, tmp_path: Path) -> None:
    out_csv = tmp_path / "t.csv"
    code, _, err = invoke("export", str(logbook), "--csv", str(out_csv))
    assert code == 0, err
    rows = list(csv.DictReader(out_csv.open()))
    assert len(rows) == 4
    assert rows[1]["lr"] == "0.02" and rows[1]["metric.acc"] == "0.7"
    assert rows[2]["state"] == "failed" and "ValueError" in rows[2]["error"]


def test_missing_logbook_exit_2(tmp_path: Path) -> None:
    code, _, err = invoke("status", str(tmp_path / "nope.jsonl"))
    assert code == 2 and "does not exist" in err


def test_garbage_logbook_exit_2(tmp_path: Path) -> None:
    p = tmp_path / "g.jsonl"
    p.write_bytes(b"hello\nworld\n")
    code, _, err = invoke("best", str(p))
    assert code == 2 and "no forebear records" in err


def test_future_version_exit_2(tmp_path: Path) -> None:
    p = tmp_path / "f.jsonl"
    p.write_text(json.dumps({"v": 7, "at": 1.0, "kind": "search", "objective": {"minimize": "l"}}) + "\n")
    code, _, err = invoke("status", str(p))
    assert code == 2 and "newer than this forebear reads" in err


def test_commands_registered() -> None:
    code, _, _ = invoke("--help")
    assert code == 0
    out = CliRunner().invoke(main, ["--help"]).output
    for name in ("run", "check", "status", "best", "export", "report", "demo", "bench"):
        assert name in out


def test_python_dash_m(tmp_path: Path) -> None:
    p = tmp_path / "s.yaml"
    p.write_text(SPEC)
    res = subprocess.run([sys.executable, "-m", "forebear", "check", str(p)], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "ok" in res.stderr
