"""Planning: which windows to run, in which order, and why; stale windows grouped into ranges.
Pure functions over assessed windows (`runner.core.assessment`).

Inputs are job specs (a loaded workspace), ledger snapshots and the clock;
nothing here touches the disk or reads the time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import TYPE_CHECKING, Any

from runner.core.assessment import parse_run_time
from runner.core.graph import upstream_windows
from runner.core.ranges import range_numbers
from runner.core.states import STATES, State
from runner.core.windows import Cadence, Window
from runner.core.workspace import Workspace
from runner.model.spec import JobInput
from runner.model.timeutil import format_instant, from_us

if TYPE_CHECKING:
    import polars as pl


@dataclass
class Task:
    """One window to run; `deps` are indices of tasks that must finish first."""

    job: str
    window: Window
    reason: str = ""
    deps: list[int] = field(default_factory=list)

    @property
    def key(self) -> tuple[str, str]:
        return (self.job, self.window.key)


@dataclass
class BackfillPlan:
    tasks: list[Task]
    not_due: dict[str, int]


def _reach(ws: Workspace, job: str) -> timedelta | None:
    """How far past a changed range a consumer's windows can be affected (None: to the end)."""
    reach = timedelta(0)
    for source in ws.jobs[job].spec.inputs.values():
        if isinstance(source, JobInput):
            if source.job == job:
                return None  # a carry-forward: every later window depends on earlier ones
            if source.lookback is not None:
                reach = max(reach, source.lookback)
            if source.lag is not None:
                first = ws.cadence(job).first()
                step = first.length if first is not None else timedelta(0)
                reach = max(reach, step * (source.lag + 1))
    return reach


def backfill(ws: Workspace, jobs: list[str], lo: datetime | None, hi: datetime | None, at: datetime,
             downstream: bool = False) -> BackfillPlan:
    """Tasks for the due windows of `jobs` starting in `[lo, hi)`, with dependencies.

    With `downstream`, consumers of those jobs are added with every due window
    that overlaps the range (widened by their lookback or lag; to the end for
    carry-forward jobs). Windows already current are not filtered here: the
    executor skips them after comparing fingerprints.
    """

    selected = ws.select(jobs)
    names = ws.downstream(selected) if downstream else selected
    tasks: list[Task] = []
    not_due: dict[str, int] = {}
    extra_reach: dict[str, timedelta | None] = {}
    for name in names:
        cad = ws.cadence(name)
        if name in selected:
            start, stop = lo, hi
            reason = "in range"
            extra_reach[name] = timedelta(0)
        else:
            reach = _reach(ws, name)
            upstream_reach = [extra_reach.get(p) for p in ws.producers(name) if p in extra_reach]
            if reach is None or any(r is None for r in upstream_reach):
                extra = None
            else:
                extra = reach + max([r for r in upstream_reach if r is not None], default=timedelta(0))
            extra_reach[name] = extra
            first = cad.window_at(lo) if lo is not None else None
            start = first.start if first is not None else lo
            stop = None if (extra is None or hi is None) else hi + extra
            reason = "downstream"
        limit = at - cad.settle
        windows = cad.ending_by(limit, start) if stop is None else cad.span(start, min(stop, limit))
        for w in windows:
            if w.end <= limit:
                tasks.append(Task(name, w, reason))
        if stop is not None and stop > limit:
            waiting = len(cad.span(start, stop)) - sum(1 for t in tasks if t.job == name)
            if waiting:
                not_due[name] = waiting
    link(ws, tasks)
    return BackfillPlan(tasks, not_due)


def link(ws: Workspace, tasks: list[Task]) -> list[Task]:
    """Set each task's `deps`: the tasks running the producer windows it reads (those in `tasks`)."""
    index = {t.key: i for i, t in enumerate(tasks)}
    for task in tasks:
        deps = set()
        for source in ws.jobs[task.job].spec.inputs.values():
            if not isinstance(source, JobInput):
                continue
            for pw in upstream_windows(ws.cadence(task.job), task.window, ws.cadence(source.job), source,
                                       same_job=source.job == task.job):
                i = index.get((source.job, pw.key))
                if i is not None:
                    deps.add(i)
        task.deps = sorted(deps)
    return tasks


# ---------------------------------------------------------------- assessing window states


