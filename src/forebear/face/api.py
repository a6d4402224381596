"""The Python entry points of a search: ``forebear.run`` and ``forebear.start``."""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable, Mapping
from typing import Any

from forebear.cluster.dispatch import wrap
from forebear.cluster.shipping import LARGE, ObjectiveError, name_of
from forebear.core import spec as spec_mod
from forebear.core.spec import Spec
from forebear.face.progress import Progress
from forebear.loop.book import SearchResult
from forebear.loop.controller import Controller

SpecLike = str | os.PathLike[str] | Mapping[str, object] | Spec


def as_spec(spec: SpecLike, objective: Callable[..., Any] | None = None) -> Spec:
    """A loaded :class:`Spec` from a spec file, a mapping with the same keys, or a Spec.

    With ``objective`` (a callable), the spec's ``objective`` section holds only
    ``minimize`` or ``maximize``; the callable's name is recorded as its ``function``.
    """
    if objective is not None and not callable(objective):
        raise ObjectiveError(f"objective must be a callable taking the configuration dict, got {type(objective).__name__}")
    name = None if objective is None else name_of(objective)
    if not isinstance(spec, Spec):
        return spec_mod.load(spec, function=name)
    if name is None:
        return spec
    if spec.objective.call or spec.objective.command:
        raise ObjectiveError("the spec's objective already has call or command; pass no objective=, or load the spec with function=")
    return dataclasses.replace(spec, objective=dataclasses.replace(spec.objective, function=name))


def controller(spec: SpecLike, client: Any, objective: Callable[..., Any] | None, **options: Any) -> Controller:
    """The controller for a search, on the given client (never closed by forebear) or on the spec's cluster.

    ``options`` are :class:`Controller`'s (``extend``, ``quiet``, ``display`` ...).
    """
    loaded = as_spec(spec, objective)
    notes: list[str] = []
    dispatch = None
    if client is not None:
        dispatch = wrap(client, notes.append)
        if loaded.raw.get("cluster") is not None:
            notes.append("note: the spec's cluster section is ignored: the search runs on the client given to forebear")
    ctl = Controller(loaded, dispatch=dispatch, objective=objective, **options)
    if ctl.function is not None and len(ctl.function) > LARGE:
        notes.append(
            f"note: the objective {loaded.objective.function} is {len(ctl.function) / 1e6:.0f} MB pickled (it holds data); "
            "every attempt ships it again: load the data inside the function instead"
        )
    for note in notes:
        ctl.say(note)
    return ctl


def run(
    spec: SpecLike,
    *,
    client: Any = None,
    objective: Callable[..., Any] | None = None,
    extend: bool = False,
    quiet: bool = True,
    cancel_running: bool = False,
) -> SearchResult:
    """Run (or resume) a search and return its result.

    Parameters
    ----------
    spec
        A spec file, a mapping with the same keys, or a loaded :class:`Spec`.
    client
        A ``distributed.Client`` to run the trials on instead of the spec's ``cluster``
        (which is then ignored). forebear leaves it open.
    objective
        A callable ``f(config) -> float | dict`` to evaluate; the spec's ``objective`` then
        holds only ``minimize`` or ``maximize``. It is shipped to the workers with cloudpickle,
        and each attempt still runs in its own process with the spec's timeouts.
    extend
        Allow a larger ``trials`` / ``wall_time`` than the logbook's search had.
    quiet
        No progress display on stderr.
    cancel_running
        On Ctrl-C, kill running attempts instead of waiting for them.
    """
    return controller(spec, client, objective, extend=extend, quiet=quiet, cancel_running=cancel_running, display=Progress).run()
