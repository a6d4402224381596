"""The sections of a spec (objective, space, budget, history, cluster) and their validators.

Each ``parse_*`` function reads one section of the YAML mapping, reports every
problem through the :class:`~forebear.core._yaml.Doc` (key path and line), and
returns the section's frozen dataclass, or ``None`` when the section is invalid.
:func:`forebear.core.spec.load` puts the sections together into a ``Spec``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from forebear.core._yaml import Doc
from forebear.core.param import Param
from forebear.core.space import Space
from forebear.core.values import (
    DEFAULTS,
    check_keys,
    describe,
    int_field,
    is_number,
    memory_bytes,
    parse_duration,
    resolve,
    want_mapping,
)

_CALLABLE = re.compile(r"^[A-Za-z_][\w]*(?:\.[A-Za-z_][\w]*)*:[A-Za-z_][\w]*(?:\.[A-Za-z_][\w]*)*$")

@dataclass(frozen=True)
class Objective:
    """What to evaluate and which metric to optimise.

    ``function`` names a Python callable passed to ``forebear.run(..., objective=fn)``
    (``module:qualified.name``); the callable itself travels with each attempt, so the
    spec holds neither ``call`` nor ``command`` then.
    """

    call: str | None
    command: tuple[str, ...] | None
    metric: str
    sense: str  # "minimize" or "maximize"
    function: str | None = None

    @property
    def sign(self) -> float:
        """+1 for minimize, -1 for maximize: ``sign * score`` is lower-is-better."""
        return 1.0 if self.sense == "minimize" else -1.0

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any]
        if self.function:
            out = {"function": self.function}
        else:
            out = {"call": self.call} if self.call else {"command": list(self.command or ())}
        out[self.sense] = self.metric
        return out


@dataclass(frozen=True)
class Budget:
    """Limits of a search; durations are in seconds."""

    trials: int
    batch: int
    concurrency: int
    trial_timeout: float | None
    retries: int
    retry_errors: bool
    wall_time: float | None


@dataclass(frozen=True)
class HistorySource:
    """One history entry: a logbook glob, or a CSV table with task and score columns."""

    logbook: str | None = None
    csv: str | None = None
    task: str | None = None
    score: str | None = None


@dataclass(frozen=True)
class Cluster:
    """Where trials run: ``kind`` is local, address, slurm or pbs."""

    kind: str
    options: Mapping[str, Any] = field(default_factory=dict)
    address: str | None = None
    tls: Mapping[str, str] | None = None
    allow_insecure: bool = False


_OBJECTIVE = ("call", "command", "minimize", "maximize")
_BUDGET = tuple(DEFAULTS["budget"])
_PARAM = ("float", "int", "categories", "log", "default")
_HISTORY = ("csv", "task", "score", "logbook")
_CLUSTER = ("local", "address", "tls", "allow_insecure", "slurm", "pbs")
_LOCAL = ("workers", "threads", "memory_limit", "dashboard")
_TLS = ("ca", "cert", "key")

KEYS: dict[str, tuple[str, ...]] = {
    "objective": _OBJECTIVE,
    "space.<name>": _PARAM,
    "budget": _BUDGET,
    "history[]": _HISTORY,
    "cluster": _CLUSTER,
    "cluster.local": _LOCAL,
    "cluster.tls": _TLS,
}
"""Every key each section accepts (docs/spec.md is checked against this)."""


def parse_objective(doc: Doc, data: Any, function: str | None = None) -> Objective | None:
    path = ("objective",)
    if data is None:
        doc.error(path, "required: give call (module:function) or command (an argv list), and minimize or maximize")
        return None
    if not want_mapping(doc, path, data):
        return None
    check_keys(doc, path, data, _OBJECTIVE)
    call, command = data.get("call"), data.get("command")
    ok = True
    if function is not None:
        for key in ("call", "command"):
            if key in data:
                doc.error((*path, key), f"the objective is the function passed to forebear.run ({function}); remove {key}, or pass no objective=")
                ok = False
        call = command = None
    elif (call is None) == (command is None):
        hint = " (or pass the function itself: forebear.run(spec, objective=fn) needs only minimize or maximize here)" if call is None else ""
        doc.error(path, f"give exactly one of call (module:function) or command (an argv list){hint}")
        ok = False
    if call is not None and (not isinstance(call, str) or not _CALLABLE.match(call)):
        doc.error((*path, "call"), f"must have the form module:function (e.g. mypkg.train:evaluate), got {call!r}")
        ok = False
    argv: tuple[str, ...] | None = None
    if command is not None:
        if isinstance(command, str):
            doc.error((*path, "command"), "must be an argv list such as [python, train.py, --lr, \"{lr}\"], not a shell string")
            ok = False
        elif not isinstance(command, list) or not command:
            doc.error((*path, "command"), f"must be a non-empty argv list, got {describe(command)}")
            ok = False
        elif not all(isinstance(a, (str, int, float)) and not isinstance(a, bool) for a in command):
            doc.error((*path, "command"), "every argv item must be a string or a number")
            ok = False
        else:
            argv = tuple(str(a) for a in command)
    has_min, has_max = "minimize" in data, "maximize" in data
    if has_min == has_max:
        doc.error(path, "give exactly one of minimize or maximize (the metric to optimise)")
        return None
    sense = "minimize" if has_min else "maximize"
    metric = data[sense]
    if not isinstance(metric, str) or not metric:
        doc.error((*path, sense), f"must be a metric name, got {describe(metric)}")
        return None
    return Objective(call if ok and call else None, argv, metric, sense, function) if ok else None


def _param(doc: Doc, name: str, body: Any) -> Param | None:
    path = ("space", name)
    if not want_mapping(doc, path, body):
        return None
    check_keys(doc, path, body, _PARAM)
    kinds = [k for k in ("float", "int", "categories") if k in body]
    if len(kinds) != 1:
        doc.error(path, "give exactly one of float: [low, high], int: [low, high] or categories: [...]")
        return None
    kind = kinds[0]
    log = body.get("log", False)
    if not isinstance(log, bool):
        doc.error((*path, "log"), f"must be true or false, got {describe(log)}")
        return None
    default = body.get("default")
    if kind == "categories":
        cats = body["categories"]
        if not isinstance(cats, list):
            doc.error((*path, "categories"), f"must be a list, got {describe(cats)}")
            return None
        if not cats:
            doc.error((*path, "categories"), "must list at least one category")
            return None
        if not all(isinstance(c, (str, int, float, bool)) for c in cats):
            doc.error((*path, "categories"), "categories must be strings, numbers or booleans")
            return None
        if log:
            doc.error((*path, "log"), "log applies to float and int parameters only")
            return None
        try:
            return Param(name, "categorical", categories=tuple(cats), default=default)
        except ValueError as exc:
            doc.error(path, str(exc).split(": ", 1)[-1])
            return None
    bounds = body[kind]
    if not isinstance(bounds, list) or len(bounds) != 2 or not all(is_number(b) for b in bounds):
        doc.error((*path, kind), f"must be [low, high] with two numbers, got {describe(bounds) if not isinstance(bounds, list) else bounds}")
        return None
    lo, hi = bounds
    if not all(math.isfinite(b) for b in bounds):
        doc.error((*path, kind), "bounds must be finite")
        return None
    if kind == "int" and not all(float(b).is_integer() for b in bounds):
        doc.error((*path, kind), f"int bounds must be whole numbers, got [{lo}, {hi}]")
        return None
    if lo >= hi:
        word = "empty" if lo == hi else "inverted"
        doc.error((*path, kind), f"{word} range: low {lo} must be < high {hi}")
        return None
    if log and lo <= 0:
        doc.error(path, f"lower bound {lo} must be > 0 when log is true")
        return None
    if default is not None:
        if not is_number(default) or not lo <= default <= hi or (kind == "int" and not float(default).is_integer()):
            doc.error((*path, "default"), f"{default!r} is outside [{lo}, {hi}]")
            return None
        default = int(default) if kind == "int" else float(default)
    try:
        if kind == "int":
            return Param(name, "int", int(lo), int(hi), log=log, default=default)
        return Param(name, "float", float(lo), float(hi), log=log, default=default)
    except ValueError as exc:  # the checks that belong to the space itself (a range wider than a float)
        doc.error((*path, kind), str(exc).split(": ", 1)[-1])
        return None


def parse_space(doc: Doc, data: Any) -> Space | None:
    path = ("space",)
    if data is None:
        doc.error(path, "required: the parameters to tune, e.g. learning_rate: {float: [1.0e-4, 0.3], log: true}")
        return None
    if not want_mapping(doc, path, data):
        return None
    if not data:
        doc.error(path, "needs at least one parameter")
        return None
    params = [_param(doc, name, body) for name, body in data.items()]
    if any(p is None for p in params):
        return None
    return Space(tuple(p for p in params if p is not None))


def parse_budget(doc: Doc, data: Any, notes: list[str]) -> Budget | None:
    path = ("budget",)
    data = {} if data is None else data
    if not want_mapping(doc, path, data):
        return None
    check_keys(doc, path, data, _BUDGET)
    merged = {**DEFAULTS["budget"], **data}
    ok = True
    ints = {}
    for key, minimum in (("trials", 1), ("batch", 1), ("concurrency", 1), ("retries", 0)):
        ints[key] = int_field(doc, (*path, key), merged[key], minimum)
        ok &= ints[key] is not None
    durations: dict[str, float | None] = {}
    for key in ("trial_timeout", "wall_time"):
        v = merged[key]
        if v is None:
            durations[key] = None
            continue
        try:
            durations[key] = parse_duration(v)
        except ValueError as exc:
            doc.error((*path, key), str(exc))
            ok = False
    retry_errors = merged["retry_errors"]
    if not isinstance(retry_errors, bool):
        doc.error((*path, "retry_errors"), f"must be true or false, got {describe(retry_errors)}")
        ok = False
    if not ok:
        return None
    trials, concurrency, batch = ints["trials"], ints["concurrency"], ints["batch"]
    assert trials is not None and concurrency is not None and batch is not None
    if concurrency > trials:
        notes.append(f"budget.concurrency {concurrency} is larger than budget.trials {trials}; using {trials}")
        concurrency = trials
    if batch > trials:
        notes.append(f"budget.batch {batch} is larger than budget.trials {trials}; using {trials}")
        batch = trials
    return Budget(trials, batch, concurrency, durations["trial_timeout"], ints["retries"] or 0, retry_errors, durations["wall_time"])  # type: ignore[arg-type]


def parse_history(doc: Doc, data: Any, base: Path) -> tuple[HistorySource, ...] | None:
    path = ("history",)
    if data is None:
        return ()
    if isinstance(data, (str, dict)):
        data = [data]
    if not isinstance(data, list):
        doc.error(path, f"must be a list of logbook globs or {{csv, task, score}} tables, got {describe(data)}")
        return None
    out = []
    for i, entry in enumerate(data):
        sub = (*path, str(i))
        if isinstance(entry, str) and entry:
            out.append(HistorySource(logbook=str(resolve(base, entry))))
        elif isinstance(entry, dict):
            check_keys(doc, sub, entry, _HISTORY)
            if "logbook" in entry and "csv" in entry:
                doc.error(sub, "give either logbook or csv, not both")
                continue
            if "logbook" in entry:
                if not isinstance(entry["logbook"], str):
                    doc.error((*sub, "logbook"), f"must be a path or glob, got {describe(entry['logbook'])}")
                    continue
                out.append(HistorySource(logbook=str(resolve(base, entry["logbook"]))))
                continue
            missing = [k for k in ("csv", "task", "score") if k not in entry]
            if missing:
                doc.error(sub, f"a CSV history needs csv, task and score; missing {', '.join(missing)}")
                continue
            bad = [k for k in ("csv", "task", "score") if not isinstance(entry[k], str) or not entry[k]]
            if bad:
                doc.error((*sub, bad[0]), f"must be a string, got {describe(entry[bad[0]])}")
                continue
            out.append(HistorySource(csv=str(resolve(base, entry["csv"])), task=entry["task"], score=entry["score"]))
        else:
            doc.error(sub, f"must be a logbook glob or a {{csv, task, score}} mapping, got {describe(entry)}")
    return tuple(out)


def parse_cluster(doc: Doc, data: Any, base: Path) -> Cluster | None:
    path = ("cluster",)
    if data is None:
        return Cluster("local", {"workers": None})
    if not want_mapping(doc, path, data):
        return None
    check_keys(doc, path, data, _CLUSTER)
    kinds = [k for k in ("local", "address", "slurm", "pbs") if k in data]
    if len(kinds) > 1:
        doc.error(path, f"give one of local, address, slurm or pbs, not {' and '.join(kinds)}")
        return None
    kind = kinds[0] if kinds else "local"
    allow = data.get("allow_insecure", False)
    if not isinstance(allow, bool):
        doc.error((*path, "allow_insecure"), f"must be true or false, got {describe(allow)}")
        return None
    tls = data.get("tls")
    tls_paths: dict[str, str] | None = None
    if tls is not None:
        if not want_mapping(doc, (*path, "tls"), tls):
            return None
        check_keys(doc, (*path, "tls"), tls, _TLS)
        missing = [k for k in _TLS if k not in tls]
        if missing:
            doc.error((*path, "tls"), f"needs ca, cert and key; missing {', '.join(missing)}")
            return None
        tls_paths = {k: str(resolve(base, str(tls[k]))) for k in _TLS}
    if kind == "local":
        body = data.get("local") or {}
        if not want_mapping(doc, (*path, "local"), body):
            return None
        check_keys(doc, (*path, "local"), body, _LOCAL)
        workers = body.get("workers")
        if workers is not None and int_field(doc, (*path, "local", "workers"), workers, 1) is None:
            return None
        if body.get("memory_limit") is not None:
            try:
                memory_bytes(body["memory_limit"])
            except ValueError as exc:
                doc.error((*path, "local", "memory_limit"), str(exc))
                return None
        return Cluster("local", {"workers": None, **body}, tls=tls_paths)
    if kind == "address":
        address = data["address"]
        if not isinstance(address, str) or "://" not in address and ":" not in address:
            doc.error((*path, "address"), f"must be a scheduler address such as tls://host:8786, got {describe(address)}")
            return None
        if address.startswith("tls://") and tls_paths is None:
            doc.error((*path, "tls"), "a tls:// address needs tls: {ca, cert, key}")
            return None
        return Cluster("address", {}, address=address, tls=tls_paths, allow_insecure=allow)
    body = data[kind]
    if not want_mapping(doc, (*path, kind), body):
        return None
    jobs = body.get("jobs", 1)
    if int_field(doc, (*path, kind, "jobs"), jobs, 1) is None:
        return None
    return Cluster(kind, dict(body), tls=tls_paths, allow_insecure=allow)
