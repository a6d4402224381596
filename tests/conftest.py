"""Shared fixtures: a loopback Dask cluster of separate processes, always reaped.

``loopback`` starts ``dask scheduler`` and two ``dask worker`` processes (one
thread each, no nanny, every listener on 127.0.0.1) and stops them after the
test, also when it fails. ``loopback_factory`` makes clusters with other
settings (more workers, resources, TLS, scheduler preloads). A test can
``kill_worker(i)`` (SIGKILL) and ``start_worker()`` a replacement. Workers
import ``objectives`` (tests/objectives.py) through PYTHONPATH.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import Any

import pytest

from forebear.bench.faults.cluster import ProcessCluster, reap  # noqa: F401 - reap: tests import it from here

TESTS = Path(__file__).resolve().parent


def child_env(extra: Mapping[str, str] | None = None) -> dict[str, str]:
    """The environment for processes a test starts: tests/ on PYTHONPATH."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(TESTS), *filter(None, [env.get("PYTHONPATH")])])
    env.setdefault("DASK_DISTRIBUTED__WORKER__DAEMON", "False")
    env.update(extra or {})
    return env


# The embedded LocalCluster's workers are started by this process: they must find objectives too.
os.environ["PYTHONPATH"] = child_env()["PYTHONPATH"]


class LoopbackCluster(ProcessCluster):
    """A scheduler and workers as separate processes on 127.0.0.1, with tests/ on their path.

    ``forebear.bench.faults.cluster.ProcessCluster`` with two workers by default and
    the folders that tests/objectives.py's ``counted`` and ``stall_signal`` objectives report into.
    """

    def __init__(self, folder: Path, *, workers: int = 2, env: Mapping[str, str] | None = None, **kwargs: Any) -> None:
        full = child_env(env)
        full.setdefault("FOREBEAR_TEST_COUNTER", str(folder / "counter"))
        full.setdefault("FOREBEAR_TEST_SIGNAL", str(folder / "signals"))
        super().__init__(folder, workers, env=full, **kwargs)


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
