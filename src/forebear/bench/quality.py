"""Quality benchmark: normalised regret on transfer task families, leave one task out.

For each held-out task of a family, the history is the other tasks of the
family (see ``families.py``); every method searches the held-out task from
scratch for the same number of trials. By default (``mode="async"``) a
proposer method runs in process as ``forebear run`` runs it: scheduled by the
loop's own module under a simulated clock (``simulated.py``), with ``q``
workers and a batch of ``q``, log-normal trial durations and pending points;
``mode="sync"`` (``--sync``) scores every round before the next one;
``mode="live"`` (``--live``) runs each search through ``forebear.run`` itself,
on an embedded Dask cluster in real time (``live.py``). Curves are
best-so-far in completion order. The figures are the mean normalised
best-so-far regret with 95% bootstrap intervals, the average rank of the
sequential methods, trials-to-target and the batch efficiency of q = 4 and 8
against q = 1.

``forebear bench quality --smoke`` runs one family, 3 held-out tasks, 2 seeds
and 15 trials. The full protocol is ``python -m forebear.bench.quality``
(see ``--help``).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import tempfile
import time
from collections import Counter
from collections.abc import Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from forebear.bench.families import HISTORY_KINDS, Family, held_out, make_family
from forebear.bench.simulated import Clock

CHECKPOINTS = (5, 10, 25, 50)


@dataclass(frozen=True)
class Method:
    """One compared method: how to propose, with which batch size."""

    name: str
    kind: str  # "random", "lhs-random", "proposer" or "peer" (bench/peers, built by its name)
    q: int = 1
    history: bool = False
    settings: Mapping[str, Any] = field(default_factory=dict)


METHODS: dict[str, Method] = {m.name: m for m in (
    Method("random", "random"),
    Method("lhs-random", "lhs-random"),
    # Plain GP-EI: the engine's Matern-5/2 GP with its Latin hypercube start and no history.
    Method("gp", "proposer", settings={"model": "gp"}),
    Method("gp-q4", "proposer", q=4, settings={"model": "gp"}),
    Method("gp-q8", "proposer", q=8, settings={"model": "gp"}),
    Method("forebear-cold", "proposer"),
    Method("forebear-full", "proposer", history=True),
    Method("forebear-full-q4", "proposer", q=4, history=True),
    Method("forebear-full-q8", "proposer", q=8, history=True),
    Method("no-warm-start", "proposer", history=True, settings={"warm_start": False}),
    Method("no-augment", "proposer", history=True, settings={"augment": False}),
    Method("no-fine-tune", "proposer", history=True, settings={"fine_tune": False}),
    Method("no-guard", "proposer", history=True, settings={"guard": False}),
    Method("no-spread", "proposer", history=True, settings={"spread": False}),
    Method("no-agreement", "proposer", history=True, settings={"agreement": False}),
    # Peers from their papers (bench/peers): history warm start then plain GP, RGPE, and cold TPE.
    Method("warmstart-gp", "peer", history=True),
    Method("rgpe", "peer", history=True),
    Method("tpe", "peer"),
    # The same peers with 4 workers (running trials reach them as ``pending``: kriging believer
    # in the GP peers, the "bad" group in TPE), for the ranking at concurrency 4.
    Method("warmstart-gp-q4", "peer", q=4, history=True),
    Method("rgpe-q4", "peer", q=4, history=True),
    Method("tpe-q4", "peer", q=4),
)}
SMOKE_METHODS = ("random", "gp", "forebear-cold", "forebear-full")
#: Size of the Latin hypercube before random search in ``lhs-random``.
LHS_SIZE = 10


@dataclass(frozen=True)
class Protocol:
    """What one benchmark run covers."""

    families: tuple[str, ...] = ("branin", "hartmann3", "hartmann6", "hgb")
    tasks: int = 10
    seeds: int = 5
    trials: int = 50
    methods: tuple[str, ...] = tuple(METHODS)
    family_size: int = 10
    history_points: int = 300
    workers: int = 1
    first_seed: int = 0
    #: Extra Proposer settings for every proposer method (the default run uses none).
    proposer: Mapping[str, Any] = field(default_factory=dict)
    #: What a history task holds: "sobol" (its design) or "searches" (a plain-GP search of it, families.py).
    history_kind: str = "sobol"
    #: History tasks per held-out task; None: every other task of the family.
    history_tasks: int | None = None
    #: "async": each proposer method with q workers under the loop's schedule and a simulated
    #: clock (trials of median ``trial_seconds``, log-normal ``sigma``; ``refit_seconds`` per model
    #: round, None for the measured seconds); "sync": every round scored before the next.
    mode: str = "async"
    trial_seconds: float = 1.0
    sigma: float = 0.5
    refit_seconds: float | None = 0.25

    @property
    def clock(self) -> Clock:
        return Clock(self.trial_seconds, self.sigma, self.refit_seconds)

    def __post_init__(self) -> None:
        unknown = [m for m in self.methods if m not in METHODS]
        if unknown:
            msg = f"unknown methods: {', '.join(unknown)}; expected some of {', '.join(METHODS)}"
            raise ValueError(msg)
        bad = [f for f in self.families if f not in ("branin", "hartmann3", "hartmann6", "hgb")]
        if bad:
            msg = f"unknown families: {', '.join(bad)}"
            raise ValueError(msg)
        if self.first_seed < 0:
            msg = f"first_seed must be >= 0, got {self.first_seed}"
            raise ValueError(msg)
        for name in ("tasks", "seeds", "trials", "family_size", "history_points", "workers"):
            if getattr(self, name) < 1:
                msg = f"{name} must be >= 1, got {getattr(self, name)}"
                raise ValueError(msg)
        if self.history_kind not in HISTORY_KINDS:
            msg = f"history_kind must be one of {', '.join(HISTORY_KINDS)}, got {self.history_kind!r}"
            raise ValueError(msg)
        if self.history_tasks is not None and self.history_tasks < 1:
            msg = f"history_tasks must be >= 1, got {self.history_tasks}"
            raise ValueError(msg)
        if self.mode not in ("async", "sync", "live"):
            msg = f"mode must be 'async', 'sync' or 'live', got {self.mode!r}"
            raise ValueError(msg)
        self.clock  # noqa: B018 - validates the clock's fields
        if self.family_size < 2:
            msg = f"family_size must be >= 2 (one held out, at least one as history), got {self.family_size}"
            raise ValueError(msg)


SMOKE = Protocol(families=("branin",), tasks=3, seeds=2, trials=15, methods=SMOKE_METHODS)


# --------------------------------------------------------------------------
# running one search


_FAMILIES: dict[tuple[Any, ...], Family] = {}


def family_of(proto: Protocol, name: str) -> Family:
    """The family ``name`` as ``proto`` builds it; built once per process (the tasks are deterministic)."""
    key = (name, proto.family_size, proto.history_points, proto.history_kind, proto.history_tasks)
    if key not in _FAMILIES:
        _FAMILIES[key] = make_family(name, n_tasks=proto.family_size, n_points=proto.history_points,
                                     history_kind=proto.history_kind, history_tasks=proto.history_tasks)
    return _FAMILIES[key]


def search(
    family: Family,
    index: int,
    method: Method,
    seed: int,
    trials: int,
    cache_dir: str | None = None,
    settings: Mapping[str, Any] | None = None,
    clock: Clock | None = None,
) -> dict[str, Any]:
    """Run one method on one held-out task; best-so-far normalised regret per trial.

    ``settings`` are extra Proposer keywords, overridden by the method's own. With a
    ``clock``, a proposer method runs asynchronously (:mod:`forebear.bench.simulated`)
    with ``method.q`` workers and a batch of ``method.q``; without, synchronously.
    """
    from forebear.engine.proposer import Observation, Proposer

    task = family.tasks[index]
    space = family.space
    scores: list[float] = []
    models: Counter[str] = Counter()
    sources: Counter[str] = Counter()
    extra: dict[str, float] = {}
    t0 = time.perf_counter()
    if method.kind == "random":
        configs = space.sample(trials, np.random.default_rng([seed, index]))
        scores = [task.objective(c) for c in configs]
        sources["random"] = trials
    elif method.kind == "lhs-random":
        n0 = min(LHS_SIZE, trials)
        configs = space.latin_hypercube(n0, seed=seed) + space.sample(trials - n0, np.random.default_rng([seed, index]))
        scores = [task.objective(c) for c in configs]
        sources.update({"initial": n0, "random": trials - n0})
    else:
        history = family.history_for(index) if method.history else None
        kwargs = {**dict(settings or {}), **dict(method.settings)}
        if method.kind == "peer":
            from forebear.bench import peers

            proposer = peers.make(method.name.removesuffix(f"-q{method.q}"), space, history, seed=seed)
        else:
            proposer = Proposer(space, history, seed=seed, cache_dir=cache_dir, **kwargs)
        observed: list[Any] = []
        if clock is not None:
            from forebear.bench import simulated

            sim = simulated.run(proposer, task.objective, trials, concurrency=method.q, batch=method.q, clock=clock, seed=seed)
            scores = sim.scores
            models.update(str(m) for m in sim.models[: len(scores)])
            sources.update(sim.sources[: len(scores)])
            extra = {"sim_seconds": sim.seconds, "busy": sim.busy, "pending_mean": float(np.mean(sim.pending)) if sim.pending else 0.0}
        while clock is None and len(observed) < trials:
            batch = proposer.propose(min(method.q, trials - len(observed)), observed)
            if not batch:
                msg = f"{method.name} proposed nothing after {len(observed)} trials on {task.name}"
                raise RuntimeError(msg)
            # A synchronous batch: every proposal of the round is scored before the next round.
            for p in batch:
                y = task.objective(p.config)
                observed.append(Observation(p.config, y))
                scores.append(y)
                models[str(p.model)] += 1
                sources[p.source] += 1
    best = np.minimum.accumulate(np.asarray(scores, dtype=float))
    regret = np.maximum(np.asarray(task.regret(best), dtype=float), 0.0)
    return {
        "regret": regret.tolist(),
        "models": dict(models),
        "sources": dict(sources),
        "seconds": time.perf_counter() - t0,
        **extra,
    }


def _same_as_gp(method: Method, settings: Mapping[str, Any] | None) -> bool:
    """Whether ``method`` is exactly the plain-GP search (``gp``), so its curve can be reused.

    A proposer without history has no meta-trained model, so model ``auto`` takes the
    plain-GP branch on every round (``Proposer._model_batch``): with the same seed and
    otherwise the same settings it makes the same proposals as ``model="gp"``.
    """
    if method.kind != "proposer" or method.history or method.q != 1:
        return False
    own = dict(method.settings)
    if own.pop("model", "auto") not in ("auto", "gp"):
        return False
    return not own and (settings or {}).get("model", "auto") in ("auto", "gp")


def _job(args: tuple[str, int, int, int, Protocol, str | None]) -> dict[str, Any]:
    fam_name, index, seed, trials, proto, shared_cache = args
    try:
        import torch

        torch.set_num_threads(1)
    except ImportError:  # pragma: no cover - torch is a hard dependency
        pass
    family = family_of(proto, fam_name)
    # Meta-training depends on the history and the deep-kernel settings only (its seed is
    # fixed), so jobs of one run may share a cache folder; entries are written atomically.
    cache = shared_cache or tempfile.mkdtemp(prefix="forebear-bench-")
    out: dict[str, Any] = {"family": fam_name, "task": family.tasks[index].name, "seed": seed, "runs": {}}
    try:
        for name in proto.methods:
            method = METHODS[name]
            if name != "gp" and "gp" in out["runs"] and _same_as_gp(method, proto.proposer):
                out["runs"][name] = {**out["runs"]["gp"], "same_as": "gp"}
                continue
            clock = proto.clock if proto.mode == "async" else None
            out["runs"][name] = search(family, index, method, seed, trials, cache_dir=cache, settings=proto.proposer, clock=clock)
    finally:
        if shared_cache is None:
            shutil.rmtree(cache, ignore_errors=True)
    return out


def run(proto: Protocol, progress: bool = False, partial: Path | None = None) -> list[dict[str, Any]]:
    """Every (family, held-out task, seed) job of the protocol; one dict per job.

    Jobs go seed by seed (all families and tasks for the first seed, then the next),
    so a run cut short still covers every family and task evenly. With ``partial``,
    each finished job is also appended to that JSON-lines file, so a run cut short
    still leaves its finished jobs behind.
    """
    if proto.mode == "live":
        from forebear.bench import live

        return live.run(proto, progress=progress, partial=partial)
    families = {f: family_of(proto, f) for f in proto.families}
    cache = tempfile.mkdtemp(prefix="forebear-bench-")
    jobs = [(f, i, s, proto.trials, proto, cache)
            for s in range(proto.first_seed, proto.first_seed + proto.seeds)
            for f in proto.families for i in held_out(families[f], proto.tasks)]
    results: list[dict[str, Any]] = []
    try:
        if proto.workers == 1:
            for j in jobs:
                results.append(_job(j))
                finished(results[-1], len(results), len(jobs), progress, partial)
            return results
        import multiprocessing

        with ProcessPoolExecutor(max_workers=proto.workers, mp_context=multiprocessing.get_context("spawn")) as pool:
            for r in pool.map(_job, jobs):
                results.append(r)
                finished(r, len(results), len(jobs), progress, partial)
        return results
    finally:
        shutil.rmtree(cache, ignore_errors=True)


def finished(r: dict[str, Any], done: int, total: int, progress: bool, partial: Path | None) -> None:
    import sys

    if partial is not None:
        with open(partial, "a") as fh:
            fh.write(json.dumps(r) + "\n")
    if not progress:
        return
    secs = sum(v["seconds"] for v in r["runs"].values() if "same_as" not in v)
    print(f"[{done}/{total}] {r['task']} seed {r['seed']}: {secs:.0f}s", file=sys.stderr, flush=True)


# --------------------------------------------------------------------------
# figures


def curves(results: Sequence[Mapping[str, Any]], family: str, method: str) -> np.ndarray:
    """Regret curves of one method on one family, shape (runs, trials), rows in job order."""
    rows = [r["runs"][method]["regret"] for r in results if r["family"] == family and method in r["runs"]]
    return np.asarray(rows, dtype=float)


def interval(values: np.ndarray, seed: int = 0) -> tuple[float, float, float]:
    """Mean and 95% percentile-bootstrap interval of the mean (Efron & Tibshirani 1993)."""
    v = np.asarray(values, dtype=float)
    if len(v) < 2 or np.all(v == v[0]):
        return float(v.mean()), float(v.mean()), float(v.mean())
    from scipy.stats import bootstrap

    res = bootstrap((v,), np.mean, confidence_level=0.95, n_resamples=2000, method="percentile", random_state=seed)
    return float(v.mean()), float(res.confidence_interval.low), float(res.confidence_interval.high)


def summarise(results: Sequence[Mapping[str, Any]], proto: Protocol) -> dict[str, Any]:
    """The figures of a run: regret with intervals, ranks, trials-to-target, goals."""
    checkpoints = [t for t in CHECKPOINTS if t <= proto.trials] or [proto.trials]
    if checkpoints[-1] != proto.trials and proto.trials not in checkpoints:
        checkpoints.append(proto.trials)
    # Ranks compare methods of one concurrency: "rank" the sequential ones, "rank_q4" and "rank_q8"
    # those with 4 or 8 workers; random search, which has no schedule, joins every group, but alone
    # it is no ranking ("rank" stays empty in a run of batch methods only).
    free = [m for m in proto.methods if METHODS[m].kind in ("random", "lhs-random")]
    groups: dict[str, list[str]] = {}
    for q in sorted({1} | {METHODS[m].q for m in proto.methods}):
        own = [m for m in proto.methods if METHODS[m].q == q and m not in free]
        if own or q == 1:
            groups["rank" if q == 1 else f"rank_q{q}"] = [m for m in proto.methods if m in free or m in own] if own else []
    out: dict[str, Any] = {}
    for fam in proto.families:
        c = {m: curves(results, fam, m) for m in proto.methods}
        regret = {m: {t: interval(c[m][:, t - 1]) for t in checkpoints} for m in proto.methods}
        fam_out: dict[str, Any] = {"regret": regret, "runs": int(len(c[proto.methods[0]]))}
        for key, group in groups.items():
            fam_out[key] = _ranks(c, group, checkpoints)
        fam_out["models"] = {m: _merge([r["runs"][m]["models"] for r in results if r["family"] == fam]) for m in proto.methods}
        fam_out["seconds"] = {m: float(np.mean([r["runs"][m]["seconds"] for r in results if r["family"] == fam])) for m in proto.methods}
        fam_out["goals"] = _goals(c, proto.trials)
        out[fam] = fam_out
    return out


def _ranks(c: Mapping[str, np.ndarray], methods: Sequence[str], checkpoints: Sequence[int]) -> dict[str, dict[int, float]]:
    """Average rank of each method over the runs at each checkpoint (1 = best; ties share the mean rank)."""
    from scipy.stats import rankdata

    ranks: dict[str, dict[int, float]] = {m: {} for m in methods}
    for t in checkpoints if methods else ():
        table = np.column_stack([c[m][:, t - 1] for m in methods])
        r = np.apply_along_axis(rankdata, 1, table).mean(axis=0)
        for m, v in zip(methods, r, strict=True):
            ranks[m][t] = float(v)
    return ranks


def _merge(counts: Sequence[Mapping[str, int]]) -> dict[str, int]:
    total: Counter[str] = Counter()
    for c in counts:
        total.update(c)
    return dict(total)


def _goals(c: Mapping[str, np.ndarray], trials: int) -> dict[str, Any]:
    """The three targets of the benchmark, where the run holds the methods they need."""
    goals: dict[str, Any] = {}
    if "gp" in c and "forebear-full" in c:
        target = float(c["gp"][:, trials - 1].mean())
        mean = c["forebear-full"].mean(axis=0)
        hit = np.nonzero(mean <= target)[0]
        goals["target_regret"] = target
        goals["trials_to_target"] = int(hit[0] + 1) if len(hit) else None
        per_run = [int(np.nonzero(row <= target)[0][0] + 1) if np.any(row <= target) else None for row in c["forebear-full"]]
        goals["runs_on_target_by_10"] = float(np.mean([t is not None and t <= 10 for t in per_run]))
        goals["trials_to_target_ok"] = goals["trials_to_target"] is not None and goals["trials_to_target"] <= 10
    t10 = min(10, trials) - 1
    if "random" in c and "forebear-full" in c:
        rnd = float(c["random"][:, t10].mean())
        full = float(c["forebear-full"][:, t10].mean())
        goals["ratio_to_random_at_10"] = full / rnd if rnd > 0 else None
        goals["ratio_to_random_ok"] = rnd > 0 and full <= 0.33 * rnd
    for q in (4, 8):
        name = f"forebear-full-q{q}"
        if name in c and "forebear-full" in c:
            ratios = {}
            for t in (10, 25, 50):
                if t <= trials:
                    seq = float(c["forebear-full"][:, t - 1].mean())
                    bat = float(c[name][:, t - 1].mean())
                    ratios[t] = bat / seq if seq > 0 else None
            goals[f"q{q}_over_q1"] = ratios
            if q == 8 and ratios:
                last = ratios[max(ratios)]
                goals["q8_ok"] = last is not None and last <= 1.1
    return goals


# --------------------------------------------------------------------------
# output


def markdown(summary: Mapping[str, Any], proto: Protocol) -> str:
    """Tables of one run as Markdown (regret, rank, goals), one section per family."""
    lines: list[str] = []
    for fam, s in summary.items():
        cps = sorted(next(iter(s["regret"].values())))
        lines += [f"#### {fam} ({s['runs']} runs: held-out tasks x seeds)", ""]
        lines += ["| method | " + " | ".join(f"regret @{t}" for t in cps) + " |", "|---|" + "---|" * len(cps)]
        for m, row in s["regret"].items():
            cells = [f"{mu:.3g} [{lo:.3g}, {hi:.3g}]" for mu, lo, hi in (row[t] for t in cps)]
            lines.append(f"| {m} | " + " | ".join(cells) + " |")
        for key in [k for k in s if k == "rank" or k.startswith("rank_q")]:
            q = 1 if key == "rank" else int(key.removeprefix("rank_q"))
            if not s[key]:
                continue
            lines += ["", f"| method (q = {q}) | " + " | ".join(f"rank @{t}" for t in cps) + " |", "|---|" + "---|" * len(cps)]
            for m, row in s[key].items():
                lines.append(f"| {m} | " + " | ".join(f"{row[t]:.2f}" for t in cps) + " |")
        g = s["goals"]
        lines.append("")
        if "trials_to_target" in g:
            ttt = g["trials_to_target"]
            lines.append(f"- trials-to-target (plain GP's {proto.trials}-trial regret {g['target_regret']:.3g}): "
                         f"{ttt if ttt is not None else f'not reached in {proto.trials}'} "
                         f"(goal <= 10: {'met' if g['trials_to_target_ok'] else 'missed'}); "
                         f"runs on target by trial 10: {100 * g['runs_on_target_by_10']:.0f}%")
        if g.get("ratio_to_random_at_10") is not None:
            lines.append(f"- regret at 10 trials / random search's: {g['ratio_to_random_at_10']:.2f} "
                         f"(goal <= 0.33: {'met' if g['ratio_to_random_ok'] else 'missed'})")
        for q in (4, 8):
            r = g.get(f"q{q}_over_q1")
            if r:
                txt = ", ".join(f"@{t}: {v:.2f}" for t, v in r.items() if v is not None)
                extra = f" (goal <= 1.1 at {max(r)}: {'met' if g.get('q8_ok') else 'missed'})" if q == 8 else ""
                lines.append(f"- q={q} regret / q=1 regret, forebear full: {txt}{extra}")
        models = s["models"].get("forebear-full")
        if models:
            lines.append(f"- forebear full proposals by model: {json.dumps(models, sort_keys=True)}")
        lines.append("")
    return "\n".join(lines)


def plots(results: Sequence[Mapping[str, Any]], proto: Protocol, out_dir: Path) -> list[Path]:
    """One regret-vs-trials PNG per family and one batch-efficiency PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    paths = []
    x = np.arange(1, proto.trials + 1)
    # The per-family plot compares the sequential methods; a run of batch methods only shows those.
    seq = [m for m in proto.methods if METHODS[m].q == 1] or list(proto.methods)
    for fam in proto.families:
        fig, ax = plt.subplots(figsize=(6.4, 4.2))
        for m in seq:
            c = np.maximum(curves(results, fam, m), 1e-6)
            mean = c.mean(axis=0)
            # forebear-cold runs the same plain GP as gp: dotted on top so both stay visible.
            style = "--" if m.startswith("no-") else (":" if m == "forebear-cold" else "-")
            width = 2.2 if m in ("forebear-full", "forebear-cold") else 1.2
            (line,) = ax.plot(x, mean, style, lw=width, label=m)
            if m in ("random", "forebear-full"):
                se = c.std(axis=0, ddof=1) / np.sqrt(len(c)) if len(c) > 1 else np.zeros_like(mean)
                ax.fill_between(x, np.maximum(mean - 1.96 * se, 1e-6), mean + 1.96 * se, alpha=0.15, color=line.get_color())
        ax.set_yscale("log")
        ax.set_xlabel("trials")
        ax.set_ylabel("mean normalised regret (best so far)")
        ax.text(0.99, 0.99, "bands: mean +- 1.96 s.e.", transform=ax.transAxes, ha="right", va="top", fontsize=7)
        ax.set_title(f"{fam}: leave one task out, {len(c)} runs")
        ax.legend(fontsize=7, ncol=2)
        fig.tight_layout()
        p = out_dir / f"quality_{fam}.png"
        fig.savefig(p, dpi=110)
        plt.close(fig)
        paths.append(p)
    batch = [(base, q) for base in ("forebear-full", "gp") for q in (1, 4, 8)
             if (base if q == 1 else f"{base}-q{q}") in proto.methods]
    if any(q > 1 for _, q in batch):
        fig, axes = plt.subplots(1, len(proto.families), figsize=(4.0 * len(proto.families), 3.6), squeeze=False)
        for ax, fam in zip(axes[0], proto.families, strict=True):
            for base, q in batch:
                m = base if q == 1 else f"{base}-q{q}"
                mean = np.maximum(curves(results, fam, m), 1e-6).mean(axis=0)
                ax.plot(x, mean, "-" if base == "forebear-full" else ":", lw=1.5, label=f"{base} q={q}")
            ax.set_yscale("log")
            ax.set_title(fam)
            ax.set_xlabel("trials")
        axes[0][0].set_ylabel("mean normalised regret")
        axes[0][0].legend(fontsize=7)
        fig.tight_layout()
        p = out_dir / "quality_batch.png"
        fig.savefig(p, dpi=110)
        plt.close(fig)
        paths.append(p)
    return paths


