"""How widely the search's scores would spread on earlier tasks: the deep kernel's scale.

The deep kernel is meta-trained on episodes whose support is a random subset
of a history task's points, standardised on its own spread; so at proposal
time it takes the observed scores to spread as such a subset would. A real
search's points do not. The warm start's configurations were picked for doing
well on earlier tasks and score alike, and later points gather near the best:
standardised on their own small spread, the model is overconfident wherever it
has not looked (on `branin-7` it predicted 26 +- 4.5 at the minimum, 0.31, of a
task spanning 0.3-300; docs/engine.md, "The scale of the search's scores").

:class:`Spread` measures the mismatch on history. On each earlier task, the
scores of the observed configurations are imputed by that task's own GP (the
warm start's :func:`~forebear.engine.warmstart.gp_imputer`), and the task's
factor is the mean spread of random subsets of the same size of random
configurations (imputed alike; the episodes draw from the task's points, a
Sobol design in the benchmark) over the spread of the observed
configurations' imputed scores. Imputed on both sides: where a task's GP
smooths its scores, it shrinks both spreads alike. The lower quartile of the tasks'
factors, taken as 1 below ``FLOOR`` and capped at ``CAP``, multiplies the scale the deep kernel
standardises on: configurations that spread on earlier tasks as random ones
do get 1, the meta-trained behaviour, and the quartile rather than the median
keeps the estimate's noise (factors of 0.6-1.5 where the design spreads as
random points do) from widening a search that did not need it
(docs/engine.md gives the measurements).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from forebear.core.space import Space
from forebear.engine.acquisition import keys
from forebear.engine.warmstart import Imputer

CAP = 10.0  # at most this factor: a bound, not a measured value (the factors seen were 1-8)
QUANTILE = 0.25  # of the per-task factors: widen only as far as three tasks in four support
# Factors below this count as 1: random configurations scatter up to about there (1.0-1.4 on the
# bowls of tests/test_spread.py), and on hartmann3, whose design spreads as random points do,
# factors of 1.0-1.3 moved searches at four workers without a gain (docs/engine.md).
FLOOR = 1.5
DRAWS = 64  # random subsets per task for the episodes' expected spread
REFERENCE = 256  # random configurations whose imputed scores stand for a random support


class Spread:
    """The deep kernel's scale factor for a set of observed configurations.

    Parameters
    ----------
    space
        The search space (its random configurations are the reference).
    tasks
        History tasks (``forebear.records.history.Task``: encoded ``X``, scores ``y``).
    impute
        Task-normalised scores of a history task at encoded configurations.
    reference
        Encoded configurations that stand for a random support; default :data:`REFERENCE`
        random configurations of ``space`` (drawn when first needed).
    seed
        Seed of the random subsets.
    """

    def __init__(self, space: Space, tasks: Sequence[Any], impute: Imputer, seed: int = 0, reference: np.ndarray | None = None) -> None:
        self.space, self.tasks, self.impute, self.seed = space, list(tasks), impute, seed
        self._reference_X = None if reference is None else np.asarray(reference, float)
        self._subset_sd: dict[int, np.ndarray] = {}  # size -> each task's mean spread of random subsets
        self._ref_scores: dict[int, np.ndarray] = {}  # task -> imputed scores at the reference
        # Observed configuration (by key) -> its imputed score on every task: each round hands in
        # the same observations plus a few, and only the new ones are imputed.
        self._seen: dict[bytes, np.ndarray] = {}

    def factor(self, X: np.ndarray) -> float:
        """The factor for encoded configurations ``X`` (1 with fewer than two, or no history)."""
        n = len(X)
        if n < 2 or not self.tasks:
            return 1.0
        ref = self._subset_spread(n)
        sd = np.std(self._imputed(X), axis=0)
        ok = np.isfinite(ref) & np.isfinite(sd) & (ref > 0)
        if not ok.any():
            return 1.0
        ratio = ref[ok] / np.maximum(sd[ok], 1e-12)
        f = float(np.quantile(ratio, QUANTILE))
        return 1.0 if f < FLOOR else min(f, CAP)

    def _imputed(self, X: np.ndarray) -> np.ndarray:
        """Imputed scores of ``X`` on every task, shape ``(len(X), tasks)``."""
        ks = keys(X)
        new = [i for i, k in enumerate(ks) if k not in self._seen]
        if new:
            rows = np.asarray(X, float)[new]
            cols = np.column_stack([np.asarray(self.impute(j, rows), float) for j in range(len(self.tasks))])
            self._seen.update({ks[i]: cols[r] for r, i in enumerate(new)})
        return np.vstack([self._seen[k] for k in ks])

    def reference(self) -> np.ndarray:
        """The encoded reference configurations."""
        if self._reference_X is None:
            configs = self.space.sample(REFERENCE, np.random.default_rng([self.seed, 1]))
            self._reference_X = np.vstack([self.space.encode(c) for c in configs])
        return self._reference_X

    def _subset_spread(self, n: int) -> np.ndarray:
        """Each task's mean spread of ``n`` random configurations, imputed as the observed ones are.

        Imputed at new configurations on both sides, not the task's observed scores: where a
        task's GP smooths (noise, or the benchmark's shuffled history), it shrinks both alike.
        """
        if n not in self._subset_sd:
            rng = np.random.default_rng([self.seed, n])
            out = []
            for j in range(len(self.tasks)):
                if j not in self._ref_scores:
                    self._ref_scores[j] = np.asarray(self.impute(j, self.reference()), float)
                u = self._ref_scores[j]
                # Without replacement, unless there are enough reference points that it makes no
                # difference (drawing with replacement then keeps this O(n) per draw).
                if len(u) < 4 * n:
                    idx = np.argsort(rng.random((DRAWS, len(u))), axis=1)[:, : min(n, len(u))]
                else:
                    idx = rng.integers(0, len(u), size=(DRAWS, n))
                out.append(float(np.std(u[idx], axis=1).mean()))
            self._subset_sd[n] = np.array(out)
        return self._subset_sd[n]
