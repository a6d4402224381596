"""A search under a simulated clock, scheduled as ``forebear run`` schedules it.

The quality benchmark's asynchronous mode: the proposer is driven by the
loop's own scheduling module (:mod:`forebear.loop.schedule`), with
``concurrency`` simulated workers, trial durations drawn per trial
(log-normal, seeded by the run's seed and the trial id) and a refit time per
proposal round. The order of steps follows the controller's loop: record a
finished round, submit queued trials to free slots, start a round when the
schedule asks for one, then advance the clock to the next completion or
round. A round sees the state at its start (scores so far; queued and running
trials as pending points) and its proposals become available one refit
later, as with the controller's proposer process.
"""

from __future__ import annotations

import heapq
import math
import time
from collections import deque
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from forebear.loop.schedule import Timing, round_size


@dataclass(frozen=True)
class Clock:
    """The simulated timing of a run.

    ``trial_seconds`` is the median trial duration and ``sigma`` the log-normal
    spread; ``refit_seconds`` is the simulated time of a round that proposes from
    the model (a round of the initial design takes none), or ``None`` for the
    measured seconds of each round. ``lead`` forces the schedule's lead (``None``:
    the schedule decides, as in ``forebear run``).
    """

    trial_seconds: float = 1.0
    sigma: float = 0.5
    refit_seconds: float | None = 0.25
    lead: int | None = None

    def __post_init__(self) -> None:
        if not self.trial_seconds > 0 or self.sigma < 0:
            msg = f"trial_seconds must be > 0 and sigma >= 0, got {self.trial_seconds} and {self.sigma}"
            raise ValueError(msg)
        if self.refit_seconds is not None and self.refit_seconds < 0:
            msg = f"refit_seconds must be >= 0 or None, got {self.refit_seconds}"
            raise ValueError(msg)

    def duration(self, seed: int, trial: int) -> float:
        """The duration of ``trial`` in a run of ``seed`` (the same for every method)."""
        z = np.random.default_rng([seed, trial]).standard_normal()
        return float(self.trial_seconds * math.exp(self.sigma * z))


@dataclass
class Outcome:
    """What a simulated search came to, in completion order."""

    scores: list[float] = field(default_factory=list)
    sources: list[str] = field(default_factory=list)
    models: list[str | None] = field(default_factory=list)
    pending: list[int] = field(default_factory=list)  # pending points each round saw
    seconds: float = 0.0  # simulated wall time to the last completion
    busy: float = 0.0  # fraction of worker time spent running trials


def run(
    proposer: Any,
    objective: Callable[[Mapping[str, Any]], float],
    trials: int,
    *,
    concurrency: int,
    batch: int,
    clock: Clock,
    seed: int,
) -> Outcome:
    """Search ``trials`` trials of ``objective`` with ``proposer`` under ``clock``."""
    from forebear.engine.proposer import Observation

    out = Outcome()
    timing = Timing()
    configs: dict[int, dict[str, Any]] = {}
    scored: dict[int, float] = {}
    queue: deque[int] = deque()
    running: list[tuple[float, int]] = []  # (end time, trial), a heap
    started: dict[int, float] = {}
    job: tuple[float, list[Any], float] | None = None  # (ready at, proposals, refit seconds)
    now = 0.0
    work = 0.0
    exhausted = False
    while len(scored) < trials:
        if job is not None and job[0] <= now:
            ready_at, proposals, refit = job
            job = None
            if not proposals:
                exhausted = True
            if any(p.source == "model" for p in proposals):
                timing.refit(refit)
            for p in proposals:
                tid = len(configs)
                configs[tid] = dict(p.config)
                out.sources.append(p.source)
                out.models.append(p.model)
                queue.append(tid)
        while len(running) < concurrency and queue:
            tid = queue.popleft()
            started[tid] = now
            heapq.heappush(running, (now + clock.duration(seed, tid), tid))
        if job is None and not exhausted:
            lead = timing.lead(concurrency) if clock.lead is None else clock.lead
            planned = len(configs)
            n = round_size(batch=batch, concurrency=concurrency, running=len(running), queued=len(queue),
                           left=trials - planned, lead=lead, initial=max(0, _initial_size(proposer, batch) - planned))
            if n > 0:
                observed = [Observation(configs[t], s) for t, s in scored.items()]
                pending = [configs[t] for t in list(queue) + [t for _, t in running]]
                t0 = time.perf_counter()
                proposals = proposer.propose(n, observed, pending=pending)[:n]
                measured = time.perf_counter() - t0
                model = any(p.source == "model" for p in proposals)
                refit = measured if clock.refit_seconds is None else (clock.refit_seconds if model else 0.0)
                out.pending.append(len(pending))
                job = (now + refit, proposals, refit)
                continue  # a round of no simulated time is ready at once
        events = ([running[0][0]] if running else []) + ([job[0]] if job is not None else [])
        if not events:
            if exhausted:
                break  # the proposer has nothing new to offer (a small discrete space)
            msg = f"the simulated search stalled after {len(scored)} of {trials} trials"
            raise RuntimeError(msg)
        now = max(now, min(events))
        while running and running[0][0] <= now:
            end, tid = heapq.heappop(running)
            timing.trial(end - started[tid])
            work += end - started[tid]
            y = float(objective(configs[tid]))
            scored[tid] = y
            out.scores.append(y)
    out.seconds = now
    out.busy = work / (concurrency * now) if now > 0 else 1.0
    return out


