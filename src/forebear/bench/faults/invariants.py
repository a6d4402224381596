"""What must hold in a logbook after any fault (:func:`check_invariants`)."""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Mapping, Sequence
from typing import Any


def check_invariants(records: Sequence[Mapping[str, Any]], sense: str = "minimize") -> dict[str, Any]:
    """Count what the logbook holds and list every broken invariant (``violations``).

    Invariants: each proposed trial has exactly one terminal record (``scored``,
    or ``failed`` that is not retryable); no trial has two ``scored`` records;
    no record names a trial that was never proposed; every attempt that started
    has an outcome; every ``lost`` attempt is followed by a later attempt of the
    same trial or by the ``failed`` record that says no retries were left; and
    the fold's best trial is the best ``scored`` record.
    """
    from forebear.records.logbook import fold

    proposed: dict[int, dict[str, Any]] = {}
    terminal: Counter[int] = Counter()
    scored: dict[int, list[float]] = defaultdict(list)
    started: set[tuple[int, int]] = set()
    ended: set[tuple[int, int]] = set()
    lost: list[tuple[int, int, str]] = []
    attempts: dict[int, set[int]] = defaultdict(set)
    gave_up: set[int] = set()
    violations: list[str] = []
    for r in records:
        kind, tid, att = r.get("kind"), r.get("trial"), r.get("attempt")
        if kind in ("search", "closed"):
            continue
        if kind == "proposed":
            if tid in proposed:
                violations.append(f"trial {tid}: proposed twice")
            proposed[int(tid)] = dict(r.get("config") or {})
            continue
        if tid not in proposed:
            violations.append(f"a {kind} record names trial {tid}, which was never proposed")
            continue
        attempts[tid].add(int(att or 0))
        if kind == "started":
            started.add((tid, att))
        elif kind == "scored":
            scored[tid].append(float(r["score"]))
            terminal[tid] += 1
            ended.add((tid, att))
        elif kind == "failed":
            ended.add((tid, att))
            if not r.get("retryable"):
                terminal[tid] += 1
                if "no retries left" in str(r.get("error")):
                    gave_up.add(tid)
        elif kind == "lost":
            ended.add((tid, att))
            lost.append((tid, int(att), str(r.get("reason"))))
    for tid in sorted(proposed):
        if terminal[tid] != 1:
            violations.append(f"trial {tid}: {terminal[tid]} terminal records (want exactly 1)")
        if len(scored[tid]) > 1:
            violations.append(f"trial {tid}: scored {len(scored[tid])} times")
    for tid, att in sorted(started - ended):
        violations.append(f"trial {tid} attempt {att}: started but never ended")
    for tid, att, reason in lost:
        if not any(a > att for a in attempts[tid]) and tid not in gave_up:
            violations.append(f"trial {tid} attempt {att}: lost ({reason}) and never retried")
    table = fold(records)
    sign = -1.0 if sense == "maximize" else 1.0
    firsts = {t: s[0] for t, s in scored.items() if s}
    best_record = min(firsts, key=lambda t: (sign * firsts[t], t)) if firsts else None
    best = table.best()
    if (best.trial if best else None) != best_record:
        violations.append(f"the fold's best trial {best.trial if best else None} is not the best scored record {best_record}")
    elif best is not None and best.config != proposed[best.trial]:
        violations.append(f"the best trial's configuration {best.config} differs from its proposed one")
    reasons = Counter(reason for _, _, reason in lost)
    return {
        "trials": len(proposed),
        "scored": sum(1 for s in scored.values() if s),
        "failed": sum(1 for t in proposed if terminal[t] and not scored[t]),
        "attempts": sum(len(a) for a in attempts.values()),
        "lost": dict(sorted(reasons.items())),
        "best_trial": best_record,
        "violations": violations,
    }
