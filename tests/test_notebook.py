"""A Dask user's day: the caller's Client, a function of the notebook as the objective, a background search.

The functions given as objectives are defined inside the tests, so no import
path reaches them: they travel to the workers by value (cloudpickle), as a
notebook's functions do.
"""

from __future__ import annotations

import json
import operator
import os
import subprocess
import sys
import threading
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

import forebear
from forebear.cluster.shipping import ObjectiveError, name_of, why_unsure
from forebear.core import spec as spec_mod
from forebear.core.spec import SpecError
from forebear.loop.resume import SpecChanged
from forebear.records.logbook import ControllerLock, Logbook
from tests.process_helpers import until

DEADLINE = 90.0  # seconds for a search step on a busy 2-core machine


@pytest.fixture(scope="module")
def client() -> Iterator[Any]:
    """The caller's own client: a LocalCluster of two worker processes on loopback."""
    from distributed import Client, LocalCluster

    cluster = LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
        dashboard_address="127.0.0.1:0", worker_dashboard_address=None,
    )
    c = Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


def _spec(tmp_path: Path, name: str, trials: int, **extra: Any) -> dict[str, Any]:
    return {
        "name": name,
        "objective": {"minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "depth": {"int": [1, 4]}},
        "budget": {"trials": trials, "batch": 2, "concurrency": 2},
        "logbook": str(tmp_path / f"{name}.jsonl"),
        "seed": 3,
        **extra,
    }


def _until(check: Any, what: str, timeout: float = DEADLINE) -> None:
    until(check, what, timeout)


# --------------------------------------------------------------------------
# the spec and the name, without a cluster


def test_an_objective_without_call_needs_a_function(tmp_path: Path) -> None:
    data = _spec(tmp_path, "bare", 2)
    with pytest.raises(SpecError, match=r"objective=fn\) needs only minimize or maximize"):
        spec_mod.load(data)
    loaded = spec_mod.load(data, function="mymod:train")
    assert loaded.objective.to_dict() == {"function": "mymod:train", "minimize": "loss"}
    data["objective"]["call"] = "mymod:train"
    with pytest.raises(SpecError, match=r"objective.call: the objective is the function passed to forebear.run"):
        spec_mod.load(data, function="mymod:train")


def test_names_tell_what_they_can() -> None:
    def inner(config: dict[str, Any]) -> float:
        return 0.0

    assert name_of(inner) == f"{__name__}:test_names_tell_what_they_can.<locals>.inner"
    assert why_unsure(name_of(inner)) == "it is defined inside another function"
    assert why_unsure("__main__:train") == "it is defined in a notebook or a script's __main__"
    assert why_unsure(name_of(lambda c: 0.0)) == "it is a lambda"
    assert why_unsure("mypkg.train:evaluate") is None
    lock = threading.Lock()
    with pytest.raises(ObjectiveError, match="cannot be shipped to the workers"):
        forebear.run(_spec(Path("/nonexistent"), "unpicklable", 2), objective=lambda c: lock.locked())
    with pytest.raises(ObjectiveError, match="must be a callable"):
        forebear.run(_spec(Path("/nonexistent"), "not-callable", 2), objective=42)


# --------------------------------------------------------------------------
# on the caller's client


def test_a_search_runs_on_the_callers_client_with_a_local_function(client: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    def evaluate(config: dict[str, Any]) -> dict[str, float]:
        return {"loss": (config["x"] - 0.3) ** 2 + 0.01 * config["depth"], "depth": float(config["depth"])}

    spec = _spec(tmp_path, "on-client", 4, cluster={"local": {"workers": 7}})
    result = forebear.run(spec, client=client, objective=evaluate, quiet=False)
    err = capsys.readouterr().err
    assert result.counts["scored"] == 4 and result.best is not None
    assert "the spec's cluster section is ignored" in err
    # forebear left the caller's client and cluster as it found them.
    assert client.status == "running" and client.submit(operator.add, 1, 2).result() == 3
    assert len(client.scheduler_info()["workers"]) == 2
    records = Logbook(tmp_path / "on-client.jsonl").records()
    assert records[0]["objective"] == {"function": f"{__name__}:{evaluate.__qualname__}", "minimize": "loss"}
    workers = set(client.scheduler_info()["workers"])
    assert {r["worker"] for r in records if r["kind"] == "started"} <= workers
    assert all(r["pid"] for r in records if r["kind"] == "started")  # each attempt ran in its own child process
    # The search's page on the caller's dashboard, added to its running scheduler.
    link = next(line.split("dashboard: ", 1)[1] for line in err.splitlines() if line.startswith("dashboard: "))
    with urllib.request.urlopen(link.replace("/forebear/?", "/forebear/status.json?"), timeout=30) as resp:
        assert json.load(resp)["counts"]["scored"] == 4
    # Resuming with the same function says what the name cannot tell; another function is refused.
    forebear.run(spec, client=client, objective=evaluate, quiet=False)
    err = capsys.readouterr().err
    assert "forebear cannot tell whether its code is the same (it is defined inside another function)" in err
    assert "already complete" in err

    def other(config: dict[str, Any]) -> float:
        return 1.0

    with pytest.raises(SpecChanged, match=r"evaluated the function .*evaluate, this run passes .*other"):
        forebear.run(spec, client=client, objective=other)


def test_a_call_objective_runs_on_the_callers_client_too(client: Any, tmp_path: Path) -> None:
    spec = _spec(tmp_path, "call-on-client", 2)
    spec["objective"] = {"call": "objectives:quadratic", "minimize": "loss"}
    spec["space"] = {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}}
    result = forebear.run(spec, client=client)
    assert result.counts["scored"] == 2 and client.status == "running"


def test_a_failing_function_is_recorded_as_for_call(client: Any, tmp_path: Path) -> None:
    def broken(config: dict[str, Any]) -> float:
        if config["depth"] > 0:
            raise RuntimeError("no data for this depth")
        return 0.0

    spec = _spec(tmp_path, "broken", 2)
    spec["budget"]["trial_timeout"] = "60s"
    result = forebear.run(spec, client=client, objective=broken)
    assert result.counts["failed"] == 2 and result.best is None
    failed = [r for r in Logbook(tmp_path / "broken.jsonl").records() if r["kind"] == "failed"]
    assert failed and all("objective raised RuntimeError: no data for this depth" in r["error"] for r in failed)


def test_a_function_is_isolated_and_timed_out_as_call_is(client: Any, tmp_path: Path) -> None:
    def unruly(config: dict[str, Any]) -> float:
        import os as o
        import time as t

        if o.environ["FOREBEAR_TRIAL"] == "0":
            t.sleep(120)  # hangs past the trial timeout
        o._exit(3)  # ends its own process, never the worker

    spec = _spec(tmp_path, "unruly", 2)
    spec["budget"].update(trial_timeout="2s", retries=0)
    result = forebear.run(spec, client=client, objective=unruly)
    assert result.counts["failed"] == 2
    records = Logbook(tmp_path / "unruly.jsonl").records()
    lost = [r for r in records if r["kind"] == "lost"]
    assert [(r["trial"], r["reason"]) for r in lost] == [(0, "timeout")]
    failed = {r["trial"]: r["error"] for r in records if r["kind"] == "failed"}
    assert "no retries left" in failed[0] and "exited with status 3" in failed[1]
    assert len(client.scheduler_info()["workers"]) == 2  # both workers survived
    for r in records:
        if r["kind"] == "started":
            with pytest.raises(ProcessLookupError):
                os.kill(r["pid"], 0)  # the attempt's child is gone


def test_the_background_handle_stops_a_search_cleanly(client: Any, tmp_path: Path) -> None:
    def slow(config: dict[str, Any]) -> float:
        import time as t

        t.sleep(0.4)
        return config["x"]

    handle = forebear.start(_spec(tmp_path, "background", 40), client=client, objective=slow)
    try:
        assert isinstance(handle, forebear.RunningSearch)
        _until(lambda: handle.status()["counts"]["scored"] >= 2, "two trials scored")
        assert handle.state == "running" and not handle.done()
        assert handle.best() is not None
        shown = handle._repr_html_()
        assert "<table" in shown and "running" in shown
    finally:
        result = handle.stop(timeout=DEADLINE)
    assert result.closed == "interrupted"
    table = forebear.load(tmp_path / "background.jsonl")
    assert table.closed is not None and table.closed["reason"] == "interrupted"
    assert Logbook(tmp_path / "background.jsonl").records()[-1]["kind"] == "closed"
    assert not table.by_state("running")  # the running attempts finished before it closed
    assert 2 <= table.counts()["scored"] < 40
    assert handle.done() and handle.status()["state"] == "closed"
    with ControllerLock(Logbook(tmp_path / "background.jsonl")):
        pass  # the controller let go of the logbook
    assert client.submit(operator.mul, 3, 4).result() == 12
    assert "search result" in result._repr_html_() and "closed (interrupted)" in result._repr_html_()
    assert "<strong>background</strong>" in table._repr_html_() and "closed (interrupted)" in table._repr_html_()


def test_the_notebook_example_runs_on_the_callers_client(client: Any, tmp_path: Path) -> None:
    import importlib.util

    import cloudpickle

    path = Path(__file__).resolve().parents[1] / "examples" / "notebook_client" / "greenhouse.py"
    spec = importlib.util.spec_from_file_location("example_greenhouse", path)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    sys.modules["example_greenhouse"] = mod
    try:
        spec.loader.exec_module(mod)
        # Loaded from a file path, the module is importable nowhere else: ship its functions by value,
        # as a notebook's are (the documented cloudpickle switch for such modules).
        cloudpickle.register_pickle_by_value(mod)
        result = mod.main(client, trials=4, folder=tmp_path)
    finally:
        cloudpickle.unregister_pickle_by_value(mod)
        del sys.modules["example_greenhouse"]
    assert result.closed == "budget" and result.counts["scored"] == 4
    assert 0.5 < result.best.score < 30.0  # litres per hour; the invented water use varies by about 40
    assert client.status == "running"


EXITING_KERNEL = """
import sys, time
import forebear
from distributed import Client, LocalCluster

def slow(config):
    import time
    time.sleep(0.5)
    return config["x"]

if __name__ == "__main__":
    # Threads, not worker processes: quick to start; each attempt still runs in its own child process.
    cluster = LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address="127.0.0.1:0")
    client = Client(cluster)
    spec = {"name": "exiting", "objective": {"minimize": "x"}, "space": {"x": {"float": [0, 1]}},
            "budget": {"trials": 50, "batch": 1, "concurrency": 1}, "logbook": sys.argv[1]}
    search = forebear.start(spec, client=client, objective=slow)
    while search.status()["counts"]["scored"] < 1:
        time.sleep(0.1)
    # The script ends here with the search running, as a kernel that is shut down.
"""


def test_an_exiting_interpreter_closes_the_logbook_of_a_running_search(tmp_path: Path) -> None:
    from tests.conftest import child_env

    script = tmp_path / "kernel.py"
    script.write_text(EXITING_KERNEL)
    logbook = tmp_path / "exiting.jsonl"
    done = subprocess.run([sys.executable, str(script), str(logbook)], env=child_env(), capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr[-3000:]
    records = Logbook(logbook).records()
    closed = [i for i, r in enumerate(records) if r["kind"] == "closed"]
    assert closed and records[closed[-1]]["reason"] == "interrupted", records[-3:]
    # Only the cancelled attempt's own runner may still have written after the close (it ended as it was cancelled).
    lost = {r["trial"] for r in records if r["kind"] == "lost" and r["reason"] == "interrupted"}
    assert all(r.get("trial") in lost for r in records[closed[-1] + 1:]), records[closed[-1]:]
