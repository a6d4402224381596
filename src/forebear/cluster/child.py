"""The attempt process: a per-worker fork server and the child it forks per attempt.

A Dask worker keeps one server process per objective. The server imports the
objective once (a ``call`` objective's module, with torch and the rest), then
waits for requests on its stdin (a Python callable given as the objective is
loaded instead from the cloudpickle bytes shipped to it, ``--function``). For
each attempt it forks a child that starts a new session (so a timeout can
kill the whole process group), sends its output to the attempt's log, and
either calls the objective or ``exec``s the command objective's argv. The server reports the child's pid and, when it
exits, its wait status. If the worker dies the server's stdin closes and the
server kills the running child's group before it exits; the child also gets
SIGKILL from the kernel when the server dies (Linux ``PR_SET_PDEATHSIG``).
When a child exits (or is killed), whatever it left running dies with it: its
process group, and on Linux, where the server is a child subreaper
(``PR_SET_CHILD_SUBREAPER``), every descendant that escaped into a session of
its own, since orphans are re-parented to the server instead of to init.

Protocol, one JSON object a line: the server first says ``{"ready": true}``
(or ``{"ready": false, "error": ...}``); a request ``{"op": "run", ...}`` is
answered by ``{"pid": N}`` and later ``{"exit": status}``; ``{"op": "kill"}``
kills the running child's group. Nothing here imports Dask.
"""

from __future__ import annotations

import importlib
import importlib.util
import json
import os
import resource
import select
import signal
import sys
import time
import traceback
from collections.abc import Callable, Mapping
from typing import Any


def _sibling(name: str) -> Any:
    """A standard-library-only module of this folder, also when this file runs as a script.

    The runner starts this file directly (the package's own imports would add seconds to
    every server start), so ``forebear.cluster`` is not importable as a package here.
    """
    if __package__:
        return importlib.import_module(f"{__package__}.{name}")
    full = f"_forebear_child_{name}"
    if full in sys.modules:
        return sys.modules[full]
    spec = importlib.util.spec_from_file_location(full, os.path.join(os.path.dirname(os.path.abspath(__file__)), f"{name}.py"))
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[full] = module
    spec.loader.exec_module(module)
    return module


_capture = _sibling("capture")
_scoring = _sibling("scoring")
_tree = _sibling("tree")
BadScore = _scoring.BadScore
score_of = _scoring.score_of
score_of_stdout = _scoring.score_of_stdout


# --------------------------------------------------------------------------
# the child


def _write_result(path: str, payload: Mapping[str, Any]) -> None:
    tmp = path + ".tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(fd, json.dumps(payload, allow_nan=False, default=str).encode())
    finally:
        os.close(fd)
    os.replace(tmp, path)


def _scored(value: Any, metric: str) -> dict[str, Any]:
    """The result file's payload for what the objective returned (scoring errors are not the objective's)."""
    dropped: dict[str, str] = {}
    try:
        score, metrics = score_of(value, metric, dropped)
    except BadScore as exc:
        return {"ok": False, "error": f"bad result: {exc}"}
    except Exception as exc:  # noqa: BLE001 - a result whose __eq__ or .item() raises
        return {"ok": False, "error": f"bad result: reading the result raised {type(exc).__name__}: {exc}"[:2000]}
    return {"ok": True, "score": score, "metrics": metrics, "dropped": dropped}


