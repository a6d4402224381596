"""A loopback cluster of separate processes: a ``dask scheduler`` and nanny-less ``dask worker`` processes on 127.0.0.1.

No nanny, so that SIGKILL of a worker is a real crash. Dask is imported
inside the functions that need it.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

START_DEADLINE = 120.0  # seconds for a scheduler or worker to start on a busy machine


def subprocess_env() -> dict[str, str]:
    """The environment of the cluster's and the campaign's child processes (workers are not daemons)."""
    env = dict(os.environ)
    env.setdefault("DASK_DISTRIBUTED__WORKER__DAEMON", "False")
    return env


def reap(proc: subprocess.Popen[Any], grace: float = 5.0) -> None:
    """SIGTERM, then SIGKILL, the process group of a process started in its own session."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        if sig == signal.SIGKILL or proc.poll() is None:
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(proc.pid, sig)
        if sig == signal.SIGTERM:
            with contextlib.suppress(subprocess.TimeoutExpired):
                proc.wait(timeout=grace)
    if proc.poll() is None:
        proc.wait(timeout=grace)


class ProcessCluster:
    """A scheduler and single-thread, nanny-less workers as separate processes on 127.0.0.1.

    The same shape as the tests' ``LoopbackCluster`` (tests/conftest.py), for
    the benchmark, which runs without the test tree. ``workers`` holds the
    worker processes started so far; :meth:`kill_worker` SIGKILLs one and
    :meth:`start_worker` adds a replacement.
    """

    def __init__(self, folder: Path, workers: int = 4) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.procs: list[subprocess.Popen[Any]] = []
        self.workers: list[subprocess.Popen[Any]] = []
        self._n = 0
        try:
            sched_file = folder / "scheduler.json"
            self._spawn([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
                         "--no-dashboard", "--scheduler-file", str(sched_file)], "scheduler")
            deadline = time.monotonic() + START_DEADLINE
            while not sched_file.exists() or not sched_file.read_text().strip():
                if time.monotonic() > deadline or self.procs[0].poll() is not None:
                    raise RuntimeError(f"the dask scheduler did not start: {self._log('scheduler')}")
                time.sleep(0.1)
            time.sleep(0.1)
            self.address: str = json.loads(sched_file.read_text())["address"]
            for _ in range(workers):
                self.start_worker()
            self.wait_for_workers(workers)
        except BaseException:
            self.close()
            raise

    def _spawn(self, argv: list[str], name: str) -> subprocess.Popen[Any]:
        with open(self.folder / f"{name}.log", "ab") as out:
            proc = subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, env=subprocess_env(), start_new_session=True, cwd=self.folder)
        self.procs.append(proc)
        return proc

    def _log(self, name: str) -> str:
        try:
            return (self.folder / f"{name}.log").read_text(errors="replace")[-2000:]
        except OSError:
            return ""

    def start_worker(self) -> subprocess.Popen[Any]:
        name = f"w{self._n}"
        self._n += 1
        proc = self._spawn([sys.executable, "-m", "distributed.cli.dask_worker", self.address, "--host", "127.0.0.1",
                            "--nthreads", "1", "--no-nanny", "--no-dashboard", "--name", name], name)
        self.workers.append(proc)
        return proc

    def kill_worker(self, index: int) -> int:
        proc = self.workers[index]
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
        return proc.pid

    def wait_for_workers(self, n: int, timeout: float = START_DEADLINE) -> None:
        from distributed import Client

        with Client(self.address, timeout="30s") as c:
            c.wait_for_workers(n, timeout=timeout)

    def close(self) -> None:
        for proc in reversed(self.procs):
            reap(proc)
