"""Space: encoding round trips, validity of decoded points, Latin-hypercube strata, mutation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from forebear.core.param import Param
from forebear.core.space import Space

SPACE = Space(
    (
        Param("lr", "float", 1e-4, 0.3, log=True),
        Param("subsample", "float", 0.5, 1.0),
        Param("depth", "int", 2, 12),
        Param("leaves", "int", 4, 1024, log=True),
        Param("booster", "categorical", categories=("tree", "linear", "dart")),
        Param("flag", "categorical", categories=(True, False, 1)),
    )
)


@st.composite
def configs(draw: st.DrawFn, space: Space = SPACE) -> dict:
    out = {}
    for p in space.params:
        if p.kind == "categorical":
            out[p.name] = draw(st.sampled_from(p.categories))
        elif p.kind == "int":
            out[p.name] = draw(st.integers(int(p.low), int(p.high)))
        else:
            out[p.name] = draw(st.floats(p.low, p.high, allow_nan=False))
    return out


def same(a: dict, b: dict) -> bool:
    for k, v in a.items():
        w = b[k]
        if type(v) is not type(w):
            return False
        if isinstance(v, float):
            # Floats pass through log/exp and an affine map: equal to rounding error only.
            if not math.isclose(v, w, rel_tol=1e-9, abs_tol=1e-12):
                return False
        elif v != w:
            return False
    return True


@given(configs())
@settings(max_examples=300, deadline=None)
def test_decode_encode_round_trip(config: dict) -> None:
    x = SPACE.encode(config)
    assert x.shape == (SPACE.dim,)
    assert np.all((x >= 0) & (x <= 1))
    assert same(config, SPACE.decode(x))


@given(st.lists(st.floats(-3, 3, allow_nan=False), min_size=SPACE.dim, max_size=SPACE.dim))
@settings(max_examples=300, deadline=None)
def test_every_decoded_point_is_valid(xs: list[float]) -> None:
    config = SPACE.decode(np.array(xs))
    SPACE.validate(config)
    assert isinstance(config["depth"], int) and isinstance(config["leaves"], int)


def test_categories_keep_types_apart() -> None:
    # True == 1 in Python; the categories [True, False, 1] must stay three categories.
    p = SPACE["flag"]
    assert [p.index(v) for v in (True, False, 1)] == [0, 1, 2]
    assert SPACE.decode(SPACE.encode({**SPACE.sample(1, 0)[0], "flag": 1}))["flag"] == 1


@pytest.mark.parametrize("n", [1, 7, 50, 200])
def test_latin_hypercube_strata(n: int) -> None:
    # McKay, Beckman & Conover (1979): exactly one point per 1/n stratum in each dimension.
    space = Space((Param("a", "float", 0.0, 10.0), Param("b", "float", 1e-3, 1e3, log=True), Param("c", "int", 0, 5000)))
    pts = space.latin_hypercube(n, seed=3)
    assert len(pts) == n
    for name in ("a", "b"):
        u = np.array([space[name].to_unit(c[name])[0] for c in pts])
        strata = np.minimum((u * n).astype(int), n - 1)
        assert sorted(strata) == list(range(n))


def test_latin_hypercube_seeded() -> None:
    assert SPACE.latin_hypercube(5, seed=1) == SPACE.latin_hypercube(5, seed=1)
    assert SPACE.latin_hypercube(5, seed=1) != SPACE.latin_hypercube(5, seed=2)


def test_latin_hypercube_spreads_categories() -> None:
    pts = SPACE.latin_hypercube(30, seed=0)
    counts = {c: sum(p["booster"] == c for p in pts) for c in SPACE["booster"].categories}
    assert set(counts.values()) == {10}


def test_uniform_sampling_is_valid_and_log_uniform() -> None:
    pts = SPACE.sample(4000, np.random.default_rng(0))
    for p in pts[:200]:
        SPACE.validate(p)
    logs = np.log10([p["lr"] for p in pts])
    # Log-uniform on [1e-4, 0.3]: the median sits near the geometric mid-point.
    assert abs(np.median(logs) - (np.log10(1e-4) + np.log10(0.3)) / 2) < 0.1
    depths = np.array([p["depth"] for p in pts])
    assert set(depths) == set(range(2, 13))
    # Every integer equally likely (within sampling noise), ends included.
    freq = np.bincount(depths)[2:] / len(depths)
    assert freq.min() > 0.06 and freq.max() < 0.12


@given(configs(), st.integers(0, 2**32 - 1))
@settings(max_examples=200, deadline=None)
def test_mutation_is_valid_and_moves(config: dict, seed: int) -> None:
    new = SPACE.mutate(config, np.random.default_rng(seed))
    SPACE.validate(new)
    assert not same(new, config)  # type-aware: True == 1 in Python


def test_mutation_changes_requested_count() -> None:
    # Exactly n parameters change, compared type-aware: a switch between True and 1 is a change.
    space = Space.from_dict({
        "lr": {"float": [1e-4, 1e-1], "log": True},
        "depth": {"int": [1, 12]},
        "flag": {"categories": [True, 1, "one"]},
        "kind": {"categories": ["a", "b"]},
        "x": {"float": [0.0, 1.0]},
    })

    def changed(a: dict, b: dict) -> set[str]:
        return {k for k in a if type(a[k]) is not type(b[k]) or a[k] != b[k]}

    rng = np.random.default_rng(0)
    for trial in range(40):
        base = space.sample(1, trial)[0]
        for n in (1, 2, 3, 5):
            new = space.mutate(base, rng, n_params=n)
            space.validate(new)
            assert len(changed(base, new)) == n, (base, new, n)
    # From True the flag moves to 1 or "one", never stays True under another name.
    base = {"lr": 1e-3, "depth": 3, "flag": True, "kind": "a", "x": 0.5}
    seen = set()
    for _ in range(60):
        new = space.mutate(base, rng, n_params=5)
        seen.add(repr(new["flag"]))
    assert seen == {"1", "'one'"}


def test_space_dict_round_trip() -> None:
    again = Space.from_dict(SPACE.to_dict())
    assert again == SPACE


def test_continuous_mask() -> None:
    mask = SPACE.continuous_mask
    assert mask.sum() == 2 and mask[:2].all() and len(mask) == SPACE.dim


@pytest.mark.parametrize(
    ("kwargs", "fragment"),
    [
        ({"kind": "float", "low": 1.0, "high": 0.0}, "must be <"),
        ({"kind": "float", "low": 0.0, "high": 1.0, "log": True}, "must be > 0 when log"),
        ({"kind": "int", "low": 0.5, "high": 3}, "whole numbers"),
        ({"kind": "categorical", "categories": ()}, "at least one category"),
        ({"kind": "categorical", "categories": ("a", "a")}, "distinct"),
        ({"kind": "float", "low": 0.0, "high": 1.0, "default": 2.0}, "outside"),
    ],
)
def test_bad_params(kwargs: dict, fragment: str) -> None:
    with pytest.raises(ValueError, match=fragment):
        Param("p", **kwargs)


def test_duplicate_names() -> None:
    with pytest.raises(ValueError, match="duplicate parameter names: x"):
        Space((Param("x", "int", 0, 1), Param("x", "int", 0, 2)))


def test_validate_names_problem() -> None:
    with pytest.raises(ValueError, match="depth: 40 is outside"):
        SPACE.validate({**SPACE.sample(1, 0)[0], "depth": 40})
    with pytest.raises(ValueError, match="lacks booster"):
        SPACE.validate({k: v for k, v in SPACE.sample(1, 0)[0].items() if k != "booster"})
