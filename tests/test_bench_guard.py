"""The transfer-guard diagnostic: a small real run and its summary."""

from __future__ import annotations

import math

from forebear.bench import guard
from forebear.bench.families import analytic_family


def test_diagnose_scores_every_model_at_every_checkpoint() -> None:
    fam = analytic_family("branin", n_tasks=4, n_points=48, seed=0)
    res = guard.diagnose(fam, 1, seed=0, trials=10, n_test=64, settings={"deep_kernel": {"max_steps": 100}})
    assert [row["n"] for row in res["rows"]] == [5, 10]
    for row in res["rows"]:
        assert row["guard"] in ("gp", "deep-kernel", "mix")
        assert row["scored"] == row["n"] - 3  # the GP joins at 3 observations, scoring starts after
        assert 0.0 <= row["best_so_far_regret"] <= 1.0
        for m in guard.MODELS:
            v = row[m]
            assert all(math.isfinite(v[k]) for k in ("test_loglik", "test_loglik_top10"))
            assert math.isfinite(v["preq_loglik"]) == (m != "deep-kernel-frozen" and row["scored"] > 0)
            assert -1.0 <= v["spearman"] <= 1.0 and v["greedy_regret"] >= 0.0
    summary = guard.summarise([res])
    assert summary["branin"]["10"]["runs"] == 1
    assert sum(summary["branin"]["10"]["guard"].values()) == 1
    text = guard.markdown(summary)
    assert "#### branin" in text and "deep-kernel-frozen" in text
