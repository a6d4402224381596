"""``forebear export``: the trial table of a logbook as CSV rows, and the checks on the file written."""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

from forebear.face.output import Exit
from forebear.records.files import check_regular, write_atomic
from forebear.records.logbook import TrialTable, is_logbook

EXPORT_HEAD = ("trial", "state", "score")
EXPORT_TAIL = ("seconds", "attempts", "round", "source", "model", "error")


def export_rows(table: TrialTable) -> tuple[list[str], list[list[Any]]]:
    """The header and rows of ``forebear export``: export's own columns never share a name with a parameter."""
    params: dict[str, None] = {}
    metrics: dict[str, None] = {}
    for t in table:
        params.update(dict.fromkeys(t.config))
        metrics.update(dict.fromkeys(t.metrics))
    own = set(EXPORT_HEAD) | set(EXPORT_TAIL)
    # Export's own names hold no dot; a prefixed name always does: the two sets cannot meet.
    columns = [f"config.{p}" if p in own or "." in p else p for p in params]
    header = [*EXPORT_HEAD, *columns, *[f"metric.{m}" for m in metrics], *EXPORT_TAIL]
    rows = [
        [
            t.trial, t.state, "" if t.score is None else t.score,
            *[t.config.get(p, "") for p in params],
            *[t.metrics.get(m, "") for m in metrics],
            "" if t.seconds is None else t.seconds, len(t.attempts), t.round, t.source, t.model or "", t.error or "",
        ]
        for t in table
    ]
    return header, rows


def write_csv(table: TrialTable, csv_path: str) -> None:
    """Write ``table`` to ``csv_path`` atomically (a reader never sees half a file)."""
    header, rows = export_rows(table)

    def write(fh: Any) -> None:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)

    write_atomic(csv_path, write, newline="")


def check_target(logbook: Path, target: Path, replace: bool) -> None:
    """Refuse to write over a forebear logbook (the one read included), or over any file without ``--replace``."""
    if not target.exists():
        return
    check_regular(target, "export target")
    if (logbook.exists() and target.samefile(logbook)) or is_logbook(target):
        raise Exit(f"{target} is a forebear logbook; export never writes over one (choose another file name)")
    if not replace:
        raise Exit(f"{target} already exists; pass --replace to write over it")
