"""The public Python surface: one function per CLI command, returning plain data.

The CLI only parses arguments, calls these and renders the result, so every
command can be used from Python too. Functions take a workspace root (or a
loaded `Workspace`) and an explicit clock `at`; nothing here reads the time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from runner.errors import UsageError
from runner.spec import DatabaseInput, FileInput, JobInput
from runner.timeutil import BadValue, format_duration, format_instant, format_utc
from runner.workspace import Workspace, load_workspace


def workspace(root: Path | str = ".") -> Workspace:
    """Load and validate the workspace at `root` (raises SpecProblems)."""
    return load_workspace(root)


@dataclass
class JobSummary:
    name: str
    cadence: str
    inputs: list[str]
    output: str
    windows_due: int
    first_window: str | None
    description: str | None = None

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass
class CheckReport:
    jobs: list[JobSummary]
    warnings: list[str] = field(default_factory=list)
    order: list[str] = field(default_factory=list)


def describe_input(name: str, source: Any) -> str:
    if isinstance(source, FileInput):
        return f"{name}: files {source.files}"
    if isinstance(source, JobInput):
        shift = f", lag {source.lag}" if source.lag else ""
        if source.lookback:
            from runner.timeutil import short_duration

            shift = f", lookback {short_duration(source.lookback)}"
        return f"{name}: job {source.job}{shift}"
    if isinstance(source, DatabaseInput):
        what = f"table {source.table}" if source.table else "query"
        return f"{name}: database {what}"
    return name  # pragma: no cover


def check(root: Path | str, at: datetime) -> CheckReport:
    """Validate a workspace and summarize each job (raises SpecProblems on errors)."""
    ws = load_workspace(root)
    summaries = []
    for name in ws.order:
        job = ws.jobs[name]
        cad = ws.cadence(name)
        out = job.spec.output
        first = cad.first()
        summaries.append(JobSummary(
            name=name,
            cadence=cad.describe(),
            inputs=[describe_input(n, s) for n, s in job.spec.inputs.items()],
            output=out.path if out.path is not None else f"table {out.table}",
            windows_due=len(cad.due(at)),
            first_window=first.id if first else None,
            description=job.spec.description,
        ))
    return CheckReport(jobs=summaries, warnings=[w.render() for w in ws.warnings], order=list(ws.order))


def parse_bound(ws: Workspace, job: str, text: str | None, option: str) -> datetime | None:
    """A user-given bound; no offset means the job's local time."""
    if text is None:
        return None
    try:
        return ws.cadence(job).parse(text)
    except BadValue as exc:
        raise UsageError(f"{option}: {exc}") from None


def windows(ws: Workspace, job: str, lo: datetime | None, hi: datetime | None, at: datetime) -> list[dict[str, Any]]:
    """Windows of `job` whose start lies in `[lo, hi)` (defaults: job start; job end or `at`)."""
    cad = ws.cadence(job)
    if hi is None:
        hi = cad.end if cad.end is not None else at
    if lo is not None and hi <= lo:
        raise UsageError(f"--to ({format_instant(hi, cad.tz)}) must be after --from ({format_instant(lo, cad.tz)})")
    span = cad.span(lo, hi)
    out = []
    for w in span:
        out.append({
            "window": w.id,
            "start": w.id,
            "end": format_instant(w.end, cad.tz),
            "start_utc": format_utc(w.start),
            "end_utc": format_utc(w.end),
            "length": format_duration(w.length),
            "length_seconds": int(w.length.total_seconds()),
        })
    return out


# ---------------------------------------------------------------- running


def open_ledger(root: Path | str, url: str | None = None, create: bool = True):
    """The ledger of a workspace (default `state/ledger.sqlite` inside it)."""
    from runner.ledger import Ledger, default_url

    return Ledger(url or default_url(Path(root).resolve()), create=create)


def find_window(ws: Workspace, job: str, window_id: str):
    """The window of `job` named by `window_id` (any ISO 8601 form of its start)."""
    cad = ws.cadence(job)
    try:
        return cad.window(window_id)
    except BadValue as exc:
        raise UsageError(f"--window: {exc}") from None
    except ValueError as exc:
        raise UsageError(f"job {job}: {exc}") from None


