"""The `weir` command: parse arguments, call `runner.api`, render. Nothing else.

Heavy libraries are imported inside commands so that start-up stays quick.
Every user error becomes one line on stderr and a non-zero exit, never a
traceback (set WEIR_DEBUG=1 to see one for an internal error).
"""

from __future__ import annotations

import json
import os
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import click

from runner import __version__


class Context:
    """Options shared by every command."""

    def __init__(self, root: Path, ledger: str | None):
        self.root = root
        self.ledger = ledger


def _now(at: str | None) -> datetime:
    from runner.errors import UsageError
    from runner.timeutil import BadValue, parse_instant

    if at is None:
        return datetime.now(UTC)
    try:
        return parse_instant(at, UTC)
    except BadValue as exc:
        raise UsageError(f"--at: {exc} (without an offset it is read as UTC)") from None


def _emit_json(data: Any) -> None:
    click.echo(json.dumps(data, indent=2, ensure_ascii=False, default=str))


def _console(err: bool = False):
    """A rich console; off a terminal it never truncates cells (output may be piped)."""
    from rich.console import Console

    stream = sys.stderr if err else sys.stdout
    width = None if stream.isatty() else 1000
    return Console(highlight=False, soft_wrap=False, width=width, stderr=err)


at_option = click.option(
    "--at", metavar="TIME",
    help="Pretend the clock says TIME (ISO 8601; no offset means UTC). Default: now.",
)
json_option = click.option("--json", "as_json", is_flag=True, help="Print JSON for scripts.")


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="weir")
@click.option("-C", "--workspace", "root", type=click.Path(file_okay=False, path_type=Path), default=".",
              show_default=True, help="The workspace folder (holds jobs/ and state/).")
@click.option("--ledger", envvar="WEIR_LEDGER", metavar="URL",
              help="Ledger database URL (SQLAlchemy). Default: sqlite:///state/ledger.sqlite in the workspace. "
                   "Also WEIR_LEDGER.")
@click.pass_context
def cli(ctx: click.Context, root: Path, ledger: str | None) -> None:
    """weir runs batch jobs over time windows, so that re-runs replace instead of double,
    and keeps a ledger that says which windows are done, stale, or missing, and why."""
    ctx.obj = Context(root=root, ledger=ledger)


@cli.command()
@at_option
@json_option
@click.pass_obj
def check(obj: Context, at: str | None, as_json: bool) -> None:
    """Validate every job file and the job graph; summarize each job.

    Exit status 0 when everything is valid, 2 with one line per problem otherwise.
    """
    from runner import api

    report = api.check(obj.root, _now(at))
    if as_json:
        _emit_json({"ok": True, "jobs": [j.as_dict() for j in report.jobs], "warnings": report.warnings})
        return
    for w in report.warnings:
        click.echo(w, err=True)
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "cadence", "inputs", "output", "due windows"):
        table.add_column(col, justify="right" if col == "due windows" else "left")
    for j in report.jobs:
        table.add_row(j.name, j.cadence, "\n".join(j.inputs) or "-", j.output, str(j.windows_due))
    console = _console()
    console.print(table)
    console.print(f"{len(report.jobs)} job(s) valid, in order: {' -> '.join(report.order) or '-'}")


@cli.command()
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

    ws = api.workspace(obj.root)
    rows = api.windows(ws, job, api.parse_bound(ws, job, lo, "--from"), api.parse_bound(ws, job, hi, "--to"),
                       _now(at))
    if as_json:
        _emit_json(rows)
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("window (local start)", "local end", "start (UTC)", "end (UTC)", "length"):
        table.add_column(col)
    for r in rows:
        table.add_row(r["start"], r["end"], r["start_utc"], r["end_utc"], r["length"])
    console = _console()
    console.print(table)
    console.print(f"{len(rows)} window(s) of {job}, {ws.cadence(job).describe()}")


@cli.command()
def schema() -> None:
    """Print the JSON Schema of a job file (for editors that validate YAML as you type)."""
    from runner.spec import job_schema

    _emit_json(job_schema())


@cli.command()
@click.option("--format", "fmt", type=click.Choice(["text", "dot", "mermaid"]), default="text", show_default=True,
              help="text for reading, dot for Graphviz, mermaid for Markdown.")
@click.pass_obj
def graph(obj: Context, fmt: str) -> None:
    """Print the job graph: which job reads which."""
    from runner import api
    from runner.graph import render

    ws = api.workspace(obj.root)
    click.echo(render(ws.graph, ws.jobs, fmt), nl=False)


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the CLI, turning user errors into one line and an exit status."""
    from runner.errors import SpecProblems, WeirError

    try:
        cli.main(args=argv, prog_name="weir", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("aborted", err=True)
        sys.exit(130)
    except click.ClickException as exc:
        exc.show()
        sys.exit(2 if exc.exit_code not in (0, 1) else exc.exit_code)
    except click.exceptions.Exit as exc:
        sys.exit(exc.exit_code)
    except SpecProblems as exc:
        for p in exc.problems:
            click.echo(p.render(), err=True)
        n = sum(1 for p in exc.problems if p.severity == "error")
        click.echo(f"{n} problem(s) found", err=True)
        sys.exit(exc.exit_code)
    except WeirError as exc:
        click.echo(f"weir: {exc}", err=True)
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        click.echo("interrupted", err=True)
        sys.exit(130)
    except Exception as exc:  # an internal error: one line, details on request
        if os.environ.get("WEIR_DEBUG"):
            raise
        click.echo(f"weir: internal error: {type(exc).__name__}: {exc} (set WEIR_DEBUG=1 for a traceback)",
                   err=True)
        sys.exit(70)
