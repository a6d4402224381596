"""The logbook: an append-only, file-locked event log of one search.

One JSON object per line. Every record has ``v`` (format version), ``at``
(unix seconds) and ``kind``; the kinds and their fields are in
``docs/architecture.md`` (record table) and ``docs/spec.md``. Writers take a lock on
``<logbook>.lock``, open the file after locking, cut off a torn last line left
by a writer that died mid-write, write the record with one ``os.write``,
``fsync`` and release. Readers take no lock: they skip lines that do not
parse and count them. :func:`fold` turns records into a trial table.
"""

from __future__ import annotations

import contextlib
import gc
import json
import math
import os
import socket
import threading
import time
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import filelock

VERSION = 1
KINDS = ("search", "proposed", "started", "scored", "failed", "lost", "closed")
STATES = ("queued", "running", "scored", "failed")
TERMINAL = ("scored", "failed")
MAX_RECORD_BYTES = 1 << 20  # one record; error tails and metrics are trimmed well below this


class LogbookError(OSError):
    """A logbook that cannot be read or written (names the file)."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


class LogbookBusy(RuntimeError):
    """Another controller drives this logbook."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


class LogbookMismatch(ValueError):
    """The logbook belongs to another search, or to a newer format."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


# --------------------------------------------------------------------------
# locks: one lock object per path per process


_LOCKS: dict[tuple[str, str], filelock.BaseFileLock] = {}
_LOCKS_GUARD = threading.Lock()


def _lock_for(path: Path, mode: str, lifetime: float) -> filelock.BaseFileLock:
    key = (str(path.resolve()), mode)
    with _LOCKS_GUARD:
        lock = _LOCKS.get(key)
        if lock is None:
            lock_path = str(path) + ".lock"
            if mode == "soft":
                lock = _soft_lock(lock_path, lifetime)
            else:
                # thread_local=False: the controller's threads share one lock object, guarded below.
                lock = filelock.FileLock(lock_path, thread_local=False, mode=0o600)
            _LOCKS[key] = lock
        return lock


def _soft_lock(lock_path: str, lifetime: float) -> filelock.BaseFileLock:
    """A marker-file lock for filesystems whose ``flock`` is unreliable (some NFS setups).

    filelock's ``SoftFileLease`` is its soft lock with a lifetime that the holder keeps
    renewing (a heartbeat), so a long-lived controller keeps its claim while a claim
    left by a dead process expires after ``lifetime`` seconds. The plain
    ``SoftFileLock(lifetime=...)`` expires by age alone and could hand a live
    controller's logbook to a second one.
    """
    return filelock.SoftFileLease(lock_path, lease_duration=lifetime, thread_local=False, mode=0o600)


def ensure_folder(folder: Path) -> None:
    """Create ``folder`` (and parents) with mode 0700 where it does not exist."""
    if not folder.exists():
        os.makedirs(folder, mode=0o700, exist_ok=True)


# --------------------------------------------------------------------------
# records


def record(kind: str, **fields: Any) -> dict[str, Any]:
    """A logbook record of ``kind`` with the common fields filled in."""
    if kind not in KINDS:
        msg = f"record kind must be one of {KINDS}, got {kind!r}"
        raise ValueError(msg)
    return {"v": VERSION, "at": round(time.time(), 6), "kind": kind, **fields}


def _encode(rec: Mapping[str, Any]) -> bytes:
    line = json.dumps(rec, separators=(",", ":"), allow_nan=False, default=_jsonable)
    data = (line + "\n").encode("utf-8")
    if len(data) > MAX_RECORD_BYTES:
        msg = f"logbook record of {len(data)} bytes exceeds {MAX_RECORD_BYTES}"
        raise ValueError(msg)
    return data


def _jsonable(value: Any) -> Any:
    # numpy scalars reach the logbook from the surrogate and from user objectives.
    if hasattr(value, "item"):
        return value.item()
    if hasattr(value, "tolist"):
        return value.tolist()
    msg = f"{type(value).__name__} is not JSON serialisable"
    raise TypeError(msg)


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

    def append(self, rec: Mapping[str, Any]) -> None:
        """Append one record durably (lock, repair a torn tail, write, fsync)."""
        self.append_many([rec])

    def append_many(self, recs: Iterable[Mapping[str, Any]]) -> None:
        """Append records under one lock hold; each is one ``os.write``."""
        payloads = [_encode(r) for r in recs]
        if not payloads:
            return
        ensure_folder(self.path.parent)
        fd = -1
        try:
            with self._thread_guard, self.lock.acquire(timeout=120):
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_APPEND, 0o600)
                _repair_tail(fd)
                for data in payloads:
                    view = memoryview(data)
                    while view:
                        # A short write on a regular file only happens on a full disk; loop until
                        # it completes or raises (ENOSPC), never leave half a record silently.
                        n = os.write(fd, view)
                        view = view[n:]
            # fsync after the lock is released: the record is already in place, and concurrent
            # writers' fsyncs overlap (group commit) instead of queueing behind the lock. The
            # append still returns only once its record is durable.
            os.fsync(fd)
        except filelock.Timeout:
            msg = f"logbook {self.path}: could not take its lock {self.lock.lock_file} within 120 s"
            raise LogbookError(msg) from None
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
        try:
            with open(self.path, "rb") as fh:
                data = fh.read()
        except FileNotFoundError:
            return [], 0
        except OSError as exc:
            msg = f"logbook {self.path}: cannot read: {exc.strerror or exc}"
            raise LogbookError(exc.errno or 0, msg) from exc
        return parse(data)

    def records(self) -> list[dict[str, Any]]:
        return self.read()[0]

    def fold(self) -> TrialTable:
        recs, skipped = self.read()
        table = fold(recs)
        table.skipped = skipped
        return table


@contextlib.contextmanager
def _gc_paused() -> Iterator[None]:
    """Pause the cyclic garbage collector while building many acyclic objects.

    Parsing and folding 10^5 records allocates millions of containers, which
    triggers repeated full collections that find nothing to free (records hold
    no reference cycles); pausing it halves the time of a large fold.
    """
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


def parse(data: bytes) -> tuple[list[dict[str, Any]], int]:
    """Parse logbook bytes; returns records and the count of unparseable lines."""
    with _gc_paused():
        return _parse(data)


def _parse(data: bytes) -> tuple[list[dict[str, Any]], int]:
    out: list[dict[str, Any]] = []
    skipped = 0
    loads = json.loads
    lines = [line for line in data.split(b"\n") if line.strip()]
    try:
        # Fast path: a healthy logbook parses as one JSON array, twice as fast as line by line.
        whole = loads(b"[" + b",".join(lines) + b"]")
    except ValueError:
        whole = None
    if whole is not None and len(whole) == len(lines) and all(isinstance(r, dict) and "kind" in r for r in whole):
        return whole, 0
    for line in lines:
        try:
            rec = loads(line)
        except ValueError:  # JSONDecodeError and UnicodeDecodeError both derive from it
            skipped += 1
            continue
        if isinstance(rec, dict) and "kind" in rec:
            out.append(rec)
        else:
            skipped += 1
    return out, skipped


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


# --------------------------------------------------------------------------
# the fold


@dataclass
class Attempt:
    """One execution of a trial on a worker."""

    attempt: int
    worker: str | None = None
    host: str | None = None
    pid: int | None = None
    started_at: float | None = None
    ended_at: float | None = None
    outcome: str = "running"  # running, scored, failed, lost
    detail: str | None = None


@dataclass
class Trial:
    """A trial folded from its records."""

    trial: int
    config: dict[str, Any]
    round: int = 0
    source: str = "initial"
    model: str | None = None
    acquisition: float | None = None
    state: str = "queued"
    score: float | None = None
    metrics: dict[str, Any] = field(default_factory=dict)
    seconds: float | None = None
    error: str | None = None
    retryable: bool = False
    proposed_at: float | None = None
    started_at: float | None = None
    finished_at: float | None = None
    attempts: list[Attempt] = field(default_factory=list)

    @property
    def terminal(self) -> bool:
        return self.state in TERMINAL

    @property
    def last_attempt(self) -> int:
        return self.attempts[-1].attempt if self.attempts else 0

    def to_dict(self) -> dict[str, Any]:
        return {
            "trial": self.trial,
            "state": self.state,
            "config": self.config,
            "score": self.score,
            "metrics": self.metrics,
            "seconds": self.seconds,
            "round": self.round,
            "source": self.source,
            "model": self.model,
            "attempts": len(self.attempts),
            "error": self.error,
        }


@dataclass
class TrialTable:
    """The state of a search folded from its logbook."""

    trials: dict[int, Trial] = field(default_factory=dict)
    header: dict[str, Any] | None = None
    closed: dict[str, Any] | None = None
    skipped: int = 0
    unknown: int = 0
    duplicates: int = 0
    first_at: float | None = None
    last_at: float | None = None

    @property
    def sense(self) -> str:
        obj = (self.header or {}).get("objective") or {}
        return "maximize" if "maximize" in obj else "minimize"

    @property
    def metric(self) -> str | None:
        obj = (self.header or {}).get("objective") or {}
        return obj.get(self.sense)

    def by_state(self, state: str) -> list[Trial]:
        return [t for t in self.trials.values() if t.state == state]

    def counts(self) -> dict[str, int]:
        out = dict.fromkeys(STATES, 0)
        for t in self.trials.values():
            out[t.state] += 1
        return out

    @property
    def finished(self) -> int:
        return sum(1 for t in self.trials.values() if t.terminal)

    def scored(self) -> list[Trial]:
        return [t for t in self.trials.values() if t.state == "scored"]

    def best(self) -> Trial | None:
        """The best scored trial in the search's sense (lowest trial id on ties)."""
        scored = self.scored()
        if not scored:
            return None
        sign = -1.0 if self.sense == "maximize" else 1.0
        return min(scored, key=lambda t: (sign * float(t.score), t.trial))  # type: ignore[arg-type]

    def ranked(self) -> list[Trial]:
        sign = -1.0 if self.sense == "maximize" else 1.0
        return sorted(self.scored(), key=lambda t: (sign * float(t.score), t.trial))  # type: ignore[arg-type]

    def __iter__(self) -> Iterator[Trial]:
        return iter(sorted(self.trials.values(), key=lambda t: t.trial))

    def __len__(self) -> int:
        return len(self.trials)


