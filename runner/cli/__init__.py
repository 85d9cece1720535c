"""The `weir` command: parse arguments, call `runner.api`, render. Nothing else.

Heavy libraries are imported inside commands so that start-up stays quick.
Every user error becomes one line on stderr and a non-zero exit, never a
traceback (set WEIR_DEBUG=1 to see one for an internal error).
"""

from __future__ import annotations

import contextlib
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
    from runner.model.timeutil import BadValue, parse_instant

    if at is None:
        return datetime.now(UTC)
    try:
        return parse_instant(at, UTC)
    except BadValue as exc:
        raise UsageError(f"--at: {exc} (without an offset it is read as UTC)") from None


@contextlib.contextmanager
def _stoppable():
    """Let SIGTERM stop a running command the way Ctrl-C does: workers stopped, runs recorded
    abandoned, claims and the tick lock released, one line, exit status 128 + the signal."""
    import signal

    from runner.errors import Interrupted

    def stop(signum: int, _frame: Any) -> None:
        raise Interrupted(signum)

    try:
        previous = signal.signal(signal.SIGTERM, stop)
    except ValueError:  # not the main thread: leave signals alone
        yield
        return
    try:
        yield
    except KeyboardInterrupt:
        raise Interrupted(signal.SIGINT) from None
    finally:
        signal.signal(signal.SIGTERM, previous)


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
    from runner.model.loading import job_schema

    _emit_json(job_schema())


@cli.command()
@click.option("--format", "fmt", type=click.Choice(["text", "dot", "mermaid"]), default="text", show_default=True,
              help="text for reading, dot for Graphviz, mermaid for Markdown.")
@click.pass_obj
def graph(obj: Context, fmt: str) -> None:
    """Print the job graph: which job reads which."""
    from runner import api
    from runner.core.drawing import render

    ws = api.workspace(obj.root)
    click.echo(render(ws.graph, ws.jobs, fmt), nl=False)


workers_option = click.option("--workers", type=click.IntRange(min=1), metavar="N",
                              help="Windows run in parallel (processes). Default: the number of CPU cores.")


@cli.command()
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
    with _stoppable():
        outcome = api.run(obj.root, job, window_id, obj.ledger, force=force)
    if as_json:
        _emit_json(outcome.as_dict())
    else:
        click.echo(_outcome_line(outcome))
    if outcome.status == "failed":
        sys.exit(1)


def _outcome_line(o: Any) -> str:
    rows = f" {o.rows_written} rows" if o.rows_written is not None else ""
    took = f" {o.seconds:.2f}s" if o.seconds else ""
    reason = f"  {o.reason}" if o.reason and o.status != "done" else ""
    return f"{o.status:<8} {o.job} {o.window}{took}{rows}{reason}"


@cli.command()
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

    now = _now(at)
    if dry_run:
        ws = api.workspace(obj.root)
        first = ws.job(jobs[0]).name
        plan = api.plan_backfill(ws, list(jobs), api.parse_bound(ws, first, lo, "--from"),
                                 api.parse_bound(ws, first, hi, "--to"), now, downstream)
        rows = [{"job": t.job, "window": t.window.id, "reason": t.reason} for t in plan.tasks]
        if as_json:
            _emit_json({"windows": rows, "not_due": plan.not_due})
            return
        for r in rows:
            click.echo(f"{r['job']} {r['window']}  {r['reason']}")
        click.echo(f"{len(rows)} window(s) would be considered (current ones are skipped when run)")
        for job, n in plan.not_due.items():
            click.echo(f"{job}: {n} window(s) in range are not due yet")
        return
    tty = sys.stdout.isatty() and not as_json
    progress = _Progress(tty, quiet=as_json)

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
        with _stoppable():
            result = api.backfill(obj.root, list(jobs), lo, hi, now, obj.ledger, downstream, workers, force,
                                  on_outcome=progress.update, on_plan=on_plan)
    finally:
        progress.stop()
    if as_json:
        _emit_json({"windows": [o.as_dict() for o in result.outcomes], "counts": result.counts(),
                    "not_due": result.not_due, "replaced": result.replaced})
    else:
        _backfill_summary(result)
    if result.failed:
        sys.exit(1)


