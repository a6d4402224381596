"""A search that outlives the laptop that launched it: the controller inside the scheduler.

Two ways in:

* ``forebear run SPEC --detach`` (with ``cluster.address``) registers a
  :class:`SearchPlugin` on the remote scheduler through
  ``Client.register_plugin`` and returns at once;
* ``dask scheduler --preload forebear.cluster.plugin --forebear-spec search.yaml``
  starts the search when the scheduler starts.

Either way the plugin runs the ordinary controller in its own thread with its
own client connected back to the scheduler, so the scheduler's event loop is
never blocked. The spec's paths (logbook, history, TLS files) must be valid on
the scheduler's host, and the objective importable on the workers. A failure
is logged loudly on the scheduler (Dask itself only logs it) and, where the
logbook is known, written as a ``closed`` record with reason ``error``.
``forebear status`` and ``forebear best`` read the logbook while it runs, and
the scheduler's dashboard shows it at ``/forebear/`` (the link is printed by
``--detach`` and logged by the scheduler).
"""

from __future__ import annotations

import logging
import threading
import time
import traceback
from typing import Any

import click
from distributed import Client
from distributed.diagnostics.plugin import SchedulerPlugin

from forebear.core.spec import Spec

log = logging.getLogger("forebear.cluster.plugin")

START_WAIT = 60.0  # seconds for the scheduler to be ready before the controller connects to it


def _loud(message: str) -> None:
    bar = "=" * 72
    log.error("\n%s\nforebear: %s\n%s", bar, message, bar)


def _record_error(spec: Spec, error: str) -> None:
    """Write a ``closed`` record with the error, unless the logbook belongs to someone else."""
    from forebear.records.logbook import Logbook, LogbookError, record

    logbook = Logbook(spec.logbook, spec.lock, spec.lock_lifetime)
    try:
        closed = logbook.fold().closed if logbook.exists() else None
        if closed and closed.get("reason") == "error" and closed.get("error") == error:
            return  # the controller recorded it already
        logbook.append(record("closed", reason="error", best=None, error=error))
    except (LogbookError, OSError, ValueError) as exc:
        _loud(f"could not record the error in {spec.logbook}: {exc}")


class SearchPlugin(SchedulerPlugin):
    """Runs one search's controller in a thread of the scheduler process."""

    def __init__(self, spec: Spec, *, extend: bool = False) -> None:
        self.spec = spec
        self.extend = extend
        self.name = f"forebear-search-{spec.name}"
        self.thread: threading.Thread | None = None
        self.controller: Any = None
        self.result: Any = None
        self.error: str | None = None

    async def start(self, scheduler: Any) -> None:
        self.thread = threading.Thread(target=self._main, args=(scheduler,), name=self.name, daemon=True)
        self.thread.start()

    async def close(self) -> None:
        if self.controller is not None:
            self.controller.request_stop(cancel=True)

    def _main(self, scheduler: Any) -> None:
        from forebear.cluster.dashboard import local_link
        from forebear.cluster.dispatch import Dispatch, install_fail_fast, security_for
        from forebear.loop.controller import Controller
        from forebear.loop.resume import SpecChanged
        from forebear.records.logbook import LogbookBusy, LogbookMismatch

        spec = self.spec
        try:
            deadline = time.monotonic() + START_WAIT
            while not getattr(scheduler, "address", None) or str(getattr(scheduler, "status", "")) not in ("Status.running", "running"):
                if time.monotonic() > deadline:
                    raise TimeoutError(f"the scheduler was not ready within {START_WAIT:g} s")
                time.sleep(0.05)
            client = Client(scheduler.address, security=security_for(spec.cluster) or scheduler.security, timeout="30s")
            dispatch = Dispatch(client, "scheduler", fail_fast=install_fail_fast(client, log.warning))
            log.warning("forebear: search %s started inside the scheduler; logbook %s", spec.name, spec.logbook)
            link = local_link(scheduler, spec.name)
            if link:
                log.warning("forebear: search %s: live page %s", spec.name, link)
            try:
                self.controller = Controller(spec, extend=self.extend, quiet=True, dispatch=dispatch, handle_signals=False)
                self.result = self.controller.run()
            finally:
                dispatch.close()
            log.warning("forebear: search %s closed (%s)", spec.name, self.result.closed)
        except (LogbookBusy, LogbookMismatch, SpecChanged) as exc:
            # The logbook is someone else's (another controller, another search): report, do not write.
            self.error = str(exc)
            _loud(f"search {spec.name} did not start: {exc}")
        except BaseException as exc:  # noqa: BLE001 - a thread in the scheduler must report, never die silently
            self.error = f"{type(exc).__name__}: {exc}"
            _loud(f"search {spec.name} failed: {self.error}\n{traceback.format_exc()}")
            _record_error(spec, self.error)


def detach(spec: Spec, *, extend: bool = False, quiet: bool = False) -> Any:
    """Register the search on the spec's remote scheduler and return without waiting for it."""
    from forebear.cluster.dashboard import page_link
    from forebear.cluster.dispatch import ClusterError, insecure_warning, security_for
    from forebear.loop.book import SearchResult

    cl = spec.cluster
    if cl.kind != "address" or not cl.address:
        raise ValueError("--detach needs cluster.address: the search runs inside that scheduler")
    warning = insecure_warning(cl.address, cl.allow_insecure)
    if warning and not quiet:
        click.echo(warning, err=True)
    try:
        client = Client(cl.address, security=security_for(cl), timeout="30s")
    except OSError as exc:
        raise ClusterError(f"cannot connect to the scheduler at {cl.address}: {exc}") from None
    try:
        plugin = SearchPlugin(spec, extend=extend)
        client.register_plugin(plugin, name=plugin.name)
        link = page_link(client, spec.name)
    finally:
        client.close()
    if not quiet:
        click.echo(f"detached: search {spec.name} runs inside the scheduler at {cl.address}", err=True)
        if link:
            click.echo(f"dashboard: {link}", err=True)
        click.echo(f"follow it with: forebear status {spec.logbook}", err=True)
    return SearchResult(best=None, trials=[], logbook=spec.logbook, closed="detached")


@click.command()
@click.option("--forebear-spec", "spec_path", required=True, type=click.Path(dir_okay=False), help="The search to run in this scheduler.")
@click.option("--forebear-extend", "extend", is_flag=True, help="Allow a larger budget than the logbook's search had.")
def dask_setup(scheduler: Any, spec_path: str, extend: bool) -> None:
    """``dask scheduler --preload forebear.cluster.plugin --forebear-spec search.yaml``."""
    from forebear.core import spec as spec_mod

    try:
        spec = spec_mod.load(spec_path)
    except Exception as exc:  # noqa: BLE001 - the scheduler keeps running; the failure must be seen
        lines = getattr(exc, "errors", None) or [str(exc)]
        _loud(f"preload could not load the spec {spec_path}:\n" + "\n".join(lines))
        return
    plugin = SearchPlugin(spec, extend=extend)
    scheduler.add_plugin(plugin, name=plugin.name)
