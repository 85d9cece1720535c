"""The ledger: runs, window states, stored texts, claims and locks (SQLAlchemy Core).

Default `sqlite:///state/ledger.sqlite` in the workspace, in WAL mode; any
SQLAlchemy URL works (`--ledger URL` or `WEIR_LEDGER`). The schema is created
on first use and carries a version number; a ledger written by a newer weir
is refused rather than misread.

Tables
- `runs`: one row per attempt at one window (fingerprint and components,
  status, times, row counts, output and its digests, error, host, pid, code
  version, ingestion time).
- `windows`: the current state per (job, window): the last finished run.
- `texts`: normalized spec, code and input/upstream manifests by hash, so a
  later change can be shown as a diff.
- `claims`: leases that stop two processes running the same window, each
  with a fencing number (the id of the run that took it, so it grows with
  every take-over).
- `locks`: named workspace-wide leases (one `weir tick` at a time).

Instants are stored as RFC 3339 UTC text (`2026-01-01T00:00:00Z`); windows are
keyed by their UTC start. Claims and locks are taken with a plain INSERT (the
primary key makes it atomic) or, when the holder is free (its lease expired,
or it is provably gone: `runner.io.owners.holder_gone`), a conditional UPDATE; both are
atomic on every database, so no dialect-specific locking is needed and
several hosts can share one PostgreSQL ledger. Lease expiry is measured on
the database server's clock, so hosts whose clocks disagree agree on it. A
run records `done` (and releases its claim) only while it still holds the
claim under its fence; a run that lost it is recorded `abandoned`.
"""

from __future__ import annotations

import os
import socket
import time
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import sqlalchemy as sa
from sqlalchemy import exc as sa_exc

from runner.core.states import RunStatus, State, Status
from runner.errors import LedgerError
from runner.io.ledger.reads import LedgerReads
from runner.io.ledger.schema import (
    STATE_ROW,
    claims,
    create_sqlite,
    ensure_schema,
    explain_error,
    locks,
    refuse_empty,
    runs,
    texts,
    windows,
)
from runner.io.owners import holder_gone

if TYPE_CHECKING:
    pass


# Statements on the per-window path, built once: executing the same statement
# object with fresh parameters lets SQLAlchemy reuse its compiled form instead
# of constructing and keying a new statement for every window.
_b = sa.bindparam
_INSERT_RUN = sa.insert(runs)
_UPDATE_RUN = sa.update(runs).where(runs.c.id == _b("b_run_id"))
_ABANDON_RUNS = sa.update(runs).where(
    runs.c.job == _b("b_job"), runs.c.window_key == _b("b_key"), runs.c.status == RunStatus.RUNNING,
    runs.c.id < _b("b_run_id")).values(status=RunStatus.ABANDONED)
_RUN_FINGERPRINT = sa.select(runs.c.fingerprint).where(runs.c.id == _b("b_run_id"))
_UPDATE_WINDOW = sa.update(windows).where(windows.c.job == _b("b_job"), windows.c.window_key == _b("b_key"))
_INSERT_WINDOW = sa.insert(windows)
_CLAIM_WHERE = (claims.c.job == _b("b_job"), claims.c.window_key == _b("b_key"))
_RELEASE_CLAIM = sa.delete(claims).where(*_CLAIM_WHERE, claims.c.owner == _b("b_owner"))
_SET_FENCE = sa.update(claims).where(*_CLAIM_WHERE, claims.c.owner == _b("b_owner")).values(fence=_b("b_fence"))


def _server_clock(dialect: str) -> Any:
    """Seconds since the epoch on the database server's clock, as an SQL expression."""
    if dialect == "sqlite":
        return sa.literal_column("((julianday('now') - 2440587.5) * 86400.0)")
    if dialect == "postgresql":
        return sa.literal_column("CAST(EXTRACT(EPOCH FROM clock_timestamp()) AS DOUBLE PRECISION)")
    if dialect in ("mysql", "mariadb"):
        return sa.literal_column("UNIX_TIMESTAMP(NOW(6))")
    return sa.bindparam("b_clock", callable_=time.time, type_=sa.Float)  # others: this host's clock


