"""The quality benchmark's live mode: searches through ``forebear.run`` on an embedded cluster."""

from __future__ import annotations

import csv
import time
from pathlib import Path

import pytest

from forebear.bench import live, quality
from forebear.bench.families import analytic_family
from forebear.bench.quality import METHODS, Protocol
from forebear.records.logbook import Logbook, record


def test_curve_follows_the_order_scores_arrived_and_counts_pending(tmp_path: Path) -> None:
    book = Logbook(tmp_path / "s.jsonl")
    book.append(record("search", name="t", spec_hash="h", space={}, objective={"minimize": "score"}, seed=0))
    # Trial 0 proposed at 0 and finished at 10; trial 1 proposed at 1 and finished at 3;
    # trial 2 proposed at 4 (trial 0 still running), finished at 5.
    times = {0: (0.0, 10.0, 0.9), 1: (1.0, 3.0, 0.5), 2: (4.0, 5.0, 0.7)}
    for t, (p, _f, _score) in times.items():
        book.append(record("proposed", at=p, trial=t, round=t, config={"x": t}, source="initial" if t < 2 else "model",
                           model=None if t < 2 else "gp", acquisition=None))
    for t, (p, f, score) in sorted(times.items(), key=lambda kv: kv[1][1]):
        book.append(record("started", at=p, trial=t, attempt=1, worker="w", host="h", pid=1))
        book.append(record("scored", at=f, trial=t, attempt=1, score=score, metrics={"score": score}, seconds=f - p))
    scores, models, sources, pending = live.curve_of(book.path, 3)
    assert scores == [0.5, 0.7, 0.9]  # by arrival, not by trial number
    assert sources == {"initial": 2, "model": 1} and models == {"None": 2, "gp": 1}
    assert pending == pytest.approx((0 + 1 + 1) / 3)  # trial 1 beside 0; trial 2 beside 0
    with pytest.raises(RuntimeError, match="2 of 4 trials scored|3 of 4 trials scored"):
        live.curve_of(book.path, 4)


def test_history_table_holds_every_task_and_reloads_as_the_same_history(tmp_path: Path) -> None:
    from forebear.face.api import as_spec
    from forebear.loop.opening import load_history

    family = analytic_family("branin", n_tasks=3, n_points=12)
    history = family.history_for(0)
    path = tmp_path / "h.csv"
    live.write_history(history, family.space, path)
    rows = list(csv.DictReader(path.open()))
    assert len(rows) == 24 and {r["task"] for r in rows} == {"branin-1", "branin-2"}
    spec = as_spec(live.spec_for(family, METHODS["forebear-full"], 3, 5, tmp_path, path), live.Timed(len, 0.0, 0.0, 0))
    again = load_history(spec, lambda _msg: None)
    got = {t.name: sorted(t.y.tolist()) for t in again.tasks}
    assert got == {t.name: sorted(t.y.tolist()) for t in history.tasks}  # scores survive the CSV exactly


def test_timed_objective_sleeps_a_duration_fixed_per_configuration() -> None:
    f = live.Timed(lambda c: c["x"] * 2.0, 0.05, 0.5, seed=1)
    t0 = time.perf_counter()
    assert f({"x": 0.25}) == 0.5
    first = time.perf_counter() - t0
    t0 = time.perf_counter()
    f({"x": 0.25})
    assert time.perf_counter() - t0 == pytest.approx(first, abs=0.03)
    assert first > 0.0


def test_live_mode_refuses_what_a_spec_cannot_ask_for() -> None:
    assert live.supported(METHODS["forebear-full-q4"]) and live.supported(METHODS["gp"]) and live.supported(METHODS["random"])
    assert not live.supported(METHODS["no-guard"]) and not live.supported(METHODS["rgpe"])
    with pytest.raises(ValueError, match="methods rgpe, no-guard cannot"):
        quality.run(Protocol(families=("branin",), tasks=1, seeds=1, trials=3, methods=("gp", "rgpe", "no-guard"), mode="live"))


def test_a_live_run_goes_through_forebear_run_and_its_logbook() -> None:
    # One held-out task, forebear with history at 4 workers: the spec's embedded cluster, short
    # trials, the meta-trained model trained before the search, the curve read from its logbook.
    proto = Protocol(families=("branin",), tasks=1, seeds=1, trials=5, family_size=3, history_points=20,
                     methods=("forebear-full-q4",), mode="live", trial_seconds=0.05, sigma=0.1)
    (row,) = quality.run(proto)
    run = row["runs"]["forebear-full-q4"]
    assert len(run["regret"]) == 5 and all(b <= a for a, b in zip(run["regret"], run["regret"][1:], strict=False))
    assert "random" not in run["sources"] and run["sources"]["initial"] >= 4  # the first round is the whole design
    assert run["meta_seconds"] > 0 and run["pending_mean"] > 0.5


def test_cli_takes_one_mode_only() -> None:
    from click.testing import CliRunner

    from forebear.face.cli import main

    res = CliRunner().invoke(main, ["bench", "quality", "--sync", "--live"])
    assert res.exit_code == 2 and "choose one of sync and live" in res.stderr