# --------------------------------------------------------------------------
# the comparison that chose the lies and the schedule (docs/engine.md)

VARIANTS: dict[str, dict[str, Any]] = {
    # name: Proposer settings, plus "lead" (a forced schedule lead; "ahead": ceil(concurrency * R / T),
    # the lead the schedule takes when waiting would cost more than WAIT_WITHIN) and "sync"
    "posterior": {"pending_lie": "posterior", "lead": "ahead"},
    "max": {"pending_lie": "max", "lead": "ahead"},
    "min": {"pending_lie": "min", "lead": "ahead"},
    "posterior-wait": {"pending_lie": "posterior", "lead": 0},
    "min-wait": {"pending_lie": "min", "lead": 0},
    "sync-batch-min": {"lie": "min", "sync": True},
    "sync-batch-posterior": {"lie": "posterior", "sync": True},
    "sync-batch-max": {"lie": "max", "sync": True},
}


def compare(families: Sequence[str], tasks: int, seeds: int, trials: int, concurrency: Sequence[int],
            variants: Sequence[str], clock: Clock) -> dict[str, Any]:
    """Mean normalised regret at trials 5, 10 and the last, simulated wall time and pending points
    per round, for each variant at each concurrency (plain GP, no history)."""
    from dataclasses import replace

    from forebear.bench.quality import METHODS, Protocol, family_of, search

    out: dict[str, Any] = {}
    for fam_name in families:
        fam = family_of(Protocol(families=(fam_name,)), fam_name)
        for c in concurrency:
            method = replace(METHODS["gp"], q=c, name=f"gp-c{c}")
            for v in variants:
                spec = dict(VARIANTS[v])
                sync, lead = spec.pop("sync", False), spec.pop("lead", None)
                if lead == "ahead":
                    lead = max(1, math.ceil(c * (clock.refit_seconds or 0.0) / clock.trial_seconds))
                rows = [search(fam, i, method, s, trials, cache_dir=None, settings=spec,
                               clock=None if sync else replace(clock, lead=lead))
                        for s in range(seeds) for i in range(tasks)]
                reg = np.array([r["regret"] for r in rows])
                cps = [t for t in (5, 10, trials) if t <= trials]
                out[f"{fam_name} c={c} {v}"] = {
                    **{f"regret@{t}": float(reg[:, t - 1].mean()) for t in cps},
                    "sim_seconds": float(np.mean([r.get("sim_seconds", float("nan")) for r in rows])),
                    "pending": float(np.mean([r.get("pending_mean", 0.0) for r in rows])),
                    "runs": len(rows),
                }
                print(f"{fam_name} c={c} {v}: {out[f'{fam_name} c={c} {v}']}", flush=True)
    return out


if __name__ == "__main__":
    import argparse
    import json

    ap = argparse.ArgumentParser(prog="python -m forebear.bench.simulated", description="Lies and schedule, compared.")
    ap.add_argument("--families", nargs="+", default=["branin", "hartmann3"])
    ap.add_argument("--tasks", type=int, default=3)
    ap.add_argument("--seeds", type=int, default=2)
    ap.add_argument("--trials", type=int, default=20)
    ap.add_argument("--concurrency", type=int, nargs="+", default=[1, 4])
    ap.add_argument("--variants", nargs="+", default=list(VARIANTS), choices=list(VARIANTS))
    ns = ap.parse_args()
    res = compare(ns.families, ns.tasks, ns.seeds, ns.trials, ns.concurrency, ns.variants, Clock())
    print(json.dumps(res, indent=1))


def _initial_size(proposer: Any, batch: int) -> int:
    """The proposer's initial-design size; a peer method (bench/peers), which has no such
    setting, gets the engine's rule ``max(batch, min(dim + 1, 10))``."""
    size = getattr(proposer, "initial_size", None)
    if callable(size):
        return int(size(batch))
    return max(batch, min(proposer.space.dim + 1, 10))