class _Progress:
    """A rich progress bar on a terminal; one plain line per window otherwise."""

    def __init__(self, tty: bool, quiet: bool = False):
        self.tty, self.quiet = tty, quiet
        self.counts = {"done": 0, "failed": 0, "skipped": 0, "waiting": 0}
        self.bar = None
        self.task = None

    def start(self, total: int) -> None:
        if self.quiet or not self.tty:
            return
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeRemainingColumn,
        )

        self.bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                            TextColumn("{task.fields[counts]}"), TimeRemainingColumn(), transient=False)
        self.bar.start()
        self.task = self.bar.add_task("windows", total=total, counts="")

    def update(self, task: Any, outcome: Any) -> None:
        key = outcome.status if outcome.status in self.counts else "waiting"
        self.counts[key] += 1
        if self.quiet:
            return
        if self.bar is not None:
            text = "  ".join(f"{k} {v}" for k, v in self.counts.items() if v)
            self.bar.update(self.task, advance=1, counts=text)
            if outcome.status == "failed":
                self.bar.console.print(f"[bold]failed[/] {outcome.job} {outcome.window}: {outcome.reason}")
        elif outcome.status != "skipped":
            click.echo(_outcome_line(outcome))

    def stop(self) -> None:
        if self.bar is not None:
            self.bar.stop()


def _backfill_summary(result: Any) -> None:
    from rich.table import Table

    counts = result.counts()
    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "done", "skipped", "failed", "waiting", "not due"):
        table.add_column(col, justify="left" if col == "job" else "right")
    jobs = list(dict.fromkeys([o.job for o in result.outcomes] + list(result.not_due)))
    for job in jobs:
        c = counts.get(job, {})
        waiting = sum(v for k, v in c.items() if k not in ("done", "skipped", "failed"))
        table.add_row(job, str(c.get("done", 0)), str(c.get("skipped", 0)), str(c.get("failed", 0)),
                      str(waiting), str(result.not_due.get(job, 0)))
    console = _console()
    console.print(table)
    waiting = [o for o in result.outcomes if o.status not in ("done", "skipped", "failed")]
    for o in waiting[:5]:
        console.print(f"{o.status} {o.job} {o.window}: {o.reason}")
    if len(waiting) > 5:
        console.print(f"... and {len(waiting) - 5} more not run")
    failed = [o for o in result.outcomes if o.status == "failed"]
    for o in failed[:10]:
        console.print(f"failed {o.job} {o.window}: {o.reason}")
    if failed:
        console.print(f"{len(failed)} window(s) failed; details: weir history JOB --window ID, state/logs/")


@cli.command()
@click.argument("job")
@click.option("--window", "window_id", metavar="ID", help="Only this window's runs.")
@click.option("--limit", type=click.IntRange(min=1), default=50, show_default=True, help="At most this many runs.")
@json_option
@click.pass_obj
def history(obj: Context, job: str, window_id: str | None, limit: int, as_json: bool) -> None:
    """List JOB's runs, newest first: status, times, rows, fingerprint, error."""
    from runner import api

    rows = api.history(obj.root, job, window_id, obj.ledger, limit)
    if as_json:
        _emit_json(rows)
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("run", "window", "status", "started (UTC)", "seconds", "read", "dropped", "rejected",
                "written", "fingerprint", "error"):
        table.add_column(col)
    for r in rows:
        table.add_row(str(r["id"]), r["window_id"], r["status"] + (" late" if r.get("late") else ""),
                      (r["started_at"] or "")[:19],
                      f"{r['seconds']:.2f}" if r["seconds"] is not None else "", _n(r["rows_read"]),
                      _n(r["rows_dropped"]), _n(r["rows_rejected"]), _n(r["rows_written"]),
                      (r["fingerprint"] or "")[:12], (r["error"] or "")[:120])
    _console().print(table)
    if not rows:
        click.echo(f"no runs of {job} recorded" + (f" for window {window_id}" if window_id else ""))


def _n(value: Any) -> str:
    return "" if value is None else str(value)


def _ranges(items: list[dict[str, Any]]) -> list[tuple[dict[str, Any], dict[str, Any], int]]:
    """Group consecutive plan items with the same state and reason: (first, last, count)."""
    out: list[list[Any]] = []
    for item in items:
        if out and out[-1][1]["reason"] == item["reason"] and out[-1][1]["state"] == item["state"]:
            out[-1][1] = item
            out[-1][2] += 1
        else:
            out.append([item, item, 1])
    return [(a, b, n) for a, b, n in out]


