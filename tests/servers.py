"""Real servers on loopback for the tests: PostgreSQL, a Dask cluster, an HTTP receiver.

tests/conftest.py registers the fixtures; a test only asks for one:

* `postgres_server` (session): a throwaway PostgreSQL cluster (`initdb` + `pg_ctl`) on a free
  port of 127.0.0.1, its data and Unix socket in a temporary folder, trust authentication (any
  password in a URL is accepted), the server's default time zone UTC. As root the binaries run
  as the `postgres` system user through `runuser`. Binaries come from PATH or
  /usr/lib/postgresql/*/bin (Debian's package `postgresql`).
* `make_pg_database` (function): `make_pg_database(timezone="Europe/Berlin")` creates a fresh
  database (CREATE DATABASE from template0, optionally ALTER DATABASE ... SET timezone) and
  returns its SQLAlchemy URL; every database it made is dropped when the test ends.
* `pg_url` (function): the URL of one fresh database.
  `postgres_server.client_env(pgtz="Asia/Tokyo")` is the environment for a child process whose
  PostgreSQL sessions take that time zone (libpq reads PGTZ at connect).
* `dask_cluster` (a session's scheduler and two single-threaded worker processes, `python -m dask`
  subprocesses without nannies, all on 127.0.0.1, their HTTP diagnostics too, no dashboard):
  `.address`, `.client()`, `.worker_pids()`, `.kill_worker(i)` (SIGKILL, as a crash). Each test
  starts with two live workers: one killed by an earlier test is replaced first. Workers run this virtual environment's Python with the
  repository and tests/ on PYTHONPATH, so they import `runner` and functions from test modules.
* `http_receiver` (function): a standard-library HTTP server on 127.0.0.1 recording every
  request; `script` answers the next requests in turn, `default` every one after (200; 500; "hang").

Missing binaries or client libraries skip with a reason naming what to install; CI sets
WEIR_NO_SKIPS=1, which turns those skips into failures (tests/conftest.py). Every server is
stopped and its folder removed at the end of the session, failing tests or not (and at exit
of the interpreter, should teardown not run); worker and scheduler processes also die with
the pytest process (PR_SET_PDEATHSIG).
"""

from __future__ import annotations

import atexit
import contextlib
import importlib
import itertools
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from email.message import Message
from glob import glob
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any, NamedTuple

import pytest

ROOT = Path(__file__).resolve().parent.parent
TESTS = Path(__file__).resolve().parent
LOOPBACK = "127.0.0.1"
START_BOUND = 120.0  # seconds a server may take to come up on a loaded machine: a hang guard only


def free_port() -> int:
    """A loopback port free right now (bound, then released: the caller retries if it is taken)."""
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


def _die_with_parent() -> None:
    """In a child before exec: receive SIGKILL when the process that started it dies (Linux)."""
    with contextlib.suppress(Exception):
        import ctypes

        pr_set_pdeathsig = 1  # from <linux/prctl.h>
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(pr_set_pdeathsig, signal.SIGKILL)


# ---------------------------------------------------------------- PostgreSQL


def find_pg_bin() -> Path | None:
    """The folder holding initdb and pg_ctl: on PATH, else the newest /usr/lib/postgresql/*/bin."""
    on_path = shutil.which("pg_ctl")
    if on_path and shutil.which("initdb"):
        return Path(os.path.realpath(on_path)).parent

    def major(folder: str) -> int:
        found = re.search(r"/postgresql/(\d+)/bin$", folder)
        return int(found.group(1)) if found else -1

    for folder in sorted(glob("/usr/lib/postgresql/*/bin"), key=major, reverse=True):
        if (Path(folder) / "pg_ctl").exists() and (Path(folder) / "initdb").exists():
            return Path(folder)
    return None


