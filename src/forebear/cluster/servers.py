"""The per-worker pool of attempt process servers (:mod:`forebear.cluster.child`).

A Dask worker keeps idle servers per (objective, folder) and reuses them, so
the user's module is imported once per worker, not once per attempt.
"""

from __future__ import annotations

import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from forebear.cluster import child as _child


class RunnerError(RuntimeError):
    """The attempt machinery itself failed (not the objective)."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)




class _Server:
    """A :mod:`forebear.cluster.child` server process and its protocol pipes."""

    def __init__(self, call: str | None, path: str | None, wait: float, function: tuple[str, bytes] | None = None) -> None:
        # Run the file, not ``-m forebear.cluster.child``: the package's imports (numpy, scipy, yaml) would
        # add seconds to every server start, and the server needs only the standard library.
        argv = [sys.executable, _child.__file__]
        if call:
            argv += ["--call", call]
        if path:
            argv += ["--path", path]
        shipped = None
        if function is not None:
            # The callable's bytes go through a private file the server reads once at start.
            shipped = Path(tempfile.mkdtemp(prefix="forebear-fn-")) / "objective.pkl"
            fd = os.open(shipped, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                os.write(fd, function[1])
            finally:
                os.close(fd)
            argv += ["--function", str(shipped), "--name", function[0]]
            call = function[0]
        self.proc = subprocess.Popen(argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE, close_fds=True)
        assert self.proc.stdin is not None and self.proc.stdout is not None
        self._in = self.proc.stdin
        self._out = self.proc.stdout.fileno()
        self._buf = b""
        try:
            hello = self.read(wait)
        finally:
            if shipped is not None:
                shutil.rmtree(shipped.parent, ignore_errors=True)
        if hello is None:
            self.close()
            raise RunnerError(f"the attempt process for {call or 'commands'} did not start within {wait:g} s")
        if not hello.get("ready"):
            self.close()
            raise RunnerError(str(hello.get("error") or "the attempt process failed to start"))

    @property
    def alive(self) -> bool:
        return self.proc.poll() is None

    def send(self, payload: Mapping[str, Any]) -> None:
        self._in.write((json.dumps(payload, default=str) + "\n").encode())
        self._in.flush()

    def read(self, timeout: float | None) -> dict[str, Any] | None:
        """The next protocol line, or None on timeout; RunnerError when the server died."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while b"\n" not in self._buf:
            left = None if deadline is None else max(0.0, deadline - time.monotonic())
            ready, _, _ = select.select([self._out], [], [], left)
            if not ready:
                return None
            chunk = os.read(self._out, 65536)
            if not chunk:
                raise RunnerError(f"the attempt process server exited (status {self.proc.wait()})")
            self._buf += chunk
        line, self._buf = self._buf.split(b"\n", 1)
        return json.loads(line)

    def close(self) -> None:
        try:
            self._in.close()
        except OSError:
            pass
        try:
            self.proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


_POOL: dict[tuple[str | None, str | None], list[_Server]] = {}
_POOL_LOCK = threading.Lock()


def _acquire(call: str | None, path: str | None, wait: float, function: tuple[str, bytes] | None = None) -> _Server:
    with _POOL_LOCK:
        idle = _POOL.setdefault((call, path), [])
        while idle:
            server = idle.pop()
            if server.alive:
                return server
    return _Server(None if function else call, path, wait, function)


def _release(server: _Server, call: str | None, path: str | None) -> None:
    if not server.alive:
        return
    with _POOL_LOCK:
        _POOL.setdefault((call, path), []).append(server)


def shutdown_servers() -> None:
    """Stop this process's fork servers (tests and the overhead benchmark call it)."""
    with _POOL_LOCK:
        servers = [s for group in _POOL.values() for s in group]
        _POOL.clear()
    for s in servers:
        s.close()