def _child(req: Mapping[str, Any], fn: Callable[..., Any] | None, ready_w: int, keep: set[int], pipes: tuple[int, int]) -> None:
    """Runs in the forked child; never returns."""
    code = 0
    try:
        os.setsid()
        _tree.pdeathsig(signal.SIGKILL)
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        signal.signal(signal.SIGPIPE, signal.SIG_DFL)
        os.write(ready_w, b"1")
        os.close(ready_w)
        if req.get("memory"):
            # cluster.local.memory_limit: the attempt, and whatever it execs or starts, gets this much
            # address space; an allocation beyond it fails (MemoryError in Python) instead of succeeding.
            limit = int(req["memory"])
            resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
        out_fd, log_fd = pipes  # the write ends of the server's capture pipes
        null = os.open(os.devnull, os.O_RDONLY)
        os.dup2(null, 0)
        os.dup2(out_fd, 1)
        os.dup2(log_fd, 2)
        for fd in {*keep, out_fd, log_fd} - {0, 1, 2}:
            os.close(fd)
        env = {**os.environ, **req.get("env", {})}
        cwd = req.get("cwd")
        if cwd and os.path.isdir(cwd):
            os.chdir(cwd)
        if req["kind"] == "exec":
            argv = list(req["argv"])
            try:
                os.execvpe(argv[0], argv, env)
            except OSError as exc:
                _write_result(req["result"], {"ok": False, "error": f"cannot run command {argv[0]!r}: {exc.strerror or exc}"})
                code = 127
        else:
            os.environ.update(req.get("env", {}))
            assert fn is not None
            payload: dict[str, Any]
            try:
                value = fn(dict(req["config"]))
            except BaseException as exc:  # noqa: BLE001 - the user's code may raise anything, SystemExit included
                tb = traceback.format_exception(type(exc), exc, exc.__traceback__)
                sys.stderr.write("".join(tb))
                payload = {"ok": False, "error": f"objective raised {type(exc).__name__}: {exc}"[:2000]}
            else:
                payload = _scored(value, req["metric"])
            _write_result(req["result"], payload)
    except BaseException:  # noqa: BLE001 - report and leave; a child must never return into the server
        try:
            traceback.print_exc()
        except BaseException:  # noqa: BLE001
            pass
        code = 70
    finally:
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except BaseException:  # noqa: BLE001
                pass
        os._exit(code)


# --------------------------------------------------------------------------
# the server


def load_callable(target: str) -> Callable[..., Any]:
    """Import ``module:function`` (attribute path allowed after the colon)."""
    module_name, _, attr = target.partition(":")
    obj: Any = importlib.import_module(module_name)
    for part in attr.split("."):
        obj = getattr(obj, part)
    if not callable(obj):
        msg = f"{target} is {type(obj).__name__}, not a callable"
        raise TypeError(msg)
    return obj


def _send(fd: int, payload: Mapping[str, Any]) -> None:
    os.write(fd, (json.dumps(payload) + "\n").encode())


def _drain(streams: dict[int, Any], ready: list[Any]) -> None:
    """Copy what the child wrote to its capture pipes; a pipe at end of file is closed."""
    for fd in [f for f in ready if f in streams]:
        chunk = os.read(fd, 1 << 16)
        if chunk:
            streams[fd].feed(chunk)
        else:
            os.close(fd)
            streams.pop(fd).close()  # end of file: the tail goes in now


def _wait_child(pid: int, inp: Any, out_fd: int, keep: set[int], streams: dict[int, Any]) -> bool:
    """Wait for the child while capturing its output; return False when stdin closed (the worker is gone)."""
    try:
        pidfd = os.pidfd_open(pid)
    except (AttributeError, OSError):
        pidfd = None
    alive = True
    try:
        while True:
            fds = [inp, *streams] + ([pidfd] if pidfd is not None else [])
            ready, _, _ = select.select(fds, [], [], None if pidfd is not None else 0.01)
            _drain(streams, ready)
            if inp in ready:
                line = inp.readline()
                if not line:
                    alive = False
                    _tree.kill_group(pid)
                elif json.loads(line).get("op") == "kill":
                    _tree.kill_group(pid)
            done, status = os.waitpid(pid, os.WNOHANG)
            if done:
                _tree.end_tree(pid, keep)
                _finish_capture(streams)
                if alive:
                    _send(out_fd, {"exit": status})
                return alive
    finally:
        if pidfd is not None:
            os.close(pidfd)


def _finish_capture(streams: dict[int, Any], grace: float = 2.0) -> None:
    """Read the pipes to their end (the attempt's processes are gone) and close the captured files."""
    deadline = time.monotonic() + grace
    while streams and time.monotonic() < deadline:
        ready, _, _ = select.select(list(streams), [], [], max(0.0, deadline - time.monotonic()))
        _drain(streams, ready)
    for fd in list(streams):  # a writer that outlived the tree (no subreaper here): stop reading it
        os.close(fd)
        streams.pop(fd).close()


