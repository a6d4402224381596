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


# -- 2 and 9: what an objective returns never makes a record unwritable or is dropped silently ------


def shared_task(tmp_path: Path, call: str, **kw: object) -> tuple[Logbook, object]:
    from forebear.cluster import runner

    logbook = tmp_path / "runs" / "s.jsonl"
    logs = tmp_path / "runs" / "s.logs"
    logs.mkdir(parents=True, mode=0o700)
    (logs / runner.PROBE_NAME).write_text("tok")
    book = Logbook(logbook)
    book.append(record("proposed", trial=3, round=0, config={"x": 0.1}, source="initial", model=None, acquisition=None))
    base: dict[str, object] = {"search": "t", "trial": 3, "attempt": 1, "config": {"x": 0.1}, "metric": "loss", "call": call,
                               "logbook": str(logbook), "logs": str(logs), "token": "tok"}
    base.update(kw)
    return book, runner.AttemptTask(**base)  # type: ignore[arg-type]


@pytest.mark.parametrize("shared", [True, False], ids=["shared-filesystem", "no-shared-filesystem"])
def test_a_huge_metrics_dict_keeps_the_score_and_says_what_was_dropped(tmp_path: Path, shared: bool) -> None:
    from forebear.cluster.runner import AttemptTask, run_attempt
    from forebear.records.logbook import MAX_RECORD_BYTES

    book, task = shared_task(tmp_path, "objectives:huge_metrics")
    if not shared:
        task = AttemptTask(**{**task.__dict__, "token": "not-the-token"})  # type: ignore[attr-defined]
    res = run_attempt(task)  # type: ignore[arg-type]
    assert res.outcome == "scored", res.error
    final = res.records[-1]
    assert final["score"] == 0.125 and final["metrics"]["loss"] == 0.125 and final["metrics"]["acc"] == 0.5
    assert "blob" not in final["metrics"] and "blob" in final["dropped"] and "bytes; dropped" in final["dropped"]["blob"]
    assert final["dropped"]["curve"] == "list, not a number" and final["dropped"]["side"] == "NaN"
    if not shared:
        assert not res.written
        book.append_many(res.records)  # what the controller does with a result it collected
    data = book.path.read_bytes()
    assert max(len(line) for line in data.split(b"\n")) < MAX_RECORD_BYTES
    table = book.fold()
    assert table.trials[3].state == "scored" and table.trials[3].score == 0.125


def test_a_huge_error_text_from_the_controller_side_is_cut_not_refused(tmp_path: Path) -> None:
    book = Logbook(tmp_path / "x.jsonl")
    error = "E" * (3 << 20)
    book.append({"v": 1, "at": 0, "kind": "failed", "trial": 0, "attempt": 1, "error": error, "retryable": False})
    rec = book.records()[0]
    assert rec["error"].startswith("EEEE") and "characters cut" in rec["error"] and len(rec["error"]) < 20_000


def test_an_objective_returning_an_int_beyond_float_is_a_bad_result_not_an_objective_error() -> None:
    from forebear.cluster.runner import AttemptTask, run_attempt

    res = run_attempt(AttemptTask(search="t", trial=0, attempt=1, config={"x": 0.1}, metric="loss", call="objectives:beyond_float"))
    assert res.outcome == "failed"
    assert "bad result: metric 'loss' is an int of 401 digits, beyond the largest float" in (res.error or "")
    assert "objective raised" not in (res.error or "")


# -- the race of a dead controller's attempt with a resumed controller -----------------------------


