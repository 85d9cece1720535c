"""The public Python surface: one function per CLI command, each returning a typed result.

The CLI only parses arguments, calls these and renders the result, so every
command can be used from Python too. Each function takes a workspace root
first and everything else by keyword; the clock is an argument (`at`),
nothing here reads it. A result's `as_dict()` is exactly what the command
prints with `--json`; list results are lists of such rows.

A ledger URL names the ledger database (SQLAlchemy); a relative SQLite path
in it is relative to the workspace, as for `database:` in job files.

The work itself happens in `runner.engine` (and `runner.scaffold` for the
demo and new workspaces); this module loads the workspace, opens the ledger
and shapes the answers. Nothing heavy is imported until a function runs, so
that the idle tick stays quick.

One module because it is the public surface: one function per command with
its result type beside it, read top to bottom as the list of what weir does.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

from runner.core.states import RunStatus, State, Status
from runner.errors import UsageError

if TYPE_CHECKING:
    from runner.core.advice import JobAdvice
    from runner.core.planner import BackfillPlan, Task
    from runner.core.windows import Window
    from runner.core.workspace import Workspace
    from runner.engine.pulse import TickResult
    from runner.engine.verify import OutputProblem
    from runner.engine.window import Outcome
    from runner.io.ledger.store import Ledger
    from runner.scaffold.demo import LandingSummary

Root = Path | str
OnOutcome = Callable[[Any, Any], None]


def workspace(root: Root = ".") -> Workspace:
    """Load and validate the workspace at `root` (raises SpecProblems)."""
    from runner.engine.loading import load_workspace

    return load_workspace(root)


def _load(root: Root) -> Workspace:
    """The workspace for commands that run or read windows (no static SQL resolution)."""
    from runner.engine.loading import load_workspace

    return load_workspace(root, thorough=False)


def open_ledger(root: Root, *, url: str | None = None, create: bool = True) -> Ledger:
    """The ledger of the workspace at `root`: `url`, else `state/ledger.sqlite` inside it."""
    from runner.io.ledger.store import open_ledger as open_

    return open_(root, url, create=create)


def ledger_url(root: Root, url: str | None) -> str | None:
    """`url` with a relative SQLite path made relative to the workspace (None stays None)."""
    if url is None:
        return None
    from runner.core.paths import database_url

    return database_url(Path(root).resolve(), url)


# ---------------------------------------------------------------- the workspace


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
        return asdict(self)


@dataclass
class CheckReport:
    jobs: list[JobSummary]
    warnings: list[str] = field(default_factory=list)
    order: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {"ok": True, "jobs": [j.as_dict() for j in self.jobs], "warnings": self.warnings}


def describe_input(name: str, source: Any) -> str:
    from runner.model.spec import DatabaseInput, FileInput, JobInput
    from runner.model.timeutil import short_duration

    if isinstance(source, FileInput):
        return f"{name}: files {source.files}"
    if isinstance(source, JobInput):
        shift = f", lag {source.lag}" if source.lag else ""
        if source.lookback:
            shift = f", lookback {short_duration(source.lookback)}"
        return f"{name}: job {source.job}{shift}"
    if isinstance(source, DatabaseInput):
        what = f"table {source.table}" if source.table else "query"
        return f"{name}: database {what}"
    return name  # pragma: no cover


def check(root: Root, *, at: datetime) -> CheckReport:
    """Validate a workspace and summarize each job (raises SpecProblems on errors).

    The warnings include the batch-size advice, judged on samples of the newest
    input files (the only command that reads data to check).
    """
    from runner.engine.samples import batch_advice

    ws = workspace(root)
    warnings = [*ws.warnings, *batch_advice(ws.root, ws.jobs)]
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
    return CheckReport(jobs=summaries, warnings=[w.render() for w in warnings], order=list(ws.order))


def parse_bound(ws: Workspace, *, job: str, text: str | None, option: str) -> datetime | None:
    """A user-given bound; no offset means the job's local time."""
    from runner.model.timeutil import BadValue

    if text is None:
        return None
    try:
        return ws.cadence(job).parse(text)
    except BadValue as exc:
        raise UsageError(f"{option}: {exc}") from None


@dataclass
class WindowRow:
    window: str
    start: str
    end: str
    start_utc: str
    end_utc: str
    length: str
    length_seconds: int

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


