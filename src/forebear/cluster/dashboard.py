"""The live search page on the Dask dashboard: ``/forebear/`` and ``/forebear/status.json``.

The scheduler's HTTP server builds its routes from the modules listed in the
``distributed.scheduler.http.routes`` setting; each module has a ``routes``
list of ``(path, handler, kwargs)`` whose handlers subclass
``distributed.http.utils.RequestHandler`` (``self.server`` is the scheduler).
This module is such a module. The embedded cluster lists it in that setting;
on a scheduler that is already running (a user's ``Client``, a ``--detach``ed
search, the scheduler preload) the :class:`SearchPage` plugin adds the same
routes to the running HTTP application when it starts.

Each search shown is one :class:`SearchPage` plugin on the scheduler: it names
the search and its logbook, which the handlers fold (off the scheduler's event
loop) on each request. ``/forebear/status.json`` is the payload of
``forebear status --json`` for the same logbook
(:func:`forebear.records.status.status_payload`). The page is served where the
dashboard listens: on loopback for the embedded cluster.
"""

from __future__ import annotations

import json
import os
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any
from urllib.parse import urlencode, urlsplit, urlunsplit

from distributed.diagnostics.plugin import SchedulerPlugin
from distributed.http.utils import RequestHandler, get_handlers
from tornado.ioloop import IOLoop

from forebear.cluster import page as page_mod
from forebear.cluster.dispatch import KEY_PREFIX
from forebear.records.logbook import Logbook, TrialTable, check_header
from forebear.records.status import status_payload

ROUTES_MODULE = "forebear.cluster.dashboard"
PLUGIN_PREFIX = "forebear-page-"


class SearchPage(SchedulerPlugin):
    """One search shown on the scheduler's dashboard (a plugin, so that it can travel to a remote scheduler).

    Parameters
    ----------
    search
        The search's name.
    logbook
        Its logbook, as a path on the scheduler's host.
    """

    def __init__(self, search: str, logbook: str) -> None:
        self.search = search
        self.logbook = logbook
        self.name = PLUGIN_PREFIX + search
        self.scheduler: Any = None
        self.added = time.time()
        self._cache: tuple[tuple[int, int], TrialTable] | None = None
        self._guard = threading.Lock()

    def __getstate__(self) -> dict[str, Any]:
        return {"search": self.search, "logbook": self.logbook}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__init__(state["search"], state["logbook"])  # type: ignore[misc]

    async def start(self, scheduler: Any) -> None:
        self.scheduler = scheduler
        install(scheduler)

    def table(self) -> TrialTable:
        """The logbook folded (again only when the file changed); OSError when the scheduler cannot read it."""
        st = os.stat(self.logbook)
        stamp = (st.st_size, st.st_mtime_ns)
        with self._guard:
            if self._cache is not None and self._cache[0] == stamp:
                return self._cache[1]
        table = Logbook(self.logbook).fold()
        check_header(table, Path(self.logbook))
        with self._guard:
            self._cache = (stamp, table)
        return table

    def tasks(self) -> dict[tuple[int, int], str]:
        """(trial, attempt) -> worker address of this search's attempts the scheduler has on a worker."""
        out: dict[tuple[int, int], str] = {}
        if self.scheduler is None:
            return out
        prefix = f"{KEY_PREFIX}{self.search}-"  # keys: forebear-<search>-<session>-<trial>-<attempt>
        for ws in list(self.scheduler.workers.values()):
            for ts in list(ws.processing):
                key = ts.key
                if not isinstance(key, str) or not key.startswith(prefix):
                    continue
                bits = key[len(prefix):].split("-")
                if len(bits) == 3 and bits[1].isdigit() and bits[2].isdigit():
                    out[(int(bits[1]), int(bits[2]))] = ws.address
        return out


def pages(scheduler: Any) -> list[SearchPage]:
    """The searches shown on this scheduler, oldest first."""
    found = [p for p in list(getattr(scheduler, "plugins", {}).values()) if isinstance(p, SearchPage)]
    return sorted(found, key=lambda p: p.added)


def _served(router: Any, seen: set[int] | None = None) -> bool:
    """True when a tornado router (or one below it) already routes to this module's handlers."""
    seen = set() if seen is None else seen
    if id(router) in seen:
        return False
    seen.add(id(router))
    for rule in getattr(router, "rules", []):
        target = rule.target
        if isinstance(target, type) and issubclass(target, _Handler):
            return True
        if hasattr(target, "rules") and _served(target, seen):
            return True
    return False


def install(scheduler: Any) -> bool:
    """Add this module's routes to a running scheduler's HTTP application; False where it has none."""
    app = getattr(scheduler, "http_application", None)
    if app is None:
        return False
    if _served(app.default_router) or _served(app.wildcard_router):
        return True  # listed in distributed.scheduler.http.routes, or added by an earlier search
    app.add_handlers(r".*$", get_handlers(scheduler, [ROUTES_MODULE], prefix="/"))
    return True


# --------------------------------------------------------------------------
# handlers


