"""Why and how the loop stops: Ctrl-C, SIGTERM, a stop asked for by a program, the wall-time budget.

Two stages, the same for both signals:

* the first Ctrl-C or SIGTERM stops proposing and retrying; running attempts
  finish and are recorded (with ``--cancel-running`` they are cancelled and
  recorded ``lost``), then the logbook is closed ``interrupted``;
* a second Ctrl-C (or a second SIGTERM) stops at once: running attempts are
  cancelled and recorded ``lost`` (reason ``interrupted``), the logbook is
  closed, and :class:`StopNow` reaches the command line, which says so and
  exits with ``128 + signal`` (130 for Ctrl-C, 143 for SIGTERM).

SIGTERM is what batch schedulers and Kubernetes send before SIGKILL; after it
the controller waits at most :data:`TERM_GRACE` seconds for running attempts,
then stops at once as after a second signal, so its records are written
before the SIGKILL comes.
"""

from __future__ import annotations

import signal
import time
from collections.abc import Callable
from typing import Any

TERM_GRACE = 20.0  # s; SLURM's KillWait and Kubernetes' termination grace period are 30 s by default
HANDLED = (signal.SIGINT, signal.SIGTERM)


class StopNow(KeyboardInterrupt):
    """The controller stopped at once on a second signal (or at the end of the SIGTERM grace period)."""

    def __init__(self, signum: int = signal.SIGINT, why: str = "") -> None:
        super().__init__(signum, why)
        self.signum = signum
        self.why = why or f"a second {signal_name(signum)}"

    @property
    def exit_status(self) -> int:
        return 128 + self.signum


def signal_name(signum: int) -> str:
    return "Ctrl-C" if signum == signal.SIGINT else signal.Signals(signum).name


class Stop:
    """Why the loop stops proposing: ``reason`` is None while running.

    ``say`` prints a line for people; ``running`` counts the attempts in flight.
    """

    def __init__(self, say: Callable[[str], None] | None = None, running: Callable[[], int] | None = None) -> None:
        self.reason: str | None = None
        self.presses = 0
        self.cancel = False
        self.cancel_running = False
        self.hard_at: float | None = None  # monotonic time at which the SIGTERM grace period ends
        self.first_signal = signal.SIGINT
        self.final = False  # stopping at once: later signals change nothing
        self._say = say or (lambda _text: None)
        self._running = running or (lambda: 0)

    def install(self) -> Callable[[], None]:
        """Handle SIGINT and SIGTERM (main thread only); returns what restores the previous handlers."""
        previous = {s: signal.getsignal(s) for s in HANDLED}
        for s in HANDLED:
            signal.signal(s, self.on_signal)

        def restore() -> None:
            for s, handler in previous.items():
                signal.signal(s, handler)

        return restore

    def on_signal(self, signum: int, frame: Any) -> None:
        """The signal handler: the first signal stops proposing, the second stops at once."""
        if self.final:
            return
        self.presses += 1
        if self.presses > 1:
            self.final = True
            raise StopNow(signum)
        self.first_signal = signum
        self.reason = "interrupted"
        again = "Ctrl-C again" if signum == signal.SIGINT else "a second signal"
        what = signal_name(signum)
        if signum == signal.SIGTERM:
            self.hard_at = time.monotonic() + TERM_GRACE
        if self.cancel_running:
            self.cancel = True
            self._say(f"{what}: cancelling running attempts ({again} to stop at once)")
        elif signum == signal.SIGTERM:
            self._say(f"{what}: no new trials; waiting up to {TERM_GRACE:g} s for {self._running()} running attempt(s), then stopping at once")
        else:
            self._say(f"interrupted: no new trials; waiting for {self._running()} running attempt(s) ({again} to stop at once)")

    def check(self) -> None:
        """Raise :class:`StopNow` when the SIGTERM grace period is over (the loop calls this each turn)."""
        if self.hard_at is not None and time.monotonic() >= self.hard_at:
            self.hard_at = None
            self.final = True
            raise StopNow(signal.SIGTERM, f"the end of the {TERM_GRACE:g} s grace period after SIGTERM")


def deadline(wall_time: float | None) -> float | None:
    """The ``time.monotonic()`` at which ``budget.wall_time`` runs out, or None without one."""
    return None if wall_time is None else time.monotonic() + wall_time
