"""Running a plan in supervised worker processes: dependency order, time limits, crashes, claims.

Every attempt at a window runs in a worker process (`runner.engine.workers`),
never in this one: only a separate process can be stopped whatever its step
does (sleeps, spins in a regular expression without letting go of the
interpreter, calls `os._exit`, is killed for memory). This process, the
*supervisor*:

- hands attempts to at most `workers` processes over pipes (two queued per
  worker, so none waits for the next), in dependency order: a task starts
  when every task it depends on has finished; dependants of a task that did
  not end done or skipped are reported waiting;
- holds the claims: workers take them in its name and its `Leases` thread
  renews them, so a worker that holds the interpreter cannot let them lapse;
  a worker whose claim another runner took over is stopped;
- stops a worker whose attempt outlives the job's `time_allowed` and records
  the window failed ("time limit of 30m reached"); records the window of a
  worker that died failed with its exit status or signal; starts a
  replacement and goes on with everything else;
- retries failed attempts (`retries:`, after `retry_delay` doubling), keeping
  the claim in between;
- on an exception (Ctrl-C, or SIGTERM turned into one by the CLI) stops every
  worker, records their runs abandoned, releases its claims and re-raises.

Workers come from a fork server that has imported weir's own modules but not
polars (polars must not be forked once loaded), so starting one costs about
a quarter of a second after the first; see docs/performance.md.
"""

from __future__ import annotations

import contextlib
import os
import signal
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from typing import Any

from runner.core.planner import Task
from runner.core.states import Status
from runner.engine.context import RunContext
from runner.engine.window import LOST, Attempt, Outcome, precheck, record_failure
from runner.engine.workers import worker_main, worker_processes
from runner.io.ledger.leases import Leases
from runner.model.timeutil import short_duration

DEPTH = 2  # attempts queued per worker: the next one is already there when the current one ends
POLL = 0.5  # longest wait between looks at the stop flag, deadlines and lost claims


def default_workers() -> int:
    return max(1, os.cpu_count() or 1)


# ---------------------------------------------------------------- the worker side


# ---------------------------------------------------------------- the supervisor side


@dataclass
class _Worker:
    proc: Any
    conn: Connection
    queue: list[int] = field(default_factory=list)  # tids sent and not ended, in order
    current: int | None = None  # the tid it has started
    started: float = 0.0  # when it started `current` (monotonic)
    began: bool = False  # it has started an attempt
    dead: bool = False


@dataclass
class _Flight:
    """An attempt handed to a worker."""

    task: int
    attempt: Attempt
    fence: int | None = None
    run_id: int | None = None
    fingerprint: str | None = None


def run_tasks(tasks: list[Task], ctx: RunContext, workers: int, force: bool = False,
              on_outcome: Callable[[Task, Outcome], None] | None = None,
              should_stop: Callable[[], bool] | None = None, leases: Leases | None = None) -> list[Outcome]:
    """Run `tasks` respecting dependencies; return one Outcome per task, in task order.

    Windows already current are skipped here without a worker. `should_stop`
    is polled at least twice a second: once it says so, nothing new starts,
    attempts already running finish, and the remaining tasks are reported as
    `not started`. `leases` renews the claims (a running one of the same
    owner, such as the tick lock's; else one is started here).
    """
    return _Supervisor(tasks, ctx, max(1, workers), force, on_outcome, should_stop, leases).run()


