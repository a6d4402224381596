"""Files forebear reads and writes beside a logbook: private folders, regular files only, atomic writes.

Every logbook, spec and history table is opened through :func:`open_regular`,
which refuses a FIFO, a socket or a device at once instead of blocking on it
(a FIFO with no writer makes a plain ``open`` or ``read`` wait forever).
Files forebear writes whole (an export) go through :func:`write_atomic`: a
temporary file in the same folder, fsync, then a rename over the target, so
a crash leaves either the old file or the new one, never half of it.
"""

from __future__ import annotations

import contextlib
import os
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import IO

_KINDS = (
    (stat.S_ISDIR, "a folder"),
    (stat.S_ISFIFO, "a FIFO (named pipe)"),
    (stat.S_ISSOCK, "a socket"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
)


class NotRegularFile(OSError):
    """A path that names something other than a regular file (the message says what)."""

    def __reduce__(self) -> tuple[object, ...]:
        return (self.__class__, self.args)


def ensure_folder(folder: Path) -> None:
    """Create ``folder`` (and parents) with mode 0700 where it does not exist."""
    if not folder.exists():
        os.makedirs(folder, mode=0o700, exist_ok=True)


def what_is(mode: int) -> str | None:
    """None for a regular file, else what the mode says it is ("a FIFO (named pipe)", ...)."""
    if stat.S_ISREG(mode):
        return None
    return next((name for test, name in _KINDS if test(mode)), "not a regular file")


def check_regular(path: str | os.PathLike[str], what: str = "file") -> None:
    """Raise :class:`NotRegularFile` when ``path`` exists and is not a regular file (symlinks followed)."""
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return
    kind = what_is(mode)
    if kind is not None:
        msg = f"{what} {path} is {kind}, not a regular file"
        raise NotRegularFile(21 if stat.S_ISDIR(mode) else 22, msg)


def open_fd(path: str | os.PathLike[str], flags: int, mode: int = 0o600, what: str = "file") -> int:
    """``os.open`` that never blocks on a FIFO and refuses anything but a regular file."""
    fd = os.open(path, flags | os.O_NONBLOCK, mode)
    try:
        kind = what_is(os.fstat(fd).st_mode)
        if kind is not None:
            msg = f"{what} {path} is {kind}, not a regular file"
            raise NotRegularFile(22, msg)
        os.set_blocking(fd, True)
    except BaseException:
        os.close(fd)
        raise
    return fd


def read_regular(path: str | os.PathLike[str], what: str = "file") -> bytes:
    """The whole contents of a regular file (see :func:`open_fd`)."""
    fd = open_fd(path, os.O_RDONLY, what=what)
    with os.fdopen(fd, "rb") as fh:
        return fh.read()


def open_regular(path: str | os.PathLike[str], what: str = "file", **kwargs: object) -> IO[str]:
    """A text file object for reading a regular file; ``kwargs`` go to :func:`open` (newline, encoding)."""
    fd = open_fd(path, os.O_RDONLY, what=what)
    return open(fd, **kwargs)  # type: ignore[call-overload,no-any-return]


def write_atomic(path: str | os.PathLike[str], write: Callable[[IO[str]], None], mode: int = 0o600, **kwargs: object) -> None:
    """Write a text file whole: ``write(fh)`` fills a temporary file beside ``path``, which then replaces it."""
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{target.name}.", suffix=".tmp")
    try:
        os.fchmod(fd, mode)
        with open(fd, "w", **kwargs) as fh:  # type: ignore[call-overload]
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise

