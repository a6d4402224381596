"""A search report: ``report.html`` and its PNG plots, drawn from a trial table.

The report reads nothing but the logbook's fold, so it works on the logbook of
a search that is still running (attempts in flight are drawn up to the last
record). Plots are made with matplotlib's object API (``Figure`` on the Agg
canvas), which needs no display and keeps no global pyplot state, so it is
safe to call from a controller thread. Every file is written to a temporary
name and renamed, so a browser refreshing the page never sees half a PNG.
"""

from __future__ import annotations

import html
import json
import math
import os
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from forebear.core.param import Param
from forebear.core.space import Space
from forebear.records.logbook import Attempt, Trial, TrialTable

try:
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullFormatter
except ModuleNotFoundError as exc:  # pragma: no cover - depends on the install
    msg = "forebear report needs matplotlib; install it with pip install 'forebear[report]'"
    raise ModuleNotFoundError(msg, name=exc.name) from None

PLOTS = ("best_so_far.png", "timeline.png", "parameters.png")
TOP_N = 10
OUTCOME_COLORS = {"scored": "#2e7d32", "failed": "#c62828", "lost": "#ef6c00", "running": "#1565c0"}
SOURCE_COLORS = {"initial": "#6a1b9a", "model": "#00838f", "random": "#9e9d24"}

MAX_CATEGORY_TICKS = 40  # a categorical axis labels each category up to this many, else only those tried

def write_report(table: TrialTable, out_dir: Path, logbook: Path | None = None) -> Path:
    """Write ``report.html`` and the PNGs it shows into ``out_dir``.

    Parameters
    ----------
    table
        The folded logbook (``Logbook(path).fold()``), finished or not.
    out_dir
        The folder to write into; created when missing.
    logbook
        The logbook's path, shown in the page.

    Returns
    -------
    Path
        The path of ``report.html``.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    space = _space(table)
    now = _now(table)
    _save(_best_so_far(table), out_dir / PLOTS[0])
    _save(_timeline(table, now), out_dir / PLOTS[1])
    _save(_parameters(table, space), out_dir / PLOTS[2])
    from forebear.face import curves

    page = _page(table, space, logbook, now, curves.section(table, out_dir, _save, int(now * 1000)))
    target = out_dir / "report.html"
    _atomic_write(target, page.encode("utf-8"))
    return target


# --------------------------------------------------------------------------
# inputs


def _space(table: TrialTable) -> Space:
    """The search's space from the logbook header, or one inferred from the configs."""
    header_space = (table.header or {}).get("space")
    if isinstance(header_space, dict) and header_space:
        try:
            return Space.from_dict(header_space)
        except (ValueError, TypeError, KeyError):
            pass  # an unreadable header space still deserves a report; infer below
    names: list[str] = []
    for t in table:
        names += [k for k in t.config if k not in names]
    params = []
    for name in names:
        values = [t.config[name] for t in table if name in t.config]
        numeric = [float(v) for v in values if isinstance(v, (int, float)) and not isinstance(v, bool)]
        if len(numeric) == len(values) and numeric and min(numeric) < max(numeric):
            params.append(Param(name, "float", min(numeric), max(numeric)))
        else:
            categories = list(dict.fromkeys(map(str, values))) or ["?"]
            params.append(Param(name, "categorical", categories=tuple(categories)))
    return Space(tuple(params)) if params else Space((Param("trial", "float", 0.0, 1.0),))


def _now(table: TrialTable) -> float:
    """The end of the time axis: the latest record (a running search stops there)."""
    times = [table.last_at] if table.last_at is not None else []
    for t in table.trials.values():
        times += [x for a in t.attempts for x in (a.started_at, a.ended_at) if x is not None]
    return float(max(times)) if times else time.time()


def _finished_in_order(table: TrialTable) -> list[Trial]:
    done = [t for t in table if t.terminal]
    return sorted(done, key=lambda t: (t.finished_at if t.finished_at is not None else math.inf, t.trial))


# --------------------------------------------------------------------------
# plots


def _best_so_far(table: TrialTable) -> Figure:
    fig = Figure(figsize=(7.5, 4.2), dpi=100, layout="constrained")
    ax = fig.subplots()
    metric = table.metric or "score"
    done = _finished_in_order(table)
    sign = -1.0 if table.sense == "maximize" else 1.0
    best: float | None = None
    xs, curve = [], []
    for i, t in enumerate(done, start=1):
        if t.state == "scored" and t.score is not None:
            if best is None or sign * t.score < sign * best:
                best = t.score
            ax.scatter([i], [t.score], s=18, color=SOURCE_COLORS.get(t.source, "#555"), zorder=3)
        if best is not None:
            xs.append(i)
            curve.append(best)
    if xs:
        ax.step(xs, curve, where="post", color="black", lw=1.8, label="best so far", zorder=2)
    failed = [i for i, t in enumerate(done, start=1) if t.state == "failed"]
    if failed:
        ax.plot(failed, [0.0] * len(failed), "x", color=OUTCOME_COLORS["failed"], transform=ax.get_xaxis_transform(), clip_on=False, label="failed")
    for source, color in SOURCE_COLORS.items():
        if any(t.source == source and t.state == "scored" for t in done):
            ax.scatter([], [], s=18, color=color, label=f"scored ({source})")
    ax.set_xlabel("finished trials")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_ylabel(f"{metric} ({table.sense})")
    ax.set_title("Best so far")
    if not done:
        ax.text(0.5, 0.5, "no trial has finished yet", ha="center", va="center", transform=ax.transAxes)
    ax.grid(alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize=8)
    return fig


