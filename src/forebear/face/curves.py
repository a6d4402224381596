"""The report's learning-curve section: every trial's intermediate scores, and the worker time halting saved.

Drawn only for a search whose logbook holds ``step`` records. Scored trials'
curves are solid, halted trials' curves dashed and ending in a cross at the
step they were halted. The time saved is an estimate: a halted trial would
have needed about ``seconds * steps / step`` to run to the search's last
step, since steps of one trial cost about the same.
"""

from __future__ import annotations

import html
from pathlib import Path
from typing import Any

from matplotlib.figure import Figure

from forebear.records.curves import final_step
from forebear.records.logbook import TrialTable

PLOT = "curves.png"
COLORS = {"scored": "#2e7d32", "halted": "#ef6c00", "running": "#1565c0", "failed": "#c62828", "queued": "#777777"}


def worker_time(table: TrialTable) -> dict[str, Any]:
    """Worker seconds the finished trials used, and an estimate of those halting saved."""
    steps = final_step(table)
    used = sum(float(t.seconds) for t in table if t.terminal and isinstance(t.seconds, (int, float)))
    saved = 0.0
    for t in table.by_state("halted"):
        if steps and t.step and isinstance(t.seconds, (int, float)) and t.step < steps:
            saved += float(t.seconds) * (steps / t.step - 1.0)
    return {"used": used, "saved": saved, "steps": steps, "halted": len(table.by_state("halted"))}


def figure(table: TrialTable) -> Figure:
    """Curves of every trial that reported intermediate scores, by state."""
    fig = Figure(figsize=(7.5, 4.2), dpi=100, layout="constrained")
    ax = fig.subplots()
    seen: set[str] = set()
    for t in table:
        curve = t.curve
        if not curve:
            continue
        xs, ys = [s for s, _ in curve], [v for _, v in curve]
        color = COLORS.get(t.state, "#555555")
        label = t.state if t.state not in seen else None
        seen.add(t.state)
        if t.state == "halted":
            ax.plot(xs, ys, ls="--", lw=1.0, color=color, alpha=0.8, label=label)
            ax.plot([xs[-1]], [ys[-1]], "x", color=color, ms=6)
        else:
            ax.plot(xs, ys, lw=1.4 if t.state == "scored" else 1.0, color=color, alpha=0.9, label=label)
    ax.set_xlabel("step")
    ax.set_ylabel(f"{table.metric or 'score'} ({table.sense})")
    ax.set_title("Learning curves (halted trials dashed)")
    ax.grid(alpha=0.3)
    if seen:
        ax.legend(loc="best", fontsize=8)
    return fig


def section(table: TrialTable, out_dir: Path, save: Any, stamp: int) -> str:
    """Write the curves plot with ``save(fig, path)`` and return the page's HTML for it ('' without curves)."""
    if not any(t.curve for t in table):
        return ""
    save(figure(table), out_dir / PLOT)
    wt = worker_time(table)
    total = wt["used"] + wt["saved"]
    share = f" ({100.0 * wt['saved'] / total:.0f}% of what running them to the end would have taken)" if total > 0 else ""
    line = (
        f"{wt['halted']} trial(s) halted; worker time used {wt['used']:.1f} s, "
        f"saved about {wt['saved']:.1f} s{share}, estimated from each halted trial's time per step"
    )
    return (
        f"<h2>Learning curves</h2>\n<p id='saved'>{html.escape(line)}</p>\n"
        f"<img src='{PLOT}?v={stamp}' alt='Learning curves'>"
    )
