"""Commands that plan and explain, running nothing: plan, stale, why, impact."""

from __future__ import annotations

from typing import Any

import click

from runner.cli.options import Context, at_option, clock, json_option, workers_option
from runner.cli.render import blank_if_none, emit_json, exit_if_unplanned, make_console
from runner.core.ranges import runs
from runner.core.states import RunStatus


@click.command()
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

    plans = api.plan(obj.root, jobs=list(jobs), at=clock(at), ledger=obj.ledger)
    result = [p.as_dict() for p in plans]
    if as_json:
        emit_json(result)
        exit_if_unplanned({p["job"]: p["error"] for p in result if "error" in p})
        return
    console = make_console()
    total = 0
    unplanned = {p["job"]: p["error"] for p in result if "error" in p}
    for p in result:
        if "error" in p:
            continue
        c = p["counts"]
        summary = ", ".join(f"{k} {v}" for k, v in c.items() if v) or "no due windows yet"
        late = f", late {p['late']}" if p["late"] else ""
        console.print(f"[bold]{p['job']}[/]  {len(p['due'])} to run, {len(p['waiting'])} waiting  ({summary}{late})")
        for first, last, n in runs(p["due"], _said):
            span = first["window"] if n == 1 else f"{first['window']} .. {last['window']}"
            console.print(f"  run     {span}  {n} window(s)  {first['reason']}")
        for first, last, n in runs(p["waiting"], _said):
            span = first["window"] if n == 1 else f"{first['window']} .. {last['window']}"
            console.print(f"  waiting {span}  {n} window(s)  {first['reason']}")
        total += len(p["due"])
    console.print(f"{total} window(s) to run" + (" (weir tick runs them)" if total else ""))
    exit_if_unplanned(unplanned)


@click.command()
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

    result = api.stale(obj.root, jobs=list(jobs), at=clock(at), ledger=obj.ledger).as_dict()
    if as_json:
        emit_json(result)
        exit_if_unplanned(result["unplanned"])
        return
    from rich.table import Table

    table = Table(box=None, pad_edge=False, show_edge=False)
    for col in ("job", "from", "to", "windows", "changed"):
        table.add_column(col, justify="right" if col == "windows" else "left")
    for r in result["ranges"]:
        why = r["reasons"] + (" (pending upstream)" if r["pending"] else "")
        table.add_row(r["job"], r["first"], r["last_end"], str(r["count"]), why)
    console = make_console()
    if result["ranges"]:
        console.print(table)
    console.print(f"{len(result['windows'])} stale window(s)" +
                  ("; weir why JOB WINDOW shows what changed" if result["windows"] else ""))
    exit_if_unplanned(result["unplanned"])


@click.command()
@click.argument("job")
@click.argument("window_id", metavar="WINDOW")
@at_option
@json_option
@click.pass_obj
def why(obj: Context, job: str, window_id: str, at: str | None, as_json: bool) -> None:
    """Explain one window: its state and, when stale, exactly what changed since it ran."""
    from runner import api

    info = api.why(obj.root, job=job, window=window_id, at=clock(at), ledger=obj.ledger).as_dict()
    if as_json:
        emit_json(info)
        return
    console = make_console()
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
        if run["status"] == RunStatus.RUNNING:  # nothing counted yet: no figures to show
            console.print(f"last run #{run['id']} running, started at {run['started_at']}; {tail}")
        else:
            secs = f"{run['seconds']:.2f}s" if run["seconds"] is not None else "-"
            figures = ", ".join(f"{label} {blank_if_none(run[key]) or '-'}" for label, key in (
                ("read", "rows_read"), ("dropped", "rows_dropped"), ("rejected", "rows_rejected"),
                ("written", "rows_written")))
            console.print(f"last run #{run['id']} {run['status']} at {run['started_at']} in {secs}: "
                          f"{figures}; {tail}")
        if run["error"]:
            console.print(f"error: {run['error']}", markup=False)


@click.command()
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

    rows = [r.as_dict() for r in api.impact(obj.root, at=clock(at), ledger=obj.ledger, workers=workers)]
    if as_json:
        emit_json(rows)
        exit_if_unplanned({r["job"]: r["error"] for r in rows if "error" in r})
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
    console = make_console()
    console.print(table)
    console.print(f"{sum(r['windows'] for r in rows)} window(s) would be recomputed, about {total:.1f}s")
    exit_if_unplanned({r["job"]: r["error"] for r in rows if "error" in r})


def _said(item: dict[str, Any]) -> tuple[str, str]:
    """What a plan line says of a window: its state and reason (a range shares both)."""
    return item["state"], item["reason"]
