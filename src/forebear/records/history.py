"""Earlier searches (logbooks and CSV tables) aligned to the current space.

Each earlier search becomes a :class:`Task`: its configurations encoded in
the current space and its scores, lower is better. Scores follow the spec's
own sense: a ``maximize`` spec negates every history score, whatever the
earlier search's logbook header says (a header that disagrees is noted in
``History.warnings``). Only JSON and CSV are read; nothing is unpickled.
"""

from __future__ import annotations

import csv
import glob
import hashlib
import json
import math
import zlib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from forebear.core.space import Param, Space
from forebear.records.files import NotRegularFile, open_regular, read_regular
from forebear.records.logbook import fold, parse

MAX_TASK_POINTS = 2000  # trials of one earlier search kept; meta-training samples batches, 2000 cover a task's landscape
KEEP_BEST = 100  # of those, the best trials, always kept: the warm start starts from them

class HistoryError(ValueError):
    """A history file that cannot be used; the message names the file and the row or line."""

    def __reduce__(self) -> tuple[Any, ...]:
        return (self.__class__, self.args)


@dataclass
class Task:
    """One earlier search aligned to the current space."""

    name: str
    configs: list[dict[str, Any]]
    X: np.ndarray
    y: np.ndarray

    def __len__(self) -> int:
        return len(self.configs)


@dataclass
class History:
    """The tasks of the history, and what was dropped or noticed while loading."""

    tasks: list[Task] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.tasks)

    def __iter__(self) -> Any:
        return iter(self.tasks)

    @property
    def n_points(self) -> int:
        return sum(len(t) for t in self.tasks)

    def hash(self) -> str:
        """Hash of the contents (task names, encoded points, scores), not of file names."""
        h = hashlib.sha256()
        for t in self.tasks:
            h.update(t.name.encode())
            h.update(np.ascontiguousarray(t.X, dtype=np.float64).tobytes())
            h.update(np.ascontiguousarray(t.y, dtype=np.float64).tobytes())
        return h.hexdigest()[:16]


def load(
    sources: Sequence[Any],
    space: Space,
    sense: str,
    *,
    exclude: Sequence[str | Path] = (),
) -> History:
    """Load every history source and align it to ``space``.

    Parameters
    ----------
    sources
        ``HistorySource`` records (logbook glob, or csv with task and score columns).
    space
        The current search space.
    sense
        The spec's sense, ``"minimize"`` or ``"maximize"``.
    exclude
        Logbooks never to use as history (the search's own logbook).

    Raises
    ------
    HistoryError
        A file that does not exist, does not parse, or lacks a column.
    """
    if sense not in ("minimize", "maximize"):
        msg = f"sense must be 'minimize' or 'maximize', got {sense!r}"
        raise ValueError(msg)
    sign = 1.0 if sense == "minimize" else -1.0
    skip = {_resolved(p) for p in exclude}
    hist = History()
    names: set[str] = set()
    for src in sources:
        if getattr(src, "logbook", None):
            raw = _logbook_tasks(str(src.logbook), skip, sense, hist.warnings)
        elif getattr(src, "csv", None):
            raw = _csv_tasks(Path(src.csv), str(src.task), str(src.score), space)
        else:
            msg = f"history source {src!r} names neither a logbook nor a csv table"
            raise HistoryError(msg)
        for name, rows, origin in raw:
            task = _align(name, rows, space, sign, origin, hist.warnings)
            if task is None:
                continue
            task.name = _unique(task.name, names)
            hist.tasks.append(task)
    return hist


# --------------------------------------------------------------------------
# logbooks


def _logbook_tasks(
    pattern: str, skip: set[str], sense: str, warnings: list[str]
) -> list[tuple[str, list[tuple[dict[str, Any], float]], str]]:
    paths = sorted(glob.glob(pattern, recursive=True))
    if not paths:
        if not any(ch in pattern for ch in "*?["):
            msg = f"history logbook {pattern}: no such file"
            raise HistoryError(msg)
        warnings.append(f"history pattern {pattern} matched no file")
        return []
    out = []
    for p in paths:
        path = Path(p)
        if _resolved(path) in skip:
            continue
        try:
            data = read_regular(path, "history logbook")
        except NotRegularFile as exc:
            raise HistoryError(str(exc.args[-1])) from None
        except OSError as exc:
            msg = f"history logbook {path}: cannot read: {exc.strerror or exc}"
            raise HistoryError(msg) from None
        _check_lines(path, data)
        table = fold(parse(data)[0])
        if table.header is None:
            msg = f"history logbook {path}: line 1: no search record; not a forebear logbook"
            raise HistoryError(msg)
        if table.sense != sense:
            warnings.append(
                f"history logbook {path}: recorded as {table.sense}, read as {sense} like this spec"
            )
        name = str(table.header.get("name") or path.stem)
        rows = [(dict(t.config), t.score) for t in table if t.state == "scored"]
        out.append((name, rows, str(path)))
    return out


