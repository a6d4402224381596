"""A command objective that prints marked intermediate scores (tests/test_halting_run.py).

Same curve as ``curve_objectives.curve``; the last line is the final score.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time
from pathlib import Path


def main() -> int:
    trial = int(os.environ.get("FOREBEAR_TRIAL", "0"))
    base = 0.0 if trial == 0 else 1.0 + trial
    folder = Path(os.environ["FOREBEAR_TEST_SIGNAL"])

    def cleanup(signum: int, frame: object) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        (folder / f"terminated-{trial}").write_text("cleaned up")
        sys.exit(0)

    signal.signal(signal.SIGTERM, cleanup)
    for step in range(1, 9):
        time.sleep(0.3)
        print(f"forebear-step: {step} " + json.dumps({"loss": base + 1.0 / step}), flush=True)
        print(f"epoch {step} done", flush=True)
    print(json.dumps({"loss": base + 1.0 / 8}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
