"""The logbook: an append-only, file-locked event log of one search.

One JSON object per line. Every record has ``v`` (format version), ``at``
(unix seconds) and ``kind``; the kinds and their fields are in
``docs/architecture.md`` (record table) and ``docs/spec.md``. Writers take a lock on
``<logbook>.lock``, open the file after locking, cut off a torn last line left
by a writer that died mid-write, write the record with one ``os.write``,
``fsync`` and release. Readers take no lock: they skip lines that do not
parse and count them. The line format (records, parsing, the header check) is
:mod:`forebear.records.lines`; the fold into a trial table is
:mod:`forebear.records.table`; the locks are :mod:`forebear.records.locks`; all
three are re-exported here.
"""

from __future__ import annotations

import json
import os
import threading
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

import filelock

from forebear.records.files import NotRegularFile, ensure_folder, open_fd, read_regular
from forebear.records.lines import (
    MAX_RECORD_BYTES,
    VERSION,
    LogbookMismatch,
    bad_lines,
    check_header,
    encode,
    holds,
    is_logbook,
    parse,
    record,
)
from forebear.records.locks import ControllerLock, LogbookBusy, _lock_for
from forebear.records.table import KINDS, STATES, TERMINAL, Attempt, Trial, TrialTable, finite, fold

__all__ = [
    "KINDS", "MAX_RECORD_BYTES", "STATES", "TERMINAL", "VERSION", "Attempt", "ControllerLock", "Logbook",
    "LogbookBusy", "LogbookError", "LogbookMismatch", "Trial", "TrialTable", "check_header", "ensure_folder",
    "finite", "fold", "is_logbook", "load", "parse", "record",
]


