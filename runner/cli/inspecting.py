"""Commands that look at what ran: history, verify, advise, report."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from runner.cli.options import Context, at_option, clock, json_option
from runner.cli.render import blank_if_none, emit_json, exit_if_unplanned, make_console


@click.command()
@click.argument("job")
@click.option("--window", "window_id", metavar="ID", help="Only this window's runs.")
@click.option("--limit", type=click.IntRange(min=1), default=50, show_default=True, help="At most this many runs.")
@json_option
@click.pass_obj
def history(obj: Context, job: str, window_id: str | None, limit: int, as_json: bool) -> None:
    """List JOB's runs, newest first: status, times, rows, fingerprint, error."""
    from runner import api

    rows = api.history(obj.root, job=job, window=window_id, ledger=obj.ledger, limit=limit)
    if as_json:
        emit_json(rows)
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("run", "window", "status", "started (UTC)", "seconds", "read", "dropped", "rejected",
                "written", "fingerprint", "error"):
        table.add_column(col)
    for r in rows:
        table.add_row(str(r["id"]), r["window_id"], r["status"] + (" late" if r.get("late") else ""),
                      (r["started_at"] or "")[:19],
                      f"{r['seconds']:.2f}" if r["seconds"] is not None else "", blank_if_none(r["rows_read"]),
                      blank_if_none(r["rows_dropped"]), blank_if_none(r["rows_rejected"]), blank_if_none(r["rows_written"]),
                      (r["fingerprint"] or "")[:12], (r["error"] or "")[:120])
    make_console().print(table)
    if not rows:
        click.echo(f"no runs of {job} recorded" + (f" for window {window_id}" if window_id else ""))


@click.command()
@click.argument("jobs", nargs=-1)
@json_option
@click.pass_obj
def verify(obj: Context, jobs: tuple[str, ...], as_json: bool) -> None:
    """Re-read every done window's output and compare it with the ledger's checksum.

    An output that is missing, was changed outside weir, or cannot be read (a
    damaged file, a database file that is no longer a database) is reported and
    its window becomes stale (by output), so the next tick or backfill restores it.
    Exit status 1 when a problem was found.
    """
    from runner import api

    problems = api.verify(obj.root, jobs=list(jobs), ledger=obj.ledger)
    if as_json:
        emit_json([p.as_dict() for p in problems])
    else:
        for p in problems:
            detail = f"  ({p.detail})" if p.detail else ""
            click.echo(f"{p.problem:<8} {p.job} {p.window}  {p.output}{detail}")
        click.echo(f"{len(problems)} output problem(s)" + (" (now stale by output)" if problems else ""))
    if problems:
        sys.exit(1)


@click.command()
@click.argument("jobs", nargs=-1)
@json_option
@click.pass_obj
def advise(obj: Context, jobs: tuple[str, ...], as_json: bool) -> None:
    """Judge window sizes from recorded runs: rows and seconds per window (median, p95),
    the share of time spent outside the steps, and what to change, with the numbers used."""
    from runner import api

    advice = api.advise(obj.root, jobs=list(jobs), ledger=obj.ledger)
    rows = [a.as_dict() for a in advice]
    if as_json:
        emit_json(rows)
        return
    console = make_console()
    for r in rows:
        if r["runs"]:
            figures = (f"{r['runs']} runs; rows median {r['rows_median']:g}, p95 {r['rows_p95']:g}; seconds "
                       f"median {r['seconds_median']:.3f}, p95 {r['seconds_p95']:.3f}; overhead "
                       f"{(r['overhead_share'] or 0):.0%}")
        else:
            figures = "no runs"
        console.print(f"[bold]{r['job']}[/]  {figures}")
        for s in r["suggestions"]:
            console.print(f"  - {s}")


@click.command()
@click.option("--out", type=click.Path(dir_okay=False, path_type=Path), metavar="FILE",
              help="Where to write the HTML report. Default: state/report.html in the workspace.")
@click.option("--metrics", type=click.Path(dir_okay=False, path_type=Path), metavar="FILE",
              help="Also write window counts and last run times in the Prometheus text format to FILE "
                   "(name it *.prom in a node exporter's textfile folder).")
@at_option
@json_option
@click.pass_obj
def report(obj: Context, out: Path | None, metrics: Path | None, at: str | None, as_json: bool) -> None:
    """Write one self-contained HTML page with the state of every window: open it in a browser.

    It shows which jobs have windows that are not done, on which days (a matrix
    of jobs by day; click a day for its windows' last runs), why (state ranges
    with reasons), what the next tick runs, run durations and rows, and the job
    graph. The page fetches nothing. Each file is replaced atomically; nothing
    else is written and nothing is run.
    """
    from runner import api

    result = api.report(obj.root, at=clock(at), ledger=obj.ledger, out=out, metrics=metrics)
    if as_json:
        emit_json(result)
        exit_if_unplanned(result["unplanned"])
        return
    counts = ", ".join(f"{k} {v}" for k, v in result["counts"].items() if v) or "no due windows yet"
    click.echo(f"wrote {result['report']} ({result['bytes'] / 1024:,.0f} KiB; {result['jobs']} job(s), "
               f"{result['windows']} due window(s): {counts})")
    if result["metrics"]:
        click.echo(f"wrote {result['metrics']} (Prometheus text format)")
    exit_if_unplanned(result["unplanned"])
