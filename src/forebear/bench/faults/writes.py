"""Torn writes and concurrent writers: the logbook tests (tests/test_logbook*.py), run by pytest for their figures."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from forebear.bench.faults.cluster import subprocess_env


def logbook_tests(full: bool = True) -> dict[str, Any]:
    """Run the torn-write and concurrent-writer tests (tests/test_logbook*.py) and report them.

    They need the source checkout (the tests are not installed); without it
    the figures say so.
    """
    tests = Path(__file__).resolve().parents[4] / "tests"
    names = ["test_logbook.py::test_torn_writes_at_random_offsets", "test_logbook.py::test_torn_write_with_whole_record_keeps_it",
             "test_logbook.py::test_eight_writers_while_controller_lock_held", "test_logbook.py::test_controller_lock_released_when_holder_is_killed",
             "test_logbook_faults.py::test_writer_killed_mid_large_record", "test_logbook_faults.py::test_full_disk_is_reported_and_nothing_lost",
             "test_logbook_faults.py::test_failing_fsync_keeps_earlier_records"]
    if not (tests / "test_logbook.py").is_file():
        return {"skipped": f"no test tree at {tests} (run from a source checkout)"}
    env = subprocess_env()
    env["FOREBEAR_TEST_APPENDS"] = "1000" if full else "200"
    t0 = time.monotonic()
    res = subprocess.run([sys.executable, "-m", "pytest", "-q", "-rs", "-p", "no:cacheprovider", *[str(tests / n) for n in names]],
                         capture_output=True, text=True, env=env, cwd=tests.parent, timeout=900)
    tail = [line for line in res.stdout.strip().splitlines() if line.strip()][-1:]
    return {
        "tests": len(names),
        "appends_per_writer": int(env["FOREBEAR_TEST_APPENDS"]),
        "torn_cuts": 100,
        "summary": tail[0] if tail else res.stderr.strip()[-300:],
        "seconds": round(time.monotonic() - t0, 1),
        "violations": [] if res.returncode == 0 else [f"pytest exited {res.returncode}: {res.stdout.strip()[-800:]}"],
    }
