"""Planning: which windows to run, in which order, and why. Pure functions.

Inputs are job specs (a loaded workspace), ledger snapshots and the clock;
nothing here touches the disk or reads the time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta

from runner.graph import upstream_windows
from runner.spec import JobInput
from runner.windows import Window
from runner.workspace import Workspace


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
    from runner import graph as graphs

    selected = ws.select(jobs)
    names = graphs.downstream(ws.graph, selected) if downstream else selected
    tasks: list[Task] = []
    index: dict[tuple[str, str], int] = {}
    not_due: dict[str, int] = {}
    extra_reach: dict[str, timedelta | None] = {}
    for name in names:
        cad = ws.cadence(name)
        if name in selected:
            start, stop = lo, hi
            reason = "in range"
        else:
            reach = _reach(ws, name)
            upstream_reach = [extra_reach.get(p) for p in ws.graph.predecessors(name) if p in extra_reach]
            if reach is None or any(r is None for r in upstream_reach):
                extra = None
            else:
                extra = reach + max([r for r in upstream_reach if r is not None], default=timedelta(0))
            extra_reach[name] = extra
            first = cad.window_at(lo) if lo is not None else None
            start = first.start if first is not None else lo
            stop = None if (extra is None or hi is None) else hi + extra
            reason = "downstream"
        if name in selected:
            extra_reach[name] = timedelta(0)
        limit = at - cad.settle
        windows = cad.ending_by(limit, start) if stop is None else cad.span(start, min(stop, limit))
        for w in windows:
            if w.end <= limit:
                index[(name, w.key)] = len(tasks)
                tasks.append(Task(name, w, reason))
        if stop is not None and stop > limit:
            waiting = len(cad.span(start, stop)) - sum(1 for t in tasks if t.job == name)
            if waiting:
                not_due[name] = waiting
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
    return BackfillPlan(tasks, not_due)