@cli.command()
@click.argument("jobs", nargs=-1)
@at_option
@json_option
@click.pass_obj
def plan(obj: Context, jobs: tuple[str, ...], at: str | None, as_json: bool) -> None:
    """Show what is due now and why (missing, failed with retries left, stale), and what is waiting.

    A window is due when its end plus the job's settle time has passed. Input
    files are re-checked only within each job's recheck horizon (default 3 days);
    `weir stale` re-checks every window. Nothing is run or written.
    """
    from runner import api

    result = api.plan(obj.root, list(jobs), _now(at), obj.ledger)
    if as_json:
        _emit_json(result)
        _exit_if_unplanned({p["job"]: p["error"] for p in result if "error" in p})
        return
    console = _console()
    total = 0
    unplanned = {p["job"]: p["error"] for p in result if "error" in p}
    for p in result:
        if "error" in p:
            continue
        c = p["counts"]
        summary = ", ".join(f"{k} {v}" for k, v in c.items() if v) or "no due windows yet"
        late = f", late {p['late']}" if p["late"] else ""
        console.print(f"[bold]{p['job']}[/]  {len(p['due'])} to run, {len(p['waiting'])} waiting  ({summary}{late})")
        for first, last, n in _ranges(p["due"]):
            span = first["window"] if n == 1 else f"{first['window']} .. {last['window']}"
            console.print(f"  run     {span}  {n} window(s)  {first['reason']}")
        for first, last, n in _ranges(p["waiting"]):
            span = first["window"] if n == 1 else f"{first['window']} .. {last['window']}"
            console.print(f"  waiting {span}  {n} window(s)  {first['reason']}")
        total += len(p["due"])
    console.print(f"{total} window(s) to run" + (" (weir tick runs them)" if total else ""))
    _exit_if_unplanned(unplanned)


def _exit_if_unplanned(unplanned: dict[str, str]) -> None:
    """One line per job that could not be planned, on stderr, then exit status 1 (none: return)."""
    for job, why in unplanned.items():
        click.echo(f"weir: {job} could not be planned: {why}", err=True)
    if unplanned:
        sys.exit(1)


@cli.command()
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
    from runner.engine import gate
    now = _now(at)
    held = gate.fresh(obj.root.resolve(), now, obj.ledger)
    if held is not False:
        until = f" until {held.strftime('%Y-%m-%dT%H:%M:%SZ')}" if held else ""
        if as_json:
            _emit_json({"ran": True, "holder": None, "counts": {}, "windows": [], "remaining": {},
                        "waiting": {}, "idle_until": held.isoformat() if held else None})
        else:
            click.echo(f"{now.strftime('%Y-%m-%dT%H:%M:%SZ')} tick: nothing due{until}")
        return
    from runner import api

    with _stoppable():
        result = api.tick(obj.root, now, obj.ledger, workers)
    if as_json:
        _emit_json({"ran": result.ran, "holder": result.holder, "counts": result.counts(),
                    "windows": [o.as_dict() for o in result.outcomes], "remaining": result.held_back,
                    "waiting": result.waiting, "unplanned": result.unplanned})
    else:
        click.echo(_tick_line(result, _now(at)))
        for o in result.outcomes:
            if o.status in ("done", "failed"):
                click.echo("  " + _outcome_line(o))
    _exit_if_unplanned(result.unplanned)
    if result.ran and any(o.status == "failed" for o in result.outcomes):
        sys.exit(1)


def _tick_line(result: Any, now: datetime) -> str:
    stamp = now.strftime("%Y-%m-%dT%H:%M:%SZ")
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


@cli.command()
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
    import time

    from runner import api
    from runner.errors import UsageError
    from runner.model.timeutil import BadValue, parse_duration

    try:
        interval = parse_duration(every).total_seconds()
    except BadValue as exc:
        raise UsageError(f"--every: {exc}") from None
    if interval <= 0:
        raise UsageError("--every must be positive")
    stop = {"flag": False}

    def handler(signum: int, _frame: Any) -> None:
        stop["flag"] = True
        click.echo(f"{datetime.now(UTC).strftime('%Y-%m-%dT%H:%M:%SZ')} stopping after the current window "
                   f"(signal {signum})", err=True)

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)
    ws = api.workspace(obj.root)
    while not stop["flag"]:
        started = time.monotonic()
        now = datetime.now(UTC)
        try:
            result = api.tick(obj.root, now, obj.ledger, workers, should_stop=lambda: stop["flag"], ws=ws)
            click.echo(_tick_line(result, now))
        except Exception as exc:  # noqa: BLE001 - a service keeps going; the error is logged
            click.echo(f"{now.strftime('%Y-%m-%dT%H:%M:%SZ')} tick failed: {exc}", err=True)
        while not stop["flag"] and time.monotonic() - started < interval:
            time.sleep(min(0.5, interval))
        if not stop["flag"]:
            try:
                ws = api.workspace(obj.root)
            except Exception as exc:  # noqa: BLE001 - keep the last valid jobs
                click.echo(f"job files invalid, keeping the previous ones: {str(exc).splitlines()[0]}", err=True)
    click.echo(f"{datetime.now(UTC).strftime('%Y-%m-%dT%H:%M:%SZ')} stopped")


