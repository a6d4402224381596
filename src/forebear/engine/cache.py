"""The meta-trained state's cache folder and its atomic writes."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import torch


def default_cache_dir() -> Path:
    """``$FOREBEAR_CACHE`` when set, else ``~/.cache/forebear``."""
    env = os.environ.get("FOREBEAR_CACHE")
    return Path(env) if env else Path.home() / ".cache" / "forebear"


def save_state(state: dict[str, torch.Tensor], path: Path) -> None:
    """Write atomically (temporary file, then rename); a failed write leaves no partial entry."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".deep-kernel-", suffix=".tmp")
        os.close(fd)
        try:
            torch.save(state, tmp)
            os.replace(tmp, path)
        finally:
            if os.path.exists(tmp):
                os.unlink(tmp)
    except OSError:
        pass  # the cache is an optimisation; an unwritable cache folder must not stop a search