def test_a_result_that_arrives_after_its_attempt_was_settled_lost_is_not_recorded(tmp_path: Path) -> None:
    from forebear.cluster.runner import run_attempt

    book, task = shared_task(tmp_path, "objectives:sleepy", config={"x": 0.1, "y": 0.2, "seconds": 1.5})
    out: dict[str, object] = {}
    t = threading.Thread(target=lambda: out.update(res=run_attempt(task)), daemon=True)  # type: ignore[arg-type]
    t.start()
    deadline = 30.0
    import time

    end = time.monotonic() + deadline
    while not any(r["kind"] == "started" for r in book.records()):
        assert time.monotonic() < end, "the attempt did not start"
        time.sleep(0.05)
    # What a resumed controller writes for an attempt the dead controller left running.
    book.append(record("lost", trial=3, attempt=1, reason="restart"))
    t.join(deadline)
    assert not t.is_alive()
    res = out["res"]
    assert res.outcome == "superseded"  # type: ignore[attr-defined]
    kinds = [r["kind"] for r in book.records()]
    assert kinds == ["proposed", "started", "lost"]
    # A lost record of another attempt does not stop a result.
    book2, task2 = shared_task(tmp_path / "b", "objectives:quadratic")
    book2.append(record("lost", trial=3, attempt=2, reason="restart"))
    assert run_attempt(task2).outcome == "scored"  # type: ignore[arg-type]


# -- 3: whatever an attempt starts ends with it, a setsid grandchild included -----------------------


def _gone(pid: int, within: float = 10.0) -> bool:
    import time

    end = time.monotonic() + within
    while time.monotonic() < end:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        # A zombie not yet reaped by its parent counts as gone: the state is the field after the
        # parenthesised command name, "Z" for a zombie (Linux proc(5), /proc/<pid>/stat; from memory).
        try:
            if open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()[0] == "Z":
                return True
        except OSError:
            return True
        time.sleep(0.05)
    return False


@pytest.mark.timeout(60)
@pytest.mark.parametrize("hang", [False, True], ids=["clean-exit", "timeout"])
def test_processes_an_attempt_starts_end_with_it(tmp_path: Path, hang: bool) -> None:
    import signal
    import sys

    from forebear.cluster.runner import AttemptTask, run_attempt

    pidfile = tmp_path / "pids"
    task = AttemptTask(search="t", trial=0, attempt=1, config={"pidfile": str(pidfile), "hang": hang}, metric="loss",
                       call="objectives:leave_processes", timeout=3.0 if hang else None)
    try:
        res = run_attempt(task)
        assert res.outcome == ("timeout" if hang else "scored"), res.error
        pids = [int(p) for p in pidfile.read_text().split()]
        if sys.platform.startswith("linux"):
            assert all(_gone(p) for p in pids), pids
        else:
            assert _gone(pids[0])
    finally:
        for p in (int(x) for x in (pidfile.read_text().split() if pidfile.exists() else [])):
            try:
                os.kill(p, signal.SIGKILL)
            except ProcessLookupError:
                pass


def test_a_command_that_leaves_a_background_process_takes_it_along(tmp_path: Path) -> None:
    from forebear.cluster.runner import AttemptTask, run_attempt

    pidfile = tmp_path / "bg"
    task = AttemptTask(search="t", trial=0, attempt=1, config={"x": 0.25}, metric="loss",
                       command=("sh", "-c", f"sleep 300 & echo $! > {pidfile}; echo {{x}}"))
    res = run_attempt(task)
    assert res.outcome == "scored" and res.records[-1]["score"] == 0.25
    assert _gone(int(pidfile.read_text()))


# -- 8: records with wrong field types are skipped with their line numbers; --json is standard JSON ---


