"""The ledger's tables (SQLAlchemy Core), their version, and creating or upgrading them.

The tables are described in `runner.io.ledger.store`. The schema carries a
version number (`weir_meta`); an older one is brought up to date, one written
by a newer weir is refused. A new SQLite ledger appears complete with its
tables (`create_sqlite`), so an empty file is known to be damaged.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from sqlalchemy import exc as sa_exc

from runner.errors import LedgerError

SCHEMA_VERSION = 2  # 2: claims carry a fencing number


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
    sa.Column("fence", sa.BigInteger, nullable=False, default=0),
)


locks = sa.Table(
    "weir_locks", metadata,
    sa.Column("name", sa.String(200), primary_key=True),
    sa.Column("owner", sa.String(200), nullable=False),
    sa.Column("expires", sa.Float, nullable=False),
)


STATE_COLUMNS = [c.name for c in windows.columns]


def state_schema() -> dict[str, Any]:
    import polars as pl

    types = {sa.Integer: pl.Int64, sa.BigInteger: pl.Int64, sa.Float: pl.Float64, sa.Boolean: pl.Boolean}
    out = {}
    for col in windows.columns:
        out[col.name] = next((v for k, v in types.items() if isinstance(col.type, k)), pl.String)
    return out


def ensure_schema(engine: sa.Engine, url: str) -> None:
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
                if version == 1:  # claims live for minutes: a new column with a default is enough
                    conn.execute(sa.text("ALTER TABLE weir_claims ADD COLUMN fence BIGINT NOT NULL DEFAULT 0"))
            metadata.create_all(conn)
            conn.execute(sa.delete(meta).where(meta.c.key == "schema_version"))
            conn.execute(sa.insert(meta).values(key="schema_version", value=str(SCHEMA_VERSION)))
    except (sa_exc.OperationalError, sa_exc.DatabaseError) as exc:
        raise LedgerError(explain_error(url, exc)) from None


def create_sqlite(path: Path) -> None:
    """Make a new SQLite ledger at `path` with its tables, appearing there at once.

    The tables are written to a temporary file beside it, which is then linked
    to `path` (a hard link fails when the name exists: a concurrent first run
    simply uses the ledger the other made). So a ledger file weir made is never
    empty, and an empty one can be refused as damaged.
    """
    import secrets

    from runner.io import databases as engines
    tmp = path.with_name(f".{path.name}.weir-tmp-{os.getpid()}-{secrets.token_hex(4)}")
    try:
        made = engines.engine(f"sqlite:///{tmp}")
        try:
            ensure_schema(made, f"sqlite:///{path}")
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


def refuse_empty(path: Path) -> None:
    """An existing SQLite ledger of 0 bytes is damaged (see `create_sqlite`), not a new one."""
    try:
        empty = path.is_file() and path.stat().st_size == 0
    except OSError:
        return  # opening it reports the problem
    if empty:
        raise LedgerError(
            f"the ledger {path} is empty (0 bytes): weir never leaves a ledger empty, so it was cut short "
            "or replaced; restore it from a backup, or move it away to start afresh (every window is then "
            "recomputed)")


def explain_error(url: str, exc: Exception) -> str:
    text = str(getattr(exc, "orig", exc)) or type(exc).__name__
    if "locked" in text:
        return f"the ledger {url} is locked by another process and stayed locked: {text}"
    if "not a database" in text or "malformed" in text:
        return f"the ledger {url} is not a readable database ({text}); restore it from a backup or move it away"
    return f"ledger {url}: {text}"


STATE_ROW = sa.select(windows).where(windows.c.job == sa.bindparam("b_job"), windows.c.window_key == sa.bindparam("b_key"))
"""One window's state row (bind b_job, b_key)."""