def main(smoke: bool = False, out_dir: str | None = None, proto: Protocol | None = None, progress: bool = False,
         sync: bool = False, live: bool = False) -> dict[str, Any]:
    """Run the benchmark; returns its figures (``mean_regret`` at the last trial per method).

    Parameters
    ----------
    smoke
        The small protocol (one family, 3 held-out tasks, 2 seeds, 15 trials).
    out_dir
        Folder for curves.json, results.md and the PNGs; nothing is written without it.
    proto
        An explicit protocol (overrides ``smoke`` and ``sync``).
    sync
        Synchronous rounds instead of the asynchronous mode.
    live
        Each search through ``forebear.run`` (``live.py``), with the protocol's methods
        that a spec can ask for (forebear with and without history, random search).
    """
    if sync and live:
        msg = "choose one of sync and live"
        raise ValueError(msg)
    if proto is None:
        proto = replace(SMOKE if smoke else Protocol(), mode="sync" if sync else "live" if live else "async")
        if live:
            from forebear.bench.live import supported

            proto = replace(proto, methods=tuple(m for m in proto.methods if supported(METHODS[m])))
    t0 = time.perf_counter()
    partial = None
    if out_dir is not None:
        Path(out_dir).mkdir(parents=True, exist_ok=True)
        partial = Path(out_dir) / "partial.jsonl"
        partial.unlink(missing_ok=True)
    results = run(proto, progress=progress, partial=partial)
    wall = time.perf_counter() - t0
    written = write(results, proto, out_dir) if out_dir is not None else None
    summary = written["summary"] if written else summarise(results, proto)
    first = proto.families[0]
    mean_regret = {m: float(curves(results, first, m)[:, -1].mean()) for m in proto.methods}
    figures: dict[str, Any] = {
        "mean_regret": mean_regret,
        "family": first,
        "trials": proto.trials,
        "runs": summary[first]["runs"],
        "goals": {f: s["goals"] for f, s in summary.items()},
        "models": {f: s["models"].get("forebear-full") for f, s in summary.items()},
        "wall_s": round(wall, 1),
        "cores": os.cpu_count(),
        "protocol": _protocol_dict(proto),
        "mode": proto.mode,
    }
    if written:
        figures["plots"] = written["plots"]
    return _jsonable(figures)


