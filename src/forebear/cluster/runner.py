"""What runs on a worker: one attempt of one trial, isolated in a child process.

:func:`run_attempt` is the function the controller submits to Dask. It hands
the attempt to a per-worker fork server (:mod:`forebear.cluster.child`) that has
already imported the objective, waits for the child with the attempt's
timeout, and kills the child's whole process group on timeout or when the
Dask task is cancelled. A crash of the user's code (segfault, ``os._exit``,
MemoryError, a hang) ends the child, never the worker.

When the logbook's folder is reachable from the worker (a shared filesystem,
proven by a token file the controller wrote), the runner appends its own
``started`` and ``scored``/``failed`` records and writes the full log beside
the logbook; otherwise it returns the records and the log for the controller
to write. The task and its result are :mod:`forebear.cluster.task`; how the
child's exit becomes the final record is :mod:`forebear.cluster.outcome`. The
runner never imports the surrogate.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import signal
import socket
import tempfile
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from forebear.cluster.capture import read_log, with_tail
from forebear.cluster.outcome import finish
from forebear.cluster.servers import RunnerError, _acquire, _release, _Server, shutdown_servers
from forebear.cluster.steps import StepWatcher
from forebear.cluster.task import AttemptResult, AttemptTask, log_name
from forebear.records.logbook import Logbook, ensure_folder, record

__all__ = ["AttemptResult", "AttemptTask", "RunnerError", "log_name", "reachable", "run_attempt", "shutdown_servers"]

PROBE_NAME = ".probe"
KILL_GRACE = 10.0  # seconds to wait for a killed child to be reaped
HALT_GRACE = 5.0  # seconds a halted command has between SIGTERM and SIGKILL to clean up
POLL = 0.05  # how often a waiting runner reads new intermediate scores and checks whether its task was cancelled


def _server_key(task: AttemptTask) -> tuple[str | None, tuple[str, bytes] | None]:
    """The pool key of the server an attempt needs, and the shipped function it loads (if any)."""
    if task.command:
        return None, None
    if task.function is not None:
        name = task.function_name or "objective"
        return f"function {name} {hashlib.sha256(task.function).hexdigest()[:16]}", (name, task.function)
    return task.call, None


# --------------------------------------------------------------------------
# where the worker is


def _worker_identity() -> tuple[str, Callable[[], bool]]:
    """This worker's address and a check whether the running Dask task was cancelled."""
    try:
        from distributed.worker import get_worker, thread_state

        worker = get_worker()
        key = thread_state.key
    except (ImportError, ValueError, AttributeError):
        return f"pid-{os.getpid()}", lambda: False

    def cancelled() -> bool:
        ts = worker.state.tasks.get(key)
        return ts is None or ts.state in ("cancelled", "released", "forgotten")

    return str(worker.address), cancelled


_SHARED: dict[tuple[str, str], bool] = {}


def reachable(logs: str | None, token: str | None) -> bool:
    """True when the controller's token file is visible here: same filesystem as the logbook."""
    if not logs or not token:
        return False
    key = (logs, token)
    if key not in _SHARED:
        try:
            _SHARED[key] = (Path(logs) / PROBE_NAME).read_text().strip() == token
        except OSError:
            _SHARED[key] = False
    return _SHARED[key]


# --------------------------------------------------------------------------
# one attempt


