"""The logbook's line format: one JSON record a line, with a format version.

Building a record (:func:`record`), encoding it to the bytes of one line
(:func:`encode`), parsing a logbook's bytes back (:func:`parse`), finding the
lines that are no record (:func:`bad_lines`), and the checks that a file is a
forebear logbook of a format this version reads (:func:`check_header`,
:func:`is_logbook`). The file, its lock and its writes are
:mod:`forebear.records.logbook`, which re-exports these names.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from forebear.records.files import open_fd
from forebear.records.table import KINDS, TrialTable, _gc_paused
from forebear.records.trim import FIT_BYTES, fit

VERSION = 1
MAX_RECORD_BYTES = 1 << 20  # one record; error tails and metrics are trimmed well below this


class LogbookMismatch(ValueError):
    """The logbook belongs to another search, or to a newer format."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


def record(kind: str, **fields: Any) -> dict[str, Any]:
    """A logbook record of ``kind`` with the common fields filled in.

    Records that carry an objective's output (``scored``, ``failed``) are fitted
    to :data:`forebear.records.trim.FIT_BYTES` here, where they are built, so that
    what the worker returns to the controller is already the record to write.
    """
    if kind not in KINDS:
        msg = f"record kind must be one of {KINDS}, got {kind!r}"
        raise ValueError(msg)
    rec = {"v": VERSION, "at": round(time.time(), 6), "kind": kind, **fields}
    return fit(rec) if kind in ("scored", "failed") else rec


def encode(rec: Mapping[str, Any]) -> bytes:
    data = _dump(rec)
    if len(data) > FIT_BYTES:
        data = _dump(fit(rec))  # a record built without record(): trimmed here, by the same rule
    if len(data) > MAX_RECORD_BYTES:
        msg = f"logbook record of {len(data)} bytes exceeds {MAX_RECORD_BYTES}"
        raise ValueError(msg)
    return data


def _dump(rec: Mapping[str, Any]) -> bytes:
    line = json.dumps(rec, separators=(",", ":"), allow_nan=False, default=_jsonable)
    return (line + "\n").encode("utf-8")


def _jsonable(value: Any) -> Any:
    # numpy scalars reach the logbook from the surrogate and from user objectives.
    if hasattr(value, "item"):
        return value.item()
    if hasattr(value, "tolist"):
        return value.tolist()
    msg = f"{type(value).__name__} is not JSON serialisable"
    raise TypeError(msg)


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


def holds(data: bytes, kinds: tuple[str, ...], key: tuple[Any, Any]) -> bool:
    """True when ``data`` (whole lines of a logbook) holds a record of ``kinds`` for (trial, attempt) ``key``."""
    needles = [f'"{k}"'.encode() for k in kinds]
    if not any(n in data for n in needles):
        return False
    for line in data.split(b"\n"):
        if not any(n in line for n in needles):
            continue
        try:
            rec = json.loads(line)
        except ValueError:
            continue
        if isinstance(rec, dict) and rec.get("kind") in kinds and (rec.get("trial"), rec.get("attempt")) == key:
            return True
    return False


def bad_lines(data: bytes, invalid: set[int]) -> list[int]:
    """Line numbers (from 1) of lines that do not parse as records, and of records numbered in ``invalid``."""
    out: list[int] = []
    number = 0
    for i, line in enumerate(data.split(b"\n"), 1):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except ValueError:
            out.append(i)
            continue
        if not (isinstance(rec, dict) and "kind" in rec):
            out.append(i)
            continue
        number += 1
        if number in invalid:
            out.append(i)
    return out


def check_header(table: TrialTable, path: Path, spec_hash: str | None = None) -> None:
    """Refuse a logbook of a newer format, or of another search when ``spec_hash`` is given."""
    if table.header is None:
        if table.trials:
            msg = f"logbook {path}: has trial records but no search record; not a forebear logbook"
            raise LogbookMismatch(msg)
        return
    v = table.header.get("v")
    problem = _version_problem(v)
    if problem:
        raise LogbookMismatch(f"logbook {path}: {problem}")
    if spec_hash is not None and table.header.get("spec_hash") != spec_hash:
        msg = f"logbook {path}: belongs to another search (spec hash {table.header.get('spec_hash')}, this spec {spec_hash})"
        raise LogbookMismatch(msg)


def _version_problem(v: Any) -> str | None:
    """What is wrong with a search record's format version ``v``, or None when this forebear reads it."""
    if v is None:
        return "the search record has no format version (v); not written by forebear, or edited by hand"
    if not isinstance(v, int) or isinstance(v, bool):
        return f"format version {v!r} is not a whole number; not written by forebear, or edited by hand"
    if v < 1:
        return f"format version {v} was never written by forebear (versions start at 1)"
    if v > VERSION:
        return f"format version {v} is newer than this forebear reads ({VERSION}); upgrade forebear"
    return None


def is_logbook(path: str | os.PathLike[str]) -> bool:
    """True when ``path`` is a regular file whose first record is a forebear logbook record."""
    try:
        fd = open_fd(path, os.O_RDONLY, what="logbook")
    except OSError:
        return False
    try:
        head = os.read(fd, 65536)
    finally:
        os.close(fd)
    first = next((line for line in head.split(b"\n") if line.strip()), b"")
    try:
        rec = json.loads(first)
    except ValueError:
        return False
    return isinstance(rec, dict) and rec.get("kind") in KINDS and "v" in rec
