"""History warm start, then a plain GP (Feurer, Springenberg & Hutter, AAAI 2015).

The paper initialises Bayesian optimisation with the best known
configurations of the ``t`` earlier tasks nearest to the new one by
meta-feature distance, then continues with the plain Bayesian optimiser. The
benchmark's tasks carry no meta-features, so no task is nearer than another;
we keep the paper's rule of one best configuration per earlier task and rank
across tasks by a scale-free score instead of a distance: round ``r`` holds
each task's ``r``-th best configuration (``r = 0`` first), and within a round
tasks go in order of that configuration's standardised score
``(y - mean) / std`` within its own task, lowest first. With fewer tasks than
``t`` the second-best configurations follow, and so on.

After the warm start the search is forebear's plain GP: ``fit_gp`` (Matern
5/2, marginal likelihood) and log-EI through the engine's candidate search.
Pending trials and points earlier in a batch enter by the kriging believer
(see ``_gp.py``).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import torch

from forebear.bench.peers import _gp
from forebear.bench.peers._base import Peer, targets
from forebear.core.space import Space
from forebear.engine.proposals import Observation, Proposal


def warm_start(tasks: Sequence[Any], t: int) -> list[dict[str, Any]]:
    """The first ``t`` configurations of the warm start, in the order they are proposed.

    ``tasks`` are :class:`forebear.records.history.Task` objects (``configs``, ``y``).
    """
    ranked = []
    for j, task in enumerate(tasks):
        y = np.asarray(task.y, dtype=float)
        if len(y) == 0:
            continue
        sd = float(np.std(y)) or 1.0
        z = (y - float(np.mean(y))) / sd
        for r, i in enumerate(np.argsort(y, kind="stable")):
            ranked.append((r, float(z[i]), j, task.configs[int(i)]))
    ranked.sort(key=lambda row: row[:3])
    out: list[dict[str, Any]] = []
    keys: set[tuple[Any, ...]] = set()
    for _, _, _, config in ranked:
        key = tuple(sorted(config.items()))
        if key in keys:
            continue
        keys.add(key)
        out.append(dict(config))
        if len(out) >= t:
            break
    return out


class WarmStartGP(Peer):
    """``warmstart-gp``: the history's best configurations first, then plain GP-EI.

    Parameters
    ----------
    space
        The search space.
    history
        Earlier tasks (``History`` or a list of ``Task``); ``None`` gives the plain GP
        from a Latin hypercube.
    seed
        Seed of the candidate search and of the GP fits.
    n_initial
        ``t``, the warm start's size; default ``min(dim + 1, 10)``, the size of the
        plain GP's own initial design, so the two differ only in where they start.
    n_candidates
        Quasi-random candidates per round, as in the engine.
    """

    name = "gp"

    def __init__(self, space: Space, history: Any = None, seed: int = 0, *, n_initial: int | None = None,
                 n_candidates: int = 2048) -> None:
        super().__init__(space, seed)
        tasks = [t for t in (getattr(history, "tasks", history) or []) if len(t.y)]
        self.t = n_initial if n_initial is not None else min(space.dim + 1, 10)
        if self.t < 0:
            msg = f"n_initial must be >= 0, got {self.t}"
            raise ValueError(msg)
        self.initial = warm_start(tasks, self.t) if tasks else space.latin_hypercube(self.t, seed=seed)
        self.from_history = bool(tasks)
        self.n_candidates = n_candidates
        self._state: dict[str, torch.Tensor] | None = None
        self._fits = 0

    def _propose(self, n: int, scored: list[Observation], failed: list[dict[str, Any]],
                 pending: list[dict[str, Any]], seen: set[bytes]) -> list[Proposal]:
        out: list[Proposal] = []
        room = self.t - (len(scored) + len(failed) + len(pending))
        for config in self.initial:
            if len(out) >= min(n, room):
                break
            if self.claim(config, seen):
                out.append(Proposal(dict(config), "initial"))
        if len(out) >= n or len(scored) < 2:
            return out
        X, y = targets(self.space, scored, failed)
        # Warm-started hyperparameters; every fourth refit also tries a fresh start.
        self._fits += 1
        restarts = 3 if self._state is None else (2 if self._fits % 4 == 0 else 1)
        post, self._state = _gp.fit(X, y, self.seed, self._state, restarts)
        scorer = _gp.Ensemble([post], [1.0], float(y.min()))
        extra = pending + [p.config for p in out]
        if extra:
            scorer = scorer.condition(torch.as_tensor(self.encode(extra), dtype=post.X.dtype))
        taken = np.vstack([X, self.encode(extra)]) if extra else X
        anchors = X[np.argsort(y, kind="stable")[:5]]
        for x, value in _gp.ei_batch(self.space, scorer, n - len(out), taken, anchors, self._rng, self.n_candidates):
            config = self.space.decode(x)
            if self.claim(config, seen):
                out.append(Proposal(config, "model", self.name, float(value) if np.isfinite(value) else None))
        return out
