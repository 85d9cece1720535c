"""Commands about the workspace itself: check, windows, schema, graph, init, demo."""

from __future__ import annotations

import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import click

from runner.cli.options import Context, at_option, clock, json_option, stoppable, workers_option
from runner.cli.progress import Progress
from runner.cli.render import backfill_summary, emit_json, make_console


@click.command()
@at_option
@json_option
@click.pass_obj
def check(obj: Context, at: str | None, as_json: bool) -> None:
    """Validate every job file and the job graph; summarize each job.

    Exit status 0 when everything is valid, 2 with one line per problem otherwise.
    """
    from runner import api

    report = api.check(obj.root, at=clock(at))
    if as_json:
        emit_json(report.as_dict())
        return
    for w in report.warnings:
        click.echo(w, err=True)
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "cadence", "inputs", "output", "due windows"):
        table.add_column(col, justify="right" if col == "due windows" else "left")
    for j in report.jobs:
        table.add_row(j.name, j.cadence, "\n".join(j.inputs) or "-", j.output, str(j.windows_due))
    console = make_console()
    console.print(table)
    console.print(f"{len(report.jobs)} job(s) valid, in order: {' -> '.join(report.order) or '-'}")


@click.command()
@click.argument("job")
@click.option("--from", "lo", metavar="TIME", help="First window start to list (default: the job's start).")
@click.option("--to", "hi", metavar="TIME", help="List windows starting before TIME (default: the job's end, or now).")
@at_option
@json_option
@click.pass_obj
def windows(obj: Context, job: str, lo: str | None, hi: str | None, at: str | None, as_json: bool) -> None:
    """List JOB's windows whose start lies in [--from, --to).

    A time without an offset (2026-03-29 or 2026-03-29T06:00) is read in the job's timezone.
    """
    from runner import api

    found = api.windows(obj.root, job=job, lo=lo, hi=hi, at=clock(at))
    rows = [w.as_dict() for w in found]
    if as_json:
        emit_json(rows)
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("window (local start)", "local end", "start (UTC)", "end (UTC)", "length"):
        table.add_column(col)
    for r in rows:
        table.add_row(r["start"], r["end"], r["start_utc"], r["end_utc"], r["length"])
    console = make_console()
    console.print(table)
    console.print(f"{len(rows)} window(s) of {job}, {found.cadence}")


@click.command()
def schema() -> None:
    """Print the JSON Schema of a job file (for editors that validate YAML as you type)."""
    from runner import api

    emit_json(api.schema())


@click.command()
@click.option("--format", "fmt", type=click.Choice(["text", "dot", "mermaid"]), default="text", show_default=True,
              help="text for reading, dot for Graphviz, mermaid for Markdown.")
@click.pass_obj
def graph(obj: Context, fmt: str) -> None:
    """Print the job graph: which job reads which."""
    from runner import api

    click.echo(api.graph(obj.root, fmt=fmt), nl=False)


@click.command()
@workers_option
@click.pass_obj
def demo(obj: Context, workers: int | None) -> None:
    """Write the invented bike-share demo's data into state/landing/ and backfill the example jobs.

    Run it in the weir repository root (itself a workspace). The data is the same
    on every machine (a fixed seed); files already there and unchanged are left alone,
    so running it twice does nothing the second time.
    """
    from runner import api

    tty = sys.stdout.isatty()
    progress = Progress(tty)

    def on_plan(tasks: list[Any], replaced: int) -> bool:
        progress.start(len(tasks))
        return True

    click.echo("writing the demo's landing data into state/landing/ ...")
    try:
        with stoppable():
            done = api.demo(obj.root, now=datetime.now(UTC), ledger=obj.ledger, workers=workers,
                            on_outcome=progress.update, on_plan=on_plan)
    finally:
        progress.stop()
    summary, result = done.landing, done.backfill
    click.echo(f"landing: {summary.rides} rides ({summary.bad_rows} bad rows, {summary.late_files} late files), "
               f"{summary.dock_events} dock events; {summary.written} file(s) written, "
               f"{summary.unchanged} already in place")
    backfill_summary(result)
    click.echo("""
Next, try:
  weir plan                      what is due now, and why (nothing: the demo period is over)
  weir report                    the state of every window: open state/report.html in a browser
  weir history rides_hourly      runs, rows read, dropped, rejected and written
  weir why rides_hourly 2026-03-25T14:00   one window explained (its late input file)
Then change one line: in jobs/rides_daily.yaml, `SUM(revenue) AS revenue` -> `ROUND(SUM(revenue), 0) AS revenue`:
  weir impact                    before deploying: what would be recomputed, and how long
  weir stale                     exactly which windows are now out of date, and why
  weir why rides_daily 2026-03-25          the changed line, as a diff
  weir backfill rides_daily --downstream   recompute them (and what reads them)""")
    if result.failed:
        sys.exit(1)


@click.command()
@click.argument("directory", type=click.Path(file_okay=False, path_type=Path))
def init(directory: Path) -> None:
    """Start a new workspace in DIRECTORY: jobs/ with one commented example job, and state/."""
    from runner import api

    written = api.init(directory, now=datetime.now(UTC))
    for path in written:
        click.echo(f"wrote {path}")
    click.echo(f"next: cd {directory} && weir check")
