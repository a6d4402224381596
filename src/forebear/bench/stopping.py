"""`forebear bench stopping`: worker time saved by the stopping rules, and how often they stop the best.

Two learning-curve families, each a set of tasks of our own:

* ``mlp`` (real training): scikit-learn's ``MLPClassifier`` (one hidden
  layer) on the bundled digits, one ``partial_fit`` pass (an epoch of
  minibatches) over the training rows per step, scored by the validation
  error after each step (log-loss was measured too, docs/benchmarks.md). A
  task is a data slice and a preprocessing of our own: its own 900/500
  train/validation rows, a subset of 48 of the 64 pixels and Gaussian noise
  of its own level on the training features.
  Space: ``learning_rate_init`` (log), ``alpha`` (log), ``hidden`` units.
* ``pow3`` (analytic): curves ``y(t) = c + a * t**(-alpha)`` (the pow3 form of
  Domhan, Springenberg and Hutter, IJCAI 2015) whose asymptote ``c`` is a
  shifted Branin surface over two parameters and whose rate ``alpha`` is set
  by a third, so slow learners with good asymptotes exist; noise 0.01.

Protocol of one run: a held-out task and a stream of random configurations
(the run's seed). The reference search runs the first ``trials`` of them to
the end on ``workers`` simulated workers; its best final score is the target.
The same stream then runs under each rule (configurations after the first
``trials`` are used only when needed) until a trial that ran to the end
reaches the target. Worker time is counted in steps (every step of a family
costs the same: one pass over the same data), so the ratio is
"worker time to the reference's final regret / reference worker time". The
rules are the ones the controller uses (:mod:`forebear.engine.halting`),
applied as each simulated step finishes; the history rule's curves are
full runs of 30 random configurations on each of 4 other tasks.
"""

from __future__ import annotations

import json
import os
import statistics
import time
import warnings
import zlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from forebear.bench.functions import branin
from forebear.core.halting import Stopping
from forebear.engine.halting import HalvingRule, make_rule
from forebear.records.curves import CurveSet

HISTORY_TASKS = 4
HISTORY_CONFIGS = 30
EVAL_TASK_BASE = 1000
PIXELS = 48  # pixels of 64 a task keeps
TRAIN_ROWS, VAL_ROWS = 900, 500  # of the 1797 digits
BATCH = 300  # minibatch rows: three updates per pass  # evaluation tasks are seeded apart from the history tasks


def _stable_seed(task: int, config: dict[str, Any]) -> int:
    """A seed of (task, configuration) that is the same in every process (``hash`` of a str is not)."""
    return zlib.crc32(json.dumps([task, config], sort_keys=True).encode())


# --------------------------------------------------------------------------
# families: config sampler, and curve(task, config) -> list of values for steps 1..steps


@dataclass
class Family:
    name: str
    steps: int
    sample: Callable[[np.random.Generator], dict[str, Any]]
    curve: Callable[[int, dict[str, Any]], Sequence[float]]


