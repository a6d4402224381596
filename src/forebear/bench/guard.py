"""Transfer-guard diagnostic: does the prequential comparison pick the model that predicts better?

On a held-out task it runs forebear full's own search (the proposer with
history, all defaults, one proposal per round) and, at each checkpoint ``n``,
records what the guard chose and the prequential log score per point the
proposer had accumulated for each model (each observation's predictive
density under the model built before it was seen; see
``surrogate/select.py``). It then builds, on those same ``n`` observations:

- ``gp``: the plain GP (marginal-likelihood fit, 3 starts),
- ``deep-kernel``: the meta-trained model with its per-task residual
  amplitude refitted (what the guard sees),
- ``deep-kernel-frozen``: the same with the meta-trained amplitude kept.

and scores each *out of sample*, on configurations the search has not seen:
the log-likelihood per point of their true scores (all of them, and the best
tenth, where a search spends its late trials), the Spearman rank correlation
of predicted mean and true score (``scipy.stats.spearmanr``), and the
normalised regret of the test configuration with the lowest predicted mean
(what a greedy pick among them would have found). If the guard's choice is
right, the model with the higher prequential score should also predict the
test set better.

Run: ``python -m forebear.bench.guard --out docs/img/quality/guard``.
"""

from __future__ import annotations

import argparse
import json
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from forebear.bench.families import Family, held_out, make_family

CHECKPOINTS = (5, 10, 20, 30)
MODELS = ("gp", "deep-kernel", "deep-kernel-frozen")


def _metrics(post: Any, Xq: np.ndarray, yq: np.ndarray, low: float, high: float) -> dict[str, float]:
    from scipy.stats import spearmanr

    mu, _ = post.predict(Xq)
    # Log-likelihood in regret units ([0, 1] over the task's tabled range), so that tasks of
    # different scales average sensibly; the Jacobian is the same for every model of a task.
    ll = post.log_predictive(Xq, yq) + np.log(high - low)
    pick = int(np.argmin(mu))
    top = yq <= np.quantile(yq, 0.1)
    return {
        "test_loglik": float(np.mean(ll)),
        "test_loglik_top10": float(np.mean(ll[top])),
        "spearman": float(spearmanr(mu, yq).statistic),
        "greedy_regret": float((yq[pick] - low) / (high - low)),
    }


