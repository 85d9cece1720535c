"""Commands that run windows: run, backfill, tick, serve."""

from __future__ import annotations

import sys
from datetime import UTC, datetime
from typing import Any

import click

from runner.cli.options import Context, at_option, clock, json_option, stoppable, workers_option
from runner.cli.progress import Progress
from runner.cli.render import (
    backfill_summary,
    emit_json,
    exit_if_unplanned,
    outcome_line,
    tick_line,
)
from runner.core.states import Status


@click.command()
@click.argument("job")
@click.option("--window", "window_id", required=True, metavar="ID",
              help="The window's id: its start in ISO 8601 (no offset means the job's timezone).")
@click.option("--force", is_flag=True,
              help="Run even when the window is current. REPLACES the window's existing output.")
@json_option
@click.pass_obj
def run(obj: Context, job: str, window_id: str, force: bool, as_json: bool) -> None:
    """Run one window of JOB, unless it is already current (same fingerprint).

    A re-run replaces the window's output atomically; it never adds to it.
    """
    from runner import api

    if force and not as_json:
        click.echo(f"--force: the output of {job} {window_id} will be replaced if it exists.", err=True)
    with stoppable():
        outcome = api.run(obj.root, job=job, window=window_id, ledger=obj.ledger, force=force)
    if as_json:
        emit_json(outcome.as_dict())
    else:
        click.echo(outcome_line(outcome))
    if outcome.status == Status.FAILED:
        sys.exit(1)


@click.command()
@click.argument("jobs", nargs=-1, required=True)
@click.option("--from", "lo", metavar="TIME", help="First window start (default: each job's start).")
@click.option("--to", "hi", metavar="TIME", help="Run windows starting before TIME (default: all due windows).")
@click.option("--downstream", is_flag=True, help="Also run the jobs that read these jobs, over the affected range.")
@workers_option
@click.option("--force", is_flag=True,
              help="Recompute windows even when current. REPLACES their existing outputs (says how many first).")
@click.option("--yes", is_flag=True, help="Do not ask before --force replaces outputs.")
@click.option("--dry-run", is_flag=True, help="List the windows that would be considered; run nothing.")
@at_option
@json_option
@click.pass_obj
def backfill(obj: Context, jobs: tuple[str, ...], lo: str | None, hi: str | None, downstream: bool,
             workers: int | None, force: bool, yes: bool, dry_run: bool, at: str | None, as_json: bool) -> None:
    """Run every due window of JOBS in [--from, --to) that is not already current.

    Safe to repeat and to resume: windows done with the current fingerprint are
    skipped, so a second run does nothing and an interrupted one picks up where
    it stopped. Jobs run in dependency order; windows of one job run in parallel,
    except carry-forward chains, which run in time order. Exit status 1 when any
    window failed.
    """
    from runner import api

    now = clock(at)
    if dry_run:
        preview = api.preview_backfill(obj.root, jobs=list(jobs), lo=lo, hi=hi, at=now, downstream=downstream)
        shown = preview.as_dict()
        rows = shown["windows"]
        if as_json:
            emit_json(shown)
            return
        for r in rows:
            click.echo(f"{r['job']} {r['window']}  {r['reason']}")
        click.echo(f"{len(rows)} window(s) would be considered (current ones are skipped when run)")
        for job, n in preview.not_due.items():
            click.echo(f"{job}: {n} window(s) in range are not due yet")
        return
    tty = sys.stdout.isatty() and not as_json
    progress = Progress(tty, quiet=as_json)

    def on_plan(tasks: list[Any], replaced: int) -> bool:
        if force and replaced:
            msg = (f"--force: {replaced} existing output(s) will be REPLACED by recomputed ones "
                   f"({len(tasks)} window(s) in all).")
            click.echo(msg, err=True)
            if not yes and sys.stdin.isatty() and not click.confirm("Go on?", default=False, err=True):
                click.echo("nothing was run", err=True)
                return False
        progress.start(len(tasks))
        return True

    try:
        with stoppable():
            result = api.backfill(obj.root, jobs=list(jobs), lo=lo, hi=hi, at=now, ledger=obj.ledger,
                                  downstream=downstream, workers=workers, force=force, on_outcome=progress.update,
                                  on_plan=on_plan)
    finally:
        progress.stop()
    if as_json:
        emit_json(result.as_dict())
    else:
        backfill_summary(result)
    if result.failed:
        sys.exit(1)


@click.command()
@at_option
@workers_option
@json_option
@click.pass_obj
def tick(obj: Context, at: str | None, workers: int | None, as_json: bool) -> None:
    """Plan, then run what is due, oldest first (at most max_catch_up windows per job).

    One tick runs at a time per workspace: a second one exits at once with
    status 0, so `* * * * * cd WORKSPACE && weir tick` is safe even when a tick
    outlasts a minute. Exit status 1 when a window failed.
    """
    from runner import api

    now = clock(at)
    with stoppable():
        result = api.tick(obj.root, at=now, ledger=obj.ledger, workers=workers)
    if as_json:
        emit_json(result.as_dict())
    else:
        click.echo(tick_line(result, now))
        for o in result.outcomes:
            if o.status in (Status.DONE, Status.FAILED):
                click.echo("  " + outcome_line(o))
    exit_if_unplanned(result.unplanned)
    if result.failed:
        sys.exit(1)


@click.command()
@click.option("--every", "every", default="60s", show_default=True, metavar="DURATION",
              help="Time between ticks (30s, 1m, 5m, ...).")
@workers_option
@click.pass_obj
def serve(obj: Context, every: str, workers: int | None) -> None:
    """Tick forever (for a service manager), one log line per tick.

    SIGTERM or SIGINT stops it cleanly between windows: a window being run is
    finished first, nothing new starts.
    """
    import signal

    from runner import api
    from runner.errors import UsageError
    from runner.model.timeutil import BadValue, format_utc, parse_duration

    try:
        interval = parse_duration(every).total_seconds()
    except BadValue as exc:
        raise UsageError(f"--every: {exc}") from None
    if interval <= 0:
        raise UsageError("--every must be positive")
    stop = {"flag": False}

    def handler(signum: int, _frame: Any) -> None:
        stop["flag"] = True
        click.echo(f"{format_utc(datetime.now(UTC))} stopping after the current window (signal {signum})", err=True)

    def on_error(message: str, at: datetime | None) -> None:
        click.echo(f"{format_utc(at)} {message}" if at is not None else message, err=True)

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)
    api.serve(obj.root, interval=interval, ledger=obj.ledger, workers=workers or 1,
              should_stop=lambda: stop["flag"], on_tick=lambda result, now: click.echo(tick_line(result, now)),
              on_error=on_error)
    click.echo(f"{format_utc(datetime.now(UTC))} stopped")
