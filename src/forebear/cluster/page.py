"""The live search page's markup: counts, best so far, a best-so-far plot, running trials, the ten best.

:func:`page` is the whole document; :func:`live` is the part that the page's
script fetches again every few seconds while the search runs (from
``/forebear/live``) and swaps in, so the page follows the search without
reloading. The plot is inline SVG; nothing is loaded from elsewhere.
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from typing import Any

from forebear.records import html
from forebear.records.logbook import TrialTable

REFRESH = 2.0  # seconds between the page's refreshes while the search runs
TOP = 10  # best trials listed
PLOT_W, PLOT_H, PAD = 640, 220, 44


def best_so_far(table: TrialTable) -> list[tuple[int, float, float]]:
    """(trial, score, best so far) for each scored trial, in the order the trials scored."""
    sign = -1.0 if table.sense == "maximize" else 1.0
    scored = sorted(table.scored(), key=lambda t: (t.finished_at or 0.0, t.trial))
    out: list[tuple[int, float, float]] = []
    best: float | None = None
    for t in scored:
        s = float(t.score)  # type: ignore[arg-type]
        best = s if best is None or sign * s < sign * best else best
        out.append((t.trial, s, best))
    return out


def plot_svg(points: Sequence[tuple[int, float, float]], metric: str | None) -> str:
    """Every score as a dot and the best so far as a step line, against the order of scoring."""
    if not points:
        return '<svg class="forebear-plot" width="640" height="40"><text x="8" y="24">no trial has scored yet</text></svg>'
    scores = [p[1] for p in points]
    lo, hi = min(scores), max(scores)
    if hi == lo:
        lo, hi = lo - 0.5, hi + 0.5
    n = len(points)

    def x(i: float) -> float:
        return PAD + (PLOT_W - 2 * PAD) * (i / max(1, n - 1))

    def y(v: float) -> float:
        return PLOT_H - PAD + (PAD * 2 - PLOT_H) * (v - lo) / (hi - lo)

    dots = "".join(
        f'<circle cx="{x(i):.1f}" cy="{y(s):.1f}" r="3" fill="#9aa"><title>trial {t}: {html.number(s)}</title></circle>'
        for i, (t, s, _) in enumerate(points)
    )
    d = f"M{x(0):.1f} {y(points[0][2]):.1f}" + "".join(f" H{x(i):.1f} V{y(b):.1f}" for i, (_, _, b) in enumerate(points) if i)
    line = f'<path d="{d}" fill="none" stroke="#1f6fb4" stroke-width="2"/>'
    axes = (
        f'<line x1="{PAD}" y1="{PLOT_H - PAD}" x2="{PLOT_W - PAD}" y2="{PLOT_H - PAD}" stroke="#444"/>'
        f'<line x1="{PAD}" y1="{PAD}" x2="{PAD}" y2="{PLOT_H - PAD}" stroke="#444"/>'
        f'<text x="{PAD - 4}" y="{y(hi) + 4:.1f}" text-anchor="end" font-size="10">{html.esc(html.number(hi))}</text>'
        f'<text x="{PAD - 4}" y="{y(lo) + 4:.1f}" text-anchor="end" font-size="10">{html.esc(html.number(lo))}</text>'
        f'<text x="{PLOT_W / 2:.0f}" y="{PLOT_H - 10}" text-anchor="middle" font-size="11">trials in the order they scored ({n})</text>'
        f'<text x="12" y="{PLOT_H / 2:.0f}" font-size="11" transform="rotate(-90 12 {PLOT_H / 2:.0f})" text-anchor="middle">'
        f"{html.esc(metric or 'score')}</text>"
    )
    return (
        f'<svg class="forebear-plot" xmlns="http://www.w3.org/2000/svg" width="{PLOT_W}" height="{PLOT_H}" '
        f'data-points="{n}" data-best="{html.esc(html.number(points[-1][2]))}">{axes}{line}{dots}</svg>'
    )


def running_rows(table: TrialTable, tasks: Mapping[tuple[int, int], str], now: float) -> list[list[Any]]:
    """(trial, attempt, worker, age) of each running attempt: the logbook's, and those only the scheduler knows of."""
    rows: list[list[Any]] = []
    seen: set[tuple[int, int]] = set()
    for t in table.by_state("running"):
        att = t.attempts[-1] if t.attempts else None
        key = (t.trial, t.last_attempt)
        seen.add(key)
        worker = (att.worker if att else None) or tasks.get(key) or ""
        age = f"{now - att.started_at:.0f} s" if att and att.started_at else ""
        rows.append([t.trial, t.last_attempt, worker, age])
    for (trial, attempt), worker in sorted(tasks.items()):
        if (trial, attempt) not in seen and trial in table.trials and not table.trials[trial].terminal:
            # Without a shared filesystem the logbook learns of an attempt only when it ends.
            rows.append([trial, attempt, worker, "(not in the logbook yet)"])
    return rows