@dataclass
class PostgresServer:
    """A running throwaway cluster; every URL connects as the superuser `postgres` over TCP."""

    port: int
    base: Path  # the temporary folder: data/, sock/, server.log
    bin_dir: Path
    as_postgres: bool  # binaries run through `runuser -u postgres --`
    host: str = LOOPBACK
    user: str = "postgres"
    _names: Iterator[int] = field(default_factory=itertools.count, repr=False)
    _stopped: bool = field(default=False, repr=False)

    @property
    def data_dir(self) -> Path:
        return self.base / "data"

    @property
    def socket_dir(self) -> Path:
        return self.base / "sock"

    @property
    def log_file(self) -> Path:
        return self.base / "server.log"

    def dsn(self, dbname: str = "postgres") -> str:
        """A libpq connection URI (for psycopg.connect, psql)."""
        return f"postgresql://{self.user}@{self.host}:{self.port}/{dbname}"

    def url(self, dbname: str = "postgres") -> str:
        """A SQLAlchemy URL with the psycopg 3 driver."""
        return f"postgresql+psycopg://{self.user}@{self.host}:{self.port}/{dbname}"

    @property
    def admin_url(self) -> str:
        return self.url("postgres")

    def connect(self, dbname: str = "postgres", **options: Any):
        """A psycopg connection in autocommit mode (close it, or use it in a `with`)."""
        import psycopg

        return psycopg.connect(self.dsn(dbname), autocommit=True, **options)

    def new_database(self, *, timezone: str | None = None, name: str | None = None) -> str:
        """Create an empty database (from template0) and return its SQLAlchemy URL.

        With `timezone`, `ALTER DATABASE ... SET timezone TO` it, so every session opened on it
        afterwards starts in that zone (unless the client asks for another, e.g. by PGTZ).
        The database lives until `drop_database` or the end of the session.
        """
        from psycopg import sql

        name = name or f"weir_t{os.getpid()}_{next(self._names)}"
        with self.connect() as conn:
            conn.execute(sql.SQL("CREATE DATABASE {} TEMPLATE template0").format(sql.Identifier(name)))
            if timezone is not None:
                conn.execute(sql.SQL("ALTER DATABASE {} SET timezone TO {}").format(
                    sql.Identifier(name), sql.Literal(timezone)))
        return self.url(name)

    def drop_database(self, name_or_url: str) -> None:
        """Drop a database, ending any session still open on it."""
        from psycopg import sql

        name = name_or_url.rsplit("/", 1)[-1].split("?", 1)[0]
        with self.connect() as conn:
            conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name)))

    def client_env(self, *, pgtz: str | None = None, base: dict[str, str] | None = None) -> dict[str, str]:
        """The environment for a child process; with `pgtz`, its sessions start in that zone."""
        env = dict(os.environ if base is None else base)
        if pgtz is not None:
            env["PGTZ"] = pgtz
        return env

    def stop(self) -> None:
        """Stop the server at once (`pg_ctl stop -m immediate`) and remove its folder. Idempotent."""
        if self._stopped:
            return
        self._stopped = True
        try:
            _pg(self, "pg_ctl", "stop", "-D", str(self.data_dir), "-m", "immediate", "-w", "-t", "60",
                check=False)
        finally:
            _kill_postmaster(self.data_dir)
            shutil.rmtree(self.base, ignore_errors=True)


def _pg(server: PostgresServer, program: str, *args: str, check: bool = True) -> subprocess.CompletedProcess:
    command = [str(server.bin_dir / program), *args]
    if server.as_postgres:
        command = ["runuser", "-u", "postgres", "--", *command]
    done = subprocess.run(command, capture_output=True, text=True, timeout=START_BOUND, cwd=server.base)
    if check and done.returncode != 0:
        log = server.log_file.read_text(errors="replace")[-3000:] if server.log_file.exists() else ""
        raise RuntimeError(f"{program} {' '.join(args)} exited {done.returncode}:\n{done.stdout}{done.stderr}"
                           f"\n--- server log ---\n{log}")
    return done


