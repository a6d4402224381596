"""forebear: batched hyperparameter search on Dask that learns from earlier searches."""

from __future__ import annotations

from typing import Any

from forebear.journal import Journal, Trial, TrialTable, load
from forebear.space import Param, Space
from forebear.spec import Spec, SpecError

__version__ = "0.1.0"

__all__ = ["Journal", "Param", "Space", "Spec", "SpecError", "Trial", "TrialTable", "__version__", "load", "run"]


def __getattr__(name: str) -> Any:
    # forebear.run needs Dask and the proposal engine; import them on first use, so that a worker
    # importing forebear.runner does not pay for the surrogate (the runner never uses it).
    if name == "run":
        from forebear.controller import run

        return run
    msg = f"module 'forebear' has no attribute {name!r}"
    raise AttributeError(msg)
