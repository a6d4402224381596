"""Spec loading: the full example spec of docs/spec.md, the bad-spec corpus, number forms."""

from __future__ import annotations

import pickle
from pathlib import Path

import pytest

from forebear.core import spec as spec_mod
from forebear.core.spec import SpecError, load
from forebear.core.values import parse_duration

DATA = Path(__file__).parent / "data"
BAD = sorted((DATA / "bad_specs").glob("*.yaml"))

GOOD = """\
name: store-17-demand
objective:
  call: mypkg.train:evaluate
  minimize: val_loss
space:
  learning_rate: {float: [1.0e-4, 0.3], log: true}
  depth: {int: [2, 12]}
  subsample: {float: [0.5, 1.0], default: 1.0}
  booster: {categories: [tree, linear]}
budget:
  trials: 60
  batch: 8
  concurrency: 4
  trial_timeout: 20m
  retries: 2
  retry_errors: false
  wall_time: 6h
history:
  - runs/store-*.jsonl
  - {csv: past/results.csv, task: store_id, score: val_loss}
cluster:
  local: {workers: 4}
resources: {GPU: 1}
logbook: runs/store-17.jsonl
lock: strict
seed: 7
"""


def write(tmp_path: Path, text: str, name: str = "search.yaml") -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def test_full_example_spec_loads(tmp_path: Path) -> None:
    s = load(write(tmp_path, GOOD))
    assert s.name == "store-17-demand"
    assert s.objective.call == "mypkg.train:evaluate"
    assert (s.objective.metric, s.objective.sense, s.objective.sign) == ("val_loss", "minimize", 1.0)
    assert s.space.names == ["learning_rate", "depth", "subsample", "booster"]
    assert s.space["learning_rate"].log and s.space["learning_rate"].low == pytest.approx(1e-4)
    assert s.space["subsample"].default == 1.0
    assert s.budget.trial_timeout == 1200 and s.budget.wall_time == 6 * 3600
    assert s.budget.trials == 60 and s.budget.batch == 8 and s.budget.concurrency == 4
    # Relative paths resolve against the spec's folder, not the working directory.
    assert s.logbook == tmp_path.resolve() / "runs" / "store-17.jsonl"
    assert s.history[0].logbook == str(tmp_path.resolve() / "runs" / "store-*.jsonl")
    assert s.history[1].csv == str(tmp_path.resolve() / "past" / "results.csv")
    assert (s.history[1].task, s.history[1].score) == ("store_id", "val_loss")
    assert s.cluster.kind == "local" and s.cluster.options["workers"] == 4
    assert dict(s.resources) == {"GPU": 1}
    assert s.seed == 7 and s.lock == "strict"


def test_spec_is_frozen(tmp_path: Path) -> None:
    s = load(write(tmp_path, GOOD))
    with pytest.raises(AttributeError):
        s.seed = 3  # type: ignore[misc]


def test_defaults_fill_omitted_keys(tmp_path: Path) -> None:
    s = load(write(tmp_path, "objective: {call: m:f, maximize: acc}\nspace: {x: {float: [0, 1]}}\n", "tiny.yaml"))
    d = spec_mod.DEFAULTS["budget"]
    assert s.budget.trials == d["trials"] and s.budget.retries == d["retries"]
    assert s.name == "tiny" and s.logbook.name == "tiny.jsonl"
    assert s.cluster.kind == "local" and s.objective.sign == -1.0


@pytest.mark.parametrize("path", BAD, ids=[p.stem for p in BAD])
def test_bad_spec_corpus(path: Path) -> None:
    expected = path.read_text().splitlines()[0].removeprefix("# expect: ")
    with pytest.raises(SpecError) as info:
        load(path)
    message = str(info.value)
    assert expected in message, message
    # Every message names the file (and, where a key is involved, its line).
    assert all(path.name in line for line in info.value.errors)


def test_corpus_is_large_enough() -> None:
    assert len(BAD) >= 25


def test_every_error_reported_at_once(tmp_path: Path) -> None:
    text = "objective: {call: nope, minimize: a}\nspace:\n  r: {float: [0, 1], log: true}\nbudget: {trials: -1, batch: 0}\n"
    with pytest.raises(SpecError) as info:
        load(write(tmp_path, text))
    assert len(info.value.errors) == 4
    assert any("line 3" in e for e in info.value.errors)


