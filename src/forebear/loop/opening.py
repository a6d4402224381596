"""Opening a search: reading its logbook, the workers' view of it, and what the last controller left.

A logbook that already holds the search is continued; a spec that changed is
refused (:mod:`forebear.loop.resume`). Attempts that were running when the last
controller died and have no result in the logbook become ``lost`` (reason
``restart``) and are resubmitted; results recorded meanwhile are kept.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from forebear.cluster.dispatch import KEY_PREFIX
from forebear.cluster.runner import PROBE_NAME, reachable
from forebear.core.spec import Spec
from forebear.loop.book import Book
from forebear.loop.resume import SpecChanged, function_note, search_record, spec_changes
from forebear.records.logbook import (
    LogbookMismatch,
    TrialTable,
    check_header,
    ensure_folder,
    fold,
    parse,
    record,
)


class Opening:
    """The controller's opening steps (a mixin of :class:`forebear.loop.controller.Controller`).

    It uses the controller's ``spec``, ``extend``, ``book``, ``logbook``, ``logs``,
    ``token``, ``session``, ``shared``, ``retry_queue``, ``_read_at``, ``_dispatch``
    and ``say``.
    """

    spec: Spec
    extend: bool
    book: Book
    logbook: Any
    logs: Path
    token: str
    session: str
    shared: bool | None
    retry_queue: Any
    _read_at: int
    _dispatch: Any
    say: Any

    def _read(self) -> tuple[TrialTable, dict[str, Any] | None]:
        """Fold the logbook and check it is this search's; returns the table and the ``search`` record to write (or None)."""
        spec = self.spec
        data = self.logbook.read_bytes()
        # Results that arrive after this offset are seen by _reconcile. It is the end of the last
        # whole line, not the file's size: a torn tail (a writer that hit a full disk) is cut off by
        # the next writer, whose record then starts before the size read here.
        self._read_at = data.rfind(b"\n") + 1
        records, skipped = parse(data)
        if skipped and not records and b"\n" in data:
            # Whole lines and none of them ours: someone else's file. Writing would append to it and
            # cut its last line as a torn record. (A lone torn first record has no newline: resumable.)
            raise LogbookMismatch(
                f"logbook {spec.logbook}: holds no forebear records ({skipped} unreadable line(s)); "
                "not a forebear logbook, so nothing is written to it"
            )
        table = fold(records)
        table.skipped = skipped
        check_header(table, spec.logbook)
        headers = [r for r in records if r.get("kind") == "search"]
        new_header: dict[str, Any] | None = None
        if headers:
            changes, grew = spec_changes(headers[-1], spec, self.extend)
            if changes:
                raise SpecChanged(str(spec.logbook), changes)
            note = function_note(headers[-1], spec)
            if note:
                self.say(note)
            if grew:
                new_header = search_record(spec)
        else:
            new_header = search_record(spec)
        return table, new_header

    def _probe(self) -> None:
        """Write the token workers look for to decide whether they share the logbook's filesystem."""
        ensure_folder(self.logs)
        path = self.logs / PROBE_NAME
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            os.write(fd, self.token.encode())
        finally:
            os.close(fd)

    def _check_shared(self) -> None:
        """Ask a worker whether it sees the probe token; without a shared filesystem, say so once."""
        assert self._dispatch is not None
        fut = self._dispatch.client.submit(reachable, str(self.logs), self.token, pure=False, key=f"{KEY_PREFIX}probe-{self.session}")
        try:
            self.shared = bool(fut.result(timeout=30))
        except Exception:  # noqa: BLE001 - no worker yet, or it cannot tell: results come back either way
            self.shared = None
            return
        if not self.shared:
            self.say(
                f"note: the workers cannot see {self.logs.parent} (no shared filesystem); "
                "the controller writes their records and logs from the results it collects"
            )

    def _reconcile(self, table: TrialTable) -> None:
        """Settle what the last controller left: attempts it left running are lost (``restart``), then retried.

        Each ``lost`` record is written only if the attempt's own result did not arrive since the
        logbook was read (checked under the lock); a result that did arrive stands.
        """
        arrived = []
        for t in table:
            if t.terminal:
                continue
            if t.state == "running":
                lost = record("lost", trial=t.trial, attempt=t.last_attempt, reason="restart")
                if not self.logbook.append_unless(lost, ("scored", "failed"), self._read_at):
                    arrived.append(t.trial)
                    continue
                self.say(f"trial {t.trial}: attempt {t.last_attempt} was running when the last controller stopped; resubmitting")
            self.book.state[t.trial] = "queued"
            self.retry_queue.append(t.trial)
        if arrived:
            fresh = Book.from_table(self.logbook.fold())
            for tid in arrived:
                for part in ("state", "scores", "attempts", "charged", "errors"):
                    value = getattr(fresh, part).get(tid)
                    if value is not None:
                        getattr(self.book, part)[tid] = value
                if self.book.state[tid] not in ("scored", "failed"):
                    self.book.state[tid] = "queued"
                    self.retry_queue.append(tid)


def load_history(spec: Spec, say: Any) -> Any:
    """The spec's history (``forebear.records.history.History``), or None for a cold start."""
    if not spec.history:
        return None
    try:
        from forebear.records import history as history_mod
    except ImportError:
        say("warning: forebear.records.history is not available in this build; starting without history")
        return None
    hist = history_mod.load(spec.history, spec.space, spec.objective.sense, exclude=[spec.logbook])
    for w in getattr(hist, "warnings", []) or []:
        say(f"history: {w}")
    say(f"history: {len(hist)} earlier search(es)")
    return hist if len(hist) else None
