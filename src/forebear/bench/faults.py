"""Fault-injection campaign: killed workers, killed controllers, a full disk, a failing fsync, load.

``forebear bench faults`` runs every scenario against a loopback cluster of
separate processes (a ``dask scheduler`` and ``dask worker`` processes on
127.0.0.1, no nanny, so that SIGKILL of a worker is a real crash) and checks
the logbook afterwards with :func:`check_invariants`: every trial ends scored
or failed exactly once, no score is recorded twice, every lost attempt is
followed by a retry, and the best configuration equals the best scored record.
The torn-write and concurrent-writer scenarios are the logbook tests
(``tests/test_logbook*.py``), run here by pytest so that their figures come
from the same code. ``--short`` is the size that CI runs (tests/test_faults.py
calls the same functions).

Heavy modules (Dask, the controller, the proposal engine) are imported inside
the functions: workers import this module for :func:`sleeper` and
:func:`noop` and should not pay for them.
"""

from __future__ import annotations

import contextlib
import json
import os
import random
import resource
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections import Counter, defaultdict
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

SLEEPER = "forebear.bench.faults:sleeper"
NOOP = "forebear.bench.faults:noop"
START_DEADLINE = 120.0  # seconds for a scheduler or worker to start on a busy machine
TINY_FS = "256k"  # size of the tmpfs of the full-disk scenario


# --------------------------------------------------------------------------
# objectives (imported on workers)


def sleeper(config: Mapping[str, Any]) -> float:
    """Sleep 0.2 + 0.8 x seconds (x in [0, 1]), then score a bowl with its minimum at (0.3, -0.2)."""
    x, y = float(config.get("x", 0.0)), float(config.get("y", 0.0))
    time.sleep(0.2 + 0.8 * x)
    return (x - 0.3) ** 2 + (y + 0.2) ** 2


def noop(config: Mapping[str, Any]) -> float:
    """The bowl without the sleep: every second a trial takes is forebear's overhead."""
    x, y = float(config.get("x", 0.0)), float(config.get("y", 0.0))
    return (x - 0.3) ** 2 + (y + 0.2) ** 2


# --------------------------------------------------------------------------
# a loopback cluster of separate processes


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env.setdefault("DASK_DISTRIBUTED__WORKER__DAEMON", "False")
    return env


