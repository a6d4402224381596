"""Objectives for execution and reliability tests (imported on workers as ``objectives``).

Each takes a configuration dict. Behaviour that a test steers from outside
(a sleep length, a counter folder) comes from the configuration or from
environment variables the test sets before the workers start.
"""

from __future__ import annotations

import ctypes
import fcntl
import json
import os
import signal
import sys
import time
from pathlib import Path
from typing import Any


def quadratic(config: dict[str, Any]) -> float:
    """A quick bowl with its minimum 0 at x = 0.3, y = -0.2 (missing keys count as at the minimum)."""
    x = float(config.get("x", 0.3))
    y = float(config.get("y", -0.2))
    return (x - 0.3) ** 2 + (y + 0.2) ** 2


def quadratic_metrics(config: dict[str, Any]) -> dict[str, Any]:
    """The bowl as a dict result with a second metric."""
    loss = quadratic(config)
    return {"loss": loss, "accuracy": 1.0 / (1.0 + loss), "note": "ok"}


def sleepy(config: dict[str, Any]) -> float:
    """Sleep ``config['seconds']`` (default 0.5), then score the bowl."""
    time.sleep(float(config.get("seconds", 0.5)))
    return quadratic(config)


def sleep_from_x(config: dict[str, Any]) -> float:
    """Sleep 0.3 + x seconds (x in [0, 1]) and score the bowl: a steady stream of short trials."""
    time.sleep(0.3 + float(config.get("x", 0.0)))
    return quadratic(config)


def crash(config: dict[str, Any]) -> float:
    """Raise ValueError after printing to both streams."""
    print("about to fail", flush=True)
    print("stderr line before the error", file=sys.stderr, flush=True)
    raise ValueError(f"depth {config.get('x')} is not supported")


def segfault(config: dict[str, Any]) -> float:
    """Dereference a null pointer (a real SIGSEGV from C)."""
    print("segfaulting now", flush=True)
    ctypes.string_at(0)
    return 0.0


def hard_exit(config: dict[str, Any]) -> float:
    """Leave through os._exit(3) without a result."""
    os._exit(3)


def out_of_memory(config: dict[str, Any]) -> float:
    """Raise MemoryError as an allocation that cannot succeed would."""
    raise MemoryError("cannot allocate the requested tensor")


def hang(config: dict[str, Any]) -> float:
    """Never return (ignores SIGTERM too; only SIGKILL ends it)."""
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    while True:
        time.sleep(1.0)


def hang_first_attempt(config: dict[str, Any]) -> float:
    """Hang on attempt 1, score on later attempts."""
    if os.environ.get("FOREBEAR_ATTEMPT") == "1":
        hang(config)
    return quadratic(config)


def nan(config: dict[str, Any]) -> float:
    return float("nan")


def infinite(config: dict[str, Any]) -> float:
    return float("inf")


def text(config: dict[str, Any]) -> str:
    return "0.5 maybe"


def wrong_metric(config: dict[str, Any]) -> dict[str, float]:
    return {"val_accuracy": 0.9}


def env_config(config: dict[str, Any]) -> float:
    """Check that the environment carries the same configuration."""
    from_env = json.loads(os.environ["FOREBEAR_CONFIG"])
    from_file = json.loads(Path(os.environ["FOREBEAR_CONFIG_FILE"]).read_text())
    if from_env != config or from_file != config:
        raise AssertionError(f"environment {from_env} / file {from_file} differ from {config}")
    return quadratic(config)


def counted(config: dict[str, Any]) -> float:
    """Count concurrent trials in ``$FOREBEAR_TEST_COUNTER`` (a folder) under a lock file.

    ``running`` holds the number in flight now; ``peak`` the largest seen.
    Sleeps ``config['seconds']`` (default 0.4) while counted.
    """
    folder = Path(os.environ["FOREBEAR_TEST_COUNTER"])
    _bump(folder, +1)
    try:
        time.sleep(float(config.get("seconds", 0.4)))
    finally:
        _bump(folder, -1)
    return quadratic(config)