@pytest.mark.parametrize(
    ("text", "value"),
    [("1e-4", 1e-4), ("1E-4", 1e-4), ("1.0e4", 1e4), ("1e4", 1e4), ("2.5E+3", 2500.0), (".5e-2", 0.005), ("-1e-3", -1e-3), ("1.0e-4", 1e-4)],
)
def test_scientific_notation_is_a_number(tmp_path: Path, text: str, value: float) -> None:
    # PyYAML's YAML 1.1 float resolver needs a dot and a signed exponent, so "1e-4" would be a string.
    lo = value if value < 0 else 0.0
    hi = value if value > 0 else 1.0
    low, high = (lo, hi) if lo < hi else (hi, lo)
    body = f"objective: {{call: m:f, minimize: l}}\nspace:\n  x: {{float: [{text if value < 0 else 0}, {text if value > 0 else 1}]}}\n"
    s = load(write(tmp_path, body))
    p = s.space["x"]
    assert (p.low, p.high) == (pytest.approx(low), pytest.approx(high))


def test_quoted_scientific_stays_a_string(tmp_path: Path) -> None:
    body = 'objective: {call: m:f, minimize: l}\nspace:\n  x: {categories: ["1e-4", b]}\n'
    s = load(write(tmp_path, body))
    assert s.space["x"].categories == ("1e-4", "b")


def test_concurrency_clamped_with_note(tmp_path: Path) -> None:
    body = "objective: {call: m:f, minimize: l}\nspace: {x: {float: [0, 1]}}\nbudget: {trials: 3, concurrency: 8, batch: 2}\n"
    s = load(write(tmp_path, body))
    assert s.budget.concurrency == 3
    assert any("concurrency 8" in n for n in s.notes)


def test_command_objective(tmp_path: Path) -> None:
    body = 'objective:\n  command: [python, train.py, --lr, "{lr}", 3]\n  maximize: acc\nspace: {lr: {float: [1e-3, 1], log: true}}\n'
    s = load(write(tmp_path, body))
    assert s.objective.command == ("python", "train.py", "--lr", "{lr}", "3")
    assert s.objective.call is None


def test_dict_source(tmp_path: Path) -> None:
    s = load({"objective": {"call": "m:f", "minimize": "l"}, "space": {"x": {"int": [1, 4]}}}, base_dir=tmp_path)
    assert s.logbook.parent == tmp_path / "runs"
    assert s.base_dir == tmp_path  # objectives run from here, as from a spec file's folder
    with pytest.raises(SpecError, match=r"space.x.int: inverted range") as info:
        load({"objective": {"call": "m:f", "minimize": "l"}, "space": {"x": {"int": [4, 1]}}})
    assert "line" not in str(info.value)


def test_huge_file_refused(tmp_path: Path) -> None:
    p = tmp_path / "big.yaml"
    with open(p, "w") as fh:
        fh.write("# " + "x" * (spec_mod.MAX_SPEC_BYTES + 10) + "\n")
    with pytest.raises(SpecError, match="a spec must be under"):
        load(p)


def test_not_utf8_refused(tmp_path: Path) -> None:
    p = tmp_path / "bin.yaml"
    p.write_bytes(b"name: \xff\xfe\n")
    with pytest.raises(SpecError, match="not UTF-8"):
        load(p)


def test_alias_bomb_refused(tmp_path: Path) -> None:
    # The "billion laughs" expansion, YAML form: 8 levels of 10 aliases each expand to 10^8 nodes
    # from a few hundred bytes (YAML 1.1 anchors and aliases, sec. 3.2.2.2, from memory).
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
    for i in range(1, 8):
        lines.append(f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 10) + "]")
    with pytest.raises(SpecError, match="YAML nodes"):
        load(write(tmp_path, "\n".join(lines) + "\n"))


def test_missing_file() -> None:
    with pytest.raises(SpecError, match="cannot read"):
        load("/nonexistent/search.yaml")


def test_spec_error_pickles() -> None:
    err = SpecError(["a: b (s.yaml, line 1)", "c: d"])
    back = pickle.loads(pickle.dumps(err))
    assert back.errors == err.errors and str(back) == str(err)


@pytest.mark.parametrize(("text", "seconds"), [(90, 90.0), ("90s", 90.0), ("20m", 1200.0), ("6h", 21600.0), ("1.5h", 5400.0), ("45", 45.0)])
def test_durations(text: object, seconds: float) -> None:
    assert parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["", "m", "5x", "-5s", "0s", "1h30m", True])
def test_bad_durations(text: object) -> None:
    with pytest.raises(ValueError):
        parse_duration(text)


def test_hash_ignores_budget(tmp_path: Path) -> None:
    a = load(write(tmp_path, GOOD))
    b = load(write(tmp_path, GOOD.replace("trials: 60", "trials: 90"), "b.yaml"))
    c = load(write(tmp_path, GOOD.replace("depth: {int: [2, 12]}", "depth: {int: [2, 13]}"), "c.yaml"))
    assert a.hash() == b.hash() != c.hash()