def run(root: Path | str, job: str, window_id: str, ledger_url: str | None = None, force: bool = False,
        at: datetime | None = None):
    """Run one window of `job` (skipped when current unless `force`). Returns an Outcome."""
    from runner.execute import Outcome, RunContext, run_window

    ws = load_workspace(root)
    ws.job(job)
    window = find_window(ws, job, window_id)
    cad = ws.cadence(job)
    if at is not None and window.end + cad.settle > at:
        return Outcome(job, window.id, "not due",
                       f"not due until {format_instant(window.end + cad.settle, cad.tz)}")
    ledger = open_ledger(ws.root, ledger_url)
    return run_window(RunContext(ws=ws, ledger=ledger), job, window, force=force)


@dataclass
class BackfillResult:
    outcomes: list[Any]
    not_due: dict[str, int]
    replaced: int = 0

    def counts(self) -> dict[str, dict[str, int]]:
        out: dict[str, dict[str, int]] = {}
        for o in self.outcomes:
            out.setdefault(o.job, {}).setdefault(o.status, 0)
            out[o.job][o.status] += 1
        return out

    @property
    def failed(self) -> int:
        return sum(1 for o in self.outcomes if o.status == "failed")


def plan_backfill(ws: Workspace, jobs: list[str], lo: datetime | None, hi: datetime | None, at: datetime,
                  downstream: bool = False):
    """The backfill's tasks (pure planning; nothing runs)."""
    from runner import planner

    return planner.backfill(ws, jobs, lo, hi, at, downstream=downstream)


def existing_outputs(ws: Workspace, ledger, tasks) -> int:
    """How many of the tasks' windows already have an output that a forced run would replace."""
    by_job: dict[str, list[str]] = {}
    for t in tasks:
        by_job.setdefault(t.job, []).append(t.window.key)
    count = 0
    for job, keys in by_job.items():
        rows = ledger.state_rows(job, keys)
        count += sum(1 for r in rows.values() if r.get("output"))
    return count


def backfill(root: Path | str, jobs: list[str], lo: str | None, hi: str | None, at: datetime,
             ledger_url: str | None = None, downstream: bool = False, workers: int | None = None,
             force: bool = False, on_outcome=None, on_plan=None, should_stop=None) -> BackfillResult:
    """Run every due window of `jobs` starting in `[lo, hi)` that is not current.

    `on_plan(tasks, replaced)` is called before anything runs (so a caller can
    warn or confirm); `on_outcome(task, outcome)` after each window.
    """
    from runner.pool import Settings, default_workers, run_tasks

    ws = load_workspace(root)
    if not jobs:
        raise UsageError("name at least one job to backfill (see `weir check` for the list)")
    first = ws.job(jobs[0]).name
    lo_t = parse_bound(ws, first, lo, "--from")
    hi_t = parse_bound(ws, first, hi, "--to")
    if lo_t is not None and hi_t is not None and hi_t <= lo_t:
        raise UsageError("--to must be after --from")
    plan = plan_backfill(ws, jobs, lo_t, hi_t, at, downstream)
    ledger = open_ledger(ws.root, ledger_url)
    replaced = existing_outputs(ws, ledger, plan.tasks) if force else 0
    if on_plan is not None and on_plan(plan.tasks, replaced) is False:
        return BackfillResult([], plan.not_due, replaced)
    from runner.execute import RunContext

    settings = Settings(root=ws.root, ledger_url=ledger.url, force=force)
    outcomes = run_tasks(plan.tasks, settings, workers or default_workers(), on_outcome, should_stop,
                         context=RunContext(ws=ws, ledger=ledger))
    return BackfillResult(outcomes, plan.not_due, replaced)


def history(root: Path | str, job: str, window_id: str | None = None, ledger_url: str | None = None,
            limit: int | None = None) -> list[dict[str, Any]]:
    """Runs of `job` (of one window), newest first, as plain dicts."""
    ws = load_workspace(root)
    ws.job(job)
    key = find_window(ws, job, window_id).key if window_id else None
    ledger = open_ledger(ws.root, ledger_url, create=False)
    rows = ledger.history(job, key, limit)
    return rows