def run_attempt(task: AttemptTask) -> AttemptResult:
    """Run one attempt of a trial in a child process and report it (the Dask task)."""
    worker, cancelled = _worker_identity()
    shared = reachable(task.logs, task.token)
    logbook = Logbook(task.logbook, task.lock, task.lock_lifetime) if shared and task.logbook else None
    scratch = Path(tempfile.mkdtemp(prefix=f"forebear-t{task.trial}-"))
    try:
        return _run(task, worker, cancelled, logbook, scratch)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def _run(task: AttemptTask, worker: str, cancelled: Callable[[], bool], logbook: Logbook | None, scratch: Path) -> AttemptResult:
    name = log_name(task.trial, task.attempt)
    if logbook is not None and task.logs:
        ensure_folder(Path(task.logs))
        log = Path(task.logs) / name
    else:
        log = scratch / name
    out = log.with_suffix(".out") if task.command else None
    config_file = scratch / "config.json"
    fd = os.open(config_file, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    config_json = json.dumps(dict(task.config), default=str)
    try:
        os.write(fd, config_json.encode())
    finally:
        os.close(fd)
    env = {
        "FOREBEAR_CONFIG": config_json,
        "FOREBEAR_CONFIG_FILE": str(config_file),
        "FOREBEAR_TRIAL": str(task.trial),
        "FOREBEAR_ATTEMPT": str(task.attempt),
        "FOREBEAR_SEARCH": task.search,
    }
    request: dict[str, Any] = {
        "op": "run",
        "log": str(log),
        "out": str(out) if out else None,
        "result": str(scratch / "result.json"),
        "env": env,
        "cwd": task.cwd,
        "metric": task.metric,
        "config": dict(task.config),
        "memory": task.memory_limit,
    }
    watcher = StepWatcher(task, logbook, scratch, out, log)
    if not task.command:
        request.update(steps=str(watcher.source), halt=str(watcher.halt_file))
    if task.command:
        request.update(kind="exec", argv=[_substitute(a, task.config) for a in task.command])
    else:
        request.update(kind="call")
    result = AttemptResult(task.trial, task.attempt, "failed", worker=worker, log_name=name)
    key_call, function = _server_key(task)
    try:
        server = _acquire(key_call, task.cwd, max(60.0, task.timeout or 0.0), function)
    except RunnerError as exc:
        # The objective cannot be imported here: the attempt fails, it did not start anything.
        started = record("started", trial=task.trial, attempt=task.attempt, worker=worker, host=socket.gethostname(), pid=None)
        since = logbook.append(started) if logbook is not None else 0
        return finish(task, result, logbook, started, None, str(exc), 0.0, log, out, since=since)
    try:
        outcome, status, started, seconds, since = _supervise(server, request, task, worker, logbook, cancelled, watcher)
    except RunnerError as exc:
        server.close()
        watcher.close()
        started = record("started", trial=task.trial, attempt=task.attempt, worker=worker, host=socket.gethostname(), pid=None)
        return finish(task, result, logbook, started, None, str(exc), 0.0, log, out)
    finally:
        _release(server, key_call, task.cwd)
    watcher.poll(final=True)
    if outcome in ("timeout", "cancelled"):
        result.outcome = outcome
        result.records = [started] if logbook is not None else [started, *watcher.records]
        result.written = logbook is not None
        result.seconds = seconds
        what = f"the attempt timed out after {task.timeout:g} s" if outcome == "timeout" else "the attempt was cancelled"
        result.error = with_tail(what, log, out)
        if logbook is None:
            result.log_text = read_log(log, out)
        return result
    result.outcome = outcome
    return finish(task, result, logbook, started, status, None, seconds, log, out, scratch / "result.json", since, watcher)


def _supervise(
    server: _Server,
    request: Mapping[str, Any],
    task: AttemptTask,
    worker: str,
    logbook: Logbook | None,
    cancelled: Callable[[], bool],
    watcher: StepWatcher,
) -> tuple[str, int | None, dict[str, Any], float, int]:
    """Start the child, write ``started``, wait.

    Returns (outcome, wait status, started record, seconds, the logbook offset after ``started``).
    """
    server.send(request)
    hello = server.read(60.0)
    if hello is None or "pid" not in hello:
        raise RunnerError("the attempt process server did not fork a child within 60 s")
    pid = int(hello["pid"])
    t0 = time.monotonic()
    started = record("started", trial=task.trial, attempt=task.attempt, worker=worker, host=socket.gethostname(), pid=pid)
    since = 0
    if logbook is not None:
        try:
            since = logbook.append(started)
        except BaseException:
            # The logbook cannot be written (a full disk): stop the child and retire this server, whose
            # protocol would otherwise still owe the child's exit to the next attempt it is given.
            _killpg(pid)
            server.close()
            raise
    deadline = None if task.timeout is None else t0 + task.timeout
    outcome = "done"
    killed_at: float | None = None
    halted_at = 0.0
    while True:
        now = time.monotonic()
        wait = POLL if deadline is None or outcome != "done" else max(0.0, min(POLL, deadline - now))
        msg = server.read(wait)
        if msg is not None and "exit" in msg:
            return outcome, int(msg["exit"]), started, time.monotonic() - t0, since
        now = time.monotonic()
        if outcome == "done" and watcher.poll() and task.command:
            # A command is halted with SIGTERM, so it can clean up, then SIGKILL after HALT_GRACE.
            outcome, halted_at = "halted", now
            _killpg(pid, signal.SIGTERM)
        if killed_at is None:
            reason = None
            if deadline is not None and now >= deadline:
                reason = "timeout"
            elif cancelled():
                reason = "cancelled"
            elif outcome == "halted" and now - halted_at > HALT_GRACE:
                reason = "halted"
            if reason is not None:
                outcome, killed_at = reason, now
                _killpg(pid)
        elif killed_at is not None and now - killed_at > KILL_GRACE:
            # The child ignores SIGKILL only when stuck in the kernel (D state); give up on it.
            server.close()
            return outcome, None, started, now - t0, since


def _killpg(pid: int, sig: int = signal.SIGKILL) -> None:
    try:
        os.killpg(pid, sig)
    except (ProcessLookupError, PermissionError):
        pass


_PLACEHOLDER = re.compile(r"\{([A-Za-z_][\w.-]*)\}")


def _substitute(item: str, config: Mapping[str, Any]) -> str:
    """Fill ``{name}`` placeholders of one argv item; the item stays one argument.

    Only names of the configuration are replaced; any other braces (a JSON
    snippet, a Python one-liner) stay as written.
    """
    return _PLACEHOLDER.sub(lambda m: str(config[m.group(1)]) if m.group(1) in config else m.group(0), item)
