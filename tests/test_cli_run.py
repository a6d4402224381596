"""The command line as users run it: ``run --json``, ``--extend``, ``--version``, ``--debug``,
``check`` for every history and cluster kind, and each ``bench`` subcommand's CLI form."""

from __future__ import annotations

import importlib.metadata
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import tomllib
import yaml
from click.testing import CliRunner

from forebear.face.cli import main
from forebear.records.logbook import Logbook, record

from .conftest import LoopbackCluster, child_env

ROOT = Path(__file__).resolve().parents[1]


def _cli(*args: str) -> tuple[int, str, str]:
    res = CliRunner().invoke(main, list(args))
    return res.exit_code, res.stdout, res.stderr


def _spec_file(tmp: Path, cluster: LoopbackCluster, trials: int = 3) -> Path:
    spec = {
        "name": "cli-run",
        "objective": {"call": "objectives:quadratic", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": trials, "batch": 2, "concurrency": 2},
        "cluster": {"address": cluster.address},
        "logbook": "runs/cli-run.jsonl",  # relative: resolved against the spec's folder
        "seed": 4,
    }
    path = tmp / "search.yaml"
    path.write_text(yaml.safe_dump(spec))
    return path


def test_run_json_then_extend(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    path = _spec_file(tmp_path, shared_loopback, trials=3)
    code, out, err = _cli("run", str(path), "--json", "-q")
    assert code == 0, err
    data = json.loads(out)
    # The objective's sense as the spec states it, and no separate metric or direction field.
    assert data["minimize"] == "loss" and "metric" not in data and "direction" not in data and "maximize" not in data
    assert data["closed"] == "budget" and data["counts"]["scored"] == 3 and len(data["trials"]) == 3
    assert data["logbook"] == str(tmp_path / "runs" / "cli-run.jsonl")
    scores = [t["score"] for t in data["trials"]]
    assert data["best"]["score"] == min(scores)
    # The JSON agrees with the logbook itself.
    table = Logbook(tmp_path / "runs" / "cli-run.jsonl").fold()
    assert data["best"]["trial"] == table.best().trial and data["best"]["config"] == table.best().config

    # A larger budget is refused without --extend (exit 2, one line naming the change) ...
    path.write_text(path.read_text().replace("trials: 3", "trials: 5"))
    code, out, err = _cli("run", str(path), "-q")
    assert code == 2 and out == ""
    assert "budget.trials: 3 -> 5" in err and "--extend" in err and "Traceback" not in err
    # ... and with it the search resumes to the new budget, keeping the first three trials.
    code, out, err = _cli("run", str(path), "--extend", "--json", "-q")
    assert code == 0, err
    again = json.loads(out)
    assert again["counts"]["scored"] == 5
    assert [t["config"] for t in again["trials"][:3]] == [t["config"] for t in data["trials"]]


def test_version_is_the_installed_package_version() -> None:
    code, out, _ = _cli("--version")
    version = importlib.metadata.version("forebear")
    assert code == 0 and version in out
    assert tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"] == version


def test_debug_shows_the_traceback_that_the_one_line_error_hides(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "x.jsonl")
    j.append(record("search", name="d", spec_hash="h", space={}, objective={"minimize": "loss"}, seed=0))
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    target = str(blocker / "out.csv")  # a path below a file: the OS refuses to create it
    argv = [sys.executable, "-m", "forebear"]
    plain = subprocess.run([*argv, "export", str(j.path), "--csv", target], capture_output=True, text=True, timeout=120, env=child_env())
    assert plain.returncode == 2
    lines = plain.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("forebear: NotADirectoryError:"), plain.stderr
    debug = subprocess.run([*argv, "--debug", "export", str(j.path), "--csv", target], capture_output=True, text=True, timeout=120, env=child_env())
    assert debug.returncode != 0
    assert "Traceback (most recent call last)" in debug.stderr and "NotADirectoryError" in debug.stderr


BASE = """\
name: check-kinds
objective: {call: m:f, minimize: loss}
space: {x: {float: [0, 1]}}
budget: {trials: 4, batch: 2, concurrency: 2}
"""


@pytest.mark.parametrize(
    ("extra", "lines"),
    [
        ("", ["history    0 sources (cold start)", "cluster    local"]),
        ("history: past/*.jsonl\n", ["history    1 source", "cluster    local"]),
        ("history:\n  - past/*.jsonl\n  - {csv: past/results.csv, task: store, score: loss}\n", ["history    2 sources"]),
        ("history: {logbook: 'past/store-*.jsonl'}\n", ["history    1 source"]),
        ("cluster: {local: {workers: 3, threads: 2}}\n", ["cluster    local"]),
        ("cluster: {address: 'tcp://127.0.0.1:8786'}\n", ["cluster    address tcp://127.0.0.1:8786"]),
        ("cluster: {address: 'tcp://10.0.0.5:8786'}\n", ["cluster    address tcp://10.0.0.5:8786"]),
        ("cluster: {slurm: {jobs: 2, cores: 4, memory: 16GB, walltime: '01:00:00'}}\n", ["cluster    slurm"]),
        ("cluster: {pbs: {jobs: 1, cores: 2, memory: 8GB}}\n", ["cluster    pbs"]),
    ],
)
def test_check_reports_history_and_cluster_kinds(tmp_path: Path, extra: str, lines: list[str]) -> None:
    path = tmp_path / "s.yaml"
    path.write_text(BASE + extra)
    code, out, err = _cli("check", str(path))
    assert code == 0 and out == "", err
    for line in lines:
        assert line in [x.strip() for x in err.splitlines()], (line, err)
    assert f"logbook    {tmp_path.resolve()}" in err  # the default logbook, beside the spec


# -- bench subcommands: the CLI form of each, at its smallest size ----------------------------
# Sizes: quality has --smoke, faults --short, stopping --families/--runs/--trials; logbook,
# proposal and overhead have no smaller size. Measured on the shared 2-core machine (load average
# 8 to 14): logbook 52 s, quality --smoke 100 s, stopping mlp at 1 run of 4 trials 42 s; proposal,
# overhead and faults --short take minutes. Those are slow; the default suite tests their
# scenarios in tests/test_bench_quality.py, tests/test_faults.py and tests/test_load.py, and runs
# stopping's analytic family from the command line (about 3 s).


def _bench(*args: str, timeout: int) -> dict[str, Any]:
    res = subprocess.run([sys.executable, "-m", "forebear", "bench", *args, "--json"], capture_output=True, text=True,
                         timeout=timeout, env=child_env())
    assert res.returncode == 0, res.stderr[-3000:]
    return json.loads(res.stdout)


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_bench_logbook_cli() -> None:
    fig = _bench("logbook", timeout=580)
    assert fig["lost_records"] == 0 and fig["records_folded"] == 100_000
    assert fig["fold_seconds_1e5"] > 0 and fig["appends_per_second_1_writer"] > 0 and fig["appends_per_second_8_writers"] > 0


@pytest.mark.slow
@pytest.mark.timeout(900)
def test_bench_quality_smoke_cli(tmp_path: Path) -> None:
    res = subprocess.run([sys.executable, "-m", "forebear", "bench", "quality", "--smoke", "--json", "--out", str(tmp_path / "q")],
                         capture_output=True, text=True, timeout=880, env=child_env())
    assert res.returncode == 0, res.stderr[-3000:]
    fig = json.loads(res.stdout)
    assert fig["trials"] == 15 and fig["runs"] == 6
    assert set(fig["mean_regret"]) >= {"random", "gp", "forebear-full"}
    assert all(0.0 <= v <= 1.0 for v in fig["mean_regret"].values())
    assert (tmp_path / "q" / "results.md").exists()


@pytest.mark.slow
@pytest.mark.timeout(900)
def test_bench_proposal_cli() -> None:
    fig = _bench("proposal", timeout=880)
    # The cached state loads faster than meta-training made it; at 200 observations the guard may
    # hand the rounds to the plain GP (it did in every run recorded in docs/benchmarks.md).
    assert 0 < fig["cached_load_seconds"] < fig["meta_train_seconds"] and fig["history_check_seconds"] > 0
    assert fig["meta_train_steps"] > 0 and set(fig["proposal_models"].split(",")) <= {"gp", "deep-kernel", "mix"}
    assert fig["proposal_seconds_median"] > 0 and fig["proposal_seconds_2000"] > 0


@pytest.mark.slow
@pytest.mark.timeout(1200)
def test_bench_overhead_cli() -> None:
    fig = _bench("overhead", timeout=1180)
    assert fig["lost_attempts"] == 0 and fig["failed"] == 0 and fig["trials"] == 100


@pytest.mark.slow
@pytest.mark.timeout(1800)
def test_bench_faults_short_cli() -> None:
    fig = _bench("faults", "--short", timeout=1780)
    assert fig["size"] == "short" and fig["ok"], fig


def test_bench_stopping_cli_analytic_family(tmp_path: Path) -> None:
    """``bench stopping`` as a user runs it: the options reach the benchmark (the figures are the
    library's own for the same arguments), ``--out`` writes what ``--json`` prints, and on pow3
    curves halving stops trials and saves worker time while still reaching the target."""
    from forebear.bench import stopping

    out = tmp_path / "fig.json"
    fig = _bench("stopping", "--families", "pow3", "--runs", "2", "--trials", "8", "--out", str(out), timeout=240)
    assert set(fig) == {"stopping", "pow3"}  # --families: the real-training family did not run
    assert json.loads(out.read_text()) == fig
    pow3 = fig["pow3"]
    assert (pow3["family"], pow3["runs"], pow3["trials"]) == ("pow3", 2, 8)
    for rule in ("halving", "history"):
        r = pow3[rule]
        assert r["reached"] == 2, r  # both held-out tasks reach the no-stopping search's best
        assert 0 < r["time_ratio_mean"] < 1 and r["time_ratio_mean"] <= r["time_ratio_max"] <= 1, r
        assert r["halted_mean"] > 0 and r["best_stopped_share"] == r["best_stopped_runs"] / 2, r
    # The same arguments in-process give the same figures, apart from the wall-clock seconds.
    assert _without_seconds(stopping.main(families="pow3", runs=2, trials=8)) == _without_seconds(fig)
    # A family that does not exist: exit 2 and one line naming it.
    _stopping_refused(["--families", "nope", "--runs", "1"], "forebear: ValueError: unknown family 'nope'; families: mlp, pow3")
    # --min-step and --eta reach both rules; a first rung at or past the family's last step is refused.
    fig = _bench("stopping", "--families", "pow3", "--runs", "1", "--trials", "8", "--min-step", "9", "--eta", "2", timeout=240)
    assert fig["stopping"] == {"min_step": 9, "eta": 2.0, "threshold": 0.05}
    assert _without_seconds(stopping.main(families="pow3", runs=1, trials=8, min_step=9, eta=2.0)) == _without_seconds(fig)
    _stopping_refused(["--families", "pow3", "--min-step", "27"],
                      "forebear: ValueError: min_step must be below the pow3 family's 27 steps, got 27")


def _without_seconds(fig: dict[str, Any]) -> dict[str, Any]:
    """A bench stopping result without its families' wall-clock seconds (the rest is deterministic)."""
    return {k: {kk: vv for kk, vv in v.items() if kk != "seconds"} if isinstance(v, dict) and "seconds" in v else v
            for k, v in fig.items()}


def _stopping_refused(args: list[str], line: str) -> None:
    """``forebear bench stopping ARGS`` exits 2 with nothing on stdout and ``line`` alone on stderr."""
    res = subprocess.run([sys.executable, "-m", "forebear", "bench", "stopping", *args],
                         capture_output=True, text=True, timeout=120, env=child_env())
    assert res.returncode == 2 and res.stdout == ""
    assert res.stderr.strip().splitlines() == [line]


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_bench_stopping_cli_real_training_family() -> None:
    fig = _bench("stopping", "--families", "mlp", "--runs", "1", "--trials", "4", timeout=580)
    mlp = fig["mlp"]
    assert set(fig) == {"stopping", "mlp"} and (mlp["runs"], mlp["trials"], mlp["steps"]) == (1, 4, 27)
    for rule in ("halving", "history"):
        r = mlp[rule]
        # One run: its mean is its maximum, and the counts stay within that run's trials.
        assert r["time_ratio_mean"] == r["time_ratio_max"] > 0 and r["reached"] in (0, 1), r
        assert r["best_stopped_runs"] in (0, 1) and r["halted_mean"] >= 0, r
