"""What a search stands at, as ``forebear status --json`` prints it.

One function builds the payload for the command line and for the live search
page's ``/forebear/status.json`` on the Dask dashboard, so the two always agree.
"""

from __future__ import annotations

from typing import Any

from forebear.records.logbook import TrialTable


def best_payload(table: TrialTable) -> dict[str, Any] | None:
    """The best trial as ``forebear best --json`` prints it, or None when nothing scored."""
    best = table.best()
    if best is None:
        return None
    return {
        "trial": best.trial,
        "score": best.score,
        "config": best.config,
        "metrics": best.metrics,
        table.sense: table.metric,
        "seconds": best.seconds,
        "attempts": len(best.attempts),
    }


def status_payload(table: TrialTable, logbook: str) -> dict[str, Any]:
    """Counts, best trial, running attempts and closing reason of the search folded in ``table``."""
    header = table.header or {}
    return {
        "logbook": logbook,
        "search": header.get("name"),
        table.sense: table.metric,
        "trials": len(table),
        "counts": table.counts(),
        "finished": table.finished,
        "best": best_payload(table),
        "closed": (table.closed or {}).get("reason"),
        "skipped_lines": table.skipped,
        "invalid_records": len(table.invalid),
        "bad_lines": table.bad_lines,
        "running": [
            {"trial": t.trial, "attempt": t.last_attempt, "worker": t.attempts[-1].worker if t.attempts else None}
            for t in table.by_state("running")
        ],
    }
