"""Load and validate a search spec (``search.yaml``) into frozen dataclasses.

The YAML is read with safe-load semantics only (plain data, no object
construction). On top of PyYAML this module detects duplicate keys anywhere,
reads scientific notation such as ``1e-4`` as a number, and remembers the line
of every key, so that each error names the key path and its line::

    space.rate: lower bound 0.0 must be > 0 when log is true (search.yaml, line 6)

``load`` collects every error before it raises one :class:`SpecError`. Each
section is read by :mod:`forebear.core.sections`; the plain values (durations,
sizes, whole numbers, paths) by :mod:`forebear.core.values`.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import stat
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from forebear.core._yaml import Doc
from forebear.core._yaml import read_yaml as _read_yaml
from forebear.core.halting import KEYS as _STOPPING
from forebear.core.halting import Stopping, parse_stopping
from forebear.core.sections import KEYS as _SECTIONS
from forebear.core.sections import (
    Budget,
    Cluster,
    HistorySource,
    Objective,
    parse_budget,
    parse_cluster,
    parse_history,
    parse_objective,
    parse_space,
)
from forebear.core.space import Space
from forebear.core.values import DEFAULTS, check_keys, describe, is_number, resolve

MAX_SPEC_BYTES = 1 << 20  # a spec is a page of YAML; 1 MiB leaves room and stops runaway files


class SpecError(ValueError):
    """An invalid spec; ``errors`` holds one line per problem."""

    def __init__(self, errors: list[str]) -> None:
        self.errors = list(errors)
        super().__init__("\n".join(self.errors))

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, (self.errors,))


@dataclass(frozen=True)
class Spec:
    """A validated search spec. Paths are absolute."""

    name: str
    objective: Objective
    space: Space
    budget: Budget
    history: tuple[HistorySource, ...]
    cluster: Cluster
    resources: Mapping[str, float]
    logbook: Path
    lock: str
    lock_lifetime: float
    seed: int
    source: Path | None = None
    root: Path | None = None  # the folder relative paths resolve against
    notes: tuple[str, ...] = ()
    raw: Mapping[str, Any] = field(default_factory=dict, repr=False, compare=False)
    stopping: Stopping = field(default_factory=Stopping)

    @property
    def base_dir(self) -> Path:
        """The spec file's folder, or the ``base_dir`` given with a mapping."""
        if self.root is not None:
            return self.root
        return self.source.parent if self.source else Path.cwd()

    def hash(self) -> str:
        """Hash of what defines the search (objective, space, seed); budgets may change."""
        body = {"objective": self.objective.to_dict(), "space": self.space.to_dict(), "seed": self.seed}
        return hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()[:16]


_TOP = ("name", "objective", "space", "budget", "history", "cluster", "resources", "logbook", "lock", "lock_lifetime", "seed", "stopping")


# --------------------------------------------------------------------------
# entry points


def load(
    source: str | os.PathLike[str] | Mapping[str, Any],
    *,
    base_dir: str | os.PathLike[str] | None = None,
    function: str | None = None,
) -> Spec:
    """Load and validate a spec from a YAML file or a mapping with the same keys.

    ``function`` is the name (``module:qualified.name``) of a Python callable given as the
    objective (``forebear.run(spec, objective=fn)``): the spec's ``objective`` then holds
    only ``minimize`` or ``maximize``, and ``call`` or ``command`` is an error.

    Raises
    ------
    SpecError
        With every problem found, one line each, naming the key path and line.
    """
    if isinstance(source, Mapping):
        doc = Doc({}, [], None)
        return _build(dict(source), doc, Path(base_dir) if base_dir else Path.cwd(), None, function)
    path = Path(source)
    name = path.name
    try:
        st = path.stat()
    except OSError as exc:
        raise SpecError([f"spec: cannot read {path}: {exc.strerror or exc}"]) from None
    size = st.st_size
    if stat.S_ISDIR(st.st_mode):
        raise SpecError([f"spec: {path} is a folder, not a spec file"])
    if not stat.S_ISREG(st.st_mode):
        # A FIFO with no writer would block the read forever; a device has no end.
        raise SpecError([f"spec: {path} is not a regular file (a FIFO, socket or device); give a spec file"])
    if size > MAX_SPEC_BYTES:
        raise SpecError([f"spec: {name} is {size / 1e6:.1f} MB; a spec must be under {MAX_SPEC_BYTES // 1024} KiB"])
    try:
        text = path.read_bytes().decode("utf-8")
    except UnicodeDecodeError as exc:
        raise SpecError([f"spec: {name} is not UTF-8 text (byte {exc.start})"]) from None
    except OSError as exc:
        raise SpecError([f"spec: cannot read {path}: {exc.strerror or exc}"]) from None
    doc = Doc({}, [], name)
    data = _read_yaml(text, doc)
    if doc.errors and not isinstance(data, dict):
        raise SpecError(doc.errors)
    return _build(data, doc, path.resolve().parent, path.resolve(), function)