def _worker_name(a: Attempt) -> str:
    if a.worker:
        return str(a.worker)
    if a.host or a.pid:
        return f"{a.host or '?'}:{a.pid or '?'}"
    return "unknown worker"


def _timeline(table: TrialTable, now: float) -> Figure:
    rows: dict[str, list[tuple[Trial, Attempt]]] = {}
    for t in table:
        for a in t.attempts:
            if a.started_at is not None:
                rows.setdefault(_worker_name(a), []).append((t, a))
    names = sorted(rows)
    height = 1.2 + 0.42 * max(len(names), 1)
    fig = Figure(figsize=(9.0, min(height, 14.0)), dpi=100, layout="constrained")
    ax = fig.subplots()
    t0 = table.first_at if table.first_at is not None else now
    for row, name in enumerate(names):
        for t, a in rows[name]:
            start = float(a.started_at) - t0  # type: ignore[arg-type]
            end = (a.ended_at if a.ended_at is not None else now) - t0
            # An attempt that just started still gets a visible sliver.
            width = max(end - start, 0.004 * max(now - t0, 1e-3))
            ax.barh(row, width, left=start, height=0.7, color=OUTCOME_COLORS.get(a.outcome, "#777"), edgecolor="white", lw=0.5)
            if end - start > 0.04 * max(now - t0, 1e-9):
                ax.text(start + (end - start) / 2, row, str(t.trial), ha="center", va="center", fontsize=6, color="white")
    ax.set_yticks(range(len(names)), [_short(n) for n in names], fontsize=7)
    ax.set_ylim(-0.6, max(len(names), 1) - 0.4)
    ax.invert_yaxis()
    ax.set_xlim(0, max(now - t0, 1e-3) * 1.01)
    ax.set_xlabel("seconds since the search started (gaps in a row: the worker was idle)")
    ax.set_title("Worker timeline (one row per worker, one bar per attempt)")
    handles = [Patch(color=color, label=outcome) for outcome, color in OUTCOME_COLORS.items()]
    fig.legend(handles=handles, loc="outside lower center", ncol=4, fontsize=8, frameon=False)
    if not names:
        ax.text(0.5, 0.5, "no attempt has started yet", ha="center", va="center", transform=ax.transAxes)
    ax.grid(axis="x", alpha=0.3)
    return fig


def _short(name: str, width: int = 28) -> str:
    return name if len(name) <= width else "..." + name[-(width - 3):]


def _parameters(table: TrialTable, space: Space) -> Figure:
    params = list(space.params)
    cols = min(3, len(params))
    nrows = math.ceil(len(params) / cols)
    fig = Figure(figsize=(3.4 * cols, 2.9 * nrows), dpi=100, layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, cols, squeeze=False)).ravel()
    scored = [t for t in table.scored() if t.score is not None]
    best = table.best()
    rng = np.random.default_rng(0)  # jitter of categorical points; fixed so reruns draw the same plot
    for ax, p in zip(axes, params, strict=False):  # axes may outnumber params
        pts = [(t.config[p.name], float(t.score), t) for t in scored if p.name in t.config]  # type: ignore[arg-type]
        title = p.name
        if p.kind == "categorical":
            labels = [str(c) for c in p.categories]
            if len(labels) > MAX_CATEGORY_TICKS:
                # Thousands of tick labels take matplotlib minutes to lay out: show the categories tried.
                tried = {str(v) for v, _, _ in pts}
                labels = [lab for lab in labels if lab in tried]
                title = f"{p.name} ({len(labels)} of {len(p.categories)} categories tried)"
            pos = {lab: i for i, lab in enumerate(labels)}
            x = np.array([pos.get(str(v), -1) for v, _, _ in pts], dtype=float)
            x = x + rng.uniform(-0.15, 0.15, size=len(x))
            if len(labels) <= MAX_CATEGORY_TICKS:
                ax.set_xticks(range(len(labels)), labels, fontsize=7, rotation=30 if len(labels) > 3 else 0)
            else:
                ax.set_xticks([])
            ax.set_xlim(-0.6, len(labels) - 0.4)
        else:
            x = np.array([float(v) for v, _, _ in pts])
            # The whole range is shown, with a margin so points on a bound are not cut in half.
            if p.log:
                ax.set_xscale("log")
                ax.set_xlim(p.low / 1.2, p.high * 1.2)  # type: ignore[operator]
                # Plain numbers at 1-2-5 steps; matplotlib's default labels short log ranges
                # with overlapping "4x10^0"-style minor labels.
                decades = math.log10(p.high / p.low)  # type: ignore[operator]
                ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0) if decades <= 2 else (1.0,)))
                ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
                ax.xaxis.set_minor_formatter(NullFormatter())
            else:
                pad = 0.04 * (p.high - p.low)  # type: ignore[operator]
                ax.set_xlim(p.low - pad, p.high + pad)  # type: ignore[operator]
        y = np.array([s for _, s, _ in pts])
        colors = [SOURCE_COLORS.get(t.source, "#555") for _, _, t in pts]
        if len(pts):
            ax.scatter(x, y, s=14, c=colors, alpha=0.85)
        for xi, (_, _, t) in zip(x, pts, strict=True):
            if best is not None and t.trial == best.trial:
                ax.scatter([xi], [t.score], s=90, facecolors="none", edgecolors="black", lw=1.5)
        ax.set_title(title, fontsize=9)
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.3)
    for ax in axes[len(params):]:
        ax.set_visible(False)
    fig.suptitle(f"{table.metric or 'score'} against each parameter (circled: best)", fontsize=10)
    sources = [src for src in SOURCE_COLORS if any(t.source == src for t in scored)]
    if sources:
        handles = [Line2D([], [], ls="", marker="o", color=SOURCE_COLORS[src], label=src) for src in sources]
        fig.legend(handles=handles, loc="outside lower center", ncol=len(handles), fontsize=8, frameon=False)
    return fig


