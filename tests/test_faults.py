"""Short versions of every fault scenario of ``forebear bench faults`` (the full campaign is slow).

Each scenario runs against a loopback cluster of separate processes
(tests/conftest.py) and returns its figures with a list of broken
invariants, which must be empty. The full sizes run with ``-m slow`` or
``forebear bench faults``.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from forebear.bench import faults
from forebear.records.logbook import record

from .conftest import LoopbackCluster


def _trial(t: int, *rest: dict[str, Any]) -> list[dict[str, Any]]:
    return [record("proposed", trial=t, round=0, config={"x": t / 10}, source="initial", model=None, acquisition=None), *rest]


def test_invariant_checker_catches_each_broken_rule() -> None:
    """The checker is what the campaign relies on: it must see every kind of breakage."""
    ok = [record("search", name="s", objective={"minimize": "loss"})]
    ok += _trial(0, record("started", trial=0, attempt=1), record("lost", trial=0, attempt=1, reason="worker"),
                 record("started", trial=0, attempt=2), record("scored", trial=0, attempt=2, score=0.5, metrics={}, seconds=1))
    ok += _trial(1, record("started", trial=1, attempt=1), record("scored", trial=1, attempt=1, score=0.2, metrics={}, seconds=1))
    good = faults.check_invariants(ok)
    assert good["violations"] == [] and good["best_trial"] == 1 and good["lost"] == {"worker": 1}
    cases = {
        "scored 2 times": ok + [record("scored", trial=1, attempt=1, score=0.1, metrics={}, seconds=1)],
        "never retried": ok + _trial(2, record("started", trial=2, attempt=1), record("lost", trial=2, attempt=1, reason="worker"),
                                     record("failed", trial=2, attempt=1, error="boom", retryable=False)),
        "0 terminal records": ok + _trial(3, record("started", trial=3, attempt=1), record("lost", trial=3, attempt=1, reason="restart"),
                                          record("started", trial=3, attempt=2)),
        "never proposed": ok + [record("scored", trial=9, attempt=1, score=0.0, metrics={}, seconds=1)],
        "proposed twice": ok + _trial(1),
    }
    for needle, recs in cases.items():
        found = faults.check_invariants(recs)["violations"]
        assert any(needle in v for v in found), (needle, found)
    # Retries used up: the trial failed with the reason, which is not a broken rule.
    spent = ok + _trial(4, record("started", trial=4, attempt=1), record("lost", trial=4, attempt=1, reason="worker"),
                        record("failed", trial=4, attempt=1, error="the worker died; no retries left after 1 attempt(s)", retryable=False))
    assert faults.check_invariants(spent)["violations"] == []


@pytest.mark.timeout(400)
def test_worker_kills_short(tmp_path: Path, loopback_factory: Callable[..., LoopbackCluster]) -> None:
    cluster = loopback_factory(workers=3)
    figures = faults.worker_kills(cluster, tmp_path / "wk", **faults.SHORT["worker_kills"])
    assert figures["violations"] == [], figures
    assert figures["kills"] == 3 and figures["trials"] == figures["scored"] == 12
    assert sum(figures["lost"].values()) >= 1  # the kills hit running attempts


SLOW_IMPORT = """
import time
time.sleep(4.0)  # the fork server imports this module before the attempt can start


def score(config):
    return (float(config["x"]) - 0.3) ** 2
