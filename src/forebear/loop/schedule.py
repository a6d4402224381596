"""When to start a proposal round, and how many configurations to ask for.

Plain functions and one small class, no Dask: the controller calls them with
the wall clock, the quality benchmark's asynchronous mode with a simulated
one, so both make the same decisions (docs/engine.md, "The asynchronous path").

The rule. Each configuration proposed before the results it could use come in
is proposed beside pending points, which the proposer can only guess at; each
configuration proposed late keeps a worker idle for a refit. With ``T`` the
median trial time (submission to result) and ``R`` the median refit time, a
loop that waits for results runs a worker cycle in about ``T + R``, one that
proposes ahead in about ``max(T, R)``. When the slower of the two dominates
(``min(T, R) / max(T, R) <= WAIT_WITHIN``), waiting costs at most about
that fraction of the wall time and the loop waits: a round starts only for slots
that are free now. Otherwise it proposes ahead by the completions expected
during one refit, ``ceil(concurrency * R / T)``, at most ``concurrency``.
Until both times have been measured once, the loop waits. Start-up costs are
not counted: the first trial on each worker (``concurrency`` of them) pays the
worker's imports and data loading, the first model round the proposer's first
fit; in a short search these one-off times would otherwise be the medians
(docs/engine.md measured 0.3-0.5 s first trials and a 1.4 s first refit
against 0.02 s trials and 0.1 s refits afterwards, which made the loop propose
four configurations ahead, blind to four results, in the last round).

The first round of a search is its initial design: at least ``initial``
configurations (``Proposer.initial_size``), whatever ``batch`` says.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

#: Waiting for results is chosen when it lengthens a worker cycle by at most this fraction.
#: Measured (docs/engine.md, "The asynchronous path"): with a refit a quarter of a trial,
#: proposing ahead saved 12-15% of the wall time and, at 4 workers, doubled the regret at 20 trials.
WAIT_WITHIN = 0.25
#: Timings kept for the medians (recent behaviour counts, one slow outlier does not).
WINDOW = 9
#: Model rounds whose time is start-up, not refit (the first fit's one-off set-up).
WARMUP_REFITS = 1


def ahead(concurrency: int, trial_seconds: float | None, refit_seconds: float | None) -> int:
    """How many configurations to have ready beyond the free slots (0: wait for results)."""
    if not trial_seconds or not refit_seconds or trial_seconds <= 0 or refit_seconds <= 0:
        return 0
    ratio = min(trial_seconds, refit_seconds) / max(trial_seconds, refit_seconds)
    if ratio <= WAIT_WITHIN:
        return 0
    return max(0, min(concurrency, math.ceil(concurrency * refit_seconds / trial_seconds)))


def round_size(
    *,
    batch: int,
    concurrency: int,
    running: int,
    queued: int,
    left: int,
    lead: int,
    initial: int = 0,
) -> int:
    """Configurations to ask the proposer for now (0: start no round).

    Parameters
    ----------
    batch
        The spec's ``budget.batch``: the most configurations of one round (after the first).
    concurrency
        Trials in flight at most.
    running
        Attempts in flight now.
    queued
        Configurations waiting for a slot (proposed and not submitted, retries).
    left
        Trials the budget still allows to propose.
    lead
        :func:`ahead`'s answer.
    initial
        Configurations of the initial design not yet proposed (the first round asks for all).
    """
    if left <= 0:
        return 0
    free = max(0, concurrency - running)
    want = free + lead - queued
    if initial > 0:
        return min(left, max(initial, min(batch, want)))
    if want <= 0:
        return 0
    return min(batch, left, want)


def _median(values: Sequence[float]) -> float | None:
    if not values:
        return None
    s = sorted(values)
    mid = len(s) // 2
    return s[mid] if len(s) % 2 else 0.5 * (s[mid - 1] + s[mid])


@dataclass
class Timing:
    """Recent trial and refit durations (seconds, any clock) and the lead they call for."""

    trials: list[float] = field(default_factory=list)
    refits: list[float] = field(default_factory=list)
    trial_count: int = 0  # samples ever recorded (the window keeps the last WINDOW)
    refit_count: int = 0

    def trial(self, seconds: float) -> None:
        self.trials = [*self.trials, float(seconds)][-WINDOW:]
        self.trial_count += 1

    def refit(self, seconds: float) -> None:
        self.refits = [*self.refits, float(seconds)][-WINDOW:]
        self.refit_count += 1

    @property
    def trial_seconds(self) -> float | None:
        return _median(self.trials)

    @property
    def refit_seconds(self) -> float | None:
        return _median(self.refits)

    def steady(self, concurrency: int) -> tuple[float | None, float | None]:
        """Median trial and refit times without the start-up samples: the first ``concurrency``
        trials (one per worker) and the first :data:`WARMUP_REFITS` refits."""
        return (_median(_after(self.trials, self.trial_count, concurrency)),
                _median(_after(self.refits, self.refit_count, WARMUP_REFITS)))

    def lead(self, concurrency: int) -> int:
        """:func:`ahead` for the steady medians so far (0 until both are measured)."""
        return ahead(concurrency, *self.steady(concurrency))


def _after(window: Sequence[float], count: int, skip: int) -> list[float]:
    """The samples of ``window`` (the last of ``count`` recorded) past the first ``skip`` ever."""
    first = count - len(window)  # ordinal of window[0]
    return list(window[max(0, skip - first):])
