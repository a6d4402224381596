"""How the ``forebear`` commands print and exit: one-line errors, exit statuses, JSON on stdout.

Output for people goes to stderr; ``--json`` output for programs goes to
stdout. :func:`guarded` turns the errors a user can cause into one line and an
exit status; a traceback only with ``--debug``.
"""

from __future__ import annotations

import functools
import json
import math
import sys
from collections.abc import Callable
from typing import Any

import click

from forebear.records.files import NotRegularFile
from forebear.records.logbook import LogbookBusy, LogbookError, LogbookMismatch, TrialTable

EXIT_OK, EXIT_NOTHING_SCORED, EXIT_BAD_INPUT = 0, 1, 2
EXIT_INTERRUPTED = 130  # 128 + SIGINT, the shell's convention: stopped at once (143 after SIGTERM)


class Exit(Exception):
    """A clean stop with a message for stderr and an exit status."""

    def __init__(self, message: str, code: int = EXIT_BAD_INPUT) -> None:
        super().__init__(message)
        self.code = code


def say(message: str = "") -> None:
    click.echo(message, err=True)


def emit_json(payload: Any) -> None:
    """Standard JSON on stdout: a non-finite number (from a hand-edited logbook) becomes null, never NaN or Infinity."""
    click.echo(json.dumps(_finite(payload), indent=2, default=str, allow_nan=False))


def _finite(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


def skipped_note(table: TrialTable) -> str | None:
    """One line on what the fold skipped (unreadable lines, records with wrong field types), with line numbers."""
    parts = []
    if table.skipped:
        parts.append(f"{table.skipped} unreadable line(s)")
    if table.invalid:
        parts.append(f"{len(table.invalid)} record(s) with wrong field types ({table.invalid[0][1]})")
    if not parts:
        return None
    lines = table.bad_lines
    where = f" at line(s) {', '.join(map(str, lines[:10]))}{', ...' if len(lines) > 10 else ''}" if lines else ""
    return f"note: {' and '.join(parts)} skipped{where}"


def guarded(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Turn expected errors into one line and an exit status (tracebacks only with --debug)."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        debug = bool((click.get_current_context().find_root().obj or {}).get("debug"))
        try:
            return fn(*args, **kwargs)
        except Exit as exc:
            if str(exc):
                say(f"forebear: {exc}")
            sys.exit(exc.code)
        except click.exceptions.Exit:
            raise
        except (click.ClickException, click.Abort):
            raise
        except Exception as exc:
            if debug:
                raise
            from forebear.core.spec import SpecError

            if isinstance(exc, SpecError):
                for line in exc.errors:
                    say(f"error: {line}")
                say(f"forebear: the spec has {len(exc.errors)} error{'s' if len(exc.errors) != 1 else ''}; nothing was written")
            elif isinstance(exc, (LogbookBusy, LogbookMismatch, LogbookError, NotRegularFile)):
                say(f"forebear: {exc.args[-1] if exc.args else exc}")
            elif isinstance(exc, (ValueError, TypeError, OSError, ImportError, LookupError)):
                say(f"forebear: {type(exc).__name__}: {exc}".replace("\n", " "))
            else:
                say(f"forebear: unexpected {type(exc).__name__}: {exc} (rerun with --debug for the traceback)".replace("\n", " "))
            sys.exit(EXIT_BAD_INPUT)

    return wrapper
