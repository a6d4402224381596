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
from forebear.loop.book import Book
from forebear.loop.controller import Controller
from forebear.records.logbook import Logbook, fold, record

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


def test_a_result_written_over_a_torn_tail_after_the_read_is_not_settled_as_lost(tmp_path: Path) -> None:
    # A controller stopped by a full disk can leave half a record at the logbook's end. On the resume,
    # a worker still running an attempt writes its result: its append cuts the torn tail off, so the
    # result starts before the file size the controller saw when it read the logbook. The controller
    # must still see that result and not write `lost` for the attempt (which would score it twice).
    from forebear.loop.resume import search_record

    spec_path = tmp_path / "search.yaml"
    spec_path.write_text(yaml.safe_dump({
        "name": "torn", "objective": {"call": "objectives:sleep_from_x", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}}, "budget": {"trials": 2}, "logbook": "runs/torn.jsonl",
    }))
    spec = load(spec_path)
    book = Logbook(spec.logbook)
    book.append(search_record(spec))
    book.append(record("proposed", trial=0, round=0, config={"x": 0.5}, source="random", model=None, acquisition=None))
    since = book.append(record("started", trial=0, attempt=1, worker="w"))
    with open(spec.logbook, "ab") as fh:
        fh.write(b'{"v": 1, "kind": "propo')  # torn: the disk filled up mid-write
    controller = Controller(spec)
    table, _ = controller._read()
    assert table.by_state("running")
    assert book.append_result(record("scored", trial=0, attempt=1, score=0.25), since)
    controller.book = Book.from_table(table)
    controller._reconcile(table)
    records = book.records()
    assert [r["kind"] for r in records if r.get("trial") == 0] == ["proposed", "started", "scored"], records
    assert controller.book.state[0] == "scored" and not controller.retry_queue
