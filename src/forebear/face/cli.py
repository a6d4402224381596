"""The ``forebear`` command line (click): parsing and printing only.

Output for people goes to stderr; ``--json`` output for programs goes to
stdout. Exit status: 0 success, 1 the search ran but nothing scored, 2 bad
input, 128 + the signal when ``run`` stopped at once on a second Ctrl-C or
SIGTERM (130, 143). No traceback reaches the user unless ``--debug`` is given
(:mod:`forebear.face.output`). What ``export`` writes is :mod:`forebear.face.export`.
"""

from __future__ import annotations

import importlib
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from forebear.face import export as export_mod
from forebear.face.output import (
    EXIT_INTERRUPTED,
    EXIT_NOTHING_SCORED,
    Exit,
    emit_json,
    guarded,
    say,
    skipped_note,
)
from forebear.records.logbook import Logbook, TrialTable, check_header
from forebear.records.status import best_payload, status_payload


def _optional(module: str, what: str) -> Any:
    """Import a module that may not have landed yet; a clear message if it has not."""
    try:
        return importlib.import_module(module)
    except ModuleNotFoundError as exc:
        if exc.name and exc.name.startswith("forebear"):
            raise Exit(f"{what} is not available yet in this build") from None
        raise Exit(f"{what} needs the package {exc.name!r}; install it (e.g. pip install 'forebear[report]')") from None


def _table(logbook: str) -> TrialTable:
    path = Path(logbook)
    if not path.exists():
        raise Exit(f"logbook {logbook} does not exist")
    if path.is_dir():
        raise Exit(f"{logbook} is a folder, not a logbook file")
    table = Logbook(path).fold()
    check_header(table, path)
    if table.header is None and not table.trials:
        raise Exit(f"logbook {logbook} holds no forebear records ({table.skipped} unreadable lines)")
    return table


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.option("--debug", is_flag=True, help="Show tracebacks instead of one-line errors.")
@click.version_option(package_name="forebear")
@click.pass_context
def main(ctx: click.Context, debug: bool) -> None:
    """forebear: batched hyperparameter search on Dask that learns from earlier searches."""
    ctx.obj = {"debug": debug}


# -- run / check ------------------------------------------------------------


@main.command()
@click.argument("spec", type=click.Path(dir_okay=False))
@click.option("--extend", is_flag=True, help="Resume with a larger budget than the logbook's search had.")
@click.option("--cancel-running", is_flag=True, help="On Ctrl-C, kill running attempts instead of waiting for them.")
@click.option("--detach", is_flag=True, help="Run the controller inside the remote scheduler (needs cluster.address).")
@click.option("--quiet", "-q", is_flag=True, help="No progress display.")
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON on stdout.")
@guarded
def run(spec: str, extend: bool, cancel_running: bool, detach: bool, quiet: bool, as_json: bool) -> None:
    """Run (or resume) the search defined by SPEC."""
    from forebear.core import spec as spec_mod

    loaded = spec_mod.load(spec)
    if detach:
        # Detached: the controller runs inside the remote scheduler (the plugin), not here.
        plugin = _optional("forebear.cluster.plugin", "forebear run --detach")
        result = plugin.detach(loaded, extend=extend, quiet=quiet)
    else:
        controller = _optional("forebear.loop.controller", "forebear run")
        from forebear.face.progress import Progress
        from forebear.loop.stopping import StopNow

        try:
            result = controller.Controller(loaded, extend=extend, quiet=quiet, cancel_running=cancel_running, display=Progress).run()
        except StopNow as exc:
            raise Exit(
                f"stopped at once on {exc.why}: running attempts were recorded as lost and the logbook closed; "
                f"run the same command to resume",
                exc.exit_status,
            ) from None
        except KeyboardInterrupt:
            raise Exit("interrupted before the search loop started; nothing was recorded as lost; run the same command to resume", EXIT_INTERRUPTED) from None
    if as_json:
        emit_json(result.to_dict())
    if result.best is None and not detach:
        raise Exit("the search ran but no trial scored", EXIT_NOTHING_SCORED)