def _kill_postmaster(data_dir: Path) -> None:
    """Last resort when pg_ctl could not stop it: SIGKILL the pid in postmaster.pid."""
    with contextlib.suppress(OSError, ValueError, IndexError):
        pid = int((data_dir / "postmaster.pid").read_text().split()[0])
        os.kill(pid, signal.SIGKILL)


def start_postgres() -> PostgresServer:
    """initdb and start a cluster on a free loopback port; skip when the binaries are missing."""
    pytest.importorskip("psycopg", reason="needs psycopg 3: pip install -e '.[postgres]'")
    bin_dir = find_pg_bin()
    if bin_dir is None:
        pytest.skip("needs the PostgreSQL server binaries (initdb, pg_ctl) on PATH or under "
                    "/usr/lib/postgresql/*/bin: install Debian's package postgresql")
    as_postgres = os.geteuid() == 0
    if as_postgres:
        import pwd

        try:
            owner = pwd.getpwnam("postgres")
        except KeyError:
            pytest.skip("running as root needs the system user postgres to own the server: "
                        "install Debian's package postgresql (it creates the user)")
        if shutil.which("runuser") is None:
            pytest.skip("running as root needs runuser: install Debian's package util-linux")
    base = Path(tempfile.mkdtemp(prefix="weir-pg-"))  # not under pytest's 0700 root-owned folders
    server = PostgresServer(port=0, base=base, bin_dir=bin_dir, as_postgres=as_postgres)
    atexit.register(server.stop)
    try:
        server.socket_dir.mkdir()
        if as_postgres:
            for path in (base, server.socket_dir):
                os.chown(path, owner.pw_uid, owner.pw_gid)
        _pg(server, "initdb", "-D", str(server.data_dir), "-U", "postgres", "-A", "trust", "-E", "UTF8",
            "--locale=C", "--no-sync", "--no-instructions")
        for _attempt in range(5):  # a free port may be taken between choosing it and binding it
            server.port = free_port()
            options = (f"-p {server.port} -c listen_addresses={LOOPBACK} -k {server.socket_dir} "
                       "-c timezone=UTC -c log_timezone=UTC -c max_connections=200 "
                       "-c fsync=off -c synchronous_commit=off -c full_page_writes=off")
            started = _pg(server, "pg_ctl", "start", "-D", str(server.data_dir), "-l", str(server.log_file),
                          "-w", "-t", str(int(START_BOUND)), "-o", options, check=False)
            if started.returncode == 0:
                return server
            if "already in use" not in server.log_file.read_text(errors="replace"):
                break
        raise RuntimeError(f"PostgreSQL did not start:\n{started.stdout}{started.stderr}"
                           f"\n{server.log_file.read_text(errors='replace')[-3000:]}")
    except BaseException:
        server.stop()
        raise


@pytest.fixture(scope="session")
def postgres_server() -> Iterator[PostgresServer]:
    """A throwaway PostgreSQL cluster for the whole session (see the module docstring)."""
    server = start_postgres()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture
def make_pg_database(postgres_server: PostgresServer) -> Iterator[Callable[..., str]]:
    """`make_pg_database(timezone=None) -> URL` of a fresh database; all are dropped after the test."""
    made: list[str] = []

    def make(*, timezone: str | None = None) -> str:
        url = postgres_server.new_database(timezone=timezone)
        made.append(url)
        return url

    yield make
    for url in made:
        postgres_server.drop_database(url)


@pytest.fixture
def pg_url(make_pg_database: Callable[..., str]) -> str:
    """The SQLAlchemy URL (postgresql+psycopg://) of a fresh, empty database, dropped after the test."""
    return make_pg_database()


# ---------------------------------------------------------------- Dask


def where_is(module: str) -> str:
    """The file a module is imported from, in the process that runs this (a Dask task)."""
    return str(importlib.import_module(module).__file__)


