"""A search in the background: ``forebear.start`` returns a :class:`RunningSearch` at once.

The controller runs in a thread of this process (no signal handler: that needs
the main thread), so a notebook stays usable while the search runs. The handle
reads the logbook for ``status()`` and ``best()``, and ``stop()`` asks the loop
to stop as a first Ctrl-C does: no new trials, running attempts finish (or are
cancelled with ``cancel=True``), then the logbook gets its ``closed`` record.
"""

from __future__ import annotations

import atexit
import threading
import weakref
from collections.abc import Callable
from typing import Any

from forebear.face import api
from forebear.loop.book import SearchResult
from forebear.records import html
from forebear.records.logbook import Logbook, Trial, TrialTable
from forebear.records.status import status_payload

EXIT_WAIT = 10.0  # seconds the interpreter waits at exit for a running search to close its logbook

_LIVE: weakref.WeakSet[RunningSearch] = weakref.WeakSet()


class RunningSearch:
    """A search running in a background thread (made by :func:`start`)."""

    def __init__(self, controller: Any) -> None:
        self._controller = controller
        self.name: str = controller.spec.name
        self.logbook = controller.spec.logbook
        self._result: SearchResult | None = None
        self._error: BaseException | None = None
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._main, name=f"forebear-search-{self.name}", daemon=True)
        _LIVE.add(self)
        self._thread.start()

    def _main(self) -> None:
        try:
            self._result = self._controller.run()
        except BaseException as exc:  # noqa: BLE001 - kept for wait(), which raises it in the caller's thread
            self._error = exc
        finally:
            self._done.set()

    # -- what it stands at ----------------------------------------------------

    @property
    def link(self) -> str | None:
        """The search's page on the Dask dashboard, once it is served."""
        return self._controller.link

    def done(self) -> bool:
        """True once the search has closed (or failed)."""
        return self._done.is_set()

    @property
    def state(self) -> str:
        if not self._done.is_set():
            return "running"
        return "failed" if self._error is not None else "closed"

    def _table(self) -> TrialTable:
        return Logbook(self.logbook).fold()

    def status(self) -> dict[str, Any]:
        """What ``forebear status --json`` says of the logbook, with ``state`` (running, closed, failed) and ``link``."""
        payload = status_payload(self._table(), str(self.logbook))
        payload["state"] = self.state
        payload["link"] = self.link
        if self._error is not None:
            payload["error"] = f"{type(self._error).__name__}: {self._error}"
        return payload

    def best(self) -> Trial | None:
        """The best trial scored so far, or None."""
        return self._table().best()

    # -- ending it ------------------------------------------------------------

    def wait(self, timeout: float | None = None) -> SearchResult:
        """Block until the search closes and return its result (re-raising what stopped it, if it failed).

        Raises
        ------
        TimeoutError
            When it is still running after ``timeout`` seconds (it keeps running).
        """
        if not self._done.wait(timeout):
            raise TimeoutError(f"search {self.name} is still running after {timeout:g} s")
        if self._error is not None:
            raise self._error
        assert self._result is not None
        return self._result

    def stop(self, *, cancel: bool = False, timeout: float | None = None) -> SearchResult:
        """Propose no new trial, let running attempts finish (``cancel``: kill them), close the logbook; the result."""
        if not self._done.is_set():
            self._controller.request_stop(cancel=cancel)
        return self.wait(timeout)

    # -- display --------------------------------------------------------------

    def __repr__(self) -> str:
        return f"<RunningSearch {self.name}: {self.state}, logbook {self.logbook}>"

    def _repr_html_(self) -> str:
        try:
            table = self._table()
        except (OSError, ValueError) as exc:
            return f"<p>search {html.esc(self.name)}: {html.esc(self.state)} (logbook unreadable: {html.esc(exc)})</p>"
        link = self.link
        head = (
            f"<div><strong>search {html.esc(self.name)}</strong> &middot; {html.esc(self.state)}"
            + (f" &middot; <a href=\"{html.esc(link)}\" target=\"_blank\">live page</a>" if link else "")
            + (f" &middot; {html.esc(type(self._error).__name__)}: {html.esc(self._error)}" if self._error else "")
            + f" &middot; logbook <code>{html.esc(self.logbook)}</code></div>"
        )
        running = [[t.trial, t.last_attempt, t.attempts[-1].worker if t.attempts else ""] for t in table.by_state("running")]
        return "".join([
            html.STYLE,
            head,
            html.counts_table(table.counts(), table.finished, ((table.header or {}).get("budget") or {}).get("trials")),
            html.best_table(table.best(), table.metric, table.sense),
            html.table(["running trial", "attempt", "worker"], running, numeric=(0, 1)) if running else "",
        ])


def start(
    spec: api.SpecLike,
    *,
    client: Any = None,
    objective: Callable[..., Any] | None = None,
    extend: bool = False,
    cancel_running: bool = False,
) -> RunningSearch:
    """Start (or resume) a search in a background thread and return its handle at once.

    The parameters are those of :func:`forebear.run`; the search shows no progress
    display (its page on the Dask dashboard, ``handle.link``, and the handle itself
    show how it goes). Bad input (an invalid spec, an objective that cannot be
    shipped) raises here, before anything runs.
    """
    ctl = api.controller(spec, client, objective, extend=extend, quiet=True, cancel_running=cancel_running, handle_signals=False)
    return RunningSearch(ctl)


def _stop_at_exit() -> None:
    # A notebook kernel that exits with a search running: stop it so the logbook gets its closed record.
    for search in list(_LIVE):
        if not search.done():
            search._controller.request_stop(cancel=True)
    for search in list(_LIVE):
        search._done.wait(EXIT_WAIT)


# Stop searches while the interpreter still runs threads' work: plain atexit callbacks run only
# after threading's shutdown, by which time concurrent.futures executors (the proposer's, Dask's)
# refuse new work and the search would end in an error instead of a closed record.
# threading._register_atexit is the hook concurrent.futures itself uses for that stage.
_register = getattr(threading, "_register_atexit", None)
if _register is not None:
    _register(_stop_at_exit)
else:  # pragma: no cover - other Python implementations
    atexit.register(_stop_at_exit)