def _mlp_family(steps: int = 27) -> Family:
    from sklearn.datasets import load_digits
    from sklearn.neural_network import MLPClassifier
    from sklearn.preprocessing import StandardScaler

    digits = load_digits()
    X_all, y_all = digits.data.astype(float), digits.target
    classes = np.arange(10)
    tasks: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = {}

    def task_data(task: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        if task not in tasks:
            rng = np.random.default_rng(task)
            order = rng.permutation(len(y_all))
            train, val = order[:TRAIN_ROWS], order[TRAIN_ROWS : TRAIN_ROWS + VAL_ROWS]
            pixels = np.sort(rng.choice(64, size=PIXELS, replace=False))
            scaler = StandardScaler().fit(X_all[train][:, pixels])
            Xt = scaler.transform(X_all[train][:, pixels])
            Xt = Xt + rng.normal(0.0, rng.uniform(0.0, 0.8), size=Xt.shape)
            Xv = scaler.transform(X_all[val][:, pixels])
            tasks[task] = (Xt, y_all[train], Xv, y_all[val])
        return tasks[task]

    def sample(rng: np.random.Generator) -> dict[str, Any]:
        return {
            "learning_rate_init": float(10 ** rng.uniform(-4, -1)),
            "alpha": float(10 ** rng.uniform(-5, 0)),
            "hidden": int(round(2 ** rng.uniform(3, 6))),
        }

    def curve(task: int, config: dict[str, Any]) -> Sequence[float]:
        Xt, yt, Xv, yv = task_data(task)
        seed = _stable_seed(task, config) % 10_000
        model = MLPClassifier(
            hidden_layer_sizes=(config["hidden"],),
            learning_rate_init=config["learning_rate_init"],
            alpha=config["alpha"],
            batch_size=BATCH,
            random_state=seed,
        )

        def one_pass() -> float:
            model.partial_fit(Xt, yt, classes=classes)  # one epoch of minibatches
            return float(1.0 - model.score(Xv, yv))  # validation error

        return Trained(steps, one_pass)

    return Family("mlp", steps, sample, curve)


class Trained(Sequence[float]):
    """A curve trained step by step as the simulation asks for it (a halted trial trains no further)."""

    def __init__(self, steps: int, one_pass: Callable[[], float]) -> None:
        self.steps = steps
        self._one_pass = one_pass
        self._values: list[float] = []

    def __len__(self) -> int:
        return self.steps

    def __getitem__(self, i: Any) -> Any:
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(self.steps))]
        if i < 0:
            i += self.steps
        while len(self._values) <= i:
            self._values.append(self._one_pass())
        return self._values[i]


def _pow3_family(steps: int = 27) -> Family:
    def sample(rng: np.random.Generator) -> dict[str, Any]:
        return {f"x{i}": float(rng.uniform()) for i in range(3)}

    def curve(task: int, config: dict[str, Any]) -> list[float]:
        trng = np.random.default_rng(task)
        shift = trng.uniform(-0.15, 0.15, size=2)
        x = np.clip(np.array([config["x0"], config["x1"]]) - shift, 0.0, 1.0)
        c = branin(x) / 300.0  # Branin on the unit square spans about 0.4 to 308: c is in about 0..1
        alpha = 0.3 + 1.2 * config["x2"]
        a = 1.0 + 0.5 * (1.0 - config["x2"])
        noise = np.random.default_rng(_stable_seed(task, config))
        t = np.arange(1, steps + 1, dtype=float)
        return [float(v) for v in c + a * t**-alpha + 0.01 * noise.normal(size=steps)]

    return Family("pow3", steps, sample, curve)


FAMILIES: dict[str, Callable[[], Family]] = {"mlp": _mlp_family, "pow3": _pow3_family}
_MADE: dict[str, tuple[Family, dict[tuple[int, int], Sequence[float]]]] = {}


# --------------------------------------------------------------------------
# the simulated search


@dataclass
class Outcome:
    time: float  # worker steps until a finished trial reached the target (or until the stream ran out)
    reached: bool
    best_halted: bool  # the reference's best configuration was halted
    halted: int


def _advance(
    running: list[tuple[int, int] | None], curve_of: Callable[[int], Sequence[float]], rule: HalvingRule | None
) -> Iterator[tuple[int, float, str | None]]:
    """One step of every running trial: ``(index, value, end)`` per step, ``end`` None, "finished" or "halted".

    The rule sees each value (and each final score) before it is yielded; a trial that ends frees
    its worker's slot in ``running``.
    """
    for w, slot in enumerate(running):
        if slot is None:
            continue
        i, done = slot
        values = curve_of(i)
        done += 1
        value = values[done - 1]
        if done == len(values):
            running[w] = None
            if rule is not None:
                rule.finished(i, value)
            yield i, value, "finished"
        elif rule is not None and rule.observe(i, done, value) is not None:
            running[w] = None
            yield i, value, "halted"
        else:
            running[w] = (i, done)
            yield i, value, None


def simulate(
    curves: Callable[[int], Sequence[float]], n_stream: int, workers: int, rule: HalvingRule | None, target: float | None, best_index: int | None
) -> tuple[Outcome, float]:
    """Run configurations 0, 1, ... of the stream on ``workers``; returns the outcome and the best final score."""
    nxt = 0
    running: list[tuple[int, int] | None] = [None] * workers  # (config index, steps done)
    used = 0
    best = float("inf")
    halted = 0
    best_halted = False
    while True:
        for w in range(workers):
            if running[w] is None and nxt < n_stream:
                running[w] = (nxt, 0)
                nxt += 1
        if all(r is None for r in running):
            break
        for i, value, end in _advance(running, curves, rule):
            used += 1
            if end == "finished":
                best = min(best, value)
                if target is not None and value <= target:
                    return Outcome(used, True, best_halted, halted), best
            elif end == "halted":
                halted += 1
                best_halted = best_halted or i == best_index
    return Outcome(used, target is None, best_halted, halted), best