def test_records_with_wrong_field_types_are_skipped_and_named_by_line(tmp_path: Path) -> None:
    log = small_logbook(tmp_path / "x.jsonl")
    with open(log, "a") as fh:
        fh.write(json.dumps({"v": 1, "at": 2, "kind": "proposed", "trial": 1, "round": 0, "config": [1, 2]}) + "\n")
        fh.write(json.dumps({"v": 1, "at": 2, "kind": "proposed", "trial": 2, "round": 0, "config": {"x": 0.9}}) + "\n")
        fh.write(json.dumps({"v": 1, "at": 3, "kind": "scored", "trial": 2, "attempt": 1, "score": "-1e9", "metrics": {}}) + "\n")
        fh.write('{"v": 1, "at": 3, "kind": "scored", "trial": 2, "attempt": 1, "score": -1e400, "metrics": {}}\n')
        fh.write('{"v": 1, "at": 3, "kind": "scored", "trial": 0, "attempt": 2, "score": 0.5, "metrics": {"m": 1e400}}\n')
    table = Logbook(log).fold()
    assert [n for n, _ in table.invalid] == [4, 6, 7] and table.bad_lines == [4, 6, 7]
    assert "'config' must be a mapping, got [1, 2]" in table.invalid[0][1]
    assert "'score' must be a finite number, got '-1e9'" in table.invalid[1][1]
    code, out, err = cli("best", str(log), "--json")
    assert code == 0, err
    # Standard JSON has no NaN or Infinity (RFC 8259, sec. 6, from memory); Python's parser
    # accepts them, so check the text too.
    best = json.loads(out)
    assert best["trial"] == 0 and best["score"] == 0.25
    assert "Infinity" not in out and "NaN" not in out
    assert "3 record(s) with wrong field types" in err and "line(s) 4, 6, 7" in err
    code, out, err = cli("status", str(log), "--json")
    assert code == 0 and json.loads(out)["bad_lines"] == [4, 6, 7] and json.loads(out)["invalid_records"] == 3
    code, _, err = cli("status", str(log))
    assert code == 0 and "Traceback" not in err and "line(s) 4, 6, 7" in err


def test_json_output_has_no_non_standard_numbers(tmp_path: Path) -> None:
    log = tmp_path / "x.jsonl"
    small_logbook(log)
    with open(log, "a") as fh:  # a metric of infinity in the best trial's later record
        fh.write('{"v": 1, "at": 3, "kind": "proposed", "trial": 5, "round": 0, "config": {"x": 1e400}}\n')
        fh.write('{"v": 1, "at": 3, "kind": "scored", "trial": 5, "attempt": 1, "score": 0.1, "metrics": {"m": -1e400}}\n')
    code, out, err = cli("best", str(log), "--json")
    assert code == 0, err
    assert "Infinity" not in out and json.loads(out)["metrics"]["m"] is None and json.loads(out)["config"]["x"] is None


# -- 10: messages that name the real problem ------------------------------------------------------


@pytest.mark.parametrize(
    ("header", "fragment"),
    [
        ({"at": 1, "kind": "search", "objective": {"minimize": "l"}}, "the search record has no format version (v)"),
        ({"v": "1", "at": 1, "kind": "search", "objective": {"minimize": "l"}}, "format version '1' is not a whole number"),
        ({"v": -5, "at": 1, "kind": "search", "objective": {"minimize": "l"}}, "format version -5 was never written by forebear"),
        ({"v": 9, "at": 1, "kind": "search", "objective": {"minimize": "l"}}, "format version 9 is newer than this forebear reads (1)"),
    ],
)
def test_format_version_messages(tmp_path: Path, header: dict, fragment: str) -> None:
    log = tmp_path / "x.jsonl"
    log.write_text(json.dumps(header) + "\n")
    code, _, err = cli("status", str(log))
    assert code == 2 and fragment in err and "newer" not in err.replace(fragment, "") and len(err.strip().splitlines()) == 1


def test_an_infinite_duration_says_so(tmp_path: Path) -> None:
    spec = tmp_path / "s.yaml"
    spec.write_text("objective: {call: m:f, minimize: l}\nspace: {x: {float: [0, 1]}}\nbudget: {trial_timeout: .inf}\n")
    code, _, err = cli("check", str(spec))
    assert code == 2 and "must be a finite number of seconds, got inf; leave the key out for no limit" in err


