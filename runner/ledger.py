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
- `claims`: leases that stop two processes running the same window.
- `locks`: named workspace-wide leases (one `weir tick` at a time).

Instants are stored as RFC 3339 UTC text (`2026-01-01T00:00:00Z`); windows are
keyed by their UTC start. Claims and locks are taken with a plain INSERT (the
primary key makes it atomic) or, when the holder's lease has expired, a
conditional UPDATE; both are atomic on every database, so no dialect-specific
locking is needed and several hosts can share one PostgreSQL ledger.
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

from runner.errors import LedgerError

if TYPE_CHECKING:
    import polars as pl

SCHEMA_VERSION = 1

metadata = sa.MetaData()

meta = sa.Table(
    "weir_meta", metadata,
    sa.Column("key", sa.String(64), primary_key=True),
    sa.Column("value", sa.Text, nullable=False),
)

runs = sa.Table(
    "weir_runs", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("job", sa.String(200), nullable=False),
    sa.Column("window_key", sa.String(32), nullable=False),
    sa.Column("window_end", sa.String(32), nullable=False),
    sa.Column("window_id", sa.String(40), nullable=False),
    sa.Column("attempt", sa.Integer, nullable=False, default=1),
    sa.Column("status", sa.String(16), nullable=False),
    sa.Column("forced", sa.Boolean, nullable=False, default=False),
    sa.Column("fingerprint", sa.String(64)),
    sa.Column("fp_spec", sa.String(64)),
    sa.Column("fp_code", sa.String(64)),
    sa.Column("fp_input", sa.String(64)),
    sa.Column("fp_upstream", sa.String(64)),
    sa.Column("started_at", sa.String(32), nullable=False),
    sa.Column("finished_at", sa.String(32)),
    sa.Column("seconds", sa.Float),
    sa.Column("step_seconds", sa.Float),
    sa.Column("rows_read", sa.BigInteger),
    sa.Column("rows_dropped", sa.BigInteger),
    sa.Column("rows_rejected", sa.BigInteger),
    sa.Column("rows_written", sa.BigInteger),
    sa.Column("output", sa.Text),
    sa.Column("output_digest", sa.String(64)),
    sa.Column("output_checksum", sa.String(64)),
    sa.Column("error", sa.Text),
    sa.Column("failed_check", sa.Text),
    sa.Column("host", sa.String(200)),
    sa.Column("pid", sa.Integer),
    sa.Column("code_version", sa.String(200)),
    sa.Column("weir_version", sa.String(32)),
    sa.Column("ingested_at", sa.String(32)),
    sa.Index("ix_weir_runs_job_window", "job", "window_key"),
)

windows = sa.Table(
    "weir_windows", metadata,
    sa.Column("job", sa.String(200), primary_key=True),
    sa.Column("window_key", sa.String(32), primary_key=True),
    sa.Column("window_end", sa.String(32), nullable=False),
    sa.Column("window_id", sa.String(40), nullable=False),
    sa.Column("state", sa.String(16), nullable=False),
    sa.Column("run_id", sa.Integer, nullable=False),
    sa.Column("fingerprint", sa.String(64)),
    sa.Column("fp_spec", sa.String(64)),
    sa.Column("fp_code", sa.String(64)),
    sa.Column("fp_input", sa.String(64)),
    sa.Column("fp_upstream", sa.String(64)),
    sa.Column("output", sa.Text),
    sa.Column("output_digest", sa.String(64)),
    sa.Column("output_checksum", sa.String(64)),
    sa.Column("last_fingerprint", sa.String(64)),
    sa.Column("good_run_id", sa.Integer),
    sa.Column("failures", sa.Integer, nullable=False, default=0),
    sa.Column("ingested_at", sa.String(32)),
    sa.Column("finished_at", sa.String(32)),
    sa.Column("seconds", sa.Float),
    sa.Column("output_state", sa.String(16)),
)

texts = sa.Table(
    "weir_texts", metadata,
    sa.Column("hash", sa.String(64), primary_key=True),
    sa.Column("kind", sa.String(16), nullable=False),
    sa.Column("body", sa.Text, nullable=False),
)

