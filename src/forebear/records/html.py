"""HTML tables of a search: what Jupyter shows for a trial table, a result or a running search.

Plain HTML, every value escaped, no script and no outside resource, so the same
markup serves a notebook cell (``_repr_html_``) and the live search page on the
Dask dashboard (:mod:`forebear.cluster.page`).
"""

from __future__ import annotations

import html
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from forebear.records.logbook import STATES, Trial, TrialTable

ROWS = 50  # trials shown in a notebook cell; the rest are counted, not listed

STYLE = (
    "<style>"
    "table.forebear{border-collapse:collapse;font-size:12px;margin:4px 0}"
    "table.forebear th,table.forebear td{border:1px solid #ccc;padding:2px 6px;text-align:left;vertical-align:top}"
    "table.forebear th{background:#f2f2f2}"
    "table.forebear td.num{text-align:right;font-variant-numeric:tabular-nums}"
    "</style>"
)


def esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def number(value: Any) -> str:
    """A score or a duration for a table cell: six significant digits, '' for nothing."""
    if value is None:
        return ""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return f"{value:.6g}"


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], *, numeric: Sequence[int] = (), attrs: str = "") -> str:
    """An escaped HTML table; columns whose index is in ``numeric`` are right-aligned."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = "".join(f'<td class="num">{esc(c)}</td>' if i in numeric else f"<td>{esc(c)}</td>" for i, c in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    return f'<table class="forebear"{attrs}><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'


def config_text(config: Mapping[str, Any]) -> str:
    return ", ".join(f"{k}={number(v) if isinstance(v, float) else v}" for k, v in config.items())


def counts_table(counts: Mapping[str, int], finished: int, budget: int | None = None) -> str:
    headers = [*STATES, "finished"]
    row = [counts.get(s, 0) for s in STATES] + [f"{finished}/{budget}" if budget else finished]
    return table(headers, [row], numeric=range(len(headers)))


def best_table(best: Trial | None, metric: str | None, sense: str) -> str:
    """The best trial: its score and every parameter of its configuration."""
    if best is None:
        return "<p>best: none scored yet</p>"
    rows: list[list[Any]] = [["trial", best.trial], [f"{metric or 'score'} ({sense})", number(best.score)]]
    rows += [[k, number(v) if isinstance(v, float) else v] for k, v in best.config.items()]
    return table(["best so far", ""], rows)


def trials_table(trials: Sequence[Trial], *, metric: str | None, limit: int | None = ROWS) -> str:
    """One row a trial (state, score, configuration, seconds, attempts, source), at most ``limit`` rows."""
    params: list[str] = []
    for t in trials:
        params += [k for k in t.config if k not in params]
    shown = list(trials if limit is None else trials[:limit])
    rows = [
        [t.trial, t.state, number(t.score), *[_cell(t.config.get(p)) for p in params], number(t.seconds), len(t.attempts), t.source]
        for t in shown
    ]
    headers = ["trial", "state", metric or "score", *params, "seconds", "attempts", "source"]
    numeric = [0, 2, *[3 + i for i, p in enumerate(params) if all(isinstance(t.config.get(p), (int, float)) for t in shown)]]
    numeric += [3 + len(params), 4 + len(params)]
    out = table(headers, rows, numeric=numeric)
    if len(trials) > len(shown):
        out += f"<p>... and {len(trials) - len(shown)} more trials</p>"
    return out


def _cell(value: Any) -> Any:
    if value is None:
        return ""
    if isinstance(value, float):
        return number(value)
    if isinstance(value, (dict, list)):
        return json.dumps(value)
    return value


def trial_table_html(t: TrialTable, *, title: str | None = None) -> str:
    """A folded logbook: its counts, the best trial and the trials (``TrialTable._repr_html_``)."""
    name = (t.header or {}).get("name") or "search"
    parts = [STYLE, f"<div><strong>{esc(title or name)}</strong>"]
    closed = (t.closed or {}).get("reason")
    parts.append(f" &middot; {esc(t.sense)} {esc(t.metric or '?')}" + (f" &middot; closed ({esc(closed)})" if closed else ""))
    parts.append("</div>")
    parts.append(counts_table(t.counts(), t.finished, ((t.header or {}).get("budget") or {}).get("trials")))
    parts.append(best_table(t.best(), t.metric, t.sense))
    parts.append(trials_table(list(t), metric=t.metric))
    return "".join(parts)