@dataclass
class DaskCluster:
    """A scheduler and worker processes on 127.0.0.1, started as `python -m dask` subprocesses."""

    base: Path
    scheduler: subprocess.Popen
    address: str
    n_workers: int = 2
    workers: list[subprocess.Popen] = field(default_factory=list)

    def start_worker(self) -> subprocess.Popen:
        n = len(self.workers)
        worker = _spawn_dask(self.base, "worker", self.address, "--name", f"w{n}", "--no-nanny",
                             "--nthreads", "1", "--host", LOOPBACK, "--no-dashboard",
                             "--dashboard-address", f"{LOOPBACK}:0", "--memory-limit", "0",
                             "--death-timeout", "60", "--local-directory", str(self.base / f"worker-{n}"),
                             log=f"worker-{n}.log")
        self.workers.append(worker)
        return worker

    def live_workers(self) -> list[subprocess.Popen]:
        return [w for w in self.workers if w.poll() is None]

    def worker_pids(self) -> list[int]:
        """The pids of the live worker processes, in start order."""
        return [w.pid for w in self.live_workers()]

    def kill_worker(self, index: int = 0) -> int:
        """SIGKILL the index-th live worker (a crash: no goodbye to the scheduler); return its pid."""
        worker = self.live_workers()[index]
        worker.kill()
        worker.wait(timeout=START_BOUND)
        return worker.pid

    def client(self, **options: Any):
        """A distributed.Client on this cluster (close it, or use it in a `with`)."""
        from distributed import Client

        return Client(self.address, timeout=START_BOUND, **options)

    def ensure_workers(self) -> None:
        """Top up to `n_workers` live workers and wait until the scheduler knows exactly those."""
        if self.scheduler.poll() is not None:
            raise RuntimeError(f"the Dask scheduler exited {self.scheduler.returncode}: {self.logs()}")
        for _ in range(self.n_workers - len(self.live_workers())):
            self.start_worker()
        wanted = set(self.worker_pids())
        with self.client() as client:
            until = time.monotonic() + START_BOUND
            while True:
                answers = client.run(os.getpid, on_error="return").values()
                seen = {pid for pid in answers if isinstance(pid, int)}
                if seen == wanted:
                    return
                if time.monotonic() > until or any(w.poll() is not None for w in self.workers
                                                   if w.pid in wanted):
                    raise RuntimeError(f"Dask workers {sorted(wanted)} not ready (scheduler sees "
                                       f"{sorted(seen)}): {self.logs()}")
                time.sleep(0.1)

    def logs(self) -> str:
        return "\n".join(f"--- {p.name} ---\n{p.read_text(errors='replace')[-2000:]}"
                         for p in sorted(self.base.glob("*.log")))

    def stop(self) -> None:
        """Kill every worker and the scheduler, and remove the folder. Idempotent."""
        for process in [*self.workers, self.scheduler]:
            if process.poll() is None:
                process.kill()
            with contextlib.suppress(subprocess.TimeoutExpired):
                process.wait(timeout=START_BOUND)
        shutil.rmtree(self.base, ignore_errors=True)


def _spawn_dask(base: Path, *args: str, log: str) -> subprocess.Popen:
    """`python -m dask ARGS` with this interpreter, the repository and tests/ importable, output to a log."""
    env = dict(os.environ, DASK_TEMPORARY_DIRECTORY=str(base))
    env["PYTHONPATH"] = os.pathsep.join(
        [str(ROOT), str(TESTS), *([env["PYTHONPATH"]] if env.get("PYTHONPATH") else [])])
    with open(base / log, "ab") as out:
        return subprocess.Popen([sys.executable, "-m", "dask", *args], cwd=ROOT, env=env,
                                stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                preexec_fn=_die_with_parent)