@cli.command()
@click.argument("jobs", nargs=-1)
@at_option
@json_option
@click.pass_obj
def stale(obj: Context, jobs: tuple[str, ...], at: str | None, as_json: bool) -> None:
    """List every done window whose output is out of date, and which part changed.

    Parts: spec (the job file), code (SQL or python module), input (files added,
    removed or changed), upstream (a producer's output changed), output (changed
    outside weir, found by weir verify). Consumers of a changed job are listed
    as stale by upstream, pending until the producer has re-run.
    """
    from runner import api

    result = api.stale(obj.root, list(jobs), _now(at), obj.ledger)
    if as_json:
        _emit_json(result)
        _exit_if_unplanned(result["unplanned"])
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "from", "to", "windows", "changed"):
        table.add_column(col, justify="right" if col == "windows" else "left")
    for r in result["ranges"]:
        why = r["reasons"] + (" (pending upstream)" if r["pending"] else "")
        table.add_row(r["job"], r["first"], r["last_end"], str(r["count"]), why)
    console = _console()
    if result["ranges"]:
        console.print(table)
    console.print(f"{len(result['windows'])} stale window(s)" +
                  ("; weir why JOB WINDOW shows what changed" if result["windows"] else ""))
    _exit_if_unplanned(result["unplanned"])


@cli.command()
@click.argument("job")
@click.argument("window_id", metavar="WINDOW")
@at_option
@json_option
@click.pass_obj
def why(obj: Context, job: str, window_id: str, at: str | None, as_json: bool) -> None:
    """Explain one window: its state and, when stale, exactly what changed since it ran."""
    from runner import api

    info = api.why(obj.root, job, window_id, _now(at), obj.ledger)
    if as_json:
        _emit_json(info)
        return
    console = _console()
    console.print(f"[bold]{info['job']} {info['window']}[/] .. {info['end']} ({info['length']})")
    console.print(f"state: {info['state']}" + (f"  {info['reason']}" if info.get("reason") else ""))
    for kind, change in (info.get("changes") or {}).items():
        console.print(f"[bold]{kind} changed[/]")
        if kind == "spec":
            for c in change:
                console.print(f"  {c['field']}: {c['was']!r} -> {c['now']!r}")
        elif kind == "code":
            console.print(change.rstrip("\n"), markup=False)
        elif kind == "input":
            for c in change:
                console.print(f"  {c['change']:<8} {c['input']}: {c['path']}  {c['was'] or ''} -> {c['now'] or ''}")
        elif kind == "upstream":
            for c in change[:20]:
                console.print(f"  {c['job']} {c['window']}: digest {str(c['was'])[:12]} -> {str(c['now'])[:12]}")
            if len(change) > 20:
                console.print(f"  ... {len(change) - 20} more producer windows")
        else:
            console.print(f"  {change}")
    if info.get("waiting"):
        console.print(f"waiting: {info['waiting']}")
    ing = info.get("ingestion")
    if ing:
        late = " LATE" if ing["late"] else ""
        console.print(f"newest input {ing['newest_input']}, {ing['after_window_end']} after the window ended{late}")
    run = info.get("last_run")
    if run:
        tail = f"fingerprint {(run['fingerprint'] or '')[:12]}; code {run['code_version'] or '-'}"
        if run["status"] == "running":  # nothing counted yet: no figures to show
            console.print(f"last run #{run['id']} running, started at {run['started_at']}; {tail}")
        else:
            secs = f"{run['seconds']:.2f}s" if run["seconds"] is not None else "-"
            figures = ", ".join(f"{label} {_n(run[key]) or '-'}" for label, key in (
                ("read", "rows_read"), ("dropped", "rows_dropped"), ("rejected", "rows_rejected"),
                ("written", "rows_written")))
            console.print(f"last run #{run['id']} {run['status']} at {run['started_at']} in {secs}: "
                          f"{figures}; {tail}")
        if run["error"]:
            console.print(f"error: {run['error']}", markup=False)


