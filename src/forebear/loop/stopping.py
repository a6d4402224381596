"""Why and how the loop stops: Ctrl-C, a stop asked for by a program, the wall-time budget."""

from __future__ import annotations

import time


class Stop:
    """Why the loop stops proposing: None while running."""

    def __init__(self) -> None:
        self.reason: str | None = None
        self.presses = 0
        self.cancel = False


def deadline(wall_time: float | None) -> float | None:
    """The ``time.monotonic()`` at which ``budget.wall_time`` runs out, or None without one."""
    return None if wall_time is None else time.monotonic() + wall_time