def _protocol_dict(proto: Protocol) -> dict[str, Any]:
    return {k: getattr(proto, k) for k in Protocol.__dataclass_fields__}


def write(results: Sequence[Mapping[str, Any]], proto: Protocol, out_dir: str | Path) -> dict[str, Any]:
    """Write curves.json, summary.json, results.md and the PNGs of ``results`` into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    summary = summarise(results, proto)
    proto_d = _protocol_dict(proto)
    (out / "curves.json").write_text(json.dumps({"protocol": proto_d, "results": list(results)}))
    (out / "summary.json").write_text(json.dumps(_jsonable(summary), indent=1))
    (out / "results.md").write_text(markdown(summary, proto))
    return {"summary": summary, "plots": [str(p) for p in plots(results, proto, out)]}


def merge(dirs: Sequence[str | Path], out_dir: str | Path) -> dict[str, Any]:
    """Combine the curves.json of several runs (e.g. one per family) into one report."""
    results: list[dict[str, Any]] = []
    protos = []
    for d in dirs:
        path = Path(d) / "curves.json"
        if path.is_file():
            data = json.loads(path.read_text())
            protos.append(data["protocol"])
            results += data["results"]
            continue
        # A run cut short: its finished jobs; the protocol is read off them.
        part = Path(d) / "partial.jsonl"
        if not part.is_file():
            msg = f"{path} does not exist; run the benchmark with --out {d} first"
            raise FileNotFoundError(msg)
        rows = _read_partial(part)
        if not rows:
            msg = f"{part} holds no finished job"
            raise ValueError(msg)
        d0 = Protocol()
        protos.append({"families": list(dict.fromkeys(r["family"] for r in rows)), "methods": list(rows[0]["runs"]),
                       "tasks": len({r["task"] for r in rows}), "seeds": len({r["seed"] for r in rows}),
                       "trials": len(next(iter(rows[0]["runs"].values()))["regret"]),
                       "family_size": d0.family_size, "history_points": d0.history_points, "workers": 1})
        results += rows
    families = tuple(dict.fromkeys(f for p in protos for f in p["families"]))
    methods = tuple(m for m in protos[0]["methods"] if all(m in p["methods"] for p in protos))
    first = protos[0]
    seeds = len({r["seed"] for r in results})
    tasks = max(len({r["task"] for r in results if r["family"] == f}) for f in families)
    proto = Protocol(families, tasks, seeds,
                     min(p["trials"] for p in protos), methods, first["family_size"], first["history_points"],
                     first["workers"], first.get("first_seed", 0), first.get("proposer", {}),
                     first.get("history_kind", "sobol"), first.get("history_tasks"),
                     first.get("mode", "sync"), first.get("trial_seconds", 1.0), first.get("sigma", 0.5),
                     first.get("refit_seconds", 0.25))
    return {"protocol": {"families": families, "methods": methods}, **write(results, proto, out_dir)}


def _read_partial(path: Path) -> list[dict[str, Any]]:
    """Finished jobs of a partial file; a torn last line (the run was killed mid-write) is skipped."""
    lines = [line for line in path.read_text().splitlines() if line.strip()]
    rows = []
    for i, line in enumerate(lines):
        try:
            rows.append(json.loads(line))
        except ValueError:
            if i == len(lines) - 1:
                break
            msg = f"{path}: line {i + 1} is not a JSON record"
            raise ValueError(msg) from None
    return rows


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    return obj


def _cli(argv: Sequence[str] | None = None) -> None:
    d = Protocol()
    ap = argparse.ArgumentParser(prog="python -m forebear.bench.quality", description=__doc__.splitlines()[0])
    ap.add_argument("--families", nargs="+", default=list(d.families))
    ap.add_argument("--tasks", type=int, default=d.tasks, help="Held-out tasks per family.")
    ap.add_argument("--seeds", type=int, default=d.seeds)
    ap.add_argument("--trials", type=int, default=d.trials)
    ap.add_argument("--methods", nargs="+", default=list(d.methods))
    ap.add_argument("--family-size", type=int, default=d.family_size, help="Tasks per analytic family.")
    ap.add_argument("--history-points", type=int, default=d.history_points, help="Design points per history task.")
    ap.add_argument("--history-kind", choices=HISTORY_KINDS, default=d.history_kind,
                    help="History tasks as Sobol designs or as plain-GP searches of 20-50 trials (cached).")
    ap.add_argument("--history-tasks", type=int, default=d.history_tasks,
                    help="History tasks per held-out task (e.g. 3, 10, 30); default: every other task of the family.")
    ap.add_argument("--workers", type=int, default=d.workers, help="Processes.")
    ap.add_argument("--first-seed", type=int, default=d.first_seed, help="Seeds are first-seed .. first-seed + seeds - 1.")
    ap.add_argument("--out", default=None, help="Folder for curves.json, results.md and PNGs.")
    ap.add_argument("--smoke", action="store_true")
    mode = ap.add_mutually_exclusive_group()
    mode.add_argument("--async", dest="mode", action="store_const", const="async", default=d.mode,
                      help="Each proposer method with q workers under the loop's schedule and a simulated clock (default).")
    mode.add_argument("--sync", dest="mode", action="store_const", const="sync", help="Every round scored before the next.")
    mode.add_argument("--live", dest="mode", action="store_const", const="live",
                      help="Each search through forebear.run on an embedded Dask cluster, trials sleeping their "
                           "drawn durations in real time (bench/live.py); forebear and random search only.")
    ap.add_argument("--trial-seconds", type=float, default=d.trial_seconds, help="Median simulated trial duration.")
    ap.add_argument("--sigma", type=float, default=d.sigma, help="Log-normal spread of the trial durations.")
    ap.add_argument("--refit-seconds", type=float, default=d.refit_seconds,
                    help="Simulated seconds of a model round; a negative value: the measured seconds.")
    ap.add_argument("--merge", nargs="+", default=None, metavar="DIR", help="Only combine the curves.json of earlier runs into --out.")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", dest="settings",
                    help="An extra Proposer setting for every proposer method, VALUE read as JSON (e.g. n_initial=7); repeatable.")
    ns = ap.parse_args(argv)
    settings: dict[str, Any] = {}
    for item in ns.settings:
        key, sep, value = item.partition("=")
        if not sep or not key:
            ap.error(f"--set expects KEY=VALUE, got {item!r}")
        try:
            settings[key] = json.loads(value)
        except ValueError:
            settings[key] = value
    if settings:
        from forebear.bench.families import unit_space
        from forebear.engine.proposer import Proposer

        try:  # a bad setting is refused here, not in every worker
            Proposer(unit_space(2), None, cache_dir=False, **settings)
        except (TypeError, ValueError) as exc:
            ap.error(f"--set: {exc}")
    if ns.merge:
        if ns.out is None:
            ap.error("--merge needs --out")
        merged = merge(ns.merge, ns.out)
        print(json.dumps(_jsonable({"protocol": merged["protocol"], "plots": merged["plots"]}), indent=1))
        return
    try:
        refit = None if ns.refit_seconds is not None and ns.refit_seconds < 0 else ns.refit_seconds
        proto = replace(SMOKE, mode=ns.mode) if ns.smoke else Protocol(
            tuple(ns.families), ns.tasks, ns.seeds, ns.trials, tuple(ns.methods), ns.family_size, ns.history_points,
            ns.workers, ns.first_seed, settings, ns.history_kind, ns.history_tasks, ns.mode, ns.trial_seconds, ns.sigma, refit)
    except ValueError as exc:
        ap.error(str(exc))
    print(json.dumps(main(out_dir=ns.out, proto=proto, progress=True), indent=1))


if __name__ == "__main__":
    _cli()
