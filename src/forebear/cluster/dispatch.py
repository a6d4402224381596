"""Dask cluster and client from a spec's ``cluster`` section, and task submission.

Four kinds: ``local`` (an embedded LocalCluster whose every listener is on
127.0.0.1), ``address`` (an existing scheduler, with mutual TLS through
``distributed.security.Security``), and ``slurm`` / ``pbs`` through
dask-jobqueue. :func:`wrap` takes a client the caller made instead
(``forebear.run(spec, client=client)``), which forebear never closes.
forebear's tasks must fail on the first worker death rather
than be rerun silently by Dask (the controller records a ``lost`` attempt and
retries it itself): on an embedded scheduler ``allowed-failures`` is 0; on a
scheduler forebear does not own, a small scheduler plugin gives forebear's
tasks (keys ``forebear-...``) the same behaviour without touching anyone
else's.
"""

from __future__ import annotations

import ipaddress
import logging
import os
import shlex
from collections.abc import Callable, Mapping
from contextlib import AbstractContextManager
from dataclasses import dataclass
from typing import Any
from urllib.parse import urlsplit

import dask
from distributed import Client, Future
from distributed.diagnostics.plugin import SchedulerPlugin
from distributed.security import Security

from forebear.core.spec import Cluster, Spec
from forebear.core.values import memory_bytes

log = logging.getLogger("forebear.cluster.dispatch")

KEY_PREFIX = "forebear-"
CONNECT_TIMEOUT = "30s"
WORKER_WAIT = 60.0  # seconds to wait for a first worker of an address cluster before checking resources
NO_WORKERS_TIMEOUT = "120s"  # embedded clusters: a task no worker can run fails instead of waiting forever


class ClusterError(ConnectionError):
    """The cluster cannot be created or reached."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


class UnsatisfiableResources(ValueError):
    """No worker offers the resources each trial asks for."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


# --------------------------------------------------------------------------
# security


def security_for(cluster: Cluster) -> Security | None:
    """Mutual-TLS settings from ``cluster.tls`` (one certificate for every role), or None."""
    if not cluster.tls:
        return None
    ca, cert, key = cluster.tls["ca"], cluster.tls["cert"], cluster.tls["key"]
    for what, path in (("ca", ca), ("cert", cert), ("key", key)):
        if not os.path.isfile(path):
            raise ClusterError(f"cluster.tls.{what}: {path} does not exist")
    return Security(
        tls_ca_file=ca,
        tls_client_cert=cert,
        tls_client_key=key,
        tls_scheduler_cert=cert,
        tls_scheduler_key=key,
        tls_worker_cert=cert,
        tls_worker_key=key,
        require_encryption=True,
    )


def is_loopback(host: str) -> bool:
    if host in ("localhost", ""):
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def insecure_warning(address: str, allow_insecure: bool) -> str | None:
    """The warning for a plain-TCP scheduler beyond this machine, or None."""
    url = urlsplit(address if "://" in address else f"tcp://{address}")
    if url.scheme not in ("tcp", "ws") or allow_insecure or is_loopback(url.hostname or ""):
        return None
    return (
        f"warning: {address} is plain TCP: anyone who can reach it can run code on the cluster; "
        "use tls:// with cluster.tls, or set cluster.allow_insecure: true on a trusted network"
    )


# --------------------------------------------------------------------------
# per-task fail-fast on worker death


class FailFast(SchedulerPlugin):
    """Make forebear's tasks fail with KilledWorker on the first worker death.

    ``allowed-failures`` is a scheduler-wide setting; instead of lowering it for
    everyone, each forebear task entering ``processing`` is marked as if it had
    already used up its allowance, so the next death of its worker errs it.
    """

    name = "forebear-fail-fast"
    # One search after another on the same scheduler (the demo, a notebook's client) installs it
    # again; the scheduler then keeps the one it has instead of warning that it overwrites it.
    idempotent = True

    def __init__(self) -> None:
        self.scheduler: Any = None

    async def start(self, scheduler: Any) -> None:
        self.scheduler = scheduler

    def transition(self, key: Any, start: str, finish: str, *args: Any, **kwargs: Any) -> None:
        if finish != "processing" or not isinstance(key, str) or not key.startswith(KEY_PREFIX):
            return
        ts = self.scheduler.tasks.get(key)
        if ts is not None:
            ts.suspicious = max(ts.suspicious, self.scheduler.allowed_failures)


# --------------------------------------------------------------------------
# the dispatch object


