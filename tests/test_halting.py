"""Stopping rules (engine/halting.py), the stopping: spec section, and curves in the fold."""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pytest

from forebear.core.halting import Stopping
from forebear.core.spec import SpecError, load
from forebear.engine.halting import MIN_SCALE_TRIALS, HalvingRule, HistoryRule, make_rule
from forebear.records.curves import CurveSet, curve_set
from forebear.records.logbook import fold, record

# --------------------------------------------------------------------------
# the rung rule


def test_rungs_are_geometric_below_the_last_step() -> None:
    # Li et al., "A system for massively parallel hyperparameter tuning" (MLSys 2020): rungs at
    # r * eta**k; with r = 1, eta = 3 and a maximum resource R = 9 they are 1 and 3, R itself
    # being the full training (from memory of the paper's description of its example).
    assert Stopping("halving", steps=9, min_step=1, eta=3).rungs() == [1, 3]
    assert Stopping("halving", steps=81, min_step=1, eta=3).rungs() == [1, 3, 9, 27]
    assert Stopping("halving", steps=100, min_step=5, eta=2).rungs() == [5, 10, 20, 40, 80]


def test_rung_rule_keeps_the_top_third_of_nine_then_one_of_three() -> None:
    # The paper's worked example of successive halving (n = 9, eta = 3, r = 1, R = 9): nine
    # configurations get 1 unit, the top 3 get 3 units, the top 1 gets 9 (from memory of the
    # paper's description). In the stopping form, a trial that arrives at a full rung goes on only
    # when it is among the top floor(n / eta) of the n trials there.
    rule = HalvingRule(Stopping("halving", steps=9, min_step=1, eta=3).rungs(), eta=3)
    scores = [0.9, 0.5, 0.7, 0.2, 0.8, 0.4, 0.6, 0.3, 0.1]  # lower is better; trial i scores scores[i]
    for trial, value in enumerate(scores):
        rule.new_rungs(trial, 1, value)
    assert rule.keep(0) == 3
    assert rule.survivors(0) == [8, 3, 7]  # the three lowest: 0.1, 0.2, 0.3
    for trial in rule.survivors(0):
        rule.new_rungs(trial, 3, scores[trial] / 2)
    assert rule.keep(1) == 1 and rule.survivors(1) == [8]
    # A tenth trial arriving at the full first rung: it goes on only inside the top floor(10 / 3) = 3.
    assert rule.observe(9, 1, 0.35) is not None  # fourth of ten (after 0.1, 0.2, 0.3)
    assert rule.observe(10, 1, 0.15) is None  # second of eleven


def test_rung_rule_is_asynchronous() -> None:
    # Asynchronous: a trial reaching a rung is judged against the trials that reached it so far;
    # the first to arrive always goes on (the top max(1, floor(1 / eta)) = 1).
    rule = HalvingRule([2, 4], eta=2)
    assert rule.observe(0, 1, 5.0) is None  # below the first rung: no decision
    assert rule.observe(0, 2, 5.0) is None
    assert rule.observe(1, 2, 6.0) is not None  # second of two, the top 1 goes on
    assert rule.observe(2, 2, 1.0) is None
    assert rule.observe(2, 5, 0.5) is None  # a jump past rung 4 records it there too
    assert rule.values[1] == {2: 0.5}


def test_rule_none_halts_nothing() -> None:
    assert make_rule(Stopping()) is None


# --------------------------------------------------------------------------
# the history rule


def _curves(rng: np.random.Generator, n: int, final: int, shift: float) -> CurveSet:
    """Power-law learning curves y = a + b * t**-0.7 whose asymptote a is seen early through noise."""
    cs = CurveSet("h", final)
    for _ in range(n):
        a = shift + rng.normal()
        b = 1.0 + 0.2 * rng.random()
        curve = [(t, a + b * t**-0.7 + 0.05 * rng.normal()) for t in range(1, final + 1)]
        cs.curves.append(curve)
        cs.complete.append(True)
    return cs