def _build(data: Any, doc: Doc, base: Path, source: Path | None, function: str | None = None) -> Spec:
    if data is None:
        raise SpecError([f"spec: the file is empty; a spec needs objective and space{doc.where(())}"])
    if not isinstance(data, dict):
        raise SpecError([f"spec: the top level must be a mapping of keys, got {describe(data)}{doc.where(())}"])
    check_keys(doc, (), data, _TOP)
    notes: list[str] = []
    name = data.get("name", source.stem if source else "search")
    if not isinstance(name, str) or not re.match(r"^[\w.-]+$", name or ""):
        doc.error(("name",), f"must be a word of letters, digits, '.', '_' or '-', got {describe(name)}")
        name = "search"
    objective = parse_objective(doc, data.get("objective"), function)
    space = parse_space(doc, data.get("space"))
    budget = parse_budget(doc, data.get("budget"), notes)
    history = parse_history(doc, data.get("history"), base)
    cluster = parse_cluster(doc, data.get("cluster"), base)
    stopping = parse_stopping(doc, data.get("stopping"), DEFAULTS["stopping"])
    res = data.get("resources", DEFAULTS["resources"]) or {}
    if not isinstance(res, dict) or not all(isinstance(k, str) and is_number(v) and v > 0 for k, v in res.items()):
        doc.error(("resources",), "must map resource names to positive numbers, e.g. {GPU: 1}")
        res = {}
    logbook = data.get("logbook", DEFAULTS["logbook"])
    if logbook is None:
        logbook_path = base / "runs" / f"{name}.jsonl"
    elif isinstance(logbook, str) and logbook:
        logbook_path = resolve(base, logbook)
    else:
        doc.error(("logbook",), f"must be a file path, got {describe(logbook)}")
        logbook_path = base / "runs" / f"{name}.jsonl"
    lock = data.get("lock", DEFAULTS["lock"])
    if lock not in ("strict", "soft"):
        doc.error(("lock",), f"must be strict or soft, got {describe(lock)}")
    lifetime = data.get("lock_lifetime", DEFAULTS["lock_lifetime"])
    if not is_number(lifetime) or lifetime <= 0:
        doc.error(("lock_lifetime",), f"must be a number of seconds > 0, got {describe(lifetime)}")
        lifetime = DEFAULTS["lock_lifetime"]
    seed = data.get("seed", DEFAULTS["seed"])
    if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
        doc.error(("seed",), f"must be a whole number >= 0, got {describe(seed)}")
        seed = 0
    if doc.errors or objective is None or space is None or budget is None or history is None or cluster is None or stopping is None:
        raise SpecError(doc.errors or ["spec: invalid"])
    return Spec(
        name=name,
        objective=objective,
        space=space,
        budget=budget,
        history=history,
        cluster=cluster,
        resources=dict(res),
        logbook=logbook_path,
        lock=lock,
        lock_lifetime=float(lifetime),
        seed=seed,
        source=source,
        root=base,
        notes=tuple(notes),
        raw=data,
        stopping=stopping,
    )


def accepted_keys() -> dict[str, tuple[str, ...]]:
    """Every key the spec accepts, by section (docs/spec.md is checked against this)."""
    return {"": _TOP, **_SECTIONS, "stopping": _STOPPING}
