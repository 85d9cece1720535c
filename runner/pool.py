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

from runner.execute import Outcome, RunContext, precheck, run_window
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

    ws = load_workspace(settings.root, thorough=False)
    return RunContext(ws=ws, ledger=Ledger(settings.ledger_url))


def _init_worker(settings: Settings) -> None:
    _worker["ctx"] = _context(settings)
    _worker["settings"] = settings


def _run_in_worker(job: str, window_key: str) -> dict[str, Any]:
    ctx: RunContext = _worker["ctx"]
    settings: Settings = _worker["settings"]
    window = ctx.ws.cadence(job).window(_key_to_instant(window_key))
    return run_window(ctx, job, window, force=settings.force).as_dict()


def _run_chunk_in_worker(items: list[tuple[str, str]]) -> list[dict[str, Any]]:
    """Several independent windows in one message: fewer round trips for small windows."""
    return [_run_in_worker(job, key) for job, key in items]


def _key_to_instant(key: str) -> str:
    return key.replace("Z", "+00:00")


def default_workers() -> int:
    return max(1, os.cpu_count() or 1)


POOL_STARTUP_SECONDS = 3.0  # about what starting worker processes costs (imports): measured, rounded up
DEFAULT_WINDOW_SECONDS = 0.2  # a window's guess before any of its job's runs are recorded
CHUNK = 16  # most windows handed to a worker in one message


def run_tasks(tasks: list[Task], settings: Settings, workers: int,
              on_outcome: Callable[[Task, Outcome], None] | None = None,
              should_stop: Callable[[], bool] | None = None,
              context: RunContext | None = None) -> list[Outcome]:
    """Run `tasks` respecting dependencies; return one Outcome per task, in task order.

    Windows already current are skipped here without a worker. Worker
    processes start only when enough windows need running at once; until then
    (and always with one worker) windows run in this process. `should_stop` is
    polled between windows: when it says so, nothing new starts and the
    remaining tasks are reported as `not started`.
    """
    outcomes: list[Outcome | None] = [None] * len(tasks)
    dependants: dict[int, list[int]] = {i: [] for i in range(len(tasks))}
    remaining = {i: len(t.deps) for i, t in enumerate(tasks)}
    for i, t in enumerate(tasks):
        for d in t.deps:
            dependants[d].append(i)
    ready = [i for i, n in remaining.items() if n == 0]
    ready.reverse()
    ctx = context or _context(settings)

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

    estimate = _estimates(ctx, {t.job for t in tasks}) if workers > 1 else {}
    # only a window recorded done can be current: the others need no fingerprint to know they must run
    recorded = {job: ctx.ledger.done_keys(job) for job in {t.job for t in tasks}} if not settings.force else {}
    to_run: list[int] = []
    prepared: dict[int, Any] = {}
    running: dict[Future[list[dict[str, Any]]], list[int]] = {}
    pool: ProcessPoolExecutor | None = None
    saved_env = os.environ.get("POLARS_MAX_THREADS")
    try:
        while (ready or to_run or running) and not (stopped() and not running):
            while ready:
                i = ready.pop()
                if outcomes[i] is not None:
                    continue
                t = tasks[i]
                if settings.force or t.window.key not in recorded[t.job]:
                    current = False
                else:
                    current, prepared[i] = precheck(ctx, t.job, t.window)
                if current:
                    finish(i, Outcome(t.job, t.window.id, "skipped", "current: already done with this fingerprint"))
                else:
                    to_run.append(i)
            if stopped():
                to_run.clear()
                if not running:
                    break
            if pool is None and workers > 1 and len(to_run) > 1 and (
                    sum(estimate[tasks[i].job] for i in to_run) > POOL_STARTUP_SECONDS):
                pool = _start_pool(settings, workers)
            if pool is not None:
                while to_run and len(running) < workers * 2:
                    # chunks that keep every worker busy without holding back dependants for long
                    size = max(1, min(CHUNK, len(to_run) // (workers * 2)))
                    chunk, to_run = to_run[:size], to_run[size:]
                    for i in chunk:
                        prepared.pop(i, None)  # the worker looks for itself
                    items = [(tasks[i].job, tasks[i].window.key) for i in chunk]
                    running[pool.submit(_run_chunk_in_worker, items)] = chunk
                if running:
                    done, _ = wait(running, return_when=FIRST_COMPLETED)
                    for fut in done:
                        chunk = running.pop(fut)
                        for i, outcome in zip(chunk, _results(fut, [tasks[i] for i in chunk]), strict=True):
                            finish(i, outcome)
            elif to_run:
                i = to_run.pop(0)
                t = tasks[i]
                finish(i, run_window(ctx, t.job, t.window, force=settings.force, prepared=prepared.pop(i, None)))
    except BaseException:
        if pool is not None:
            pool.shutdown(wait=False, cancel_futures=True)
            pool = None
        raise
    finally:
        if pool is not None:
            pool.shutdown(wait=True)
        if saved_env is None:
            os.environ.pop("POLARS_MAX_THREADS", None)
        else:
            os.environ["POLARS_MAX_THREADS"] = saved_env
    return [o or Outcome(t.job, t.window.id, "not started", "stopped before it started")
            for t, o in zip(tasks, outcomes, strict=True)]


def _estimates(ctx: RunContext, jobs: set[str]) -> dict[str, float]:
    """Median recorded seconds per window of each job (a default guess when none ran yet)."""
    out = {}
    for job in jobs:
        try:
            stats = ctx.ledger.run_stats(job)
            median = stats["seconds"].median() if stats.height else None
        except Exception:  # noqa: BLE001 - an estimate is only a hint
            median = None
        out[job] = float(median) if median is not None else DEFAULT_WINDOW_SECONDS
    return out


def _start_pool(settings: Settings, workers: int) -> ProcessPoolExecutor:
    cores = os.cpu_count() or 1
    os.environ["POLARS_MAX_THREADS"] = str(max(1, cores // workers))
    return ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_init_worker, initargs=(settings,))


def _results(fut: Future[list[dict[str, Any]]], chunk: list[Task]) -> list[Outcome]:
    try:
        return [Outcome(**r) for r in fut.result()]
    except Exception as exc:  # noqa: BLE001 - a worker died; report it and go on
        return [Outcome(t.job, t.window.id, "failed", f"worker failed: {type(exc).__name__}: {exc}",
                        error=str(exc)) for t in chunk]