def _history(family: Family, cache: dict[tuple[int, int], Sequence[float]]) -> list[CurveSet]:
    sets = []
    for h in range(HISTORY_TASKS):
        rng = np.random.default_rng(10_000 + h)
        cs = CurveSet(f"history-{h}", family.steps)
        for j in range(HISTORY_CONFIGS):
            key = (h, j)
            if key not in cache:
                cache[key] = family.curve(h, family.sample(rng))
            else:
                family.sample(rng)
            cs.curves.append(list(enumerate(cache[key][:], start=1)))
            cs.complete.append(True)
        sets.append(cs)
    return sets


def run_family(name: str, runs: int, trials: int, workers: int, stopping: dict[str, Any], first_run: int = 0) -> dict[str, Any]:
    """The protocol of the module docstring on one family; figures per rule."""
    if name not in _MADE:
        _MADE[name] = (FAMILIES[name](), {})
    family, cache = _MADE[name]  # curves are kept between calls in one process: settings compare on the same runs
    t0 = time.perf_counter()
    sets = _history(family, cache)
    rules = {r: Stopping(r, steps=family.steps, **stopping) for r in ("halving", "history")}
    per_rule: dict[str, list[Outcome]] = {r: [] for r in rules}
    stream = 3 * trials
    for run in range(first_run, first_run + runs):
        task = EVAL_TASK_BASE + run
        rng = np.random.default_rng(run)
        configs = [family.sample(rng) for _ in range(stream)]

        def curves(i: int, task: int = task, configs: list[dict[str, Any]] = configs) -> Sequence[float]:
            key = (task, i)
            if key not in cache:
                cache[key] = family.curve(task, configs[i])
            return cache[key]

        finals = [curves(i)[-1] for i in range(trials)]
        best_index = int(np.argmin(finals))
        reference, target = simulate(curves, trials, workers, None, None, None)
        for r, st in rules.items():
            outcome, _ = simulate(curves, stream, workers, make_rule(st, sets), target, best_index)
            outcome.time = outcome.time / reference.time if outcome.reached else max(1.0, outcome.time / reference.time)
            per_rule[r].append(outcome)
    out: dict[str, Any] = {"family": name, "runs": runs, "first_run": first_run, "trials": trials, "workers": workers, "steps": family.steps}
    for r, outs in per_rule.items():
        out[r] = {
            "time_ratio_mean": round(statistics.fmean(o.time for o in outs), 3),
            "time_ratio_max": round(max(o.time for o in outs), 3),
            "reached": sum(o.reached for o in outs),
            "best_stopped_runs": sum(o.best_halted for o in outs),
            "best_stopped_share": round(sum(o.best_halted for o in outs) / len(outs), 3),
            "halted_mean": round(statistics.fmean(o.halted for o in outs), 1),
        }
    out["seconds"] = round(time.perf_counter() - t0, 1)
    return out


