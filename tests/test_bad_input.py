"""Bad input through the command line: one clear line per problem, exit 2, no traceback.

The cases here are the spec and logbook rows of the table in docs/reliability.md;
objective outputs and history files have their rows in the runner and history tests.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from forebear.face.cli import main
from forebear.records.logbook import Logbook, record

BAD = sorted((Path(__file__).parent / "data" / "bad_specs").glob("*.yaml"))


def run_cli(*args: str) -> tuple[int, str]:
    res = CliRunner().invoke(main, list(args))
    return res.exit_code, res.stderr


@pytest.mark.parametrize("path", BAD, ids=[p.stem for p in BAD])
def test_check_bad_spec(path: Path) -> None:
    code, err = run_cli("check", str(path))
    assert code == 2
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert lines, err
    expected = path.read_text().splitlines()[0].removeprefix("# expect: ")
    assert any(expected in line for line in lines)
    assert err.rstrip().endswith("nothing was written")


def test_run_bad_spec_writes_nothing(tmp_path: Path) -> None:
    spec = tmp_path / "s.yaml"
    spec.write_text("objective: {call: m:f, minimize: l}\nspace: {x: {float: [1, 0]}}\nlogbook: runs/x.jsonl\n")
    code, err = run_cli("run", str(spec))
    assert code == 2 and "inverted range" in err
    assert not (tmp_path / "runs").exists()


def test_huge_spec(tmp_path: Path) -> None:
    spec = tmp_path / "big.yaml"
    with open(spec, "w") as fh:
        line = "# " + "z" * 1000 + "\n"
        for _ in range(50_000):  # about 50 MB
            fh.write(line)
    code, err = run_cli("check", str(spec))
    assert code == 2 and "a spec must be under" in err and len(err.splitlines()) == 2


def test_spec_is_a_folder(tmp_path: Path) -> None:
    code, err = run_cli("check", str(tmp_path))
    assert code == 2 and "Traceback" not in err


def _logbook(tmp_path: Path) -> Logbook:
    j = Logbook(tmp_path / "j.jsonl")
    j.append(record("search", name="s", spec_hash="h", space={}, objective={"minimize": "loss"}, seed=0))
    j.append(record("proposed", trial=0, round=0, config={"x": 1}, source="initial", model=None, acquisition=None))
    j.append(record("scored", trial=0, attempt=1, score=0.25, metrics={}, seconds=1.0))
    return j


def test_logbook_with_garbage_lines_still_reads(tmp_path: Path) -> None:
    j = _logbook(tmp_path)
    with open(j.path, "ab") as fh:
        fh.write(b"\x00\x01garbage\n{not json}\n")
    before = j.path.read_bytes()
    code, err = run_cli("status", str(j.path))
    assert code == 0 and "2 unreadable line(s) skipped" in err
    assert j.path.read_bytes() == before  # reading never rewrites


@pytest.mark.parametrize(
    ("content", "fragment"),
    [
        (json.dumps({"v": 2, "at": 1, "kind": "search", "objective": {"minimize": "l"}}) + "\n", "format version 2 is newer"),
        (json.dumps({"v": 1, "at": 1, "kind": "proposed", "trial": 0, "config": {}}) + "\n", "no search record"),
        ("", "holds no forebear records"),
        ("\xff\xfe binary", "holds no forebear records"),
    ],
)
def test_bad_logbooks(tmp_path: Path, content: str, fragment: str) -> None:
    p = tmp_path / "j.jsonl"
    p.write_bytes(content.encode("utf-8", "surrogateescape") if content else b"")
    for command in ("status", "best"):
        code, err = run_cli(command, str(p))
        assert code == 2, err
        assert fragment in err and "Traceback" not in err
        assert len(err.strip().splitlines()) == 1
