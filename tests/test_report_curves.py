"""The report's learning-curve section (forebear.face.curves)."""

from __future__ import annotations

from pathlib import Path

import pytest

from forebear.face import curves
from forebear.face.report import write_report
from forebear.records.logbook import Logbook, record


def _logbook(path: Path) -> Logbook:
    recs = [record("search", name="c", spec_hash="h", space={"x": {"float": [0, 1]}},
                   objective={"call": "m:f", "minimize": "loss"}, seed=0, stopping={"rule": "halving", "steps": 9})]
    for tid in (0, 1):
        recs.append(record("proposed", trial=tid, round=0, config={"x": 0.1 * tid}, source="initial"))
        recs.append(record("started", trial=tid, attempt=1, worker="w", host="h", pid=1))
    for step in range(1, 10):
        recs.append(record("step", trial=0, attempt=1, step=step, score=1.0 / step, metrics={}))
    recs.append(record("scored", trial=0, attempt=1, score=1.0 / 9, metrics={}, seconds=9.0))
    for step in range(1, 4):
        recs.append(record("step", trial=1, attempt=1, step=step, score=2.0 / step, metrics={}))
    recs.append(record("halted", trial=1, attempt=1, step=3, score=2.0 / 3, metrics={}, seconds=3.0))
    book = Logbook(path)
    book.append_many(recs)
    return book


def test_worker_time_saved_is_estimated_per_step(tmp_path: Path) -> None:
    table = _logbook(tmp_path / "c.jsonl").fold()
    wt = curves.worker_time(table)
    # Trial 1 took 3 s for 3 of 9 steps: running to the end would have taken 9 s, so 6 s were saved.
    assert wt["used"] == pytest.approx(12.0) and wt["saved"] == pytest.approx(6.0) and wt["halted"] == 1


def test_report_draws_the_curves(tmp_path: Path) -> None:
    table = _logbook(tmp_path / "c.jsonl").fold()
    page = write_report(table, tmp_path / "rep").read_text()
    assert (tmp_path / "rep" / curves.PLOT).read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    assert "Learning curves" in page and "saved about 6.0 s" in page and "1 trial(s) halted" in page


def test_a_search_without_curves_gets_no_curve_section(tmp_path: Path) -> None:
    recs = [record("search", name="c", spec_hash="h", space={"x": {"float": [0, 1]}}, objective={"call": "m:f", "minimize": "loss"}, seed=0)]
    book = Logbook(tmp_path / "p.jsonl")
    book.append_many(recs)
    page = write_report(book.fold(), tmp_path / "rep").read_text()
    assert "Learning curves" not in page and not (tmp_path / "rep" / curves.PLOT).exists()
