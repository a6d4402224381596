"""The controller against a real loopback cluster: budgets, concurrency, failures, resume checks."""

from __future__ import annotations

import io
import time
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import forebear
from forebear.core.spec import load
from forebear.face.progress import Progress
from forebear.loop.controller import Controller
from forebear.loop.resume import SpecChanged, spec_changes
from forebear.records.logbook import Logbook, LogbookBusy

from .conftest import LoopbackCluster


def make_spec(tmp: Path, cluster: LoopbackCluster, call: str = "objectives:quadratic", **budget: Any) -> dict[str, Any]:
    b = {"trials": 6, "batch": 2, "concurrency": 2, "retries": 1}
    b.update(budget)
    return {
        "name": "ctl",
        "objective": {"call": call, "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": b,
        "cluster": {"address": cluster.address},
        "logbook": str(tmp / "runs" / "ctl.jsonl"),
        "seed": 3,
    }


def kinds_by_trial(logbook: Path) -> dict[int, list[str]]:
    out: dict[int, list[str]] = {}
    for rec in Logbook(logbook).records():
        if "trial" in rec:
            out.setdefault(rec["trial"], []).append(rec["kind"])
    return out


def test_search_completes_and_records_everything(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, trials=5)
    result = forebear.run(spec)
    assert result.closed == "budget"
    assert result.counts["scored"] == 5 and len(result.trials) == 5
    table = forebear.load(tmp_path / "runs" / "ctl.jsonl")
    assert table.best() is not None and table.best().trial == result.best.trial
    assert result.best.score == min(t.score for t in result.trials)
    for kinds in kinds_by_trial(tmp_path / "runs" / "ctl.jsonl").values():
        assert kinds == ["proposed", "started", "scored"]
    assert table.closed is not None and table.closed["reason"] == "budget"
    # Rerunning a finished search does nothing and says so.
    again = forebear.run(spec)
    assert again.counts == result.counts


def test_concurrency_never_exceeded(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    counter = shared_loopback.folder / "counter"
    spec = make_spec(tmp_path, shared_loopback, call="objectives:counted", trials=6, concurrency=1, batch=1)
    result = forebear.run(spec)
    assert result.counts["scored"] == 6
    assert int((counter / "peak").read_text()) == 1
    assert int((counter / "running").read_text()) == 0


def test_concurrency_three_runs_three_at_once_and_no_more(tmp_path: Path, loopback_factory: Any) -> None:
    # Four workers, so the limit and not the cluster's size holds the count down; trials of 0.8
    # to 1 s overlap, so three really run at once. The objective counts the attempts in flight on
    # the workers under a file lock (tests/objectives.py:counted).
    cluster = loopback_factory(workers=4)
    counter = cluster.folder / "counter"
    spec = make_spec(tmp_path, cluster, call="objectives:counted", trials=7, concurrency=3, batch=3)
    spec["space"] = {"x": {"float": [0.0, 1.0]}, "seconds": {"float": [0.8, 1.0]}}
    result = forebear.run(spec)
    assert result.counts["scored"] == 7
    assert int((counter / "peak").read_text()) == 3
    assert int((counter / "running").read_text()) == 0
    # The logbook agrees: never more than three attempts between `started` and `scored`.
    recs = Logbook(tmp_path / "runs" / "ctl.jsonl").records()
    events = sorted([(r["at"], +1) for r in recs if r["kind"] == "started"] + [(r["at"], -1) for r in recs if r["kind"] == "scored"])
    level = peak = 0
    for _, step in events:
        level += step
        peak = max(peak, level)
    assert peak <= 3


def test_objective_errors_fail_without_retry(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, call="objectives:crash", trials=2)
    result = forebear.run(spec)
    assert result.best is None and result.counts["failed"] == 2
    for kinds in kinds_by_trial(tmp_path / "runs" / "ctl.jsonl").values():
        assert kinds == ["proposed", "started", "failed"]
    assert "ValueError" in (result.trials[0].error or "")


def test_retry_errors_retries_then_fails(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, call="objectives:crash", trials=1, retries=2, retry_errors=True)
    result = forebear.run(spec)
    assert result.counts["failed"] == 1
    kinds = kinds_by_trial(tmp_path / "runs" / "ctl.jsonl")[0]
    assert kinds == ["proposed"] + ["started", "failed"] * 3
    recs = [r for r in Logbook(tmp_path / "runs" / "ctl.jsonl").records() if r["kind"] == "failed"]
    assert [r["retryable"] for r in recs] == [True, True, False]


def test_maximize_and_dict_metric(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, call="objectives:quadratic_metrics", trials=4)
    spec["objective"] = {"call": "objectives:quadratic_metrics", "maximize": "accuracy"}
    result = forebear.run(spec)
    assert result.best.score == max(t.score for t in result.trials)
    assert "loss" in result.best.metrics


def test_changed_spec_is_refused_with_the_changes(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, trials=2)
    forebear.run(spec)
    changed = {**spec, "seed": 4, "space": {"x": {"float": [0.0, 2.0]}, "z": {"int": [1, 3]}}}
    with pytest.raises(SpecChanged) as err:
        forebear.run(changed)
    text = str(err.value)
    assert "seed: 3 -> 4" in text and "space.x" in text and "space.y: removed" in text and "space.z: added" in text
    bigger = {**spec, "budget": {**spec["budget"], "trials": 4}}
    with pytest.raises(SpecChanged, match="give --extend"):
        forebear.run(bigger)
    result = forebear.run(bigger, extend=True)
    assert result.counts["scored"] == 4
    # The extended budget is now the logbook's: a plain rerun is accepted.
    assert forebear.run(bigger).counts["scored"] == 4


def test_spec_changes_rules(tmp_path: Path) -> None:
    base = {"objective": {"call": "m:f", "minimize": "loss"}, "space": {"x": {"float": [0, 1]}}, "budget": {"trials": 5, "batch": 2, "concurrency": 2}}
    s = load(base, base_dir=tmp_path)
    from forebear.loop.resume import search_record

    header = search_record(s)
    assert spec_changes(header, s, extend=False) == ([], False)
    smaller = load({**base, "budget": {"trials": 3, "batch": 2, "concurrency": 2}}, base_dir=tmp_path)
    changes, _ = spec_changes(header, smaller, extend=True)
    assert changes == ["budget.trials: 5 -> 3"]
    other = load({**base, "budget": {"trials": 5, "batch": 2, "concurrency": 1}}, base_dir=tmp_path)
    assert spec_changes(header, other, extend=True)[0] == ["budget.concurrency: 2 -> 1"]


def test_second_controller_is_refused(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = load(make_spec(tmp_path, shared_loopback, trials=1))
    from forebear.records.logbook import ControllerLock

    with ControllerLock(Logbook(spec.logbook)):
        with pytest.raises(LogbookBusy, match="is driven by pid"):
            Controller(spec).run()


def test_missing_objective_module_fails_every_trial_clearly(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, call="not_installed_anywhere:train", trials=2)
    result = forebear.run(spec)
    assert result.counts["failed"] == 2
    assert "cannot import objective not_installed_anywhere:train" in (result.trials[0].error or "")


def test_unsatisfiable_resources_fail_fast(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = {**make_spec(tmp_path, shared_loopback, trials=1), "resources": {"GPU": 1}}
    with pytest.raises(ValueError, match=r"resources \{GPU: 1\}: no worker"):
        forebear.run(spec)
    assert not (tmp_path / "runs" / "ctl.jsonl").exists()  # nothing written


def test_plain_progress_lines() -> None:
    out = io.StringIO()
    p = Progress(4, metric="loss", stream=out)
    p.update(scored=1, failed=0, running=2, best=0.5, best_trial=0, event="trial 0 scored 0.5")
    p.update(scored=1, failed=1, running=1, best=0.5, best_trial=0, event="trial 1 failed: boom")
    lines = out.getvalue().splitlines()
    assert len(lines) == 2
    assert "1/4 finished: scored 1 failed 0 running 2 | best loss 0.5 (trial 0)" in lines[0]
    assert "remaining ~" in lines[1] and "failed 1" in lines[1]
    quiet = io.StringIO()
    Progress(4, metric="loss", stream=quiet, quiet=True).update(scored=1, failed=0, running=0, best=1.0, best_trial=0, event="x")
    assert quiet.getvalue() == ""


def test_each_trial_terminal_once(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, call="objectives:sleep_from_x", trials=6, concurrency=2, batch=3)
    forebear.run(spec)
    terminal = Counter(r["trial"] for r in Logbook(tmp_path / "runs" / "ctl.jsonl").records() if r["kind"] in ("scored", "failed"))
    assert sorted(terminal) == list(range(6)) and set(terminal.values()) == {1}


def _launch(tmp: Path, cluster: LoopbackCluster, *args: str, trials: int = 6) -> tuple[Any, Path]:
    import subprocess
    import sys

    import yaml

    from .conftest import child_env

    spec = make_spec(tmp, cluster, call="objectives:sleepy", trials=trials, concurrency=2, batch=2)
    spec["space"] = {"x": {"float": [0.0, 1.0]}, "seconds": {"float": [2.0, 2.5]}}
    path = tmp / "search.yaml"
    path.write_text(yaml.safe_dump(spec))
    proc = subprocess.Popen([sys.executable, "-m", "forebear", "run", str(path), *args], env=child_env(),
                            start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    logbook = Path(spec["logbook"])
    deadline = time.monotonic() + 90
    while not (logbook.exists() and any(r["kind"] == "started" for r in Logbook(logbook).records())):
        assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
        assert time.monotonic() < deadline, "no attempt started"
        time.sleep(0.05)
    return proc, logbook


@pytest.mark.parametrize("cancel", [False, pytest.param(True, marks=pytest.mark.slow)])
def test_first_ctrl_c_stops_proposing(tmp_path: Path, shared_loopback: LoopbackCluster, cancel: bool) -> None:
    import os
    import signal

    from .conftest import reap

    proc, logbook = _launch(tmp_path, shared_loopback, *(["--cancel-running"] if cancel else []))
    try:
        os.kill(proc.pid, signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        reap(proc)
    table = Logbook(logbook).fold()
    assert table.closed is not None and table.closed["reason"] == "interrupted"
    # Two attempts ran; at most one more round (batch 2) was proposed ahead and stays queued.
    assert len(table) <= 2 + 2
    assert sum(1 for t in table if t.attempts) == 2
    lost = [r for r in Logbook(logbook).records() if r["kind"] == "lost"]
    if cancel:
        assert "cancelling running attempts" in err
        assert {r["reason"] for r in lost} == {"interrupted"} and table.counts()["scored"] == 0
        assert proc.returncode == 1  # nothing scored
    else:
        assert "waiting for 2 running attempt(s)" in err
        assert not lost and table.counts()["scored"] == 2
        assert proc.returncode == 0


@pytest.mark.slow  # a third CLI controller process; the first Ctrl-C test covers the handler
def test_second_ctrl_c_stops_at_once(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    import os
    import signal

    from .conftest import reap

    proc, logbook = _launch(tmp_path, shared_loopback)
    try:
        os.kill(proc.pid, signal.SIGINT)
        time.sleep(0.3)
        t0 = time.monotonic()
        os.kill(proc.pid, signal.SIGINT)
        proc.communicate(timeout=60)
        assert time.monotonic() - t0 < 2.0 + 10  # well before the 2 s attempts plus teardown would end
    finally:
        reap(proc)
    table = Logbook(logbook).fold()
    assert table.closed is not None and table.closed["reason"] == "interrupted"


def test_without_a_shared_filesystem_the_controller_writes(tmp_path: Path, shared_loopback: LoopbackCluster, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    import forebear.loop.opening as opening_mod

    # The workers look for the token at runner.PROBE_NAME; writing it elsewhere makes the logbook's
    # folder look unreachable to them, as on a machine without the shared filesystem.
    monkeypatch.setattr(opening_mod, "PROBE_NAME", ".probe-not-where-workers-look")
    spec = make_spec(tmp_path, shared_loopback, call="objectives:crash", trials=2)
    result = forebear.run(spec, quiet=False)
    assert result.counts["failed"] == 2
    err = capsys.readouterr().err
    assert err.count("no shared filesystem") == 1
    for kinds in kinds_by_trial(tmp_path / "runs" / "ctl.jsonl").values():
        assert kinds == ["proposed", "started", "failed"]
    log = tmp_path / "runs" / "ctl.logs" / "trial-00000-attempt-1.log"
    assert "Traceback" in log.read_text() and oct(log.stat().st_mode & 0o777) == "0o600"


def test_logbook_write_failure_stops_and_keeps_what_was_recorded(tmp_path: Path, shared_loopback: LoopbackCluster, monkeypatch: pytest.MonkeyPatch) -> None:
    import errno

    import forebear.loop.controller as controller_mod
    from forebear.records.logbook import LogbookError

    real = controller_mod.Logbook.append_many
    calls = {"n": 0}

    def failing(self: Logbook, recs: Any) -> None:
        calls["n"] += 1
        if calls["n"] > 4:  # the search record, a round or two, then the disk "fills up"
            raise LogbookError(errno.ENOSPC, f"logbook {self.path}: write failed: No space left on device")
        real(self, recs)

    monkeypatch.setattr(controller_mod.Logbook, "append_many", failing)
    spec = make_spec(tmp_path, shared_loopback, call="objectives:sleep_from_x", trials=20, concurrency=2, batch=1)
    with pytest.raises(LogbookError, match="No space left on device"):
        forebear.run(spec)
    monkeypatch.setattr(controller_mod.Logbook, "append_many", real)
    table = forebear.load(tmp_path / "runs" / "ctl.jsonl")
    assert table.header is not None and len(table) >= 1 and table.closed is None
    # Resuming after the disk has room again completes the search from what was recorded.
    assert forebear.run(spec).counts["scored"] == 20 - table.counts()["failed"]


def test_a_history_that_disagrees_with_itself_is_not_used_and_the_run_says_so(tmp_path: Path, shared_loopback: LoopbackCluster, capsys: pytest.CaptureFixture[str]) -> None:
    # Four earlier tasks whose scores are independent noise (invented data): they cannot rank
    # configurations alike, so the search runs as a cold one (Latin-hypercube design, plain GP).
    rng = np.random.default_rng(0)
    lines = ["task,x,y,loss"] + [f"t{j},{rng.random():.4f},{rng.uniform(-1, 1):.4f},{rng.random():.4f}" for j in range(4) for _ in range(25)]
    (tmp_path / "past.csv").write_text("\n".join(lines) + "\n")
    spec = make_spec(tmp_path, shared_loopback, trials=5, batch=1, concurrency=1)
    spec["history"] = [{"csv": str(tmp_path / "past.csv"), "task": "task", "score": "loss"}]
    result = forebear.run(spec, quiet=False)
    assert result.counts["scored"] == 5
    err = capsys.readouterr().err
    assert "history: 4 earlier search(es)" in err and "do not rank configurations alike" in err and "searching without history" in err
    proposed = [r for r in Logbook(tmp_path / "runs" / "ctl.jsonl").records() if r["kind"] == "proposed"]
    assert [r["source"] for r in proposed[:3]] == ["initial"] * 3  # min(dim + 1, 10) design points
    assert {r["model"] for r in proposed if r["source"] == "model"} <= {"gp"}