def diagnose(
    family: Family,
    index: int,
    seed: int = 0,
    trials: int = max(CHECKPOINTS),
    n_test: int = 512,
    settings: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """One held-out task: forebear full's search, then the guard's models at each checkpoint.

    ``settings`` are extra Proposer keywords (the diagnostic's own run uses none).
    """
    import torch

    from forebear.engine.proposer import Observation, Proposer
    from forebear.engine.surrogate.gp import fit_gp

    torch.set_num_threads(1)
    task = family.tasks[index]
    space = family.space
    proposer = Proposer(space, family.history_for(index), seed=seed, cache_dir=False, **dict(settings or {}))
    observed: list[Observation] = []
    state: dict[int, tuple[str, dict[str, float], int]] = {}
    while True:
        # The guard's state in the round that saw n observations and proposed the next.
        props = proposer.propose(1, observed)
        choice = proposer.last_choice
        if choice is not None:
            state[len(observed)] = (choice.name, dict(proposer._preq.total), proposer._preq.count)
        if len(observed) >= trials:
            break
        observed += [Observation(p.config, task.objective(p.config)) for p in props]
    meta = proposer.meta_model()
    test = space.sample(n_test, np.random.default_rng([seed, index, 7]))
    Xq = space.encode_many(test)
    yq = np.array([task.objective(c) for c in test])
    X = space.encode_many([o.config for o in observed])
    y = np.array([o.score for o in observed])
    rows = []
    for n in CHECKPOINTS:
        if n > len(y):
            break
        posts = {
            "gp": fit_gp(X[:n], y[:n], restarts=3, seed=seed).posterior,
            "deep-kernel": meta.posterior(X[:n], y[:n], fine_tune=True, seed=seed),
            "deep-kernel-frozen": meta.posterior(X[:n], y[:n], fine_tune=False, seed=seed),
        }
        name, totals, count = state.get(n, ("deep-kernel", {}, 0))
        metrics = {m: _metrics(post, Xq, yq, task.low, task.high) for m, post in posts.items()}
        for m, v in metrics.items():  # per point, regret units; NaN where the guard kept no score
            v["preq_loglik"] = totals[m] / count + float(np.log(task.high - task.low)) if m in totals and count else float("nan")
        rows.append({
            "n": n,
            "guard": name,
            "scored": count,
            "best_so_far_regret": float(task.regret(y[:n].min())),
            **metrics,
        })
    return {"family": family.name, "task": task.name, "seed": seed, "rows": rows}


def summarise(results: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """Per family and checkpoint: mean of each metric per model, and how often the guard's pick
    also has the better test log-likelihood."""
    out: dict[str, Any] = {}
    for fam in dict.fromkeys(r["family"] for r in results):
        per_n: dict[str, Any] = {}
        for n in CHECKPOINTS:
            rows = [row for r in results if r["family"] == fam for row in r["rows"] if row["n"] == n]
            if not rows:
                continue
            agree = [
                (row["gp"]["test_loglik"] >= row["deep-kernel"]["test_loglik"]) == (row["guard"] == "gp")
                for row in rows if row["guard"] in ("gp", "deep-kernel")
            ]
            per_n[str(n)] = {
                "runs": len(rows),
                "guard": {k: sum(row["guard"] == k for row in rows) for k in ("gp", "deep-kernel", "mix")},
                "guard_agrees_with_test": (sum(agree) / len(agree)) if agree else None,
                **{m: {k: _nanmean([row[m][k] for row in rows]) for k in rows[0][m]} for m in MODELS},
            }
        out[fam] = per_n
    return out


def _nanmean(values: Sequence[float]) -> float:
    v = np.asarray(values, dtype=float)
    return float(np.mean(v[np.isfinite(v)])) if np.isfinite(v).any() else float("nan")


def markdown(summary: dict[str, Any]) -> str:
    lines = []
    for fam, per_n in summary.items():
        lines += [f"#### {fam}", "",
                  "| n | guard picks (gp / dk / mix) | guard's pick predicts better | model | prequential loglik/pt | test loglik/pt | best-tenth loglik/pt | Spearman | greedy regret |",
                  "|---|---|---|---|---|---|---|---|---|"]
        for n, s in per_n.items():
            g = s["guard"]
            agree = "-" if s["guard_agrees_with_test"] is None else f"{100 * s['guard_agrees_with_test']:.0f}%"
            for i, m in enumerate(MODELS):
                head = f"| {n} | {g['gp']} / {g['deep-kernel']} / {g['mix']} | {agree} |" if i == 0 else "| | | |"
                v = s[m]
                lines.append(f"{head} {m} | {v['preq_loglik']:.2f} | {v['test_loglik']:.2f} | {v['test_loglik_top10']:.2f} | {v['spearman']:.2f} | {v['greedy_regret']:.3g} |")
        lines.append("")
    return "\n".join(lines)


def _cli(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(prog="python -m forebear.bench.guard", description=__doc__.splitlines()[0])
    ap.add_argument("--families", nargs="+", default=["branin", "hartmann3", "hartmann6", "hgb"])
    ap.add_argument("--tasks", type=int, default=4, help="Held-out tasks per family.")
    ap.add_argument("--seeds", type=int, default=1)
    ap.add_argument("--out", default=None, help="Folder for guard.json and guard.md.")
    ns = ap.parse_args(argv)
    t0 = time.perf_counter()
    results = []
    for fam_name in ns.families:
        family = make_family(fam_name)
        for index in held_out(family, ns.tasks):
            for seed in range(ns.seeds):
                results.append(diagnose(family, index, seed))
                print(f"{fam_name} {family.tasks[index].name} seed {seed}: {time.perf_counter() - t0:.0f}s", flush=True)
    summary = summarise(results)
    text = markdown(summary)
    print(text)
    if ns.out:
        out = Path(ns.out)
        out.mkdir(parents=True, exist_ok=True)
        (out / "guard.json").write_text(json.dumps({"results": results, "summary": summary,
                                                     "wall_s": time.perf_counter() - t0}, indent=1))
        (out / "guard.md").write_text(text)


if __name__ == "__main__":
    _cli()