claims = sa.Table(
    "weir_claims", metadata,
    sa.Column("job", sa.String(200), primary_key=True),
    sa.Column("window_key", sa.String(32), primary_key=True),
    sa.Column("owner", sa.String(200), nullable=False),
    sa.Column("expires", sa.Float, nullable=False),
)

locks = sa.Table(
    "weir_locks", metadata,
    sa.Column("name", sa.String(200), primary_key=True),
    sa.Column("owner", sa.String(200), nullable=False),
    sa.Column("expires", sa.Float, nullable=False),
)

STATE_COLUMNS = [c.name for c in windows.columns]

# Statements on the per-window path, built once: executing the same statement
# object with fresh parameters lets SQLAlchemy reuse its compiled form instead
# of constructing and keying a new statement for every window.
_b = sa.bindparam
_INSERT_RUN = sa.insert(runs)
_UPDATE_RUN = sa.update(runs).where(runs.c.id == _b("b_run_id"))
_ABANDON_RUNS = sa.update(runs).where(
    runs.c.job == _b("b_job"), runs.c.window_key == _b("b_key"), runs.c.status == "running",
    runs.c.id < _b("b_run_id")).values(status="abandoned")
_RUN_FINGERPRINT = sa.select(runs.c.fingerprint).where(runs.c.id == _b("b_run_id"))
_STATE_ROW = sa.select(windows).where(windows.c.job == _b("b_job"), windows.c.window_key == _b("b_key"))
_UPDATE_WINDOW = sa.update(windows).where(windows.c.job == _b("b_job"), windows.c.window_key == _b("b_key"))
_INSERT_WINDOW = sa.insert(windows)
_INSERT_CLAIM = sa.insert(claims)
_CLAIM_HOLDER = sa.select(claims.c.owner, claims.c.expires).where(
    claims.c.job == _b("b_job"), claims.c.window_key == _b("b_key"))
_TAKE_CLAIM = sa.update(claims).where(
    claims.c.job == _b("b_job"), claims.c.window_key == _b("b_key"), claims.c.owner == _b("b_holder"))
_RELEASE_CLAIM = sa.delete(claims).where(
    claims.c.job == _b("b_job"), claims.c.window_key == _b("b_key"), claims.c.owner == _b("b_owner"))


def utc_text(instant: datetime | None = None) -> str:
    """RFC 3339 UTC with microseconds, for run times."""
    value = instant or datetime.now(UTC)
    return value.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def default_url(root: Path) -> str:
    from runner.paths import LEDGER

    return f"sqlite:///{root / LEDGER}"


def owner_id() -> str:
    """This process, as a claim owner: host:pid:start."""
    return f"{socket.gethostname()}:{os.getpid()}:{int(time.time() * 1000) % 10_000_000}"


