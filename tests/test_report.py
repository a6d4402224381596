"""forebear.face.report: report.html and its plots, from finished and running logbooks."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from forebear.core.param import Param
from forebear.core.space import Space
from forebear.face.cli import main as cli_main
from forebear.face.report import PLOTS, TOP_N, write_report
from forebear.records.logbook import Logbook, record

SPACE = Space((
    Param("learning_rate", "float", 1e-4, 0.3, log=True),
    Param("depth", "int", 2, 12),
    Param("booster", "categorical", categories=("tree", "linear")),
))
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _header(sense: str = "minimize") -> dict:
    return record("search", name="store-3-demand", spec_hash="abc123", space=SPACE.to_dict(),
                  objective={"call": "demo:evaluate", sense: "val_loss"}, seed=3)


def _logbook(path: Path, n: int = 16, *, sense: str = "minimize", close: bool = True, running: int = 0) -> Logbook:
    """A logbook of ``n`` trials on three workers, with a failed trial, a lost attempt and
    ``running`` attempts still in flight; timestamps are spread so idle gaps exist."""
    j = Logbook(path)
    t0 = 1_700_000_000.0
    recs = [{**_header(sense), "at": t0}]
    configs = SPACE.latin_hypercube(n + running, seed=1)
    clock = {w: t0 + 0.5 * i for i, w in enumerate(("tcp://127.0.0.1:4101", "tcp://127.0.0.1:4102", "tcp://127.0.0.1:4103"))}
    for i, cfg in enumerate(configs):
        worker = list(clock)[i % 3]
        start = clock[worker] + (3.0 if i == 7 else 0.2)  # trial 7 follows an idle gap
        recs.append({**record("proposed", trial=i, round=i // 4, config=cfg, source="initial" if i < 4 else "model", model=None if i < 4 else "gp", acquisition=None), "at": start - 0.1})
        recs.append({**record("started", trial=i, attempt=1, worker=worker, host="node1", pid=100 + i % 3), "at": start})
        if i >= n:
            continue  # still running
        if i == 5:
            recs.append({**record("lost", trial=i, attempt=1, reason="worker"), "at": start + 1.0})
            start += 1.2
            recs.append({**record("started", trial=i, attempt=2, worker=worker, host="node1", pid=200), "at": start})
        end = start + 1.0 + (i % 4) * 0.4
        if i == 9:
            recs.append({**record("failed", trial=i, attempt=1, error="ValueError: diverged", retryable=False), "at": end})
        else:
            score = (cfg["depth"] - 6) ** 2 * 0.01 + abs(cfg["learning_rate"] - 0.03) + (0.05 if cfg["booster"] == "linear" else 0.0)
            recs.append({**record("scored", trial=i, attempt=len([r for r in recs if r.get("trial") == i and r["kind"] == "started"]), score=score, metrics={"val_loss": score}, seconds=end - start), "at": end})
        clock[worker] = end
    if close:
        recs.append({**record("closed", reason="budget", best=None), "at": max(clock.values()) + 0.1})
    j.append_many(recs)
    return j


def test_report_writes_page_and_plots(tmp_path: Path) -> None:
    j = _logbook(tmp_path / "runs" / "s.jsonl", n=16)
    table = j.fold()
    page = write_report(table, tmp_path / "rep", logbook=j.path)
    assert page == tmp_path / "rep" / "report.html"
    for png in PLOTS:
        data = (tmp_path / "rep" / png).read_bytes()
        assert data.startswith(PNG_MAGIC), png
        assert len(data) > 5000, f"{png} is suspiciously small ({len(data)} bytes)"
    text = page.read_text()
    for png in PLOTS:
        assert f"src='{png}?v=" in text
    # The ten best, ranked lowest first (minimize): the first row is table.best().
    rows = re.findall(r"<tr><td>(\d+)</td><td>(\d+)</td><td>([^<]+)</td>", text)
    assert len(rows) == TOP_N
    assert [int(r[1]) for r in rows] == [t.trial for t in table.ranked()[:TOP_N]]
    assert int(rows[0][1]) == table.best().trial
    scores = [float(r[2]) for r in rows]
    assert scores == sorted(scores)
    assert "closed (budget)" in text
    assert "scored 15" in text and "failed 1" in text


def test_plots_show_the_logbooks_data(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The figures write_report saves, read back through their axes: the best-so-far line is the
    running minimum of the scores in the order the logbook records them finishing; the timeline
    has one bar per attempt, as long as the attempt ran; each parameter panel plots every scored
    trial at its value and score."""
    from forebear.face import report as report_mod

    figures: dict[str, object] = {}
    real = report_mod._save

    def keep(fig, path: Path) -> None:  # noqa: ANN001 - a matplotlib Figure
        figures[path.name] = fig
        real(fig, path)

    monkeypatch.setattr(report_mod, "_save", keep)
    j = _logbook(tmp_path / "p.jsonl", n=16)
    write_report(j.fold(), tmp_path / "rep", logbook=j.path)
    recs = j.records()

    # Independently of the report's code: first terminal record of each trial, in logbook order.
    finished: dict[int, dict] = {}
    for r in sorted((r for r in recs if r["kind"] in ("scored", "failed")), key=lambda r: r["at"]):
        finished.setdefault(r["trial"], r)
    order = list(finished.values())
    running, best = [], None
    for r in order:
        if r["kind"] == "scored":
            best = r["score"] if best is None else min(best, r["score"])
        running.append(best)
    ax = figures["best_so_far.png"].axes[0]
    [line] = [ln for ln in ax.get_lines() if ln.get_label() == "best so far"]
    xs = [i for i, b in enumerate(running, start=1) if b is not None]
    np.testing.assert_array_equal(line.get_xdata(), xs)
    np.testing.assert_allclose(line.get_ydata(), [b for b in running if b is not None])
    assert line.get_ydata()[-1] == pytest.approx(min(r["score"] for r in recs if r["kind"] == "scored"))
    [fails] = [ln for ln in ax.get_lines() if ln.get_label() == "failed"]
    assert list(fails.get_xdata()) == [i for i, r in enumerate(order, start=1) if r["kind"] == "failed"]

    # Timeline: one bar per started attempt, width = end - start (the lost attempt ends at its record).
    ax = figures["timeline.png"].axes[0]
    bars = sorted(round(b.get_width(), 6) for b in ax.patches)
    starts = {(r["trial"], r["attempt"]): r["at"] for r in recs if r["kind"] == "started"}
    ends: dict[tuple[int, int], float] = {}
    for r in recs:
        if r["kind"] in ("scored", "failed", "lost"):
            ends[(r["trial"], r.get("attempt", 1))] = r["at"]
    assert bars == sorted(round(ends[k] - starts[k], 6) for k in starts)

    # Parameters: each panel's points are the scored trials' (value, score) pairs.
    table = j.fold()
    scored = {t.trial: t for t in table.scored()}
    panels = {a.get_title(): a for a in figures["parameters.png"].axes if a.get_visible()}
    assert set(panels) == {p.name for p in SPACE.params}
    for p in SPACE.params:
        points = panels[p.name].collections[0].get_offsets()
        assert len(points) == len(scored) == 15
        np.testing.assert_allclose(sorted(points[:, 1]), sorted(t.score for t in scored.values()))
        if p.kind != "categorical":
            np.testing.assert_allclose(sorted(points[:, 0]), sorted(t.config[p.name] for t in scored.values()))