@dataclass
class Dispatch(AbstractContextManager["Dispatch"]):
    """A client, the cluster it owns (if any) and what forebear learned about it."""

    client: Client
    kind: str
    cluster: Any = None
    dashboard: str | None = None
    fail_fast: bool = True
    owned: bool = True  # False for a user's client (wrap): close() then leaves it open

    def submit(self, fn: Callable[..., Any], arg: Any, key: str, resources: Mapping[str, float] | None = None) -> Future:
        """Submit one attempt; ``resources`` become the task's Dask resource restriction."""
        return self.client.submit(fn, arg, key=key, pure=False, retries=0, resources=dict(resources) if resources else None)

    def worker_resources(self) -> list[dict[str, float]]:
        info = self.client.scheduler_info(n_workers=-1)
        return [dict(w.get("resources") or {}) for w in info.get("workers", {}).values()]

    def check_resources(self, resources: Mapping[str, float], declared: Mapping[str, float] | None = None) -> None:
        """Raise :class:`UnsatisfiableResources` when no worker (or job template) can run a trial."""
        if not resources:
            return
        pools = [dict(declared)] if declared is not None else self.worker_resources()
        if declared is None and not pools:
            return  # no workers yet: the scheduler's no-workers timeout or the controller's watch decides
        if any(all(pool.get(k, 0) >= v for k, v in resources.items()) for pool in pools):
            return
        offered = sorted({k for pool in pools for k in pool}) or ["none"]
        want = ", ".join(f"{k}: {v:g}" for k, v in resources.items())
        raise UnsatisfiableResources(
            f"resources {{{want}}}: no worker of the {self.kind} cluster offers that much "
            f"(resources offered: {', '.join(offered)}); start workers with --resources, or change the spec's resources"
        )

    def close(self) -> None:
        if not self.owned:
            return
        try:
            self.client.close()
        finally:
            if self.cluster is not None:
                self.cluster.close()

    def __exit__(self, *exc: object) -> None:
        self.close()


def connect(spec: Spec, say: Callable[[str], None] = lambda _m: None) -> Dispatch:
    """The cluster and client for ``spec`` (see the module docstring for the kinds)."""
    cluster = spec.cluster
    if cluster.kind == "local":
        return _local(spec, say)
    if cluster.kind == "address":
        return _address(spec, say)
    if cluster.kind in ("slurm", "pbs"):
        return _jobqueue(spec, say)
    raise ClusterError(f"cluster kind {cluster.kind!r} is not one of local, address, slurm, pbs")


def _local(spec: Spec, say: Callable[[str], None]) -> Dispatch:
    from distributed import LocalCluster

    opts = dict(spec.cluster.options)
    workers = opts.get("workers") or max(1, min(spec.budget.concurrency, os.cpu_count() or 1))
    dashboard = opts.get("dashboard", True)
    show_dashboard = dashboard is not False and dashboard is not None
    # The scheduler's HTTP server (health and metrics routes) runs even without the dashboard,
    # on all interfaces at port 8787 unless told otherwise: always give it a loopback address.
    if isinstance(dashboard, int) and not isinstance(dashboard, bool):
        dashboard_address = f"127.0.0.1:{dashboard}"
    else:
        dashboard_address = "127.0.0.1:0"
    kwargs: dict[str, Any] = {}
    if not show_dashboard:
        kwargs["scheduler_kwargs"] = {"dashboard": False}
    if opts.get("memory_limit") is not None:
        kwargs["memory_limit"] = opts["memory_limit"]
    settings: dict[str, Any] = {
        "distributed.scheduler.allowed-failures": 0,
        "distributed.scheduler.no-workers-timeout": NO_WORKERS_TIMEOUT,
    }
    if show_dashboard:
        # The live search page (forebear.cluster.dashboard), served by the scheduler's HTTP server.
        routes = list(dask.config.get("distributed.scheduler.http.routes"))
        settings["distributed.scheduler.http.routes"] = [*routes, "forebear.cluster.dashboard"]
    with dask.config.set(settings):
        lc = LocalCluster(
            n_workers=int(workers),
            threads_per_worker=int(opts.get("threads") or 1),
            processes=True,
            host="127.0.0.1",
            dashboard_address=dashboard_address,
            worker_dashboard_address=None,
            protocol="tcp://",
            **kwargs,
        )
    try:
        client = Client(lc)
    except BaseException:
        lc.close()
        raise
    # The controller says the link of the search's own page once it is served (dashboard.publish).
    link = lc.dashboard_link if show_dashboard else None
    return Dispatch(client, "local", cluster=lc, dashboard=link)


def _address(spec: Spec, say: Callable[[str], None]) -> Dispatch:
    cl = spec.cluster
    assert cl.address is not None
    warning = insecure_warning(cl.address, cl.allow_insecure)
    if warning:
        say(warning)
        log.warning(warning)
    security = security_for(cl)
    try:
        client = Client(cl.address, security=security, timeout=CONNECT_TIMEOUT)
    except OSError as exc:
        raise ClusterError(f"cannot connect to the scheduler at {cl.address}: {exc}") from None
    d = Dispatch(client, "address", fail_fast=install_fail_fast(client, say))
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT)
    except TimeoutError:
        say(f"note: no worker has joined {cl.address} after {WORKER_WAIT:g} s; trials wait for one")
    return d


