"""The campaign's objectives, imported on workers: a sleeping bowl and the bowl without the sleep.

The spec names them through the package (``forebear.bench.faults:sleeper``),
which re-exports them; this module and the package import nothing heavy.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from typing import Any

SLEEPER = "forebear.bench.faults:sleeper"
NOOP = "forebear.bench.faults:noop"


def sleeper(config: Mapping[str, Any]) -> float:
    """Sleep 0.2 + 0.8 x seconds (x in [0, 1]), then score a bowl with its minimum at (0.3, -0.2)."""
    x, y = float(config.get("x", 0.0)), float(config.get("y", 0.0))
    time.sleep(0.2 + 0.8 * x)
    return (x - 0.3) ** 2 + (y + 0.2) ** 2


def noop(config: Mapping[str, Any]) -> float:
    """The bowl without the sleep: every second a trial takes is forebear's overhead."""
    x, y = float(config.get("x", 0.0)), float(config.get("y", 0.0))
    return (x - 0.3) ** 2 + (y + 0.2) ** 2
