"""A Python callable as the objective: its name, and its bytes for the workers.

``forebear.run(spec, objective=train)`` ships ``train`` to the workers the way
Dask ships the functions it runs: with cloudpickle, which sends a function
defined in a notebook, a script's ``__main__`` or inside another function by
value (its code and the globals it uses) and a function of an importable module
by reference (its module and name). The bytes travel inside each attempt's
task; the attempt's child process (:mod:`forebear.cluster.child`) loads them,
so importing the user's code never happens in the worker itself.

The logbook records the callable's name (``module:qualified.name``); a resumed
search compares names, which is all a name can tell (:func:`why_unsure`).
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any

import cloudpickle

LARGE = 8 << 20  # bytes: a function this large in pickled form carries data; each attempt ships it again


class ObjectiveError(TypeError):
    """The objective given to ``forebear.run`` is not a callable that can be shipped to workers."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


def name_of(fn: Callable[..., Any]) -> str:
    """``module:qualified.name`` of a callable (of its class for a callable object, of ``func`` for a partial)."""
    target: Any = fn
    prefix = ""
    if isinstance(fn, functools.partial):
        target, prefix = fn.func, "partial of "
    module = getattr(target, "__module__", None) or type(target).__module__
    qual = getattr(target, "__qualname__", None) or type(target).__qualname__
    return f"{prefix}{module}:{qual}"


def why_unsure(name: str) -> str | None:
    """Why two callables of this name may still hold different code, or None when the name settles it.

    A module-level function of an importable module is found again by its name; one
    defined in ``__main__`` (a notebook, a script), inside another function or as a
    lambda is not: two notebooks may define different ``train`` functions.
    """
    module, _, qual = name.rpartition(":")
    if "<lambda>" in qual:
        return "it is a lambda"
    if "<locals>" in qual:
        return "it is defined inside another function"
    if module.endswith("__main__") or module.startswith("__"):
        return "it is defined in a notebook or a script's __main__"
    if module.startswith("partial of "):
        return "it is a functools.partial, whose bound arguments the name does not show"
    return None


def pack(fn: Callable[..., Any]) -> bytes:
    """The callable as cloudpickle bytes.

    Raises
    ------
    ObjectiveError
        For something that is not callable, or that cannot be pickled (it holds a lock,
        an open file, a live connection ...); the message names what could not be.
    """
    if not callable(fn):
        msg = f"objective must be a callable taking the configuration dict, got {type(fn).__name__}"
        raise ObjectiveError(msg)
    try:
        return cloudpickle.dumps(fn)
    except Exception as exc:  # noqa: BLE001 - pickling user objects raises anything
        msg = f"objective {name_of(fn)} cannot be shipped to the workers: {type(exc).__name__}: {exc}"
        raise ObjectiveError(msg) from None

