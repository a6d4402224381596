"""SIGTERM and Ctrl-C at the command line: the logbook is closed and the exit status says what happened.

A batch scheduler or Kubernetes sends SIGTERM before SIGKILL: forebear treats
it as the first Ctrl-C (no new trials, running attempts finish, the logbook is
closed ``interrupted``) with a grace period, then stops at once. Two quick
Ctrl-C stop at once with one line and status 130 (128 + SIGINT's number 2, the shells'
convention for a command ended by a signal: bash manual, "Exit Status", from memory).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
import yaml

from forebear.loop import stopping
from forebear.records.logbook import Logbook

from .conftest import child_env, reap

DEADLINE = 120.0


def start(tmp_path: Path, call: str, trials: int = 2) -> tuple[subprocess.Popen[bytes], Path]:
    spec: dict[str, Any] = {
        "name": "signals",
        "objective": {"call": call, "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": trials, "batch": 1, "concurrency": 1},
        "cluster": {"local": {"workers": 1}},
        "logbook": "runs/signals.jsonl",
        "seed": 3,
    }
    path = tmp_path / "search.yaml"
    path.write_text(yaml.safe_dump(spec))
    proc = subprocess.Popen([sys.executable, "-m", "forebear", "run", str(path), "--quiet"], env=child_env(),
                            start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    return proc, tmp_path / "runs" / "signals.jsonl"


def wait_started(proc: subprocess.Popen[bytes], logbook: Path) -> None:
    end = time.monotonic() + DEADLINE
    while not (logbook.exists() and any(r["kind"] == "started" for r in Logbook(logbook).records())):
        assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
        assert time.monotonic() < end, "no attempt started"
        time.sleep(0.1)
    time.sleep(0.3)


def finish(proc: subprocess.Popen[bytes]) -> tuple[int, str]:
    try:
        _, err = proc.communicate(timeout=DEADLINE)
    finally:
        reap(proc)
    return proc.returncode, err.decode()


def test_two_quick_ctrl_c_stop_at_once_with_status_130_and_a_closed_logbook(tmp_path: Path) -> None:
    proc, logbook = start(tmp_path, "objectives:hang")
    try:
        wait_started(proc, logbook)
        os.kill(proc.pid, signal.SIGINT)
        time.sleep(0.3)
        os.kill(proc.pid, signal.SIGINT)
    finally:
        code, err = finish(proc)
    assert code == 130, err
    assert "Aborted!" not in err and "Traceback" not in err
    assert "forebear: stopped at once on a second Ctrl-C" in err
    kinds = [(r["kind"], r.get("reason")) for r in Logbook(logbook).records()]
    assert ("lost", "interrupted") in kinds and kinds[-1] == ("closed", "interrupted")


def test_sigterm_is_a_first_ctrl_c_running_attempts_finish_and_the_logbook_closes(tmp_path: Path) -> None:
    proc, logbook = start(tmp_path, "objectives:sleepy", trials=20)
    try:
        wait_started(proc, logbook)
        os.kill(proc.pid, signal.SIGTERM)
    finally:
        code, err = finish(proc)
    table = Logbook(logbook).fold()
    assert code == 0, err
    assert table.closed is not None and table.closed["reason"] == "interrupted"
    assert table.counts()["scored"] >= 1 and table.counts()["running"] == 0 and len(table) < 20


def test_after_sigterm_the_grace_period_ends_in_a_stop_at_once(monkeypatch: pytest.MonkeyPatch) -> None:
    lines: list[str] = []
    monkeypatch.setattr(stopping, "TERM_GRACE", 0.2)
    stop = stopping.Stop(lines.append, lambda: 3)
    stop.on_signal(signal.SIGTERM, None)
    assert stop.reason == "interrupted" and "waiting up to 0.2 s for 3 running attempt(s)" in lines[0]
    stop.check()  # within the grace period: nothing
    time.sleep(0.3)
    with pytest.raises(stopping.StopNow) as info:
        stop.check()
    assert info.value.exit_status == 143 and "grace period after SIGTERM" in info.value.why
    stop.on_signal(signal.SIGINT, None)  # stopping at once already: later signals change nothing
    with pytest.raises(stopping.StopNow) as second:
        fresh = stopping.Stop()
        fresh.on_signal(signal.SIGTERM, None)
        fresh.on_signal(signal.SIGTERM, None)
    assert second.value.exit_status == 143
