"""Fault-injection campaign: killed workers, killed controllers, a full disk, a failing fsync, load.

``forebear bench faults`` runs every scenario against a loopback cluster of
separate processes (a ``dask scheduler`` and ``dask worker`` processes on
127.0.0.1, no nanny, so that SIGKILL of a worker is a real crash) and checks
the logbook afterwards with :func:`check_invariants`: every trial ends scored
or failed exactly once, no score is recorded twice, every lost attempt is
followed by a retry, and the best configuration equals the best scored record.
The torn-write and concurrent-writer scenarios are the logbook tests
(``tests/test_logbook*.py``), run here by pytest so that their figures come
from the same code. ``--short`` is the size that CI runs (tests/test_faults.py
calls the same functions).

Heavy modules (Dask, the controller, the proposal engine) are imported inside
the functions: workers import this module for :func:`sleeper` and
:func:`noop` and should not pay for them.

One module per scenario family: :mod:`~forebear.bench.faults.kills` (killed
workers and controllers), :mod:`~forebear.bench.faults.disk` (a full disk, a
failing fsync), :mod:`~forebear.bench.faults.writes` (torn writes, concurrent
writers), :mod:`~forebear.bench.faults.many_trials` (load); the shared driver is
:mod:`~forebear.bench.faults.cluster`, :mod:`~forebear.bench.faults.driver` and
:mod:`~forebear.bench.faults.invariants`; the objectives are
:mod:`~forebear.bench.faults.objectives`. This module runs the campaign.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from forebear.bench.faults.cluster import START_DEADLINE, ProcessCluster
from forebear.bench.faults.disk import (
    TINY_FS,
    failing_fsync,
    fill_filesystem,
    fsync_failure,
    full_disk,
    tiny_filesystem,
)
from forebear.bench.faults.driver import write_spec
from forebear.bench.faults.invariants import check_invariants
from forebear.bench.faults.kills import controller_kills, worker_kills
from forebear.bench.faults.many_trials import load, load_run
from forebear.bench.faults.objectives import NOOP, SLEEPER, noop, sleeper
from forebear.bench.faults.writes import logbook_tests

__all__ = [
    "FULL", "NOOP", "SHORT", "SLEEPER", "START_DEADLINE", "TINY_FS", "ProcessCluster", "check_invariants",
    "controller_kills", "failing_fsync", "fill_filesystem", "fsync_failure", "full_disk", "load", "load_run",
    "logbook_tests", "main", "noop", "sleeper", "tiny_filesystem", "worker_kills", "write_spec",
]

FULL = {"worker_kills": {"trials": 200, "kills": 50}, "controller_kills": {"trials": 80, "kills": 20},
        "full_disk": {"trials": 16}, "fsync": {"trials": 12}, "load": {"trials": 2000}}
SHORT = {"worker_kills": {"trials": 12, "kills": 3, "interval": (0.8, 1.6)}, "controller_kills": {"trials": 8, "kills": 2},
         "full_disk": {"trials": 10}, "fsync": {"trials": 8}, "load": {"trials": 80, "workers": 2, "window": 25}}


def main(short: bool = False, folder: str | None = None) -> dict[str, Any]:
    """Run the campaign (``forebear bench faults``); returns the figures of every scenario.

    Each scenario's figures hold its ``violations`` (empty when every
    invariant held); ``ok`` is true when all are empty.
    """
    import tempfile

    sizes = SHORT if short else FULL
    base = Path(folder) if folder else Path(tempfile.mkdtemp(prefix="forebear-faults-"))
    out: dict[str, Any] = {"size": "short" if short else "full", "folder": str(base)}

    def keep(name: str, figures: dict[str, Any]) -> None:
        # Figures are saved as each scenario ends, so a long campaign that is stopped keeps what it measured.
        out[name] = figures
        (base / "figures.json").write_text(json.dumps(out, indent=2))

    cluster = ProcessCluster(base / "cluster-a", workers=4)
    try:
        keep("worker_kills", worker_kills(cluster, base / "worker-kills", **sizes["worker_kills"]))
    finally:
        cluster.close()
    cluster = ProcessCluster(base / "cluster-b", workers=4)
    try:
        keep("controller_kills", controller_kills(cluster, base / "controller-kills", **sizes["controller_kills"]))
        keep("full_disk", full_disk(cluster, base / "full-disk", **sizes["full_disk"]))
        keep("fsync", fsync_failure(cluster, base / "fsync", **sizes["fsync"]))
    finally:
        cluster.close()
    keep("logbook", logbook_tests(full=not short))
    keep("load", load(base / "load", **sizes["load"]))
    out["ok"] = not any(v.get("violations") for v in out.values() if isinstance(v, dict))
    return out
