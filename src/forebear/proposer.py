"""The proposal engine's one entry point for the controller.

The controller hands over what it knows (observations, failures, pending
configurations) and asks for ``n`` configurations; it never sees the
surrogate, the acquisition or the warm start directly. Scores given to the
proposer are lower-is-better (the controller multiplies a ``maximize``
metric by -1).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from forebear.space import Space


@dataclass(frozen=True)
class Proposal:
    """One proposed configuration and where it came from.

    ``source`` is ``initial``, ``model`` or ``random``; ``model`` names the
    surrogate that proposed it (``gp``, ``deep-kernel``, ...) or is ``None``.
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


class Proposer:
    """Proposes batches for one search.

    Parameters
    ----------
    space
        The search space.
    history
        Earlier searches aligned to ``space`` (``forebear.history.History``) or ``None``.
    seed
        Seed for every random choice.
    """

    def __init__(self, space: Space, history: Any = None, seed: int = 0, **settings: Any) -> None:
        self.space = space
        self.history = history
        self.seed = seed
        self.settings = settings
        self._rng = np.random.default_rng(seed)
        self._initial: list[dict[str, Any]] | None = None

    def propose(
        self,
        n: int,
        observed: Sequence[Observation],
        failed: Sequence[Mapping[str, Any]] = (),
        pending: Sequence[Mapping[str, Any]] = (),
    ) -> list[Proposal]:
        """``n`` new configurations, distinct from ``pending`` and from each other."""
        seen = {_key(c) for c in pending} | {_key(o.config) for o in observed} | {_key(c) for c in failed}
        out: list[Proposal] = []
        used = len(observed) + len(failed) + len(pending)
        if self._initial is None:
            self._initial = self.space.latin_hypercube(max(n, 1), seed=self.seed)
        for config in self._initial[used:]:
            if len(out) >= n:
                break
            if _key(config) not in seen:
                seen.add(_key(config))
                out.append(Proposal(config, "initial"))
        tries = 0
        while len(out) < n and tries < 100 * n:
            tries += 1
            config = self.space.sample(1, self._rng)[0]
            if _key(config) in seen:
                continue
            seen.add(_key(config))
            out.append(Proposal(config, "random"))
        return out


def _key(config: Mapping[str, Any]) -> str:
    return repr(sorted(config.items()))
