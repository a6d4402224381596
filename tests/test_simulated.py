"""bench/simulated.py: the quality benchmark's asynchronous mode, scheduled as ``forebear run`` is."""

from __future__ import annotations

import numpy as np
import pytest

from forebear.bench.families import analytic_family
from forebear.bench.quality import METHODS, Protocol, search
from forebear.bench.simulated import Clock, run
from forebear.engine.proposer import Proposer


def test_durations_are_log_normal_and_seeded_by_trial() -> None:
    clock = Clock(trial_seconds=2.0, sigma=0.5)
    d = np.array([clock.duration(0, t) for t in range(4000)])
    assert clock.duration(0, 7) == clock.duration(0, 7) != clock.duration(1, 7)
    assert np.median(d) == pytest.approx(2.0, rel=0.05)
    assert np.std(np.log(d)) == pytest.approx(0.5, rel=0.05)
    with pytest.raises(ValueError, match="trial_seconds must be > 0"):
        Clock(trial_seconds=0.0)


def test_waiting_at_concurrency_one_is_the_synchronous_search() -> None:
    # A refit short next to a trial: the schedule waits for every result, so no round sees a
    # pending point and the search is exactly the synchronous one.
    fam = analytic_family("branin", n_tasks=2, n_points=16, seed=0)
    clock = Clock(trial_seconds=60.0, refit_seconds=0.5)
    a = search(fam, 0, METHODS["gp"], seed=2, trials=8, clock=clock)
    s = search(fam, 0, METHODS["gp"], seed=2, trials=8)
    assert a["regret"] == s["regret"] and a["pending_mean"] == 0.0


def test_workers_run_concurrently_with_pending_points_and_no_random_fill() -> None:
    fam = analytic_family("branin", n_tasks=2, n_points=16, seed=0)
    task = fam.tasks[0]
    proposer = Proposer(fam.space, seed=1, model="gp")
    out = run(proposer, task.objective, 12, concurrency=4, batch=4, clock=Clock(), seed=1)
    assert len(out.scores) == 12
    assert out.sources[:4] == ["initial"] * 4 and "random" not in out.sources
    assert max(out.pending) <= 4 + 4 and np.mean(out.pending) >= 2  # rounds beside running trials
    # Four workers: the wall time is well under the sum of the trials' durations.
    total = sum(Clock().duration(1, t) for t in range(12))
    assert out.seconds < 0.6 * total and 0.5 < out.busy <= 1.0


def test_protocol_mode_is_checked() -> None:
    assert Protocol().mode == "async"
    with pytest.raises(ValueError, match="mode must be 'async', 'sync' or 'live'"):
        Protocol(mode="later")