def main(
    families: Sequence[str] | str = ("mlp", "pow3"),
    runs: int = 10,
    trials: int = 32,
    workers: int = 4,
    min_step: int = 3,
    eta: float = 3.0,
    threshold: float = 0.05,
    out: str | None = None,
    first_run: int = 0,
    treatments: bool = False,
) -> dict[str, Any]:
    """Figures for docs/benchmarks.md; with ``out``, also written there as JSON.

    Run ``r`` (from ``first_run``) is held-out task ``EVAL_TASK_BASE + r`` with configuration stream
    seed ``r``. Runs 0-9 are the default; docs/benchmarks.md reports runs 100-419 too (rule changes
    were tried on 100-109 and 200-209 and checked on the others).
    """
    if isinstance(families, str):
        families = [f.strip() for f in families.split(",") if f.strip()]
    unknown = [f for f in families if f not in FAMILIES]
    if unknown:
        msg = f"unknown family {unknown[0]!r}; families: {', '.join(FAMILIES)}"
        raise ValueError(msg)
    for name in families:
        if name not in _MADE:
            _MADE[name] = (FAMILIES[name](), {})
        steps = _MADE[name][0].steps
        if min_step >= steps:
            msg = f"min_step must be below the {name} family's {steps} steps, got {min_step}"
            raise ValueError(msg)
    stopping = {"min_step": min_step, "eta": eta, "threshold": threshold}
    result: dict[str, Any] = {"stopping": stopping}
    from threadpoolctl import threadpool_limits

    # One BLAS thread: the minibatches are small, and threads only fight over shared cores.
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore", category=UserWarning)  # scikit-learn's notes on tiny minibatch fits
        for name in families:
            result[name] = run_family(name, runs, trials, workers, stopping, first_run)
            if treatments:
                result[f"{name}-proposed"] = run_treatments(name, runs, trials, workers, stopping, first_run)
    if out:
        Path(out).write_text(json.dumps(result, indent=2) + "\n")
    return result


# --------------------------------------------------------------------------
# what the surrogate makes of a halted trial's partial score

TREATMENTS = ("left-out", "as-final")  # a halted trial is not shown to the proposer / shown with its partial score
SPACES: dict[str, dict[str, dict[str, Any]]] = {
    "mlp": {
        "learning_rate_init": {"float": [1e-4, 1e-1], "log": True},
        "alpha": {"float": [1e-5, 1.0], "log": True},
        "hidden": {"int": [8, 64], "log": True},
    },
    "pow3": {f"x{i}": {"float": [0.0, 1.0]} for i in range(3)},
}


def simulate_proposed(
    curve: Callable[[dict[str, Any]], Sequence[float]], space: Any, n_stream: int, workers: int, rule: HalvingRule | None,
    target: float | None, treatment: str, seed: int, budget: float = float("inf"),
) -> tuple[Outcome, float, float]:
    """:func:`simulate` with configurations from forebear's proposer (plain GP) instead of a random stream.

    A worker that comes free gets the proposer's next configuration, the running ones passed as
    pending; a finished trial is an observation with its final score, a halted one as ``treatment``.
    Returns the outcome, the best final score and the best final score within ``budget`` steps.
    """
    from forebear.engine.proposer import Observation, Proposer

    proposer = Proposer(space, None, seed=seed, model="gp", cache_dir=False, n_candidates=512)
    observed: list[Any] = []
    configs: list[dict[str, Any]] = []
    running: list[tuple[int, int] | None] = [None] * workers
    used, halted, best = 0, 0, float("inf")
    in_budget = float("inf")
    while True:
        free = [w for w in range(workers) if running[w] is None]
        n = min(len(free), n_stream - len(configs))
        if n > 0:
            pending = [configs[r[0]] for r in running if r is not None]
            for w, prop in zip(free, proposer.propose(n, observed, pending=pending), strict=False):
                configs.append(dict(prop.config))
                running[w] = (len(configs) - 1, 0)
        if all(r is None for r in running):
            break
        for i, value, end in _advance(running, lambda i: curve(configs[i]), rule):
            used += 1
            if end == "finished":
                best = min(best, value)
                in_budget = best if used <= budget else in_budget
                observed.append(Observation(configs[i], float(value)))
                if target is not None and value <= target:
                    return Outcome(used, True, False, halted), best, in_budget
            elif end == "halted":
                halted += 1
                if treatment == "as-final":
                    observed.append(Observation(configs[i], float(value)))
    return Outcome(used, target is None, False, halted), best, in_budget


