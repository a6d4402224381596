"""One tuned parameter: its kind, bounds or categories, and its unit-cube encoding.

A float or int parameter takes one coordinate in [0, 1] (on the log scale when
``log`` is true); a categorical parameter takes one coordinate per category
(one-hot). :class:`~forebear.core.space.Space` puts parameters side by side.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

KINDS = ("float", "int", "categorical")


@dataclass(frozen=True)
class Param:
    """One tuned parameter.

    Parameters
    ----------
    name
        The configuration key.
    kind
        ``"float"``, ``"int"`` or ``"categorical"``.
    low, high
        Inclusive bounds of a float or int parameter.
    log
        Sample and model on the log scale (bounds must be > 0).
    categories
        The categories of a categorical parameter.
    default
        The value used to align history that lacks this parameter, or ``None``.
    """

    name: str
    kind: str
    low: float | None = None
    high: float | None = None
    log: bool = False
    categories: tuple[Any, ...] = ()
    default: Any = None

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            msg = f"parameter {self.name!r}: kind must be one of {KINDS}, got {self.kind!r}"
            raise ValueError(msg)
        if self.kind == "categorical":
            if not self.categories:
                msg = f"parameter {self.name!r}: a categorical parameter needs at least one category"
                raise ValueError(msg)
            keys: dict[tuple[str, Any], int] = {}
            for i, c in enumerate(self.categories):
                j = keys.setdefault(category_key(c), i)
                if j != i:
                    first = self.categories[j]
                    msg = (
                        f"parameter {self.name!r}: categories must be distinct, got {list(self.categories)}: "
                        f"{first!r} and {c!r} are one category (numbers compare by value; text, numbers and "
                        "booleans are always distinct)"
                    )
                    raise ValueError(msg)
        else:
            if self.low is None or self.high is None:
                msg = f"parameter {self.name!r}: a {self.kind} parameter needs low and high bounds"
                raise ValueError(msg)
            if not self.low < self.high:
                msg = f"parameter {self.name!r}: low {self.low} must be < high {self.high}"
                raise ValueError(msg)
            if not (math.isfinite(self.low) and math.isfinite(self.high)):
                msg = f"parameter {self.name!r}: bounds must be finite numbers, got [{self.low}, {self.high}]"
                raise ValueError(msg)
            if not self.log and not math.isfinite(float(self.high) - float(self.low)):
                # high - low overflows: every encoded point would decode to a bound.
                msg = (f"parameter {self.name!r}: the range [{self.low:g}, {self.high:g}] is wider than the largest "
                       "float; narrow it (or use log: true for a positive range)")
                raise ValueError(msg)
            if self.log and self.low <= 0:
                msg = f"parameter {self.name!r}: lower bound {self.low} must be > 0 when log is true"
                raise ValueError(msg)
            if self.kind == "int" and (self.low != int(self.low) or self.high != int(self.high)):
                msg = f"parameter {self.name!r}: int bounds must be whole numbers, got {self.low}, {self.high}"
                raise ValueError(msg)
        if self.default is not None and not self.contains(self.default):
            msg = f"parameter {self.name!r}: default {self.default!r} is outside the parameter's range"
            raise ValueError(msg)

    @property
    def width(self) -> int:
        """Number of unit-cube coordinates this parameter takes."""
        return len(self.categories) if self.kind == "categorical" else 1

    @functools.cached_property
    def _positions(self) -> dict[tuple[str, Any], int]:
        # category_key -> position: a lookup is one hash, not a pass over 10,000 categories.
        return {category_key(c): i for i, c in enumerate(self.categories)}

    def _position(self, value: Any) -> int | None:
        try:
            return self._positions.get(category_key(value))
        except TypeError:  # an unhashable value (a list) is no category
            return None

    def contains(self, value: Any) -> bool:
        """Whether ``value`` is a valid value of this parameter."""
        if self.kind == "categorical":
            return self._position(value) is not None
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            return False
        if not math.isfinite(float(value)):
            return False
        if self.kind == "int" and float(value) != int(value):
            return False
        assert self.low is not None and self.high is not None
        return self.low <= float(value) <= self.high

    def to_unit(self, value: Any) -> np.ndarray:
        """Encode one value into ``width`` unit-cube coordinates."""
        if self.kind == "categorical":
            out = np.zeros(len(self.categories))
            out[self.index(value)] = 1.0
            return out
        lo, hi = self._scaled_bounds()
        v = math.log(float(value)) if self.log else float(value)
        return np.array([min(1.0, max(0.0, (v - lo) / (hi - lo)))])

    def to_unit_many(self, values: Sequence[Any]) -> np.ndarray:
        """Encode many values at once, shape ``(len(values), width)`` (the same as stacking :meth:`to_unit`)."""
        n = len(values)
        if self.kind == "categorical":
            out = np.zeros((n, len(self.categories)))
            out[np.arange(n), [self.index(v) for v in values]] = 1.0
            return out
        lo, hi = self._scaled_bounds()
        # math.log, as to_unit uses: numpy's vector log may differ in the last bit, and encodings are compared exactly.
        v = np.array([math.log(float(x)) for x in values] if self.log else values, dtype=float)
        return np.clip((v - lo) / (hi - lo), 0.0, 1.0).reshape(n, 1)

    def from_unit(self, u: np.ndarray) -> Any:
        """Decode ``width`` coordinates into a valid value (argmax for categories)."""
        if self.kind == "categorical":
            return self.categories[int(np.argmax(u))]
        assert self.low is not None and self.high is not None
        lo, hi = self._scaled_bounds()
        t = min(1.0, max(0.0, float(u[0])))
        v = lo + t * (hi - lo)
        if self.log:
            v = math.exp(v)
        if self.kind == "int":
            # Rounding happens in the value's own scale, after undoing the log.
            return int(min(self.high, max(self.low, round(v))))
        return float(min(self.high, max(self.low, v)))

    def index(self, value: Any) -> int:
        """Position of a category in ``categories``."""
        i = self._position(value)
        if i is not None:
            return i
        msg = f"parameter {self.name!r}: {value!r} is not one of {list(self.categories)}"
        raise ValueError(msg)

    def to_dict(self) -> dict[str, Any]:
        """The spec form of this parameter (JSON-safe)."""
        if self.kind == "categorical":
            out: dict[str, Any] = {"categories": list(self.categories)}
        else:
            bounds = [int(self.low), int(self.high)] if self.kind == "int" else [self.low, self.high]  # type: ignore[arg-type]
            out = {self.kind: bounds}
            if self.log:
                out["log"] = True
        if self.default is not None:
            out["default"] = self.default
        return out

    def _scaled_bounds(self) -> tuple[float, float]:
        assert self.low is not None and self.high is not None
        if self.log:
            return math.log(self.low), math.log(self.high)
        return float(self.low), float(self.high)


def category_key(value: Any) -> tuple[str, Any]:
    """What makes two categories the same: text by its characters, numbers by value, booleans apart.

    ``1`` and ``1.0`` are one category (a logbook's JSON may give back either), while
    ``1``, ``"1"`` and ``true`` are three: Python's ``True == 1`` must not merge them.
    Validation (distinct categories) and the encoding (:meth:`Param.index`) both use this key.
    """
    if isinstance(value, bool):
        return ("bool", value)
    if isinstance(value, (int, float)):
        return ("number", value)
    return (type(value).__name__, value)