def _check_lines(path: Path, data: bytes) -> None:
    """A line that does not parse is an error, except a torn last line (a writer died)."""
    lines = data.split(b"\n")
    last = max((i for i, line in enumerate(lines) if line.strip()), default=-1)
    for i, line in enumerate(lines):
        if not line.strip() or i == last:
            continue
        try:
            rec = json.loads(line)
        except ValueError:
            msg = f"history logbook {path}: line {i + 1}: not a JSON record"
            raise HistoryError(msg) from None
        if not isinstance(rec, dict) or "kind" not in rec:
            msg = f"history logbook {path}: line {i + 1}: not a logbook record (no kind)"
            raise HistoryError(msg)


# --------------------------------------------------------------------------
# CSV tables


def _csv_tasks(
    path: Path, task_col: str, score_col: str, space: Space
) -> list[tuple[str, list[tuple[dict[str, Any], Any]], str]]:
    try:
        fh = open_regular(path, "history table", newline="", encoding="utf-8")
    except NotRegularFile as exc:
        raise HistoryError(str(exc.args[-1])) from None
    except OSError as exc:
        msg = f"history table {path}: cannot read: {exc.strerror or exc}"
        raise HistoryError(msg) from None
    tasks: dict[str, list[tuple[dict[str, Any], Any]]] = {}
    with fh:
        # csv.reader, not DictReader: one list per row and columns by position, half the time on 10^5 rows.
        reader = csv.reader(fh)
        try:
            header = next(reader, None)
        except (csv.Error, UnicodeDecodeError) as exc:
            msg = f"history table {path}: line 1: {exc}"
            raise HistoryError(msg) from None
        if not header:
            msg = f"history table {path}: empty file, no header row"
            raise HistoryError(msg)
        dupes = sorted({c for c in header if header.count(c) > 1})
        if dupes:
            # Two equal column names: one of them would be read silently.
            cols = ", ".join(f"{c!r} ({header.count(c)} times)" for c in dupes)
            msg = f"history table {path}: line 1: duplicate column name {cols}; rename or drop the copies"
            raise HistoryError(msg)
        for col in (task_col, score_col):
            if col not in header:
                msg = f"history table {path}: line 1: no column {col!r} (columns: {', '.join(header)})"
                raise HistoryError(msg)
        # ``forebear export`` writes a parameter as ``config.<name>`` where the bare name is one of its own
        # columns (``score``, ``state``, ...): that column, when present, is the parameter's.
        columns = {p.name: f"config.{p.name}" if f"config.{p.name}" in header else p.name for p in space.params}
        where = {c: i for i, c in enumerate(header)}
        params = [(p, where[columns[p.name]]) for p in space.params if columns[p.name] in where]
        task_i, score_i, width = where[task_col], where[score_col], len(header)
        memo: dict[tuple[str, str], Any] = {}  # (parameter, cell text) -> value: a category is matched once
        try:
            for row in reader:
                if not row:
                    continue  # a blank line
                line = reader.line_num
                if len(row) > width:
                    msg = f"history table {path}: line {line}: more cells than header columns"
                    raise HistoryError(msg)
                if len(row) < width:
                    row = row + [""] * (width - len(row))
                score = _number(row[score_i], path, line, score_col)
                config: dict[str, Any] = {}
                for p, i in params:
                    cell = row[i]
                    if cell.strip() == "":
                        continue  # treated like an absent column by _align
                    key = (p.name, cell)
                    value = memo.get(key, _MISSING)
                    if value is _MISSING:
                        value = _cell(p, cell, path, line)
                        if p.kind == "categorical":
                            memo[key] = value
                    config[p.name] = value
                tasks.setdefault(row[task_i], []).append((config, score))
        except (csv.Error, UnicodeDecodeError) as exc:
            msg = f"history table {path}: line {reader.line_num}: {exc}"
            raise HistoryError(msg) from None
    return [(name, rows, str(path)) for name, rows in tasks.items()]


_MISSING = object()


def _number(cell: str | None, path: Path, line: int, col: str) -> float:
    try:
        return float(cell)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        msg = f"history table {path}: line {line}: column {col!r}: {cell!r} is not a number"
        raise HistoryError(msg) from None


