"""The Python entry point of a search: ``forebear.run``."""

from __future__ import annotations

import os
from collections.abc import Mapping

from forebear.core import spec as spec_mod
from forebear.core.spec import Spec
from forebear.face.progress import Progress
from forebear.loop.book import SearchResult
from forebear.loop.controller import Controller


def as_spec(spec: str | os.PathLike[str] | Mapping[str, object] | Spec) -> Spec:
    """A loaded :class:`Spec` from a spec file, a mapping with the same keys, or a Spec."""
    return spec if isinstance(spec, Spec) else spec_mod.load(spec)


def run(
    spec: str | os.PathLike[str] | Mapping[str, object] | Spec,
    *,
    extend: bool = False,
    quiet: bool = True,
    cancel_running: bool = False,
) -> SearchResult:
    """Run (or resume) a search and return its result.

    Parameters
    ----------
    spec
        A spec file, a mapping with the same keys, or a loaded :class:`Spec`.
    extend
        Allow a larger ``trials`` / ``wall_time`` than the logbook's search had.
    quiet
        No progress display on stderr.
    cancel_running
        On Ctrl-C, kill running attempts instead of waiting for them.
    """
    controller = Controller(as_spec(spec), extend=extend, quiet=quiet, cancel_running=cancel_running, display=Progress)
    return controller.run()
