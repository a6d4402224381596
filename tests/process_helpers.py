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


def until(check: Callable[[], Any], what: str, timeout: float) -> None:
    """Poll ``check`` every 0.1 s until it is true; fail naming ``what`` after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError(f"not within {timeout:g} s: {what}")
        time.sleep(0.1)