def fold(records: Iterable[Mapping[str, Any]]) -> TrialTable:
    """Fold records into a :class:`TrialTable`. The first ``scored`` of a trial wins."""
    with _gc_paused():
        return _fold(records)


def _fold(records: Iterable[Mapping[str, Any]]) -> TrialTable:
    table = TrialTable()
    trials = table.trials
    for rec in records:
        kind = rec.get("kind")
        at = rec.get("at")
        if isinstance(at, (int, float)):
            if table.first_at is None:
                table.first_at = at
            table.last_at = at
        if kind == "search":
            if table.header is None:
                table.header = dict(rec)
            continue
        if kind == "closed":
            table.closed = dict(rec)
            continue
        tid = rec.get("trial")
        if kind not in KINDS or not isinstance(tid, int):
            table.unknown += 1
            continue
        if kind == "proposed":
            if tid in trials:
                table.duplicates += 1
                continue
            trials[tid] = Trial(
                trial=tid,
                config=dict(rec.get("config") or {}),
                round=int(rec.get("round") or 0),
                source=str(rec.get("source") or "initial"),
                model=rec.get("model"),
                acquisition=rec.get("acquisition"),
                proposed_at=at,
            )
            continue
        t = trials.get(tid)
        if t is None:
            table.unknown += 1
            continue
        attempt_no = int(rec.get("attempt") or 1)
        att = _attempt(t, attempt_no)
        if kind == "started":
            att.worker, att.host, att.pid = rec.get("worker"), rec.get("host"), rec.get("pid")
            att.started_at = at
            if t.started_at is None:
                t.started_at = at
            if not t.terminal:
                t.state = "running"
        elif kind == "scored":
            if t.state == "scored":
                table.duplicates += 1
                continue
            att.outcome, att.ended_at = "scored", at
            t.state = "scored"
            t.score = rec.get("score")
            t.metrics = dict(rec.get("metrics") or {})
            t.seconds = rec.get("seconds")
            t.finished_at = at
            t.error = None
        elif kind == "failed":
            if att.outcome == "running":
                att.outcome, att.ended_at, att.detail = "failed", at, rec.get("error")
            if t.state == "scored":
                continue
            t.error = rec.get("error")
            t.retryable = bool(rec.get("retryable"))
            if t.retryable:
                t.state = "queued"
            else:
                t.state = "failed"
                t.finished_at = at
        elif kind == "lost":
            if att.outcome == "running":
                att.outcome, att.ended_at, att.detail = "lost", at, rec.get("reason")
            if not t.terminal:
                t.state = "queued"
                t.error = f"attempt {attempt_no} lost ({rec.get('reason')})"
    return table