@cli.command()
@at_option
@workers_option
@json_option
@click.pass_obj
def impact(obj: Context, at: str | None, workers: int | None, as_json: bool) -> None:
    """Before deploying a change: how many windows the job files as they are now would recompute.

    Counts done windows per job by the part that changed, and estimates the time
    from recorded run durations (median per job x windows / workers).
    """
    from runner import api

    rows = api.impact(obj.root, _now(at), obj.ledger, workers)
    if as_json:
        _emit_json(rows)
        _exit_if_unplanned({r["job"]: r["error"] for r in rows if "error" in r})
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "windows", "by reason", "estimate"):
        table.add_column(col)
    total = 0.0
    for r in rows:
        if "error" in r:
            continue
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(r["by_reason"].items())) or "-"
        est = r["estimated_seconds"]
        total += est or 0
        table.add_row(r["job"], str(r["windows"]), reasons, f"{est:.1f}s" if est is not None else "-")
    console = _console()
    console.print(table)
    console.print(f"{sum(r['windows'] for r in rows)} window(s) would be recomputed, about {total:.1f}s")
    _exit_if_unplanned({r["job"]: r["error"] for r in rows if "error" in r})


@cli.command()
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

    problems = api.verify(obj.root, list(jobs), obj.ledger)
    if as_json:
        _emit_json(problems)
    else:
        for p in problems:
            detail = f"  ({p['detail']})" if p.get("detail") else ""
            click.echo(f"{p['problem']:<8} {p['job']} {p['window']}  {p['output']}{detail}")
        click.echo(f"{len(problems)} output problem(s)" + (" (now stale by output)" if problems else ""))
    if problems:
        sys.exit(1)


@cli.command()
@click.argument("jobs", nargs=-1)
@json_option
@click.pass_obj
def advise(obj: Context, jobs: tuple[str, ...], as_json: bool) -> None:
    """Judge window sizes from recorded runs: rows and seconds per window (median, p95),
    the share of time spent outside the steps, and what to change, with the numbers used."""
    from runner import api

    rows = api.advise(obj.root, list(jobs), obj.ledger)
    if as_json:
        _emit_json(rows)
        return
    console = _console()
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


@cli.command()
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
    progress = _Progress(tty)

    def on_plan(tasks: list[Any], replaced: int) -> bool:
        progress.start(len(tasks))
        return True

    click.echo("writing the demo's landing data into state/landing/ ...")
    try:
        with _stoppable():
            summary, result, at = api.demo(obj.root, datetime.now(UTC), obj.ledger, workers,
                                           on_outcome=progress.update, on_plan=on_plan)
    finally:
        progress.stop()
    click.echo(f"landing: {summary.rides} rides ({summary.bad_rows} bad rows, {summary.late_files} late files), "
               f"{summary.dock_events} dock events; {summary.written} file(s) written, "
               f"{summary.unchanged} already in place")
    _backfill_summary(result)
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


@cli.command()
@click.argument("directory", type=click.Path(file_okay=False, path_type=Path))
def init(directory: Path) -> None:
    """Start a new workspace in DIRECTORY: jobs/ with one commented example job, and state/."""
    from runner import api

    written = api.init(directory, datetime.now(UTC))
    for path in written:
        click.echo(f"wrote {path}")
    click.echo(f"next: cd {directory} && weir check")


@cli.command()
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
    from runner import report as reporting

    result = reporting.report(obj.root, _now(at), obj.ledger, out, metrics)
    if as_json:
        _emit_json(result)
        _exit_if_unplanned(result["unplanned"])
        return
    counts = ", ".join(f"{k} {v}" for k, v in result["counts"].items() if v) or "no due windows yet"
    click.echo(f"wrote {result['report']} ({result['bytes'] / 1024:,.0f} KiB; {result['jobs']} job(s), "
               f"{result['windows']} due window(s): {counts})")
    if result["metrics"]:
        click.echo(f"wrote {result['metrics']} (Prometheus text format)")
    _exit_if_unplanned(result["unplanned"])


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
