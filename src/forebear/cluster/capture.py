"""What an attempt printed, as the runner reads it back: tails for errors, the log for the controller.

The fork server caps what it captures per attempt (:data:`forebear.cluster.child.CAPTURE_HEAD`
and ``CAPTURE_TAIL``: the head and the tail are kept and a line in between says how
many bytes were cut); these helpers read those files without loading them whole.
"""

from __future__ import annotations

import os
from pathlib import Path

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
