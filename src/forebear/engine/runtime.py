"""How an engine call runs: torch's thread count for its duration, and what counts as a score."""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator
from typing import Any

import numpy as np
import torch


@contextlib.contextmanager
def threads(n: int | None) -> Iterator[None]:
    """Run with ``n`` torch threads, restoring the process-wide setting afterwards.

    Small GP matrices gain nothing from more threads, and on a shared machine
    extra threads spin and slow everything down.
    """
    old = torch.get_num_threads()
    if n is None or n == old:
        yield
        return
    torch.set_num_threads(n)
    try:
        yield
    finally:
        torch.set_num_threads(old)


def finite(x: Any) -> bool:
    return isinstance(x, (int, float, np.floating)) and not isinstance(x, bool) and math.isfinite(float(x))