def test_report_maximize_ranks_highest_first(tmp_path: Path) -> None:
    j = _logbook(tmp_path / "m.jsonl", n=12, sense="maximize")
    text = write_report(j.fold(), tmp_path / "rep").read_text()
    scores = [float(s) for s in re.findall(r"<tr><td>\d+</td><td>\d+</td><td>([^<]+)</td>", text)]
    assert scores == sorted(scores, reverse=True) and len(scores) == TOP_N


def test_report_on_running_search(tmp_path: Path) -> None:
    """Attempts in flight and no closed record: the page says so and still draws every plot."""
    j = _logbook(tmp_path / "r.jsonl", n=6, close=False, running=3)
    table = j.fold()
    assert table.counts()["running"] == 3
    text = write_report(table, tmp_path / "rep").read_text()
    assert "running, or stopped without closing" in text
    assert "running 3" in text
    for png in PLOTS:
        assert (tmp_path / "rep" / png).read_bytes().startswith(PNG_MAGIC)


def test_report_with_only_a_header(tmp_path: Path) -> None:
    j = Logbook(tmp_path / "h.jsonl")
    j.append(_header())
    text = write_report(j.fold(), tmp_path / "rep").read_text()
    assert "No trial has scored yet." in text
    for png in PLOTS:
        assert (tmp_path / "rep" / png).read_bytes().startswith(PNG_MAGIC)


