"""budget.wall_time at run time: the search closes with reason wall_time and the attempts still
running at the deadline are cancelled and recorded lost, against a real loopback cluster."""

from __future__ import annotations

import time
from pathlib import Path

import forebear
from forebear.records.logbook import Logbook

from .conftest import LoopbackCluster


def test_wall_time_closes_the_search_and_records_running_attempts_lost(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    logbook = tmp_path / "runs" / "wall.jsonl"
    spec = {
        "name": "wall",
        "objective": {"call": "objectives:sleepy", "minimize": "loss"},
        # Every attempt sleeps 3 to 3.5 s: at the 4 s deadline two attempts are running.
        "space": {"x": {"float": [0.0, 1.0]}, "seconds": {"float": [3.0, 3.5]}},
        "budget": {"trials": 20, "batch": 2, "concurrency": 2, "wall_time": "4s"},
        "cluster": {"address": shared_loopback.address},
        "logbook": str(logbook),
        "seed": 2,
    }
    t0 = time.monotonic()
    result = forebear.run(spec)
    elapsed = time.monotonic() - t0
    assert result.closed == "wall_time"
    assert elapsed < 4.0 + 30.0, elapsed  # cancelled at the deadline, not run to the 20-trial budget
    recs = Logbook(logbook).records()
    closed = [r for r in recs if r["kind"] == "closed"]
    assert len(closed) == 1 and closed[0]["reason"] == "wall_time"
    before = recs[: recs.index(closed[0])]
    started = {(r["trial"], r["attempt"]) for r in before if r["kind"] == "started"}
    ended = {(r["trial"], r["attempt"]) for r in before if r["kind"] in ("scored", "failed")}
    lost = {(r["trial"], r["attempt"]): r["reason"] for r in before if r["kind"] == "lost"}
    # Every attempt that was running at the deadline is accounted for as lost, none is left open
    # (on a loaded machine an attempt may be cancelled before its worker wrote `started`).
    assert lost, "no attempt was running at the deadline"
    assert started <= ended | set(lost), (started, ended, lost)
    assert not ended & set(lost)
    assert set(lost.values()) == {"interrupted"}
    assert result.counts["scored"] < 20 and result.counts["running"] == 0
