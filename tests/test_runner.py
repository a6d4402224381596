"""The runner without Dask: every attempt in a child process, scores, failures, logs, timeouts."""

from __future__ import annotations

import json
import os
import stat
import time
from pathlib import Path

import pytest

from forebear.cluster import runner
from forebear.cluster.runner import AttemptTask, run_attempt
from forebear.cluster.scoring import BadScore, score_of, score_of_stdout
from forebear.records.logbook import Logbook, fold


def task(call: str | None = None, **kw: object) -> AttemptTask:
    base: dict[str, object] = {"search": "t", "trial": 3, "attempt": 1, "config": {"x": 0.1, "y": 0.2}, "metric": "loss", "call": call}
    base.update(kw)
    return AttemptTask(**base)  # type: ignore[arg-type]


def test_scores_a_number_and_a_dict() -> None:
    r = run_attempt(task("objectives:quadratic"))
    assert r.outcome == "scored"
    assert r.records[-1]["score"] == pytest.approx((0.1 - 0.3) ** 2 + (0.2 + 0.2) ** 2)
    r = run_attempt(task("objectives:quadratic_metrics"))
    assert r.outcome == "scored"
    assert set(r.records[-1]["metrics"]) == {"loss", "accuracy", "note"}


@pytest.mark.parametrize(
    ("call", "reason"),
    [
        ("objectives:crash", "objective raised ValueError: depth 0.1 is not supported"),
        ("objectives:segfault", "killed by SIGSEGV"),
        ("objectives:hard_exit", "exited with status 3 before returning a result"),
        ("objectives:out_of_memory", "objective raised MemoryError"),
        ("objectives:nan", "metric 'loss' is NaN"),
        ("objectives:infinite", "metric 'loss' is +inf"),
        ("objectives:text", "metric 'loss' is str '0.5 maybe', not a number"),
        ("objectives:wrong_metric", "has no metric 'loss' (keys: val_accuracy)"),
        ("no_such_module_here:f", "cannot import objective no_such_module_here:f: ModuleNotFoundError"),
    ],
)
def test_failures_are_contained_and_named(call: str, reason: str) -> None:
    r = run_attempt(task(call))
    assert r.outcome == "failed"
    assert reason in (r.error or "")
    assert r.records[-1]["kind"] == "failed" and r.records[-1]["retryable"] is False
    # The process that ran the attempt is still here and serves the next one.
    assert run_attempt(task("objectives:quadratic")).outcome == "scored"


def test_log_tail_in_error() -> None:
    r = run_attempt(task("objectives:crash"))
    assert "about to fail" in (r.error or "") and "stderr line before the error" in (r.error or "")
    assert r.log_text is not None and "Traceback" in r.log_text


def test_timeout_kills_the_process_group() -> None:
    t0 = time.monotonic()
    r = run_attempt(task("objectives:hang", timeout=1.0))
    assert r.outcome == "timeout"
    assert "timed out after 1 s" in (r.error or "")
    pid = r.records[0]["pid"]
    assert time.monotonic() - t0 < 30
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)


def test_config_in_environment_and_file() -> None:
    assert run_attempt(task("objectives:env_config")).outcome == "scored"


def test_command_argv_substitution_never_a_shell(tmp_path: Path) -> None:
    script = "import json,sys; print('progress'); print(json.dumps({'loss': float(sys.argv[1]), 'arg': sys.argv[2]}))"
    r = run_attempt(task(command=("python", "-c", script, "{x}", "{y}; rm -rf {x}"), cwd=str(tmp_path)))
    assert r.outcome == "scored", r.error
    assert r.records[-1]["score"] == pytest.approx(0.1)
    assert r.records[-1]["metrics"]["arg"] == "0.2; rm -rf 0.1"  # one argv item, not a command line


@pytest.mark.parametrize(
    ("script", "reason"),
    [
        ("print('nan')", "metric 'loss' is NaN"),
        ("pass", "stdout was empty"),
        ("print('done training')", "the last stdout line is not a number or JSON: 'done training'"),
        ("import sys; print(0.5); sys.exit(4)", "the command exited with status 4"),
        ("import sys, os; sys.stdout.buffer.write(b'\\xff\\xfe\\n')", "not a number or JSON"),
    ],
)
def test_command_failures(script: str, reason: str) -> None:
    r = run_attempt(task(command=("python", "-c", script)))
    assert r.outcome == "failed"
    assert reason in (r.error or "")


def test_command_config_env() -> None:
    script = "import json,os; c=json.load(open(os.environ['FOREBEAR_CONFIG_FILE'])); assert c == json.loads(os.environ['FOREBEAR_CONFIG']); print(c['x'])"
    r = run_attempt(task(command=("python", "-c", script)))
    assert r.outcome == "scored" and r.records[-1]["score"] == pytest.approx(0.1)


def test_writes_records_and_private_logs_when_the_logbook_is_reachable(tmp_path: Path) -> None:
    logbook = tmp_path / "runs" / "s.jsonl"
    logs = tmp_path / "runs" / "s.logs"
    logs.mkdir(parents=True, mode=0o700)
    (logs / runner.PROBE_NAME).write_text("token-1")
    j = Logbook(logbook)
    j.append({"v": 1, "at": 0, "kind": "proposed", "trial": 3, "round": 0, "config": {"x": 0.1}})
    r = run_attempt(task("objectives:crash", logbook=str(logbook), logs=str(logs), token="token-1"))
    assert r.written
    kinds = [rec["kind"] for rec in j.records()]
    assert kinds == ["proposed", "started", "failed"]
    log = logs / "trial-00003-attempt-1.log"
    assert "Traceback" in log.read_text()
    assert stat.S_IMODE(log.stat().st_mode) == 0o600
    assert stat.S_IMODE(logs.stat().st_mode) == 0o700
    assert fold(j.records()).trials[3].state == "failed"


def test_returns_records_when_the_token_does_not_match(tmp_path: Path) -> None:
    logs = tmp_path / "logs"
    logs.mkdir()
    (logs / runner.PROBE_NAME).write_text("another controller")
    r = run_attempt(task("objectives:quadratic", logbook=str(tmp_path / "j.jsonl"), logs=str(logs), token="mine"))
    assert not r.written and [x["kind"] for x in r.records] == ["started", "scored"]
    assert not (tmp_path / "j.jsonl").exists()


def test_fork_server_keeps_the_objective_imported() -> None:
    run_attempt(task("objectives:quadratic"))  # warm the server
    t0 = time.monotonic()
    for _ in range(5):
        assert run_attempt(task("objectives:quadratic")).outcome == "scored"
    per = (time.monotonic() - t0) / 5
    # A fresh interpreter costs well over 100 ms here; a fork from the warm server a few ms.
    assert per < 0.5, f"{per * 1000:.0f} ms per attempt"


def test_score_parsing() -> None:
    assert score_of(2, "m") == (2.0, {"m": 2.0})
    assert score_of({"m": 1.5, "n": "x", "bad": [1]}, "m") == (1.5, {"m": 1.5, "n": "x"})
    assert score_of_stdout("a\n{\"m\": 3}\n\n", "m")[0] == 3.0
    for bad in (True, None, "1", float("nan"), {"n": 1}):
        with pytest.raises(BadScore):
            score_of(bad, "m")
    assert json.loads(json.dumps(score_of({"m": 1}, "m")[1])) == {"m": 1.0}
