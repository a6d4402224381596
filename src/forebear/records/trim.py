"""Keeping every record writable: what an objective returns can never make a record too large.

A logbook line is at most ``MAX_RECORD_BYTES``. :func:`fit` keeps a record
under :data:`FIT_BYTES` (well below that) before it is written, by the worker
or by the controller alike (:func:`forebear.records.logbook.record` and the
encoder both call it):

1. the largest metrics are dropped first, one by one, until the record fits;
   the score is its own field and is never touched, and each dropped metric is
   named in the record's ``dropped`` field with its size;
2. then any text field over :data:`TEXT_KEEP` characters (an error with a huge
   message) keeps its head and tail with a marker that says how much was cut.

A record that still does not fit (a ``proposed`` record of a space of
thousands of long category names) is left as it is; the encoder then refuses it.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

FIT_BYTES = 256 * 1024  # a record this size writes in one os.write and folds quickly; 1/4 of the hard limit
TEXT_KEEP = 16 * 1024  # characters of a trimmed text field kept (half head, half tail)
DROPPED_NAMES = 50  # metrics named one by one in ``dropped``; beyond that a count


def size(value: Any) -> int:
    """Bytes of ``value`` as the logbook encodes it (compact JSON, UTF-8)."""
    return len(json.dumps(value, separators=(",", ":"), default=str).encode("utf-8"))


def fit(rec: Mapping[str, Any], limit: int = FIT_BYTES) -> dict[str, Any]:
    """``rec`` itself when it fits in ``limit`` bytes, else a trimmed copy (see the module docstring)."""
    out = dict(rec)
    total = size(out)
    if total <= limit:
        return out
    metrics = out.get("metrics")
    if isinstance(metrics, Mapping) and metrics:
        out["metrics"], dropped = _drop_largest(metrics, total - limit)
        if dropped:
            out["dropped"] = {**(out.get("dropped") or {}), **dropped}
        total = size(out)
    if total > limit:
        for key, value in list(out.items()):
            if isinstance(value, str) and len(value) > TEXT_KEEP:
                out[key] = cut_text(value, TEXT_KEEP)
    return out


def _drop_largest(metrics: Mapping[str, Any], excess: int) -> tuple[dict[str, Any], dict[str, str]]:
    sizes = sorted(((size({k: v}), k) for k, v in metrics.items()), reverse=True)
    drop: list[tuple[int, str]] = []
    freed = 0
    for n, k in sizes:
        if freed > excess + 2048:  # room for the ``dropped`` field itself
            break
        drop.append((n, k))
        freed += n
    gone = {k for _, k in drop}
    kept = {k: v for k, v in metrics.items() if k not in gone}
    named = {k[:200]: f"{n} bytes; dropped to keep the record under {FIT_BYTES // 1024} KiB" for n, k in drop[:DROPPED_NAMES]}
    if len(drop) > DROPPED_NAMES:
        rest = len(drop) - DROPPED_NAMES
        named["..."] = f"{rest} more metric(s) dropped, {sum(n for n, _ in drop[DROPPED_NAMES:])} bytes"
    return kept, named


def cut_text(text: str, keep: int) -> str:
    """The head and the tail of ``text`` (``keep`` characters in all) with a marker of what was cut."""
    if len(text) <= keep:
        return text
    half = keep // 2
    return f"{text[:half]}\n[... {len(text) - 2 * half} characters cut ...]\n{text[-half:]}"
