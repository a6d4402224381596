"""What an attempt prints: captured with a cap by the fork server, read back by the runner.

The attempt's stdout and stderr reach the fork server through pipes, and a
:class:`Capture` per file keeps the first :data:`CAPTURE_HEAD` bytes and the
last :data:`CAPTURE_TAIL` bytes, with one line between them that says how many
bytes were cut: an attempt that prints 50 MB keeps about 1 MiB per file. The
helpers below read those files back (tails for errors, the log for the
controller) without loading them whole. Standard library only: the attempt
process loads this module as a file.
"""

from __future__ import annotations

import os
from pathlib import Path

CAPTURE_HEAD = 256 * 1024  # bytes kept from the start of each captured file (the setup, the first error)
CAPTURE_TAIL = 768 * 1024  # bytes kept from the end (the score line is read from the last 64 KiB)
LOG_TAIL_LINES = 20
LOG_RETURN_BYTES = 1 << 20  # the log returned to the controller without a shared filesystem


def tail(path: Path, lines: int = LOG_TAIL_LINES, max_bytes: int = 8192) -> str:
    """The last ``lines`` lines of a file (decoded leniently), or '' when it is missing."""
    try:
        with open(path, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            size = fh.tell()
            fh.seek(max(0, size - max_bytes))
            data = fh.read()
    except OSError:
        return ""
    text = data.decode("utf-8", errors="replace")
    return "\n".join(text.splitlines()[-lines:])


def read_log(log: Path, out: Path | None) -> str:
    parts = []
    for p in (out, log):
        if p is None:
            continue
        try:
            size = p.stat().st_size
            with open(p, "rb") as fh:
                fh.seek(max(0, size - LOG_RETURN_BYTES))
                text = fh.read().decode("utf-8", errors="replace")
        except OSError:
            continue
        if out is not None:
            parts.append(f"--- {'stdout' if p == out else 'stderr'} ---\n{text}")
        else:
            parts.append(text)
    return "\n".join(parts)


def with_tail(reason: str, log: Path, out: Path | None) -> str:
    lines = tail(log)
    if out is not None:
        so = tail(out, lines=5)
        if so:
            lines = (lines + "\n" if lines else "") + "stdout: " + so.replace("\n", "\nstdout: ")
    return f"{reason}\n--- last lines of the log ---\n{lines}" if lines else reason


def read_text(path: Path | None) -> str:
    if path is None:
        return ""
    try:
        with open(path, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            size = fh.tell()
            fh.seek(max(0, size - 65536))  # the score is on the last line; 10 MB of stdout is not read whole
            return fh.read().decode("utf-8", errors="replace")
    except OSError:
        return ""


class Capture:
    """One captured file (``path``, created 0600): the head as it comes, the tail kept in memory until :meth:`close`."""

    def __init__(self, path: str) -> None:
        self.fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        self.head_left = CAPTURE_HEAD
        self.tail = bytearray()
        self.cut = 0

    def feed(self, data: bytes) -> None:
        if self.head_left > 0:
            n = min(len(data), self.head_left)
            _write_all(self.fd, data[:n])
            self.head_left -= n
            data = data[n:]
        if data:
            self.tail += data
            extra = len(self.tail) - CAPTURE_TAIL
            if extra > 0:
                self.cut += extra
                del self.tail[:extra]

    def close(self) -> None:
        try:
            if self.cut:
                note = (f"\n[forebear: {self.cut} bytes of output cut here; the first {CAPTURE_HEAD} "
                        f"and the last {CAPTURE_TAIL} bytes are kept]\n")
                _write_all(self.fd, note.encode())
            _write_all(self.fd, bytes(self.tail))
        finally:
            os.close(self.fd)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]
