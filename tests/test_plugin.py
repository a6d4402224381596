"""The controller hosted in the scheduler: --detach, and the scheduler preload."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from typing import Any

import yaml

from forebear.records.logbook import Logbook

from .conftest import LoopbackCluster, child_env

DEADLINE = 150.0


def spec_dict(tmp: Path, address: str | None, trials: int = 4, **extra: Any) -> dict[str, Any]:
    spec: dict[str, Any] = {
        "name": "hosted",
        "objective": {"call": "objectives:quadratic", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": trials, "batch": 2, "concurrency": 2},
        "logbook": str(tmp / "runs" / "hosted.jsonl"),
        **extra,
    }
    if address:
        spec["cluster"] = {"address": address}
    return spec


def wait_closed(logbook: Path, cluster: LoopbackCluster, saw_status: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    deadline = time.monotonic() + DEADLINE
    while True:
        table = Logbook(logbook).fold() if logbook.exists() else None
        if table is not None and table.closed is not None:
            return table.closed
        if table is not None and table.header is not None and saw_status is not None and not saw_status:
            out = subprocess.run([sys.executable, "-m", "forebear", "status", str(logbook), "--json"],
                                 env=child_env(), capture_output=True, text=True, timeout=60)
            assert out.returncode == 0, out.stderr
            saw_status.append(json.loads(out.stdout))
        assert time.monotonic() < deadline, f"the hosted search did not close:\n{cluster.log('scheduler')}"
        time.sleep(0.1)


def served(link: str) -> dict[str, Any]:
    """The page's status.json, loaded from the scheduler's HTTP server."""
    with urllib.request.urlopen(link.replace("/forebear/?", "/forebear/status.json?"), timeout=30) as resp:
        return json.load(resp)


def test_detached_search_completes_after_the_client_exits(tmp_path: Path, loopback: LoopbackCluster) -> None:
    spec_path = tmp_path / "search.yaml"
    spec_path.write_text(yaml.safe_dump(spec_dict(tmp_path, loopback.address, trials=6)))
    launched = subprocess.run([sys.executable, "-m", "forebear", "run", str(spec_path), "--detach"],
                              env=child_env(), capture_output=True, text=True, timeout=120)
    assert launched.returncode == 0, launched.stderr
    assert "detached" in launched.stderr and "forebear status" in launched.stderr
    link = next(line.split("dashboard: ", 1)[1] for line in launched.stderr.splitlines() if line.startswith("dashboard: "))
    # The launching process is gone; the search goes on inside the scheduler.
    status: list[dict[str, Any]] = []
    closed = wait_closed(tmp_path / "runs" / "hosted.jsonl", loopback, status)
    assert closed["reason"] == "budget"
    # The scheduler's dashboard serves the search's page, its counts those of `forebear status`.
    assert served(link)["counts"] == Logbook(tmp_path / "runs" / "hosted.jsonl").fold().counts()
    assert status and status[0]["search"] == "hosted"
    table = Logbook(tmp_path / "runs" / "hosted.jsonl").fold()
    assert table.counts()["scored"] == 6
    best = subprocess.run([sys.executable, "-m", "forebear", "best", str(tmp_path / "runs" / "hosted.jsonl"), "--json"],
                          env=child_env(), capture_output=True, text=True, timeout=60)
    assert best.returncode == 0 and json.loads(best.stdout)["trial"] == table.best().trial


def test_preload_runs_the_search_at_scheduler_start(tmp_path: Path, loopback_factory: Any) -> None:
    spec_path = tmp_path / "search.yaml"
    spec_path.write_text(yaml.safe_dump(spec_dict(tmp_path, None, trials=3)))
    cluster = loopback_factory(scheduler_args=["--preload", "forebear.cluster.plugin", "--forebear-spec", str(spec_path)])
    closed = wait_closed(tmp_path / "runs" / "hosted.jsonl", cluster)
    assert closed["reason"] == "budget"
    assert Logbook(tmp_path / "runs" / "hosted.jsonl").fold().counts()["scored"] == 3
    found = re.search(r"search hosted: live page (\S+)", cluster.log("scheduler"))
    assert found, cluster.log("scheduler")
    assert served(found.group(1))["counts"]["scored"] == 3


def test_preload_failure_is_loud_and_recorded(tmp_path: Path, loopback_factory: Any) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("objective: {call: nope}\n")
    cluster = loopback_factory(workers=1, scheduler_args=["--preload", "forebear.cluster.plugin", "--forebear-spec", str(bad)])
    deadline = time.monotonic() + 30
    while "preload could not load the spec" not in cluster.log("scheduler"):
        assert time.monotonic() < deadline, cluster.log("scheduler")
        time.sleep(0.1)
    assert "objective.call: must have the form module:function" in cluster.log("scheduler")
    # A spec that loads but whose search cannot run gets a closed record with the error.
    spec = spec_dict(tmp_path, None, trials=2, resources={"TPU": 4})
    spec_path = tmp_path / "search.yaml"
    spec_path.write_text(yaml.safe_dump(spec))
    cluster2 = loopback_factory(workers=1, scheduler_args=["--preload", "forebear.cluster.plugin", "--forebear-spec", str(spec_path)])
    closed = wait_closed(tmp_path / "runs" / "hosted.jsonl", cluster2)
    assert closed["reason"] == "error" and "TPU" in closed["error"]
    assert "forebear: search hosted failed" in cluster2.log("scheduler")