def wrap(client: Client, say: Callable[[str], None] = lambda _m: None) -> Dispatch:
    """A :class:`Dispatch` over a client someone else made; closing it leaves the client open.

    ``forebear.run(spec, client=client)``: the search runs on the user's cluster, which
    forebear neither scales nor closes.
    """
    return Dispatch(client, "client", fail_fast=install_fail_fast(client, say), owned=False)


def install_fail_fast(client: Client, say: Callable[[str], None]) -> bool:
    """Register :class:`FailFast` on the scheduler; False (with a note) where it cannot import forebear."""
    try:
        client.register_plugin(FailFast(), name=FailFast.name)
        return True
    except Exception as exc:  # noqa: BLE001 - any failure here only weakens loss accounting
        say(
            "note: could not install forebear's plugin on the scheduler "
            f"({type(exc).__name__}: {exc}); a worker death reruns an attempt silently up to "
            "Dask's allowed-failures before forebear records it as lost"
        )
        return False


def jobqueue_cluster(spec: Spec) -> Any:
    """The dask-jobqueue cluster object for a slurm/pbs spec (not yet scaled)."""
    try:
        import dask_jobqueue
    except ImportError:
        raise ClusterError("cluster.slurm / cluster.pbs need dask-jobqueue: pip install 'forebear[slurm]'") from None
    cl = spec.cluster
    opts = dict(cl.options)
    opts.pop("jobs", None)
    gpus = opts.pop("gpus", None)
    extra_args = list(opts.pop("worker_extra_args", []) or [])
    directives = list(opts.pop("job_extra_directives", []) or [])
    if gpus:
        if cl.kind == "slurm":
            directives.append(f"--gres=gpu:{int(gpus)}")
        else:
            directives.append(f"-l ngpus={int(gpus)}")
        opts.setdefault("processes", int(gpus))  # one worker per GPU
        if "--resources" not in extra_args:
            extra_args += ["--resources", "GPU=1"]
    opts.setdefault("cores", 1)
    if not gpus:
        opts.setdefault("processes", int(opts["cores"]))  # one single-thread worker per core
    opts.setdefault("memory", "4GB")
    security = security_for(cl)
    if security is not None:
        opts["security"] = security
        opts.setdefault("protocol", "tls://")
    scheduler_options = dict(opts.pop("scheduler_options", {}) or {})
    scheduler_options.setdefault("dashboard_address", "127.0.0.1:0")
    cls = dask_jobqueue.SLURMCluster if cl.kind == "slurm" else dask_jobqueue.PBSCluster
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        try:
            return cls(worker_extra_args=extra_args, job_extra_directives=directives, scheduler_options=scheduler_options, **opts)
        except TypeError as exc:
            raise ClusterError(f"cluster.{cl.kind}: {exc}") from None


def declared_resources(spec: Spec) -> dict[str, float]:
    """Resources each jobqueue worker will offer, read from its ``--resources`` argument."""
    cl = spec.cluster
    args = list(cl.options.get("worker_extra_args", []) or [])
    if cl.options.get("gpus") and "--resources" not in args:
        return {"GPU": 1.0}
    out: dict[str, float] = {}
    for i, a in enumerate(args):
        value = args[i + 1] if a == "--resources" and i + 1 < len(args) else a.split("=", 1)[1] if a.startswith("--resources=") else None
        if value is None:
            continue
        for item in shlex.split(value.replace(",", " ")):
            k, _, v = item.partition("=")
            try:
                out[k] = float(v)
            except ValueError:
                continue
    return out


def _jobqueue(spec: Spec, say: Callable[[str], None]) -> Dispatch:
    jq = jobqueue_cluster(spec)
    try:
        if spec.cluster.tls is None and not spec.cluster.allow_insecure:
            say(f"warning: the {spec.cluster.kind} cluster's scheduler speaks plain TCP; anyone on the network can run code on it; give cluster.tls")
        jq.scale(jobs=int(spec.cluster.options.get("jobs", 1)))
        client = Client(jq)
    except BaseException:
        jq.close()
        raise
    d = Dispatch(client, spec.cluster.kind, cluster=jq, dashboard=getattr(jq, "dashboard_link", None))
    d.check_resources(spec.resources, declared_resources(spec))
    return d


def attempt_memory(spec: Spec) -> int | None:
    """Bytes of address space for each attempt process: ``cluster.local.memory_limit``, or None.

    The embedded cluster's workers get the same limit from Dask, but an attempt runs in a
    process of its own outside the worker's accounting, so the limit is applied to it directly.
    """
    if spec.cluster.kind != "local" or spec.cluster.options.get("memory_limit") is None:
        return None
    return memory_bytes(spec.cluster.options["memory_limit"])
