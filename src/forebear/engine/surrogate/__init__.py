"""Surrogate models: the plain GP, the meta-trained deep kernel, and the transfer guard."""

from __future__ import annotations

from forebear.engine.surrogate.deep_kernel import MetaModel, Settings
from forebear.engine.surrogate.gp import GPFit, Posterior, fit_gp
from forebear.engine.surrogate.select import Choice, choose

__all__ = ["Choice", "GPFit", "MetaModel", "Posterior", "Settings", "choose", "fit_gp"]
