"""Cluster creation: loopback-only embedded cluster, address warnings, job scripts, resources."""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import psutil
import pytest

from forebear.cluster.dispatch import (
    Dispatch,
    FailFast,
    UnsatisfiableResources,
    connect,
    declared_resources,
    insecure_warning,
    install_fail_fast,
    jobqueue_cluster,
)
from forebear.core.spec import load


def base(tmp: Path, cluster: dict[str, Any], **extra: Any) -> Any:
    return load({
        "objective": {"call": "objectives:quadratic", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 2, "concurrency": 2},
        "cluster": cluster,
        "logbook": str(tmp / "j.jsonl"),
        **extra,
    }, base_dir=tmp)


@pytest.mark.parametrize(
    ("address", "allow", "warns"),
    [
        ("tcp://10.1.2.3:8786", False, True),
        ("scheduler.internal:8786", False, True),
        ("tcp://10.1.2.3:8786", True, False),
        ("tcp://127.0.0.1:8786", False, False),
        ("tcp://localhost:8786", False, False),
        ("tcp://[::1]:8786", False, False),
        ("tls://10.1.2.3:8786", False, False),
    ],
)
def test_insecure_warning(address: str, allow: bool, warns: bool) -> None:
    text = insecure_warning(address, allow)
    assert (text is not None) == warns
    if text:
        assert "anyone who can reach it can run code" in text


def test_local_cluster_listens_on_loopback_only(tmp_path: Path) -> None:
    said: list[str] = []
    with connect(base(tmp_path, {"local": {"workers": 2}}), said.append) as d:
        assert d.kind == "local" and len(d.worker_resources()) == 2
        assert d.dashboard is not None and d.dashboard.startswith("http://127.0.0.1:")  # the controller says the page link
        me = psutil.Process()
        listening = []
        for proc in [me, *me.children(recursive=True)]:
            try:
                conns = proc.net_connections(kind="inet")
            except psutil.Error:
                continue
            listening += [c.laddr for c in conns if c.status == psutil.CONN_LISTEN]
        assert len(listening) >= 5  # scheduler, dashboard, 2 workers, 2 nannies
        assert {a.ip for a in listening} == {"127.0.0.1"}, listening
        assert d.client.run_on_scheduler(lambda dask_scheduler: dask_scheduler.allowed_failures) == 0
        # A resource no worker offers is refused up front, not left waiting.
        with pytest.raises(UnsatisfiableResources, match=r"GPU: 1"):
            d.check_resources({"GPU": 1})
        d.check_resources({})


def test_a_second_search_on_one_scheduler_installs_the_plugin_without_a_warning(tmp_path: Path) -> None:
    # The demo runs five searches on one embedded cluster; each used to print distributed's
    # "Scheduler already contains a plugin ... overwriting" warning.
    said: list[str] = []
    with connect(base(tmp_path, {"local": {"workers": 1, "dashboard": False}}), said.append) as d:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            assert install_fail_fast(d.client, said.append)
            assert install_fail_fast(d.client, said.append)
        assert not [w for w in caught if "already contains a plugin" in str(w.message)], [str(w.message) for w in caught]
        assert d.client.run_on_scheduler(lambda dask_scheduler: FailFast.name in dask_scheduler.plugins)
    assert not [m for m in said if "could not install" in m]


def test_local_cluster_without_dashboard_still_binds_loopback(tmp_path: Path) -> None:
    said: list[str] = []
    with connect(base(tmp_path, {"local": {"workers": 1, "dashboard": False}}), said.append) as d:
        assert d.dashboard is None and not any("dashboard" in s for s in said)
        me = psutil.Process()
        listening = [c.laddr for c in me.net_connections(kind="inet") if c.status == psutil.CONN_LISTEN]
        assert listening and {a.ip for a in listening} == {"127.0.0.1"}, listening


def _jobqueue_spec(tmp: Path, kind: str, certs: dict[str, str] | None, gpus: int | None = 1) -> Any:
    cluster: dict[str, Any] = {
        kind: {
            "jobs": 2,
            "cores": 4,
            "memory": "16GB",
            "walltime": "02:00:00",
            "python": "/opt/team/bin/python",
            "scheduler_options": {"host": "127.0.0.1"},
        }
    }
    if gpus:
        cluster[kind]["gpus"] = gpus
    if certs:
        cluster["tls"] = certs
    return base(tmp, cluster)