def run_treatments(name: str, runs: int, trials: int, workers: int, stopping: dict[str, Any], first_run: int = 0, rule: str = "history") -> dict[str, Any]:
    """Worker time to the no-stopping proposed search's best, per treatment of halted trials."""
    from forebear.core.space import Space

    if name not in _MADE:
        _MADE[name] = (FAMILIES[name](), {})
    family, cache = _MADE[name]
    t0 = time.perf_counter()
    sets = _history(family, cache)
    space = Space.from_dict(SPACES[name])
    st = Stopping(rule, steps=family.steps, **stopping)
    per: dict[str, list[Outcome]] = {t: [] for t in TREATMENTS}
    gaps: dict[str, list[float]] = {t: [] for t in TREATMENTS}  # best final within the reference's worker time minus its best
    for run in range(first_run, first_run + runs):
        task = EVAL_TASK_BASE + run
        store: dict[str, Sequence[float]] = {}

        def curve(config: dict[str, Any], task: int = task, store: dict[str, Sequence[float]] = store) -> Sequence[float]:
            key = json.dumps(config, sort_keys=True)
            if key not in store:
                store[key] = family.curve(task, config)
            return store[key]

        reference, target, _ = simulate_proposed(curve, space, trials, workers, None, None, "left-out", run)
        for t in TREATMENTS:
            outcome, _, in_budget = simulate_proposed(curve, space, 3 * trials, workers, make_rule(st, sets), target, t, run, reference.time)
            gaps[t].append(in_budget - target)
            outcome.time = outcome.time / reference.time if outcome.reached else max(1.0, outcome.time / reference.time)
            per[t].append(outcome)
    out: dict[str, Any] = {"family": name, "rule": rule, "runs": runs, "first_run": first_run, "trials": trials, "workers": workers}
    for t, outs in per.items():
        out[t] = {
            "time_ratio_mean": round(statistics.fmean(o.time for o in outs), 3),
            "time_ratio_max": round(max(o.time for o in outs), 3),
            "reached": sum(o.reached for o in outs),
            "halted_mean": round(statistics.fmean(o.halted for o in outs), 1),
            "time_ratios": [round(o.time, 3) for o in outs],
            "gap_at_reference_time_mean": round(statistics.fmean(gaps[t]), 4),
            "at_or_below_reference_at_its_time": sum(g <= 0 for g in gaps[t]),
        }
    out["seconds"] = round(time.perf_counter() - t0, 1)
    return out


# --------------------------------------------------------------------------
# halt latency on a real local cluster

LATENCY_DIR = "FOREBEAR_LATENCY_DIR"  # where the latency objective writes when it caught forebear.Halted
LATENCY_EVERY = "FOREBEAR_LATENCY_NOTE_EVERY"  # seconds between the latency objective's intermediate scores


def latency_objective(config: dict[str, Any], note: Any) -> float:
    """Notes ``u + 1/step`` every ``$FOREBEAR_LATENCY_NOTE_EVERY`` s and records when it is halted.

    ``u`` is a number in [0, 1) drawn from ``x`` (a hash), so the trials' order at the rungs has
    nothing to do with their final score ``x``: halving halts most trials whichever ``x`` the
    proposer picks (with ``x + 1/step`` a proposer that improves steadily got 2 halts of 12).
    """
    import forebear

    x = float(config["x"])
    u = zlib.crc32(repr(x).encode()) / 2**32
    every = float(os.environ[LATENCY_EVERY])
    Path(os.environ[LATENCY_DIR], f"worker-{_grandparent()}").touch()  # the Dask worker (this process's server's parent)
    try:
        for step in range(1, int(round(20 / every)) + 1):  # 20 s of training
            time.sleep(every)
            note(step, u + 1.0 / step)
    except forebear.Halted as halted:
        caught = time.time()
        Path(os.environ[LATENCY_DIR], f"{x!r}.json").write_text(json.dumps({"caught": caught, "step": halted.step}))
        raise
    return x


def _grandparent() -> int:
    with open(f"/proc/{os.getppid()}/stat") as fh:
        return int(fh.read().rsplit(")", 1)[1].split()[1])