def _save(fig: Figure, path: Path) -> None:
    fd, tmp = tempfile.mkstemp(prefix=".", suffix=".png", dir=path.parent)
    os.close(fd)
    try:
        fig.savefig(tmp, format="png")
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def _atomic_write(path: Path, data: bytes) -> None:
    fd, tmp = tempfile.mkstemp(prefix=".", suffix=path.suffix, dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


# --------------------------------------------------------------------------
# the page


# Sets data-images on <body> once every image has loaded (or "missing N"); the
# rendering test reads it from the DOM, and a person sees a note if a plot broke.
_SCRIPT = """
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var bad = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); });
  document.body.setAttribute('data-images', bad.length ? 'missing ' + bad.length : 'loaded ' + imgs.length);
  if (bad.length) {
    var p = document.createElement('p'); p.className = 'warn';
    p.textContent = bad.length + ' plot(s) did not load; rerun forebear report.';
    document.body.insertBefore(p, document.body.firstChild);
  }
});
"""

_STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 960px; color: #222; }
table { border-collapse: collapse; font-size: 0.9em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: left; }
th { background: #f3f3f3; }
img { max-width: 100%; display: block; margin: 0.5em 0 1.5em; }
.warn { color: #c62828; font-weight: bold; }
code { background: #f3f3f3; padding: 0 0.2em; }
"""


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def _top_table(trials: Sequence[Trial], space: Space, metric: str) -> str:
    if not trials:
        return "<p>No trial has scored yet.</p>"
    heads = ["rank", "trial", metric, *space.names, "seconds", "attempts", "source"]
    out = ["<table id='best'><thead><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in heads) + "</tr></thead><tbody>"]
    for rank, t in enumerate(trials, start=1):
        cells = [rank, t.trial, t.score, *[t.config.get(n, "") for n in space.names], t.seconds if t.seconds is not None else "", len(t.attempts), t.source]
        out.append("<tr>" + "".join(f"<td>{html.escape(_fmt(c))}</td>" for c in cells) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def _page(table: TrialTable, space: Space, logbook: Path | None, now: float, extra: str = "") -> str:
    header = table.header or {}
    name = str(header.get("name") or "search")
    metric = table.metric or "score"
    counts = table.counts()
    best = table.best()
    span = (now - table.first_at) if table.first_at is not None else 0.0
    state = f"closed ({table.closed.get('reason')})" if table.closed else "running, or stopped without closing"
    facts = [
        ("logbook", str(logbook) if logbook else "-"),
        ("objective", f"{table.sense} {metric}"),
        ("trials", ", ".join(f"{k} {v}" for k, v in counts.items())),
        ("state", state),
        ("elapsed", f"{span:.1f} s (to the last record)"),
        ("best", f"trial {best.trial}: {metric} = {_fmt(best.score)} {json.dumps(best.config)}" if best else "none scored yet"),
        ("written", time.strftime("%Y-%m-%d %H:%M:%S", time.localtime())),
    ]
    if table.skipped:
        facts.append(("note", f"{table.skipped} unreadable logbook line(s) skipped"))
    rows = "\n".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in facts)
    stamp = int(now * 1000)  # cache-buster: a refresh during a running search shows the new plots
    imgs = "\n".join(
        f"<h2>{html.escape(title)}</h2>\n<img src='{png}?v={stamp}' alt='{html.escape(title)}'>"
        for png, title in zip(PLOTS, ("Best so far against finished trials", "Worker timeline", "Score against each parameter"), strict=True)
    )
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>forebear report: {html.escape(name)}</title>
<style>{_STYLE}</style>
<script>{_SCRIPT}</script>
</head><body>
<h1>forebear report: {html.escape(name)}</h1>
<table id="facts">{rows}</table>
<h2>The {TOP_N} best configurations</h2>
{_top_table(table.ranked()[:TOP_N], space, metric)}
{imgs}
{extra}
</body></html>
"""
