"""Objectives that report intermediate scores (imported on workers as ``curve_objectives``).

The curve of trial ``n`` is ``base + 1 / step`` for steps 1..8, with ``base`` 0
for trial 0 and ``1 + n`` for the others, so which trials a rule halts does not
depend on the proposer's configurations. A halted trial writes
``halted-<trial>-<attempt>`` into ``$FOREBEAR_TEST_SIGNAL`` from its clean-up.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

import forebear

STEPS = 8


def base_of_trial() -> float:
    trial = int(os.environ.get("FOREBEAR_TRIAL", "0"))
    return 0.0 if trial == 0 else 1.0 + trial


def curve(config: dict[str, Any], note: Any) -> dict[str, float]:
    """Note ``loss`` at steps 1..8, ``config['seconds']`` (default 0.3) apart; return the last."""
    base = base_of_trial()
    pause = float(config.get("seconds", 0.3))
    try:
        for step in range(1, STEPS + 1):
            time.sleep(pause)
            note(step, {"loss": base + 1.0 / step, "step_seconds": pause})
    except forebear.Halted:
        folder = Path(os.environ["FOREBEAR_TEST_SIGNAL"])
        folder.mkdir(parents=True, exist_ok=True)
        (folder / f"halted-{os.environ['FOREBEAR_TRIAL']}-{os.environ['FOREBEAR_ATTEMPT']}").write_text("cleaned up")
        raise
    return {"loss": base + 1.0 / STEPS}


def slow_curve(config: dict[str, Any], note: Any) -> float:
    """Twelve steps 0.4 s apart; writes ``step-<trial>-<attempt>-<step>`` marks (for kill tests)."""
    folder = Path(os.environ["FOREBEAR_TEST_SIGNAL"])
    folder.mkdir(parents=True, exist_ok=True)
    for step in range(1, 13):
        time.sleep(0.4)
        note(step, 1.0 / step)
        (folder / f"step-{os.environ['FOREBEAR_TRIAL']}-{os.environ['FOREBEAR_ATTEMPT']}-{step}").write_text(str(os.getpid()))
    return 1.0 / 12