class WindowList(list[WindowRow]):
    """The windows of one job, with its cadence in words (`cadence`)."""

    def __init__(self, rows: list[WindowRow], cadence: str):
        super().__init__(rows)
        self.cadence = cadence


def windows(root: Root, *, job: str, lo: str | None, hi: str | None, at: datetime) -> WindowList:
    """Windows of `job` whose start lies in `[lo, hi)` (defaults: job start; job end or `at`)."""
    from runner.model.timeutil import format_duration, format_instant, format_utc

    ws = workspace(root)
    cad = ws.cadence(job)
    lo_t = parse_bound(ws, job=job, text=lo, option="--from")
    hi_t = parse_bound(ws, job=job, text=hi, option="--to")
    if hi_t is None:
        hi_t = cad.end if cad.end is not None else at
    if lo_t is not None and hi_t <= lo_t:
        raise UsageError(f"--to ({format_instant(hi_t, cad.tz)}) must be after --from ({format_instant(lo_t, cad.tz)})")
    rows = [WindowRow(window=w.id, start=w.id, end=format_instant(w.end, cad.tz), start_utc=format_utc(w.start),
                      end_utc=format_utc(w.end), length=format_duration(w.length),
                      length_seconds=int(w.length.total_seconds()))
            for w in cad.span(lo_t, hi_t)]
    return WindowList(rows, cad.describe())


def graph(root: Root, *, fmt: str = "text") -> str:
    """The job graph drawn as text, Graphviz dot or Mermaid."""
    from runner.core.drawing import render

    ws = workspace(root)
    return render(ws.graph, ws.jobs, fmt)


def schema() -> dict[str, Any]:
    """The JSON Schema of a job file."""
    from runner.model.loading import job_schema

    return job_schema()


# ---------------------------------------------------------------- running


def find_window(ws: Workspace, job: str, window_id: str) -> Window:
    """The window of `job` named by `window_id` (any ISO 8601 form of its start)."""
    from runner.model.timeutil import BadValue

    cad = ws.cadence(job)
    try:
        return cad.window(window_id)
    except BadValue as exc:
        raise UsageError(f"--window: {exc}") from None
    except ValueError as exc:
        raise UsageError(f"job {job}: {exc}") from None


def run(root: Root, *, job: str, window: str, ledger: str | None = None, force: bool = False,
        at: datetime | None = None) -> Outcome:
    """Run one window of `job` (skipped when current unless `force`) in a worker process."""
    from runner.core.planner import Task
    from runner.engine.context import RunContext
    from runner.engine.pool import run_tasks
    from runner.engine.window import Outcome
    from runner.engine.workers import warm_up
    from runner.io.outputs import sweep_temporaries
    from runner.model.timeutil import format_instant

    warm_up()
    ws = _load(root)
    ws.job(job)
    found = find_window(ws, job, window)
    cad = ws.cadence(job)
    if at is not None and found.end + cad.settle > at:
        return Outcome(job, found.id, Status.NOT_DUE, f"not due until {format_instant(found.end + cad.settle, cad.tz)}")
    book = open_ledger(ws.root, url=ledger)
    sweep_temporaries(ws, at or found.end)
    return run_tasks([Task(job, found)], RunContext(ws=ws, ledger=book), 1, force=force)[0]


@dataclass
class BackfillResult:
    outcomes: list[Outcome]
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
        return sum(1 for o in self.outcomes if o.status == Status.FAILED)

    def as_dict(self) -> dict[str, Any]:
        return {"windows": [o.as_dict() for o in self.outcomes], "counts": self.counts(),
                "not_due": self.not_due, "replaced": self.replaced}


@dataclass
class BackfillPreview:
    """What a backfill would consider (`--dry-run`): its tasks, and the windows in range not due yet."""

    tasks: list[Task]
    not_due: dict[str, int]

    def as_dict(self) -> dict[str, Any]:
        return {"windows": [{"job": t.job, "window": t.window.id, "reason": t.reason} for t in self.tasks],
                "not_due": self.not_due}


