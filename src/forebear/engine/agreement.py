"""Whether the earlier searches agree with each other: history worth learning from.

Everything the engine takes from history assumes that the earlier tasks rank
configurations alike: the warm start picks configurations that did well across
them, the deep kernel's prior mean is their average surface, and its feature
map is meta-trained to fit all of them at once. When the tasks do not agree
(each one's scores unrelated to the others', as in the benchmark's
``shuffled`` history, or earlier searches of objectives that only share a
space), no average of them predicts a new task. Such a history then only
misleads: on hartmann6 with shuffled history the search's regret at 25 trials
was 1.45x the plain GP's, the guard keeping the deep kernel because it
predicted about as well (docs/benchmarks.md, "Unrelated history").

:func:`agreement` imputes every task's scores at random configurations (the
warm start's per-task GP imputer) and returns the mean Spearman rank
correlation over all pairs of tasks. :func:`verdict` turns it into the
proposer's decision and a one-line note for the user: below :data:`THRESHOLD`
the search runs as one without history (plain GP, Latin-hypercube start).
The agreement says nothing about whether the *new* task resembles the earlier
ones (that is the transfer guard's job, as the search goes); it only catches
a history that cannot resemble anything, because it does not resemble itself.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy.stats import spearmanr

from forebear.core.space import Space
from forebear.engine.warmstart import Imputer

# Below this mean pairwise rank correlation the history is not used. Ours, set in the gap
# measured on the benchmark's families (docs/engine.md, "Histories that disagree"): related
# histories 0.40-0.74, shuffled ones -0.01 to 0.02.
THRESHOLD = 0.1
MIN_TASKS = 3  # fewer tasks give one or three pairs: too few to tell chance from disagreement
REFERENCE = 256  # random configurations at which the tasks' imputed scores are compared


def agreement(space: Space, tasks: Sequence[Any], impute: Imputer, seed: int = 0) -> float | None:
    """Mean Spearman correlation over pairs of ``tasks`` of their imputed scores at random
    configurations, or ``None`` with fewer than :data:`MIN_TASKS` tasks.

    A task whose imputed scores are constant (its GP found no structure) correlates 0.
    """
    if len(tasks) < MIN_TASKS:
        return None
    configs = space.sample(REFERENCE, np.random.default_rng([seed, 2]))
    X = np.vstack([space.encode(c) for c in configs])
    U = np.column_stack([np.asarray(impute(j, X), float) for j in range(len(tasks))])
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.atleast_2d(spearmanr(U).statistic)
    off = rho[~np.eye(len(tasks), dtype=bool)]
    return float(np.nan_to_num(off, nan=0.0).mean())


def verdict(space: Space, tasks: Sequence[Any], impute: Imputer, seed: int = 0) -> tuple[bool, float | None, str | None]:
    """``(use, agreement, note)``: whether to use the history, the measure, and a line for the user."""
    value = agreement(space, tasks, impute, seed)
    if value is None:
        return True, None, None
    n = len(tasks)
    if value < THRESHOLD:
        note = (f"history: the {n} earlier searches do not rank configurations alike (mean rank correlation "
                f"{value:.2f}, below {THRESHOLD}); searching without history")
        return False, value, note
    return True, value, f"history: the {n} earlier searches rank configurations alike (mean rank correlation {value:.2f})"
