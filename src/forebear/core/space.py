"""The search space: parameters, the unit-cube encoding, and sampling.

Every configuration is a plain ``dict`` from parameter name to value. The
surrogate and the acquisition work in the unit cube: each parameter
(:mod:`forebear.core.param`) takes its coordinates side by side.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.stats import qmc

from forebear.core.param import Param, category_key


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