def _backfill_plan(ws: Workspace, jobs: list[str], lo: str | None, hi: str | None, at: datetime,
                   downstream: bool) -> BackfillPlan:
    from runner.core import planner

    if not jobs:
        raise UsageError("name at least one job to backfill (see `weir check` for the list)")
    first = ws.job(jobs[0]).name
    lo_t = parse_bound(ws, job=first, text=lo, option="--from")
    hi_t = parse_bound(ws, job=first, text=hi, option="--to")
    if lo_t is not None and hi_t is not None and hi_t <= lo_t:
        raise UsageError("--to must be after --from")
    return planner.backfill(ws, jobs, lo_t, hi_t, at, downstream=downstream)


def preview_backfill(root: Root, *, jobs: list[str], lo: str | None = None, hi: str | None = None,
                     at: datetime, downstream: bool = False) -> BackfillPreview:
    """The windows a backfill would consider (pure planning; nothing runs, nothing is read)."""
    plan = _backfill_plan(workspace(root), jobs, lo, hi, at, downstream)
    return BackfillPreview(plan.tasks, plan.not_due)


def backfill(root: Root, *, jobs: list[str], lo: str | None = None, hi: str | None = None, at: datetime,
             ledger: str | None = None, downstream: bool = False, workers: int | None = None,
             force: bool = False, on_outcome: OnOutcome | None = None,
             on_plan: Callable[[list[Task], int], bool] | None = None,
             should_stop: Callable[[], bool] | None = None) -> BackfillResult:
    """Run every due window of `jobs` starting in `[lo, hi)` that is not current.

    `on_plan(tasks, replaced)` is called before anything runs (so a caller can
    warn or confirm; False stops it); `on_outcome(task, outcome)` after each window.
    """
    from runner.engine.backfill import existing_outputs
    from runner.engine.context import RunContext
    from runner.engine.pool import default_workers, run_tasks
    from runner.engine.workers import warm_up
    from runner.io.outputs import sweep_temporaries

    warm_up()
    ws = _load(root)
    plan = _backfill_plan(ws, jobs, lo, hi, at, downstream)
    book = open_ledger(ws.root, url=ledger)
    replaced = existing_outputs(book, plan.tasks) if force else 0
    if on_plan is not None and on_plan(plan.tasks, replaced) is False:
        return BackfillResult([], plan.not_due, replaced)
    sweep_temporaries(ws, at)
    outcomes = run_tasks(plan.tasks, RunContext(ws=ws, ledger=book), workers or default_workers(), force=force,
                         on_outcome=on_outcome, should_stop=should_stop)
    return BackfillResult(outcomes, plan.not_due, replaced)


def history(root: Root, *, job: str, window: str | None = None, ledger: str | None = None,
            limit: int | None = None) -> list[dict[str, Any]]:
    """Runs of `job` (of one window), newest first, as the ledger's rows (plus `late`)."""
    from runner.engine.history import run_history

    ws = _load(root)
    ws.job(job)
    key = find_window(ws, job, window).key if window else None
    return run_history(ws, open_ledger(ws.root, url=ledger, create=False), job, key, limit)


def tick(root: Root, *, at: datetime, ledger: str | None = None, workers: int | None = None,
         should_stop: Callable[[], bool] | None = None, on_outcome: OnOutcome | None = None,
         ws: Workspace | None = None) -> TickResult:
    """Plan, then run what is due (oldest first, `max_catch_up` per job), one tick per workspace at a time.

    First the idle gate: when it says nothing can be due, nothing is loaded
    (the result says `gated`). `ws`: an already loaded workspace (serve).
    """
    from runner.engine import gate
    from runner.engine.pulse import TickResult
    from runner.engine.pulse import tick as run_tick

    url = ledger_url(root, ledger)
    if ws is None:
        held = gate.fresh(Path(root).resolve(), at, url)
        if held is not None:
            return TickResult(ran=True, gated=True, idle_until=held.until)
    return run_tick(ws or _load(root), at, ledger_url=url, workers=workers or 1, should_stop=should_stop,
                    on_outcome=on_outcome)


def serve(root: Root, *, interval: float, should_stop: Callable[[], bool],
          on_tick: Callable[[TickResult, datetime], None], on_error: Callable[[str, datetime | None], None],
          ledger: str | None = None, workers: int = 1, clock: Callable[[], datetime] | None = None,
          monotonic: Callable[[], float] | None = None, sleep: Callable[[float], None] | None = None) -> None:
    """Tick every `interval` seconds until `should_stop()` (`runner.engine.pulse.serve`); the clock,
    the timer and sleep default to the real ones."""
    import time
    from datetime import UTC

    from runner.engine.pulse import serve as serve_loop

    serve_loop(lambda: workspace(root), interval=interval, clock=clock or (lambda: datetime.now(UTC)),
               monotonic=monotonic or time.monotonic, sleep=sleep or time.sleep, should_stop=should_stop,
               on_tick=on_tick, on_error=on_error, ledger_url=ledger_url(root, ledger), workers=workers)