@main.command()
@click.argument("spec", type=click.Path(dir_okay=False))
@guarded
def check(spec: str) -> None:
    """Validate SPEC and print a short summary of its space and budget."""
    from forebear.core import spec as spec_mod

    s = spec_mod.load(spec)
    b = s.budget
    obj = s.objective
    what = obj.call if obj.call else " ".join(obj.command or ())
    say(f"spec {spec}: ok - search {s.name!r}")
    say(f"  objective  {what}  ({obj.sense} {obj.metric})")
    say(f"  space      {len(s.space)} parameters, {s.space.dim} encoded dimensions")
    for p in s.space.params:
        if p.kind == "categorical":
            rng = "{" + ", ".join(map(str, p.categories)) + "}"
        else:
            rng = f"[{p.low:g}, {p.high:g}]" + (" log" if p.log else "")
        dflt = f"  default {p.default}" if p.default is not None else ""
        say(f"    {p.name:<20} {p.kind:<12} {rng}{dflt}")
    limits = [f"{b.trials} trials", f"batch {b.batch}", f"concurrency {b.concurrency}", f"retries {b.retries}"]
    if b.trial_timeout:
        limits.append(f"trial timeout {b.trial_timeout:g}s")
    if b.wall_time:
        limits.append(f"wall time {b.wall_time:g}s")
    say(f"  budget     {', '.join(limits)}")
    say(f"  history    {len(s.history)} source{'s' if len(s.history) != 1 else ''}" + ("" if s.history else " (cold start)"))
    say(f"  cluster    {s.cluster.kind}" + (f" {s.cluster.address}" if s.cluster.address else ""))
    say(f"  logbook    {s.logbook}")
    for note in s.notes:
        say(f"  note: {note}")


# -- logbook commands -------------------------------------------------------