class _Handler(RequestHandler):
    content_type = "text/html; charset=utf-8"

    def _error(self, status: int, message: str) -> None:
        self.set_status(status)
        self.write(page_mod.html.esc(message))

    async def _search(self) -> tuple[SearchPage, TrialTable | None, str | None, list[SearchPage]] | None:
        """The search asked for (``?search=NAME``, else the latest), its folded logbook or why not, all searches."""
        self.set_header("Content-Type", self.content_type)
        self.set_header("Cache-Control", "no-store")
        shown = pages(self.server)
        wanted = self.get_query_argument("search", None)
        chosen = (shown[-1] if shown else None) if wanted is None else next((p for p in shown if p.search == wanted), None)
        if chosen is None:
            names = ", ".join(p.search for p in shown) or "none"
            self._error(404, f"no such search on this scheduler (searches: {names})")
            return None
        try:
            # Off the event loop: a large logbook takes a moment to fold.
            return chosen, await IOLoop.current().run_in_executor(None, chosen.table), None, shown
        except OSError as exc:
            why = (
                f"the scheduler cannot read the logbook {chosen.logbook} ({exc.strerror or exc}): "
                "is it on another machine? Follow the search with forebear status on the controller's host."
            )
        except ValueError as exc:
            why = f"the logbook {chosen.logbook} cannot be shown: {exc}"
        return chosen, None, why, shown

    def _body(self, chosen: SearchPage, table: TrialTable) -> str:
        raise NotImplementedError

    async def get(self) -> None:
        found = await self._search()
        if found is None:
            return
        chosen, table, why, _ = found
        if table is None:
            self._error(503, str(why))
        else:
            self.write(self._body(chosen, table))


class PageHandler(_Handler):
    """``/forebear/``: the page of the latest search, or of ``?search=NAME``."""

    def _error(self, status: int, message: str) -> None:
        self.set_status(status)
        self.write(page_mod.page(None, name="?", logbook="", body=f"<p>{page_mod.html.esc(message)}</p>"))

    async def get(self) -> None:
        found = await self._search()
        if found is None:
            return
        chosen, table, why, shown = found
        others = [p.search for p in shown] if len(shown) > 1 else []
        body = None if why is None else f'<div id="forebear-state" data-closed="1"></div><p>{page_mod.html.esc(why)}</p>'
        self.write(page_mod.page(table, name=chosen.search, logbook=chosen.logbook, others=others, body=body, tasks=chosen.tasks()))


class LiveHandler(_Handler):
    """``/forebear/live``: the part of the page that its script refreshes."""

    def _body(self, chosen: SearchPage, table: TrialTable) -> str:
        return page_mod.live(table, tasks=chosen.tasks())


class StatusHandler(_Handler):
    """``/forebear/status.json``: what ``forebear status --json`` prints for the same logbook."""

    content_type = "application/json"

    def _error(self, status: int, message: str) -> None:
        self.set_status(status)
        self.write(json.dumps({"error": message}))

    def _body(self, chosen: SearchPage, table: TrialTable) -> str:
        return json.dumps(status_payload(table, chosen.logbook), default=str)


routes: list[tuple[str, type, dict[str, Any]]] = [
    ("forebear/", PageHandler, {}),
    ("forebear/live", LiveHandler, {}),
    ("forebear/status.json", StatusHandler, {}),
]


# --------------------------------------------------------------------------
# the controller's side


def page_link(client: Any, search: str) -> str | None:
    """The search's page on the dashboard the client's scheduler serves, or None without one.

    For a scheduler in this process (a LocalCluster) the address its HTTP server is bound
    to; otherwise Dask's own dashboard link, which names the scheduler's host.
    """
    local = getattr(getattr(client, "cluster", None), "scheduler", None)
    link = local_link(local, search) if local is not None else None
    if link:
        return link
    try:
        base = client.dashboard_link
    except Exception:  # noqa: BLE001 - no dashboard service, or the client cannot say
        return None
    return _link(base, search) if base else None


def local_link(scheduler: Any, search: str) -> str | None:
    """The search's page on a scheduler of this process, from the address its HTTP server is bound to."""
    http = getattr(scheduler, "http_server", None)
    host, port = getattr(http, "address", None), getattr(http, "port", None)
    if not port:
        return None
    if not host or host in ("0.0.0.0", "::"):
        # Bound to every interface: name the host the scheduler itself is reached at.
        from distributed.comm import get_address_host

        host = get_address_host(scheduler.address)
    host = f"[{host}]" if ":" in str(host) else host
    return _link(f"http://{host}:{port}/status", search)


def _link(base: str, search: str) -> str:
    url = urlsplit(base)
    path = url.path[: -len("status")] if url.path.endswith("/status") else url.path.rstrip("/") + "/"
    return urlunsplit((url.scheme, url.netloc, path + "forebear/", urlencode({"search": search}), ""))


def publish(dispatch: Any, spec: Any, say: Callable[[str], None]) -> str | None:
    """Show the search on its scheduler's dashboard and say the link; None where there is no page.

    The embedded cluster without a dashboard (``cluster.local.dashboard: false``) shows nothing.
    """
    if dispatch.kind == "local" and dispatch.dashboard is None:
        return None
    plugin = SearchPage(spec.name, str(spec.logbook))
    try:
        dispatch.client.register_plugin(plugin, name=plugin.name)
    except Exception as exc:  # noqa: BLE001 - a scheduler without forebear only loses the page
        say(f"note: no live search page on the dashboard: the scheduler could not take forebear's page ({type(exc).__name__}: {exc})")
        return None
    link = page_link(dispatch.client, spec.name)
    if link:
        say(f"dashboard: {link}")
    return link
