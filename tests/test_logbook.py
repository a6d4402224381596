"""Logbook: write protocol, torn writes, contention, the fold, the controller lock."""

from __future__ import annotations

import json
import os
import random
import stat
import time
from pathlib import Path

import pytest

from forebear.records.logbook import (
    ControllerLock,
    Logbook,
    LogbookBusy,
    LogbookMismatch,
    check_header,
    fold,
    record,
)
from tests.process_helpers import CTX, processes


def header(**kw: object) -> dict:
    return record("search", name="t", spec_hash="abc", space={"x": {"float": [0, 1]}}, objective={"minimize": "loss"}, seed=0, **kw)


def proposed(t: int, x: float = 0.5) -> dict:
    return record("proposed", trial=t, round=0, config={"x": x}, source="initial", model=None, acquisition=None)


def test_append_and_read(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "runs" / "a.jsonl")
    j.append(header())
    j.append_many([proposed(0), proposed(1)])
    recs, skipped = j.read()
    assert [r["kind"] for r in recs] == ["search", "proposed", "proposed"]
    assert skipped == 0
    for r in recs:
        assert r["v"] == 1 and isinstance(r["at"], float)


def test_file_modes(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "new" / "deeper" / "a.jsonl")
    j.append(header())
    assert stat.S_IMODE(os.stat(j.path).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(j.path.parent).st_mode) == 0o700


def test_nan_is_refused(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "a.jsonl")
    with pytest.raises(ValueError):
        j.append(record("scored", trial=0, attempt=1, score=float("nan"), metrics={}, seconds=1))
    assert not j.path.exists() or j.path.read_text() == ""


def test_fold_states_and_first_scored_wins() -> None:
    recs = [
        header(),
        proposed(0, 0.1), proposed(1, 0.2), proposed(2, 0.3), proposed(3, 0.4),
        record("started", trial=0, attempt=1, worker="w1", host="h", pid=1),
        record("scored", trial=0, attempt=1, score=0.9, metrics={"loss": 0.9}, seconds=1.0),
        record("scored", trial=0, attempt=1, score=0.1, metrics={"loss": 0.1}, seconds=1.0),
        record("started", trial=1, attempt=1, worker="w1", host="h", pid=1),
        record("lost", trial=1, attempt=1, reason="worker"),
        record("started", trial=1, attempt=2, worker="w2", host="h", pid=2),
        record("scored", trial=1, attempt=2, score=0.5, metrics={}, seconds=2.0),
        record("started", trial=2, attempt=1, worker="w2", host="h", pid=2),
        record("failed", trial=2, attempt=1, error="ValueError: boom", retryable=False),
        record("started", trial=3, attempt=1, worker="w2", host="h", pid=2),
    ]
    t = fold(recs)
    assert t.counts() == {"queued": 0, "running": 1, "scored": 2, "failed": 1}
    assert t.trials[0].score == 0.9  # the first scored record wins
    assert t.duplicates == 1
    assert [a.outcome for a in t.trials[1].attempts] == ["lost", "scored"]
    assert t.trials[2].error == "ValueError: boom"
    assert t.best().trial == 1
    assert t.metric == "loss" and t.sense == "minimize"


def test_fold_maximize_best() -> None:
    recs = [
        record("search", name="t", spec_hash="h", space={}, objective={"maximize": "acc"}, seed=0),
        proposed(0), proposed(1),
        record("scored", trial=0, attempt=1, score=0.7, metrics={}, seconds=1),
        record("scored", trial=1, attempt=1, score=0.8, metrics={}, seconds=1),
    ]
    assert fold(recs).best().trial == 1


def test_retryable_failure_requeues() -> None:
    recs = [header(), proposed(0), record("failed", trial=0, attempt=1, error="timeout", retryable=True)]
    assert fold(recs).trials[0].state == "queued"


def test_unknown_and_orphan_records_are_counted() -> None:
    recs = [header(), {"v": 1, "at": 1.0, "kind": "weird", "trial": 0}, record("scored", trial=99, attempt=1, score=1.0, metrics={}, seconds=1)]
    t = fold(recs)
    assert t.unknown == 2 and len(t) == 0


def test_garbage_lines_are_skipped(tmp_path: Path) -> None:
    p = tmp_path / "a.jsonl"
    j = Logbook(p)
    j.append(header())
    with open(p, "ab") as fh:
        fh.write(b"not json\n\xff\xfe\x00\n[1, 2]\n")
    j.append(proposed(0))
    recs, skipped = j.read()
    assert [r["kind"] for r in recs] == ["search", "proposed"]
    assert skipped == 3


