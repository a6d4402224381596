"""Bad input met while a search runs, through the real command line, controller and workers.

Objective outputs become ``failed`` trials that name the reason (the search
goes on); bad history files and logbooks stop ``forebear run`` with one line
and exit 2 before anything is written. These are the objective-output,
history and logbook rows of the table in docs/reliability.md (the spec rows
are tests/test_bad_input.py).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
import yaml
from click.testing import CliRunner

import forebear
from forebear.face.cli import main as cli_main
from forebear.records.logbook import Logbook, record

from .conftest import LoopbackCluster

# case -> (python source run as the command objective, the reason its trial fails with, or None: it scores)
COMMAND_CASES: dict[str, tuple[str, str | None]] = {
    "nan": ("print('nan')", "bad result: metric 'loss' is NaN"),
    "inf": ("print('inf')", "bad result: metric 'loss' is +inf"),
    "minus-inf-json": ("print('{\"loss\": -Infinity}')", "bad result: metric 'loss' is -inf"),
    "text": ("print('training done')", "bad result: the last stdout line is not a number or JSON: 'training done'"),
    "json-string": ("print('{\"loss\": \"low\"}')", "bad result: metric 'loss' is str 'low', not a number"),
    "json-list": ("print('[0.1, 0.2]')", "bad result: metric 'loss' is list [0.1, 0.2], not a number"),
    "wrong-key": ("print('{\"acc\": 0.9}')", "bad result: the result has no metric 'loss' (keys: acc)"),
    "empty": ("pass", "bad result: stdout was empty"),
    "not-utf8": ("import sys; sys.stdout.buffer.write(b'\\xff\\xfe\\xfa\\n')", "bad result: the last stdout line is not a number or JSON"),
    "exit-after-number": ("import sys; print(0.5); sys.exit(3)", "the command exited with status 3"),
    "killed-after-number": ("import os, signal; print(0.5, flush=True); os.kill(os.getpid(), signal.SIGKILL)", "killed by SIGKILL"),
    "10MB-then-number": ("import sys; w = sys.stdout.write\nfor _ in range(10240): w('x' * 1023 + '\\n')\nprint(0.75)", None),
    "10MB-no-newline": ("import sys; sys.stdout.write('y' * (10 << 20))", "bad result: the last stdout line is not a number or JSON: 'yyy"),
    "ok": ("print(0.25)", None),
}

# case -> (what the call objective returns, the reason)
CALL_CASES: dict[str, tuple[str, str | None]] = {
    "nan": ("float('nan')", "bad result: metric 'loss' is NaN"),
    "inf": ("float('inf')", "bad result: metric 'loss' is +inf"),
    "string": ("'0.5 maybe'", "bad result: metric 'loss' is str '0.5 maybe', not a number"),
    "none": ("None", "bad result: metric 'loss' is NoneType None, not a number"),
    "bool": ("True", "bad result: metric 'loss' is bool True, not a number"),
    "dict-nan": ("{'loss': float('nan'), 'acc': 0.5}", "bad result: metric 'loss' is NaN"),
    "bytes": ("b'\\xff\\xfe'", "bad result: metric 'loss' is bytes"),
    "ok": ("0.125", None),
}


def _run(*args: str) -> tuple[int, str]:
    res = CliRunner().invoke(cli_main, list(args))
    return res.exit_code, res.stderr


def _write(path: Path, spec: dict[str, Any]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def _check_cases(logbook: Path, cases: dict[str, tuple[str, str | None]]) -> None:
    table = forebear.load(logbook)
    by_case = {t.config["case"]: t for t in table}
    assert set(by_case) == set(cases)
    for case, (_, reason) in cases.items():
        t = by_case[case]
        if reason is None:
            assert t.state == "scored", (case, t.error)
        else:
            assert t.state == "failed" and reason in (t.error or ""), (case, t.error)
            assert len(t.error or "") < 16_000, (case, len(t.error or ""))  # a huge output is not copied whole
    assert not [r for r in Logbook(logbook).records() if r["kind"] == "failed" and r.get("retryable")]


@pytest.mark.timeout(300)
def test_command_objective_outputs(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    script = (
        "import sys\nCASES = " + repr({k: v[0] for k, v in COMMAND_CASES.items()}) + "\nexec(CASES[sys.argv[1]])\n"
    )
    (tmp_path / "emit.py").write_text(script)
    n = len(COMMAND_CASES)
    spec = _write(tmp_path / "out.yaml", {
        "name": "outputs",
        "objective": {"command": ["python", "emit.py", "{case}"], "minimize": "loss"},
        "space": {"case": {"categories": list(COMMAND_CASES)}},
        "budget": {"trials": n, "batch": n, "concurrency": 2},
        "cluster": {"address": shared_loopback.address},
        "logbook": "runs/out.jsonl",
    })
    code, err = _run("run", str(spec), "--quiet")
    assert code == 0 and "Traceback" not in err, err
    _check_cases(tmp_path / "runs" / "out.jsonl", COMMAND_CASES)
    assert forebear.load(tmp_path / "runs" / "out.jsonl").best().config["case"] == "ok"


@pytest.mark.timeout(300)
def test_call_objective_results(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    body = "".join(f"    if case == {case!r}:\n        return {value}\n" for case, (value, _) in CALL_CASES.items())
    (tmp_path / "results_by_case.py").write_text(f"def result(config):\n    case = config['case']\n{body}")
    n = len(CALL_CASES)
    spec = _write(tmp_path / "calls.yaml", {
        "name": "calls",
        "objective": {"call": "results_by_case:result", "minimize": "loss"},
        "space": {"case": {"categories": list(CALL_CASES)}},
        "budget": {"trials": n, "batch": n, "concurrency": 2},
        "cluster": {"address": shared_loopback.address},
        "logbook": "runs/calls.jsonl",
    })
    code, err = _run("run", str(spec), "--quiet")
    assert code == 0 and "Traceback" not in err, err
    _check_cases(tmp_path / "runs" / "calls.jsonl", CALL_CASES)


def test_nothing_scored_exits_1_with_one_line(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    spec = _write(tmp_path / "none.yaml", {
        "name": "none",
        "objective": {"command": ["python", "-c", "print('nan')"], "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 2, "batch": 2, "concurrency": 2},
        "cluster": {"address": shared_loopback.address},
        "logbook": "runs/none.jsonl",
    })
    code, err = _run("run", str(spec), "--quiet")
    assert code == 1 and err.strip() == "forebear: the search ran but no trial scored", err


# --------------------------------------------------------------------------
# history files and logbooks: refused before anything is written


def _spec_with(tmp: Path, address: str | None = None, **extra: Any) -> Path:
    spec: dict[str, Any] = {
        "name": "store-17",
        "objective": {"call": "forebear.bench.faults:noop", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": 3, "batch": 3, "concurrency": 2},
        # No scheduler listens on port 9 of this machine: a run that got as far as connecting would fail
        # with a different message than the one each case expects.
        "cluster": {"address": address or "tcp://127.0.0.1:9"},
        "logbook": "runs/store-17.jsonl",
        "seed": 5,
    }
    spec.update(extra)
    return _write(tmp / "search.yaml", spec)


def _earlier_logbook(path: Path, space: dict[str, Any], *, garbage: bool = False, header: bool = True) -> Path:
    j = Logbook(path)
    if header:
        j.append(record("search", name="store-12", spec_hash="e", space=space, objective={"minimize": "loss"}, seed=1))
    for i in range(3):
        j.append(record("proposed", trial=i, round=0, config={k: 0.5 for k in space}, source="initial", model=None, acquisition=None))
        if garbage and i == 1:
            with open(path, "ab") as fh:
                fh.write(b"this line is not JSON\n")
        j.append(record("scored", trial=i, attempt=1, score=0.1 * i, metrics={}, seconds=1.0))
    return path


HISTORY_CASES = {
    "csv-wrong-columns": ("task,x,y,val_loss\ns1,0.1,0.2,0.3\n", "history table {csv}: line 1: no column 'loss' (columns: task, x, y, val_loss)"),
    "csv-empty": ("", "history table {csv}: empty file, no header row"),
    "csv-mixed-types": ("task,x,y,loss\ns1,0.1,0.2,0.3\ns1,0.4,high,0.2\n", "history table {csv}: line 3: column 'y': 'high' is not a number"),
    "csv-text-score": ("task,x,y,loss\ns1,0.1,0.2,n/a\n", "history table {csv}: line 2: column 'loss': 'n/a' is not a number"),
    "csv-extra-cells": ("task,x,y,loss\ns1,0.1,0.2,0.3,9\n", "history table {csv}: line 2: more cells than header columns"),
    "csv-not-utf8": (b"task,x,y,loss\ns1,0.1,0.2,\xff\xfe\n", "history table {csv}: line "),
}


@pytest.mark.parametrize("case", list(HISTORY_CASES))
def test_bad_history_table(tmp_path: Path, case: str) -> None:
    content, message = HISTORY_CASES[case]
    csv = tmp_path / "past" / "results.csv"
    csv.parent.mkdir()
    if isinstance(content, bytes):
        csv.write_bytes(content)
    else:
        csv.write_text(content)
    spec = _spec_with(tmp_path, history=[{"csv": "past/results.csv", "task": "task", "score": "loss"}])
    _refused(tmp_path, spec, message.format(csv=csv))


def _refused(tmp: Path, spec: Path, message: str, logbook: Path | None = None) -> None:
    """``forebear run`` stops with one line holding ``message``, exit 2, and the logbook is untouched."""
    logbook = logbook or tmp / "runs" / "store-17.jsonl"
    before = logbook.read_bytes() if logbook.exists() else None
    code, err = _run("run", str(spec), "--quiet")
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and message in lines[0] and "Traceback" not in err, err
    assert (logbook.read_bytes() if logbook.exists() else None) == before


def test_history_logbook_with_garbage_line(tmp_path: Path) -> None:
    past = _earlier_logbook(tmp_path / "past" / "store-12.jsonl", {"x": {"float": [0, 1]}, "y": {"float": [-1, 1]}}, garbage=True)
    spec = _spec_with(tmp_path, history=["past/store-*.jsonl"])
    _refused(tmp_path, spec, f"history logbook {past}: line 5: not a JSON record")


def test_history_logbook_without_search_record(tmp_path: Path) -> None:
    past = _earlier_logbook(tmp_path / "past" / "store-12.jsonl", {"x": {"float": [0, 1]}}, header=False)
    spec = _spec_with(tmp_path, history=["past/store-12.jsonl"])
    _refused(tmp_path, spec, f"history logbook {past}: line 1: no search record")


def test_history_file_missing(tmp_path: Path) -> None:
    spec = _spec_with(tmp_path, history=["past/store-12.jsonl"])
    _refused(tmp_path, spec, f"history logbook {tmp_path / 'past' / 'store-12.jsonl'}: no such file")


def _own_logbook(tmp: Path) -> Logbook:
    j = Logbook(tmp / "runs" / "store-17.jsonl")
    return j


def test_logbook_of_a_future_format(tmp_path: Path) -> None:
    j = _own_logbook(tmp_path)
    j.append({"v": 2, "at": 1.0, "kind": "search", "name": "store-17", "objective": {"minimize": "loss"}})
    _refused(tmp_path, _spec_with(tmp_path), "format version 2 is newer than this forebear reads (1); upgrade forebear")


def test_logbook_of_another_search(tmp_path: Path) -> None:
    j = _own_logbook(tmp_path)
    j.append(record("search", name="store-17", spec_hash="zz", space={"lr": {"float": [0.001, 0.1], "log": True}},
                    objective={"call": "other:fn", "minimize": "loss"}, seed=5))
    j.append(record("proposed", trial=0, round=0, config={"lr": 0.01}, source="initial", model=None, acquisition=None))
    _refused(tmp_path, _spec_with(tmp_path), "holds a search started from a different spec: objective:")
    code, err = _run("run", str(_spec_with(tmp_path)), "--quiet")
    assert "space.lr: removed" in err and "space.x: added" in err


def test_logbook_with_trial_records_and_no_search_record(tmp_path: Path) -> None:
    _own_logbook(tmp_path).append(record("proposed", trial=0, round=0, config={"x": 0.1}, source="initial", model=None, acquisition=None))
    _refused(tmp_path, _spec_with(tmp_path), "has trial records but no search record; not a forebear logbook")


def test_logbook_path_is_someone_elses_file(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    # A real cluster: before the fix the controller got as far as appending to the file and cut its last line.
    data = tmp_path / "runs" / "store-17.jsonl"
    data.parent.mkdir()
    data.write_bytes(b"region,demand\nnorth,120\nsouth,95")
    _refused(tmp_path, _spec_with(tmp_path, shared_loopback.address), "holds no forebear records (3 unreadable line(s)); not a forebear logbook")


def test_logbook_path_is_a_folder(tmp_path: Path) -> None:
    (tmp_path / "runs" / "store-17.jsonl").mkdir(parents=True)
    code, err = _run("run", str(_spec_with(tmp_path)), "--quiet")
    assert code == 2 and "is a folder, not a regular file" in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err, err


def test_logbook_with_garbage_lines_resumes_and_keeps_them(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    """One run covers two rows: a logbook with garbage lines resumes, and a history of another space is noted."""
    from forebear.core.spec import load
    from forebear.loop.resume import search_record

    _earlier_logbook(tmp_path / "past" / "churn-3.jsonl", {"depth": {"int": [2, 12]}})
    spec = _spec_with(tmp_path, shared_loopback.address, history=["past/*.jsonl"], budget={"trials": 4, "batch": 2, "concurrency": 2})
    path = tmp_path / "runs" / "store-17.jsonl"
    j = Logbook(path)
    j.append(search_record(load(spec)))
    for i in range(2):
        j.append(record("proposed", trial=i, round=0, config={"x": 0.2 * i, "y": 0.1}, source="initial", model=None, acquisition=None))
        with open(path, "ab") as fh:
            fh.write([b"\x00\x01 not a record\n", b"{\"half\": \n"][i])
        j.append(record("started", trial=i, attempt=1, worker="w", host="h", pid=1))
        j.append(record("scored", trial=i, attempt=1, score=0.5 - 0.1 * i, metrics={}, seconds=0.1))
    with open(path, "ab") as fh:
        fh.write(b"[1, 2, 3]\n")
    before = path.read_bytes()
    code, err = _run("run", str(spec))
    assert code == 0 and "Traceback" not in err, err
    assert path.read_bytes().startswith(before)  # nothing already there is lost or rewritten, garbage included
    table = forebear.load(path)
    assert table.skipped == 3 and table.finished == 4 and table.trials[1].score == 0.4
    assert json.loads(_run_json("status", str(path)))["skipped_lines"] == 3
    # The history logbook of another space is skipped with a note, not an error.
    assert "history: history task 'store-12'" in err and "lacks parameter 'x' and the space gives it no default; task skipped" in err
    assert "history: 0 earlier search(es)" in err


def _run_json(*args: str) -> str:
    res = CliRunner().invoke(cli_main, [*args, "--json"])
    assert res.exit_code == 0, res.stderr
    return res.stdout
