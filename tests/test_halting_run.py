"""Early stopping on a real loopback cluster: halted callables and commands, curves in the logbook."""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Any

import psutil
import pytest

import forebear
from forebear.core.spec import load
from forebear.loop.book import Book
from forebear.loop.controller import Controller
from forebear.records.logbook import Logbook

from .conftest import TESTS, LoopbackCluster
from .process_helpers import DrivenSearch

DEADLINE = 120.0


def make_spec(tmp: Path, cluster: LoopbackCluster, objective: dict[str, Any], **stopping: Any) -> dict[str, Any]:
    rule = {"rule": "halving", "steps": 8, "min_step": 2, "eta": 2}
    rule.update(stopping)
    return {
        "name": "halt",
        "objective": {**objective, "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 3, "batch": 1, "concurrency": 1, "retries": 1},
        "cluster": {"address": cluster.address},
        "logbook": str(tmp / "runs" / "halt.jsonl"),
        "stopping": rule,
    }


def steps_of(logbook: Path, trial: int, attempt: int | None = None) -> list[int]:
    return [
        r["step"]
        for r in Logbook(logbook).records()
        if r["kind"] == "step" and r["trial"] == trial and (attempt is None or r["attempt"] == attempt)
    ]


def check_halted(logbook: Path) -> None:
    table = forebear.load(logbook)
    # Trial 0 reaches rung 2 first and goes on; trials 1 and 2 are worse and only the top
    # max(1, floor(2 / 2)) = 1 of the rung goes on: both are halted there.
    assert table.trials[0].state == "scored"
    assert [table.trials[t].state for t in (1, 2)] == ["halted", "halted"]
    assert table.counts()["halted"] == 2 and table.finished == 3
    assert table.best() is not None and table.best().trial == 0
    assert [s for s, _ in table.trials[0].curve] == list(range(1, 9))
    for t in (1, 2):
        trial = table.trials[t]
        recorded = steps_of(logbook, t)
        assert recorded[:2] == [1, 2] and len(recorded) < 8, recorded
        assert trial.step == recorded[-1] and trial.score == pytest.approx(1.0 + t + 1.0 / trial.step)
    # A resumed loop hands the halted trials to the proposer with their last intermediate score,
    # as if final (measured better than leaving them out; docs/engine.md).
    book = Book.from_table(table)
    assert book.partial == {t: pytest.approx(table.trials[t].score) for t in (1, 2)}
    assert set(book.scores) == {0}


def test_a_callable_is_halted_and_cleans_up(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, {"call": "curve_objectives:curve"})
    result = forebear.run(spec)
    assert result.counts["halted"] == 2
    check_halted(tmp_path / "runs" / "halt.jsonl")
    signals = Path(shared_loopback.env["FOREBEAR_TEST_SIGNAL"])
    assert (signals / "halted-1-1").read_text() == "cleaned up"  # the objective caught forebear.Halted


def test_a_command_is_halted_with_sigterm(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, {"command": [sys.executable, str(TESTS / "curve_script.py")]})
    result = forebear.run(spec)
    assert result.counts["halted"] == 2
    check_halted(tmp_path / "runs" / "halt.jsonl")
    assert (Path(shared_loopback.env["FOREBEAR_TEST_SIGNAL"]) / "terminated-2").exists()


def test_without_a_shared_filesystem_the_controller_writes_the_curves(
    tmp_path: Path, shared_loopback: LoopbackCluster, monkeypatch: pytest.MonkeyPatch
) -> None:
    from forebear.loop import controller as controller_mod

    # The workers find no token file: they return their records, the controller writes them.
    monkeypatch.setattr(controller_mod.Controller, "_probe", lambda self: None)
    spec = make_spec(tmp_path, shared_loopback, {"call": "curve_objectives:curve"})
    forebear.run(spec)
    check_halted(tmp_path / "runs" / "halt.jsonl")
    steps = [(r["trial"], r["attempt"], r["step"]) for r in Logbook(tmp_path / "runs" / "halt.jsonl").records() if r["kind"] == "step"]
    assert len(steps) == len(set(steps)), "a step was written twice"


def test_an_objective_that_never_notes_runs_as_before(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, {"call": "objectives:quadratic"})
    result = forebear.run(spec)
    assert result.counts["scored"] == 3 and result.counts["halted"] == 0
    kinds = [r["kind"] for r in Logbook(tmp_path / "runs" / "halt.jsonl").records() if r.get("trial") == 0]
    assert kinds == ["proposed", "started", "scored"]


def test_rule_none_records_the_curves_and_halts_nothing(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = make_spec(tmp_path, shared_loopback, {"call": "curve_objectives:curve"}, rule="none")
    spec["stopping"] = {"rule": "none"}
    spec["space"]["seconds"] = {"float": [0.05, 0.1]}
    result = forebear.run(spec)
    assert result.counts["scored"] == 3
    for t in range(3):
        assert steps_of(tmp_path / "runs" / "halt.jsonl", t) == list(range(1, 9))


def test_a_worker_killed_mid_curve_keeps_the_recorded_steps(tmp_path: Path, loopback: LoopbackCluster) -> None:
    spec_dict = make_spec(tmp_path, loopback, {"call": "curve_objectives:slow_curve"}, steps=12)
    spec_dict["budget"]["trials"] = 1
    spec = load(spec_dict)
    search = DrivenSearch(lambda: Controller(spec))
    mark = Path(loopback.env["FOREBEAR_TEST_SIGNAL"]) / "step-0-1-3"
    search.wait_for(mark, DEADLINE, "attempt 1 reaching step 3")
    time.sleep(0.5)  # the runner polls the score file every 0.2 s
    worker_pid = psutil.Process(int(mark.read_text())).parent().parent().pid
    loopback.kill_worker([p.pid for p in loopback.workers].index(worker_pid))
    result = search.join(DEADLINE)
    assert result.counts["scored"] == 1
    first = steps_of(spec.logbook, 0, attempt=1)
    assert first[:3] == [1, 2, 3], first  # written by the worker before it died; kept
    assert steps_of(spec.logbook, 0, attempt=2) == list(range(1, 13))
    table = forebear.load(spec.logbook)
    assert sorted(table.trials[0].curves) == [1, 2]
    assert [s for s, _ in table.trials[0].curve] == list(range(1, 13))
