"""Drawing results for people: tables, outcome lines, ranges of windows, and JSON for scripts."""

from __future__ import annotations

import json
import sys
from datetime import datetime
from typing import Any

import click

from runner.core.states import Status


def emit_json(data: Any) -> None:
    click.echo(json.dumps(data, indent=2, ensure_ascii=False, default=str))


def make_console(err: bool = False):
    """A rich console; off a terminal it never truncates cells (output may be piped)."""
    from rich.console import Console

    stream = sys.stderr if err else sys.stdout
    width = None if stream.isatty() else 1000
    return Console(highlight=False, soft_wrap=False, width=width, stderr=err)


def outcome_line(o: Any) -> str:
    rows = f" {o.rows_written} rows" if o.rows_written is not None else ""
    took = f" {o.seconds:.2f}s" if o.seconds else ""
    reason = f"  {o.reason}" if o.reason and o.status != Status.DONE else ""
    return f"{o.status:<8} {o.job} {o.window}{took}{rows}{reason}"


def backfill_summary(result: Any) -> None:
    from rich.table import Table

    counts = result.counts()
    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "done", "skipped", "failed", "waiting", "not due"):
        table.add_column(col, justify="left" if col == "job" else "right")
    jobs = list(dict.fromkeys([o.job for o in result.outcomes] + list(result.not_due)))
    for job in jobs:
        c = counts.get(job, {})
        waiting = sum(v for k, v in c.items() if k not in (Status.DONE, Status.SKIPPED, Status.FAILED))
        table.add_row(job, str(c.get(Status.DONE, 0)), str(c.get(Status.SKIPPED, 0)), str(c.get(Status.FAILED, 0)),
                      str(waiting), str(result.not_due.get(job, 0)))
    console = make_console()
    console.print(table)
    waiting = [o for o in result.outcomes if o.status not in (Status.DONE, Status.SKIPPED, Status.FAILED)]
    for o in waiting[:5]:
        console.print(f"{o.status} {o.job} {o.window}: {o.reason}")
    if len(waiting) > 5:
        console.print(f"... and {len(waiting) - 5} more not run")
    failed = [o for o in result.outcomes if o.status == Status.FAILED]
    for o in failed[:10]:
        console.print(f"failed {o.job} {o.window}: {o.reason}")
    if failed:
        console.print(f"{len(failed)} window(s) failed; details: weir history JOB --window ID, state/logs/")


def blank_if_none(value: Any) -> str:
    return "" if value is None else str(value)


def exit_if_unplanned(unplanned: dict[str, str]) -> None:
    """One line per job that could not be planned, on stderr, then exit status 1 (none: return)."""
    for job, why in unplanned.items():
        click.echo(f"weir: {job} could not be planned: {why}", err=True)
    if unplanned:
        sys.exit(1)


def tick_line(result: Any, now: datetime) -> str:
    from runner.model.timeutil import format_utc

    stamp = format_utc(now)
    if result.gated:
        return f"{stamp} tick: nothing due" + (f" until {format_utc(result.idle_until)}" if result.idle_until else "")
    if not result.ran:
        return f"{stamp} another tick is running ({result.holder or 'unknown'}); nothing done"
    counts = result.counts()
    parts = [f"{k} {v}" for k, v in sorted(counts.items())] or ["nothing due"]
    line = f"{stamp} tick: " + ", ".join(parts)
    if result.held_back:
        line += "; held back by max_catch_up: " + ", ".join(f"{j} {n}" for j, n in result.held_back.items())
    if result.waiting:
        line += "; waiting: " + ", ".join(f"{j} {n}" for j, n in result.waiting.items())
    return line