def _bump(folder: Path, delta: int) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    with open(folder / "lock", "a+") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            running_file, peak_file = folder / "running", folder / "peak"
            running = int(running_file.read_text() or 0) if running_file.exists() else 0
            peak = int(peak_file.read_text() or 0) if peak_file.exists() else 0
            running += delta
            running_file.write_text(str(running))
            peak_file.write_text(str(max(peak, running)))
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


def stall_signal(config: dict[str, Any]) -> float:
    """Write our pid to ``$FOREBEAR_TEST_SIGNAL/started-<trial>-<attempt>`` and sleep ``seconds``.

    Lets a test wait until an attempt is surely running before it kills something.
    """
    folder = Path(os.environ["FOREBEAR_TEST_SIGNAL"])
    folder.mkdir(parents=True, exist_ok=True)
    mark = folder / f"started-{os.environ.get('FOREBEAR_TRIAL')}-{os.environ.get('FOREBEAR_ATTEMPT')}"
    mark.write_text(str(os.getpid()))
    time.sleep(float(config.get("seconds", 3.0)))
    return quadratic(config)


def gated(config: dict[str, Any]) -> float:
    """Wait until ``$FOREBEAR_TEST_SIGNAL/open`` exists (at most 120 s), then score the bowl.

    Keeps attempts running for exactly as long as a test needs them to.
    """
    gate = Path(os.environ["FOREBEAR_TEST_SIGNAL"]) / "open"
    deadline = time.monotonic() + 120.0
    while not gate.exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    return quadratic(config)


def lognormal_sleep(config: dict[str, Any]) -> float:
    """Sleep ``config['seconds']`` and return that duration (the overhead benchmark uses its own copy)."""
    seconds = float(config["seconds"])
    time.sleep(seconds)
    return seconds


def huge_metrics(config: dict[str, Any]) -> dict[str, Any]:
    """A good score beside a 3.5 MB text metric, a list and a NaN side metric (issue 15, item 2)."""
    return {"loss": 0.125, "acc": 0.5, "blob": "b" * 3_500_000, "curve": [0.1] * 10, "side": float("nan")}


def beyond_float(config: dict[str, Any]) -> int:
    """An int too large for a double: scoring it must fail as a bad result, not as the objective."""
    return 10**400


def leave_processes(config: dict[str, Any]) -> float:
    """Start a plain child and a grandchild that calls setsid, write their pids, then return (or hang).

    The grandchild escapes the attempt's process group; only a subreaper finds it (issue 15, item 3).
    """
    import subprocess
    import sys

    plain = subprocess.Popen(["sleep", "300"])
    # The middle process starts the setsid sleeper and exits at once: the sleeper is an orphan.
    code = "import os, subprocess, sys; d = subprocess.DEVNULL; p = subprocess.Popen(['sleep', '301'], start_new_session=True, stdin=d, stdout=d, stderr=d); print(p.pid)"
    escaped = int(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout)
    Path(config["pidfile"]).write_text(f"{plain.pid} {escaped}")
    if config.get("hang"):
        hang(config)
    return 0.5


def loud(config: dict[str, Any]) -> float:
    """Print 50 MB to stdout and stderr together, then score (issue 15, item 12)."""
    import sys

    line = "x" * 1023 + "\n"
    for i in range(50 * 1024):
        (sys.stdout if i % 2 else sys.stderr).write(line)
    sys.stderr.flush()
    print("the last line", flush=True)
    return 0.5


def touch_memory(config: dict[str, Any]) -> float:
    """Allocate and touch ``config['mb']`` MB (issue 15, item 6: cluster.local.memory_limit)."""
    block = bytearray(int(config["mb"]) * 1024 * 1024)
    for i in range(0, len(block), 4096):
        block[i] = 1
    return 0.5
