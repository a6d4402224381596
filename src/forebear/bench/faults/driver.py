"""The shared driver of the scenarios: a campaign's spec file, its logbook's records, a ``forebear run`` process."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from typing import Any

from forebear.bench.faults.cluster import reap, subprocess_env
from forebear.bench.faults.objectives import SLEEPER


def write_spec(folder: Path, address: str | None, *, trials: int, concurrency: int, objective: str = SLEEPER,
               retries: int = 5, seed: int = 3, name: str = "faults", workers: int = 4) -> Path:
    """A spec file for a campaign search; the logbook is ``folder/runs/<name>.jsonl``."""
    import yaml

    spec: dict[str, Any] = {
        "name": name,
        "objective": {"call": objective, "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": trials, "batch": concurrency, "concurrency": concurrency, "retries": retries},
        "cluster": {"address": address} if address else {"local": {"workers": workers, "dashboard": False}},
        "logbook": f"runs/{name}.jsonl",
        "seed": seed,
    }
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{name}.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def read_records(logbook: Path) -> list[dict[str, Any]]:
    """Every parseable record of ``logbook``, in order."""
    from forebear.records.logbook import Logbook

    return Logbook(logbook).records()


def finished_count(logbook: Path) -> int:
    """How many trials of ``logbook`` have ended (scored, or failed for good); 0 before it exists."""
    if not logbook.exists():
        return 0
    return sum(1 for r in read_records(logbook) if r["kind"] in ("scored", "failed") and not r.get("retryable"))


def start_run(spec: Path) -> subprocess.Popen[bytes]:
    """``forebear run SPEC --quiet`` in its own session, stderr captured."""
    return subprocess.Popen([sys.executable, "-m", "forebear", "run", str(spec), "--quiet"], env=subprocess_env(),
                            start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def wait_run(proc: subprocess.Popen[bytes], timeout: float) -> tuple[int, str]:
    """The exit status and stderr of a :func:`start_run` process; AssertionError after ``timeout`` s."""
    try:
        _, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        reap(proc)
        raise AssertionError(f"the controller did not finish within {timeout:g} s") from None
    return proc.returncode, err.decode(errors="replace")


def logbook_of(spec: Path) -> Path:
    """The logbook path a campaign spec file names."""
    import yaml

    return spec.parent / yaml.safe_load(spec.read_text())["logbook"]