class Ledger:
    """A connection to one ledger database. Cheap to create; one per process."""

    def __init__(self, url: str, create: bool = True):
        from runner import engines

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
                _refuse_empty(self._sqlite_path)
            else:
                self._sqlite_path.parent.mkdir(parents=True, exist_ok=True)
                _create_sqlite(self._sqlite_path)
        try:
            self.engine = engines.engine(url)
        except (sa_exc.ArgumentError, sa_exc.NoSuchModuleError, ImportError) as exc:
            raise LedgerError(f"cannot open ledger {url!r}: {exc}") from None
        self._reader = self.engine.execution_options(**engines.READ)
        _ensure_schema(self.engine, self.url)
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
            raise LedgerError(_explain(self.url, exc)) from None
        except sa_exc.DatabaseError as exc:
            raise LedgerError(_explain(self.url, exc)) from None

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
        """Take the claim on (job, window) unless another live owner holds it."""
        return self._lease(claims, {"job": job, "window_key": key}, owner, ttl)

    def renew(self, job: str, key: str, owner: str, ttl: float) -> bool:
        with self._tx() as conn:
            res = conn.execute(sa.update(claims).where(
                claims.c.job == job, claims.c.window_key == key, claims.c.owner == owner
            ).values(expires=time.time() + ttl))
        return res.rowcount == 1

    def release(self, job: str, key: str, owner: str, conn: sa.Connection | None = None) -> None:
        params = {"b_job": job, "b_key": key, "b_owner": owner}
        if conn is not None:
            conn.execute(_RELEASE_CLAIM, params)
            return
        with self._tx() as c:
            c.execute(_RELEASE_CLAIM, params)

    def claimed(self, job: str | None = None) -> dict[tuple[str, str], str]:
        """Live claims: (job, window_key) -> owner."""
        if self.engine is None:
            return {}
        q = sa.select(claims.c.job, claims.c.window_key, claims.c.owner).where(claims.c.expires > time.time())
        if job is not None:
            q = q.where(claims.c.job == job)
        with self._tx(read=True) as conn:
            return {(r[0], r[1]): r[2] for r in conn.execute(q)}

    def lock(self, name: str, owner: str, ttl: float) -> bool:
        return self._lease(locks, {"name": name}, owner, ttl)

    def renew_lock(self, name: str, owner: str, ttl: float) -> bool:
        with self._tx() as conn:
            res = conn.execute(sa.update(locks).where(locks.c.name == name, locks.c.owner == owner)
                               .values(expires=time.time() + ttl))
        return res.rowcount == 1

    def unlock(self, name: str, owner: str) -> None:
        with self._tx() as conn:
            conn.execute(sa.delete(locks).where(locks.c.name == name, locks.c.owner == owner))

    def _lease(self, table: sa.Table, key: dict[str, str], owner: str, ttl: float) -> bool:
        now = time.time()
        where = [table.c[k] == v for k, v in key.items()]
        try:
            with self._tx() as conn:
                stmt = _INSERT_CLAIM if table is claims else sa.insert(table)
                conn.execute(stmt, {**key, "owner": owner, "expires": now + ttl})
            return True
        except sa_exc.IntegrityError:
            pass
        with self._tx() as conn:
            res = conn.execute(sa.update(table).where(
                *where, sa.or_(table.c.expires < now, table.c.owner == owner)
            ).values(owner=owner, expires=now + ttl))
        if res.rowcount == 1:
            return True
        # A holder on this host whose process is gone (killed, crashed) will never renew or
        # release: take its lease over now rather than making a resumed run wait for expiry.
        with self._tx(read=True) as conn:
            row = conn.execute(sa.select(table.c.owner).where(*where)).first()
        if row is None or not _gone(row[0]):
            return False
        with self._tx() as conn:
            res = conn.execute(sa.update(table).where(*where, table.c.owner == row[0])
                               .values(owner=owner, expires=now + ttl))
        return res.rowcount == 1

    # ------------------------------------------------------------ runs

    def begin_run(self, job: str, key: str, owner: str, ttl: float, fingerprint: str | None,
                  values: dict[str, Any], stored: Iterable[tuple[str, str, str]] = ()) -> tuple[str, int | None]:
        """In one transaction: skip a current window, take its claim, record the run as `running`.

        Returns ("current", None) when the window is done with `fingerprint` (pass
        None to run regardless), ("claimed", None) when another live process holds
        it, else ("started", run_id) with the claim held by `owner`.
        """
        now = time.time()
        where = {"b_job": job, "b_key": key}
        try:
            with self._tx() as conn:
                if fingerprint is not None:
                    state = conn.execute(_STATE_ROW, where).mappings().first()
                    if (state is not None and state["state"] == "done" and state["fingerprint"] == fingerprint
                            and not state["output_state"]):
                        return "current", None
                holder = conn.execute(_CLAIM_HOLDER, where).first()
                lease = {"job": job, "window_key": key, "owner": owner, "expires": now + ttl}
                if holder is None:
                    conn.execute(_INSERT_CLAIM, lease)
                elif holder[0] == owner or holder[1] < now or _gone(holder[0]):
                    # our own, expired, or held by a process of this host that has ended
                    conn.execute(_TAKE_CLAIM, {**where, "b_holder": holder[0], "owner": owner,
                                               "expires": now + ttl})
                else:
                    return "claimed", None
                self.put_texts(conn, stored)
                row = {"status": "running", "started_at": utc_text(), "host": socket.gethostname(),
                       "pid": os.getpid(), **values}
                run_id = int(conn.execute(_INSERT_RUN, row).inserted_primary_key[0])
        except sa_exc.IntegrityError:
            return "claimed", None  # another process inserted the claim first (databases without a write lock)
        return "started", run_id

    def start_run(self, values: dict[str, Any], stored: Iterable[tuple[str, str, str]] = ()) -> int:
        """Record a run attempt as `running`; store its texts; return its id."""
        row = {
            "status": "running", "started_at": utc_text(), "host": socket.gethostname(), "pid": os.getpid(),
            **values,
        }
        with self._tx() as conn:
            self.put_texts(conn, stored)
            res = conn.execute(_INSERT_RUN, row)
            return int(res.inserted_primary_key[0])

    def finish_run(self, run_id: int, job: str, key: str, owner: str | None, values: dict[str, Any],
                   window: dict[str, Any]) -> None:
        """Close a run and update its window's state and claim, in one transaction.

        `values` updates the run row (status done or failed, figures, error);
        `window` holds the state row to write for (job, key).
        """
        values = {"finished_at": utc_text(), **values}
        where = {"b_job": job, "b_key": key}
        with self._tx() as conn:
            conn.execute(_UPDATE_RUN, {"b_run_id": run_id, **values})
            # earlier attempts at this window that never finished: their process died
            conn.execute(_ABANDON_RUNS, {**where, "b_run_id": run_id})
            state = dict(window)
            state.update(job=job, window_key=key, run_id=run_id, finished_at=values["finished_at"])
            if "last_fingerprint" not in state:
                state["last_fingerprint"] = conn.execute(_RUN_FINGERPRINT, {"b_run_id": run_id}).scalar()
            if state["state"] == "failed":
                current = conn.execute(_STATE_ROW, where).mappings().first()
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
            if owner is not None:
                self.release(job, key, owner, conn)

    def set_output_state(self, job: str, keys: list[str], value: str | None) -> None:
        """Mark outputs found missing or changed outside weir (`weir verify`)."""
        with self._tx() as conn:
            for key in keys:
                conn.execute(sa.update(windows).where(windows.c.job == job, windows.c.window_key == key)
                             .values(output_state=value))

    # ------------------------------------------------------------ reading

    def states(self, job: str, lo_key: str | None = None, hi_key: str | None = None) -> pl.DataFrame:
        """Every window state row of `job` (optionally window_key in [lo, hi)), one query."""
        import polars as pl

        schema = _state_schema()
        if self.engine is None:
            return pl.DataFrame(schema=schema)
        q = sa.select(*[windows.c[c] for c in STATE_COLUMNS]).where(windows.c.job == job)
        if lo_key is not None:
            q = q.where(windows.c.window_key >= lo_key)
        if hi_key is not None:
            q = q.where(windows.c.window_key < hi_key)
        with self._tx(read=True) as conn:
            rows = conn.execute(q).all()
        return pl.DataFrame([tuple(r) for r in rows], schema=schema, orient="row")

    def plan_states(self, job: str, spec_hash: str, code_hash: str, input_from: str | None = None,
                    upstream: bool = False, digests: bool = False, ingested: bool = False,
                    extras: bool = False) -> pl.DataFrame:
        """The window states planning needs, compactly: one query over every window of `job`
        and one over its failed (or flagged) windows.

        The state and the comparisons with the job-wide spec and code hashes come
        back as one small integer (so a year of windows does not bring back a year
        of identical hash strings); `fp_input` only for windows keyed at or after
        `input_from` (all when None) and windows not done. Columns: window_key,
        state, spec_ok, code_ok, fp_input, failures, finished_at, last_fingerprint,
        output_state, run_id; optionally fp_upstream, output_digest (`digests`),
        ingested_at, and output, seconds (`extras`).
        """
        import polars as pl

        c = windows.c
        not_done = c.state != "done"
        flags = (sa.case((c.state == "done", 1), (c.state == "failed", 2), else_=3)
                 + sa.case((c.fp_spec == spec_hash, 4), else_=0) + sa.case((c.fp_code == code_hash, 8), else_=0)
                 + sa.case((c.output_state.is_(None), 0), else_=16))
        columns: list[tuple[str, Any, Any]] = [
            ("window_key", c.window_key, pl.String), ("flags", flags, pl.Int64),
            ("fp_input", c.fp_input if input_from is None else
             sa.case((sa.or_(c.window_key >= input_from, not_done), c.fp_input), else_=None), pl.String),
        ]
        if upstream:
            columns.append(("fp_upstream", c.fp_upstream, pl.String))
        if digests:
            columns.append(("output_digest", c.output_digest, pl.String))
        if ingested or extras:
            columns.append(("ingested_at", c.ingested_at, pl.String))
        if extras:
            columns += [("output", c.output, pl.String), ("seconds", c.seconds, pl.Float64)]
        detail_columns: list[tuple[str, Any, Any]] = [
            ("window_key", c.window_key, pl.String), ("failures", c.failures, pl.Int64),
            ("finished_at", c.finished_at, pl.String), ("last_fingerprint", c.last_fingerprint, pl.String),
            ("output_state", c.output_state, pl.String),
        ]
        if self.engine is None:
            main = _frame([], columns)
            details = _frame([], detail_columns)
        else:
            with self._tx(read=True) as conn:
                # the DBAPI rows as they come: no per-row objects beyond the driver's tuples
                rows = conn.execute(sa.select(*[e.label(n) for n, e, _ in columns])
                                    .where(c.job == job)).cursor.fetchall()
                few = conn.execute(sa.select(*[e.label(n) for n, e, _ in detail_columns]).where(
                    c.job == job, sa.or_(c.state == "failed", c.output_state.is_not(None)))).cursor.fetchall()
            main, details = _frame(rows, columns), _frame(few, detail_columns)
        code = pl.col("flags") % 4
        main = main.with_columns(
            pl.when(code == 1).then(pl.lit("done")).when(code == 2).then(pl.lit("failed"))
            .otherwise(pl.lit("other")).alias("state"),
            ((pl.col("flags") // 4) % 2 == 1).alias("spec_ok"),
            ((pl.col("flags") // 8) % 2 == 1).alias("code_ok"),
        ).drop("flags")
        if extras:
            runs = (self._run_ids(job) if self.engine is not None else
                    _frame([], [("window_key", None, pl.String), ("run_id", None, pl.Int64)]))
            main = main.join(runs, on="window_key", how="left")
        return main.join(details, on="window_key", how="left").with_columns(pl.col("failures").fill_null(0))

    def _run_ids(self, job: str) -> pl.DataFrame:
        c = windows.c
        with self._tx(read=True) as conn:
            rows = conn.execute(sa.select(c.window_key, c.run_id).where(c.job == job)).cursor.fetchall()
        import polars as pl

        return _frame(rows, [("window_key", None, pl.String), ("run_id", None, pl.Int64)])

    def state_rows(self, job: str, keys: Iterable[str]) -> dict[str, dict[str, Any]]:
        """Window states by key for the given keys of one job (one range query)."""
        keys = list(keys)
        if not keys or self.engine is None:
            return {}
        q = sa.select(windows).where(windows.c.job == job, windows.c.window_key >= min(keys),
                                     windows.c.window_key <= max(keys))
        wanted = set(keys)
        with self._tx(read=True) as conn:
            return {r["window_key"]: dict(r) for r in conn.execute(q).mappings() if r["window_key"] in wanted}

    def state_row(self, job: str, key: str) -> dict[str, Any] | None:
        if self.engine is None:
            return None
        with self._tx(read=True) as conn:
            row = conn.execute(_STATE_ROW, {"b_job": job, "b_key": key}).mappings().first()
        return dict(row) if row else None

    def done_keys(self, job: str) -> set[str]:
        """Keys of the windows of `job` recorded done (and not flagged by `weir verify`)."""
        if self.engine is None:
            return set()
        with self._tx(read=True) as conn:
            rows = conn.execute(sa.select(windows.c.window_key).where(
                windows.c.job == job, windows.c.state == "done", windows.c.output_state.is_(None))).all()
        return {r[0] for r in rows}

    def run(self, run_id: int) -> dict[str, Any] | None:
        if self.engine is None:
            return None
        with self._tx(read=True) as conn:
            row = conn.execute(sa.select(runs).where(runs.c.id == run_id)).mappings().first()
        return dict(row) if row else None

    def history(self, job: str, key: str | None = None, limit: int | None = None) -> list[dict[str, Any]]:
        """Runs of `job` (of one window when `key`), newest first."""
        if self.engine is None:
            return []
        q = sa.select(runs).where(runs.c.job == job)
        if key is not None:
            q = q.where(runs.c.window_key == key)
        q = q.order_by(runs.c.id.desc())
        if limit:
            q = q.limit(limit)
        with self._tx(read=True) as conn:
            return [dict(r) for r in conn.execute(q).mappings()]

    def run_stats(self, job: str) -> pl.DataFrame:
        """Finished runs of `job` (seconds, step seconds, rows), for estimates and advice."""
        import polars as pl

        cols = ["window_key", "status", "seconds", "step_seconds", "rows_read", "rows_written", "started_at"]
        schema = {"window_key": pl.String, "status": pl.String, "seconds": pl.Float64,
                  "step_seconds": pl.Float64, "rows_read": pl.Int64, "rows_written": pl.Int64,
                  "started_at": pl.String}
        if self.engine is None:
            return pl.DataFrame(schema=schema)
        q = sa.select(*[runs.c[c] for c in cols]).where(runs.c.job == job, runs.c.status.in_(["done", "failed"]))
        with self._tx(read=True) as conn:
            rows = conn.execute(q).all()
        return pl.DataFrame([tuple(r) for r in rows], schema=schema, orient="row")

    def last_runs(self, job: str) -> pl.DataFrame:
        """Each window's last finished run (the run its state row points at), one query; for reports."""
        import polars as pl

        cols = {"run_id": pl.Int64, "status": pl.String, "finished_at": pl.String, "seconds": pl.Float64,
                "rows_read": pl.Int64, "rows_rejected": pl.Int64, "rows_written": pl.Int64,
                "fingerprint": pl.String, "error": pl.String}
        if self.engine is None:
            return pl.DataFrame(schema=cols)
        q = (sa.select(runs.c.id, *[runs.c[c] for c in list(cols)[1:]])
             .select_from(windows.join(runs, runs.c.id == windows.c.run_id)).where(windows.c.job == job))
        with self._tx(read=True) as conn:
            rows = conn.execute(q).all()
        return pl.DataFrame([tuple(r) for r in rows], schema=cols, orient="row")

    def newest_runs(self) -> dict[str, dict[str, Any]]:
        """Per job: `success` (finish time of its newest done run) and `last` (its newest finished run)."""
        if self.engine is None:
            return {}
        out: dict[str, dict[str, Any]] = {}
        finished = runs.c.status.in_(["done", "failed"])
        with self._tx(read=True) as conn:
            q = sa.select(runs.c.job, sa.func.max(runs.c.finished_at)).where(runs.c.status == "done")
            for job, when in conn.execute(q.group_by(runs.c.job)):
                out.setdefault(job, {})["success"] = when
            jobs = [r[0] for r in conn.execute(sa.select(runs.c.job).where(finished).distinct())]
            for job in jobs:
                row = conn.execute(sa.select(runs.c.id, runs.c.status, runs.c.finished_at, runs.c.seconds)
                                   .where(runs.c.job == job, finished)
                                   .order_by(runs.c.finished_at.desc(), runs.c.id.desc()).limit(1)).mappings().first()
                if row is not None:
                    out.setdefault(job, {})["last"] = dict(row)
        return out


def _gone(owner: str) -> bool:
    """True when `owner` (host:pid:start, see `owner_id`) is a process of this host that has ended."""
    parts = owner.rsplit(":", 2)
    if len(parts) != 3 or parts[0] != socket.gethostname() or not parts[1].isdigit():
        return False
    try:
        os.kill(int(parts[1]), 0)
    except ProcessLookupError:
        return True
    except OSError:
        return False  # it exists (perhaps another user's process)
    return False


def _frame(rows: list[tuple], columns: list[tuple[str, Any, Any]]) -> pl.DataFrame:
    """A frame built column by column from DBAPI row tuples."""
    import polars as pl

    values = list(zip(*rows, strict=True)) if rows else [() for _ in columns]
    return pl.DataFrame([pl.Series(name, vals, dtype=dtype)
                         for (name, _, dtype), vals in zip(columns, values, strict=True)])


def _state_schema() -> dict[str, Any]:
    import polars as pl

    types = {sa.Integer: pl.Int64, sa.BigInteger: pl.Int64, sa.Float: pl.Float64, sa.Boolean: pl.Boolean}
    out = {}
    for col in windows.columns:
        out[col.name] = next((v for k, v in types.items() if isinstance(col.type, k)), pl.String)
    return out


def _ensure_schema(engine: sa.Engine, url: str) -> None:
    """Create the tables (or bring an older schema up to date); refuse a ledger of a newer weir."""
    try:
        with engine.begin() as conn:
            insp = sa.inspect(conn)
            if insp.has_table(meta.name):
                row = conn.execute(sa.select(meta.c.value).where(meta.c.key == "schema_version")).first()
                version = int(row[0]) if row else 0
                if version > SCHEMA_VERSION:
                    raise LedgerError(
                        f"the ledger at {url} was written by a newer weir (schema version {version}; "
                        f"this weir knows up to {SCHEMA_VERSION}); upgrade weir to use it")
                if version == SCHEMA_VERSION:
                    return
            metadata.create_all(conn)
            conn.execute(sa.delete(meta).where(meta.c.key == "schema_version"))
            conn.execute(sa.insert(meta).values(key="schema_version", value=str(SCHEMA_VERSION)))
    except (sa_exc.OperationalError, sa_exc.DatabaseError) as exc:
        raise LedgerError(_explain(url, exc)) from None


def _create_sqlite(path: Path) -> None:
    """Make a new SQLite ledger at `path` with its tables, appearing there at once.

    The tables are written to a temporary file beside it, which is then linked
    to `path` (a hard link fails when the name exists: a concurrent first run
    simply uses the ledger the other made). So a ledger file weir made is never
    empty, and an empty one can be refused as damaged.
    """
    import secrets

    from runner import engines

    tmp = path.with_name(f".{path.name}.weir-tmp-{os.getpid()}-{secrets.token_hex(4)}")
    try:
        made = engines.engine(f"sqlite:///{tmp}")
        try:
            _ensure_schema(made, f"sqlite:///{path}")
        finally:
            made.dispose()  # the last connection closed: the write-ahead log is folded into the file
        try:
            os.link(tmp, path)
        except FileExistsError:
            pass
        except OSError:  # a file system without hard links: a rename, unless another process was first
            if not path.exists():
                os.replace(tmp, path)
    finally:
        for leftover in (tmp, Path(f"{tmp}-wal"), Path(f"{tmp}-shm")):
            leftover.unlink(missing_ok=True)


def _refuse_empty(path: Path) -> None:
    """An existing SQLite ledger of 0 bytes is damaged (see `_create_sqlite`), not a new one."""
    try:
        empty = path.is_file() and path.stat().st_size == 0
    except OSError:
        return  # opening it reports the problem
    if empty:
        raise LedgerError(
            f"the ledger {path} is empty (0 bytes): weir never leaves a ledger empty, so it was cut short "
            "or replaced; restore it from a backup, or move it away to start afresh (every window is then "
            "recomputed)")


def _explain(url: str, exc: Exception) -> str:
    text = str(getattr(exc, "orig", exc)) or type(exc).__name__
    if "locked" in text:
        return f"the ledger {url} is locked by another process and stayed locked: {text}"
    if "not a database" in text or "malformed" in text:
        return f"the ledger {url} is not a readable database ({text}); restore it from a backup or move it away"
    return f"ledger {url}: {text}"


class HeldLock:
    """A workspace-wide lock held for a block, renewed from a background thread.

    `acquired` is False when another live owner holds it; the block then runs
    without it (the caller decides what to do).
    """

    def __init__(self, ledger: Ledger, name: str, owner: str, ttl: float = 300.0):
        import threading

        self.ledger, self.name, self.owner, self.ttl = ledger, name, owner, ttl
        self.acquired = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def __enter__(self) -> HeldLock:
        import threading

        self.acquired = self.ledger.lock(self.name, self.owner, self.ttl)
        if self.acquired:
            self._thread = threading.Thread(target=self._renew, name="weir-lock", daemon=True)
            self._thread.start()
        return self

    def _renew(self) -> None:
        import contextlib

        while not self._stop.wait(self.ttl / 3):
            with contextlib.suppress(Exception):
                self.ledger.renew_lock(self.name, self.owner, self.ttl)

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        if self.acquired:
            self.ledger.unlock(self.name, self.owner)

    def holder(self) -> str | None:
        if self.ledger.engine is None:
            return None
        with self.ledger._tx(read=True) as conn:
            row = conn.execute(sa.select(locks.c.owner).where(locks.c.name == self.name)).first()
        return row[0] if row else None
