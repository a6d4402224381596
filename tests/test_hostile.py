"""Careless and hostile use (issue 15): inputs and outputs that once lost, blocked or misled a search.

Each test reproduces one probe of the issue; the rows of docs/reliability.md's
bad-input table name them. Tests here use the real command line, logbook,
history loader and runner (no Dask cluster: the runner's fork server runs in
this process's children, and the conftest stops it after each test).
"""

from __future__ import annotations

import csv
import json
import os
import threading
from pathlib import Path

import pytest
from click.testing import CliRunner

from forebear.core.space import Space
from forebear.core.spec import HistorySource, SpecError
from forebear.core.spec import load as load_spec
from forebear.face.cli import main
from forebear.records.history import HistoryError
from forebear.records.history import load as load_history
from forebear.records.logbook import Logbook, LogbookError, record


def cli(*args: str) -> tuple[int, str, str]:
    res = CliRunner().invoke(main, list(args))
    return res.exit_code, res.stdout, res.stderr


def small_logbook(path: Path, config: dict | None = None, metrics: dict | None = None) -> Path:
    book = Logbook(path)
    book.append(record("search", name="h", spec_hash="h", space={}, objective={"call": "m:f", "minimize": "loss"}, seed=0))
    book.append(record("proposed", trial=0, round=0, config=config or {"x": 0.5}, source="initial", model=None, acquisition=None))
    book.append(record("scored", trial=0, attempt=1, score=0.25, metrics=metrics or {"loss": 0.25}, seconds=1.0))
    return path


# -- 1: export never overwrites a logbook, nor any file unless asked -------------------------


def test_export_refuses_to_write_over_the_logbook_it_reads(tmp_path: Path) -> None:
    log = small_logbook(tmp_path / "x.jsonl")
    before = log.read_bytes()
    code, _, err = cli("export", str(log), "--csv", str(log))
    assert code == 2 and "is a forebear logbook; export never writes over one" in err
    code, _, err = cli("export", str(log), "--csv", str(log), "--replace")
    assert code == 2 and "forebear logbook" in err  # not even when asked
    other = small_logbook(tmp_path / "other.jsonl")
    code, _, err = cli("export", str(log), "--csv", str(other), "--replace")
    assert code == 2 and "forebear logbook" in err
    assert log.read_bytes() == before


def test_export_writes_over_a_file_only_with_replace_and_leaves_no_temporary(tmp_path: Path) -> None:
    log = small_logbook(tmp_path / "x.jsonl")
    out = tmp_path / "t.csv"
    out.write_text("precious\n")
    code, _, err = cli("export", str(log), "--csv", str(out))
    assert code == 2 and "already exists; pass --replace" in err
    assert out.read_text() == "precious\n"
    code, _, err = cli("export", str(log), "--csv", str(out), "--replace")
    assert code == 0, err
    assert list(csv.DictReader(out.open()))[0]["x"] == "0.5"
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")) == []


# -- 5: a logbook, spec or history path that is not a regular file is refused at once -------------


def test_fifo_paths_are_refused_without_blocking(tmp_path: Path) -> None:
    fifo = tmp_path / "pipe.jsonl"
    os.mkfifo(fifo)
    result: dict[str, object] = {}

    def probe() -> None:
        result["status"] = cli("status", str(fifo))
        result["best"] = cli("best", str(fifo), "--json")
        with pytest.raises(LogbookError, match="is a FIFO"):
            Logbook(fifo).append(record("closed", reason="budget", best=None))
        with pytest.raises(SpecError, match="not a regular file"):
            load_spec(fifo)
        with pytest.raises(HistoryError, match="is a FIFO"):
            load_history([HistorySource(logbook=str(fifo))], Space.from_dict({"x": {"float": [0, 1]}}), "minimize")
        result["done"] = True

    t = threading.Thread(target=probe, daemon=True)
    t.start()
    t.join(20)
    if t.is_alive():
        with open(fifo, "wb"):  # unblock a reader stuck on the FIFO so the thread can end
            pass
        t.join(5)
        pytest.fail("a FIFO path blocked")
    assert result.get("done"), result
    for name in ("status", "best"):
        code, _, err = result[name]  # type: ignore[misc]
        assert code == 2 and "is a FIFO (named pipe), not a regular file" in err and len(err.strip().splitlines()) == 1


# -- 7: duplicate CSV headers; export's own columns never meet a parameter's --------------------


def test_csv_history_with_a_duplicate_column_is_refused(tmp_path: Path) -> None:
    table = tmp_path / "h.csv"
    table.write_text("task,x,loss,x\na,0.1,1.0,0.9\n")
    with pytest.raises(HistoryError, match=r"line 1: duplicate column name 'x' \(2 times\)"):
        load_history([HistorySource(csv=str(table), task="task", score="loss")], Space.from_dict({"x": {"float": [0, 1]}}), "minimize")


def test_export_columns_never_collide_with_parameter_names_and_read_back_as_history(tmp_path: Path) -> None:
    config = {"score": 0.2, "state": "b", "trial": 3, "metric.loss": 0.5, "lr": 0.1}
    log = small_logbook(tmp_path / "x.jsonl", config=config)
    out = tmp_path / "t.csv"
    code, _, err = cli("export", str(log), "--csv", str(out))
    assert code == 0, err
    header = next(csv.reader(out.open()))
    assert len(header) == len(set(header)), header
    row = next(csv.DictReader(out.open()))
    assert row["score"] == "0.25" and row["state"] == "scored" and row["trial"] == "0"
    assert row["config.score"] == "0.2" and row["config.state"] == "b" and row["config.trial"] == "3"
    assert row["config.metric.loss"] == "0.5" and row["metric.loss"] == "0.25" and row["lr"] == "0.1"
    # The export, with a task column added, is a history table for a space with those names.
    rows = list(csv.reader(out.open()))
    with open(tmp_path / "h.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["task", *rows[0]])
        w.writerows(["a", *r] for r in rows[1:])
    space = Space.from_dict({"score": {"float": [0, 1]}, "state": {"categories": ["a", "b"]}, "lr": {"float": [0.01, 1]}})
    hist = load_history([HistorySource(csv=str(tmp_path / "h.csv"), task="task", score="score")], space, "minimize")
    assert len(hist) == 1 and hist.n_points == 1
    assert json.dumps(hist.warnings) == "[]"
