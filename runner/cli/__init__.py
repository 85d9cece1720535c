"""The `weir` command: parse arguments, call `runner.api`, render. Nothing else.

The group and the entry point are here; the commands live by theme in
`workspace` (check, windows, schema, graph, init, demo), `running` (run,
backfill, tick, serve), `planning` (plan, stale, why, impact) and `inspecting`
(history, verify, advise, report); `render` and `progress` draw their output.

Heavy libraries are imported inside commands so that start-up stays quick.
Every user error becomes one line on stderr and a non-zero exit, never a
traceback (set WEIR_DEBUG=1 to see one for an internal error).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import click

from runner import __version__
from runner.cli import inspecting, planning, running, workspace
from runner.cli.options import Context


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="weir")
@click.option("-C", "--workspace", "root", type=click.Path(file_okay=False, path_type=Path), default=".",
              show_default=True, help="The workspace folder (holds jobs/ and state/).")
@click.option("--ledger", envvar="WEIR_LEDGER", metavar="URL",
              help="Ledger database URL (SQLAlchemy); a relative SQLite path is relative to the workspace. "
                   "Default: sqlite:///state/ledger.sqlite in the workspace. Also WEIR_LEDGER.")
@click.pass_context
def cli(ctx: click.Context, root: Path, ledger: str | None) -> None:
    """weir runs batch jobs over time windows, so that re-runs replace instead of double,
    and keeps a ledger that says which windows are done, stale, or missing, and why."""
    ctx.obj = Context(root=root, ledger=ledger)


for _command in (workspace.check, workspace.windows, workspace.schema, workspace.graph, running.run,
                 running.backfill, inspecting.history, planning.plan, running.tick, running.serve, planning.stale,
                 planning.why, planning.impact, inspecting.verify, inspecting.advise, workspace.demo,
                 workspace.init, inspecting.report):
    cli.add_command(_command)


def main(argv: list[str] | None = None) -> None:
    """Entry point: run the CLI, turning user errors into one line and an exit status."""
    from runner.errors import Interrupted, SpecProblems, WeirError

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
    except Interrupted as exc:
        import signal

        click.echo(f"weir: interrupted by {signal.Signals(exc.signum).name}: windows being run were stopped, "
                   "their runs recorded abandoned and this run's claims released", err=True)
        sys.exit(128 + exc.signum)
    except KeyboardInterrupt:
        click.echo("interrupted", err=True)
        sys.exit(130)
    except Exception as exc:  # an internal error: one line, details on request
        if os.environ.get("WEIR_DEBUG"):
            raise
        click.echo(f"weir: internal error: {type(exc).__name__}: {exc} (set WEIR_DEBUG=1 for a traceback)",
                   err=True)
        sys.exit(70)
