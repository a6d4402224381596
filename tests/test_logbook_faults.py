"""Logbook faults: a writer killed mid-record, a full disk, a failing fsync."""

from __future__ import annotations

import json
import os
import signal
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from forebear.bench.faults import fill_filesystem, tiny_filesystem
from forebear.records.logbook import Logbook, LogbookError, record
from tests.process_helpers import CTX


def _die_mid_record(path: str, size: int) -> None:
    """Take the lock like a writer, write half of a large record, then SIGKILL ourselves."""
    j = Logbook(path)
    # Built past record(), which trims large metrics: a writer of an older version, or one whose
    # record is large for other reasons, must still be cut off cleanly.
    big = {**record("scored", trial=0, attempt=1, score=1.0, seconds=1.0), "metrics": {"blob": "x" * size}}
    rec = json.dumps(big) + "\n"
    data = rec.encode()
    with j.lock.acquire(timeout=30):
        fd = os.open(path, os.O_WRONLY | os.O_APPEND)
        os.write(fd, data[: len(data) // 2])
        os.fsync(fd)
        os.kill(os.getpid(), signal.SIGKILL)


def test_writer_killed_mid_large_record(tmp_path: Path) -> None:
    path = tmp_path / "a.jsonl"
    j = Logbook(path)
    before = [record("proposed", trial=i, round=0, config={"x": i}, source="initial", model=None, acquisition=None) for i in range(20)]
    j.append_many(before)
    p = CTX.Process(target=_die_mid_record, args=(str(path), 400_000), daemon=True)
    p.start()
    p.join(60)
    try:
        assert p.exitcode == -signal.SIGKILL
    finally:
        if p.is_alive():
            p.kill()
            p.join(5)
    assert path.stat().st_size > 200_000  # the torn half is there
    after = record("closed", reason="budget", best=None)
    j.append(after)  # the lock died with the writer; the torn tail is cut off
    recs, skipped = j.read()
    assert recs == [*before, after] and skipped == 0
    j.append(after)
    assert len(j.read()[0]) == 22


@pytest.fixture()
def tiny_fs(tmp_path: Path) -> Iterator[Path]:
    """A small tmpfs where the machine allows mounting one (root on Linux), else skip."""
    with tiny_filesystem(tmp_path / f"tfs-{uuid.uuid4().hex[:6]}") as mnt:
        if mnt is None:
            pytest.skip("mounting a tmpfs needs root; the injected-OSError test covers this case")
        yield mnt


def test_full_disk_is_reported_and_nothing_lost(tiny_fs: Path) -> None:
    j = Logbook(tiny_fs / "runs" / "a.jsonl")
    kept = [record("proposed", trial=i, round=0, config={"x": i}, source="initial", model=None, acquisition=None) for i in range(50)]
    j.append_many(kept)
    filler = fill_filesystem(tiny_fs)
    with pytest.raises(LogbookError, match="No space left on device"):
        for i in range(1000):
            j.append(record("scored", trial=i, attempt=1, score=1.0, metrics={"pad": "y" * 2000}, seconds=1.0))
    recs, _ = j.read()
    assert recs[: len(kept)] == kept
    filler.unlink()
    closing = record("closed", reason="budget", best=None)
    j.append(closing)
    recs, skipped = j.read()
    assert recs[: len(kept)] == kept and recs[-1] == closing and skipped == 0


# Linux errno values and messages, errno(3) (EIO = 5, ENOSPC = 28), as os.strerror gives them.
@pytest.mark.parametrize(("code", "text"), [(5, "Input/output error"), (28, "No space left on device")])
def test_failing_fsync_keeps_earlier_records(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, code: int, text: str) -> None:
    """A failing fsync (EIO from a dying disk, ENOSPC from a full one) is reported with the
    system's words, and every record written before it stays readable byte for byte."""
    from forebear.records import logbook as jmod

    j = Logbook(tmp_path / "a.jsonl")
    kept = [record("proposed", trial=i, round=0, config={"x": i}, source="initial", model=None, acquisition=None) for i in range(5)]
    j.append_many(kept)
    before = j.path.read_bytes()

    def failing(fd: int) -> None:
        raise OSError(code, text)

    monkeypatch.setattr(jmod.os, "fsync", failing)
    with pytest.raises(LogbookError, match=f"write failed: {text}"):
        j.append(record("closed", reason="budget", best=None))
    monkeypatch.undo()
    assert j.path.read_bytes().startswith(before)
    assert j.read()[0][:5] == kept
