"""Shared fixtures: a loopback Dask cluster of separate processes, always reaped.

``loopback`` starts ``dask scheduler`` and two ``dask worker`` processes (one
thread each, no nanny, every listener on 127.0.0.1) and stops them after the
test, also when it fails. ``loopback_factory`` makes clusters with other
settings (more workers, resources, TLS, scheduler preloads). A test can
``kill_worker(i)`` (SIGKILL) and ``start_worker()`` a replacement. Workers
import ``objectives`` (tests/objectives.py) through PYTHONPATH.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import pytest

TESTS = Path(__file__).resolve().parent
START_DEADLINE = 90.0  # seconds; workers on a busy 2-core machine take several seconds to import


def child_env(extra: Mapping[str, str] | None = None) -> dict[str, str]:
    """The environment for processes a test starts: tests/ on PYTHONPATH."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(TESTS), *filter(None, [env.get("PYTHONPATH")])])
    env.setdefault("DASK_DISTRIBUTED__WORKER__DAEMON", "False")
    env.update(extra or {})
    return env


# The embedded LocalCluster's workers are started by this process: they must find objectives too.
os.environ["PYTHONPATH"] = child_env()["PYTHONPATH"]


def reap(proc: subprocess.Popen[Any], grace: float = 5.0) -> None:
    """Stop a process started in its own session, and its group: SIGTERM, then SIGKILL."""
    if proc.poll() is None:
        try:
            os.killpg(proc.pid, signal.SIGTERM)
        except ProcessLookupError:
            pass
        try:
            proc.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            pass
    try:
        os.killpg(proc.pid, signal.SIGKILL)  # the group: fork servers a worker started
    except (ProcessLookupError, PermissionError):
        pass
    if proc.poll() is None:
        proc.wait(timeout=grace)


class LoopbackCluster:
    """A scheduler and workers as separate processes on 127.0.0.1."""

    def __init__(
        self,
        folder: Path,
        *,
        workers: int = 2,
        resources: str | None = None,
        tls: Mapping[str, str] | None = None,
        scheduler_args: Sequence[str] = (),
        env: Mapping[str, str] | None = None,
    ) -> None:
        self.folder = folder
        self.folder.mkdir(parents=True, exist_ok=True)
        self.tls = dict(tls) if tls else None
        self.resources = resources
        self.env = child_env(env)
        # Folders that tests/objectives.py's counted and stall_signal objectives report into.
        self.env.setdefault("FOREBEAR_TEST_COUNTER", str(folder / "counter"))
        self.env.setdefault("FOREBEAR_TEST_SIGNAL", str(folder / "signals"))
        self.workers: list[subprocess.Popen[Any]] = []
        self.procs: list[subprocess.Popen[Any]] = []
        self._n = 0
        try:
            self._start(workers, scheduler_args)
        except BaseException:
            self.close()  # a cluster that failed half-way still has processes
            raise

    def _start(self, workers: int, scheduler_args: Sequence[str]) -> None:
        folder = self.folder
        sched_file = folder / "scheduler.json"
        argv = [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
                "--no-dashboard", "--scheduler-file", str(sched_file), *self._tls_args("scheduler")]
        if self.tls:
            argv += ["--protocol", "tls"]
        self.scheduler = self._spawn(argv + list(scheduler_args), "scheduler")
        deadline = time.monotonic() + START_DEADLINE
        while not sched_file.exists():
            if self.scheduler.poll() is not None:
                raise RuntimeError(f"dask scheduler exited with {self.scheduler.returncode}:\n{self.log('scheduler')}")
            if time.monotonic() > deadline:
                raise RuntimeError(f"dask scheduler did not start within {START_DEADLINE:g} s:\n{self.log('scheduler')}")
            time.sleep(0.1)
        time.sleep(0.05)
        self.address: str = json.loads(sched_file.read_text())["address"]
        for _ in range(workers):
            self.start_worker()
        self.wait_for_workers(workers)

    def _tls_args(self, role: str) -> list[str]:
        if not self.tls:
            return []
        return ["--tls-ca-file", self.tls["ca"], "--tls-cert", self.tls["cert"], "--tls-key", self.tls["key"]]

    def _spawn(self, argv: list[str], name: str) -> subprocess.Popen[Any]:
        out = open(self.folder / f"{name}.log", "ab")  # noqa: SIM115 - kept open for the process's life
        proc = subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, env=self.env, start_new_session=True, cwd=self.folder)
        out.close()
        self.procs.append(proc)
        return proc

    def log(self, name: str) -> str:
        try:
            return (self.folder / f"{name}.log").read_text(errors="replace")[-4000:]
        except OSError:
            return ""

    def start_worker(self, resources: str | None = None) -> subprocess.Popen[Any]:
        """Start one more worker process (no nanny: killing it kills the worker)."""
        name = f"w{self._n}"
        self._n += 1
        argv = [sys.executable, "-m", "distributed.cli.dask_worker", self.address, "--host", "127.0.0.1",
                "--nthreads", "1", "--no-nanny", "--no-dashboard", "--name", name, *self._tls_args("worker")]
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


@pytest.fixture
def loopback_factory(tmp_path: Path) -> Iterator[Callable[..., LoopbackCluster]]:
    """Make loopback clusters; every one is reaped at the end of the test."""
    made: list[LoopbackCluster] = []

    def make(**kwargs: Any) -> LoopbackCluster:
        cluster = LoopbackCluster(tmp_path / f"cluster-{len(made)}", **kwargs)
        made.append(cluster)
        return cluster

    try:
        yield make
    finally:
        for cluster in made:
            cluster.close()


@pytest.fixture(scope="module")
def shared_loopback(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LoopbackCluster]:
    """One loopback cluster (two workers) for a whole test module whose tests kill nothing."""
    cluster = LoopbackCluster(tmp_path_factory.mktemp("shared-cluster"))
    try:
        yield cluster
    finally:
        cluster.close()


@pytest.fixture
def loopback(loopback_factory: Callable[..., LoopbackCluster]) -> LoopbackCluster:
    """A scheduler and two single-thread workers on 127.0.0.1, as separate processes."""
    return loopback_factory()


@pytest.fixture(autouse=True)
def _stop_fork_servers() -> Iterator[None]:
    """Fork servers started in the test process itself (direct runner calls) end with the test."""
    yield
    if "forebear.cluster.runner" in sys.modules:
        sys.modules["forebear.cluster.runner"].shutdown_servers()


@pytest.fixture(autouse=True, scope="session")
def _private_model_cache(tmp_path_factory: pytest.TempPathFactory) -> Iterator[None]:
    """Meta-trained states go to a per-run folder, never to the user's ~/.cache/forebear."""
    old = os.environ.get("FOREBEAR_CACHE")
    os.environ["FOREBEAR_CACHE"] = str(tmp_path_factory.mktemp("model-cache"))
    yield
    if old is None:
        os.environ.pop("FOREBEAR_CACHE", None)
    else:
        os.environ["FOREBEAR_CACHE"] = old
