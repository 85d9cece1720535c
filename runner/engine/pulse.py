"""Running what is due: one tick (plan, then run, under the workspace's tick lock) and the serving
loop that ticks forever.

`tick` takes the tick lock, plans with a fresh survey, runs the due windows
(at most `max_catch_up` per job) and the waiting ones whose producers run in
the same tick, then writes the idle gate when nothing was due
(`runner.engine.gate`). `serve` repeats it every interval with the clock and
the sleep injected, so that its timing is tested without waiting.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from runner.core.states import State, Status
from runner.core.workspace import Workspace


@dataclass
class TickResult:
    """What one tick did. `ran` is False when another tick held the lock (`holder`); `gated` when the
    idle gate answered that nothing can be due before `idle_until` (None: no change ahead by the clock)."""

    ran: bool
    holder: str | None = None
    outcomes: list[Any] = field(default_factory=list)
    held_back: dict[str, int] = field(default_factory=dict)
    waiting: dict[str, int] = field(default_factory=dict)
    unplanned: dict[str, str] = field(default_factory=dict)  # job -> why it could not be planned
    gated: bool = False
    idle_until: datetime | None = None

    def counts(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for o in self.outcomes:
            out[o.status] = out.get(o.status, 0) + 1
        return out

    @property
    def failed(self) -> bool:
        return self.ran and any(o.status == Status.FAILED for o in self.outcomes)

    def as_dict(self) -> dict[str, Any]:
        head = {"ran": self.ran, "holder": self.holder, "counts": self.counts(),
                "windows": [o.as_dict() for o in self.outcomes], "remaining": self.held_back,
                "waiting": self.waiting}
        if self.gated:
            return {**head, "idle_until": self.idle_until.isoformat() if self.idle_until else None}
        return {**head, "unplanned": self.unplanned}


def tick(ws: Workspace, at: datetime, *, ledger_url: str | None = None, workers: int = 1,
         should_stop: Callable[[], bool] | None = None, on_outcome: Callable[..., Any] | None = None) -> TickResult:
    """Plan, then run what is due (oldest first, `max_catch_up` per job), one tick per workspace at a time."""
    from runner.core.planner import job_plans, tasks_for
    from runner.core.workspace import producer_windows
    from runner.engine import gate
    from runner.engine.context import RunContext
    from runner.engine.pool import run_tasks
    from runner.engine.survey import survey
    from runner.io.ledger.leases import HeldLock
    from runner.io.ledger.store import open_ledger
    from runner.io.outputs import sweep_temporaries
    from runner.io.owners import owner_id

    watch = _gate_watch(ws)
    # what the gate watches, seen before planning: a change while the tick plans must not be absorbed
    seen = _gate_files(ws, watch)
    ledger = open_ledger(ws.root, ledger_url)
    owner = owner_id()
    idle = None
    try:
        with HeldLock(ledger, "tick", owner, ws.settings.lease.total_seconds()) as lock:
            if not lock.acquired:
                return TickResult(ran=False, holder=lock.holder())
            sweep_temporaries(ws, at)
            before = gate.ledger_stat(ws.root, ledger_url)  # this tick only reads it from here on
            assessed = survey(ws, ledger, at, None)
            plans = job_plans(ws, assessed, cap=True)
            items = [i for p in plans for i in p.due]
            if (not items and not any(p.counts.get(State.RUNNING) for p in plans) and not assessed.unplanned
                    and gate.ledger_stat(ws.root, ledger_url) == before):
                idle = assessed  # nothing due, nobody mid-window, no write while planning: may stop early
            # waiting windows whose producers run in this tick go along; they run if those finish
            runnable = {(i.job, i.window.key) for i in items}
            for p in plans:
                for w in p.waiting:
                    if any((pjob, pw.key) in runnable for _, pjob, pw in producer_windows(ws, w.job, w.window)):
                        items.append(w)
            tasks = tasks_for(ws, _dependency_sorted(ws, items))
            outcomes = run_tasks(tasks, RunContext(ws=ws, ledger=ledger, owner=owner), workers,
                                 on_outcome=on_outcome, should_stop=should_stop, leases=lock.leases)
            return TickResult(True, None, outcomes, {p.job: p.held_back for p in plans if p.held_back},
                              {p.job: len(p.waiting) for p in plans if p.waiting}, dict(assessed.unplanned))
    finally:
        ledger.dispose()  # closes SQLite cleanly (a checkpoint) before the gate looks at its file
        _update_gate(ws, ledger_url, idle, at, watch, seen)


def _dependency_sorted(ws: Workspace, items: list) -> list:
    rank = {name: i for i, name in enumerate(ws.order)}
    return sorted(items, key=lambda i: (rank[i.job], i.window.start))


def _gate_watch(ws: Workspace) -> tuple[list[str], list[str]] | None:
    """The input templates and python step module files the tick gate watches (None: cannot watch)."""
    from runner.engine.steps import StepError, module_file
    from runner.model.spec import FileInput, PythonStep

    templates = sorted({s.files for j in ws.jobs.values() for s in j.spec.inputs.values()
                        if isinstance(s, FileInput)})
    modules = []
    try:
        for job in ws.jobs.values():
            for step in job.spec.steps:
                if isinstance(step, PythonStep):
                    modules.append(str(module_file(ws.root, step.python.split(":")[0])))
    except StepError:
        return None
    return templates, sorted(set(modules))


def _gate_files(ws: Workspace, watch: tuple[list[str], list[str]] | None) -> str | None:
    from runner.engine import gate

    return gate.observe_files(ws.root, *watch) if watch is not None else None


def _update_gate(ws: Workspace, ledger_url: str | None, assessed, at: datetime,
                 watch: tuple[list[str], list[str]] | None, seen: str | None) -> None:
    """Write the tick gate after a tick that found nothing due (`assessed`), else remove it."""
    from runner.core.planner import next_change
    from runner.engine import gate

    if assessed is None or watch is None:
        gate.clear(ws.root)
        return
    gate.write(ws.root, ledger_url, *watch, next_change(ws, assessed, at), seen=seen)


def serve(load: Callable[[], Workspace], *, interval: float, clock: Callable[[], datetime],
          monotonic: Callable[[], float], sleep: Callable[[float], None], should_stop: Callable[[], bool],
          on_tick: Callable[[TickResult, datetime], None], on_error: Callable[[str, datetime | None], None],
          ledger_url: str | None = None, workers: int = 1) -> None:
    """Tick every `interval` seconds until `should_stop()`; between ticks, reload the jobs with `load`.

    A tick that raises is reported (`on_error`) and the loop goes on; job
    files that no longer load keep the previous ones (reported without an
    instant). Waits in steps of at most half a second, so a stop request is
    seen soon. The clock (ticks' instants), the monotonic timer (the interval)
    and `sleep` are injected: tests drive the loop without waiting.
    """
    ws = load()
    while not should_stop():
        started, now = monotonic(), clock()
        try:
            on_tick(tick(ws, now, ledger_url=ledger_url, workers=workers, should_stop=should_stop), now)
        except Exception as exc:  # noqa: BLE001 - a service keeps going; the error is logged
            on_error(f"tick failed: {exc}", now)
        while not should_stop() and monotonic() - started < interval:
            sleep(min(0.5, interval))
        if not should_stop():
            try:
                ws = load()
            except Exception as exc:  # noqa: BLE001 - keep the last valid jobs
                on_error(f"job files invalid, keeping the previous ones: {str(exc).splitlines()[0]}", None)