def test_torn_writes_at_random_offsets(tmp_path: Path) -> None:
    src = Logbook(tmp_path / "src.jsonl")
    src.append(header())
    src.append_many([proposed(i, i / 100) for i in range(40)])
    src.append_many([record("scored", trial=i, attempt=1, score=float(i), metrics={"m": "x" * (i % 7)}, seconds=0.1) for i in range(40)])
    data = src.path.read_bytes()
    line_ends = [i + 1 for i, b in enumerate(data) if b == ord("\n")]
    rng = random.Random(11)
    for k in range(100):
        cut = rng.randrange(1, len(data))
        p = tmp_path / f"cut{k}.jsonl"
        p.write_bytes(data[:cut])
        j = Logbook(p)
        complete = sum(1 for e in line_ends if e <= cut)
        new = record("closed", reason="budget", best=None, marker=k)
        j.append(new)
        recs, _ = j.read()
        # Every record complete before the cut is there, in order, then the new one.
        expect = [json.loads(line) for line in data[: line_ends[complete - 1]].splitlines()] if complete else []
        # A cut right after a record's closing brace leaves a whole record without its newline: kept too.
        assert recs[: len(expect)] == expect
        assert recs[-1] == new
        assert len(recs) in (len(expect) + 1, len(expect) + 2)
        j.append(record("closed", reason="budget", best=None, marker=-k))
        assert j.read()[0][-1]["marker"] == -k


def test_torn_write_with_whole_record_keeps_it(tmp_path: Path) -> None:
    p = tmp_path / "a.jsonl"
    p.write_text(json.dumps(header()) + "\n" + json.dumps(proposed(0)))
    j = Logbook(p)
    j.append(proposed(1))
    assert [r.get("trial") for r in j.read()[0]] == [None, 0, 1]


def _writer(path: str, writer: int, n: int, ready: object, go: object) -> None:
    j = Logbook(path)
    ready.set()  # type: ignore[attr-defined]
    go.wait(30)  # type: ignore[attr-defined]
    for i in range(n):
        j.append(record("closed", reason="budget", best=None, writer=writer, seq=i))


def _hold_controller_lock(path: str, hold: float, ready: object) -> None:
    lock = ControllerLock(Logbook(path))
    lock.acquire()
    ready.set()  # type: ignore[attr-defined]
    time.sleep(hold)
    lock.release()


@pytest.mark.timeout(240)
def test_eight_writers_while_controller_lock_held(tmp_path: Path) -> None:
    path = str(tmp_path / "shared.jsonl")
    n = int(os.environ.get("FOREBEAR_TEST_APPENDS", "1000"))
    held = CTX.Event()
    go = CTX.Event()
    readies = [CTX.Event() for _ in range(8)]
    with processes(_hold_controller_lock, [(path, 5.0, held)], deadline=200, name="controller"):
        assert held.wait(60)
        with processes(_writer, [(path, w, n, readies[w], go) for w in range(8)], deadline=180, name="writer"):
            for e in readies:
                assert e.wait(60)
            go.set()
    data = Path(path).read_bytes()
    lines = data.splitlines()
    assert len(lines) == 8 * n
    recs = [json.loads(line) for line in lines]  # every line parses: none corrupt
    for w in range(8):
        assert [r["seq"] for r in recs if r["writer"] == w] == list(range(n))


def test_second_controller_is_refused(tmp_path: Path) -> None:
    path = str(tmp_path / "x.jsonl")
    held = CTX.Event()
    with processes(_hold_controller_lock, [(path, 3.0, held)], deadline=30, name="holder") as procs:
        assert held.wait(60)
        with pytest.raises(LogbookBusy, match=rf"logbook .*x.jsonl is driven by pid {procs[0].pid} on host .* since \d{{4}}-"):
            ControllerLock(Logbook(path)).acquire()
    # Released when the holder is gone.
    with ControllerLock(Logbook(path)):
        pass


def test_controller_lock_released_when_holder_is_killed(tmp_path: Path) -> None:
    path = str(tmp_path / "x.jsonl")
    held = CTX.Event()
    p = CTX.Process(target=_hold_controller_lock, args=(path, 60.0, held), daemon=True)
    p.start()
    try:
        assert held.wait(60)
        p.kill()
        p.join(10)
        with ControllerLock(Logbook(path)):
            pass
    finally:
        if p.is_alive():
            p.kill()
        p.join(5)


def test_soft_lock_mode(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "s.jsonl", lock="soft", lifetime=5)
    j.append(header())
    j.append(proposed(0))
    assert len(j.read()[0]) == 2
    with ControllerLock(j):
        with pytest.raises(LogbookBusy):
            ControllerLock(Logbook(j.path, lock="soft", lifetime=5)).acquire()


def test_check_header(tmp_path: Path) -> None:
    p = tmp_path / "a.jsonl"
    check_header(fold([header()]), p, "abc")
    with pytest.raises(LogbookMismatch, match="belongs to another search"):
        check_header(fold([header()]), p, "other")
    future = dict(header(), v=99)
    with pytest.raises(LogbookMismatch, match="format version 99 is newer"):
        check_header(fold([future]), p)
    with pytest.raises(LogbookMismatch, match="no search record"):
        check_header(fold([proposed(0)]), p)
