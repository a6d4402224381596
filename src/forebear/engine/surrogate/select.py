"""The transfer guard: choose between the meta-trained model and the plain GP.

History can mislead when the new search is unlike the earlier ones. From
``min_obs`` observations on, both models are scored by their leave-one-out
predictive log-likelihood on the current search; their weights are the
normalised likelihoods. When one model carries nearly all the weight it is
used alone, otherwise the round uses the likelihood-weighted mixture (whose EI
is the weighted sum of the components' EIs).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

from forebear.engine.surrogate.gp import Posterior

MIN_OBS = 5  # below this, leave-one-out scores are too noisy to overrule the history
ALONE = 0.95  # a model with at least this weight is used alone


@dataclass
class Choice:
    """The models of one round, their weights, and the name recorded with each proposal."""

    models: list[Posterior]
    weights: list[float]
    name: str
    loglik: dict[str, float] = field(default_factory=dict)


def choose(
    models: Mapping[str, Posterior],
    *,
    prefer: str = "deep-kernel",
    min_obs: int = MIN_OBS,
    alone: float = ALONE,
) -> Choice:
    """Pick or mix ``models`` (``{"gp": ..., "deep-kernel": ...}``) by leave-one-out log-likelihood.

    Parameters
    ----------
    models
        Posteriors conditioned on the same observations.
    prefer
        The model used while there are fewer than ``min_obs`` observations.
    alone
        Weight above which the leading model is used without the other.
    """
    if not models:
        raise ValueError("the transfer guard needs at least one model")
    if len(models) == 1:
        (name, post), = models.items()
        return Choice([post], [1.0], name)
    n = min(p.n for p in models.values())
    if n < min_obs:
        name = prefer if prefer in models else next(iter(models))
        return Choice([models[name]], [1.0], name)
    ll = {name: post.loo_loglik() for name, post in models.items()}
    finite = {k: v for k, v in ll.items() if math.isfinite(v)}
    if not finite:
        name = prefer if prefer in models else next(iter(models))
        return Choice([models[name]], [1.0], name, ll)
    top = max(finite.values())
    raw = {k: math.exp(v - top) for k, v in finite.items()}
    total = sum(raw.values())
    weights = {k: v / total for k, v in raw.items()}
    lead = max(weights, key=lambda k: weights[k])
    if weights[lead] >= alone:
        return Choice([models[lead]], [1.0], lead, ll)
    names = sorted(weights)
    return Choice([models[k] for k in names], [weights[k] for k in names], "mix", ll)