def _cpu_seconds(pid: int) -> float | None:
    """User + system CPU seconds of process ``pid`` so far (Linux /proc), None when it is gone."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


class _WorkerCPU:
    """Samples the CPU time of the Dask worker processes the latency objective names, every 0.5 s."""

    def __init__(self, folder: str) -> None:
        import threading

        self.folder = Path(folder)
        self.cpu: dict[int, float] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(0.5):
            for f in self.folder.glob("worker-*"):
                pid = int(f.name.split("-")[1])
                cpu = _cpu_seconds(pid)
                if cpu is not None:
                    self.cpu[pid] = cpu

    def stop(self) -> dict[int, float]:
        self._stop.set()
        self._thread.join()
        return self.cpu


def halt_latency(trials: int = 12, workers: int = 4, note_every: float = 0.1) -> dict[str, Any]:
    """Seconds from the controller setting an attempt's halt event to its objective catching forebear.Halted.

    A halving search (rungs at steps 2, 4, ...) of :func:`latency_objective` on a local cluster of
    ``workers``; the controller's side is timed by wrapping ``forebear.loop.halting.Halting._signal``,
    which sets the event of a trial just after ``drain`` records the decision.
    """
    import tempfile

    import forebear
    from forebear.loop import halting

    decided_at: dict[int, float] = {}
    signal = halting.Halting._signal

    def timed(self: Any, key: str) -> None:
        for tid in self.decided:  # drain records the decision just before it signals
            decided_at.setdefault(tid, time.time())
        signal(self, key)

    with tempfile.TemporaryDirectory() as tmp:
        os.environ[LATENCY_DIR] = tmp
        os.environ[LATENCY_EVERY] = str(note_every)
        spec = {
            "name": "latency",
            "objective": {"call": "forebear.bench.stopping:latency_objective", "minimize": "loss"},
            "space": {"x": {"float": [0.0, 1.0]}},
            "budget": {"trials": trials, "batch": workers, "concurrency": workers},
            "cluster": {"local": {"workers": workers}},
            "logbook": str(Path(tmp, "latency.jsonl")),
            "stopping": {"rule": "halving", "steps": int(round(20 / note_every)), "min_step": 2, "eta": 2},
            "seed": 0,
        }
        halting.Halting._signal = timed  # type: ignore[method-assign]
        sampler = _WorkerCPU(tmp)
        t0 = time.monotonic()
        try:
            forebear.run(spec)
        finally:
            halting.Halting._signal = signal  # type: ignore[method-assign]
            cpu = sampler.stop()
        wall = time.monotonic() - t0
        table = forebear.load(Path(tmp, "latency.jsonl"))
        gaps, steps_late = [], []
        for t in table:
            path = Path(tmp, f"{float(t.config['x'])!r}.json")
            if t.state != "halted" or t.trial not in decided_at or not path.is_file():
                continue
            caught = json.loads(path.read_text())
            gaps.append(caught["caught"] - decided_at[t.trial])
            steps_late.append(caught["step"])
    gaps.sort()
    return {
        "halted": len(gaps),
        "note_every_s": note_every,
        **_intervals(),
        "latency_s_median": round(statistics.median(gaps), 3) if gaps else None,
        "latency_s_max": round(gaps[-1], 3) if gaps else None,
        "latency_s_all": [round(g, 3) for g in gaps],
        "halted_at_step": steps_late,
        "seconds": round(wall, 1),
        "worker_cpu_s": sorted(round(c, 2) for c in cpu.values()),  # each worker process's CPU time over the run
        "load_average": [round(v, 2) for v in os.getloadavg()],  # 1, 5 and 15 min, at the end
    }


def _intervals() -> dict[str, float]:
    from forebear.cluster.runner import POLL
    from forebear.cluster.steps import WAIT_FOR

    return {"runner_poll_s": POLL, "halt_wait_s": WAIT_FOR}


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description="forebear bench stopping, with the options the command does not show.")
    parser.add_argument("--families", default="mlp,pow3")
    parser.add_argument("--runs", type=int, default=10)
    parser.add_argument("--first-run", type=int, default=0, help="the first run (held-out task and stream seed)")
    parser.add_argument("--min-step", type=int, default=3)
    parser.add_argument("--eta", type=float, default=3.0)
    parser.add_argument("--threshold", type=float, default=0.05)
    parser.add_argument("--out", default=None)
    parser.add_argument("--treatments", action="store_true", help="also: halted trials left out of / shown to the proposer")
    parser.add_argument("--note-every", type=float, default=0.1, help="with --latency: seconds between intermediate scores")
    parser.add_argument("--latency", action="store_true", help="measure the halt latency on a local cluster instead")
    a = parser.parse_args()
    if a.latency:
        print(json.dumps(halt_latency(note_every=a.note_every), indent=2))
        raise SystemExit(0)
    print(json.dumps(main(a.families, a.runs, min_step=a.min_step, eta=a.eta, threshold=a.threshold, out=a.out, first_run=a.first_run, treatments=a.treatments), indent=2))