def test_report_while_a_writer_appends(tmp_path: Path) -> None:
    """The report is drawn repeatedly while another thread keeps appending to the logbook."""
    j = Logbook(tmp_path / "live.jsonl")
    j.append(_header())
    stop = threading.Event()
    configs = SPACE.sample(400, 5)

    def writer() -> None:
        for i, cfg in enumerate(configs):
            if stop.is_set():
                return
            j.append(record("proposed", trial=i, round=0, config=cfg, source="random", model=None, acquisition=None))
            j.append(record("started", trial=i, attempt=1, worker=f"w{i % 2}", host="h", pid=1))
            j.append(record("scored", trial=i, attempt=1, score=float(i % 7), metrics={}, seconds=0.01))

    th = threading.Thread(target=writer)
    th.start()
    try:
        seen = []
        for _ in range(3):
            table = j.fold()
            write_report(table, tmp_path / "rep", logbook=j.path)
            seen.append(len(table))
            assert (tmp_path / "rep" / "report.html").read_text().endswith("</html>\n")
            time.sleep(0.05)
    finally:
        stop.set()
        th.join(timeout=30)
    assert seen[-1] > 0
    assert not list((tmp_path / "rep").glob(".*")), "temporary files were left behind"


def test_cli_report(tmp_path: Path) -> None:
    j = _logbook(tmp_path / "c.jsonl", n=8)
    res = CliRunner().invoke(cli_main, ["report", str(j.path), "-o", str(tmp_path / "out")])
    assert res.exit_code == 0, res.output
    assert (tmp_path / "out" / "report.html").exists()
    assert "report:" in res.output


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")


# Outside CI a missing browser is a missing system dependency: skip and say so. In CI (CI=true)
# .ci/run installs Chromium, so the test runs and a missing browser fails it.
IN_CI = os.environ.get("CI", "").lower() == "true"
NEEDS_CHROMIUM = pytest.mark.skipif(
    _chromium() is None and not IN_CI,
    reason="headless Chromium is not installed (Debian package chromium; .ci/run installs it)",
)


@NEEDS_CHROMIUM
def test_report_renders_in_headless_chromium(tmp_path: Path) -> None:
    j = _logbook(tmp_path / "b.jsonl", n=20)
    page = write_report(j.fold(), tmp_path / "rep", logbook=j.path)
    dom = _dump_dom(page, tmp_path / "profile")
    m = re.search(r'<body[^>]*data-images="([^"]+)"', dom)
    assert m, "the page's load handler did not run"
    assert m.group(1) == f"loaded {len(PLOTS)}", m.group(1)
    assert "<table id=\"best\">" in dom


@NEEDS_CHROMIUM
def test_chromium_check_detects_a_missing_plot(tmp_path: Path) -> None:
    """The marker really depends on the images: delete one PNG and it reports it missing."""
    j = _logbook(tmp_path / "b.jsonl", n=6)
    page = write_report(j.fold(), tmp_path / "rep")
    (tmp_path / "rep" / PLOTS[1]).unlink()
    dom = _dump_dom(page, tmp_path / "profile")
    assert 'data-images="missing 1"' in dom


def _dump_dom(page: Path, profile: Path) -> str:
    browser = _chromium()
    assert browser is not None, "CI=true but no headless Chromium on PATH: .ci/run should have installed it"
    cmd = [
        browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-dev-shm-usage", f"--user-data-dir={profile}", "--virtual-time-budget=5000",
        "--dump-dom", page.resolve().as_uri(),
    ]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=90)
    assert res.returncode == 0, res.stderr[-2000:]
    return res.stdout