def _history_rule(seed: int) -> tuple[HistoryRule, Stopping]:
    """A history rule (rungs at 1, 3, 9 of 27) learnt from two history searches of 40 curves each."""
    rng = np.random.default_rng(seed)
    stopping = Stopping("history", steps=27, min_step=1, eta=3, threshold=0.05)
    rule = make_rule(stopping, [_curves(rng, 40, 27, 0.0), _curves(rng, 40, 27, 3.0)])
    assert isinstance(rule, HistoryRule)
    return rule, stopping


def test_history_rule_halts_a_hopeless_curve_and_keeps_a_promising_one() -> None:
    rule, stopping = _history_rule(0)
    # This search's first-rung scores sit like a history search's (asymptote + about 1.1); they
    # set its scale. The best finished trial ended at -0.89 (asymptote -1).
    for trial, value in enumerate(np.linspace(0.1, 2.1, MIN_SCALE_TRIALS)):
        rule.observe(trial, 1, float(value))
    rule.finished(0, -0.89)
    assert rule.observe(100, 1, -0.5) is None  # heads for about -1.5: likely to beat the best
    reason = rule.observe(101, 1, 3.0)  # heads for about 2.0: no chance
    assert reason is not None and reason.startswith("history:")


def test_history_rule_overrules_halving_on_a_near_tie_before_any_trial_finished() -> None:
    # Halving alone, with eta 3, keeps only the leader of a rung of 3: a trial 0.01 behind it is
    # halted. The curve model says the two are likely to end alike (the history curves' noise at a
    # rung is 0.05), so it goes on; a trial far behind is halted as halving says.
    rule, stopping = _history_rule(0)
    halving = HalvingRule(stopping.rungs(), stopping.eta)
    assert MIN_SCALE_TRIALS <= 3  # the third trial at the first rung sets the search's scale
    for trial, value in [(0, 1.0), (1, 2.5)]:
        assert (rule.observe(trial, 1, value) is None) == (halving.observe(trial, 1, value) is None)
    near_tie = halving.observe(2, 1, 1.01)
    assert near_tie is not None and near_tie.startswith("halving:")  # second of three: halving halts it
    assert rule.observe(2, 1, 1.01) is None  # the history rule lets it go on
    reason = rule.observe(9, 1, 4.0)
    assert reason is not None and reason.startswith("halving:")


def test_history_rule_lets_a_likely_winner_through_a_full_rung() -> None:
    # After a trial finished, a trial that halving ranks out but that is more likely than not to
    # end below the best final score goes on.
    rule, stopping = _history_rule(1)
    for trial, value in enumerate([-1.0, -0.9, 0.5, 1.0, 1.5, 2.0]):
        rule.observe(trial, 1, value)
    rule.finished(2, 0.0)  # the best final so far; trials 0 and 1 head for about -2
    assert rule.observe(50, 1, -0.8) is None  # third of seven (top 2 go on) yet likely below 0.0
    assert HalvingRule.verdict(rule, 50, 0) is not None


def test_history_rule_without_curves_is_halving() -> None:
    stopping = Stopping("history", steps=27, min_step=1, eta=3)
    assert type(make_rule(stopping, [])) is HalvingRule


# --------------------------------------------------------------------------
# the spec section


def _spec(tmp_path: Path, body: str) -> Path:
    text = textwrap.dedent(
        """\
        objective: {call: m:f, minimize: loss}
        space:
          x: {float: [0, 1]}
        """
    ) + textwrap.dedent(body)
    path = tmp_path / "search.yaml"
    path.write_text(text)
    return path


def test_stopping_defaults_to_none(tmp_path: Path) -> None:
    spec = load(_spec(tmp_path, ""))
    assert spec.stopping == Stopping() and not spec.stopping.active


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ("stopping:\n  rule: halving\n", r"stopping.steps: is required with rule halving: .*\(search.yaml, line 4\)"),
        ("stopping:\n  rule: fast\n", r"stopping.rule: must be one of none, halving, history, got str \('fast'\) \(search.yaml, line 5\)"),
        ("stopping:\n  rule: halving\n  steps: 9\n  eta: 1\n", r"stopping.eta: must be a number > 1 .*\(search.yaml, line 7\)"),
        ("stopping:\n  steps: 9\n  min_step: 9\n", r"stopping.min_step: must be below steps \(9\), got 9 \(search.yaml, line 6\)"),
        ("stopping:\n  threshold: 1.5\n", r"stopping.threshold: must be a probability .*\(search.yaml, line 5\)"),
        ("stopping:\n  rungs: 3\n", r"stopping.rungs: unknown key; valid keys: rule, steps, .*\(search.yaml, line 5\)"),
        ("stopping: halving\n", r"stopping: must be a mapping, got str \('halving'\) \(search.yaml, line 4\)"),
    ],
)
def test_a_bad_stopping_section_names_key_and_line(tmp_path: Path, body: str, message: str) -> None:
    with pytest.raises(SpecError, match=message):
        load(_spec(tmp_path, body))


