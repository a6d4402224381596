"""Plain values in a spec: sizes, durations, whole numbers, paths, and the checks every section shares.

Each check reports through the :class:`~forebear.core._yaml.Doc` it is given, so
that one :class:`~forebear.core.spec.SpecError` can list every problem with its
key path and line.
"""

from __future__ import annotations

import difflib
import math
import os
import re
from collections.abc import Mapping
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from forebear.core._yaml import Doc


def _defaults() -> dict[str, Any]:
    text = resources.files("forebear.core").joinpath("defaults.yaml").read_text()
    return yaml.safe_load(text)["forebear"]


DEFAULTS: dict[str, Any] = _defaults()

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([smh]?)\s*$")
# Keys of earlier forebear versions: the error names the key that replaced them.
_RENAMED = {"journal": "logbook"}


def check_keys(doc: Doc, path: tuple[str, ...], data: Mapping[str, Any], allowed: tuple[str, ...]) -> None:
    """Report every key of ``data`` not in ``allowed``, with the nearest valid key or the renamed one."""
    for key in data:
        if key in _RENAMED and _RENAMED[key] in allowed:
            doc.error((*path, key), f"renamed: the key is now {_RENAMED[key]!r} (same value)")
        elif key not in allowed:
            near = difflib.get_close_matches(key, allowed, n=1, cutoff=0.5)
            hint = f"; did you mean {near[0]!r}?" if near else f"; valid keys: {', '.join(allowed)}"
            doc.error((*path, key), f"unknown key{hint}")


def is_number(v: Any) -> bool:
    """True for an int or float that is not a boolean."""
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def want_mapping(doc: Doc, path: tuple[str, ...], v: Any) -> bool:
    """True when ``v`` is a mapping; otherwise report it at ``path``."""
    if isinstance(v, dict):
        return True
    doc.error(path, f"must be a mapping, got {describe(v)}")
    return False


def describe(v: Any) -> str:
    """A value as an error message names it: ``nothing``, ``a list``, ``a string ('x')``."""
    if v is None:
        return "nothing"
    if isinstance(v, bool):
        return f"a boolean ({v})"
    if isinstance(v, str):
        return f"a string ({v!r})"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, dict):
        return "a mapping"
    return f"{type(v).__name__} ({v!r})"


_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kmgt]i?b|b)?\s*$", re.IGNORECASE)
_UNITS = {"b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12, "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}


def memory_bytes(value: Any) -> int:
    """Bytes from ``400MB``, ``4GiB`` or a whole number of bytes (Dask's units: kB = 1000, KiB = 1024)."""
    if is_number(value) and float(value).is_integer() and value > 0:
        return int(value)
    m = _SIZE.match(value) if isinstance(value, str) else None
    if m:
        n = int(float(m.group(1)) * _UNITS[(m.group(2) or "b").lower()])
        if n > 0:
            return n
    msg = f"must be a memory size such as 400MB or 4GiB (or a whole number of bytes), got {value!r}"
    raise ValueError(msg)


def parse_duration(value: Any) -> float:
    """Seconds from ``90``, ``"90s"``, ``"20m"`` or ``"6h"``; ``ValueError`` otherwise."""
    if is_number(value):
        if not math.isfinite(value):
            msg = f"duration must be a finite number of seconds, got {value}; leave the key out for no limit"
            raise ValueError(msg)
        if value <= 0:
            msg = f"duration must be > 0, got {value}"
            raise ValueError(msg)
        return float(value)
    if isinstance(value, str):
        m = _DURATION.match(value)
        if m:
            seconds = float(m.group(1)) * {"": 1, "s": 1, "m": 60, "h": 3600}[m.group(2)]
            if seconds <= 0:
                msg = f"duration must be > 0, got {value!r}"
                raise ValueError(msg)
            return seconds
    msg = f"malformed duration {value!r}; write a number with an s, m or h suffix, e.g. 90s, 20m, 6h"
    raise ValueError(msg)


def int_field(doc: Doc, path: tuple[str, ...], v: Any, minimum: int) -> int | None:
    """``v`` as a whole number >= ``minimum``, or ``None`` after reporting why not."""
    if isinstance(v, float) and v.is_integer():
        v = int(v)
    if not isinstance(v, int) or isinstance(v, bool):
        doc.error(path, f"must be a whole number, got {describe(v)}")
        return None
    if v < minimum:
        doc.error(path, f"must be >= {minimum}, got {v}" if minimum != 1 else f"must be > 0, got {v}")
        return None
    return v


def resolve(base: Path, p: str) -> Path:
    """``p`` with ``~`` expanded, relative to ``base`` unless absolute."""
    q = Path(os.path.expanduser(p))
    return q if q.is_absolute() else base / q
