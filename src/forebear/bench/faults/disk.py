"""A full disk and a failing fsync: the controller stops with one clear line, exit 2, and nothing recorded is lost."""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from forebear.bench.faults.driver import finished_count, logbook_of, read_records, write_spec
from forebear.bench.faults.invariants import check_invariants

TINY_FS = "256k"  # size of the tmpfs of the full-disk scenario


@contextlib.contextmanager
def tiny_filesystem(folder: Path, size: str = TINY_FS) -> Iterator[Path | None]:
    """A small tmpfs mounted at ``folder`` (root on Linux), or None where mounting is not allowed."""
    folder.mkdir(parents=True, exist_ok=True)
    mounted = False
    if shutil.which("mount") and hasattr(os, "geteuid") and os.geteuid() == 0:
        res = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size},mode=0700", "tmpfs", str(folder)],
                             capture_output=True, text=True, timeout=30)
        mounted = res.returncode == 0
    try:
        yield folder if mounted else None
    finally:
        if mounted:
            subprocess.run(["umount", "-l", str(folder)], capture_output=True, timeout=30)


def fill_filesystem(folder: Path) -> Path:
    """Write a filler file until the filesystem is full; returns it (delete it to free the space)."""
    filler = folder / "filler"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT, 0o600)
    try:
        while True:
            os.write(fd, b"\0" * 4096)
    except OSError:
        pass
    finally:
        os.close(fd)
    return filler


def full_disk(cluster: Any, folder: Path, *, trials: int = 16, fill_after: int = 4, deadline: float = 300.0) -> dict[str, Any]:
    """The logbook's filesystem fills up mid-search: the controller stops with one clear line, exit 2.

    The logbook lives on a small tmpfs. After ``fill_after`` trials finish, a
    thread fills the disk; ``forebear run`` (the command line's code, in this
    process) must stop with the writer's message, every record read before the
    fill must still be there, and once space is freed a resume completes the
    search. Skipped (with the reason in the figures) where no tmpfs can be mounted.
    """
    from click.testing import CliRunner

    from forebear.face.cli import main as cli_main

    n_workers = len([p for p in cluster.workers if p.poll() is None])
    with tiny_filesystem(folder / "tiny") as mnt:
        if mnt is None:
            return {"skipped": "cannot mount a tmpfs here (needs root on Linux); the injected failing-fsync scenario covers the controller's side"}
        spec = write_spec(mnt, cluster.address, trials=trials, concurrency=n_workers, name="full-disk")
        logbook = logbook_of(spec)
        before: list[dict[str, Any]] = []
        filled = threading.Event()
        stop = threading.Event()

        def filler() -> None:
            end = time.monotonic() + deadline
            while finished_count(logbook) < fill_after and not stop.is_set() and time.monotonic() < end:
                time.sleep(0.05)
            if stop.is_set():
                return
            before.extend(read_records(logbook))
            fill_filesystem(mnt)
            filled.set()

        thread = threading.Thread(target=filler, name="filler", daemon=True)
        thread.start()
        try:
            res = CliRunner().invoke(cli_main, ["run", str(spec), "--quiet"])
        finally:
            stop.set()
            thread.join(30)
        err = res.stderr
        after = read_records(logbook)
        violations: list[str] = []
        lines = [line for line in err.strip().splitlines() if line.strip()]
        if not filled.is_set():
            violations.append(f"the search ended before the disk was filled (exit {res.exit_code})")
        if res.exit_code != 2:
            violations.append(f"the controller exited {res.exit_code}, want 2 ({res.exception!r})")
        if "Traceback" in err or len(lines) != 1 or "No space left on device" not in lines[0]:
            violations.append(f"the controller's message is not one clear line: {err.strip()[-500:]!r}")
        if after[: len(before)] != before:
            violations.append("records written before the disk filled up were lost")
        (mnt / "filler").unlink(missing_ok=True)
        res2 = CliRunner().invoke(cli_main, ["run", str(spec), "--quiet"])
        if res2.exit_code != 0:
            violations.append(f"the resume after freeing space exited {res2.exit_code}: {res2.stderr.strip()[-300:]}")
        final = read_records(logbook)
        if final[: len(before)] != before:
            violations.append("the resume lost records written before the disk filled up")
        figures = check_invariants(final)
        figures["violations"] = violations + figures["violations"]
        if figures["failed"]:
            figures["violations"].append(f"{figures['failed']} trial(s) failed after the resume; the objective never fails")
        return {"message": lines[0] if lines else "", "records_before_fill": len(before), **figures}


@contextlib.contextmanager
def failing_fsync(after: int) -> Iterator[list[int]]:
    """Make ``os.fsync`` in this process fail with EIO after its first ``after`` calls."""
    from forebear.records import logbook as jmod

    real = jmod.os.fsync
    calls = [0]

    def fsync(fd: int) -> None:
        calls[0] += 1
        if calls[0] > after:
            raise OSError(5, "Input/output error")
        real(fd)

    jmod.os.fsync = fsync  # type: ignore[assignment]
    try:
        yield calls
    finally:
        jmod.os.fsync = real  # type: ignore[assignment]


def fsync_failure(cluster: Any, folder: Path, *, trials: int = 12, fail_after: int = 2) -> dict[str, Any]:
    """The controller's fsync fails (injected EIO) mid-search: one clear line, exit 2, nothing lost.

    The controller runs in this process through the command line's code
    (click's runner), so only its own writes fail; the workers' records keep
    arriving. A resume with a healthy fsync completes the search.
    """
    from click.testing import CliRunner

    from forebear.face.cli import main as cli_main

    n_workers = len([p for p in cluster.workers if p.poll() is None])
    spec = write_spec(folder, cluster.address, trials=trials, concurrency=n_workers, name="fsync")
    logbook = logbook_of(spec)
    violations: list[str] = []
    with failing_fsync(fail_after) as calls:
        res = CliRunner().invoke(cli_main, ["run", str(spec), "--quiet"])
    err = res.stderr
    lines = [line for line in err.strip().splitlines() if line.strip()]
    if calls[0] <= fail_after:
        violations.append(f"the injected failure never came: the controller called fsync {calls[0]} time(s)")
    if res.exit_code != 2:
        violations.append(f"the controller exited {res.exit_code}, want 2 ({res.exception!r})")
    if "Traceback" in err or len(lines) != 1 or "Input/output error" not in lines[0]:
        violations.append(f"the controller's message is not one clear line: {err.strip()[-500:]!r}")
    before = read_records(logbook)
    res2 = CliRunner().invoke(cli_main, ["run", str(spec), "--quiet"])
    if res2.exit_code != 0:
        violations.append(f"the resume exited {res2.exit_code}: {res2.stderr.strip()[-300:]}")
    final = read_records(logbook)
    if final[: len(before)] != before:
        violations.append("the resume lost records written before the failure")
    figures = check_invariants(final)
    figures["violations"] = violations + figures["violations"]
    return {"message": lines[0] if lines else "", "fsync_calls": calls[0], **figures}