def live(table: TrialTable, *, tasks: Mapping[tuple[int, int], str] | None = None, now: float | None = None) -> str:
    """The refreshed part of the page."""
    now = time.time() if now is None else now
    header = table.header or {}
    closed = (table.closed or {}).get("reason")
    best = table.best()
    state = f"closed ({closed})" if closed else "running"
    parts = [
        f'<div id="forebear-state" data-closed="{1 if closed else 0}" data-counts="{html.esc(_counts(table))}">'
        f"<p>{html.esc(header.get('name') or 'search')}: {html.esc(state)} &middot; "
        f"{html.esc(table.sense)} {html.esc(table.metric or '?')} &middot; updated {time.strftime('%H:%M:%S', time.localtime(now))}</p></div>",
        "<h2>Counts</h2>",
        html.counts_table(table.counts(), table.finished, (header.get("budget") or {}).get("trials")),
        "<h2>Best so far</h2>",
        f'<div id="forebear-best" data-trial="{best.trial if best else ""}" data-score="{html.esc(html.number(best.score) if best else "")}">',
        html.best_table(best, table.metric, table.sense),
        "</div>",
        plot_svg(best_so_far(table), table.metric),
        "<h2>Running</h2>",
    ]
    rows = running_rows(table, tasks or {}, now)
    parts.append(html.table(["trial", "attempt", "worker", "age"], rows, numeric=(0, 1, 3)) if rows else "<p>no attempt is running</p>")
    parts.append("<h2>The ten best</h2>")
    ranked = table.ranked()[:TOP]
    parts.append(html.trials_table(ranked, metric=table.metric, limit=None) if ranked else "<p>none scored yet</p>")
    return "".join(parts)


def _counts(table: TrialTable) -> str:
    return " ".join(f"{k}={v}" for k, v in table.counts().items())


def page(table: TrialTable | None, *, name: str, logbook: str, others: Sequence[str] = (), body: str | None = None,
         tasks: Mapping[tuple[int, int], str] | None = None) -> str:
    """The whole document for one search; ``body`` replaces the live part (a message when the logbook is unreadable)."""
    nav = ""
    if others:
        links = " ".join(f'<a href="?search={html.esc(o)}">{html.esc(o)}</a>' for o in others)
        nav = f"<p>searches on this scheduler: {links}</p>"
    inner = body if body is not None else live(table or TrialTable(), tasks=tasks)
    script = (
        "<script>(function(){var box=document.getElementById('forebear-live');"
        "function closed(){var s=document.getElementById('forebear-state');return s&&s.dataset.closed==='1';}"
        "function tick(){if(closed())return;"
        "fetch('live'+location.search,{cache:'no-store'}).then(function(r){return r.ok?r.text():null;})"
        ".then(function(t){if(t!==null){box.innerHTML=t;var b=document.body;b.dataset.refreshed=(+b.dataset.refreshed||0)+1;}})"
        ".catch(function(){})"
        f".then(function(){{setTimeout(tick,{int(REFRESH * 1000)});}});}}"
        f"setTimeout(tick,{int(REFRESH * 1000)});}})();</script>"
    )
    return (
        "<!DOCTYPE html><html><head><meta charset=\"utf-8\">"
        f"<title>forebear: {html.esc(name)}</title>{html.STYLE}"
        "<style>body{font-family:sans-serif;margin:16px}h1{font-size:18px}h2{font-size:14px;margin:14px 0 4px}</style>"
        f"</head><body><h1>forebear search {html.esc(name)}</h1>{nav}"
        f"<p>logbook <code>{html.esc(logbook)}</code> &middot; <a href=\"status.json?search={html.esc(name)}\">status.json</a></p>"
        f'<div id="forebear-live">{inner}</div>{script}</body></html>'
    )
