"""What the controller and the proposer hand each other: finished trials in, proposals out."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Proposal:
    """One proposed configuration and where it came from.

    ``source`` is ``initial``, ``model`` or ``random``; ``model`` names the
    surrogate that proposed it (``gp``, ``deep-kernel``, ``mix``) or is
    ``None``; ``acquisition`` is the log-EI of the point when it was chosen.
    """

    config: dict[str, Any]
    source: str
    model: str | None = None
    acquisition: float | None = None


@dataclass(frozen=True)
class Observation:
    """A finished trial as the proposer sees it: lower ``score`` is better."""

    config: Mapping[str, Any]
    score: float
