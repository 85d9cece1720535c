"""Parallel execution of a plan: dependency order, bounded workers, progress callbacks.

Tasks run in worker processes (spawned, so polars' thread pools are never
forked), at most `workers` at a time; a task starts when every task it
depends on has finished. When a dependency fails or is left waiting, its
dependants are not run and are reported as waiting. With one worker
everything runs in this process.
"""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from runner.execute import Outcome, RunContext, run_window
from runner.planner import Task

_worker: dict[str, Any] = {}


@dataclass
class Settings:
    root: Path
    ledger_url: str
    force: bool = False


def _context(settings: Settings) -> RunContext:
    from runner.ledger import Ledger
    from runner.workspace import load_workspace

    ws = load_workspace(settings.root)
    return RunContext(ws=ws, ledger=Ledger(settings.ledger_url))


def _init_worker(settings: Settings) -> None:
    _worker["ctx"] = _context(settings)
    _worker["settings"] = settings


def _run_in_worker(job: str, window_key: str) -> dict[str, Any]:
    ctx: RunContext = _worker["ctx"]
    settings: Settings = _worker["settings"]
    window = ctx.ws.cadence(job).window(_key_to_instant(window_key))
    return run_window(ctx, job, window, force=settings.force).as_dict()


def _key_to_instant(key: str) -> str:
    return key.replace("Z", "+00:00")


def default_workers() -> int:
    return max(1, os.cpu_count() or 1)


def run_tasks(tasks: list[Task], settings: Settings, workers: int,
              on_outcome: Callable[[Task, Outcome], None] | None = None,
              should_stop: Callable[[], bool] | None = None,
              context: RunContext | None = None) -> list[Outcome]:
    """Run `tasks` respecting dependencies; return one Outcome per task, in task order.

    `should_stop` is polled between windows: when it says so, nothing new starts
    and the remaining tasks are reported as `not started`.
    """
    outcomes: list[Outcome | None] = [None] * len(tasks)
    dependants: dict[int, list[int]] = {i: [] for i in range(len(tasks))}
    remaining = {i: len(t.deps) for i, t in enumerate(tasks)}
    for i, t in enumerate(tasks):
        for d in t.deps:
            dependants[d].append(i)
    ready = [i for i, n in remaining.items() if n == 0]
    ready.reverse()

    def finish(i: int, outcome: Outcome) -> None:
        outcomes[i] = outcome
        if on_outcome is not None:
            on_outcome(tasks[i], outcome)
        for j in dependants[i]:
            if outcome.status not in ("done", "skipped"):
                if outcomes[j] is None:
                    reason = f"not run: {tasks[i].job} {tasks[i].window.id} {outcome.status}"
                    finish(j, Outcome(tasks[j].job, tasks[j].window.id, "waiting", reason))
                continue
            remaining[j] -= 1
            if remaining[j] == 0 and outcomes[j] is None:
                ready.append(j)

    def stopped() -> bool:
        return should_stop is not None and should_stop()

    workers = max(1, min(workers, len(tasks) or 1))
    if workers == 1:
        ctx = context or _context(settings)
        while ready and not stopped():
            i = ready.pop()
            if outcomes[i] is not None:
                continue
            t = tasks[i]
            finish(i, run_window(ctx, t.job, t.window, force=settings.force))
    else:
        _parallel(tasks, settings, workers, ready, outcomes, finish, stopped)
    return [o or Outcome(t.job, t.window.id, "not started", "stopped before it started")
            for t, o in zip(tasks, outcomes, strict=True)]


def _parallel(tasks: list[Task], settings: Settings, workers: int, ready: list[int],
              outcomes: list[Outcome | None], finish: Callable[[int, Outcome], None],
              stopped: Callable[[], bool]) -> None:
    cores = os.cpu_count() or 1
    previous = os.environ.get("POLARS_MAX_THREADS")
    os.environ["POLARS_MAX_THREADS"] = str(max(1, cores // workers))
    ctx = multiprocessing.get_context("spawn")
    running: dict[Future[dict[str, Any]], int] = {}
    try:
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker,
                                 initargs=(settings,)) as pool:
            try:
                while ready or running:
                    while ready and len(running) < workers * 2 and not stopped():
                        i = ready.pop()
                        if outcomes[i] is not None:
                            continue
                        running[pool.submit(_run_in_worker, tasks[i].job, tasks[i].window.key)] = i
                    if not running:
                        break
                    done, _ = wait(running, return_when=FIRST_COMPLETED)
                    for fut in done:
                        i = running.pop(fut)
                        try:
                            outcome = Outcome(**fut.result())
                        except Exception as exc:  # noqa: BLE001 - a worker died; report, go on
                            outcome = Outcome(tasks[i].job, tasks[i].window.id, "failed",
                                              f"worker failed: {type(exc).__name__}: {exc}",
                                              error=str(exc))
                        finish(i, outcome)
            except BaseException:
                pool.shutdown(wait=False, cancel_futures=True)
                raise
    finally:
        if previous is None:
            os.environ.pop("POLARS_MAX_THREADS", None)
        else:
            os.environ["POLARS_MAX_THREADS"] = previous
