"""The quality benchmark harness: figures, goals and a small real run."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from forebear.bench import quality
from forebear.bench.families import analytic_family
from forebear.bench.quality import METHODS, Protocol, _goals, interval, search, summarise
from forebear.bench.simulated import Clock


def _fake_results(curves: dict[str, list[list[float]]]) -> list[dict]:
    n = len(next(iter(curves.values())))
    return [
        {"family": "branin", "task": f"t{i}", "seed": 0,
         "runs": {m: {"regret": c[i], "models": {"gp": 1}, "sources": {}, "seconds": 0.0} for m, c in curves.items()}}
        for i in range(n)
    ]


def test_interval_brackets_the_mean() -> None:
    from scipy import stats

    v = np.random.default_rng(0).exponential(size=40)
    mean, lo, hi = interval(v)
    assert mean == pytest.approx(v.mean()) and lo < mean < hi
    # Against the reference implementation on the same data: scipy.stats.bootstrap's percentile
    # interval (Efron and Tibshirani 1993, ch. 13) with its own resampling (another seed, 20000
    # resamples) agrees to within the Monte-Carlo error of 2000 resamples.
    ref = stats.bootstrap((v,), np.mean, confidence_level=0.95, n_resamples=20000, method="percentile",
                          random_state=12345).confidence_interval
    width = ref.high - ref.low
    assert lo == pytest.approx(ref.low, abs=0.05 * width) and hi == pytest.approx(ref.high, abs=0.05 * width)
    # A case whose interval is known: the mean of n normal draws has the 95% interval
    # mean +- t(0.975, n-1) s / sqrt(n) (Student's t; the bootstrap percentile interval tends
    # to it for large n, Efron and Tibshirani 1993, sec. 13.3).
    w = np.random.default_rng(1).normal(5.0, 2.0, size=400)
    m, lo2, hi2 = interval(w)
    half = stats.t.ppf(0.975, len(w) - 1) * w.std(ddof=1) / np.sqrt(len(w))
    # Width within 6% (a 90% interval would be 16% narrower), centre within a tenth of the half-width.
    assert hi2 - lo2 == pytest.approx(2 * half, rel=0.06)
    assert (lo2 + hi2) / 2 == pytest.approx(m, abs=0.1 * half)
    assert interval(np.array([0.5, 0.5])) == (0.5, 0.5, 0.5)


def test_goals_from_known_curves() -> None:
    trials = 12
    gp = np.tile(np.linspace(1.0, 0.2, trials), (3, 1))
    full = np.tile(np.linspace(0.5, 0.01, trials), (3, 1))
    rnd = np.ones((3, trials))
    g = _goals({"gp": gp, "forebear-full": full, "random": rnd, "forebear-full-q8": full * 1.05}, trials)
    # full's mean curve first drops to <= 0.2 at trial index where linspace(0.5, 0.01) <= 0.2
    expect = int(np.nonzero(np.linspace(0.5, 0.01, trials) <= 0.2)[0][0]) + 1
    assert g["trials_to_target"] == expect and g["trials_to_target_ok"]
    assert g["ratio_to_random_at_10"] == pytest.approx(full[0, 9])
    assert g["q8_over_q1"][10] == pytest.approx(1.05) and g["q8_ok"]


def test_summary_ranks_and_tables() -> None:
    results = _fake_results({
        "random": [[0.9] * 10, [0.8] * 10],
        "gp": [[0.5] * 10, [0.9] * 10],
        "forebear-full": [[0.1] * 10, [0.1] * 10],
    })
    proto = Protocol(families=("branin",), tasks=2, seeds=1, trials=10, methods=("random", "gp", "forebear-full"))
    s = summarise(results, proto)["branin"]
    assert s["rank"]["forebear-full"][10] == 1.0
    assert s["rank"]["random"][10] == 2.5 and s["rank"]["gp"][10] == 2.5
    assert sum(r[5] for r in s["rank"].values()) == pytest.approx(6.0)
    md = quality.markdown({"branin": s}, proto)
    assert "| forebear-full | 0.1 [0.1, 0.1]" in md
    assert "trials-to-target" in md
    # Methods with 4 workers are ranked among themselves, with random search (which has no schedule).
    results = _fake_results({
        "random": [[0.9] * 10, [0.8] * 10],
        "gp": [[0.5] * 10, [0.9] * 10],
        "gp-q4": [[0.2] * 10, [0.3] * 10],
        "rgpe-q4": [[0.95] * 10, [0.1] * 10],
    })
    proto = Protocol(families=("branin",), tasks=2, seeds=1, trials=10, methods=("random", "gp", "gp-q4", "rgpe-q4"))
    s = summarise(results, proto)["branin"]
    assert set(s["rank"]) == {"random", "gp"} and set(s["rank_q4"]) == {"random", "gp-q4", "rgpe-q4"}
    assert s["rank_q4"]["gp-q4"][10] == 1.5 and s["rank_q4"]["rgpe-q4"][10] == 2.0 and s["rank_q4"]["random"][10] == 2.5
    assert "| method (q = 4) | rank @5 | rank @10 |" in quality.markdown({"branin": s}, proto)


def test_summary_of_a_run_with_only_a_batch_method(tmp_path: Path) -> None:
    # `--methods forebear-full-q8` alone: no sequential method to rank, and the summary
    # still gives the regret table (it used to fail at the very end of the run).
    curves = {"forebear-full-q8": [[0.5, 0.2, 0.1, 0.1, 0.05]] * 2}
    proto = Protocol(families=("branin",), tasks=2, seeds=1, trials=5, methods=("forebear-full-q8",))
    fam = summarise(_fake_results(curves), proto)["branin"]
    assert fam["rank"] == {} and fam["regret"]["forebear-full-q8"][5][0] == pytest.approx(0.05)
    written = quality.write(_fake_results(curves), proto, tmp_path)  # tables and plots too
    assert {Path(p).name for p in written["plots"]} == {"quality_branin.png", "quality_batch.png"}
    assert "forebear-full-q8" in (tmp_path / "results.md").read_text()


def test_protocol_rejects_bad_input() -> None:
    with pytest.raises(ValueError, match="unknown methods: bogus"):
        Protocol(methods=("bogus",))
    with pytest.raises(ValueError, match="unknown families: rosen"):
        Protocol(families=("rosen",))
    with pytest.raises(ValueError, match="trials must be >= 1"):
        Protocol(trials=0)


def test_search_regret_is_monotone_and_counts_trials() -> None:
    fam = analytic_family("branin", n_tasks=3, n_points=32, seed=0)
    for name in ("random", "lhs-random"):
        out = search(fam, 0, METHODS[name], seed=1, trials=12)
        r = np.asarray(out["regret"])
        assert r.shape == (12,) and np.all(np.diff(r) <= 0) and np.all(r >= 0)
        assert sum(out["sources"].values()) == 12


def test_forebear_full_beats_random_search_on_branin() -> None:
    # A smaller version of `forebear bench quality --smoke`: the real proposer, in process,
    # with a shorter meta-training (300 Adam steps at most instead of the default) so the
    # test stays well under a minute on 2 shared cores. Two seeds: with one (2 runs) the
    # rebuilt deep kernel lost to a lucky random draw on task 4 (mean 0.0146 against 0.0086).
    proto = Protocol(families=("branin",), tasks=2, seeds=2, trials=10, methods=("random", "forebear-full"),
                     family_size=5, history_points=64, proposer={"deep_kernel": {"max_steps": 300}})
    out = quality.main(proto=proto)
    assert out["runs"] == 4
    mr = out["mean_regret"]
    assert mr["forebear-full"] < mr["random"], mr


@pytest.mark.slow
def test_the_smoke_run_puts_forebear_full_ahead_of_random_search_and_the_plain_gp() -> None:
    # Issue 11's goal for `forebear bench quality --smoke --json`, on the command's own protocol
    # (about 1.5 minutes on 2 cores). Measured 2026-12-02: forebear full 0.00046, plain GP 0.0051,
    # random 0.0222 (docs/benchmarks.md); the margin asked here is only the ordering.
    out = quality.main(smoke=True)
    mr = out["mean_regret"]
    assert set(mr) == {"random", "gp", "forebear-cold", "forebear-full"} and out["runs"] == 6
    assert mr["forebear-full"] < mr["gp"] and mr["forebear-full"] < mr["random"], mr


def test_forebear_cold_reuses_the_gp_curve_only_when_it_is_the_same_search() -> None:
    # The run reuses `gp`'s curve for `forebear-cold` (no history: the plain-GP branch every
    # round). Check that claim against a real run of both, and that history-using methods
    # are never reused.
    fam = analytic_family("branin", n_tasks=3, n_points=32, seed=0)
    assert quality._same_as_gp(METHODS["forebear-cold"], None)
    for name in ("forebear-full", "no-guard", "gp-q4", "random"):
        assert not quality._same_as_gp(METHODS[name], None), name
    gp = search(fam, 1, METHODS["gp"], seed=3, trials=8)
    cold = search(fam, 1, METHODS["forebear-cold"], seed=3, trials=8)
    assert cold["regret"] == gp["regret"] and cold["models"] == gp["models"]


def test_cli_set_passes_proposer_settings_and_refuses_unknown_ones(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        quality._cli(["--set", "bogus=1"])
    assert exc.value.code == 2
    assert "--set: Proposer got unknown settings: bogus" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        quality._cli(["--set", "novalue"])
    assert "--set expects KEY=VALUE" in capsys.readouterr().err
    quality._cli(["--families", "branin", "--tasks", "1", "--seeds", "1", "--trials", "4", "--methods", "gp",
                  "--family-size", "3", "--history-points", "16", "--set", "n_initial=3"])
    out = json.loads(capsys.readouterr().out)
    assert out["protocol"]["proposer"] == {"n_initial": 3}


def test_peers_are_registered_and_history_options_reach_the_run(capsys: pytest.CaptureFixture[str]) -> None:
    fam = analytic_family("branin", n_tasks=3, n_points=32, seed=0)
    for name in ("warmstart-gp", "rgpe", "tpe"):
        out = search(fam, 0, METHODS[name], seed=1, trials=5)
        r = np.asarray(out["regret"])
        assert r.shape == (5,) and np.all(np.diff(r) <= 0) and sum(out["sources"].values()) == 5
        assert not quality._same_as_gp(METHODS[name], None)
    assert METHODS["rgpe"].history and not METHODS["tpe"].history
    # At 4 workers each peer proposes beside running trials, as the engine's methods do.
    clock = Clock(trial_seconds=1.0, sigma=0.5, refit_seconds=0.25)
    for name in ("warmstart-gp-q4", "rgpe-q4", "tpe-q4"):
        out = search(fam, 0, METHODS[name], seed=1, trials=9, clock=clock)
        assert METHODS[name].q == 4 and len(out["regret"]) == 9, name
        assert out["pending_mean"] >= 2.0 and out["busy"] > 0.4, (name, out["pending_mean"], out["busy"])
    with pytest.raises(ValueError, match="history_kind must be one of sobol, searches"):
        Protocol(history_kind="grid")
    with pytest.raises(ValueError, match="history_tasks must be >= 1"):
        Protocol(history_tasks=0)
    quality._cli(["--families", "branin", "--tasks", "1", "--seeds", "1", "--trials", "3", "--methods", "warmstart-gp",
                  "--family-size", "3", "--history-points", "16", "--history-tasks", "1"])
    proto = json.loads(capsys.readouterr().out)["protocol"]
    assert proto["history_tasks"] == 1 and proto["history_kind"] == "sobol"
