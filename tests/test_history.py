"""history.py: logbooks and CSV tables aligned to the current space."""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pytest

from forebear.core.space import Space
from forebear.core.spec import HistorySource
from forebear.records.history import HistoryError, load
from forebear.records.logbook import Logbook, record

SPACE = Space.from_dict({
    "learning_rate": {"float": [1e-4, 0.3], "log": True},
    "depth": {"int": [2, 12]},
    "subsample": {"float": [0.5, 1.0], "default": 1.0},
    "booster": {"categories": ["tree", "linear"]},
})


def write_logbook(path: Path, rows: list[tuple[dict, float | None]], sense: str = "minimize", name: str = "store-3") -> None:
    recs = [record("search", name=name, spec_hash="x", space=SPACE.to_dict(), objective={"call": "m:f", sense: "val_loss"}, seed=0)]
    for i, (config, score) in enumerate(rows):
        recs.append(record("proposed", trial=i, round=0, config=config, source="initial", model=None, acquisition=None))
        if score is None:
            recs.append(record("failed", trial=i, attempt=1, error="boom", retryable=False))
        else:
            recs.append(record("scored", trial=i, attempt=1, score=score, metrics={}, seconds=1.0))
    Logbook(path).append_many(recs)


def cfg(lr: float = 0.01, depth: int = 4, subsample: float = 0.8, booster: str = "tree") -> dict:
    return {"learning_rate": lr, "depth": depth, "subsample": subsample, "booster": booster}


def test_logbook_glob_takes_scored_trials_only(tmp_path: Path) -> None:
    write_logbook(tmp_path / "store-1.jsonl", [(cfg(depth=3), 0.5), (cfg(depth=4), None), (cfg(depth=5), 0.3)], name="store-1")
    write_logbook(tmp_path / "store-2.jsonl", [(cfg(depth=6), 0.7)], name="store-2")
    hist = load([HistorySource(logbook=str(tmp_path / "store-*.jsonl"))], SPACE, "minimize")
    assert [t.name for t in hist.tasks] == ["store-1", "store-2"]
    t = hist.tasks[0]
    assert [c["depth"] for c in t.configs] == [3, 5]
    np.testing.assert_allclose(t.y, [0.5, 0.3])
    assert t.X.shape == (2, SPACE.dim)
    np.testing.assert_allclose(t.X, SPACE.encode_many(t.configs))


def test_maximize_spec_negates_and_header_direction_does_not_override(tmp_path: Path) -> None:
    write_logbook(tmp_path / "a.jsonl", [(cfg(), 0.9)], sense="minimize")
    hist = load([HistorySource(logbook=str(tmp_path / "a.jsonl"))], SPACE, "maximize")
    np.testing.assert_allclose(hist.tasks[0].y, [-0.9])
    assert any("recorded as minimize, read as maximize" in w for w in hist.warnings)


def test_exclude_skips_the_searchs_own_logbook(tmp_path: Path) -> None:
    write_logbook(tmp_path / "old.jsonl", [(cfg(), 0.1)], name="old")
    write_logbook(tmp_path / "own.jsonl", [(cfg(), 0.2)], name="own")
    hist = load([HistorySource(logbook=str(tmp_path / "*.jsonl"))], SPACE, "minimize", exclude=[tmp_path / "own.jsonl"])
    assert [t.name for t in hist.tasks] == ["old"]


def test_out_of_bounds_and_unknown_category_dropped_with_count(tmp_path: Path) -> None:
    rows = [(cfg(depth=20), 0.1), (cfg(booster="dart"), 0.2), (cfg(), 0.3)]
    write_logbook(tmp_path / "a.jsonl", rows)
    hist = load([HistorySource(logbook=str(tmp_path / "a.jsonl"))], SPACE, "minimize")
    assert len(hist.tasks[0]) == 1
    assert any("dropped 2 trial(s) outside the current space" in w for w in hist.warnings)


def test_missing_parameter_takes_default_or_skips_task(tmp_path: Path) -> None:
    no_subsample = {"learning_rate": 0.01, "depth": 3, "booster": "tree"}
    write_logbook(tmp_path / "a.jsonl", [(no_subsample, 0.4)], name="a")
    no_depth = {"learning_rate": 0.01, "subsample": 0.9, "booster": "tree"}
    write_logbook(tmp_path / "b.jsonl", [(no_depth, 0.4)], name="b")
    hist = load([HistorySource(logbook=str(tmp_path / "*.jsonl"))], SPACE, "minimize")
    assert [t.name for t in hist.tasks] == ["a"]
    assert hist.tasks[0].configs[0]["subsample"] == 1.0
    assert any("lacks parameter 'depth'" in w and "skipped" in w for w in hist.warnings)


def test_csv_table_by_task_with_extra_columns(tmp_path: Path) -> None:
    path = tmp_path / "past.csv"
    path.write_text(
        "store_id,learning_rate,depth,booster,val_loss,notes\n"
        "s1,0.01,3,tree,0.5,first\n"
        "s1,0.02,4,linear,0.4,\n"
        "s2,0.05,8,tree,0.9,x\n"
    )
    hist = load([HistorySource(csv=str(path), task="store_id", score="val_loss")], SPACE, "minimize")
    assert [t.name for t in hist.tasks] == ["s1", "s2"]
    assert hist.tasks[0].configs[1] == {"learning_rate": 0.02, "depth": 4, "subsample": 1.0, "booster": "linear"}
    assert isinstance(hist.tasks[0].configs[0]["depth"], int)
    np.testing.assert_allclose(hist.tasks[0].y, [0.5, 0.4])