class _Supervisor:
    def __init__(self, tasks: list[Task], ctx: RunContext, workers: int, force: bool,
                 on_outcome: Callable[[Task, Outcome], None] | None, should_stop: Callable[[], bool] | None,
                 leases: Leases | None):
        self.tasks, self.ctx, self.max_workers, self.force = tasks, ctx, workers, force
        self.on_outcome, self.should_stop = on_outcome, should_stop
        self.own_leases = leases is None
        self.leases = leases if leases is not None else Leases(ctx.ledger, ctx.owner, ctx.lease)
        self.outcomes: list[Outcome | None] = [None] * len(tasks)
        self.dependants: dict[int, list[int]] = {i: [] for i in range(len(tasks))}
        self.remaining = {i: len(t.deps) for i, t in enumerate(tasks)}
        for i, t in enumerate(tasks):
            for d in t.deps:
                self.dependants[d].append(i)
        self.ready = [i for i, n in self.remaining.items() if n == 0]
        self.ready.reverse()
        self.queue: deque[tuple[int, Attempt]] = deque()
        self.delayed: list[tuple[float, int, Attempt]] = []  # retries: (due, task, attempt)
        self.flights: dict[int, _Flight] = {}
        self.workers: list[_Worker] = []
        self.spent: dict[int, float] = {}
        self.last: dict[int, Outcome] = {}  # a task's last failed attempt, while its retry waits
        self.stopping = False
        self.next_tid = 0
        self.recorded: dict[str, set[str]] = {}

    # ------------------------------------------------------------ the loop

    def run(self) -> list[Outcome]:
        if not self.force:
            # only a window recorded done can be current: the others need no fingerprint to know they must run
            self.recorded = {job: self.ctx.ledger.done_keys(job) for job in {t.job for t in self.tasks}}
        if self.own_leases:
            self.leases.start()
        try:
            while self._step():
                pass
        except BaseException:
            self._abort()
            raise
        finally:
            self._close()
        return [o or Outcome(t.job, t.window.id, Status.NOT_STARTED, "stopped before it started")
                for t, o in zip(self.tasks, self.outcomes, strict=True)]

    def _step(self) -> bool:
        """One round: start what can start, wait for news, act on it. False when everything is over."""
        if not self.stopping and self.should_stop is not None and self.should_stop():
            self._stop()
        while True:
            self._take_ready()
            self._take_due_retries()
            self._dispatch()
            if not self.ready or len(self.queue) >= self._backlog:
                break  # every ready task is queued, or the workers have enough to do for now
        if not (self.flights or self.queue or self.delayed or self.ready):
            return False
        now = time.monotonic()
        timeout = POLL
        for w in self.workers:
            if w.current is not None:
                timeout = min(timeout, w.started + self._limit(w.current) - now)
        if self.delayed:
            timeout = min(timeout, min(d for d, _, _ in self.delayed) - now)
        handles: list[Any] = [w.conn for w in self.workers] + [w.proc.sentinel for w in self.workers]
        if handles:
            ready = wait(handles, timeout=max(0.0, timeout))
        else:
            time.sleep(max(0.0, timeout))  # only a retry's delay to wait for
            ready = []
        for w in list(self.workers):
            if w.conn in ready:
                self._read(w)
            if w.proc.sentinel in ready or w.dead:
                self._read(w)  # whatever it said before it ended
                self._died(w, self._death_reason(w))
        self._enforce_limits()
        self._stop_lost()
        return True

    @property
    def _backlog(self) -> int:
        """Attempts kept ready to hand out; prechecking more first would only keep workers waiting."""
        return 2 * DEPTH * self.max_workers

    def _take_ready(self) -> None:
        while self.ready and len(self.queue) < self._backlog:
            i = self.ready.pop()
            if self.outcomes[i] is not None:
                continue
            if self.stopping:
                continue  # reported `not started`
            t = self.tasks[i]
            if not self.force and t.window.key in self.recorded.get(t.job, ()) and precheck(self.ctx, t.job, t.window):
                self._finish(i, Outcome(t.job, t.window.id, Status.SKIPPED, "current: already done with this fingerprint"))
            else:
                self.queue.append((i, Attempt(t.job, t.window.key, 1, self.force)))

    def _take_due_retries(self) -> None:
        now = time.monotonic()
        due = [d for d in self.delayed if d[0] <= now or self.stopping]
        for item in due:
            self.delayed.remove(item)
            _, i, attempt = item
            self._requeue(i, attempt, last=True)

    def _requeue(self, i: int, attempt: Attempt, last: bool = False) -> None:
        """Queue an attempt again (a retry, or one a dying worker never started); after a stop, drop it.

        A dropped retry gives its claim up and its task keeps its last failure.
        """
        if not self.stopping:
            if last:
                self.queue.append((i, attempt))
            else:
                self.queue.appendleft((i, attempt))
            return
        if attempt.fence is not None:
            with contextlib.suppress(Exception):
                self.ctx.ledger.release(attempt.job, attempt.window_key, self.ctx.owner)
            self.leases.forget(attempt.job, attempt.window_key)
            self._finish(i, self.last[i])

    def _dispatch(self) -> None:
        while self.queue and not self.stopping:
            worker = self._free_worker()
            if worker is None:
                return
            i, attempt = self.queue.popleft()
            tid = self.next_tid
            self.next_tid += 1
            self.flights[tid] = _Flight(i, attempt, fence=attempt.fence)
            try:
                worker.conn.send(("run", tid, attempt))
            except OSError:
                worker.dead = True
            worker.queue.append(tid)

    def _free_worker(self) -> _Worker | None:
        alive = [w for w in self.workers if not w.dead]
        idle = [w for w in alive if not w.queue]
        if idle:
            return idle[0]
        if len(self.workers) < self.max_workers:
            return self._start_worker()
        shallow = [w for w in alive if len(w.queue) < DEPTH]
        return min(shallow, key=lambda w: len(w.queue)) if shallow else None

    def _start_worker(self) -> _Worker:
        mp = worker_processes()
        parent, child = mp.Pipe()
        threads = max(1, (os.cpu_count() or 1) // self.max_workers)
        proc = mp.Process(target=worker_main, name="weir-worker", daemon=True,
                          args=(child, self.ctx, dict(os.environ), os.getcwd(), threads))
        proc.start()
        child.close()
        worker = _Worker(proc, parent)
        self.workers.append(worker)
        return worker

    # ------------------------------------------------------------ news from workers

    def _read(self, w: _Worker) -> None:
        while True:
            try:
                if not w.conn.poll():
                    return
                msg = w.conn.recv()
            except (EOFError, OSError):
                w.dead = True
                return
            kind = msg[0]
            if kind == "start":
                w.current, w.started, w.began = msg[1], time.monotonic(), True
            elif kind == "claimed":
                _, tid, fence, run_id, fingerprint = msg
                flight = self.flights[tid]
                flight.fence, flight.run_id, flight.fingerprint = fence, run_id, fingerprint
                self.leases.watch(flight.attempt.job, flight.attempt.window_key, fence)
            elif kind == "end":
                tid = msg[1]
                self._left(w, tid)
                flight = self.flights.pop(tid)
                self._ended(flight, Outcome(**msg[2]))
            elif kind == "dropped":
                self._left(w, msg[1])
                flight = self.flights.pop(msg[1])
                self._requeue(flight.task, flight.attempt)

    def _left(self, w: _Worker, tid: int) -> None:
        if tid in w.queue:
            w.queue.remove(tid)
        if w.current == tid:
            w.current = None

    def _ended(self, flight: _Flight, outcome: Outcome) -> None:
        """An attempt is over: retry it (keeping its claim), or the task is finished."""
        i, attempt = flight.task, flight.attempt
        self.spent[i] = self.spent.get(i, 0.0) + outcome.seconds
        spec = self.ctx.ws.jobs[attempt.job].spec
        held = flight.fence if flight.fence is not None else attempt.fence
        if (outcome.status == Status.FAILED and attempt.number <= spec.retries and held is not None
                and not self.stopping):
            delay = spec.retry_delay.total_seconds() * (2 ** (attempt.number - 1))
            self.last[i] = outcome
            self.delayed.append((time.monotonic() + delay, i,
                                 Attempt(attempt.job, attempt.window_key, attempt.number + 1, attempt.force, held)))
            return
        self.leases.forget(attempt.job, attempt.window_key)
        if outcome.status == Status.FAILED and held is not None and attempt.number <= spec.retries:
            with contextlib.suppress(Exception):  # stopping: the retry will not come, nor will the claim be needed
                self.ctx.ledger.release(attempt.job, attempt.window_key, self.ctx.owner)
        outcome.seconds = self.spent[i]
        self._finish(i, outcome)

    def _finish(self, i: int, outcome: Outcome) -> None:
        self.outcomes[i] = outcome
        if self.on_outcome is not None:
            self.on_outcome(self.tasks[i], outcome)
        for j in self.dependants[i]:
            if outcome.status not in (Status.DONE, Status.SKIPPED):
                if self.outcomes[j] is None:
                    t = self.tasks[i]
                    reason = f"not run: {t.job} {t.window.id} {outcome.status}"
                    self._finish(j, Outcome(self.tasks[j].job, self.tasks[j].window.id, Status.WAITING, reason))
                continue
            self.remaining[j] -= 1
            if self.remaining[j] == 0 and self.outcomes[j] is None:
                self.ready.append(j)

    # ------------------------------------------------------------ workers that die, overrun or lose claims

    def _limit(self, tid: int) -> float:
        return self.ctx.ws.time_allowed(self.flights[tid].attempt.job).total_seconds()

    def _enforce_limits(self) -> None:
        now = time.monotonic()
        for w in list(self.workers):
            if w.current is not None and not w.dead and now - w.started >= self._limit(w.current):
                limit = self.ctx.ws.time_allowed(self.flights[w.current].attempt.job)
                self._kill(w)
                self._died(w, f"time limit of {short_duration(limit)} reached (time_allowed); "
                              "the worker process running it was stopped")

    def _stop_lost(self) -> None:
        lost = self.leases.lost()
        if not lost:
            return
        for w in list(self.workers):
            flight = self.flights.get(w.current) if w.current is not None else None
            if flight is not None and (flight.attempt.job, flight.attempt.window_key) in lost:
                self._kill(w)
                self._died(w, None)

    def _kill(self, w: _Worker) -> None:
        with contextlib.suppress(Exception):
            w.proc.kill()
        w.proc.join(timeout=10)
        self._read(w)  # news sent before it was stopped (an attempt may have ended just now)
        w.dead = True

    def _death_reason(self, w: _Worker) -> str:
        w.proc.join(timeout=10)
        code = w.proc.exitcode
        if code is not None and code < 0:
            try:
                name = signal.Signals(-code).name
            except ValueError:
                name = "unknown signal"
            extra = "; the system kills processes this way when memory runs out" if -code == signal.SIGKILL else ""
            return f"the worker process running it was killed by signal {-code} ({name}{extra})"
        return f"the worker process running it ended with exit status {code}"

    def _died(self, w: _Worker, reason: str | None) -> None:
        """`w` is gone: its started attempt failed with `reason` (None: its claim was lost); the rest go back."""
        if w in self.workers:
            self.workers.remove(w)
        with contextlib.suppress(Exception):
            w.conn.close()
        blamed = w.current
        if blamed is None and w.queue and not w.began and w.proc.exitcode not in (0, None):
            blamed = w.queue[0]  # it died before starting anything: its first attempt answers for it
        for tid in reversed(w.queue):
            if tid != blamed:
                flight = self.flights.pop(tid)
                self._requeue(flight.task, flight.attempt)
        if blamed is None:
            return
        flight = self.flights.pop(blamed)
        seconds = time.monotonic() - w.started if w.current == blamed else 0.0
        attempt = flight.attempt
        if reason is None:
            if flight.run_id is not None:
                with contextlib.suppress(Exception):
                    self.ctx.ledger.abandon_run(flight.run_id, LOST)
            window_id = self.tasks[flight.task].window.id
            self.leases.forget(attempt.job, attempt.window_key)
            self._ended(flight, Outcome(attempt.job, window_id, Status.CLAIMED, LOST, flight.run_id, seconds=seconds))
            return

        def claimed(fence: int, run_id: int, fingerprint: str | None) -> None:
            flight.fence, flight.run_id = fence, run_id
            self.leases.watch(attempt.job, attempt.window_key, fence)

        outcome = record_failure(self.ctx, attempt, reason, run_id=flight.run_id, fence=flight.fence,
                                 fingerprint=flight.fingerprint, seconds=seconds, on_claim=claimed)
        outcome.seconds = seconds
        self._ended(flight, outcome)

    # ------------------------------------------------------------ stopping

    def _stop(self) -> None:
        """Start nothing new; attempts already running finish."""
        self.stopping = True
        for w in self.workers:
            with contextlib.suppress(Exception):
                w.conn.send(("stop",))
        queued, self.queue = list(self.queue), deque()
        for i, attempt in queued:
            self._requeue(i, attempt)

    def _abort(self) -> None:
        """Interrupted: stop every worker now, record their runs abandoned, release this runner's claims."""
        for w in self.workers:
            with contextlib.suppress(Exception):
                w.proc.kill()  # workers ignore SIGTERM and SIGINT: they wait for this process to decide
        for w in self.workers:
            w.proc.join(timeout=10)
        self.workers.clear()
        with contextlib.suppress(Exception):
            self.ctx.ledger.release_claims(self.ctx.owner, "interrupted: its runner was stopped while it ran")

    def _close(self) -> None:
        if self.own_leases:
            self.leases.stop()
        for w in self.workers:
            with contextlib.suppress(Exception):
                w.conn.send(None)
        for w in self.workers:
            w.proc.join(timeout=10)
            if w.proc.exitcode is None:
                with contextlib.suppress(Exception):
                    w.proc.kill()
                w.proc.join(timeout=5)
            with contextlib.suppress(Exception):
                w.conn.close()
        self.workers.clear()
