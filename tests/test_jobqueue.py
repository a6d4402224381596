"""SLURM and PBS end to end through dask-jobqueue, with a stand-in batch system on PATH.

``tests/fake_batch/fake_batch.py`` answers ``sbatch``/``scancel`` (and ``qsub``/``qdel``): a
submitted job script runs at once on this machine, so the job script dask-jobqueue writes
really starts a ``dask worker`` (bound to 127.0.0.1) that joins forebear's scheduler. Only the
batch system is stood in for; dask-jobqueue, the job script, the worker and the search are real.
dask-jobqueue 0.9 calls only the submit and cancel commands (never ``squeue`` or ``qstat``).
"""

from __future__ import annotations

import os
import re
import sys
import time
from pathlib import Path

import pytest

import forebear
from forebear.records.logbook import Logbook

FAKE = Path(__file__).resolve().parent / "fake_batch" / "fake_batch.py"
COMMANDS = {"slurm": ("sbatch", "scancel"), "pbs": ("qsub", "qdel")}


@pytest.fixture
def batch_system(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A folder of fake batch commands on PATH; returns the folder the jobs report into."""
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    for name in (*COMMANDS["slurm"], *COMMANDS["pbs"]):
        wrapper = bin_dir / name
        wrapper.write_text(f'#!/bin/sh\nFAKE_BATCH_AS={name} exec "{sys.executable}" "{FAKE}" "$@"\n')
        wrapper.chmod(0o755)
    jobs = tmp_path / "jobs"
    monkeypatch.setenv("PATH", f"{bin_dir}{os.pathsep}{os.environ['PATH']}")
    monkeypatch.setenv("FAKE_BATCH_DIR", str(jobs))
    yield jobs
    # Whatever the test's outcome, no job outlives it.
    for pid_file in jobs.glob("job-*.pid"):
        try:
            os.killpg(int(pid_file.read_text()), 9)
        except ProcessLookupError:
            pass


def _alive(pid: int) -> bool:
    try:
        os.killpg(pid, 0)
    except ProcessLookupError:
        return False
    return True


@pytest.mark.timeout(300)
@pytest.mark.parametrize("kind", ["slurm", "pbs"])
def test_search_runs_through_the_batch_system(kind: str, tmp_path: Path, batch_system: Path) -> None:
    submit, cancel = COMMANDS[kind]
    spec = {
        "name": f"via-{kind}",
        "objective": {"call": "objectives:quadratic", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": 6, "batch": 2, "concurrency": 2},
        "cluster": {kind: {
            "jobs": 2, "cores": 1, "memory": "1GB", "walltime": "00:10:00",
            "worker_extra_args": ["--host", "127.0.0.1"],
            "scheduler_options": {"host": "127.0.0.1"},
        }},
        "logbook": str(tmp_path / "runs" / f"{kind}.jsonl"),
        "seed": 1,
    }
    result = forebear.run(spec)
    assert result.closed == "budget" and result.counts["scored"] == 6, [t.error for t in result.trials]
    calls = (batch_system / "calls.log").read_text().split()
    # `jobs: 2` is honoured: exactly two submissions, each job script the scheduler's own kind.
    submitted = [calls[i + 1] for i in range(0, len(calls), 2) if calls[i] == submit]
    assert len(submitted) == 2, calls
    for job in submitted:
        script = (batch_system / f"job-{job}.sh").read_text()
        assert ("#SBATCH" if kind == "slurm" else "#PBS") in script
        assert "distributed.cli.dask_worker tcp://127.0.0.1:" in script and "--host 127.0.0.1" in script
    # The trials ran on the jobs' workers (two of them, both on 127.0.0.1) ...
    started = [r for r in Logbook(spec["logbook"]).records() if r["kind"] == "started"]
    workers = {r["worker"] for r in started}
    # ... whose addresses the jobs' own worker logs name. Both jobs' workers need not have run a
    # trial: on a loaded machine the second may register after six short trials are done.
    logged: set[str] = set()
    for job in submitted:
        logged |= set(re.findall(r"Start worker at:\s+(tcp://\S+)", (batch_system / f"job-{job}.log").read_text()))
    assert workers and all(w.startswith("tcp://127.0.0.1:") for w in workers), workers
    assert workers <= logged, (workers, logged)
    # ... and closing the search cancelled both jobs through the batch system's cancel command.
    cancelled = {calls[i + 1] for i in range(0, len(calls), 2) if calls[i] == cancel}
    assert cancelled == set(submitted), calls
    deadline = time.monotonic() + 30
    pids = [int((batch_system / f"job-{job}.pid").read_text()) for job in submitted]
    while any(_alive(p) for p in pids) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not any(_alive(p) for p in pids), "a job's processes outlived its cancellation"
