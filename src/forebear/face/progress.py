"""The progress display of a running search, on stderr.

A tqdm bar on a terminal (finished trials out of the budget, with scored,
failed and running counts, the best score and its trial in the postfix, and
tqdm's elapsed and remaining time); plain lines when stderr is not a
terminal, one per finished trial; nothing with ``quiet``.
"""

from __future__ import annotations

import sys
import time
from typing import IO, Any

from tqdm import tqdm


def _clock(seconds: float) -> str:
    seconds = max(0, int(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m:02d}:{s:02d}"


class Progress:
    """Scored, failed and running counts, the best so far, elapsed and remaining time."""

    def __init__(self, total: int, *, metric: str, quiet: bool = False, stream: IO[str] | None = None, done: int = 0) -> None:
        self.total = total
        self.metric = metric
        self.quiet = quiet
        self.stream = stream or sys.stderr
        self.t0 = time.monotonic()
        self.start_done = done
        self.done = done
        self.bar: Any = None
        if not quiet and _isatty(self.stream):
            self.bar = tqdm(total=total, initial=done, file=self.stream, desc="trials", unit="trial", dynamic_ncols=True, leave=True)

    def message(self, text: str) -> None:
        """A line for people, above the bar when there is one."""
        if self.quiet:
            return
        if self.bar is not None:
            self.bar.write(text, file=self.stream)
        else:
            print(text, file=self.stream, flush=True)

    def update(self, *, scored: int, failed: int, running: int, best: float | None, best_trial: int | None, event: str | None = None) -> None:
        """Refresh after a trial changed state; ``event`` names what happened (plain mode prints it)."""
        done = scored + failed
        best_text = f"{best:.6g} (trial {best_trial})" if best is not None else "none yet"
        if self.quiet:
            self.done = done
            return
        if self.bar is not None:
            if done > self.done:
                self.bar.update(done - self.done)
            self.bar.set_postfix_str(f"scored {scored} failed {failed} running {running} | best {self.metric} {best_text}", refresh=True)
        elif event is not None:
            elapsed = time.monotonic() - self.t0
            new = done - self.start_done
            eta = f"{_clock(elapsed / new * (self.total - done))}" if new > 0 and done < self.total else "--:--"
            print(
                f"[{_clock(elapsed)}] {event} | {done}/{self.total} finished: scored {scored} failed {failed} "
                f"running {running} | best {self.metric} {best_text} | remaining ~{eta}",
                file=self.stream,
                flush=True,
            )
        self.done = done

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def _isatty(stream: IO[str]) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False
