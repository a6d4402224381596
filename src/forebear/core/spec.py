"""Load and validate a search spec (``search.yaml``) into frozen dataclasses.

The YAML is read with safe-load semantics only (plain data, no object
construction). On top of PyYAML this module detects duplicate keys anywhere,
reads scientific notation such as ``1e-4`` as a number, and remembers the line
of every key, so that each error names the key path and its line::

    space.rate: lower bound 0.0 must be > 0 when log is true (search.yaml, line 6)

``load`` collects every error before it raises one :class:`SpecError`.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import os
import re
import stat
from collections.abc import Mapping
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from forebear.core._yaml import Doc as _Doc
from forebear.core._yaml import read_yaml as _read_yaml
from forebear.core.space import Param, Space

MAX_SPEC_BYTES = 1 << 20  # a spec is a page of YAML; 1 MiB leaves room and stops runaway files

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([smh]?)\s*$")
_CALLABLE = re.compile(r"^[A-Za-z_][\w]*(?:\.[A-Za-z_][\w]*)*:[A-Za-z_][\w]*(?:\.[A-Za-z_][\w]*)*$")


class SpecError(ValueError):
    """An invalid spec; ``errors`` holds one line per problem."""

    def __init__(self, errors: list[str]) -> None:
        self.errors = list(errors)
        super().__init__("\n".join(self.errors))

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, (self.errors,))


def _defaults() -> dict[str, Any]:
    text = resources.files("forebear.core").joinpath("defaults.yaml").read_text()
    return yaml.safe_load(text)["forebear"]


DEFAULTS: dict[str, Any] = _defaults()


# --------------------------------------------------------------------------
# dataclasses


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


# --------------------------------------------------------------------------
# validation helpers


_TOP = ("name", "objective", "space", "budget", "history", "cluster", "resources", "logbook", "lock", "lock_lifetime", "seed")
_OBJECTIVE = ("call", "command", "minimize", "maximize")
_BUDGET = tuple(DEFAULTS["budget"])
_PARAM = ("float", "int", "categories", "log", "default")
_HISTORY = ("csv", "task", "score", "logbook")
_CLUSTER = ("local", "address", "tls", "allow_insecure", "slurm", "pbs")
_LOCAL = ("workers", "threads", "memory_limit", "dashboard")
_TLS = ("ca", "cert", "key")
# Keys of earlier forebear versions: the error names the key that replaced them.
_RENAMED = {"journal": "logbook"}


def _check_keys(doc: _Doc, path: tuple[str, ...], data: Mapping[str, Any], allowed: tuple[str, ...]) -> None:
    for key in data:
        if key in _RENAMED and _RENAMED[key] in allowed:
            doc.error((*path, key), f"renamed: the key is now {_RENAMED[key]!r} (same value)")
        elif key not in allowed:
            near = difflib.get_close_matches(key, allowed, n=1, cutoff=0.5)
            hint = f"; did you mean {near[0]!r}?" if near else f"; valid keys: {', '.join(allowed)}"
            doc.error((*path, key), f"unknown key{hint}")


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _want_mapping(doc: _Doc, path: tuple[str, ...], v: Any) -> bool:
    if isinstance(v, dict):
        return True
    doc.error(path, f"must be a mapping, got {_describe(v)}")
    return False


def _describe(v: Any) -> str:
    if v is None:
        return "nothing"
    if isinstance(v, bool):
        return f"a boolean ({v})"
    if isinstance(v, str):
        return f"a string ({v!r})"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, dict):
        return "a mapping"
    return f"{type(v).__name__} ({v!r})"


_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([kmgt]i?b|b)?\s*$", re.IGNORECASE)
_UNITS = {"b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12, "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}


def memory_bytes(value: Any) -> int:
    """Bytes from ``400MB``, ``4GiB`` or a whole number of bytes (Dask's units: kB = 1000, KiB = 1024)."""
    if _is_number(value) and float(value).is_integer() and value > 0:
        return int(value)
    m = _SIZE.match(value) if isinstance(value, str) else None
    if m:
        n = int(float(m.group(1)) * _UNITS[(m.group(2) or "b").lower()])
        if n > 0:
            return n
    msg = f"must be a memory size such as 400MB or 4GiB (or a whole number of bytes), got {value!r}"
    raise ValueError(msg)


def parse_duration(value: Any) -> float:
    """Seconds from ``90``, ``"90s"``, ``"20m"`` or ``"6h"``; ``ValueError`` otherwise."""
    if _is_number(value):
        if not math.isfinite(value):
            msg = f"duration must be a finite number of seconds, got {value}; leave the key out for no limit"
            raise ValueError(msg)
        if value <= 0:
            msg = f"duration must be > 0, got {value}"
            raise ValueError(msg)
        return float(value)
    if isinstance(value, str):
        m = _DURATION.match(value)
        if m:
            seconds = float(m.group(1)) * {"": 1, "s": 1, "m": 60, "h": 3600}[m.group(2)]
            if seconds <= 0:
                msg = f"duration must be > 0, got {value!r}"
                raise ValueError(msg)
            return seconds
    msg = f"malformed duration {value!r}; write a number with an s, m or h suffix, e.g. 90s, 20m, 6h"
    raise ValueError(msg)


def _int_field(doc: _Doc, path: tuple[str, ...], v: Any, minimum: int) -> int | None:
    if isinstance(v, float) and v.is_integer():
        v = int(v)
    if not isinstance(v, int) or isinstance(v, bool):
        doc.error(path, f"must be a whole number, got {_describe(v)}")
        return None
    if v < minimum:
        doc.error(path, f"must be >= {minimum}, got {v}" if minimum != 1 else f"must be > 0, got {v}")
        return None
    return v


# --------------------------------------------------------------------------
# sections


def _objective(doc: _Doc, data: Any, function: str | None = None) -> Objective | None:
    path = ("objective",)
    if data is None:
        doc.error(path, "required: give call (module:function) or command (an argv list), and minimize or maximize")
        return None
    if not _want_mapping(doc, path, data):
        return None
    _check_keys(doc, path, data, _OBJECTIVE)
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
            doc.error((*path, "command"), f"must be a non-empty argv list, got {_describe(command)}")
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
        doc.error((*path, sense), f"must be a metric name, got {_describe(metric)}")
        return None
    return Objective(call if ok and call else None, argv, metric, sense, function) if ok else None


def _param(doc: _Doc, name: str, body: Any) -> Param | None:
    path = ("space", name)
    if not _want_mapping(doc, path, body):
        return None
    _check_keys(doc, path, body, _PARAM)
    kinds = [k for k in ("float", "int", "categories") if k in body]
    if len(kinds) != 1:
        doc.error(path, "give exactly one of float: [low, high], int: [low, high] or categories: [...]")
        return None
    kind = kinds[0]
    log = body.get("log", False)
    if not isinstance(log, bool):
        doc.error((*path, "log"), f"must be true or false, got {_describe(log)}")
        return None
    default = body.get("default")
    if kind == "categories":
        cats = body["categories"]
        if not isinstance(cats, list):
            doc.error((*path, "categories"), f"must be a list, got {_describe(cats)}")
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
    if not isinstance(bounds, list) or len(bounds) != 2 or not all(_is_number(b) for b in bounds):
        doc.error((*path, kind), f"must be [low, high] with two numbers, got {_describe(bounds) if not isinstance(bounds, list) else bounds}")
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
        if not _is_number(default) or not lo <= default <= hi or (kind == "int" and not float(default).is_integer()):
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


def _space(doc: _Doc, data: Any) -> Space | None:
    path = ("space",)
    if data is None:
        doc.error(path, "required: the parameters to tune, e.g. learning_rate: {float: [1.0e-4, 0.3], log: true}")
        return None
    if not _want_mapping(doc, path, data):
        return None
    if not data:
        doc.error(path, "needs at least one parameter")
        return None
    params = [_param(doc, name, body) for name, body in data.items()]
    if any(p is None for p in params):
        return None
    return Space(tuple(p for p in params if p is not None))


def _budget(doc: _Doc, data: Any, notes: list[str]) -> Budget | None:
    path = ("budget",)
    data = {} if data is None else data
    if not _want_mapping(doc, path, data):
        return None
    _check_keys(doc, path, data, _BUDGET)
    merged = {**DEFAULTS["budget"], **data}
    ok = True
    ints = {}
    for key, minimum in (("trials", 1), ("batch", 1), ("concurrency", 1), ("retries", 0)):
        ints[key] = _int_field(doc, (*path, key), merged[key], minimum)
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
        doc.error((*path, "retry_errors"), f"must be true or false, got {_describe(retry_errors)}")
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


def _history(doc: _Doc, data: Any, base: Path) -> tuple[HistorySource, ...] | None:
    path = ("history",)
    if data is None:
        return ()
    if isinstance(data, (str, dict)):
        data = [data]
    if not isinstance(data, list):
        doc.error(path, f"must be a list of logbook globs or {{csv, task, score}} tables, got {_describe(data)}")
        return None
    out = []
    for i, entry in enumerate(data):
        sub = (*path, str(i))
        if isinstance(entry, str) and entry:
            out.append(HistorySource(logbook=str(_resolve(base, entry))))
        elif isinstance(entry, dict):
            _check_keys(doc, sub, entry, _HISTORY)
            if "logbook" in entry and "csv" in entry:
                doc.error(sub, "give either logbook or csv, not both")
                continue
            if "logbook" in entry:
                if not isinstance(entry["logbook"], str):
                    doc.error((*sub, "logbook"), f"must be a path or glob, got {_describe(entry['logbook'])}")
                    continue
                out.append(HistorySource(logbook=str(_resolve(base, entry["logbook"]))))
                continue
            missing = [k for k in ("csv", "task", "score") if k not in entry]
            if missing:
                doc.error(sub, f"a CSV history needs csv, task and score; missing {', '.join(missing)}")
                continue
            bad = [k for k in ("csv", "task", "score") if not isinstance(entry[k], str) or not entry[k]]
            if bad:
                doc.error((*sub, bad[0]), f"must be a string, got {_describe(entry[bad[0]])}")
                continue
            out.append(HistorySource(csv=str(_resolve(base, entry["csv"])), task=entry["task"], score=entry["score"]))
        else:
            doc.error(sub, f"must be a logbook glob or a {{csv, task, score}} mapping, got {_describe(entry)}")
    return tuple(out)


def _cluster(doc: _Doc, data: Any, base: Path) -> Cluster | None:
    path = ("cluster",)
    if data is None:
        return Cluster("local", {"workers": None})
    if not _want_mapping(doc, path, data):
        return None
    _check_keys(doc, path, data, _CLUSTER)
    kinds = [k for k in ("local", "address", "slurm", "pbs") if k in data]
    if len(kinds) > 1:
        doc.error(path, f"give one of local, address, slurm or pbs, not {' and '.join(kinds)}")
        return None
    kind = kinds[0] if kinds else "local"
    allow = data.get("allow_insecure", False)
    if not isinstance(allow, bool):
        doc.error((*path, "allow_insecure"), f"must be true or false, got {_describe(allow)}")
        return None
    tls = data.get("tls")
    tls_paths: dict[str, str] | None = None
    if tls is not None:
        if not _want_mapping(doc, (*path, "tls"), tls):
            return None
        _check_keys(doc, (*path, "tls"), tls, _TLS)
        missing = [k for k in _TLS if k not in tls]
        if missing:
            doc.error((*path, "tls"), f"needs ca, cert and key; missing {', '.join(missing)}")
            return None
        tls_paths = {k: str(_resolve(base, str(tls[k]))) for k in _TLS}
    if kind == "local":
        body = data.get("local") or {}
        if not _want_mapping(doc, (*path, "local"), body):
            return None
        _check_keys(doc, (*path, "local"), body, _LOCAL)
        workers = body.get("workers")
        if workers is not None and _int_field(doc, (*path, "local", "workers"), workers, 1) is None:
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
            doc.error((*path, "address"), f"must be a scheduler address such as tls://host:8786, got {_describe(address)}")
            return None
        if address.startswith("tls://") and tls_paths is None:
            doc.error((*path, "tls"), "a tls:// address needs tls: {ca, cert, key}")
            return None
        return Cluster("address", {}, address=address, tls=tls_paths, allow_insecure=allow)
    body = data[kind]
    if not _want_mapping(doc, (*path, kind), body):
        return None
    jobs = body.get("jobs", 1)
    if _int_field(doc, (*path, kind, "jobs"), jobs, 1) is None:
        return None
    return Cluster(kind, dict(body), tls=tls_paths, allow_insecure=allow)


def _resolve(base: Path, p: str) -> Path:
    q = Path(os.path.expanduser(p))
    return q if q.is_absolute() else base / q


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
        doc = _Doc({}, [], None)
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
    doc = _Doc({}, [], name)
    data = _read_yaml(text, doc)
    if doc.errors and not isinstance(data, dict):
        raise SpecError(doc.errors)
    return _build(data, doc, path.resolve().parent, path.resolve(), function)


def _build(data: Any, doc: _Doc, base: Path, source: Path | None, function: str | None = None) -> Spec:
    if data is None:
        raise SpecError([f"spec: the file is empty; a spec needs objective and space{doc.where(())}"])
    if not isinstance(data, dict):
        raise SpecError([f"spec: the top level must be a mapping of keys, got {_describe(data)}{doc.where(())}"])
    _check_keys(doc, (), data, _TOP)
    notes: list[str] = []
    name = data.get("name", source.stem if source else "search")
    if not isinstance(name, str) or not re.match(r"^[\w.-]+$", name or ""):
        doc.error(("name",), f"must be a word of letters, digits, '.', '_' or '-', got {_describe(name)}")
        name = "search"
    objective = _objective(doc, data.get("objective"), function)
    space = _space(doc, data.get("space"))
    budget = _budget(doc, data.get("budget"), notes)
    history = _history(doc, data.get("history"), base)
    cluster = _cluster(doc, data.get("cluster"), base)
    res = data.get("resources", DEFAULTS["resources"]) or {}
    if not isinstance(res, dict) or not all(isinstance(k, str) and _is_number(v) and v > 0 for k, v in res.items()):
        doc.error(("resources",), "must map resource names to positive numbers, e.g. {GPU: 1}")
        res = {}
    logbook = data.get("logbook", DEFAULTS["logbook"])
    if logbook is None:
        logbook_path = base / "runs" / f"{name}.jsonl"
    elif isinstance(logbook, str) and logbook:
        logbook_path = _resolve(base, logbook)
    else:
        doc.error(("logbook",), f"must be a file path, got {_describe(logbook)}")
        logbook_path = base / "runs" / f"{name}.jsonl"
    lock = data.get("lock", DEFAULTS["lock"])
    if lock not in ("strict", "soft"):
        doc.error(("lock",), f"must be strict or soft, got {_describe(lock)}")
    lifetime = data.get("lock_lifetime", DEFAULTS["lock_lifetime"])
    if not _is_number(lifetime) or lifetime <= 0:
        doc.error(("lock_lifetime",), f"must be a number of seconds > 0, got {_describe(lifetime)}")
        lifetime = DEFAULTS["lock_lifetime"]
    seed = data.get("seed", DEFAULTS["seed"])
    if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
        doc.error(("seed",), f"must be a whole number >= 0, got {_describe(seed)}")
        seed = 0
    if doc.errors or objective is None or space is None or budget is None or history is None or cluster is None:
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
    )


def accepted_keys() -> dict[str, tuple[str, ...]]:
    """Every key the spec accepts, by section (docs/spec.md is checked against this)."""
    return {
        "": _TOP,
        "objective": _OBJECTIVE,
        "space.<name>": _PARAM,
        "budget": _BUDGET,
        "history[]": _HISTORY,
        "cluster": _CLUSTER,
        "cluster.local": _LOCAL,
        "cluster.tls": _TLS,
    }
