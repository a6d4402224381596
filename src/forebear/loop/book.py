"""The loop's book-keeping: per-trial state kept in step with every record, and the search's result."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from forebear.records.logbook import Trial, TrialTable

RETRY_REASONS = ("worker", "timeout")  # lost attempts that use up a retry; restarts and interrupts do not


@dataclass
class SearchResult:
    """What a search came to: the best trial, every trial, the logbook and why it closed."""

    best: Trial | None
    trials: list[Trial]
    logbook: Path
    closed: str
    counts: dict[str, int] = field(default_factory=dict)
    sense: str = "minimize"  # the spec's objective: "minimize" or "maximize" ...
    metric: str | None = None  # ... this metric

    def to_dict(self) -> dict[str, Any]:
        return {
            self.sense: self.metric,
            "best": self.best.to_dict() if self.best else None,
            "closed": self.closed,
            "logbook": str(self.logbook),
            "counts": self.counts,
            "trials": [t.to_dict() for t in self.trials],
        }

    @classmethod
    def from_table(cls, table: TrialTable, logbook: Path, closed: str) -> SearchResult:
        return cls(table.best(), list(table), logbook, closed, table.counts(), table.sense, table.metric)

    def _repr_html_(self) -> str:
        """The result as Jupyter shows it: why it closed, counts, best trial, trials."""
        from forebear.records import html

        finished = sum(1 for t in self.trials if t.terminal)
        return "".join([
            html.STYLE,
            f"<div><strong>search result</strong> &middot; closed ({html.esc(self.closed)}) &middot; "
            f"{html.esc(self.sense)} {html.esc(self.metric or '?')} &middot; logbook <code>{html.esc(self.logbook)}</code></div>",
            html.counts_table(self.counts, finished),
            html.best_table(self.best, self.metric, self.sense),
            html.trials_table(self.trials, metric=self.metric),
        ])


@dataclass
class Book:
    """Per-trial state the loop needs, updated from every record it writes or receives."""

    configs: dict[int, dict[str, Any]] = field(default_factory=dict)
    state: dict[int, str] = field(default_factory=dict)
    scores: dict[int, float] = field(default_factory=dict)
    # Halted trials' last intermediate scores: the proposer sees them as if final, which measured
    # better than leaving them out (docs/engine.md, "Halted trials and the surrogate").
    partial: dict[int, float] = field(default_factory=dict)
    attempts: dict[int, int] = field(default_factory=dict)
    charged: dict[int, int] = field(default_factory=dict)
    errors: dict[int, str] = field(default_factory=dict)
    rounds: int = 0

    @classmethod
    def from_table(cls, table: TrialTable) -> Book:
        book = cls()
        for t in table:
            book.configs[t.trial] = dict(t.config)
            book.state[t.trial] = t.state
            if t.state == "scored" and t.score is not None:
                book.scores[t.trial] = float(t.score)
            elif t.state == "halted" and t.score is not None:
                book.partial[t.trial] = float(t.score)
            book.attempts[t.trial] = max((a.attempt for a in t.attempts), default=0)
            # An attempt lost before it started (no started record) used up no retry.
            charged = sum(1 for a in t.attempts if a.outcome == "lost" and a.detail in RETRY_REASONS and a.started_at is not None)
            charged += sum(1 for a in t.attempts[:-1] if a.outcome == "failed")
            book.charged[t.trial] = charged
            if t.error:
                book.errors[t.trial] = t.error
            book.rounds = max(book.rounds, t.round + 1)
        return book

    def count(self, state: str) -> int:
        return sum(1 for s in self.state.values() if s == state)

    @property
    def finished(self) -> int:
        return sum(1 for s in self.state.values() if s in ("scored", "failed", "halted"))