def test_a_lock_file_that_cannot_be_created_is_not_reported_as_another_controller(tmp_path: Path) -> None:
    from forebear.records.locks import ControllerLock

    book = Logbook(tmp_path / "x.jsonl")
    (tmp_path / "x.jsonl.controller.lock").mkdir()  # something in the way of the lock file
    with pytest.raises(LogbookError) as info:
        ControllerLock(book).acquire()
    message = str(info.value.args[-1])
    assert "cannot create its lock file" in message or "is not a regular file" in message
    assert "driven by" not in message


# -- 9: numbers at the edges ------------------------------------------------------------------------


def test_a_float_range_wider_than_the_largest_double_is_refused(tmp_path: Path) -> None:
    # The largest IEEE 754 double is about 1.798e308 (sys.float_info.max): the width 2e308 overflows.
    spec = tmp_path / "s.yaml"
    spec.write_text("objective: {call: m:f, minimize: l}\nspace: {x: {float: [-1.0e308, 1.0e308]}}\n")
    code, _, err = cli("check", str(spec))
    assert code == 2 and "is wider than the largest float" in err and "line 2" in err


def test_categories_that_are_one_value_are_refused_and_distinct_ones_stay_distinct() -> None:
    import numpy as np

    from forebear.engine.proposer import Proposer

    with pytest.raises(ValueError, match=r"1 and 1.0 are one category"):
        Space.from_dict({"c": {"categories": [1, "1", True, 1.0]}})
    space = Space.from_dict({"c": {"categories": [1, "1", True]}})
    p = space["c"]
    assert [p.index(v) for v in (1, "1", True, 1.0)] == [0, 1, 2, 0]
    # The proposer sees three distinct configurations and offers all three before it runs dry.
    prop = Proposer(space, seed=0)
    got = [x.config["c"] for x in prop.propose(3, observed=[], failed=[], pending=[])]
    assert sorted(map(repr, got)) == sorted(map(repr, [1, "1", True]))
    assert np.allclose(space.encode({"c": got[0]}).sum(), 1.0)


# -- 12: the captured output of an attempt is capped, head and tail kept --------------------------------


def test_an_attempt_that_prints_50_mb_keeps_a_capped_log(tmp_path: Path) -> None:
    from forebear.cluster.capture import CAPTURE_HEAD, CAPTURE_TAIL
    from forebear.cluster.runner import run_attempt

    book, task = shared_task(tmp_path, "objectives:loud")
    res = run_attempt(task)  # type: ignore[arg-type]
    assert res.outcome == "scored", res.error
    log = tmp_path / "runs" / "s.logs" / "trial-00003-attempt-1.log"
    data = log.read_bytes()
    assert len(data) <= CAPTURE_HEAD + CAPTURE_TAIL + 200
    assert data.startswith(b"x" * 100) and data.rstrip().endswith(b"the last line")
    cut = 50 * 1024 * 1024 + len("the last line\n") - CAPTURE_HEAD - CAPTURE_TAIL
    assert f"[forebear: {cut} bytes of output cut here".encode() in data


def test_a_command_that_prints_50_mb_then_its_score_is_scored_with_capped_files(tmp_path: Path) -> None:
    from forebear.cluster.capture import CAPTURE_HEAD, CAPTURE_TAIL
    from forebear.cluster.runner import run_attempt

    script = "import sys\nw = sys.stdout.write\nfor _ in range(51200): w('y' * 1023 + '\\n')\nprint(0.75)"
    book, task = shared_task(tmp_path, None, command=("python", "-c", script))  # type: ignore[arg-type]
    res = run_attempt(task)  # type: ignore[arg-type]
    assert res.outcome == "scored" and res.records[-1]["score"] == 0.75, res.error
    out = tmp_path / "runs" / "s.logs" / "trial-00003-attempt-1.out"
    assert out.stat().st_size <= CAPTURE_HEAD + CAPTURE_TAIL + 200 and b"bytes of output cut here" in out.read_bytes()


# -- 6: cluster.local.memory_limit limits each attempt process --------------------------------------


