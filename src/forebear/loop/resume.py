"""Resuming a search: the logbook's ``search`` record and what a changed spec may change.

A spec that changed is refused with the list of changes; ``extend`` allows a
larger ``trials`` or ``wall_time`` only.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from forebear.cluster.shipping import why_unsure
from forebear.core.spec import Spec
from forebear.records.logbook import record

BUDGET_KEYS = ("trials", "batch", "concurrency", "trial_timeout", "retries", "retry_errors", "wall_time")
EXTENDABLE = ("trials", "wall_time")


class SpecChanged(ValueError):
    """The spec differs from the one the logbook's search was started with."""

    def __init__(self, path: str, changes: list[str]) -> None:
        self.path = path
        self.changes = list(changes)
        lines = "; ".join(self.changes)
        super().__init__(f"logbook {path} holds a search started from a different spec: {lines}")

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, (self.path, self.changes))


def budget_dict(spec: Spec) -> dict[str, Any]:
    b = spec.budget
    return {k: getattr(b, k) for k in BUDGET_KEYS}


def search_record(spec: Spec) -> dict[str, Any]:
    return record(
        "search",
        name=spec.name,
        spec_hash=spec.hash(),
        space=spec.space.to_dict(),
        objective=spec.objective.to_dict(),
        seed=spec.seed,
        budget=budget_dict(spec),
    )


def spec_changes(header: Mapping[str, Any], spec: Spec, extend: bool) -> tuple[list[str], bool]:
    """Differences between the logbook's search record and ``spec``: (refused changes, budget grew)."""
    changes: list[str] = []
    if header.get("name") not in (None, spec.name):
        changes.append(f"name: {header.get('name')!r} -> {spec.name!r}")
    old_fn, new_fn = (header.get("objective") or {}).get("function"), spec.objective.function
    if old_fn and new_fn and old_fn != new_fn:
        changes.append(f"objective: the logbook's search evaluated the function {old_fn}, this run passes {new_fn}")
    elif header.get("objective") != spec.objective.to_dict():
        changes.append(f"objective: {header.get('objective')} -> {spec.objective.to_dict()}")
    if header.get("seed") != spec.seed:
        changes.append(f"seed: {header.get('seed')} -> {spec.seed}")
    old_space = header.get("space") or {}
    new_space = spec.space.to_dict()
    for name in old_space:
        if name not in new_space:
            changes.append(f"space.{name}: removed")
        elif old_space[name] != new_space[name]:
            changes.append(f"space.{name}: {old_space[name]} -> {new_space[name]}")
    for name in new_space:
        if name not in old_space:
            changes.append(f"space.{name}: added")
    if not changes and header.get("spec_hash") not in (None, spec.hash()):
        changes.append(f"spec hash {header.get('spec_hash')} -> {spec.hash()}")
    grew = False
    old_budget = header.get("budget")
    if isinstance(old_budget, Mapping):
        new_budget = budget_dict(spec)
        for key in BUDGET_KEYS:
            old, new = old_budget.get(key), new_budget[key]
            if old == new:
                continue
            larger = key in EXTENDABLE and (new is None or (old is not None and new > old))
            if extend and larger:
                grew = True
                continue
            hint = " (give --extend to allow a larger budget)" if larger else ""
            changes.append(f"budget.{key}: {old} -> {new}{hint}")
    return changes, grew


def function_note(header: Mapping[str, Any], spec: Spec) -> str | None:
    """A note for a resumed search whose objective is a function of the same name that a name cannot vouch for."""
    name = spec.objective.function
    if not name or (header.get("objective") or {}).get("function") != name:
        return None
    why = why_unsure(name)
    if why is None:
        return None
    return (
        f"note: resuming with the function {name}, the name the logbook's search recorded; "
        f"forebear cannot tell whether its code is the same ({why}): change the spec's name "
        "or logbook if it is not, so that the scores stay comparable"
    )
