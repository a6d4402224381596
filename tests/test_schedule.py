"""loop/schedule.py: how far the loop proposes ahead, and how large a round is."""

from __future__ import annotations

import pytest

from forebear.loop.schedule import WAIT_WITHIN, WINDOW, Timing, ahead, round_size


def test_waits_when_a_refit_is_short_next_to_a_trial() -> None:
    # Concurrency 1, a 60 s trial and a 1 s refit: waiting costs under 2% of the wall time.
    assert ahead(1, 60.0, 1.0) == 0
    assert ahead(1, 10.0, 10.0 * WAIT_WITHIN) == 0
    # A refit half a trial: one configuration ready ahead keeps the worker busy.
    assert ahead(1, 2.0, 1.0) == 1


def test_waits_when_trials_are_short_next_to_a_refit() -> None:
    # Proposing ahead would save at most a trial's time per round, under 3% here.
    assert ahead(4, 0.05, 2.0) == 0


def test_leads_by_the_completions_expected_during_one_refit() -> None:
    assert ahead(8, 2.0, 1.0) == 4  # 8 workers, a refit half a trial: 4 finish meanwhile
    assert ahead(4, 1.0, 0.5) == 2
    assert ahead(4, 4.0, 1.0) == 0  # a refit a quarter of a trial: waiting costs at most 25%
    assert ahead(4, 1.0, 3.0) == 4  # never more than the concurrency


def test_waits_until_both_times_are_known() -> None:
    assert ahead(4, None, 1.0) == 0 and ahead(4, 1.0, None) == 0 and ahead(4, 0.0, 1.0) == 0


def test_round_size_fills_free_slots_plus_the_lead() -> None:
    base = {"batch": 4, "concurrency": 4, "left": 100}
    assert round_size(**base, running=4, queued=0, lead=0) == 0  # every worker busy, waiting
    assert round_size(**base, running=3, queued=0, lead=0) == 1  # one free slot: one proposal
    assert round_size(**base, running=3, queued=1, lead=0) == 0  # ... already queued
    assert round_size(**base, running=4, queued=0, lead=2) == 2  # ahead by the lead
    assert round_size(**base, running=0, queued=0, lead=4) == 4  # never more than batch
    assert round_size(**base, running=0, queued=0, lead=0) == 4
    assert round_size(batch=4, concurrency=4, left=1, running=0, queued=0, lead=0) == 1  # the budget


def test_concurrency_one_waits_for_the_result_instead_of_proposing_beside_it() -> None:
    timing = Timing()
    for _ in range(3):
        timing.trial(30.0)
        timing.refit(0.5)
    lead = timing.lead(1)
    assert lead == 0
    assert round_size(batch=1, concurrency=1, running=1, queued=0, left=10, lead=lead) == 0
    assert round_size(batch=1, concurrency=1, running=0, queued=0, left=10, lead=lead) == 1


def test_the_first_round_is_the_whole_initial_design() -> None:
    # Batch 1, a 6-D space: the initial design of min(dim + 1, 10) = 7 comes in one round.
    assert round_size(batch=1, concurrency=1, running=0, queued=0, left=20, lead=0, initial=7) == 7
    assert round_size(batch=8, concurrency=8, running=0, queued=0, left=20, lead=0, initial=3) == 8
    assert round_size(batch=1, concurrency=1, running=0, queued=0, left=5, lead=0, initial=7) == 5


def test_timing_keeps_a_window_and_takes_medians() -> None:
    t = Timing()
    for s in [1.0, 100.0, 2.0]:
        t.trial(s)
    assert t.trial_seconds == 2.0  # one slow outlier does not move the median
    for s in range(20):
        t.refit(float(s))
    assert len(t.refits) == WINDOW and t.refit_seconds == pytest.approx(sum(range(20 - WINDOW, 20)) / WINDOW)


def test_start_up_times_do_not_set_the_lead() -> None:
    # The bowl of tests/test_async_bowl.py at 4 workers, as its logbook timed it: the first trial
    # on each worker took 0.3-0.5 s (imports), later ones 0.02 s; the first model round 1.4 s,
    # the next 0.1 s. Counted in, those start-up times made the loop propose 4 ahead.
    t = Timing()
    for s in (0.3, 0.48, 0.49, 0.5, 0.05, 0.022, 0.017):
        t.trial(s)
    for s in (1.44, 0.117):
        t.refit(s)
    assert ahead(4, t.trial_seconds, t.refit_seconds) == 4  # what the raw medians ask for
    assert t.steady(4) == (pytest.approx(0.022), pytest.approx(0.117))
    assert t.lead(4) == 0  # a trial a fifth of a refit: waiting costs little


def test_the_start_up_samples_are_skipped_once_even_past_the_window() -> None:
    t = Timing()
    t.refit(5.0)
    assert t.lead(1) == 0 and t.steady(1)[1] is None  # the first refit alone is no measurement
    for _ in range(3 * WINDOW):
        t.trial(1.0)
        t.refit(0.6)
    assert t.steady(2) == (1.0, 0.6) and t.lead(2) == 2