class _ClaimStatements:
    """The claim statements of one ledger, built once around its server's clock."""

    def __init__(self, now: Any):
        c = claims.c
        self.now = now
        self.holder = sa.select(c.owner, c.fence, (c.expires < now).label("lapsed")).where(*_CLAIM_WHERE)
        self.insert = sa.insert(claims).values(job=_b("b_job"), window_key=_b("b_key"), owner=_b("b_owner"),
                                               expires=now + _b("b_lease"), fence=0)
        self.take = sa.update(claims).where(*_CLAIM_WHERE, c.owner == _b("b_holder"), c.fence == _b("b_was")).values(
            owner=_b("b_owner"), expires=now + _b("b_lease"))
        self.confirm = sa.update(claims).where(*_CLAIM_WHERE, c.owner == _b("b_owner"), c.fence == _b("b_fence")
                                               ).values(expires=now + _b("b_lease"))


def _inserted_id(result: sa.CursorResult[Any]) -> int:
    """The primary key of the row an INSERT added."""
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


def utc_text(instant: datetime | None = None) -> str:
    """RFC 3339 UTC with microseconds, for run times."""
    value = instant or datetime.now(UTC)
    return value.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def default_url(root: Path) -> str:
    from runner.core.paths import LEDGER

    return f"sqlite:///{root / LEDGER}"


def open_ledger(root: Path | str, url: str | None = None, create: bool = True) -> Ledger:
    """The ledger of the workspace at `root`: `url`, else `state/ledger.sqlite` inside it.

    A relative SQLite path in `url` is relative to the workspace, as for
    `database:` in job files (`runner.core.paths.database_url`): the one rule.
    """
    from runner.core.paths import database_url

    base = Path(root).resolve()
    return Ledger(database_url(base, url) if url else default_url(base), create=create)