# ---------------------------------------------------------------- planning and explaining


@dataclass
class PlanEntry:
    job: str
    window: str
    window_utc: str
    state: str
    reason: str
    late: bool

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class JobPlanView:
    """One job's plan: due and waiting windows, counts by state; `error` when it could not be planned."""

    job: str
    due: list[PlanEntry]
    waiting: list[PlanEntry]
    counts: dict[str, int]
    late: int
    max_catch_up: int | None
    error: str | None = None

    def as_dict(self) -> dict[str, Any]:
        out = {"job": self.job, "due": [i.as_dict() for i in self.due],
               "waiting": [i.as_dict() for i in self.waiting], "counts": self.counts, "late": self.late,
               "max_catch_up": self.max_catch_up}
        if self.error is not None:
            out["error"] = self.error
        return out


def _entry(item: Any) -> PlanEntry:
    return PlanEntry(item.job, item.window.id, item.window.key, item.state, item.reason, item.late)


def plan(root: Root, *, jobs: list[str], at: datetime, ledger: str | None = None) -> list[JobPlanView]:
    """Per job in dependency order: due windows (missing, failed with retries left, stale) and waiting ones."""
    from runner.core.planner import job_plans
    from runner.engine.survey import survey

    ws = _load(root)
    assessed = survey(ws, open_ledger(ws.root, url=ledger, create=False), at, jobs)
    out = [JobPlanView(p.job, [_entry(i) for i in p.due], [_entry(i) for i in p.waiting], p.counts, p.late,
                       ws.jobs[p.job].spec.max_catch_up)
           for p in job_plans(ws, assessed, cap=False)]
    out.extend(JobPlanView(job, [], [], {}, 0, ws.jobs[job].spec.max_catch_up, assessed.unplanned[job])
               for job in ws.order if job in assessed.unplanned)
    return out


@dataclass
class StaleWindow:
    job: str
    window: str
    window_utc: str
    reasons: list[str]
    pending_upstream: bool

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class StaleReport:
    ranges: list[Any]  # runner.core.planner.StaleRange
    windows: list[StaleWindow]
    unplanned: dict[str, str]

    def as_dict(self) -> dict[str, Any]:
        return {"ranges": [asdict(r) for r in self.ranges], "windows": [w.as_dict() for w in self.windows],
                "unplanned": self.unplanned}


def stale(root: Root, *, jobs: list[str], at: datetime, ledger: str | None = None) -> StaleReport:
    """Every done window whose fingerprint differs from now, by component; grouped ranges and every window."""
    import polars as pl

    from runner.core.planner import stale_ranges
    from runner.engine.survey import survey

    ws = _load(root)
    assessed = survey(ws, open_ledger(ws.root, url=ledger, create=False), at, jobs, recheck_all=True)
    found = [StaleWindow(job, row["window"], row["window_key"], row["reasons"], row["pending"])
             for job, frame in assessed.items()
             for row in frame.filter(pl.col("state") == State.STALE).select(
                 "window", "window_key", "reasons", "pending").iter_rows(named=True)]
    return StaleReport(stale_ranges(ws, assessed), found, dict(assessed.unplanned))


@dataclass
class Explanation:
    """One window explained (`weir why`): the keys of `as_dict()` are described in
    `runner.engine.explaining.explain_window`."""

    job: str
    window: str
    state: str
    details: dict[str, Any]

    def as_dict(self) -> dict[str, Any]:
        return self.details


def why(root: Root, *, job: str, window: str, at: datetime, ledger: str | None = None) -> Explanation:
    """One window explained: state, what changed since its recorded run, lateness, last run figures."""
    from runner.engine.explaining import explain_window

    ws = _load(root)
    ws.job(job)
    found = find_window(ws, job, window)
    details = explain_window(ws, open_ledger(ws.root, url=ledger, create=False), job, found, at)
    return Explanation(job, found.id, details["state"], details)


