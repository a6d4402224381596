"""An attempt as it travels: the task pickled to a worker, and the result that comes back."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class AttemptTask:
    """Everything a worker needs for one attempt (plain data, pickled to the worker)."""

    search: str
    trial: int
    attempt: int
    config: Mapping[str, Any]
    metric: str
    call: str | None = None
    command: tuple[str, ...] | None = None
    timeout: float | None = None
    logbook: str | None = None
    lock: str = "strict"
    lock_lifetime: float = 60.0
    logs: str | None = None
    token: str | None = None
    cwd: str | None = None
    retryable: bool = False  # the value of ``retryable`` in a ``failed`` record for an objective error
    memory_limit: int | None = None  # bytes of address space for the attempt process (cluster.local.memory_limit)
    function: bytes | None = None  # a callable objective, cloudpickled (forebear.cluster.shipping)
    function_name: str | None = None  # its module:qualified.name, for messages
    topic: str | None = None  # the Dask event topic intermediate scores are sent to
    halt_event: str | None = None  # the distributed.Event that says "halt"; None when no rule halts trials


@dataclass
class AttemptResult:
    """What an attempt came to; ``records`` are already in the logbook when ``written``."""

    trial: int
    attempt: int
    outcome: str  # scored, failed, halted, timeout, cancelled, superseded (settled as lost by a controller meanwhile)
    records: list[dict[str, Any]] = field(default_factory=list)
    written: bool = False
    error: str | None = None
    seconds: float | None = None
    worker: str | None = None
    log_name: str | None = None
    log_text: str | None = None


def log_name(trial: int, attempt: int) -> str:
    """The log file of an attempt inside the search's logs folder."""
    return f"trial-{trial:05d}-attempt-{attempt}.log"
