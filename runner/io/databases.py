"""SQLAlchemy engines for the databases weir reads and writes: the ledger, inputs and table outputs.

One place configures SQLite connections for both. SQLite engines wait for a
lock up to the busy timeout (`WEIR_LEDGER_TIMEOUT` seconds, default 60)
instead of the driver's 5 s, use write-ahead logging (readers never block the
writer, nor the writer them), and begin every writing transaction with
`BEGIN IMMEDIATE`, so that a writer waits at its start rather than fails
half-way when another process writes. Other databases get a plain engine.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

import sqlalchemy as sa

if TYPE_CHECKING:
    import polars as pl

READ = {"weir_read": True}  # execution options of a transaction that only reads (plain BEGIN)


def masked(url: str) -> str:
    """`url` fit to show: its password replaced by `***` (an unparsable URL comes back as it was)."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - only for showing
        return url


def rows_frame(rows: Iterable[Any], schema: Any) -> pl.DataFrame:
    """A polars frame of database rows (tuples or Row objects); `schema` gives names and dtypes, or
    names only (dtypes are then inferred from every row, not the first hundred)."""
    import polars as pl

    return pl.DataFrame([tuple(r) for r in rows], schema=schema, orient="row", infer_schema_length=None)


def busy_timeout() -> float:
    """Seconds a SQLite connection waits for another process's lock."""
    return float(os.environ.get("WEIR_LEDGER_TIMEOUT", "60"))


def is_sqlite(url: str | sa.URL) -> bool:
    return sa.engine.make_url(url).get_backend_name() == "sqlite"


def engine(url: str | sa.URL) -> sa.Engine:
    """An engine for `url`; a SQLite one is configured as this module says.

    Raises SQLAlchemy's ArgumentError or NoSuchModuleError (or ImportError) for
    a URL it cannot use.
    """
    if not is_sqlite(url):
        return sa.create_engine(url)
    # pysqlite's own transaction handling is off (isolation_level=None): `_begin` begins explicitly
    made = sa.create_engine(url, connect_args={"timeout": busy_timeout(), "isolation_level": None})
    sa.event.listen(made, "connect", _pragmas)
    sa.event.listen(made, "begin", _begin)
    return made


def _pragmas(dbapi_conn: Any, _record: Any) -> None:
    cur = dbapi_conn.cursor()
    cur.execute(f"PRAGMA busy_timeout={int(busy_timeout() * 1000)}")
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA synchronous=NORMAL")
    cur.close()


def _begin(conn: sa.Connection) -> None:
    read = conn.get_execution_options().get("weir_read", False)
    conn.exec_driver_sql("BEGIN" if read else "BEGIN IMMEDIATE")