def _cell(p: Param, cell: str, path: Path, line: int) -> Any:
    """A CSV cell as a value of ``p``; a category is matched by its text."""
    text = cell.strip()
    if p.kind == "categorical":
        return _category_of_text(p, text)
    value = _number(text, path, line, p.name)
    if p.kind == "int" and math.isfinite(value) and value == int(value):
        return int(value)
    return value


def _category_of_text(p: Param, text: str) -> Any:
    """The category a CSV cell names: a text category with these characters first, then a boolean
    (``true``/``True``), then a number of the same value (``1`` matches ``1.0``)."""
    for c in p.categories:
        if isinstance(c, str) and c == text:
            return c
    lowered = text.lower()
    for c in p.categories:
        if isinstance(c, bool) and lowered == str(c).lower():
            return c
    try:
        number = float(text)
    except ValueError:
        number = None
    for c in p.categories:
        if number is not None and isinstance(c, (int, float)) and not isinstance(c, bool) and c == number:
            return c
        if not isinstance(c, (str, bool, int, float)) and str(c) == text:
            return c
    return _Unknown(text)


@dataclass(frozen=True)
class _Unknown:
    """A category the current space does not have; counted as out of bounds."""

    text: str


# --------------------------------------------------------------------------
# alignment


def _align(
    name: str,
    rows: Iterable[tuple[Mapping[str, Any], Any]],
    space: Space,
    sign: float,
    origin: str,
    warnings: list[str],
) -> Task | None:
    rows = list(rows)
    if not rows:
        warnings.append(f"history task {name!r} ({origin}): no scored trials, skipped")
        return None
    present = set().union(*(set(c) for c, _ in rows))
    for p in space.params:
        if p.name not in present and p.default is None:
            warnings.append(
                f"history task {name!r} ({origin}): lacks parameter {p.name!r} and the space gives it no default; task skipped"
            )
            return None
    configs, ys = [], []
    outside = incomplete = bad_score = 0
    for raw, score in rows:
        config: dict[str, Any] = {}
        ok = True
        for p in space.params:
            if p.name in raw:
                value = raw[p.name]
            elif p.default is not None:
                value = p.default
            else:
                incomplete += 1
                ok = False
                break
            if not p.contains(value):
                outside += 1
                ok = False
                break
            config[p.name] = value
        if not ok:
            continue
        if isinstance(score, bool) or not isinstance(score, (int, float)) or not math.isfinite(score):
            bad_score += 1
            continue
        configs.append(config)
        ys.append(sign * float(score))
    for count, what in ((outside, "outside the current space"), (incomplete, "with an empty cell and no default"), (bad_score, "without a finite score")):
        if count:
            warnings.append(f"history task {name!r} ({origin}): dropped {count} trial(s) {what}")
    if not configs:
        warnings.append(f"history task {name!r} ({origin}): nothing left after alignment, skipped")
        return None
    if len(configs) > MAX_TASK_POINTS:
        keep = _subset(name, ys)
        warnings.append(
            f"history task {name!r} ({origin}): {len(configs)} trials; {len(keep)} kept for meta-training and the warm start "
            f"(the {KEEP_BEST} best and {len(keep) - KEEP_BEST} drawn at random, seeded by the task's name)"
        )
        configs = [configs[i] for i in keep]
        ys = [ys[i] for i in keep]
    return Task(name, configs, space.encode_many(configs), np.asarray(ys, dtype=float))


def _subset(name: str, ys: Sequence[float]) -> list[int]:
    """The trials of a large task kept: the ``KEEP_BEST`` best (the warm start draws on them) and a
    uniform random draw of the rest (meta-training fits the task's whole landscape), in file order."""
    y = np.asarray(ys, dtype=float)
    order = np.argsort(y, kind="stable")
    best = order[:KEEP_BEST]
    rest = order[KEEP_BEST:]
    rng = np.random.default_rng(zlib.crc32(name.encode("utf-8")))
    drawn = rng.choice(rest, size=MAX_TASK_POINTS - KEEP_BEST, replace=False)
    return sorted(int(i) for i in np.concatenate([best, drawn]))


def _unique(name: str, taken: set[str]) -> str:
    out, i = name, 2
    while out in taken:
        out, i = f"{name}#{i}", i + 1
    taken.add(out)
    return out


def _resolved(p: str | Path) -> str:
    try:
        return str(Path(p).resolve())
    except OSError:
        return str(p)
