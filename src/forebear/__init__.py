"""forebear: batched hyperparameter search on Dask that learns from earlier searches."""

from __future__ import annotations

from forebear.journal import Journal, Trial, TrialTable
from forebear.space import Param, Space
from forebear.spec import Spec, SpecError

__version__ = "0.1.0"

__all__ = ["Journal", "Param", "Space", "Spec", "SpecError", "Trial", "TrialTable", "__version__"]
