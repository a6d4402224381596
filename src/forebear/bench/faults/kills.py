"""Killed workers and killed controllers: SIGKILLs at random moments during a search, then the logbook's invariants."""

from __future__ import annotations

import os
import random
import signal
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

from forebear.bench.faults.cluster import reap
from forebear.bench.faults.driver import (
    finished_count,
    logbook_of,
    read_records,
    start_run,
    wait_run,
    write_spec,
)
from forebear.bench.faults.invariants import check_invariants


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
            while not done.is_set() and not any(r["kind"] == "started" for r in (read_records(spec.logbook) if spec.logbook.exists() else [])):
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
    figures = check_invariants(read_records(spec.logbook))
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
    logbook = logbook_of(spec)
    rng = random.Random(seed)
    t0 = time.monotonic()
    done_kills = 0
    busy_refusals = 0
    doomed: list[Any] = []  # processes the killed controllers had started
    for _ in range(kills):
        size = logbook.stat().st_size if logbook.exists() else 0
        proc = start_run(spec)
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
                code, err = wait_run(proc, 30)
                if "is driven by pid" in err:
                    busy_refusals += 1  # the dead controller's lock must not outlive it
        finally:
            reap(proc)
        if finished_count(logbook) >= trials:
            break
    code, err = wait_run(start_run(spec), deadline)
    seconds = time.monotonic() - t0
    # A proposer process may still be importing torch when its controller dies; it leaves at its next check.
    orphans = _outlived(doomed, 60.0)
    records = read_records(logbook)
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