@dataclass
class PlanItem:
    job: str
    window: Window
    state: str
    reason: str
    late: bool = False


@dataclass
class JobPlan:
    job: str
    due: list[PlanItem]
    waiting: list[PlanItem]
    counts: dict[str, int]
    late: int
    held_back: int = 0


def job_plans(ws: Workspace, assessed: dict[str, pl.DataFrame], cap: bool = False) -> list[JobPlan]:
    """Per job (dependency order): due windows (oldest first, capped by max_catch_up when `cap`), waiting ones."""
    import polars as pl

    plans = []
    for job, frame in assessed.items():
        cad = ws.cadence(job)
        counts: dict[str, int] = {s: 0 for s in STATES}
        for row in frame.group_by("state").len().iter_rows():
            counts[row[0]] = row[1]
        due_rows = frame.filter(pl.col("due")).sort("start_us")
        held = 0
        limit = ws.jobs[job].spec.max_catch_up
        if cap and limit is not None and due_rows.height > limit:
            held = due_rows.height - limit
            due_rows = due_rows.head(limit)
        waiting_rows = frame.filter(pl.col("state") == State.WAITING).sort("start_us")
        due = [PlanItem(job, Window(from_us(s), from_us(e), cad.tz), st, r, lt)
               for s, e, st, r, lt in due_rows.select("start_us", "end_us", "state", "reason", "late").iter_rows()]
        waiting = [PlanItem(job, Window(from_us(s), from_us(e), cad.tz), State.WAITING, r, lt)
                   for s, e, r, lt in waiting_rows.select("start_us", "end_us", "reason", "late").iter_rows()]
        plans.append(JobPlan(job, due, waiting, counts, int(frame["late"].sum()), held))
    return plans


def tasks_for(ws: Workspace, items: list[PlanItem]) -> list[Task]:
    """Tasks (with dependencies among themselves) for planned windows, in dependency order."""
    return link(ws, [Task(item.job, item.window, item.reason) for item in items])


@dataclass
class StaleRange:
    job: str
    first: str
    last_end: str
    count: int
    reasons: str
    pending: bool


def stale_ranges(ws: Workspace, assessed: dict[str, pl.DataFrame]) -> list[StaleRange]:
    """Consecutive stale windows with the same reasons, grouped for reading."""
    import polars as pl

    out = []
    for job, frame in assessed.items():
        cad = ws.cadence(job)
        rows = frame.sort("start_us").filter(pl.col("state") == State.STALE).select(
            "start_us", "end_us", pl.col("reasons").list.join(", ").alias("why"), "pending")
        if rows.height == 0:
            continue
        # a new range starts where the reasons change or the windows stop touching
        grouped = rows.with_columns(range_numbers("why", "pending").alias("g")).group_by("g", maintain_order=True).agg(
            pl.col("start_us").first(), pl.col("end_us").last(), pl.len().alias("n"), pl.col("why").first(),
            pl.col("pending").first())
        for s_us, e_us, n, why, pending in grouped.select("start_us", "end_us", "n", "why", "pending").iter_rows():
            out.append(_range(job, cad, [s_us, e_us, n, why, pending]))
    return out


def _range(job: str, cad: Cadence, item: list[Any]) -> StaleRange:
    s, e, n, why, pending = item
    return StaleRange(job, format_instant(from_us(s), cad.tz), format_instant(from_us(e), cad.tz), n, why, pending)


def next_change(ws: Workspace, assessed: dict[str, pl.DataFrame], at: datetime) -> datetime | None:
    """The first instant after `at` at which the clock alone changes the plan.

    That is the next window's end plus settle of any job, or a failed window's
    next retry; None when neither will ever happen (every job has ended).
    """
    import polars as pl

    candidates = []
    for name in ws.jobs:
        cad = ws.cadence(name)
        limit = at - cad.settle
        current = cad.window_at(limit) if limit >= cad.start else None
        if current is None:  # before the first window (a cron job's first fire may come after its start)
            first = cad.first()
            current = first if first is not None and first.start > limit else None
        if current is not None:
            candidates.append(current.end + cad.settle)
    for frame in assessed.values():
        retry = frame.filter(pl.col("retry_at").is_not_null())["retry_at"].to_list()
        candidates.extend(parse_run_time(r) for r in retry)
    later = [c for c in candidates if c > at]
    return min(later) if later else None
