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
warm start's per-task GP imputer) and measures two things: the mean Spearman
rank correlation over all pairs of tasks (do they rank the whole space
alike?), and where each task's best configuration falls on every other task
among that task's own other configurations, as the share of them the other
task's GP scores better (do they agree on what is good? 0.5 when they do not,
whatever the shape of the scores, since the best is then one of the task's
points at random). A history is dropped
only when both say no (correlation below :data:`THRESHOLD`, share above
:data:`BEST_SHARE`): tasks that agree on their best configurations and
differ elsewhere still give the warm start its first picks. Then the search
runs as one without history (plain GP, Latin-hypercube start).
The agreement says nothing about whether the *new* task resembles the earlier
ones (that is the transfer guard's job, as the search goes); it only catches
a history that cannot resemble anything, because it does not resemble itself.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.stats import spearmanr

from forebear.core.space import Space
from forebear.engine.warmstart import Imputer

# A history is dropped when its mean pairwise rank correlation is below THRESHOLD and its tasks'
# best configurations are beaten, on average, by more than BEST_SHARE of their own points on the
# other tasks. Both ours, set in the gaps measured on the benchmark's families (docs/engine.md,
# "Histories that disagree"): correlation 0.36-0.98 on related histories, 0.03 at most on shuffled
# ones; share 0.46-0.53 on shuffled ones (0.15-0.42 on related: the share only rescues).
THRESHOLD = 0.1
BEST_SHARE = 0.35
MIN_TASKS = 3  # fewer tasks give one or three pairs: too few to tell chance from disagreement
REFERENCE = 256  # random configurations at which the tasks' imputed scores are compared
OWN = 64  # of a task's other configurations, at most this many are compared with its best


@dataclass(frozen=True)
class Agreement:
    """How alike a history's tasks are: ``correlation``, the mean Spearman correlation over pairs
    of tasks of their imputed scores at random configurations; ``best``, the mean share of a task's
    other configurations that another task scores better than the task's best one."""

    tasks: int
    correlation: float
    best: float

    @property
    def disagrees(self) -> bool:
        return self.correlation < THRESHOLD and self.best > BEST_SHARE


def agreement(space: Space, tasks: Sequence[Any], impute: Imputer, seed: int = 0) -> Agreement | None:
    """The :class:`Agreement` of ``tasks`` (``None`` with fewer than :data:`MIN_TASKS`).

    A task whose imputed scores are constant (its GP found no structure) correlates 0.
    """
    n = len(tasks)
    if n < MIN_TASKS:
        return None
    X = space.encode_many(space.sample(REFERENCE, np.random.default_rng([seed, 2])))
    # Each task's best configuration, then up to OWN of its others: one block of rows per task.
    rng = np.random.default_rng([seed, 3])
    blocks = []
    for t in tasks:
        Xi, yi = np.asarray(t.X, float), np.asarray(t.y, float)
        b = int(np.argmin(yi))
        rest = np.delete(np.arange(len(yi)), b)
        rest = rest if len(rest) <= OWN else rng.choice(rest, OWN, replace=False)
        blocks.append(np.vstack([Xi[b : b + 1], Xi[rest]]))
    edges = np.cumsum([0] + [len(q) for q in blocks])
    # One imputation per task, at the reference and at every block together.
    imputed = [np.asarray(impute(j, np.vstack([X, *blocks])), float) for j in range(n)]
    U = np.column_stack([v[: len(X)] for v in imputed])
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.atleast_2d(spearmanr(U).statistic)
    off = ~np.eye(n, dtype=bool)
    share = np.zeros((n, n))
    for j, v in enumerate(imputed):
        on_j = v[len(X) :]
        for i in range(n):
            if i != j:
                block = on_j[edges[i] : edges[i + 1]]
                share[i, j] = float((block[1:] < block[0]).mean())  # of task i's other points, better on j
    return Agreement(n, float(np.nan_to_num(rho[off], nan=0.0).mean()), float(share[off].mean()))


def verdict(space: Space, tasks: Sequence[Any], impute: Imputer, seed: int = 0) -> tuple[bool, Agreement | None, str | None]:
    """``(use, agreement, note)``: whether to use the history, the measure, and a line for the user."""
    a = agreement(space, tasks, impute, seed)
    if a is None:
        return True, None, None
    measure = f"mean rank correlation {a.correlation:.2f}; each one's best beats {1 - a.best:.0%} of its other configurations on the others"
    if a.disagrees:
        return False, a, f"history: the {a.tasks} earlier searches do not rank configurations alike ({measure}); searching without history"
    alike = "rank configurations alike" if a.correlation >= THRESHOLD else "agree on their best configurations"
    return True, a, f"history: the {a.tasks} earlier searches {alike} ({measure})"