@main.command()
@click.argument("logbook", type=click.Path(dir_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print the status as JSON on stdout.")
@guarded
def status(logbook: str, as_json: bool) -> None:
    """Show the state of the search recorded in LOGBOOK (also while it runs)."""
    table = _table(logbook)
    counts = table.counts()
    best = table.best()
    header = table.header or {}
    payload = status_payload(table, logbook)
    if as_json:
        emit_json(payload)
        return
    say(f"search {header.get('name', '?')}  ({logbook})")
    say("  " + "  ".join(f"{k} {v}" for k, v in counts.items()) + f"  (finished {table.finished})")
    if best:
        say(f"  best: trial {best.trial}  {table.metric or 'score'} = {best.score:.6g}  {json.dumps(best.config)}")
    else:
        say("  best: none scored yet")
    if table.closed:
        say(f"  closed: {table.closed.get('reason')}")
    elif table.trials:
        say("  not closed (running, or the controller stopped without closing)")
    note = skipped_note(table)
    if note:
        say(f"  {note}")


def _best_payload(table: TrialTable) -> dict[str, Any]:
    payload = best_payload(table)
    assert payload is not None
    return payload


@main.command()
@click.argument("logbook", type=click.Path(dir_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print the best trial as JSON on stdout.")
@guarded
def best(logbook: str, as_json: bool) -> None:
    """Print the best configuration recorded in LOGBOOK."""
    table = _table(logbook)
    note = skipped_note(table)
    if note:
        say(note)
    if table.best() is None:
        if as_json:
            emit_json(None)
        raise Exit(f"logbook {logbook}: no trial has scored yet", EXIT_NOTHING_SCORED)
    payload = _best_payload(table)
    if as_json:
        emit_json(payload)
        return
    say(f"best trial {payload['trial']}: {table.metric or 'score'} = {payload['score']:.6g} ({table.sense})")
    for k, v in payload["config"].items():
        click.echo(f"{k}: {v}")


@main.command()
@click.argument("logbook", type=click.Path(dir_okay=False))
@click.option("--csv", "csv_path", required=True, type=click.Path(dir_okay=False), help="The CSV file to write.")
@click.option("--replace", is_flag=True, help="Write over FILE when it exists (never over a forebear logbook).")
@guarded
def export(logbook: str, csv_path: str, replace: bool) -> None:
    """Write the trial table of LOGBOOK as a CSV file.

    Columns: ``trial``, ``state``, ``score``, one per parameter, ``metric.<name>`` per metric,
    then ``seconds``, ``attempts``, ``round``, ``source``, ``model``, ``error``. A parameter whose
    name is one of these columns or holds a dot is written as ``config.<name>``, so no two
    columns share a name.
    """
    export_mod.check_target(Path(logbook), Path(csv_path), replace)
    table = _table(logbook)
    export_mod.write_csv(table, csv_path)
    say(f"wrote {len(table)} trials to {csv_path}")


# -- report / demo / bench --------------------------------------------------


@main.command()
@click.argument("logbook", type=click.Path(dir_okay=False))
@click.option("-o", "--out", "out_dir", required=True, type=click.Path(file_okay=False), help="Folder for report.html and PNGs.")
@guarded
def report(logbook: str, out_dir: str) -> None:
    """Write report.html and plots for LOGBOOK into a folder."""
    table = _table(logbook)
    mod = _optional("forebear.face.report", "forebear report")
    path = mod.write_report(table, Path(out_dir), logbook=Path(logbook))
    say(f"report: {path}")


@main.command()
@click.option("--folder", default="forebear-demo", show_default=True, type=click.Path(file_okay=False), help="Where the demo writes its files.")
@click.option("--quiet", "-q", is_flag=True, help="No progress display.")
@guarded
def demo(folder: str, quiet: bool) -> None:
    """Run a self-contained demo search on the embedded cluster (a few minutes)."""
    mod = _optional("forebear.face.demo", "forebear demo")
    code = mod.main(Path(folder), quiet=quiet)
    if code:
        raise Exit("", code)


@main.group()
def bench() -> None:
    """Benchmarks that print figures (quality, overhead, logbook, proposal, faults, stopping)."""


def _bench_command(name: str, help_text: str, options: list[Callable[[Any], Any]]) -> None:
    def command(**kwargs: Any) -> None:
        as_json = kwargs.pop("as_json", False)
        mod = _optional(f"forebear.bench.{name}", f"forebear bench {name}")
        result = mod.main(**kwargs)
        if as_json:
            emit_json(result)
        else:
            for k, v in result.items():
                say(f"{k}: {v}")

    command.__name__ = name
    command.__doc__ = help_text
    fn: Any = guarded(command)
    for opt in reversed(options):
        fn = opt(fn)
    fn = click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON on stdout.")(fn)
    bench.command(name=name)(fn)


_bench_command("logbook", "Logbook fold and append throughput.", [])
_bench_command("proposal", "Proposal latency and meta-training time.", [])
_bench_command("overhead", "Worker utilisation and per-trial overhead on a local cluster.", [])
_bench_command("quality", "Regret on transfer task families (leave one task out).", [
    click.option("--smoke", is_flag=True, help="One family, 3 held-out tasks, 2 seeds, 15 trials."),
    click.option("--sync", is_flag=True, help="Synchronous rounds instead of the asynchronous mode (the default)."),
    click.option("--live", is_flag=True, help="Each search through forebear run on an embedded cluster, in real time "
                 "(forebear with and without history, random search)."),
    click.option("--out", "out_dir", default=None, type=click.Path(file_okay=False), help="Folder for plots and tables."),
])
_bench_command("stopping", "Worker time the stopping rules save on learning-curve families.", [
    click.option("--families", default="mlp,pow3", show_default=True, help="Comma-separated: mlp (real training), pow3 (analytic)."),
    click.option("--runs", default=10, show_default=True, type=click.IntRange(1, 1000), help="Held-out tasks (runs) per family."),
    click.option("--trials", default=32, show_default=True, type=click.IntRange(2, 10000), help="Trials of the no-stopping search."),
    click.option("--first-run", default=0, show_default=True, type=click.IntRange(0, 10**6), help="First run (held-out task and stream seed)."),
    click.option("--min-step", default=3, show_default=True, type=click.IntRange(1, 10**6), help="The first rung (both rules)."),
    click.option("--eta", default=3.0, show_default=True, type=click.FloatRange(1.0, None, min_open=True),
                 help="The reduction factor (both rules)."),
    click.option("--threshold", default=0.05, show_default=True, type=click.FloatRange(0.0, 1.0, min_open=True, max_open=True),
                 help="The history rule's halting probability."),
    click.option("--treatments", is_flag=True, help="Also: halted trials left out of, or shown as final to, the proposer."),
    click.option("--out", default=None, type=click.Path(dir_okay=False), help="Also write the figures to this JSON file."),
])
_bench_command("faults", "Fault-injection campaign against a loopback cluster.", [
    click.option("--short", is_flag=True, help="The short version that CI runs."),
])