@dataclass
class JobImpact:
    job: str
    windows: int
    by_reason: dict[str, int]
    pending_upstream: int
    median_seconds: float | None
    estimated_seconds: float | None
    error: str | None = None

    def as_dict(self) -> dict[str, Any]:
        out = asdict(self)
        if self.error is None:
            del out["error"]
        return out


def impact(root: Root, *, at: datetime, ledger: str | None = None, workers: int | None = None) -> list[JobImpact]:
    """Per job: how many done windows the current job files would recompute, by reason, and how long."""
    import polars as pl

    from runner.engine.pool import default_workers
    from runner.engine.survey import survey

    ws = _load(root)
    book = open_ledger(ws.root, url=ledger, create=False)
    assessed = survey(ws, book, at, None)
    workers = workers or default_workers()
    out = []
    for job, frame in assessed.items():
        stale_rows = frame.filter(pl.col("state") == State.STALE)
        by_reason: dict[str, int] = {}
        for reasons in stale_rows["reasons"].to_list():
            for r in reasons:
                by_reason[r] = by_reason.get(r, 0) + 1
        stats = book.run_stats(job).filter(pl.col("status") == RunStatus.DONE)
        median = cast(float, stats["seconds"].median()) if stats.height else None
        count = stale_rows.height
        out.append(JobImpact(job, count, by_reason, int(stale_rows["pending"].sum()) if count else 0, median,
                             (median * count / workers) if median is not None else None))
    out.extend(JobImpact(job, 0, {}, 0, None, None, why) for job, why in assessed.unplanned.items())
    return out


def verify(root: Root, *, jobs: list[str], ledger: str | None = None) -> list[OutputProblem]:
    """Re-read every done window's output; report (and mark stale by output) missing, changed or
    unreadable ones."""
    from runner.engine.verify import verify_outputs

    ws = _load(root)
    return verify_outputs(ws, open_ledger(ws.root, url=ledger, create=False), jobs)


def advise(root: Root, *, jobs: list[str], ledger: str | None = None) -> list[JobAdvice]:
    """Per job: rows and seconds per window (median, p95), overhead share, and suggestions."""
    from runner.core.advice import advise_job

    ws = _load(root)
    book = open_ledger(ws.root, url=ledger, create=False)
    out = []
    for job in ws.select(jobs):
        cad = ws.cadence(job)
        what = f"every {cad.every}" if cad.every else f"cron '{cad.cron}'"
        out.append(advise_job(job, what, book.run_stats(job)))
    return out


def report(root: Root, *, at: datetime, ledger: str | None = None, out: Path | str | None = None,
           metrics: Path | str | None = None) -> dict[str, Any]:
    """Write the morning page (and the metrics file when asked); where, how big, counts per state."""
    from runner.report import report as write

    return write(root, at, ledger_url(root, ledger), out, metrics)


# ---------------------------------------------------------------- demo and new workspaces


@dataclass
class DemoResult:
    landing: LandingSummary
    backfill: BackfillResult
    at: datetime


def demo(root: Root, *, now: datetime, ledger: str | None = None, workers: int | None = None,
         on_outcome: OnOutcome | None = None, on_plan: Callable[[list[Task], int], bool] | None = None
         ) -> DemoResult:
    """Write the demo's landing data (unchanged files are left alone) and backfill every demo job."""
    from runner.scaffold import demo as scenario

    root = Path(root).resolve()
    missing = scenario.missing_jobs(root)
    if missing:
        raise UsageError(
            f"weir demo runs in a workspace holding the example jobs ({', '.join(scenario.DEMO_JOBS)}); "
            f"{root} lacks {', '.join(missing)}. Run it in the weir repository root, or start a workspace "
            "of your own with `weir init DIR`.")
    summary = scenario.write_landing(root)
    at = scenario.demo_clock(now)
    result = backfill(root, jobs=list(scenario.DEMO_JOBS), at=at, ledger=ledger, workers=workers,
                      on_outcome=on_outcome, on_plan=on_plan)
    return DemoResult(summary, result, at)


def init(target: Root, *, now: datetime) -> list[str]:
    """Create a new workspace with jobs/, state/ and one commented example job; return what was written."""
    from runner.scaffold.init import init as start

    return start(target, now)