class Ledger(LedgerReads):
    """A connection to one ledger database. Cheap to create; one per process.

    Pickled (to hand a run context to a worker process) as its URL: the
    worker opens its own connection.
    """

    def __reduce__(self) -> tuple[Any, ...]:
        return (Ledger, (self.url,))

    def __init__(self, url: str, create: bool = True):
        from runner.io import databases as engines
        self.url = url
        self._sqlite_path: Path | None = None
        try:
            parsed = sa.engine.make_url(url)
        except sa_exc.ArgumentError as exc:
            raise LedgerError(f"bad ledger URL {url!r}: {exc}") from None
        self.is_sqlite = parsed.get_backend_name() == "sqlite"
        if self.is_sqlite and parsed.database and parsed.database != ":memory:":
            self._sqlite_path = Path(parsed.database)
        self.exists = self._sqlite_path is None or self._sqlite_path.exists()
        if not self.exists and not create:
            self.engine = None
            return
        if self._sqlite_path is not None:
            if self.exists:
                refuse_empty(self._sqlite_path)
            else:
                self._sqlite_path.parent.mkdir(parents=True, exist_ok=True)
                create_sqlite(self._sqlite_path)
        try:
            self.engine = engines.engine(url)
        except (sa_exc.ArgumentError, sa_exc.NoSuchModuleError, ImportError) as exc:
            raise LedgerError(f"cannot open ledger {url!r}: {exc}") from None
        self._reader = self.engine.execution_options(**engines.READ)
        self._now = _server_clock(parsed.get_backend_name())
        self._claims = _ClaimStatements(self._now)
        ensure_schema(self.engine, self.url)
        self._stored_texts: set[str] = set()

    # ------------------------------------------------------------ plumbing

    @contextmanager
    def _tx(self, read: bool = False) -> Iterator[sa.Connection]:
        """A transaction; `read` ones do not take SQLite's write lock up front."""
        if self.engine is None:
            raise LedgerError("the ledger does not exist yet (nothing has run)")
        engine = self._reader if read else self.engine
        try:
            with engine.begin() as conn:
                yield conn
        except sa_exc.IntegrityError:
            raise  # a subclass of DatabaseError; `_lease` relies on seeing it to fall back to UPDATE
        except sa_exc.OperationalError as exc:
            raise LedgerError(explain_error(self.url, exc)) from None
        except sa_exc.DatabaseError as exc:
            raise LedgerError(explain_error(self.url, exc)) from None

    def dispose(self) -> None:
        if self.engine is not None:
            self.engine.dispose()

    # ------------------------------------------------------------ texts

    def put_texts(self, conn: sa.Connection, items: Iterable[tuple[str, str, str]]) -> None:
        """Store (hash, kind, body) unless already there."""
        for h, kind, body in items:
            if h in self._stored_texts:
                continue
            found = conn.execute(sa.select(texts.c.hash).where(texts.c.hash == h)).first()
            if not found:
                conn.execute(sa.insert(texts).values(hash=h, kind=kind, body=body))
            self._stored_texts.add(h)

    def text(self, h: str | None) -> str | None:
        if not h or self.engine is None:
            return None
        with self._tx(read=True) as conn:
            row = conn.execute(sa.select(texts.c.body).where(texts.c.hash == h)).first()
        return row[0] if row else None

    # ------------------------------------------------------------ claims and locks

    def claim(self, job: str, key: str, owner: str, ttl: float) -> bool:
        """Take the claim on (job, window) unless a live holder has it (see `runner.io.owners.holder_gone`)."""
        return self._lease(claims, {"job": job, "window_key": key}, owner, ttl)

    def release(self, job: str, key: str, owner: str, conn: sa.Connection | None = None) -> None:
        params = {"b_job": job, "b_key": key, "b_owner": owner}
        if conn is not None:
            conn.execute(_RELEASE_CLAIM, params)
            return
        with self._tx() as c:
            c.execute(_RELEASE_CLAIM, params)

    def release_claims(self, owner: str, reason: str) -> int:
        """Release every window claim of `owner` (a runner stopping); how many there were.

        Runs of those windows still recorded `running` will not finish: they are recorded
        `abandoned` with `reason`.
        """
        with self._tx() as conn:
            held = conn.execute(sa.select(claims.c.job, claims.c.window_key).where(claims.c.owner == owner)).all()
            for job, key in held:
                conn.execute(sa.update(runs).where(runs.c.job == job, runs.c.window_key == key,
                                                   runs.c.status == RunStatus.RUNNING)
                             .values(status=RunStatus.ABANDONED, finished_at=utc_text(), error=reason))
            return conn.execute(sa.delete(claims).where(claims.c.owner == owner)).rowcount

    def confirm(self, job: str, key: str, owner: str, fence: int, lease: float) -> bool:
        """Whether `owner` still holds the claim under `fence`; if so, its lease is extended."""
        with self._tx() as conn:
            return conn.execute(self._claims.confirm, {"b_job": job, "b_key": key, "b_owner": owner,
                                                       "b_fence": fence, "b_lease": lease}).rowcount == 1

    def renew_all(self, owner: str, lease: float) -> dict[tuple[str, str], int]:
        """Extend every claim and lock of `owner`; return the claims it holds: (job, window_key) -> fence."""
        with self._tx() as conn:
            conn.execute(sa.update(claims).where(claims.c.owner == owner).values(expires=self._now + lease))
            conn.execute(sa.update(locks).where(locks.c.owner == owner).values(expires=self._now + lease))
            rows = conn.execute(sa.select(claims.c.job, claims.c.window_key, claims.c.fence)
                                .where(claims.c.owner == owner)).all()
        return {(r[0], r[1]): r[2] for r in rows}

    def claim_holders(self, keys: list[tuple[str, str]]) -> dict[tuple[str, str], tuple[str, int]]:
        """(owner, fence) of whoever holds each of `keys` now (absent: nobody)."""
        out = {}
        with self._tx(read=True) as conn:
            for job, key in keys:
                row = conn.execute(self._claims.holder, {"b_job": job, "b_key": key}).first()
                if row is not None:
                    out[(job, key)] = (row[0], row[1])
        return out

    def claimed(self, job: str | None = None) -> dict[tuple[str, str], str]:
        """Live claims: (job, window_key) -> owner. Expired claims and holders provably gone are free."""
        if self.engine is None:
            return {}
        q = sa.select(claims.c.job, claims.c.window_key, claims.c.owner).where(claims.c.expires > self._now)
        if job is not None:
            q = q.where(claims.c.job == job)
        with self._tx(read=True) as conn:
            rows = conn.execute(q).all()
        gone = {owner: holder_gone(owner) for owner in {r[2] for r in rows}}
        return {(r[0], r[1]): r[2] for r in rows if not gone[r[2]]}

    def lock(self, name: str, owner: str, ttl: float) -> bool:
        return self._lease(locks, {"name": name}, owner, ttl)

    def unlock(self, name: str, owner: str) -> None:
        with self._tx() as conn:
            conn.execute(sa.delete(locks).where(locks.c.name == name, locks.c.owner == owner))

    def lock_holder(self, name: str) -> str | None:
        if self.engine is None:
            return None
        with self._tx(read=True) as conn:
            row = conn.execute(sa.select(locks.c.owner).where(locks.c.name == name)).first()
        return row[0] if row else None

    def _lease(self, table: sa.Table, key: dict[str, str], owner: str, ttl: float) -> bool:
        """Take a lease: insert it, or take it over when ours or free (expired, or its holder gone)."""
        where = [table.c[k] == v for k, v in key.items()]
        try:
            with self._tx() as conn:
                conn.execute(sa.insert(table).values(**key, owner=owner, expires=self._now + ttl))
            return True
        except sa_exc.IntegrityError:
            pass
        with self._tx() as conn:
            row = conn.execute(sa.select(table.c.owner, (table.c.expires < self._now).label("lapsed"))
                               .where(*where)).first()
            if row is None:
                return False  # released meanwhile: the caller may simply try again
            if not (row[0] == owner or row[1] or holder_gone(row[0])):
                return False
            return conn.execute(sa.update(table).where(*where, table.c.owner == row[0])
                                .values(owner=owner, expires=self._now + ttl)).rowcount == 1

    # ------------------------------------------------------------ runs

    def _take_claim(self, conn: sa.Connection, job: str, key: str, owner: str, lease: float) -> bool:
        """Take (job, key)'s claim in `conn`'s transaction; False when a live holder has it."""
        params = {"b_job": job, "b_key": key, "b_owner": owner, "b_lease": lease}
        holder = conn.execute(self._claims.holder, params).first()
        if holder is None:
            conn.execute(self._claims.insert, params)
            return True
        if holder[0] == owner or holder[2] or holder_gone(holder[0]):
            # ours, expired, or held by a process of this place that has ended
            return conn.execute(self._claims.take, {**params, "b_holder": holder[0], "b_was": holder[1]}
                                ).rowcount == 1
        return False

    def begin_run(self, job: str, key: str, owner: str, lease: float, fingerprint: str | None,
                  values: dict[str, Any], stored: Iterable[tuple[str, str, str]] = ()
                  ) -> tuple[str, int | None]:
        """In one transaction: take the window's claim, then skip it if current, else record the run.

        The claim is taken first and the state read after, so a runner that has
        just finished the window (and released its claim with the same commit)
        is always seen. Returns ("claimed", None) when a live holder has it,
        ("current", None) when it is done with `fingerprint` (None: run
        regardless; nothing is kept), else ("started", run_id): the claim is
        held by `owner` with the run's id as its fencing number.
        """
        where = {"b_job": job, "b_key": key}
        try:
            with self._tx() as conn:
                if not self._take_claim(conn, job, key, owner, lease):
                    return Status.CLAIMED, None
                if fingerprint is not None:
                    state = conn.execute(STATE_ROW, where).mappings().first()
                    if (state is not None and state["state"] == State.DONE and state["fingerprint"] == fingerprint
                            and not state["output_state"]):
                        raise _Current
                self.put_texts(conn, stored)
                row = {"status": RunStatus.RUNNING, "started_at": utc_text(), "host": socket.gethostname(),
                       "pid": os.getpid(), **values}
                run_id = _inserted_id(conn.execute(_INSERT_RUN, row))
                conn.execute(_SET_FENCE, {**where, "b_owner": owner, "b_fence": run_id})
        except _Current:
            return "current", None  # rolled back: the claim was never taken
        except sa_exc.IntegrityError:
            return Status.CLAIMED, None  # another process inserted the claim first (databases without a write lock)
        return "started", run_id

    def start_run(self, values: dict[str, Any], stored: Iterable[tuple[str, str, str]], owner: str,
                  fence: int, lease: float) -> int | None:
        """Record another attempt, as `running`, at a window whose claim `owner` holds under `fence`.

        None (nothing recorded) when the claim was lost meanwhile.
        """
        row = {
            "status": RunStatus.RUNNING, "started_at": utc_text(), "host": socket.gethostname(), "pid": os.getpid(),
            **values,
        }
        with self._tx() as conn:
            if conn.execute(self._claims.confirm, {"b_job": values["job"], "b_key": values["window_key"],
                                                   "b_owner": owner, "b_fence": fence, "b_lease": lease}
                            ).rowcount != 1:
                return None
            self.put_texts(conn, stored)
            return _inserted_id(conn.execute(_INSERT_RUN, row))

    def finish_run(self, run_id: int, job: str, key: str, owner: str, fence: int, values: dict[str, Any],
                   window: dict[str, Any] | None, release: bool) -> bool:
        """Close a run and update its window's state and claim, in one transaction, if still holding it.

        `values` updates the run row (status done or failed, figures, error);
        `window` holds the state row to write for (job, key) (None: leave the
        state as it is); `release` gives the claim up. When `owner` no longer
        holds the claim under `fence` (another runner took it over), nothing
        but the run is touched: it is recorded `abandoned`, and False returned.
        """
        values = {"finished_at": utc_text(), **values}
        where = {"b_job": job, "b_key": key}
        with self._tx() as conn:
            held = conn.execute(sa.select(claims.c.owner).where(
                *_CLAIM_WHERE, claims.c.owner == _b("b_owner"), claims.c.fence == _b("b_fence")
            ).with_for_update(), {**where, "b_owner": owner, "b_fence": fence}).first() is not None
            if not held:
                lost = "the claim was lost to another runner before this run finished; its result was discarded"
                conn.execute(_UPDATE_RUN, {"b_run_id": run_id, **values, "status": RunStatus.ABANDONED,
                                           "error": values.get("error") or lost})
                return False
            conn.execute(_UPDATE_RUN, {"b_run_id": run_id, **values})
            # earlier attempts at this window that never finished: their process died
            conn.execute(_ABANDON_RUNS, {**where, "b_run_id": run_id})
            if window is not None:
                self._write_state(conn, run_id, job, key, values, window)
            if release:
                self.release(job, key, owner, conn)
        return True

    def abandon_run(self, run_id: int, reason: str) -> None:
        """Record a run that will not finish (its runner was interrupted) as `abandoned`."""
        with self._tx() as conn:
            conn.execute(sa.update(runs).where(runs.c.id == run_id, runs.c.status == RunStatus.RUNNING).values(
                status=RunStatus.ABANDONED, finished_at=utc_text(), error=reason))

    def _write_state(self, conn: sa.Connection, run_id: int, job: str, key: str, values: dict[str, Any],
                     window: dict[str, Any]) -> None:
        where = {"b_job": job, "b_key": key}
        state = dict(window)
        state.update(job=job, window_key=key, run_id=run_id, finished_at=values["finished_at"])
        if "last_fingerprint" not in state:
            state["last_fingerprint"] = conn.execute(_RUN_FINGERPRINT, {"b_run_id": run_id}).scalar()
        if state["state"] == State.FAILED:
            current = conn.execute(STATE_ROW, where).mappings().first()
            if current is not None:
                # keep the last good output's identity: consumers and digests still refer to it
                for col in ("output", "output_digest", "output_checksum", "good_run_id", "fingerprint",
                            "fp_spec", "fp_code", "fp_input", "fp_upstream", "ingested_at"):
                    if state.get(col) is None:
                        state[col] = current[col]
            state["failures"] = (current["failures"] or 0) + 1 if current is not None else 1
        else:
            state["failures"] = 0
            state["good_run_id"] = run_id
        if conn.execute(_UPDATE_WINDOW, {**where, **state}).rowcount == 0:
            conn.execute(_INSERT_WINDOW, state)

    def set_output_state(self, job: str, keys: list[str], value: str | None) -> None:
        """Mark outputs found missing or changed outside weir (`weir verify`)."""
        with self._tx() as conn:
            for key in keys:
                conn.execute(sa.update(windows).where(windows.c.job == job, windows.c.window_key == key)
                             .values(output_state=value))


class _Current(Exception):
    """The window is current: roll the claim back."""
