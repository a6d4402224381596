"""The live search page on the Dask dashboard, served by the embedded cluster's scheduler.

A gated objective makes the search hold still between steps: trial ``n`` scores
``10 - n`` (so each one is a new best) once the test creates the file ``go-n``.
The page is loaded in headless Chromium between the steps.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import subprocess
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import psutil
import pytest
from click.testing import CliRunner

import forebear
from forebear.cluster.page import live, page
from forebear.face.cli import main
from forebear.records.logbook import Logbook, fold, record
from tests.process_helpers import until

DEADLINE = 90.0
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")


def _until(check: Any, what: str, timeout: float = DEADLINE) -> None:
    until(check, what, timeout)


def _dom(url: str, profile: Path, budget_ms: int = 500) -> str:
    if CHROMIUM is None:
        if os.environ.get("CI") == "true":
            pytest.fail("headless Chromium is required on CI (Debian package chromium)")
        pytest.skip("headless Chromium is not installed (Debian package chromium; .ci/run installs it)")
    cmd = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-dev-shm-usage", f"--user-data-dir={profile}", f"--virtual-time-budget={budget_ms}", "--dump-dom", url,
    ]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=90)
    assert res.returncode == 0, res.stderr[-2000:]
    return res.stdout


def _get(url: str) -> Any:
    with urllib.request.urlopen(url, timeout=30) as resp:
        return json.load(resp)


def _best(dom: str) -> str:
    m = re.search(r'id="forebear-best" data-trial="(\d*)" data-score="([^"]*)"', dom)
    assert m, dom[-2000:]
    return m.group(2)


def test_the_live_page_follows_a_search(tmp_path: Path) -> None:
    gates = tmp_path / "gates"
    gates.mkdir()
    gate_dir = str(gates)

    def gated(config: dict[str, Any]) -> float:
        import os as o
        import time as t

        trial = int(o.environ["FOREBEAR_TRIAL"])
        while not o.path.exists(o.path.join(gate_dir, f"go-{trial}")):
            t.sleep(0.05)
        return 10.0 - trial

    logbook = tmp_path / "runs" / "live.jsonl"
    spec = {
        "name": "live",
        "objective": {"minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 3, "batch": 1, "concurrency": 1},
        "cluster": {"local": {"workers": 1}},
        "logbook": str(logbook),
    }
    handle = forebear.start(spec, objective=gated)
    try:
        _until(lambda: handle.link is not None or handle.done(), "the page link")
        link = handle.link
        assert link is not None and link.startswith("http://127.0.0.1:") and "/forebear/?search=live" in link
        base = link.split("/forebear/", 1)[0]

        # The page's port listens on loopback only.
        port = urlsplit(link).port
        listening = {c.laddr.ip for c in psutil.Process().net_connections(kind="inet") if c.status == psutil.CONN_LISTEN and c.laddr.port == port}
        assert listening == {"127.0.0.1"}, listening
        outside = _outside_address()
        if outside is not None:
            with pytest.raises(OSError):
                socket.create_connection((outside, port), timeout=2).close()

        (gates / "go-0").touch()
        _until(lambda: Logbook(logbook).fold().counts()["scored"] == 1, "trial 0 scored")
        _until(lambda: Logbook(logbook).fold().counts()["running"] == 1, "trial 1 running")
        dom = _dom(link, tmp_path / "profile", budget_ms=5000)
        assert _best(dom) == "10"
        assert 'data-points="1"' in dom  # the plot holds the one score
        assert re.search(r"<td[^>]*>1</td><td[^>]*>1</td><td>tcp://127\.0\.0\.1:\d+</td><td[^>]*>\d+ s</td>", dom), "trial 1's row"
        assert int(re.search(r'<body[^>]*data-refreshed="(\d+)"', dom).group(1)) >= 1  # the script refreshed the page

        # status.json says what `forebear status --json` says, counts included.
        served = _get(f"{base}/forebear/status.json?search=live")
        res = CliRunner().invoke(main, ["status", str(logbook), "--json"])
        assert res.exit_code == 0, res.output
        printed = json.loads(res.stdout)
        assert served["counts"] == printed["counts"]
        assert (served["counts"]["running"], served["counts"]["scored"], served["counts"]["failed"]) == (1, 1, 0)
        assert served["best"] == printed["best"] and served["running"] == printed["running"]

        (gates / "go-1").touch()
        _until(lambda: Logbook(logbook).fold().counts()["scored"] == 2, "trial 1 scored")
        dom = _dom(link, tmp_path / "profile")
        assert _best(dom) == "9" and 'data-points="2"' in dom

        (gates / "go-2").touch()
        result = handle.wait(DEADLINE)
    finally:
        for n in range(3):
            (gates / f"go-{n}").touch()
        if not handle.done():
            handle.stop(cancel=True, timeout=DEADLINE)
    assert result.closed == "budget" and result.best is not None and result.best.score == 8.0


def _outside_address() -> str | None:
    """An address of this machine that is not loopback, if it has one."""
    for addrs in psutil.net_if_addrs().values():
        for a in addrs:
            if a.family == socket.AF_INET and not a.address.startswith("127."):
                return a.address
    return None


def test_the_page_escapes_what_it_shows_and_lists_running_attempts(tmp_path: Path) -> None:
    recs = [
        record("search", name="esc", objective={"function": "m:f", "maximize": "acc"}, budget={"trials": 5}),
        record("proposed", trial=0, round=0, config={"kind": "<script>alert(1)</script>"}, source="initial"),
        record("started", trial=0, attempt=1, worker="tcp://10.0.0.5:4000", host="h", pid=7),
        record("scored", trial=0, attempt=1, score=0.5, metrics={}, seconds=1.0),
        record("proposed", trial=1, round=0, config={"kind": "a"}, source="initial"),
        record("started", trial=1, attempt=1, worker="tcp://10.0.0.6:4000", host="h", pid=8),
        record("proposed", trial=2, round=0, config={"kind": "b"}, source="initial"),
    ]
    table = fold(recs)
    now = recs[5]["at"] + 42
    # Trial 2 runs on a worker but is not in the logbook yet (no shared filesystem): the scheduler says so.
    fragment = live(table, tasks={(2, 1): "tcp://10.0.0.7:4000"}, now=now)
    assert "<script>alert" not in fragment and "&lt;script&gt;" in fragment
    assert "<td>tcp://10.0.0.6:4000</td><td class=\"num\">42 s</td>" in fragment
    assert "tcp://10.0.0.7:4000</td><td class=\"num\">(not in the logbook yet)</td>" in fragment
    assert 'data-closed="0"' in fragment and "maximize acc" in fragment
    doc = page(table, name="esc", logbook=str(tmp_path / "x.jsonl"), tasks={})
    assert doc.startswith("<!DOCTYPE html>") and doc.count("<script>") == 1


def test_an_unknown_search_is_a_clear_404() -> None:
    from distributed import LocalCluster

    from forebear.cluster.dashboard import SearchPage, page_link

    with LocalCluster(n_workers=0, processes=False, dashboard_address="127.0.0.1:0") as lc, lc.get_client() as c:
        c.register_plugin(SearchPage("one", "/nonexistent/one.jsonl"), name="forebear-page-one")
        link = page_link(c, "one")
        assert link is not None
        # 404 Not Found and 503 Service Unavailable as HTTP defines them (RFC 9110, secs. 15.5.5 and
        # 15.6.4, from memory): no such resource; the server cannot serve it now.
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(link.replace("search=one", "search=two"), timeout=30)
        assert err.value.code == 404 and "no such search on this scheduler (searches: one)" in err.value.read().decode()
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(link.replace("/forebear/?", "/forebear/status.json?"), timeout=30)
        assert err.value.code == 503 and "the scheduler cannot read the logbook /nonexistent/one.jsonl" in err.value.read().decode()
