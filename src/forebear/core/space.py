"""The search space: parameters, the unit-cube encoding, and sampling.

Every configuration is a plain ``dict`` from parameter name to value. The
surrogate and the acquisition work in the unit cube: a float or int parameter
takes one coordinate in [0, 1] (on the log scale when ``log`` is true), a
categorical parameter takes one coordinate per category (one-hot).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.stats import qmc

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


def _same_category(a: Any, b: Any) -> bool:
    return category_key(a) == category_key(b)


@dataclass(frozen=True)
class Space:
    """An ordered set of parameters with the unit-cube encoding."""

    params: tuple[Param, ...]
    _slices: tuple[slice, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not self.params:
            raise ValueError("a space needs at least one parameter")
        names = [p.name for p in self.params]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            msg = f"duplicate parameter names: {', '.join(dupes)}"
            raise ValueError(msg)
        slices, start = [], 0
        for p in self.params:
            slices.append(slice(start, start + p.width))
            start += p.width
        object.__setattr__(self, "_slices", tuple(slices))

    # -- construction -------------------------------------------------------

    @classmethod
    def from_dict(cls, data: Mapping[str, Mapping[str, Any]]) -> Space:
        """Build a space from its spec form, e.g. ``{"lr": {"float": [1e-4, 0.1], "log": True}}``."""
        params = []
        for name, body in data.items():
            body = dict(body)
            default = body.pop("default", None)
            log = bool(body.pop("log", False))
            if "categories" in body:
                params.append(Param(name, "categorical", categories=tuple(body.pop("categories")), default=default))
            elif "float" in body:
                lo, hi = body.pop("float")
                params.append(Param(name, "float", float(lo), float(hi), log=log, default=default))
            elif "int" in body:
                lo, hi = body.pop("int")
                params.append(Param(name, "int", lo, hi, log=log, default=default))
            else:
                msg = f"parameter {name!r}: needs one of float, int, categories"
                raise ValueError(msg)
            if body:
                msg = f"parameter {name!r}: unknown keys {sorted(body)}"
                raise ValueError(msg)
        return cls(tuple(params))

    def to_dict(self) -> dict[str, dict[str, Any]]:
        """The spec form of the space (JSON-safe); ``Space.from_dict`` inverts it."""
        return {p.name: p.to_dict() for p in self.params}

    # -- properties ---------------------------------------------------------

    @property
    def names(self) -> list[str]:
        return [p.name for p in self.params]

    @property
    def dim(self) -> int:
        """Number of unit-cube coordinates."""
        return sum(p.width for p in self.params)

    @property
    def continuous_mask(self) -> np.ndarray:
        """Boolean mask of the coordinates that belong to float parameters."""
        mask = np.zeros(self.dim, dtype=bool)
        for p, s in zip(self.params, self._slices, strict=True):
            if p.kind == "float":
                mask[s] = True
        return mask

    def __getitem__(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(name)

    def __len__(self) -> int:
        return len(self.params)

    # -- validation ---------------------------------------------------------

    def validate(self, config: Mapping[str, Any]) -> None:
        """Raise ``ValueError`` naming the first problem of ``config``."""
        missing = [n for n in self.names if n not in config]
        if missing:
            msg = f"configuration lacks {', '.join(missing)}"
            raise ValueError(msg)
        extra = [k for k in config if k not in self.names]
        if extra:
            msg = f"configuration has unknown parameters {', '.join(map(str, extra))}"
            raise ValueError(msg)
        for p in self.params:
            if not p.contains(config[p.name]):
                msg = f"{p.name}: {config[p.name]!r} is outside the space"
                raise ValueError(msg)

    def contains(self, config: Mapping[str, Any]) -> bool:
        try:
            self.validate(config)
        except ValueError:
            return False
        return True

    # -- encoding -----------------------------------------------------------

    def encode(self, config: Mapping[str, Any]) -> np.ndarray:
        """Encode one configuration as a point of the unit cube, shape ``(dim,)``."""
        return np.concatenate([p.to_unit(config[p.name]) for p in self.params])

    def encode_many(self, configs: Iterable[Mapping[str, Any]]) -> np.ndarray:
        """Encode configurations, shape ``(n, dim)``; column by column, linear in n and fast for 10^5 rows."""
        configs = list(configs)
        out = np.zeros((len(configs), self.dim))
        if configs:
            for p, s in zip(self.params, self._slices, strict=True):
                out[:, s] = p.to_unit_many([c[p.name] for c in configs])
        return out

    def decode(self, x: Sequence[float] | np.ndarray) -> dict[str, Any]:
        """Decode a unit-cube point into a valid configuration (clipped, rounded, argmax)."""
        x = np.asarray(x, dtype=float)
        if x.shape != (self.dim,):
            msg = f"expected a point of shape ({self.dim},), got {x.shape}"
            raise ValueError(msg)
        return {p.name: p.from_unit(x[s]) for p, s in zip(self.params, self._slices, strict=True)}

    def decode_many(self, xs: np.ndarray) -> list[dict[str, Any]]:
        return [self.decode(x) for x in np.atleast_2d(xs)]

    def round_trip(self, xs: np.ndarray) -> np.ndarray:
        """Project unit-cube points onto the encodings of valid configurations."""
        return self.encode_many(self.decode_many(xs))

    # -- sampling -----------------------------------------------------------

    def sample(self, n: int, rng: np.random.Generator | int | None = None) -> list[dict[str, Any]]:
        """``n`` configurations drawn uniformly (log-uniformly for log parameters)."""
        rng = np.random.default_rng(rng)
        return [self._from_base(rng.random(len(self.params))) for _ in range(n)]

    def latin_hypercube(self, n: int, seed: int | None = None) -> list[dict[str, Any]]:
        """``n`` configurations from a Latin hypercube (McKay, Beckman & Conover 1979).

        One base coordinate per parameter, so each float parameter has exactly
        one point in each of the ``n`` equal strata of its (scaled) range; a
        categorical parameter maps its stratum to a category, which spreads
        the categories evenly.
        """
        if n <= 0:
            return []
        base = qmc.LatinHypercube(d=len(self.params), seed=seed).random(n)
        return [self._from_base(row) for row in base]

    def _from_base(self, u: np.ndarray) -> dict[str, Any]:
        """Map one coordinate per parameter in [0, 1) to a configuration."""
        out: dict[str, Any] = {}
        for p, t in zip(self.params, u, strict=True):
            if p.kind == "categorical":
                out[p.name] = p.categories[min(len(p.categories) - 1, int(t * len(p.categories)))]
            elif p.kind == "int":
                # Equal mass for every integer on the linear scale: widen by half a step.
                assert p.low is not None and p.high is not None
                if p.log:
                    lo, hi = math.log(p.low - 0.5 if p.low > 0.5 else p.low), math.log(p.high + 0.5)
                    v = math.exp(lo + t * (hi - lo))
                else:
                    v = p.low - 0.5 + t * (p.high - p.low + 1)
                out[p.name] = int(min(p.high, max(p.low, round(v))))
            else:
                out[p.name] = p.from_unit(np.array([t]))
        return out

    # -- local search -------------------------------------------------------

    def mutate(
        self,
        config: Mapping[str, Any],
        rng: np.random.Generator | int | None = None,
        scale: float = 0.1,
        n_params: int | None = None,
    ) -> dict[str, Any]:
        """Perturb ``n_params`` parameters of ``config`` (default: one, sometimes more).

        Numeric parameters move by a Gaussian step of ``scale`` in unit-cube
        units (ints at least one step); categorical ones switch to another
        category. The result is always valid and, where the space allows it,
        differs from ``config``.
        """
        rng = np.random.default_rng(rng)
        if n_params is None:
            n_params = 1 + int(rng.binomial(max(0, len(self.params) - 1), 0.2))
        n_params = max(1, min(n_params, len(self.params)))
        out = dict(config)
        chosen = rng.choice(len(self.params), size=n_params, replace=False)
        for i in chosen:
            p = self.params[int(i)]
            old = config[p.name]
            if p.kind == "categorical":
                if len(p.categories) > 1:
                    others = [c for c in p.categories if not _same_category(c, old)]
                    out[p.name] = others[int(rng.integers(len(others)))]
                continue
            u = p.to_unit(old)[0] + rng.normal(0.0, scale)
            u = _reflect(u)
            new = p.from_unit(np.array([u]))
            if p.kind == "int" and new == old:
                assert p.low is not None and p.high is not None
                step = 1 if rng.random() < 0.5 else -1
                if not p.low <= old + step <= p.high:
                    step = -step
                new = int(min(p.high, max(p.low, old + step)))
            out[p.name] = new
        return out


def _reflect(u: float) -> float:
    """Fold a coordinate back into [0, 1] by reflection at the walls."""
    u = abs(u) % 2.0
    return 2.0 - u if u > 1.0 else u
