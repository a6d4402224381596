"""``lock: soft`` across processes, with real processes (a ``forebear run`` controller, a
loopback cluster): a living controller keeps its lease and a second one is refused; a lease
that stops being refreshed expires and a second controller takes over and finishes the search;
a holder that died on this host is taken over at once."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

import forebear
from forebear.records.logbook import ControllerLock, Logbook, LogbookBusy

from .conftest import LoopbackCluster, child_env, reap

LIFETIME = 3.0  # seconds; filelock's lease refreshes every third of it


def _soft(logbook: Path) -> ControllerLock:
    return ControllerLock(Logbook(logbook, lock="soft", lifetime=LIFETIME))


@pytest.mark.timeout(300)
def test_soft_lease_refuses_a_second_controller_then_expires_when_not_refreshed(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    logbook = tmp_path / "runs" / "soft.jsonl"
    spec = {
        "name": "soft",
        # Attempts wait for the test to open a gate: the first controller stays mid-search.
        "objective": {"call": "objectives:gated", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": 6, "batch": 2, "concurrency": 2, "retries": 1},
        "cluster": {"address": shared_loopback.address},
        "logbook": str(logbook),
        "lock": "soft",
        "lock_lifetime": LIFETIME,
        "seed": 5,
    }
    path = tmp_path / "search.yaml"
    path.write_text(yaml.safe_dump(spec))
    first = subprocess.Popen([sys.executable, "-m", "forebear", "run", str(path), "-q"], env=child_env(),
                             start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while not (logbook.exists() and any(r["kind"] == "started" for r in Logbook(logbook).records())):
            assert first.poll() is None, first.stderr.read() if first.stderr else ""
            assert time.monotonic() < deadline, "the first controller started no attempt"
            time.sleep(0.05)
        # While the first controller lives, a second one waits out a lease lifetime and is
        # refused: the holder keeps refreshing its lease.
        t0 = time.monotonic()
        assert first.poll() is None, first.stderr.read() if first.stderr else ""
        with pytest.raises(LogbookBusy, match=f"driven by pid {first.pid}"):
            forebear.run(spec)
        assert time.monotonic() - t0 >= LIFETIME
        assert first.poll() is None
        # The first controller stalls (SIGSTOP): alive, but its lease is no longer refreshed, as
        # for a controller that died on another host (where its pid cannot be checked).
        os.kill(first.pid, signal.SIGSTOP)
        gate = shared_loopback.folder / "signals"
        gate.mkdir(parents=True, exist_ok=True)
        (gate / "open").write_text("")
        t0 = time.monotonic()
        result = forebear.run(spec)
        assert time.monotonic() - t0 >= LIFETIME  # taken over only after the lease expired
    finally:
        if first.poll() is None:
            os.killpg(first.pid, signal.SIGKILL)  # a stopped process would sit out reap's SIGTERM
        reap(first)
    assert result.closed == "budget" and result.counts["scored"] == 6, [t.error for t in result.trials]
    recs = Logbook(logbook).records()
    assert sorted({r["trial"] for r in recs if r["kind"] == "scored"}) == list(range(6))
    assert [r["reason"] for r in recs if r["kind"] == "closed"] == ["budget"]
    # The second controller released its lease when it finished: a third one starts at once.
    t0 = time.monotonic()
    with _soft(logbook):
        pass
    assert time.monotonic() - t0 < LIFETIME


def test_soft_lease_of_a_holder_killed_on_this_host_is_taken_at_once(tmp_path: Path) -> None:
    logbook = tmp_path / "k.jsonl"
    code = ("import sys, time\nfrom forebear.records.logbook import ControllerLock, Logbook\n"
            f"held = ControllerLock(Logbook({str(logbook)!r}, lock='soft', lifetime={LIFETIME}))\nheld.acquire()\n"
            "print('held', flush=True)\ntime.sleep(300)\n")
    holder = subprocess.Popen([sys.executable, "-c", code], env=child_env(), stdout=subprocess.PIPE, text=True, start_new_session=True)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        with pytest.raises(LogbookBusy, match=f"driven by pid {holder.pid}"):
            _soft(logbook).acquire()
        os.kill(holder.pid, signal.SIGKILL)  # no handler runs: the marker stays behind
        holder.wait(timeout=30)
    finally:
        reap(holder)
    # filelock sees that the marker's pid is dead on this host and hands the lock over at once.
    t0 = time.monotonic()
    with _soft(logbook):
        assert time.monotonic() - t0 < LIFETIME
