"""Locks on a logbook: the writers' lock and the controller's exclusive right to drive it.

Writers take ``<logbook>.lock`` around each append (one lock object per path
per process); one controller at a time holds ``<logbook>.controller.lock``
and names itself in ``<logbook>.controller``.
"""

from __future__ import annotations

import json
import os
import socket
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import filelock

from forebear.records.files import ensure_folder

if TYPE_CHECKING:
    from forebear.records.logbook import Logbook


class LogbookBusy(RuntimeError):
    """Another controller drives this logbook."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


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
        from forebear.records.logbook import LogbookError  # the logbook module imports this one

        ensure_folder(self.logbook.path.parent)
        # A soft lease left by a stalled holder, or by one that died on another host, is known to
        # be stale only once it has been seen unchanged for its whole lifetime (SoftFileLease
        # measures that on the contender's clock), so wait that long; a live holder keeps
        # refreshing it and the wait ends in LogbookBusy.
        wait = 1.5 * self.logbook.lifetime if self.logbook.lock_mode == "soft" else 0
        try:
            self._lock.acquire(timeout=wait)
        except filelock.Timeout:
            problem = self._cannot_create()
            if problem:
                raise LogbookError(problem) from None
            raise LogbookBusy(self.holder_message()) from None
        except OSError as exc:
            msg = f"logbook {self.logbook.path}: cannot create its lock file {self._lock.lock_file}: {exc.strerror or exc}"
            raise LogbookError(exc.errno or 0, msg) from None
        info = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()}
        try:
            fd = os.open(self.info_path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                os.write(fd, json.dumps(info).encode())
            finally:
                os.close(fd)
        except OSError as exc:
            self._lock.release(force=True)
            msg = f"logbook {self.logbook.path}: cannot write {self.info_path}: {exc.strerror or exc}"
            raise LogbookError(exc.errno or 0, msg) from None

    def _cannot_create(self) -> str | None:
        """Why the lock file cannot be created, when that (not a live holder) is why the lock was refused."""
        lock_file = Path(self._lock.lock_file)
        if lock_file.exists():
            return None if lock_file.is_file() else f"logbook {self.logbook.path}: its lock file {lock_file} is not a regular file"
        folder = lock_file.parent
        if not os.access(folder, os.W_OK | os.X_OK):
            return f"logbook {self.logbook.path}: cannot create its lock file {lock_file}: the folder {folder} is not writable"
        return None

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
