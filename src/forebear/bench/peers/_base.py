"""What every peer method shares: the proposer's call, valid inputs, distinct proposals.

A peer answers ``propose(n, observed, failed=(), pending=())`` exactly as
:class:`forebear.engine.proposer.Proposer` does, so the benchmark's drivers
(synchronous rounds, or running trials handed over as ``pending``) run it
unchanged. Configurations outside the space are ignored, as the proposer
ignores them; a score that is not a finite number counts as a failure.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator, Mapping, Sequence
from typing import Any

import numpy as np
import torch

from forebear.core.space import Space
from forebear.engine import acquisition
from forebear.engine.proposals import Observation, Proposal


class Peer:
    """Base class: subclasses implement :meth:`_propose`.

    Parameters
    ----------
    space
        The search space.
    seed
        Seed for every random choice of the method.
    """

    #: Shown in a proposal's ``model`` field.
    name = "peer"

    def __init__(self, space: Space, seed: int = 0) -> None:
        self.space = space
        self.seed = seed
        self._rng = np.random.default_rng(seed)

    def propose(
        self,
        n: int,
        observed: Sequence[Observation],
        failed: Sequence[Mapping[str, Any]] = (),
        pending: Sequence[Mapping[str, Any]] = (),
    ) -> list[Proposal]:
        """``n`` new configurations, distinct from ``observed``, ``failed``, ``pending`` and each other."""
        if n <= 0:
            return []
        inside = [o for o in observed if self.space.contains(o.config)]
        scored = [o for o in inside if _finite(o.score)]
        fail = [dict(o.config) for o in inside if not _finite(o.score)]
        fail += [dict(c) for c in failed if self.space.contains(c)]
        pend = [dict(c) for c in pending if self.space.contains(c)]
        seen = set(acquisition.keys(self.encode([o.config for o in scored] + fail + pend)))
        with _one_thread():
            out = self._propose(n, scored, fail, pend, seen)[:n]
        tries = 0
        while len(out) < n and tries < 200 * n:
            tries += 1
            config = self.space.sample(1, self._rng)[0]
            if self.claim(config, seen):
                out.append(Proposal(config, "random"))
        return out

    def _propose(
        self,
        n: int,
        scored: list[Observation],
        failed: list[dict[str, Any]],
        pending: list[dict[str, Any]],
        seen: set[bytes],
    ) -> list[Proposal]:
        """Up to ``n`` proposals; each must be :meth:`claim`-ed first. The rest is filled at random."""
        raise NotImplementedError

    def encode(self, configs: Sequence[Mapping[str, Any]]) -> np.ndarray:
        """Encodings of ``configs``, shape ``(len(configs), dim)``."""
        return self.space.encode_many(configs)

    def claim(self, config: Mapping[str, Any], seen: set[bytes]) -> bool:
        """Whether ``config`` is new; if so it is added to ``seen``."""
        key = acquisition.keys(self.space.encode(config)[None, :])[0]
        if key in seen:
            return False
        seen.add(key)
        return True


def targets(space: Space, scored: Sequence[Observation], failed: Sequence[Mapping[str, Any]]) -> tuple[np.ndarray, np.ndarray]:
    """Encoded points and scores for a model; failed configurations take the worst observed score.

    The same rule as the engine's default for failures (``failed="impute"``).
    """
    X = space.encode_many([o.config for o in scored])
    y = np.array([float(o.score) for o in scored])
    if len(failed) and len(y):
        X = np.vstack([X, space.encode_many(failed)])
        y = np.concatenate([y, np.full(len(failed), y.max())])
    return X, y


@contextlib.contextmanager
def _one_thread() -> Iterator[None]:
    """One torch thread while proposing, as the engine's proposer runs by default: small GP
    matrices gain nothing from more, and on shared cores extra threads only spin."""
    old = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(old)


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float, np.floating)) and not isinstance(x, bool) and math.isfinite(float(x))