def _attempt(t: Trial, n: int) -> Attempt:
    for a in t.attempts:
        if a.attempt == n:
            return a
    a = Attempt(attempt=n)
    t.attempts.append(a)
    return a


# --------------------------------------------------------------------------
# the controller lock


class ControllerLock:
    """Exclusive right to drive a logbook: ``<logbook>.controller`` with pid, host and time.

    A second controller gets :class:`LogbookBusy` naming the holder. The lock
    is a ``FileLock`` (released by the OS when the holder dies), or a
    ``SoftFileLock`` with a lifetime for ``lock: soft``.
    """

    def __init__(self, logbook: Logbook) -> None:
        self.logbook = logbook
        self.info_path = Path(str(logbook.path) + ".controller")
        lock_path = str(logbook.path) + ".controller.lock"
        if logbook.lock_mode == "soft":
            self._lock: filelock.BaseFileLock = _soft_lock(lock_path, logbook.lifetime)
        else:
            self._lock = filelock.FileLock(lock_path, thread_local=False, mode=0o600)

    def acquire(self) -> None:
        ensure_folder(self.logbook.path.parent)
        try:
            self._lock.acquire(timeout=0)
        except filelock.Timeout:
            raise LogbookBusy(self.holder_message()) from None
        info = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()}
        fd = os.open(self.info_path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            os.write(fd, json.dumps(info).encode())
        finally:
            os.close(fd)

    def holder_message(self) -> str:
        try:
            info = json.loads(self.info_path.read_text())
            since = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(float(info["since"])))
            return f"logbook {self.logbook.path} is driven by pid {info['pid']} on host {info['host']} since {since}"
        except (OSError, ValueError, KeyError, TypeError):
            return f"logbook {self.logbook.path} is driven by another controller"

    def release(self) -> None:
        try:
            self.info_path.unlink(missing_ok=True)
        finally:
            self._lock.release(force=True)

    def __enter__(self) -> ControllerLock:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def check_header(table: TrialTable, path: Path, spec_hash: str | None = None) -> None:
    """Refuse a logbook of a newer format, or of another search when ``spec_hash`` is given."""
    if table.header is None:
        if table.trials:
            msg = f"logbook {path}: has trial records but no search record; not a forebear logbook"
            raise LogbookMismatch(msg)
        return
    v = table.header.get("v")
    if not isinstance(v, int) or v > VERSION:
        msg = f"logbook {path}: format version {v!r} is newer than this forebear reads ({VERSION}); upgrade forebear"
        raise LogbookMismatch(msg)
    if spec_hash is not None and table.header.get("spec_hash") != spec_hash:
        msg = f"logbook {path}: belongs to another search (spec hash {table.header.get('spec_hash')}, this spec {spec_hash})"
        raise LogbookMismatch(msg)


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
    if not p.is_file():
        msg = f"logbook {p}: no such file"
        raise LogbookError(2, msg)
    table = Logbook(p).fold()
    check_header(table, p)
    return table


def finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)
