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
from collections.abc import Mapping, Sequence
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

    The benchmark's fault campaign uses it as it is; the tests' ``LoopbackCluster``
    (tests/conftest.py) is this class with the test tree on the workers' path.
    ``workers`` holds the worker processes started so far; :meth:`kill_worker`
    SIGKILLs one and :meth:`start_worker` adds a replacement. ``resources`` (a
    ``dask worker --resources`` string), ``tls`` (``ca``, ``cert`` and ``key``
    files) and ``scheduler_args`` configure the processes; ``env`` is their
    environment (default :func:`subprocess_env`).
    """

    def __init__(
        self,
        folder: Path,
        workers: int = 4,
        *,
        resources: str | None = None,
        tls: Mapping[str, str] | None = None,
        scheduler_args: Sequence[str] = (),
        env: Mapping[str, str] | None = None,
    ) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.resources = resources
        self.tls = dict(tls) if tls else None
        self.env = dict(env) if env is not None else subprocess_env()
        self.procs: list[subprocess.Popen[Any]] = []
        self.workers: list[subprocess.Popen[Any]] = []
        self._n = 0
        try:
            self._start(workers, scheduler_args)
        except BaseException:
            self.close()  # a cluster that failed half-way still has processes
            raise

    def _start(self, workers: int, scheduler_args: Sequence[str]) -> None:
        sched_file = self.folder / "scheduler.json"
        argv = [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
                "--no-dashboard", "--scheduler-file", str(sched_file), *self._tls_args()]
        if self.tls:
            argv += ["--protocol", "tls"]
        scheduler = self._spawn([*argv, *scheduler_args], "scheduler")
        deadline = time.monotonic() + START_DEADLINE
        while not sched_file.exists() or not sched_file.read_text().strip():
            if scheduler.poll() is not None:
                raise RuntimeError(f"the dask scheduler exited with {scheduler.returncode}:\n{self.log('scheduler')}")
            if time.monotonic() > deadline:
                raise RuntimeError(f"the dask scheduler did not start within {START_DEADLINE:g} s:\n{self.log('scheduler')}")
            time.sleep(0.1)
        time.sleep(0.05)
        self.address: str = json.loads(sched_file.read_text())["address"]
        for _ in range(workers):
            self.start_worker()
        self.wait_for_workers(workers)

    def _tls_args(self) -> list[str]:
        if not self.tls:
            return []
        return ["--tls-ca-file", self.tls["ca"], "--tls-cert", self.tls["cert"], "--tls-key", self.tls["key"]]

    def _spawn(self, argv: list[str], name: str) -> subprocess.Popen[Any]:
        with open(self.folder / f"{name}.log", "ab") as out:
            proc = subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, env=self.env, start_new_session=True, cwd=self.folder)
        self.procs.append(proc)
        return proc

    def log(self, name: str) -> str:
        """The last 4,000 characters of a process's log (``scheduler``, ``w0``, ``w1`` ...)."""
        try:
            return (self.folder / f"{name}.log").read_text(errors="replace")[-4000:]
        except OSError:
            return ""

    def start_worker(self, resources: str | None = None) -> subprocess.Popen[Any]:
        """Start one more worker process (no nanny: killing it kills the worker)."""
        name = f"w{self._n}"
        self._n += 1
        argv = [sys.executable, "-m", "distributed.cli.dask_worker", self.address, "--host", "127.0.0.1",
                "--nthreads", "1", "--no-nanny", "--no-dashboard", "--name", name, *self._tls_args()]
        res = resources if resources is not None else self.resources
        if res:
            argv += ["--resources", res]
        proc = self._spawn(argv, name)
        self.workers.append(proc)
        return proc

    def kill_worker(self, index: int) -> int:
        """SIGKILL worker ``index`` (only the worker process, as a crash would); returns its pid."""
        proc = self.workers[index]
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
        return proc.pid

    def client(self, **kwargs: Any) -> Any:
        """A ``distributed.Client`` of this cluster (with the cluster's TLS files, if any)."""
        from distributed import Client

        security = None
        if self.tls:
            from distributed.security import Security

            security = Security(tls_ca_file=self.tls["ca"], tls_client_cert=self.tls["cert"],
                                tls_client_key=self.tls["key"], require_encryption=True)
        return Client(self.address, security=security, timeout="30s", **kwargs)

    def worker_count(self) -> int:
        with self.client() as c:
            return len(c.scheduler_info(n_workers=-1)["workers"])

    def wait_for_workers(self, n: int, timeout: float = START_DEADLINE) -> None:
        with self.client() as c:
            try:
                c.wait_for_workers(n, timeout=timeout)
            except TimeoutError:
                logs = "\n".join(self.log(f"w{i}") for i in range(self._n))
                raise RuntimeError(f"{n} workers did not join within {timeout:g} s:\n{logs}") from None

    def close(self) -> None:
        for proc in reversed(self.procs):
            reap(proc)