def test_slurm_job_script(tmp_path: Path) -> None:
    certs = _write_temporary_certs(tmp_path)
    cluster = jobqueue_cluster(_jobqueue_spec(tmp_path, "slurm", certs))
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    assert "#SBATCH --cpus-per-task=4" in script
    assert "#SBATCH --mem=15G" in script  # dask-jobqueue writes 16GB as 15G (GiB, rounded down)
    assert "#SBATCH -t 02:00:00" in script
    assert "#SBATCH --gres=gpu:1" in script
    assert "/opt/team/bin/python -m distributed.cli.dask_worker tls://" in script
    assert "--resources GPU=1" in script and "--nworkers" not in script  # one worker per GPU
    for flag in ("--tls-ca-file", "--tls-cert", "--tls-key"):
        assert flag in script


def test_pbs_job_script(tmp_path: Path) -> None:
    cluster = jobqueue_cluster(_jobqueue_spec(tmp_path, "pbs", None, gpus=None))
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    assert "#PBS -l walltime=02:00:00" in script
    assert "#PBS -l select=1:ncpus=4:mem=15GB" in script  # 16GB written as 15GB (GiB, rounded down)
    assert "/opt/team/bin/python -m distributed.cli.dask_worker tcp://" in script
    assert "--nthreads 1" in script and "--nworkers 4" in script  # one single-thread worker per core


def test_declared_resources(tmp_path: Path) -> None:
    spec = base(tmp_path, {"slurm": {"worker_extra_args": ["--resources", "GPU=2,MEM=8"]}})
    assert declared_resources(spec) == {"GPU": 2.0, "MEM": 8.0}
    d = Dispatch(client=None, kind="slurm")  # type: ignore[arg-type]
    d.check_resources({"GPU": 2}, declared=declared_resources(spec))
    with pytest.raises(UnsatisfiableResources, match="resources offered: GPU, MEM"):
        d.check_resources({"GPU": 3}, declared=declared_resources(spec))


def _write_temporary_certs(tmp: Path) -> dict[str, str]:
    from distributed.security import Security

    from .test_tls import write_certs

    return write_certs(Security.temporary(), tmp / "certs")


def test_trials_run_on_workers_that_offer_the_resources(tmp_path: Path, loopback_factory: Any) -> None:
    import forebear

    cluster = loopback_factory(workers=1, resources="GPU=1")
    cluster.start_worker(resources="")  # a second worker without the resource
    cluster.wait_for_workers(2)
    spec = {
        "objective": {"call": "objectives:quadratic", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 3, "concurrency": 2, "batch": 2},
        "cluster": {"address": cluster.address},
        "resources": {"GPU": 1},
        "logbook": str(tmp_path / "gpu.jsonl"),
    }
    result = forebear.run(spec)
    assert result.counts["scored"] == 3
    from forebear.records.logbook import Logbook

    workers = {r["worker"] for r in Logbook(tmp_path / "gpu.jsonl").records() if r["kind"] == "started"}
    assert len(workers) == 1  # only the worker with the GPU resource ran trials


def test_local_cluster_threads_memory_limit_and_dashboard_port(tmp_path: Path) -> None:
    import socket
    import urllib.request

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    said: list[str] = []
    spec = base(tmp_path, {"local": {"workers": 1, "threads": 2, "memory_limit": "1GiB", "dashboard": port}})
    with connect(spec, said.append) as d:
        workers = d.client.scheduler_info(n_workers=-1)["workers"]
        assert len(workers) == 1
        [info] = workers.values()
        assert info["nthreads"] == 2
        assert info["memory_limit"] == 2**30  # dask parses "1GiB" as 1024^3 bytes
        assert d.dashboard == f"http://127.0.0.1:{port}/status", d.dashboard  # the controller prints the link
        # The dashboard really serves on that port, on loopback.
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=10) as resp:
            assert resp.status == 200 and resp.read() == b"ok"
