"""Files forebear writes or reads beside a logbook: private folders, regular files only."""

from __future__ import annotations

import os
from pathlib import Path


def ensure_folder(folder: Path) -> None:
    """Create ``folder`` (and parents) with mode 0700 where it does not exist."""
    if not folder.exists():
        os.makedirs(folder, mode=0o700, exist_ok=True)
