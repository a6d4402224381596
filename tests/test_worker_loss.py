"""Faults on real worker processes: SIGKILL mid-attempt, hangs past the timeout, segfaults."""

from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Any

import psutil
import pytest

from forebear.core.spec import load
from forebear.loop.book import SearchResult
from forebear.loop.controller import Controller
from forebear.records.logbook import Logbook

from .conftest import LoopbackCluster

DEADLINE = 120.0


def spec_for(tmp: Path, cluster: LoopbackCluster, call: str, **budget: Any) -> dict[str, Any]:
    b = {"trials": 2, "batch": 1, "concurrency": 1, "retries": 1}
    b.update(budget)
    return {
        "name": "loss",
        "objective": {"call": call, "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "seconds": {"float": [2.5, 3.0]}},
        "budget": b,
        "cluster": {"address": cluster.address},
        "logbook": str(tmp / "runs" / "loss.jsonl"),
    }


def attempts(logbook: Path, trial: int) -> list[tuple[str, Any]]:
    out = []
    for r in Logbook(logbook).records():
        if r.get("trial") == trial and r["kind"] != "proposed":
            out.append((r["kind"], r.get("reason") or r.get("attempt")))
    return out


def test_killed_worker_mid_attempt_is_retried_elsewhere(tmp_path: Path, loopback: LoopbackCluster) -> None:
    spec = load(spec_for(tmp_path, loopback, "objectives:stall_signal", trials=1))
    result: list[SearchResult] = []
    errors: list[BaseException] = []

    def drive() -> None:
        try:
            result.append(Controller(spec).run())
        except BaseException as exc:  # noqa: BLE001 - surfaced by the assertion below
            errors.append(exc)

    thread = threading.Thread(target=drive, daemon=True)
    thread.start()
    mark = Path(loopback.env["FOREBEAR_TEST_SIGNAL"]) / "started-0-1"
    deadline = time.monotonic() + DEADLINE
    while not mark.exists():
        assert time.monotonic() < deadline, "attempt 1 never started"
        assert not errors, errors
        time.sleep(0.05)
    time.sleep(0.2)
    child = psutil.Process(int(mark.read_text()))
    server = child.parent()
    worker_pid = server.parent().pid
    index = [p.pid for p in loopback.workers].index(worker_pid)
    loopback.kill_worker(index)
    thread.join(DEADLINE)
    assert not thread.is_alive(), "the controller did not finish"
    assert not errors, errors
    assert result[0].counts["scored"] == 1
    trail = attempts(spec.logbook, 0)
    assert trail == [("started", 1), ("lost", "worker"), ("started", 2), ("scored", 2)]
    # The attempt's own process died with its worker (the fork server kills its group on EOF).
    deadline = time.monotonic() + 20
    while child.is_running() and child.status() != psutil.STATUS_ZOMBIE:
        assert time.monotonic() < deadline, "the killed worker's attempt process survived"
        time.sleep(0.1)
    started = [r for r in Logbook(spec.logbook).records() if r["kind"] == "started"]
    assert started[0]["worker"] != started[1]["worker"]


def test_hang_past_timeout_is_lost_then_retried_and_worker_keeps_serving(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = spec_for(tmp_path, shared_loopback, "objectives:hang_first_attempt", trials=2, trial_timeout="2s", retries=1)
    t0 = time.monotonic()
    result = Controller(load(spec)).run()
    assert result.counts["scored"] == 2
    for trial in (0, 1):
        assert attempts(Path(spec["logbook"]), trial) == [("started", 1), ("lost", "timeout"), ("started", 2), ("scored", 2)]
    assert time.monotonic() - t0 < 60
    assert shared_loopback.worker_count() == 2


def test_hang_without_retries_left_fails(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = spec_for(tmp_path, shared_loopback, "objectives:hang", trials=1, trial_timeout="1s", retries=0)
    result = Controller(load(spec)).run()
    assert result.counts["failed"] == 1
    assert attempts(Path(spec["logbook"]), 0) == [("started", 1), ("lost", "timeout"), ("failed", 1)]
    assert "timed out after 1 s" in (result.trials[0].error or "")


@pytest.mark.parametrize("call", [
    "objectives:segfault",
    # tests/test_runner.py covers these two without a cluster; here they only repeat the containment check
    pytest.param("objectives:hard_exit", marks=pytest.mark.slow),
    pytest.param("objectives:out_of_memory", marks=pytest.mark.slow),
])
def test_crashing_objective_is_contained(tmp_path: Path, shared_loopback: LoopbackCluster, call: str) -> None:
    spec = spec_for(tmp_path, shared_loopback, call, trials=2, concurrency=2)
    result = Controller(load(spec)).run()
    assert result.counts["failed"] == 2
    assert shared_loopback.worker_count() == 2
    # The same workers serve the next search.
    ok = spec_for(tmp_path / "after", shared_loopback, "objectives:quadratic", trials=2, concurrency=2)
    assert Controller(load(ok)).run().counts["scored"] == 2