def test_memory_limit_applies_to_the_attempt_process() -> None:
    from forebear.cluster.dispatch import attempt_memory
    from forebear.cluster.runner import AttemptTask, run_attempt
    from forebear.core.spec import load as load_spec_dict

    spec = load_spec_dict({"objective": {"call": "objectives:touch_memory", "minimize": "loss"}, "space": {"mb": {"int": [1, 4000]}},
                           "cluster": {"local": {"workers": 1, "memory_limit": "1500MB"}}}, base_dir=".")
    limit = attempt_memory(spec)
    assert limit == 1_500_000_000  # dask's parse_bytes: MB is decimal; 1.5e9 bytes = 1431 MiB
    base = {"search": "t", "trial": 0, "attempt": 1, "metric": "loss", "call": "objectives:touch_memory", "memory_limit": limit}
    res = run_attempt(AttemptTask(config={"mb": 2000}, **base))  # type: ignore[arg-type]
    assert res.outcome == "failed"
    assert "objective raised MemoryError" in (res.error or "")
    assert "limited to 1431 MiB by cluster.local.memory_limit" in (res.error or "")
    assert run_attempt(AttemptTask(config={"mb": 50}, **base)).outcome == "scored"  # type: ignore[arg-type]


def test_a_memory_limit_that_is_not_a_size_is_a_spec_error(tmp_path: Path) -> None:
    spec = tmp_path / "s.yaml"
    spec.write_text("objective: {call: m:f, minimize: l}\nspace: {x: {float: [0, 1]}}\ncluster: {local: {memory_limit: lots}}\n")
    code, _, err = cli("check", str(spec))
    assert code == 2 and "cluster.local.memory_limit: must be a memory size such as 400MB" in err


# -- 11: cost that grows where it should not --------------------------------------------------------


def test_a_large_history_task_keeps_a_subset_and_says_so(tmp_path: Path) -> None:
    import numpy as np

    from forebear.records import history

    rng = np.random.default_rng(0)
    table = tmp_path / "h.csv"
    with open(table, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["task", "x", "c", "loss"])
        for i in range(history.MAX_TASK_POINTS + 500):
            w.writerow(["a", rng.uniform(), ["p", "q"][i % 2], float(i)])
    space = Space.from_dict({"x": {"float": [0, 1]}, "c": {"categories": ["p", "q"]}})
    hist = load_history([HistorySource(csv=str(table), task="task", score="loss")], space, "minimize")
    task = hist.tasks[0]
    assert len(task) == history.MAX_TASK_POINTS and task.X.shape == (history.MAX_TASK_POINTS, 3)
    assert sorted(task.y)[: history.KEEP_BEST] == list(range(history.KEEP_BEST))  # the best are all kept
    assert any(f"{history.MAX_TASK_POINTS + 500} trials; {history.MAX_TASK_POINTS} kept" in w for w in hist.warnings)
    # The encoding column by column is the encoding row by row.
    assert np.array_equal(task.X, np.vstack([space.encode(c) for c in task.configs]))


@pytest.mark.timeout(120)
def test_a_report_of_a_10000_value_categorical_is_quick(tmp_path: Path) -> None:
    import time

    from forebear.face.report import write_report

    cats = [f"v{i}" for i in range(10_000)]
    space = Space.from_dict({"c": {"categories": cats}, "x": {"float": [0, 1]}})
    book = Logbook(tmp_path / "r.jsonl")
    book.append(record("search", name="r", spec_hash="h", space=space.to_dict(), objective={"call": "m:f", "minimize": "loss"}, seed=0))
    for t in range(4):
        book.append(record("proposed", trial=t, round=0, config={"c": cats[t * 7], "x": 0.1 * t}, source="initial", model=None, acquisition=None))
        book.append(record("scored", trial=t, attempt=1, score=0.1 * t, metrics={}, seconds=1.0))
    t0 = time.monotonic()
    write_report(book.fold(), tmp_path / "rep", logbook=book.path)
    assert time.monotonic() - t0 < 60  # minutes before the tick labels were limited
