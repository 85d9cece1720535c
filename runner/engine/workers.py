"""The worker side of running windows: the process every attempt runs in, and the fork server.

`worker_main` is the one entry point of a worker: it receives attempts over a
pipe, runs each with `runner.engine.window.run_attempt` and sends back what
happened (the local pool's supervisor, `runner.engine.pool`, is its only
caller today; a cluster executor would run the same function). Workers come
from a fork server that has imported weir's own modules (`PRELOAD`) but not
polars, which must not be forked once loaded.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import signal
from collections import deque
from multiprocessing.connection import Connection
from typing import Any

from runner.engine.context import RunContext
from runner.engine.window import run_attempt

# weir's modules a fork server imports once, so each worker starts without importing them (never polars)
PRELOAD = ["runner.engine.window", "runner.io.ledger.store", "runner.engine.loading", "runner.io.readers", "runner.engine.steps",
           "runner.io.outputs", "runner.io.casts", "runner.io.files"]


def worker_main(conn: Connection, ctx: RunContext, env: dict[str, str], cwd: str, threads: int) -> None:
    """A worker process: run the attempts the supervisor sends, one at a time, telling it what happens."""
    # Ctrl-C and a service manager's SIGTERM reach the whole process group: the supervisor decides what stops
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    _die_with_parent()
    _let_fork_server_go()
    os.environ.clear()
    os.environ.update(env)
    os.environ["POLARS_MAX_THREADS"] = str(threads)  # before polars is first imported, in this process
    os.chdir(cwd)
    conn.send(("ready", os.getpid()))
    pending: deque[Any] = deque()
    while True:
        if not pending:
            pending.append(conn.recv())
        while conn.poll():
            pending.append(conn.recv())
        if any(m is not None and m[0] == "stop" for m in pending):
            for m in pending:
                if m is not None and m[0] == "run":
                    conn.send(("dropped", m[1]))
            pending = deque(m for m in pending if m is None)
            continue
        msg = pending.popleft()
        if msg is None:
            return
        _, tid, attempt = msg
        conn.send(("start", tid))
        def claimed(fence: int, run_id: int, fingerprint: str | None, tid: int = tid) -> None:
            conn.send(("claimed", tid, fence, run_id, fingerprint))

        outcome = run_attempt(ctx, attempt, on_claim=claimed)
        conn.send(("end", tid, outcome.as_dict()))


def _die_with_parent() -> None:
    """Ask Linux to kill this worker when its parent ends, so no worker outlives a killed supervisor."""
    with contextlib.suppress(Exception):
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG (prctl(2))
    if os.getppid() == 1:
        os._exit(0)  # the parent is already gone


def warm_up() -> None:
    """Start the fork server now, so that its imports overlap with loading and planning here."""
    worker_processes()


def _let_fork_server_go() -> None:
    """Drop this worker's hold on the fork server, so that the server ends with the supervisor.

    A fork server lives while any process holds the write end of its "alive"
    pipe, and multiprocessing hands one to each child it forks. Without this,
    a supervisor killed alone would leave its workers (and their hung steps)
    running; with it the server ends, and the kernel kills its children
    (PR_SET_PDEATHSIG, set by `_die_with_parent`).
    """
    with contextlib.suppress(Exception):
        from multiprocessing import forkserver

        server: Any = forkserver._forkserver  # noqa: SLF001 - the fd is private
        if server._forkserver_alive_fd is not None:
            os.close(server._forkserver_alive_fd)
            server._forkserver_alive_fd = None


def worker_processes() -> Any:
    if "forkserver" not in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("spawn")
    mp = multiprocessing.get_context("forkserver")
    mp.set_forkserver_preload(PRELOAD)
    _start_fork_server()
    return mp


def _start_fork_server() -> None:
    """Start the fork server ignoring SIGINT and SIGTERM, which it and its children then keep.

    The fork server sits in this process group, where Ctrl-C and a service
    manager's SIGTERM arrive too; it must outlive them so that its workers
    (which it parents, and which die with it) finish or are stopped by this
    process. Signals ignored at exec stay ignored (POSIX execve), so they are
    ignored here for the instant the server starts. It ends when this process does.
    """
    import threading
    from multiprocessing import forkserver

    if threading.current_thread() is not threading.main_thread():
        forkserver.ensure_running()  # signal dispositions can only be changed from the main thread
        return
    saved = {sig: signal.signal(sig, signal.SIG_IGN) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        forkserver.ensure_running()
    finally:
        for sig, handler in saved.items():
            signal.signal(sig, handler)