@pytest.mark.parametrize(
    ("text", "needle"),
    [
        ("store_id,learning_rate,depth,booster,val_loss\ns1,0.01,3,tree,oops\n", "line 2: column 'val_loss': 'oops' is not a number"),
        ("store_id,learning_rate,depth,booster,loss\ns1,0.01,3,tree,1\n", "line 1: no column 'val_loss'"),
        ("store_id,learning_rate,depth,booster,val_loss\ns1,0.01,3,tree,1\ns1,0.01,x,tree,1\n", "line 3: column 'depth'"),
        ("store_id,learning_rate,depth,booster,val_loss\ns1,0.01,3,tree,1,extra\n", "line 2: more cells"),
        ("", "empty file"),
    ],
)
def test_bad_csv_names_file_and_line(tmp_path: Path, text: str, needle: str) -> None:
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(HistoryError) as info:
        load([HistorySource(csv=str(path), task="store_id", score="val_loss")], SPACE, "minimize")
    assert str(path) in str(info.value) and needle in str(info.value)


def test_bad_logbook_line_names_line_but_torn_tail_is_skipped(tmp_path: Path) -> None:
    path = tmp_path / "a.jsonl"
    write_logbook(path, [(cfg(), 0.3), (cfg(depth=5), 0.2)])
    with open(path, "ab") as fh:
        fh.write(b'{"v":1,"kind":"scored","tri')  # a writer died mid-record
    hist = load([HistorySource(logbook=str(path))], SPACE, "minimize")
    assert len(hist.tasks[0]) == 2
    lines = path.read_bytes().split(b"\n")
    lines.insert(2, b"not json at all")
    path.write_bytes(b"\n".join(lines))
    with pytest.raises(HistoryError, match=r"a\.jsonl: line 3: not a JSON record"):
        load([HistorySource(logbook=str(path))], SPACE, "minimize")


def test_missing_file_and_empty_glob(tmp_path: Path) -> None:
    with pytest.raises(HistoryError, match="no such file"):
        load([HistorySource(logbook=str(tmp_path / "none.jsonl"))], SPACE, "minimize")
    hist = load([HistorySource(logbook=str(tmp_path / "none-*.jsonl"))], SPACE, "minimize")
    assert len(hist) == 0 and "matched no file" in hist.warnings[0]
    with pytest.raises(HistoryError, match="cannot read"):
        load([HistorySource(csv=str(tmp_path / "none.csv"), task="t", score="s")], SPACE, "minimize")


def test_hash_follows_contents_not_file_names(tmp_path: Path) -> None:
    write_logbook(tmp_path / "a.jsonl", [(cfg(), 0.3)])
    write_logbook(tmp_path / "b.jsonl", [(cfg(), 0.3)])
    write_logbook(tmp_path / "c.jsonl", [(cfg(), 0.31)])
    h = [load([HistorySource(logbook=str(tmp_path / f"{x}.jsonl"))], SPACE, "minimize").hash() for x in "abc"]
    assert h[0] == h[1] != h[2]


def test_history_error_pickles() -> None:
    err = HistoryError("history table x.csv: line 3: bad")
    back = pickle.loads(pickle.dumps(err))
    assert type(back) is HistoryError and str(back) == str(err)


SPEC_HEAD = """\
objective: {call: m:f, minimize: val_loss}
space:
  learning_rate: {float: [1.0e-4, 0.3], log: true}
  depth: {int: [2, 12]}
  subsample: {float: [0.5, 1.0], default: 1.0}
  booster: {categories: [tree, linear]}
"""


@pytest.mark.parametrize(
    ("entry", "names"),
    [
        # A mapping with a glob, relative to the spec's folder: every matching logbook, in order.
        ("history: {logbook: 'past/store-*.jsonl'}\n", ["store-1", "store-2"]),
        # A single string entry (no list) naming one logbook.
        ("history: past/store-2.jsonl\n", ["store-2"]),
        # A single mapping entry naming one logbook.
        ("history: {logbook: past/other.jsonl}\n", ["other"]),
    ],
)
def test_history_forms_in_a_spec_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, entry: str, names: list[str]) -> None:
    from forebear.core import spec as spec_mod

    folder = tmp_path / "project"
    (folder / "past").mkdir(parents=True)
    write_logbook(folder / "past" / "store-1.jsonl", [(cfg(depth=3), 0.5), (cfg(depth=5), 0.3)], name="store-1")
    write_logbook(folder / "past" / "store-2.jsonl", [(cfg(depth=6), 0.7)], name="store-2")
    write_logbook(folder / "past" / "other.jsonl", [(cfg(depth=8), 0.2)], name="other")
    (folder / "search.yaml").write_text(SPEC_HEAD + entry)
    monkeypatch.chdir(tmp_path)  # relative paths follow the spec's folder, not the working folder
    s = spec_mod.load(folder / "search.yaml")
    assert len(s.history) == 1 and s.history[0].logbook.startswith(str(folder.resolve()))
    hist = load(s.history, s.space, s.objective.sense)
    assert [t.name for t in hist.tasks] == names and not hist.warnings
