"""Peer methods for the quality benchmark, implemented from their papers.

Each has the proposer's call, ``propose(n, observed, failed=(), pending=())``:

* :class:`WarmStartGP` (``warmstart-gp``): the history's best configurations
  first, then the plain GP (Feurer, Springenberg & Hutter, AAAI 2015);
* :class:`RGPE` (``rgpe``): the ranking-weighted GP ensemble (Feurer, Letham &
  Bakshy 2018);
* :class:`TPE` (``tpe``): the tree-structured Parzen estimator, cold
  (Bergstra, Bardenet, Bengio & Kegl, NeurIPS 2011).
"""

from __future__ import annotations

from typing import Any

from forebear.bench.peers._base import Peer
from forebear.bench.peers.rgpe import RGPE
from forebear.bench.peers.tpe import TPE
from forebear.bench.peers.warmstart_gp import WarmStartGP
from forebear.core.space import Space

PEERS: dict[str, type[Peer]] = {"warmstart-gp": WarmStartGP, "rgpe": RGPE, "tpe": TPE}


def make(name: str, space: Space, history: Any = None, seed: int = 0, **settings: Any) -> Peer:
    """The peer called ``name`` for one search."""
    if name not in PEERS:
        msg = f"unknown peer {name!r}; expected one of {', '.join(PEERS)}"
        raise ValueError(msg)
    return PEERS[name](space, history, seed, **settings)


__all__ = ["PEERS", "RGPE", "TPE", "Peer", "WarmStartGP", "make"]
