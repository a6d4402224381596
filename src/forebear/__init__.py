"""forebear: batched hyperparameter search on Dask that learns from earlier searches."""

from __future__ import annotations

from typing import Any

from forebear.cluster.notes import Halted
from forebear.core.param import Param
from forebear.core.space import Space
from forebear.core.spec import Spec, SpecError
from forebear.records.logbook import Logbook, Trial, TrialTable, load

__version__ = "0.1.0"

__all__ = [
    "Halted", "Logbook", "Param", "RunningSearch", "Space", "Spec", "SpecError", "Trial", "TrialTable", "__version__", "load", "run", "start",
]


def __getattr__(name: str) -> Any:
    # forebear.run and forebear.start need Dask and the proposal engine; import them on first use, so that a worker
    # importing forebear.cluster.runner does not pay for the surrogate (the runner never uses it).
    if name == "run":
        from forebear.face.api import run

        return run
    if name in ("start", "RunningSearch"):
        from forebear.face import background

        return getattr(background, name)
    msg = f"module 'forebear' has no attribute {name!r}"
    raise AttributeError(msg)