# --------------------------------------------------------------------------
# curves in the fold


def _table(partial_counts: bool = False) -> list[dict]:
    stopping = {"rule": "halving", "steps": 4, "partial_counts": partial_counts}
    recs = [record("search", spec_hash="h", objective={"call": "m:f", "minimize": "loss"}, stopping=stopping)]
    for tid in (0, 1):
        recs.append(record("proposed", trial=tid, round=0, config={"x": tid}, source="initial"))
        recs.append(record("started", trial=tid, attempt=1))
    for step in (1, 2, 3, 4):
        recs.append(record("step", trial=0, attempt=1, step=step, score=1.0 / step, metrics={}))
    recs.append(record("scored", trial=0, attempt=1, score=0.25, metrics={}, seconds=1.0))
    recs.append(record("step", trial=1, attempt=1, step=1, score=0.1, metrics={}))
    recs.append(record("step", trial=1, attempt=1, step=1, score=0.1, metrics={}))  # a duplicate
    recs.append(record("halted", trial=1, attempt=1, step=1, score=0.1, metrics={}, seconds=0.2))
    recs.append(record("lost", trial=1, attempt=1, reason="worker"))  # too late: halted is terminal
    return recs


def test_fold_keeps_curves_and_the_halted_state() -> None:
    table = fold(_table())
    assert table.trials[0].curve == [(1, 1.0), (2, 0.5), (3, 1.0 / 3), (4, 0.25)]
    halted = table.trials[1]
    assert (halted.state, halted.step, halted.score) == ("halted", 1, 0.1)
    assert table.duplicates == 1 and table.counts()["halted"] == 1 and table.finished == 2
    assert halted.to_dict()["step"] == 1 and "step" not in table.trials[0].to_dict()
    # A halted trial's partial score is lower than trial 0's final one; best still returns trial 0.
    assert table.best().trial == 0 and [t.trial for t in table.ranked()] == [0]
    assert fold(_table(partial_counts=True)).best().trial == 1
    cs = curve_set(table, sign=1.0)
    assert cs is not None and cs.final == 4 and cs.complete == [True, False]


def test_counts_of_a_search_without_stopping_are_as_before() -> None:
    recs = [record("search", spec_hash="h", objective={"call": "m:f", "minimize": "loss"})]
    assert fold(recs).counts() == {"queued": 0, "running": 0, "scored": 0, "failed": 0}


# --------------------------------------------------------------------------
# the benchmark's proposed search (bench/stopping.py)


def test_proposed_search_halts_and_counts_worker_steps() -> None:
    from forebear.bench.stopping import SPACES, TREATMENTS, _pow3_family, simulate_proposed
    from forebear.core.space import Space

    family = _pow3_family(steps=9)
    space = Space.from_dict(SPACES["pow3"])

    def curve(config: dict) -> list[float]:
        return list(family.curve(1000, config))

    reference, _, _ = simulate_proposed(curve, space, 8, 2, None, None, "left-out", 0)
    assert reference.reached and reference.halted == 0 and reference.time == 8 * 9  # every trial to its end
    for treatment in TREATMENTS:
        out, _, in_budget = simulate_proposed(curve, space, 8, 2, HalvingRule([1, 3], 3.0), None, treatment, 0, reference.time)
        # The rung rule halts some of the 8 trials; the steps they did not run are saved.
        assert 0 < out.halted < 8 and out.time < reference.time
        assert np.isfinite(in_budget)  # a trial finished within the reference's worker time