def _capture_pipes(req: Mapping[str, Any]) -> tuple[dict[int, Any], tuple[int, int]]:
    """Pipes for the child's stdout and stderr, read by this server into capped files.

    Returns the read ends with their captures, and the write ends (stdout, stderr) for the child.
    A ``call`` objective's stdout and stderr share the log; a command's stdout has its own file.
    """
    log_r, log_w = os.pipe()
    streams: dict[int, Any] = {log_r: _capture.Capture(req["log"])}
    if req.get("out"):
        out_r, out_w = os.pipe()
        streams[out_r] = _capture.Capture(req["out"])
        return streams, (out_w, log_w)
    return streams, (log_w, log_w)


def load_shipped(path: str) -> Callable[..., Any]:
    """The callable objective shipped as cloudpickle bytes in the file at ``path``.

    Plain ``pickle`` reads cloudpickle's output; it imports cloudpickle itself only
    for a function sent by value.
    """
    import pickle

    with open(path, "rb") as fh:
        fn = pickle.loads(fh.read())  # noqa: S301 - the controller's own objective, sent like any Dask task
    if not callable(fn):
        msg = f"the shipped objective is {type(fn).__name__}, not a callable"
        raise TypeError(msg)
    return fn


def serve(call: str | None, path: str | None, function: str | None = None, name: str | None = None) -> int:
    """The server's main loop; returns the exit status."""
    proto = os.dup(1)
    os.dup2(2, 1)  # whatever the user's module prints on import goes to stderr, not the protocol
    sys.stdin = os.fdopen(0, "r", buffering=1)
    inp = sys.stdin
    if path and os.path.isdir(path) and path not in sys.path:
        sys.path.insert(0, path)
    fn = None
    if call:
        try:
            fn = load_callable(call)
        except BaseException as exc:  # noqa: BLE001 - any import-time failure is reported to the runner
            _send(proto, {"ready": False, "error": f"cannot import objective {call}: {type(exc).__name__}: {exc}"[:2000]})
            return 1
    elif function:
        try:
            fn = load_shipped(function)
        except BaseException as exc:  # noqa: BLE001 - a module the function needs may be missing on this worker
            what = f"cannot load the objective function {name or ''} on this worker: {type(exc).__name__}: {exc}"
            _send(proto, {"ready": False, "error": what[:2000]})
            return 1
    _tree.become_subreaper()
    _send(proto, {"ready": True, "pid": os.getpid()})
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C in a terminal reaches the worker's group; the worker decides
    while True:
        line = inp.readline()
        if not line:
            return 0
        req = json.loads(line)
        if req.get("op") != "run":
            continue
        for stream in (sys.stdout, sys.stderr):
            stream.flush()
        before = _tree.children()  # processes the user's module started at import are not the attempt's
        streams, pipes = _capture_pipes(req)
        ready_r, ready_w = os.pipe()
        pid = os.fork()
        if pid == 0:
            os.close(ready_r)
            _child(req, fn, ready_w, {proto, inp.fileno(), *streams}, pipes)
        os.close(ready_w)
        for fd in set(pipes):
            os.close(fd)
        os.read(ready_r, 1)  # the child has its own session now: killpg(pid) reaches it
        os.close(ready_r)
        _send(proto, {"pid": pid, "at": time.time()})
        if not _wait_child(pid, inp, proto, before, streams):
            return 0


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    call = path = function = name = None
    while args:
        flag = args.pop(0)
        if flag == "--call":
            call = args.pop(0)
        elif flag == "--path":
            path = args.pop(0)
        elif flag == "--function":
            function = args.pop(0)
        elif flag == "--name":
            name = args.pop(0)
        else:
            sys.stderr.write(f"forebear.cluster.child: unknown argument {flag!r}\n")
            return 2
    return serve(call, path, function, name)


if __name__ == "__main__":
    # Started as a file: its folder (forebear's own modules) must not shadow the user's modules.
    _here = os.path.dirname(os.path.abspath(__file__))
    sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _here]
    sys.exit(main())
