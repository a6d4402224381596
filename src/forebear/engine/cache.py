"""The meta-trained state's cache: its folder, its atomic writes, and load-or-train."""

from __future__ import annotations

import os
import pickle
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
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


def load_or_train(make: Callable[[], Any], tasks: Sequence[tuple[np.ndarray, np.ndarray]], path: Path | None,
                  device: str | torch.device) -> tuple[Any, float, bool]:
    """The model ``make()`` builds, loaded from ``path`` (``torch.load(weights_only=True)``) when
    that entry exists and reads, else meta-trained on ``tasks`` and saved there.

    Returns the model, the seconds spent and whether it came from the cache. An
    unreadable entry is retrained and overwritten.
    """
    start = time.perf_counter()
    meta = make()
    if path is not None and path.is_file():
        try:
            meta.load_state_dict(torch.load(path, map_location=device, weights_only=True))
            return meta, time.perf_counter() - start, True
        except (OSError, RuntimeError, ValueError, KeyError, EOFError, pickle.UnpicklingError):
            meta = make()
    meta.meta_train(tasks)
    seconds = time.perf_counter() - start
    if path is not None:
        save_state(meta.state_dict(), path)
    return meta, seconds, False