def start_dask(n_workers: int = 2) -> DaskCluster:
    """Start a scheduler and `n_workers` workers; skip when distributed is not installed."""
    pytest.importorskip("distributed", reason="needs distributed: pip install -e '.[cluster]'")
    base = Path(tempfile.mkdtemp(prefix="weir-dask-"))
    scheduler_file = base / "scheduler.json"
    scheduler = _spawn_dask(base, "scheduler", "--host", LOOPBACK, "--port", "0", "--no-dashboard",
                            "--dashboard-address", f"{LOOPBACK}:0",
                            "--scheduler-file", str(scheduler_file), log="scheduler.log")
    cluster = DaskCluster(base=base, scheduler=scheduler, address="", n_workers=n_workers)
    atexit.register(cluster.stop)
    try:
        until = time.monotonic() + START_BOUND
        while not cluster.address:
            with contextlib.suppress(OSError, ValueError, KeyError):  # absent, or half written
                cluster.address = json.loads(scheduler_file.read_text())["address"]
            if not cluster.address and (scheduler.poll() is not None or time.monotonic() > until):
                raise RuntimeError(f"the Dask scheduler did not start: {cluster.logs()}")
            time.sleep(0.05)
        cluster.ensure_workers()
        return cluster
    except BaseException:
        cluster.stop()
        raise


@pytest.fixture(scope="session")
def _dask_session() -> Iterator[DaskCluster]:
    cluster = start_dask()
    try:
        yield cluster
    finally:
        cluster.stop()


@pytest.fixture
def dask_cluster(_dask_session: DaskCluster) -> DaskCluster:
    """The session's Dask cluster, with two live workers at the start of the test."""
    _dask_session.ensure_workers()
    return _dask_session


# ---------------------------------------------------------------- an HTTP receiver


class Request(NamedTuple):
    method: str
    path: str
    headers: Message
    body: bytes


class Receiver:
    """What the server received, and what it answers.

    Each request takes the next step of `script`, then `default` once the script is used up.
    A step is an HTTP status (200, 500, 302: sent with Location /elsewhere), "hang" (answer
    nothing until the test ends) or "trickle" (start an answer and never finish it, 15 s at most).
    """

    def __init__(self, script: list[int | str], default: int | str = 200) -> None:
        self.script = script
        self.default = default
        self.requests: list[Request] = []
        self.release = threading.Event()
        self.url = ""

    def posts(self) -> list[tuple[Message, bytes]]:
        return [(r.headers, r.body) for r in self.requests if r.method == "POST"]


@contextmanager
def receiving(*script: int | str, default: int | str = 200) -> Iterator[Receiver]:
    """A real HTTP server on 127.0.0.1 (standard library), answering POSTs by `script`, then `default`."""
    receiver = Receiver(list(script), default)

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:
            raw = self.rfile.read(int(self.headers.get("Content-Length") or 0))
            receiver.requests.append(Request("POST", self.path, self.headers, raw))
            step = receiver.script.pop(0) if receiver.script else receiver.default
            if step == "hang":
                receiver.release.wait(60)
                return
            if step == "trickle":  # an answer that does not end, a byte at a time (for 15 s at most)
                self.wfile.write(b"HTTP/1.1 200 OK\r\nX-Slow: ")
                until = time.monotonic() + 15
                while not receiver.release.wait(0.2) and time.monotonic() < until:
                    self.wfile.write(b"z")
                return
            self.send_response(int(step))
            if 300 <= int(step) < 400:
                self.send_header("Location", "/elsewhere")
            self.send_header("Content-Length", "2")
            self.end_headers()
            self.wfile.write(b"ok")

        def do_GET(self) -> None:
            receiver.requests.append(Request("GET", self.path, self.headers, b""))
            self.send_response(200)
            self.send_header("Content-Length", "0")
            self.end_headers()

        def log_message(self, *args: object) -> None:
            pass

    server = ThreadingHTTPServer((LOOPBACK, 0), Handler)
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, daemon=True).start()
    receiver.url = f"http://{LOOPBACK}:{server.server_address[1]}/hooks/weir"
    try:
        yield receiver
    finally:
        receiver.release.set()
        server.shutdown()
        server.server_close()


@pytest.fixture
def http_receiver() -> Iterator[Receiver]:
    """An HTTP receiver on a free loopback port for this test; `.url`, `.requests`, `.default`, `.script`."""
    with receiving() as receiver:
        yield receiver
