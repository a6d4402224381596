"""Reading a score out of what an objective returned (a number, a mapping, a command's last stdout line).

Standard library only: the attempt process (:mod:`forebear.cluster.child`)
loads this module as a file, without the package's imports.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any


class BadScore(ValueError):
    """An objective result that is not a usable score; the message says what came back."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


def _describe(value: Any, limit: int = 80) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _number(value: Any) -> float | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        try:
            return float(value)
        except OverflowError:  # an int beyond the largest double (10**400): as large as a float gets
            return math.inf if value > 0 else -math.inf
    if isinstance(value, float):
        return value
    if hasattr(value, "item") and callable(value.item):  # numpy and torch scalars
        try:
            item = value.item()
        except (TypeError, ValueError, RuntimeError):
            return None
        return _number(item) if not hasattr(item, "item") else None
    return None


def score_of(value: Any, metric: str, dropped: dict[str, str] | None = None) -> tuple[float, dict[str, Any]]:
    """The score and the metrics of an objective result.

    A bare number is the metric itself; a mapping must hold ``metric``. Side
    metrics that are not finite numbers, text, booleans or null are left out of
    the metrics; when ``dropped`` is given, each one is named there with why.

    Raises
    ------
    BadScore
        For NaN, inf, a missing metric or anything that is not a number.
    """
    if isinstance(value, Mapping):
        if metric not in value:
            keys = ", ".join(map(str, list(value)[:10])) or "none"
            raise BadScore(f"the result has no metric {metric!r} (keys: {keys})")
        metrics: dict[str, Any] = {}
        for k, v in value.items():
            num = _number(v)
            if num is not None and math.isfinite(num):
                metrics[str(k)] = num
            elif isinstance(v, (str, bool)) or v is None:
                metrics[str(k)] = v
            elif dropped is not None and k != metric:
                dropped[str(k)[:200]] = _why_not(v, num)
        score = _check(value[metric], metric)
        metrics[metric] = score
        return score, metrics
    score = _check(value, metric)
    return score, {metric: score}


def _why_not(value: Any, num: float | None) -> str:
    if num is None:
        return f"{type(value).__name__}, not a number"
    if math.isnan(num):
        return "NaN"
    return f"{'+' if num > 0 else '-'}inf" + (" (an int beyond the largest float)" if isinstance(value, int) else "")


def _check(value: Any, metric: str) -> float:
    num = _number(value)
    if num is None:
        raise BadScore(f"metric {metric!r} is {type(value).__name__} {_describe(value)}, not a number")
    if math.isnan(num):
        raise BadScore(f"metric {metric!r} is NaN")
    if math.isinf(num):
        if isinstance(value, int):
            raise BadScore(f"metric {metric!r} is an int of {len(str(abs(value)))} digits, beyond the largest float")
        raise BadScore(f"metric {metric!r} is {'+' if num > 0 else '-'}inf")
    return num


def score_of_stdout(text: str, metric: str, dropped: dict[str, str] | None = None) -> tuple[float, dict[str, Any]]:
    """Score a command objective from its stdout: the last non-empty line, JSON or a bare number."""
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise BadScore("stdout was empty; the last line must be a number or a JSON object with the metric")
    last = lines[-1]
    try:
        value = json.loads(last)
    except ValueError:
        try:
            value = float(last)
        except ValueError:
            raise BadScore(f"the last stdout line is not a number or JSON: {_describe(last)}") from None
    return score_of(value, metric, dropped)