def _reap(proc: subprocess.Popen[Any], grace: float = 5.0) -> None:
    """SIGTERM, then SIGKILL, the process group of a process started in its own session."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        if sig == signal.SIGKILL or proc.poll() is None:
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(proc.pid, sig)
        if sig == signal.SIGTERM:
            with contextlib.suppress(subprocess.TimeoutExpired):
                proc.wait(timeout=grace)
    if proc.poll() is None:
        proc.wait(timeout=grace)


class ProcessCluster:
    """A scheduler and single-thread, nanny-less workers as separate processes on 127.0.0.1.

    The same shape as the tests' ``LoopbackCluster`` (tests/conftest.py), for
    the benchmark, which runs without the test tree. ``workers`` holds the
    worker processes started so far; :meth:`kill_worker` SIGKILLs one and
    :meth:`start_worker` adds a replacement.
    """

    def __init__(self, folder: Path, workers: int = 4) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.procs: list[subprocess.Popen[Any]] = []
        self.workers: list[subprocess.Popen[Any]] = []
        self._n = 0
        try:
            sched_file = folder / "scheduler.json"
            self._spawn([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
                         "--no-dashboard", "--scheduler-file", str(sched_file)], "scheduler")
            deadline = time.monotonic() + START_DEADLINE
            while not sched_file.exists() or not sched_file.read_text().strip():
                if time.monotonic() > deadline or self.procs[0].poll() is not None:
                    raise RuntimeError(f"the dask scheduler did not start: {self._log('scheduler')}")
                time.sleep(0.1)
            time.sleep(0.1)
            self.address: str = json.loads(sched_file.read_text())["address"]
            for _ in range(workers):
                self.start_worker()
            self.wait_for_workers(workers)
        except BaseException:
            self.close()
            raise

    def _spawn(self, argv: list[str], name: str) -> subprocess.Popen[Any]:
        with open(self.folder / f"{name}.log", "ab") as out:
            proc = subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, env=_env(), start_new_session=True, cwd=self.folder)
        self.procs.append(proc)
        return proc

    def _log(self, name: str) -> str:
        try:
            return (self.folder / f"{name}.log").read_text(errors="replace")[-2000:]
        except OSError:
            return ""

    def start_worker(self) -> subprocess.Popen[Any]:
        name = f"w{self._n}"
        self._n += 1
        proc = self._spawn([sys.executable, "-m", "distributed.cli.dask_worker", self.address, "--host", "127.0.0.1",
                            "--nthreads", "1", "--no-nanny", "--no-dashboard", "--name", name], name)
        self.workers.append(proc)
        return proc

    def kill_worker(self, index: int) -> int:
        proc = self.workers[index]
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
        return proc.pid

    def wait_for_workers(self, n: int, timeout: float = START_DEADLINE) -> None:
        from distributed import Client

        with Client(self.address, timeout="30s") as c:
            c.wait_for_workers(n, timeout=timeout)

    def close(self) -> None:
        for proc in reversed(self.procs):
            _reap(proc)


# --------------------------------------------------------------------------
# what must hold after any fault


def check_invariants(records: Sequence[Mapping[str, Any]], sense: str = "minimize") -> dict[str, Any]:
    """Count what the logbook holds and list every broken invariant (``violations``).

    Invariants: each proposed trial has exactly one terminal record (``scored``,
    or ``failed`` that is not retryable); no trial has two ``scored`` records;
    no record names a trial that was never proposed; every attempt that started
    has an outcome; every ``lost`` attempt is followed by a later attempt of the
    same trial or by the ``failed`` record that says no retries were left; and
    the fold's best trial is the best ``scored`` record.
    """
    from forebear.records.logbook import fold

    proposed: dict[int, dict[str, Any]] = {}
    terminal: Counter[int] = Counter()
    scored: dict[int, list[float]] = defaultdict(list)
    started: set[tuple[int, int]] = set()
    ended: set[tuple[int, int]] = set()
    lost: list[tuple[int, int, str]] = []
    attempts: dict[int, set[int]] = defaultdict(set)
    gave_up: set[int] = set()
    violations: list[str] = []
    for r in records:
        kind, tid, att = r.get("kind"), r.get("trial"), r.get("attempt")
        if kind in ("search", "closed"):
            continue
        if kind == "proposed":
            if tid in proposed:
                violations.append(f"trial {tid}: proposed twice")
            proposed[int(tid)] = dict(r.get("config") or {})
            continue
        if tid not in proposed:
            violations.append(f"a {kind} record names trial {tid}, which was never proposed")
            continue
        attempts[tid].add(int(att or 0))
        if kind == "started":
            started.add((tid, att))
        elif kind == "scored":
            scored[tid].append(float(r["score"]))
            terminal[tid] += 1
            ended.add((tid, att))
        elif kind == "failed":
            ended.add((tid, att))
            if not r.get("retryable"):
                terminal[tid] += 1
                if "no retries left" in str(r.get("error")):
                    gave_up.add(tid)
        elif kind == "lost":
            ended.add((tid, att))
            lost.append((tid, int(att), str(r.get("reason"))))
    for tid in sorted(proposed):
        if terminal[tid] != 1:
            violations.append(f"trial {tid}: {terminal[tid]} terminal records (want exactly 1)")
        if len(scored[tid]) > 1:
            violations.append(f"trial {tid}: scored {len(scored[tid])} times")
    for tid, att in sorted(started - ended):
        violations.append(f"trial {tid} attempt {att}: started but never ended")
    for tid, att, reason in lost:
        if not any(a > att for a in attempts[tid]) and tid not in gave_up:
            violations.append(f"trial {tid} attempt {att}: lost ({reason}) and never retried")
    table = fold(records)
    sign = -1.0 if sense == "maximize" else 1.0
    firsts = {t: s[0] for t, s in scored.items() if s}
    best_record = min(firsts, key=lambda t: (sign * firsts[t], t)) if firsts else None
    best = table.best()
    if (best.trial if best else None) != best_record:
        violations.append(f"the fold's best trial {best.trial if best else None} is not the best scored record {best_record}")
    elif best is not None and best.config != proposed[best.trial]:
        violations.append(f"the best trial's configuration {best.config} differs from its proposed one")
    reasons = Counter(reason for _, _, reason in lost)
    return {
        "trials": len(proposed),
        "scored": sum(1 for s in scored.values() if s),
        "failed": sum(1 for t in proposed if terminal[t] and not scored[t]),
        "attempts": sum(len(a) for a in attempts.values()),
        "lost": dict(sorted(reasons.items())),
        "best_trial": best_record,
        "violations": violations,
    }


# --------------------------------------------------------------------------
# helpers


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


def _records(logbook: Path) -> list[dict[str, Any]]:
    from forebear.records.logbook import Logbook

    return Logbook(logbook).records()


def _finished(logbook: Path) -> int:
    if not logbook.exists():
        return 0
    return sum(1 for r in _records(logbook) if r["kind"] in ("scored", "failed") and not r.get("retryable"))


def _cli(spec: Path) -> subprocess.Popen[bytes]:
    return subprocess.Popen([sys.executable, "-m", "forebear", "run", str(spec), "--quiet"], env=_env(),
                            start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def _wait(proc: subprocess.Popen[bytes], timeout: float) -> tuple[int, str]:
    try:
        _, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        _reap(proc)
        raise AssertionError(f"the controller did not finish within {timeout:g} s") from None
    return proc.returncode, err.decode(errors="replace")


def _logbook_of(spec: Path) -> Path:
    import yaml

    return spec.parent / yaml.safe_load(spec.read_text())["logbook"]


# --------------------------------------------------------------------------
# scenarios


def _running_attempt(proc: subprocess.Popen[Any]) -> bool:
    """Whether a worker process is running an attempt now (its fork server has a child)."""
    import psutil

    try:
        return any(server.children() for server in psutil.Process(proc.pid).children())
    except psutil.Error:
        return False


def worker_kills(cluster: Any, folder: Path, *, trials: int = 200, kills: int = 50, interval: tuple[float, float] = (0.3, 0.9),
                 seed: int = 1, busy_only: bool = True) -> dict[str, Any]:
    """A search on ``cluster`` while a chaos thread SIGKILLs a random worker ``kills`` times.

    Each killed worker is replaced at once (``cluster.start_worker()``). The
    controller runs in this process; the kills are real SIGKILLs of the
    worker processes (their attempts die with them). With ``busy_only`` the
    victim is drawn among the workers running an attempt at that moment, so
    that each kill interrupts an objective rather than a replacement worker
    that is still starting (which the other setting also exercises).
    """
    from forebear.core.spec import load
    from forebear.loop.controller import Controller

    n_workers = len([p for p in cluster.workers if p.poll() is None])
    spec_path = write_spec(folder, cluster.address, trials=trials, concurrency=n_workers, name="worker-kills", seed=seed)
    spec = load(spec_path)
    rng = random.Random(seed)
    done = threading.Event()
    killed: list[int] = []
    errors: list[BaseException] = []

    def chaos() -> None:
        try:
            # Start once attempts run, so that the first kills hit attempts rather than idle workers.
            while not done.is_set() and not any(r["kind"] == "started" for r in (_records(spec.logbook) if spec.logbook.exists() else [])):
                time.sleep(0.1)
            while not done.is_set() and len(killed) < kills:
                if done.wait(rng.uniform(*interval)):
                    return
                live = [i for i, p in enumerate(cluster.workers) if p.poll() is None]
                if busy_only:
                    live = [i for i in live if _running_attempt(cluster.workers[i])]
                while not live and not done.is_set():
                    time.sleep(0.05)
                    live = [i for i, p in enumerate(cluster.workers) if p.poll() is None and (not busy_only or _running_attempt(p))]
                if not live:
                    return
                killed.append(cluster.kill_worker(rng.choice(live)))
                cluster.start_worker()
        except BaseException as exc:  # noqa: BLE001 - reported with the figures
            errors.append(exc)

    thread = threading.Thread(target=chaos, name="chaos", daemon=True)
    t0 = time.monotonic()
    thread.start()
    try:
        result = Controller(spec, handle_signals=threading.current_thread() is threading.main_thread()).run()
    finally:
        done.set()
        thread.join(60)
    seconds = time.monotonic() - t0
    figures = check_invariants(_records(spec.logbook))
    if errors:
        figures["violations"].append(f"chaos thread failed: {errors[0]!r}")
    if result.best is None or result.best.trial != figures["best_trial"]:
        figures["violations"].append(f"the search's best trial {result.best.trial if result.best else None} is not the best record")
    if figures["trials"] != trials:
        figures["violations"].append(f"{figures['trials']} trials proposed, the budget was {trials}")
    return {"kills": len(killed), "seconds": round(seconds, 1), "closed": result.closed, **figures}


def controller_kills(cluster: Any, folder: Path, *, trials: int = 60, kills: int = 20, seed: int = 2,
                     after: tuple[float, float] = (0.0, 2.0), deadline: float = 300.0) -> dict[str, Any]:
    """``kills`` SIGKILLs of a ``forebear run`` controller at random moments, each followed by a resume.

    A kill comes a random ``after`` seconds once the controller's logbook has
    grown (the controller is connected and records are flowing); the last run
    finishes the search.
    """
    n_workers = len([p for p in cluster.workers if p.poll() is None])
    spec = write_spec(folder, cluster.address, trials=trials, concurrency=n_workers, name="controller-kills", seed=seed)
    logbook = _logbook_of(spec)
    rng = random.Random(seed)
    t0 = time.monotonic()
    done_kills = 0
    busy_refusals = 0
    doomed: list[Any] = []  # processes the killed controllers had started
    for _ in range(kills):
        size = logbook.stat().st_size if logbook.exists() else 0
        proc = _cli(spec)
        try:
            end = time.monotonic() + deadline
            while proc.poll() is None and (not logbook.exists() or logbook.stat().st_size <= size):
                if time.monotonic() > end:
                    raise AssertionError("a controller wrote nothing within the deadline")
                time.sleep(0.05)
            time.sleep(rng.uniform(*after))
            if proc.poll() is None:
                doomed += _children(proc.pid)
                os.kill(proc.pid, signal.SIGKILL)
                done_kills += 1
                proc.wait(timeout=30)  # not communicate(): its children may hold stderr open a while
            else:
                code, err = _wait(proc, 30)
                if "is driven by pid" in err:
                    busy_refusals += 1  # the dead controller's lock must not outlive it
        finally:
            _reap(proc)
        if _finished(logbook) >= trials:
            break
    code, err = _wait(_cli(spec), deadline)
    seconds = time.monotonic() - t0
    # A proposer process may still be importing torch when its controller dies; it leaves at its next check.
    orphans = _outlived(doomed, 60.0)
    records = _records(logbook)
    figures = check_invariants(records)
    if code != 0:
        figures["violations"].append(f"the final run exited {code}: {err.strip()[-300:]}")
    if busy_refusals:
        figures["violations"].append(f"{busy_refusals} run(s) refused: a killed controller's lock outlived it")
    if orphans:
        figures["violations"].append(f"processes outlived their killed controller by minutes: {orphans[:5]}")
    closed = [r for r in records if r["kind"] == "closed"]
    if not closed or closed[-1].get("reason") != "budget":
        figures["violations"].append(f"the search did not close on its budget: {closed[-1] if closed else None}")
    if figures["trials"] != trials:
        figures["violations"].append(f"{figures['trials']} trials proposed, the budget was {trials}")
    return {"kills": done_kills, "seconds": round(seconds, 1), **figures}


def _children(pid: int) -> list[Any]:
    import psutil

    try:
        return psutil.Process(pid).children(recursive=True)
    except psutil.Error:
        return []


def _outlived(children: list[Any], grace: float) -> list[str]:
    """Processes of a killed controller still alive after ``grace`` s (killed then, and named)."""
    import psutil

    _, alive = psutil.wait_procs(children, timeout=grace)
    names = []
    for p in alive:
        try:
            names.append(f"{p.pid} {' '.join(p.cmdline())[:80]}")
            p.kill()
        except psutil.Error:
            continue
    return names


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
        logbook = _logbook_of(spec)
        before: list[dict[str, Any]] = []
        filled = threading.Event()
        stop = threading.Event()

        def filler() -> None:
            end = time.monotonic() + deadline
            while _finished(logbook) < fill_after and not stop.is_set() and time.monotonic() < end:
                time.sleep(0.05)
            if stop.is_set():
                return
            before.extend(_records(logbook))
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
        after = _records(logbook)
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
        final = _records(logbook)
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
    logbook = _logbook_of(spec)
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
    before = _records(logbook)
    res2 = CliRunner().invoke(cli_main, ["run", str(spec), "--quiet"])
    if res2.exit_code != 0:
        violations.append(f"the resume exited {res2.exit_code}: {res2.stderr.strip()[-300:]}")
    final = _records(logbook)
    if final[: len(before)] != before:
        violations.append("the resume lost records written before the failure")
    figures = check_invariants(final)
    figures["violations"] = violations + figures["violations"]
    return {"message": lines[0] if lines else "", "fsync_calls": calls[0], **figures}


def logbook_tests(full: bool = True) -> dict[str, Any]:
    """Run the torn-write and concurrent-writer tests (tests/test_logbook*.py) and report them.

    They need the source checkout (the tests are not installed); without it
    the figures say so.
    """
    tests = Path(__file__).resolve().parents[3] / "tests"
    names = ["test_logbook.py::test_torn_writes_at_random_offsets", "test_logbook.py::test_torn_write_with_whole_record_keeps_it",
             "test_logbook.py::test_eight_writers_while_controller_lock_held", "test_logbook.py::test_controller_lock_released_when_holder_is_killed",
             "test_logbook_faults.py::test_writer_killed_mid_large_record", "test_logbook_faults.py::test_full_disk_is_reported_and_nothing_lost",
             "test_logbook_faults.py::test_failing_fsync_keeps_earlier_records"]
    if not (tests / "test_logbook.py").is_file():
        return {"skipped": f"no test tree at {tests} (run from a source checkout)"}
    env = _env()
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


# --------------------------------------------------------------------------
# load: many trials of a no-op objective


def _rss_mib() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def load_run(folder: Path, *, trials: int = 2000, workers: int = 4, window: int = 100) -> dict[str, Any]:
    """A ``trials``-trial search of :func:`noop` on ``workers`` local workers; per-trial overhead and memory.

    Run it in a fresh process (:func:`load`) so that the peak memory is the
    controller's. The proposer is the real engine with its initial design
    (a Latin hypercube) covering the whole budget, so that model refits do not
    hide what the controller, Dask and the logbook cost per trial. Overhead
    per trial = worker-seconds per finished trial over a window of ``window``
    trials (the objective takes no time); ``propose`` calls are timed too.
    """
    from forebear.core.spec import load as load_spec
    from forebear.engine.proposer import Proposer
    from forebear.loop.controller import Controller

    spec = load_spec(write_spec(folder, None, trials=trials, concurrency=workers, objective=NOOP, name="load", workers=workers))
    proposer = Proposer(spec.space, seed=spec.seed, n_initial=trials)
    timings: list[tuple[int, float]] = []
    real = proposer.propose

    def timed(n: int, observed: Any, failed: Any = (), pending: Any = ()) -> Any:
        t = time.perf_counter()
        out = real(n, observed, failed=failed, pending=pending)
        timings.append((len(observed) + len(failed), time.perf_counter() - t))
        return out

    proposer.propose = timed  # type: ignore[method-assign]
    rss: list[tuple[int, float]] = []
    stop = threading.Event()

    def sample() -> None:
        while not stop.wait(1.0):
            rss.append((len(timings), _rss_mib()))

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    t0 = time.monotonic()
    try:
        result = Controller(spec, proposer=proposer, handle_signals=False).run()
    finally:
        stop.set()
        sampler.join(5)
    seconds = time.monotonic() - t0
    records = _records(spec.logbook)
    ends = sorted(float(r["at"]) for r in records if r["kind"] == "scored")
    figures = check_invariants(records)

    def per_trial(hi: int) -> float | None:
        lo = hi - window
        if lo < 1 or hi > len(ends):
            return None
        return round((ends[hi - 1] - ends[lo - 1]) * workers / window, 5)

    early, late = per_trial(min(window + window // 2, len(ends))), per_trial(len(ends))
    at = f"at_{window + window // 2}"

    def propose_ms(lo: int, hi: int) -> float | None:
        sel = [s for n, s in timings if lo <= n < hi]
        return round(1000 * sum(sel) / len(sel), 3) if sel else None

    return {
        "trials": trials,
        "workers": workers,
        "seconds": round(seconds, 1),
        "closed": result.closed,
        "window": window,
        f"overhead_s_per_trial_{at}": early,
        "overhead_s_per_trial_at_end": late,
        "overhead_growth": round(late / early, 2) if early and late else None,
        f"propose_ms_{at}": propose_ms(window // 2, window + window // 2),
        "propose_ms_at_end": propose_ms(trials - window - window // 2, trials),
        "controller_peak_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "controller_rss_mib_early": round(rss[min(len(rss) - 1, 5)][1], 1) if rss else None,
        "controller_rss_mib_end": round(rss[-1][1], 1) if rss else None,
        "logbook_bytes": spec.logbook.stat().st_size,
        **figures,
    }


def load(folder: Path, *, trials: int = 2000, workers: int = 4, window: int = 100, timeout: float = 3600.0) -> dict[str, Any]:
    """:func:`load_run` in a fresh Python process; returns its figures."""
    out = folder / "load.json"
    code = (
        "import json, sys; from pathlib import Path; from forebear.bench.faults import load_run; "
        f"r = load_run(Path({str(folder)!r}), trials={trials}, workers={workers}, window={window}); "
        f"Path({str(out)!r}).write_text(json.dumps(r))"
    )
    folder.mkdir(parents=True, exist_ok=True)
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=_env(), timeout=timeout)
    if res.returncode != 0 or not out.exists():
        return {"violations": [f"the load run exited {res.returncode}: {res.stderr.strip()[-800:]}"]}
    return json.loads(out.read_text())


# --------------------------------------------------------------------------
# the campaign


FULL = {"worker_kills": {"trials": 200, "kills": 50}, "controller_kills": {"trials": 80, "kills": 20},
        "full_disk": {"trials": 16}, "fsync": {"trials": 12}, "load": {"trials": 2000}}
SHORT = {"worker_kills": {"trials": 12, "kills": 3, "interval": (0.8, 1.6)}, "controller_kills": {"trials": 8, "kills": 2},
         "full_disk": {"trials": 10}, "fsync": {"trials": 8}, "load": {"trials": 80, "workers": 2, "window": 25}}


def main(short: bool = False, folder: str | None = None) -> dict[str, Any]:
    """Run the campaign (``forebear bench faults``); returns the figures of every scenario.

    Each scenario's figures hold its ``violations`` (empty when every
    invariant held); ``ok`` is true when all are empty.
    """
    import tempfile

    sizes = SHORT if short else FULL
    base = Path(folder) if folder else Path(tempfile.mkdtemp(prefix="forebear-faults-"))
    out: dict[str, Any] = {"size": "short" if short else "full", "folder": str(base)}

    def keep(name: str, figures: dict[str, Any]) -> None:
        # Figures are saved as each scenario ends, so a long campaign that is stopped keeps what it measured.
        out[name] = figures
        (base / "figures.json").write_text(json.dumps(out, indent=2))

    cluster = ProcessCluster(base / "cluster-a", workers=4)
    try:
        keep("worker_kills", worker_kills(cluster, base / "worker-kills", **sizes["worker_kills"]))
    finally:
        cluster.close()
    cluster = ProcessCluster(base / "cluster-b", workers=4)
    try:
        keep("controller_kills", controller_kills(cluster, base / "controller-kills", **sizes["controller_kills"]))
        keep("full_disk", full_disk(cluster, base / "full-disk", **sizes["full_disk"]))
        keep("fsync", fsync_failure(cluster, base / "fsync", **sizes["fsync"]))
    finally:
        cluster.close()
    keep("logbook", logbook_tests(full=not short))
    keep("load", load(base / "load", **sizes["load"]))
    out["ok"] = not any(v.get("violations") for v in out.values() if isinstance(v, dict))
    return out
