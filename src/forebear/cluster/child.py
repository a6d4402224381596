"""The attempt process: a per-worker fork server and the child it forks per attempt.

A Dask worker keeps one server process per objective. The server imports the
objective once (a ``call`` objective's module, with torch and the rest), then
waits for requests on its stdin. For each attempt it forks a child that starts
a new session (so a timeout can kill the whole process group), sends its
output to the attempt's log, and either calls the objective or ``exec``s the
command objective's argv. The server reports the child's pid and, when it
exits, its wait status. If the worker dies the server's stdin closes and the
server kills the running child's group before it exits; the child also gets
SIGKILL from the kernel when the server dies (Linux ``PR_SET_PDEATHSIG``).

Protocol, one JSON object a line: the server first says ``{"ready": true}``
(or ``{"ready": false, "error": ...}``); a request ``{"op": "run", ...}`` is
answered by ``{"pid": N}`` and later ``{"exit": status}``; ``{"op": "kill"}``
kills the running child's group. Nothing here imports Dask.
"""

from __future__ import annotations

import ctypes
import importlib
import json
import math
import os
import select
import signal
import sys
import time
import traceback
from collections.abc import Callable, Mapping
from typing import Any

PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>


class BadScore(ValueError):
    """An objective result that is not a usable score; the message says what came back."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


# --------------------------------------------------------------------------
# scores


def _describe(value: Any, limit: int = 80) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _number(value: Any) -> float | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return float(value)
    if hasattr(value, "item") and callable(value.item):  # numpy and torch scalars
        try:
            item = value.item()
        except (TypeError, ValueError, RuntimeError):
            return None
        return _number(item) if not hasattr(item, "item") else None
    return None


def score_of(value: Any, metric: str) -> tuple[float, dict[str, Any]]:
    """The score and the metrics of an objective result.

    A bare number is the metric itself; a mapping must hold ``metric``.

    Raises
    ------
    BadScore
        For NaN, inf, a missing metric or anything that is not a number.
    """
    if isinstance(value, Mapping):
        if metric not in value:
            keys = ", ".join(map(str, list(value)[:10])) or "none"
            raise BadScore(f"the result has no metric {metric!r} (keys: {keys})")
        metrics: dict[str, Any] = {}
        for k, v in value.items():
            num = _number(v)
            if num is not None and math.isfinite(num):
                metrics[str(k)] = num
            elif isinstance(v, (str, bool)) or v is None:
                metrics[str(k)] = v
        score = _check(value[metric], metric)
        metrics[metric] = score
        return score, metrics
    score = _check(value, metric)
    return score, {metric: score}


def _check(value: Any, metric: str) -> float:
    num = _number(value)
    if num is None:
        raise BadScore(f"metric {metric!r} is {type(value).__name__} {_describe(value)}, not a number")
    if math.isnan(num):
        raise BadScore(f"metric {metric!r} is NaN")
    if math.isinf(num):
        raise BadScore(f"metric {metric!r} is {'+' if num > 0 else '-'}inf")
    return num


def score_of_stdout(text: str, metric: str) -> tuple[float, dict[str, Any]]:
    """Score a command objective from its stdout: the last non-empty line, JSON or a bare number."""
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise BadScore("stdout was empty; the last line must be a number or a JSON object with the metric")
    last = lines[-1]
    try:
        value = json.loads(last)
    except ValueError:
        try:
            value = float(last)
        except ValueError:
            raise BadScore(f"the last stdout line is not a number or JSON: {_describe(last)}") from None
    return score_of(value, metric)


# --------------------------------------------------------------------------
# the child


def _pdeathsig(sig: int) -> None:
    """Ask Linux to send ``sig`` to this process when its parent dies (no-op elsewhere)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, sig, 0, 0, 0)
    except (OSError, AttributeError):
        pass


def _write_result(path: str, payload: Mapping[str, Any]) -> None:
    tmp = path + ".tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(fd, json.dumps(payload, allow_nan=False, default=str).encode())
    finally:
        os.close(fd)
    os.replace(tmp, path)


def _child(req: Mapping[str, Any], fn: Callable[..., Any] | None, ready_w: int, keep: set[int]) -> None:
    """Runs in the forked child; never returns."""
    code = 0
    try:
        os.setsid()
        _pdeathsig(signal.SIGKILL)
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        signal.signal(signal.SIGPIPE, signal.SIG_DFL)
        os.write(ready_w, b"1")
        os.close(ready_w)
        log_fd = os.open(req["log"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        out_fd = os.open(req["out"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600) if req.get("out") else log_fd
        null = os.open(os.devnull, os.O_RDONLY)
        os.dup2(null, 0)
        os.dup2(out_fd, 1)
        os.dup2(log_fd, 2)
        for fd in keep:
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
            try:
                value = fn(dict(req["config"]))
                score, metrics = score_of(value, req["metric"])
                payload: dict[str, Any] = {"ok": True, "score": score, "metrics": metrics}
            except BadScore as exc:
                payload = {"ok": False, "error": f"bad result: {exc}"}
            except BaseException as exc:  # noqa: BLE001 - the user's code may raise anything, SystemExit included
                tb = traceback.format_exception(type(exc), exc, exc.__traceback__)
                sys.stderr.write("".join(tb))
                payload = {"ok": False, "error": f"objective raised {type(exc).__name__}: {exc}"[:2000]}
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


def _kill_group(pid: int) -> None:
    try:
        os.killpg(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    except PermissionError:
        pass


def _wait_child(pid: int, inp: Any, out_fd: int) -> bool:
    """Wait for the child; return False when stdin closed (the worker is gone)."""
    try:
        pidfd = os.pidfd_open(pid)
    except (AttributeError, OSError):
        pidfd = None
    alive = True
    try:
        while True:
            fds = [inp] + ([pidfd] if pidfd is not None else [])
            ready, _, _ = select.select(fds, [], [], None if pidfd is not None else 0.01)
            if inp in ready:
                line = inp.readline()
                if not line:
                    alive = False
                    _kill_group(pid)
                elif json.loads(line).get("op") == "kill":
                    _kill_group(pid)
            done, status = os.waitpid(pid, os.WNOHANG)
            if done:
                if alive:
                    _send(out_fd, {"exit": status})
                return alive
    finally:
        if pidfd is not None:
            os.close(pidfd)


def serve(call: str | None, path: str | None) -> int:
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
        ready_r, ready_w = os.pipe()
        pid = os.fork()
        if pid == 0:
            os.close(ready_r)
            _child(req, fn, ready_w, {proto, inp.fileno()})
        os.close(ready_w)
        os.read(ready_r, 1)  # the child has its own session now: killpg(pid) reaches it
        os.close(ready_r)
        _send(proto, {"pid": pid, "at": time.time()})
        if not _wait_child(pid, inp, proto):
            return 0


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    call = path = None
    while args:
        flag = args.pop(0)
        if flag == "--call":
            call = args.pop(0)
        elif flag == "--path":
            path = args.pop(0)
        else:
            sys.stderr.write(f"forebear.cluster.child: unknown argument {flag!r}\n")
            return 2
    return serve(call, path)


if __name__ == "__main__":
    # Started as a file: its folder (forebear's own modules) must not shadow the user's modules.
    _here = os.path.dirname(os.path.abspath(__file__))
    sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _here]
    sys.exit(main())
