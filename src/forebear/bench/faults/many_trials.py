"""Load: many trials of a no-op objective; the controller's per-trial overhead and memory as the logbook grows."""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

from forebear.bench.faults.cluster import subprocess_env
from forebear.bench.faults.driver import read_records, write_spec
from forebear.bench.faults.invariants import check_invariants
from forebear.bench.faults.objectives import NOOP


def _rss_mib() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def load_run(folder: Path, *, trials: int = 2000, workers: int = 4, window: int = 100) -> dict[str, Any]:
    """A ``trials``-trial search of :func:`noop` on ``workers`` local workers; per-trial overhead and memory.

    Run it in a fresh process (:func:`load`) so that the peak memory is the
    controller's. The proposer is the real engine with its initial design
    (a Latin hypercube) covering the whole budget, so that model refits do not
    hide what the controller, Dask and the logbook cost per trial. Overhead
    per trial = worker-seconds per finished trial over a window of ``window``
    trials (the objective takes no time); ``propose`` calls are timed too.
    """
    from forebear.core.spec import load as load_spec
    from forebear.engine.proposer import Proposer
    from forebear.loop.controller import Controller

    spec = load_spec(write_spec(folder, None, trials=trials, concurrency=workers, objective=NOOP, name="load", workers=workers))
    proposer = Proposer(spec.space, seed=spec.seed, n_initial=trials)
    timings: list[tuple[int, float]] = []
    real = proposer.propose

    def timed(n: int, observed: Any, failed: Any = (), pending: Any = ()) -> Any:
        t = time.perf_counter()
        out = real(n, observed, failed=failed, pending=pending)
        timings.append((len(observed) + len(failed), time.perf_counter() - t))
        return out

    proposer.propose = timed  # type: ignore[method-assign]
    rss: list[tuple[int, float]] = []
    stop = threading.Event()

    def sample() -> None:
        while not stop.wait(1.0):
            rss.append((len(timings), _rss_mib()))

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    t0 = time.monotonic()
    try:
        result = Controller(spec, proposer=proposer, handle_signals=False).run()
    finally:
        stop.set()
        sampler.join(5)
    seconds = time.monotonic() - t0
    records = read_records(spec.logbook)
    ends = sorted(float(r["at"]) for r in records if r["kind"] == "scored")
    figures = check_invariants(records)

    def per_trial(hi: int) -> float | None:
        lo = hi - window
        if lo < 1 or hi > len(ends):
            return None
        return round((ends[hi - 1] - ends[lo - 1]) * workers / window, 5)

    early, late = per_trial(min(window + window // 2, len(ends))), per_trial(len(ends))
    at = f"at_{window + window // 2}"

    def propose_ms(lo: int, hi: int) -> float | None:
        sel = [s for n, s in timings if lo <= n < hi]
        return round(1000 * sum(sel) / len(sel), 3) if sel else None

    return {
        "trials": trials,
        "workers": workers,
        "seconds": round(seconds, 1),
        "closed": result.closed,
        "window": window,
        f"overhead_s_per_trial_{at}": early,
        "overhead_s_per_trial_at_end": late,
        "overhead_growth": round(late / early, 2) if early and late else None,
        f"propose_ms_{at}": propose_ms(window // 2, window + window // 2),
        "propose_ms_at_end": propose_ms(trials - window - window // 2, trials),
        "controller_peak_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "controller_rss_mib_early": round(rss[min(len(rss) - 1, 5)][1], 1) if rss else None,
        "controller_rss_mib_end": round(rss[-1][1], 1) if rss else None,
        "logbook_bytes": spec.logbook.stat().st_size,
        **figures,
    }


def load(folder: Path, *, trials: int = 2000, workers: int = 4, window: int = 100, timeout: float = 3600.0) -> dict[str, Any]:
    """:func:`load_run` in a fresh Python process; returns its figures."""
    out = folder / "load.json"
    code = (
        "import json, sys; from pathlib import Path; from forebear.bench.faults import load_run; "
        f"r = load_run(Path({str(folder)!r}), trials={trials}, workers={workers}, window={window}); "
        f"Path({str(out)!r}).write_text(json.dumps(r))"
    )
    folder.mkdir(parents=True, exist_ok=True)
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=subprocess_env(), timeout=timeout)
    if res.returncode != 0 or not out.exists():
        return {"violations": [f"the load run exited {res.returncode}: {res.stderr.strip()[-800:]}"]}
    return json.loads(out.read_text())
