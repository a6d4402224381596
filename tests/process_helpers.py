"""Multiprocess helpers for tests: spawn start method, named deadlines, always reaped."""

from __future__ import annotations

import multiprocessing as mp
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

CTX = mp.get_context("spawn")


@contextmanager
def processes(target: Callable[..., Any], args: Sequence[tuple[Any, ...]], deadline: float, name: str) -> Iterator[list[Any]]:
    """Start one spawned process per ``args`` entry; join by ``deadline`` seconds or fail; always reap."""
    procs = [CTX.Process(target=target, args=a, name=f"{name}-{i}", daemon=True) for i, a in enumerate(args)]
    for p in procs:
        p.start()
    try:
        yield procs
        end = time.monotonic() + deadline
        for p in procs:
            p.join(max(0.0, end - time.monotonic()))
        late = [p.name for p in procs if p.is_alive()]
        if late:
            msg = f"{name}: {', '.join(late)} still running after the {deadline:.0f} s deadline"
            raise AssertionError(msg)
        bad = [(p.name, p.exitcode) for p in procs if p.exitcode != 0]
        if bad:
            msg = f"{name}: processes exited non-zero: {bad}"
            raise AssertionError(msg)
    finally:
        for p in procs:
            if p.is_alive():
                p.terminate()
        for p in procs:
            p.join(5)
            if p.is_alive():
                p.kill()
                p.join(5)


class DrivenSearch:
    """``make().run()`` in a daemon thread (a controller made there installs no signal handlers).

    ``wait_for(path, deadline)`` fails when the marker does not appear in time or the
    controller raised; ``join(deadline)`` fails when the controller is still running or raised.
    """

    def __init__(self, make: Callable[[], Any]) -> None:
        import threading

        self.result: list[Any] = []
        self.errors: list[BaseException] = []
        self._make = make
        self.thread = threading.Thread(target=self._drive, daemon=True)
        self.thread.start()

    def _drive(self) -> None:
        try:
            self.result.append(self._make().run())
        except BaseException as exc:  # noqa: BLE001 - surfaced by wait_for and join
            self.errors.append(exc)

    def wait_for(self, path: Any, deadline: float, what: str) -> None:
        end = time.monotonic() + deadline
        while not path.exists():
            assert time.monotonic() < end, f"{what} did not happen within {deadline:.0f} s"
            assert not self.errors, self.errors
            time.sleep(0.05)

    def join(self, deadline: float) -> Any:
        self.thread.join(deadline)
        assert not self.thread.is_alive(), "the controller did not finish"
        assert not self.errors, self.errors
        return self.result[0]


def until(check: Callable[[], Any], what: str, timeout: float) -> None:
    """Poll ``check`` every 0.1 s until it is true; fail naming ``what`` after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError(f"not within {timeout:g} s: {what}")
        time.sleep(0.1)