class LogbookError(OSError):
    """A logbook that cannot be read or written (names the file)."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)



class Logbook:
    """The logbook file at ``path``.

    Parameters
    ----------
    path
        The ``.jsonl`` file; its folder is created (0700) on the first write.
    lock
        ``"strict"`` for ``filelock.FileLock``; ``"soft"`` for ``SoftFileLock``
        with ``lifetime`` seconds, for filesystems with unreliable locking.
    """

    def __init__(self, path: str | os.PathLike[str], lock: str = "strict", lifetime: float = 60.0) -> None:
        self.path = Path(path)
        self.lock_mode = lock
        self.lifetime = lifetime
        self._thread_guard = threading.Lock()

    def __repr__(self) -> str:
        return f"Logbook({str(self.path)!r})"

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, (str(self.path), self.lock_mode, self.lifetime))

    @property
    def lock(self) -> filelock.BaseFileLock:
        return _lock_for(self.path, self.lock_mode, self.lifetime)

    def exists(self) -> bool:
        return self.path.exists() and self.path.stat().st_size > 0

    # -- writing ------------------------------------------------------------

    def append(self, rec: Mapping[str, Any]) -> int:
        """Append one record durably (lock, repair a torn tail, write, fsync); returns the end offset."""
        return self.append_many([rec])

    def append_result(self, rec: Mapping[str, Any], since: int) -> bool:
        """Append an attempt's ``scored`` or ``failed`` record unless the attempt was settled as lost.

        ``since`` is the offset just after the attempt's ``started`` record (what :meth:`append`
        returned for it). Under the lock, the bytes after it are scanned for a ``lost`` record of
        the same trial and attempt: a controller that took over (after a crash, or on Ctrl-C) may
        have written one and resubmitted the trial, and the late result would then score it twice.
        Returns False, writing nothing, in that case.
        """
        return self.append_unless(rec, ("lost",), since)

    def append_unless(self, rec: Mapping[str, Any], kinds: tuple[str, ...], since: int) -> bool:
        """Append ``rec`` unless a record of one of ``kinds`` for its (trial, attempt) follows offset ``since``.

        The check and the write happen under one hold of the lock. Returns whether ``rec`` was written.
        """
        key = (rec.get("trial"), rec.get("attempt"))
        return self.append_many([rec], unless=lambda tail: holds(tail, kinds, key), since=since) >= 0

    def size(self) -> int:
        """The logbook's size in bytes now (0 when it does not exist yet)."""
        try:
            return self.path.stat().st_size
        except FileNotFoundError:
            return 0

    def append_many(
        self, recs: Iterable[Mapping[str, Any]], *, unless: Callable[[bytes], bool] | None = None, since: int = 0
    ) -> int:
        """Append records under one lock hold; each is one ``os.write``. Returns the end offset.

        With ``unless``, the bytes from ``since`` to the end are read under the lock first; when
        ``unless(bytes)`` is true nothing is written and -1 is returned.
        """
        payloads = [encode(r) for r in recs]
        if not payloads:
            return -1 if unless is not None else 0
        ensure_folder(self.path.parent)
        fd = -1
        try:
            with self._thread_guard, self.lock.acquire(timeout=120):
                fd = open_fd(self.path, os.O_RDWR | os.O_CREAT | os.O_APPEND, what="logbook")
                _repair_tail(fd)
                end = os.fstat(fd).st_size
                if unless is not None and unless(os.pread(fd, max(0, end - since), since) if end > since else b""):
                    return -1
                for data in payloads:
                    view = memoryview(data)
                    while view:
                        # A short write on a regular file only happens on a full disk; loop until
                        # it completes or raises (ENOSPC), never leave half a record silently.
                        n = os.write(fd, view)
                        view = view[n:]
                    end += len(data)
            # fsync after the lock is released: the record is already in place, and concurrent
            # writers' fsyncs overlap (group commit) instead of queueing behind the lock. The
            # append still returns only once its record is durable.
            os.fsync(fd)
            return end
        except filelock.Timeout:
            msg = f"logbook {self.path}: could not take its lock {self.lock.lock_file} within 120 s"
            raise LogbookError(msg) from None
        except NotRegularFile as exc:
            raise LogbookError(exc.errno or 0, str(exc.args[-1])) from None
        except OSError as exc:
            if isinstance(exc, LogbookError):
                raise
            msg = f"logbook {self.path}: write failed: {exc.strerror or exc}"
            raise LogbookError(exc.errno or 0, msg) from exc
        finally:
            if fd >= 0:
                os.close(fd)

    # -- reading ------------------------------------------------------------

    def read(self) -> tuple[list[dict[str, Any]], int]:
        """All parseable records in order, and the count of lines skipped."""
        return parse(self.read_bytes())

    def read_bytes(self) -> bytes:
        """The logbook's bytes (b"" when it does not exist yet)."""
        try:
            return read_regular(self.path, what="logbook")
        except FileNotFoundError:
            return b""
        except NotRegularFile as exc:
            raise LogbookError(exc.errno or 0, str(exc.args[-1])) from None
        except OSError as exc:
            msg = f"logbook {self.path}: cannot read: {exc.strerror or exc}"
            raise LogbookError(exc.errno or 0, msg) from exc

    def records(self) -> list[dict[str, Any]]:
        return self.read()[0]

    def fold(self) -> TrialTable:
        """The trial table; lines that do not parse and records with wrong field types are skipped and counted."""
        data = self.read_bytes()
        recs, skipped = parse(data)
        table = fold(recs)
        table.skipped = skipped
        if skipped or table.invalid:
            table.bad_lines = bad_lines(data, {n for n, _ in table.invalid})
        return table



def _repair_tail(fd: int) -> None:
    """Cut off a torn last line (a writer died mid-write); keep every complete record."""
    size = os.fstat(fd).st_size
    if size == 0:
        return
    if os.pread(fd, 1, size - 1) == b"\n":
        return
    # Walk back to the last newline; a torn record is at most MAX_RECORD_BYTES long.
    block = 65536
    end = size
    cut = 0
    while end > 0:
        start = max(0, end - block)
        chunk = os.pread(fd, end - start, start)
        i = chunk.rfind(b"\n")
        if i >= 0:
            cut = start + i + 1
            break
        end = start
        if size - end > 2 * MAX_RECORD_BYTES:
            # A line this long is no record of ours; keep it and isolate it instead of deleting it.
            os.write(fd, b"\n")
            return
    tail = os.pread(fd, size - cut, cut)
    try:
        complete = isinstance(json.loads(tail), dict)
    except ValueError:
        complete = False
    if complete:
        os.write(fd, b"\n")  # the record was whole; only its newline was missing
    else:
        os.ftruncate(fd, cut)




def load(path: str | os.PathLike[str]) -> TrialTable:
    """The trial table of the logbook at ``path`` (``forebear.load``); ``.best()`` is the best trial.

    Raises
    ------
    LogbookError
        When the file is missing or unreadable.
    LogbookMismatch
        When it is not a forebear logbook, or of a newer format.
    """
    p = Path(path)
    if not p.exists():
        msg = f"logbook {p}: no such file"
        raise LogbookError(2, msg)
    table = Logbook(p).fold()
    check_header(table, p)
    return table
