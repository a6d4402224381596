"""Task families of the quality benchmark: analytic transfer families and the meta-dataset."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import spearmanr

from forebear.bench import functions
from forebear.bench.families import (
    ANALYTIC,
    DATA,
    analytic_family,
    held_out,
    hgb_family,
    make_family,
    read_table,
    searched,
    unit_space,
)
from forebear.bench.metadata import COLUMNS, TASKS, design, hgb_space, score

# Published minimisers and minimum values, typed here from the Virtual Library of Simulation
# Experiments (S. Surjanovic and D. Bingham, https://www.sfu.ca/~ssurjano/: branin.html,
# hart3.html, hart6.html), from memory; independent of the constants in bench/functions.py.
BRANIN_FSTAR = 0.397887
BRANIN_XSTAR = ((-np.pi, 12.275), (np.pi, 2.275), (9.42478, 2.475))  # on [-5, 10] x [0, 15]
HARTMANN3_FSTAR = -3.86278
HARTMANN3_XSTAR = (0.114614, 0.555649, 0.852547)
HARTMANN6_FSTAR = -3.32237
HARTMANN6_XSTAR = (0.20169, 0.150011, 0.476874, 0.275332, 0.311652, 0.6573)
PUBLISHED = {
    "branin": (BRANIN_FSTAR, tuple(((a + 5.0) / 15.0, b / 15.0) for a, b in BRANIN_XSTAR)),
    "hartmann3": (HARTMANN3_FSTAR, (HARTMANN3_XSTAR,)),
    "hartmann6": (HARTMANN6_FSTAR, (HARTMANN6_XSTAR,)),
}


@pytest.mark.parametrize("name", sorted(PUBLISHED))
def test_functions_take_the_published_minimum_at_the_published_minimisers(name: str) -> None:
    fstar, minimisers = PUBLISHED[name]
    f = ANALYTIC[name][0]
    rng = np.random.default_rng(0)
    for xstar in minimisers:
        x = np.asarray(xstar)
        # The library gives f* to 6 significant digits and x* to 5 or 6.
        assert f(x) == pytest.approx(fstar, abs=2e-5), (name, xstar)
        # A local minimum: no point of a small neighbourhood does better.
        near = np.clip(x + rng.uniform(-0.01, 0.01, (400, len(x))), 0.0, 1.0)
        assert min(f(z) for z in near) >= fstar - 2e-5
    # A global one: a dense quasi-random design of the whole cube finds nothing lower.
    from forebear.bench.families import sobol

    assert min(f(z) for z in sobol(len(minimisers[0]), 4096, seed=1)) >= fstar - 2e-5


def test_branin_in_its_own_coordinates() -> None:
    # All three published minimisers in Branin's own domain, and the module's constants agree.
    for x1, x2 in BRANIN_XSTAR:
        assert functions.branin_raw(x1, x2) == pytest.approx(BRANIN_FSTAR, abs=1e-6)
    assert functions.BRANIN_MIN == BRANIN_FSTAR and functions.HARTMANN3_MIN == HARTMANN3_FSTAR
    assert functions.HARTMANN6_MIN == HARTMANN6_FSTAR
    assert np.allclose(functions.BRANIN_ARGMIN, BRANIN_XSTAR, atol=1e-5)
    # A point away from the minimisers, from the published formula by hand: at (0, 0)
    # (0 - 6)^2 + 10 (1 - 1/(8 pi)) cos 0 + 10 = 56 - 10/(8 pi).
    assert functions.branin_raw(0.0, 0.0) == pytest.approx(56.0 - 10.0 / (8.0 * np.pi), abs=1e-9)


@pytest.mark.parametrize("name", sorted(ANALYTIC))
def test_analytic_tasks_keep_the_published_minimum_inside(name: str) -> None:
    fstar, minimisers = PUBLISHED[name]
    fam = analytic_family(name, n_tasks=6, n_points=64, seed=3)
    dim = len(minimisers[0])
    assert fam.space.dim == dim and len(fam.tasks) == 6
    # Branin's family keeps the published minimiser (pi, 2.275) inside the square.
    xstar = np.asarray(minimisers[1] if name == "branin" else minimisers[0])
    for task in fam.tasks:
        t = np.asarray(task.notes["shift"])
        s = task.notes["scale"]
        assert np.all(np.abs(t) <= 0.25) and 0.75 <= s <= 1.25
        shifted = xstar + t
        assert np.all((shifted >= -1e-4) & (shifted <= 1 + 1e-4))
        # The task is s * f(x - t): at the shifted published minimiser it takes s * f*
        # (notes round t and s to 4 digits, hence the tolerance).
        at_min = task.objective(fam.space.decode(np.clip(shifted, 0, 1)))
        assert at_min == pytest.approx(s * fstar, rel=2e-4, abs=1e-4)
        assert task.low == pytest.approx(s * fstar, rel=2e-4)
        # No design point beats the published minimum; the worst bound covers the design.
        assert np.min(task.y) >= s * fstar * (1 + np.sign(fstar) * 2e-4) - 1e-9
        assert np.max(task.y) <= task.high
        r = task.regret(task.y)
        assert np.all((r >= 0) & (r <= 1))


def test_branin_family_uses_the_published_function() -> None:
    fam = analytic_family("branin", n_tasks=2, n_points=8, seed=0)
    task = fam.tasks[0]
    t = np.asarray(task.notes["shift"])
    s = task.notes["scale"]
    # The task at x is s * Branin(x - t) in Branin's own coordinates (the published formula
    # written out here, Virtual Library of Simulation Experiments), at points away from the minima.
    for u in ((0.7, 0.7), (0.4, 0.3), (0.3, 0.6)):  # x - t stays in the square
        v = np.asarray(u) - t
        x1, x2 = -5.0 + 15.0 * v[0], 15.0 * v[1]
        b, c, r, w = 5.1 / (4 * np.pi**2), 5 / np.pi, 6.0, 1 / (8 * np.pi)
        expect = s * ((x2 - b * x1**2 + c * x1 - r) ** 2 + 10 * (1 - w) * np.cos(x1) + 10)
        assert task.objective({"x0": u[0], "x1": u[1]}) == pytest.approx(expect, rel=1e-3)


def test_families_are_deterministic_and_tasks_differ() -> None:
    a = analytic_family("hartmann3", n_tasks=4, n_points=16, seed=1)
    b = analytic_family("hartmann3", n_tasks=4, n_points=16, seed=1)
    assert [t.notes for t in a.tasks] == [t.notes for t in b.tasks]
    assert np.array_equal(a.tasks[2].y, b.tasks[2].y)
    shifts = {tuple(t.notes["shift"]) for t in a.tasks}
    assert len(shifts) == 4


def test_history_is_the_other_tasks() -> None:
    fam = analytic_family("hartmann6", n_tasks=5, n_points=32, seed=0)
    hist = fam.history_for(2)
    assert len(hist) == 4
    assert [t.name for t in hist.tasks] == [fam.tasks[i].name for i in (0, 1, 3, 4)]
    for t in hist.tasks:
        assert t.X.shape == (32, 6) and t.y.shape == (32,)
        assert len(t.configs) == 32
    with pytest.raises(IndexError, match="task index 5"):
        fam.history_for(5)


def test_bad_family_arguments_name_the_problem() -> None:
    with pytest.raises(ValueError, match="unknown analytic family 'rosen'"):
        analytic_family("rosen")
    with pytest.raises(ValueError, match="n_tasks >= 2"):
        analytic_family("branin", n_tasks=1)


def test_history_size_grows_the_family_but_keeps_the_held_out_tasks() -> None:
    small = make_family("branin", n_tasks=3, n_points=16)
    big = make_family("branin", n_tasks=3, n_points=16, history_tasks=4)
    assert len(big.tasks) == 5 and held_out(big, 10) == [0, 1, 2]
    # Task k is the same whatever the family's size, so runs with 3, 10 and 30 history tasks
    # search the same held-out tasks.
    assert [t.notes for t in big.tasks[:3]] == [t.notes for t in small.tasks]
    assert [t.name for t in big.history_for(2).tasks] == [f"branin-{i}" for i in (0, 1, 3, 4)]
    big.history_tasks = 2
    assert [t.name for t in big.history_for(0).tasks] == ["branin-1", "branin-2"]
    with pytest.raises(ValueError, match="history_kind must be one of sobol, searches, shuffled"):
        make_family("branin", history_kind="grid")
    with pytest.raises(ValueError, match="family hgb has 24 tasks: at most 23 history tasks, got 30"):
        make_family("hgb", history_tasks=30)


def test_searched_history_is_a_cached_gp_search_near_each_optimum(tmp_path) -> None:
    fam = make_family("branin", n_tasks=3, n_points=64, history_kind="searches")
    fam.search_trials, fam.cache_dir = (10, 10), tmp_path
    hist = fam.history_for(0)
    assert [len(t.y) for t in hist.tasks] == [10, 10]
    for t, j in zip(hist.tasks, (1, 2), strict=True):
        task = fam.tasks[j]
        assert np.allclose(t.y, [task.objective(c) for c in t.configs])
        # A search's points sit nearer the optimum than the Sobol design's (median regret).
        assert np.median(task.regret(t.y)) < np.median(task.regret(task.y))
    assert len(list(tmp_path.glob("branin-branin-*.json"))) == 2
    # The second time it is read from the cache: the objective is not called again.
    fam.tasks[1].objective = None  # type: ignore[assignment]
    configs, y = searched(fam, 1)
    assert configs == hist.tasks[0].configs and np.array_equal(y, hist.tasks[0].y)


def test_shuffled_history_keeps_the_design_and_the_scores_but_not_their_pairing() -> None:
    fam = make_family("branin", n_tasks=3, n_points=64, history_kind="shuffled")
    for t, j in zip(fam.history_for(0).tasks, (1, 2), strict=True):
        task = fam.tasks[j]
        assert t.configs == task.configs and sorted(t.y) == sorted(task.y)
        assert abs(spearmanr(t.y, task.y)[0]) < 0.3  # the permutation destroys the pairing
    again = make_family("branin", n_tasks=3, n_points=64, history_kind="shuffled").history_for(0)
    assert np.array_equal(again.tasks[0].y, fam.history_for(0).tasks[0].y)  # fixed per task


def test_unit_space_is_identity_encoded() -> None:
    sp = unit_space(3)
    x = np.array([0.1, 0.5, 0.9])
    assert np.allclose(sp.encode(sp.decode(x)), x)


# -- the meta-dataset ------------------------------------------------------------


def test_committed_table_has_enough_tasks_and_configurations() -> None:
    table = read_table(DATA)
    assert len(table) >= 20
    assert set(table) == {t.name for t in TASKS}
    space = hgb_space()
    for name, rows in table.items():
        assert len(rows) >= 300, name
        for r in rows[:20]:
            space.validate(r["config"])
            assert 0.0 <= r["error"] <= 1.0
        # Every task sees the same Sobol design.
        assert [r["config"] for r in rows[:5]] == [r["config"] for r in table["iris"][:5]]
    # Mixed types: a log float, ints and one categorical.
    kinds = {p.kind for p in space.params}
    assert kinds == {"float", "int", "categorical"} and 4 <= len(space.params) <= 6
    assert COLUMNS[0] == "task"


def test_table_is_reproducible_from_the_script() -> None:
    table = read_table(DATA)
    configs = design(300)
    by_name = {t.name: t for t in TASKS}
    for name in ("iris", "wine-1v2"):
        row = table[name][3]
        # The table keeps 6 significant digits of the float parameters.
        for k, v in configs[3].items():
            assert row["config"][k] == (pytest.approx(v, rel=1e-5) if isinstance(v, float) else v)
        err, _, _ = score(by_name[name], configs[3])
        assert err == pytest.approx(row["error"], abs=1e-5)


def test_hgb_family_objective_is_a_forest_fitted_to_the_table() -> None:
    fam = hgb_family(n_points=50)
    assert len(fam.tasks) >= 20
    task = fam.tasks[0]
    assert len(task.configs) == 50
    table = read_table(DATA)[task.name]
    pred = np.array([task.objective(r["config"]) for r in table[:60]])
    true = np.array([r["error"] for r in table[:60]])
    # In-sample fit of a random forest: close, and bounded by the tabled extremes.
    assert np.corrcoef(pred, true)[0, 1] > 0.9
    assert np.all(pred >= task.low - 1e-12) and np.all(pred <= task.high + 1e-12)
    hist = fam.history_for(0)
    assert len(hist) == len(fam.tasks) - 1 and hist.tasks[0].X.shape == (50, fam.space.dim)


def test_read_table_rejects_a_missing_file(tmp_path) -> None:
    with pytest.raises(FileNotFoundError, match="does not exist"):
        read_table(tmp_path / "none.csv.gz")