"""


@pytest.mark.timeout(300)
def test_worker_killed_before_the_attempt_started_uses_no_retry(tmp_path: Path, loopback_factory: Callable[..., LoopbackCluster]) -> None:
    """A worker that dies while the attempt waits for its process costs no retry (retries: 0 here)."""
    import threading
    import time

    from forebear.core.spec import load
    from forebear.loop.controller import Controller
    from forebear.records.logbook import Logbook

    cluster = loopback_factory(workers=1)
    (tmp_path / "slow_import_objective.py").write_text(SLOW_IMPORT)
    import yaml

    spec_path = tmp_path / "unstarted.yaml"  # a spec file: its folder is where the objective's module is found
    spec_path.write_text(yaml.safe_dump({
        "name": "unstarted",
        "objective": {"call": "slow_import_objective:score", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 1, "batch": 1, "concurrency": 1, "retries": 0},
        "cluster": {"address": cluster.address},
        "logbook": "runs/u.jsonl",
    }))
    spec = load(spec_path)
    out: list[Any] = []
    thread = threading.Thread(target=lambda: out.append(Controller(spec).run()), daemon=True)
    thread.start()
    deadline = time.monotonic() + 120
    while not (spec.logbook.exists() and any(r["kind"] == "proposed" for r in Logbook(spec.logbook).records())):
        assert time.monotonic() < deadline
        time.sleep(0.05)
    time.sleep(1.5)  # the task is on the worker, whose fork server is still importing the objective
    cluster.kill_worker(0)
    cluster.start_worker()
    thread.join(180)
    assert out and out[0].counts == {"queued": 0, "running": 0, "scored": 1, "failed": 0}, out
    trail = [(r["kind"], r.get("attempt"), r.get("reason")) for r in Logbook(spec.logbook).records() if r["kind"] not in ("search", "proposed", "closed")]
    assert trail == [("lost", 1, "worker"), ("started", 2, None), ("scored", 2, None)], trail
    assert faults.check_invariants(Logbook(spec.logbook).records())["violations"] == []


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Any:
    c = LoopbackCluster(tmp_path_factory.mktemp("faults-cluster"), workers=3)
    try:
        yield c
    finally:
        c.close()


@pytest.mark.timeout(400)
def test_controller_kills_short(tmp_path: Path, cluster: LoopbackCluster) -> None:
    figures = faults.controller_kills(cluster, tmp_path / "ck", **faults.SHORT["controller_kills"])
    assert figures["violations"] == [], figures
    assert figures["kills"] >= 1 and figures["trials"] == 8


@pytest.mark.timeout(400)
def test_full_disk(tmp_path: Path, cluster: LoopbackCluster) -> None:
    # 12 trials: after the fill the rest of the search must write more than the logbook's last
    # page can hold (tmpfs allocates whole pages, so a few records still fit in that page's slack).
    figures = faults.full_disk(cluster, tmp_path / "fd", trials=12, fill_after=3)
    if "skipped" in figures:
        pytest.skip(figures["skipped"])
    assert figures["violations"] == [], figures
    assert "No space left on device" in figures["message"]


@pytest.mark.timeout(300)
def test_failing_fsync_stops_the_controller(tmp_path: Path, cluster: LoopbackCluster) -> None:
    figures = faults.fsync_failure(cluster, tmp_path / "fs", trials=8, fail_after=2)
    assert figures["violations"] == [], figures
    assert figures["message"].startswith("forebear: logbook ") and "write failed: Input/output error" in figures["message"]


@pytest.mark.slow
@pytest.mark.timeout(3600)
def test_full_campaign(tmp_path: Path) -> None:
    figures = faults.main(short=False, folder=str(tmp_path))
    assert figures["ok"], figures


def test_a_failed_started_write_leaves_the_attempt_process_usable(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A logbook that cannot take the ``started`` record (full disk) must not leave the fork server mid-attempt."""
    from forebear.cluster import runner
    from forebear.records.logbook import Logbook, LogbookError

    logs = tmp_path / "runs" / "s.logs"
    logs.mkdir(parents=True)
    (logs / runner.PROBE_NAME).write_text("tok")

    def task(trial: int) -> runner.AttemptTask:
        return runner.AttemptTask(search="s", trial=trial, attempt=1, config={"x": 0.5, "seconds": 1.0}, metric="loss",
                                  call="forebear.bench.faults:sleeper", logbook=str(tmp_path / "runs" / "s.jsonl"),
                                  logs=str(logs), token="tok", cwd=str(tmp_path))

    real = Logbook.append

    def full(self: Logbook, rec: dict[str, Any]) -> None:
        if rec["kind"] == "started" and rec["trial"] == 0:
            raise LogbookError(28, f"logbook {self.path}: write failed: No space left on device")
        return real(self, rec)  # the runner keeps the started record's offset

    monkeypatch.setattr(Logbook, "append", full)
    with pytest.raises(LogbookError):
        runner.run_attempt(task(0))
    after = runner.run_attempt(task(1))  # the same fork server serves the next attempt
    assert after.outcome == "scored", after.error
