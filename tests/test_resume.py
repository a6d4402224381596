"""Resume: a controller killed with SIGKILL mid-search, then run again, completes the search."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path
from typing import Any

import yaml

import forebear
from forebear.core.spec import load
from forebear.loop.controller import Controller
from forebear.records.logbook import Logbook, fold

from .conftest import LoopbackCluster, child_env, reap

DEADLINE = 120.0


def write_spec(tmp: Path, cluster: LoopbackCluster, trials: int = 8) -> Path:
    spec: dict[str, Any] = {
        "name": "resume",
        "objective": {"call": "objectives:sleep_from_x", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": trials, "batch": 2, "concurrency": 2, "retries": 1},
        "cluster": {"address": cluster.address},
        "logbook": "runs/resume.jsonl",
        "seed": 11,
    }
    path = tmp / "search.yaml"
    path.write_text(yaml.safe_dump(spec))
    return path


def test_controller_killed_mid_search_then_resumed(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec_path = write_spec(tmp_path, shared_loopback)
    logbook = tmp_path / "runs" / "resume.jsonl"
    proc = subprocess.Popen([sys.executable, "-m", "forebear", "run", str(spec_path), "--quiet"],
                            env=child_env(), start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + DEADLINE
        while True:
            assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
            assert time.monotonic() < deadline, "the controller made no progress"
            table = Logbook(logbook).fold() if logbook.exists() else None
            if table is not None and table.finished >= 2 and table.counts()["running"] >= 1:
                break
            time.sleep(0.05)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        reap(proc)
    before = Logbook(logbook).fold()
    assert before.closed is None and before.finished < 8
    running_before = {t.trial: t.last_attempt for t in before.by_state("running")}

    result = Controller(load(spec_path)).run()
    assert result.closed == "budget"
    records = Logbook(logbook).records()
    table = fold(records)
    assert len(table) == 8 and table.finished == 8
    terminal = Counter(r["trial"] for r in records if r["kind"] in ("scored", "failed"))
    assert sorted(terminal) == list(range(8)) and set(terminal.values()) == {1}, terminal
    # Attempts the dead controller left running are lost (restart) unless their result arrived meanwhile.
    lost = {(r["trial"], r["attempt"]) for r in records if r["kind"] == "lost"}
    for trial, attempt in running_before.items():
        scored_meanwhile = any(r["kind"] == "scored" and r["trial"] == trial and r["attempt"] == attempt for r in records)
        assert scored_meanwhile or (trial, attempt) in lost
    assert all(r["reason"] == "restart" for r in records if r["kind"] == "lost")
    assert forebear.load(logbook).best().trial == result.best.trial
