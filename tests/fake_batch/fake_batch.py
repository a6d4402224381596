#!/usr/bin/env python3
"""A stand-in batch system for tests: submit and cancel commands of SLURM and PBS.

Installed on PATH as ``sbatch``/``scancel`` and ``qsub``/``qdel`` (the commands dask-jobqueue
calls), each a small wrapper that names the command in ``FAKE_BATCH_AS``. A submitted job script runs at once under ``bash`` in its own session, on this machine;
its output goes to ``$FAKE_BATCH_DIR/job-<id>.log``. Every submission and cancellation is
written to ``$FAKE_BATCH_DIR/calls.log`` so a test can count them.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path


def main() -> int:
    folder = Path(os.environ["FAKE_BATCH_DIR"])
    folder.mkdir(parents=True, exist_ok=True)
    name = os.environ.get("FAKE_BATCH_AS") or Path(sys.argv[0]).name
    args = sys.argv[1:]
    if name in ("sbatch", "qsub"):
        script = Path(args[-1])
        counter = folder / "next-id"
        job = int(counter.read_text()) if counter.exists() else 1000
        counter.write_text(str(job + 1))
        (folder / f"job-{job}.sh").write_text(script.read_text())  # the script dask-jobqueue deletes
        with open(folder / f"job-{job}.log", "ab") as out:
            proc = subprocess.Popen(["bash", str(folder / f"job-{job}.sh")], stdout=out, stderr=subprocess.STDOUT,
                                    stdin=subprocess.DEVNULL, start_new_session=True)
        (folder / f"job-{job}.pid").write_text(str(proc.pid))
        with open(folder / "calls.log", "a") as log:
            log.write(f"{name} {job}\n")
        print(f"Submitted batch job {job}" if name == "sbatch" else f"{job}.fakepbs")
        return 0
    if name in ("scancel", "qdel"):
        for arg in args:
            job = arg.split(".")[0]
            with open(folder / "calls.log", "a") as log:
                log.write(f"{name} {job}\n")
            pid_file = folder / f"job-{job}.pid"
            if not pid_file.exists():
                print(f"{name}: unknown job {arg}", file=sys.stderr)
                return 1
            pid = int(pid_file.read_text())
            for sig, wait in ((signal.SIGTERM, 5.0), (signal.SIGKILL, 0.0)):
                try:
                    os.killpg(pid, sig)
                except ProcessLookupError:
                    break
                deadline = time.monotonic() + wait
                while time.monotonic() < deadline and _alive(pid):
                    time.sleep(0.05)
        return 0
    print(f"fake_batch: called as {name!r}, expected sbatch, scancel, qsub or qdel", file=sys.stderr)
    return 2


def _alive(pid: int) -> bool:
    try:
        os.killpg(pid, 0)
    except ProcessLookupError:
        return False
    return True


if __name__ == "__main__":
    sys.exit(main())
