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
from pathlib import Path
from typing import TYPE_CHECKING, Any

import sqlalchemy as sa

from runner.core.paths import database_url

if TYPE_CHECKING:
    import polars as pl

    from runner.core.windows import Window
    from runner.io.inspect import InputStats
    from runner.model.spec import DatabaseInput

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


def table_rows(url: str, table: str, keys: list[str]) -> pl.DataFrame:
    """Rows of a table output for the given window keys (column window_start)."""
    import sqlalchemy as sa

    engine = sa.create_engine(url)
    try:
        tbl = sa.Table(table, sa.MetaData(), autoload_with=engine)
        with engine.connect() as conn:
            result = conn.execute(sa.select(tbl).where(tbl.c.window_start.in_(keys)))
            cols = list(result.keys())
            rows = result.fetchall()
    finally:
        engine.dispose()
    frame = rows_frame(rows, cols)
    return frame.drop("window_start")


def database_frame(root: Path, name: str, source: DatabaseInput, window: Window, job_tz: str,
                   stats: InputStats) -> tuple[pl.LazyFrame, dict[str, Any]]:
    """Read the window's rows of a table or query; returns the frame and its manifest entry.

    The window restriction uses bound parameters (`:window_start`, `:window_end`,
    naive UTC datetimes), never string formatting.
    """
    import polars as pl
    import sqlalchemy as sa

    from runner.core.fingerprints import frame_digest
    from runner.io.inputfiles import InputError
    from runner.io.inspect import (
        COPIES,
        FILE,
        ROW,
        BatchInspector,
        key_frame,
        key_problem,
        repeated_keys,
    )
    from runner.io.readers import declared_columns

    url = database_url(root, source.database)
    params = {"window_start": window.start.replace(tzinfo=None), "window_end": window.end.replace(tzinfo=None)}
    try:
        engine = sa.create_engine(url)
    except Exception as exc:  # noqa: BLE001 - any driver error is the user's URL
        raise InputError(f"input {name}: cannot open {masked(url)}: {exc}") from None
    try:
        with engine.connect() as conn:
            if source.table is not None:
                tbl = sa.Table(source.table, sa.MetaData(), autoload_with=conn)
                stmt: Any = sa.select(tbl)
                if source.time_column:
                    col = tbl.c[source.time_column]
                    stmt = stmt.where(col >= sa.bindparam("window_start"), col < sa.bindparam("window_end"))
            else:
                assert source.query is not None  # a database input has a table or a query
                inner = sa.text(source.query)
                if source.time_column:
                    sub = inner.columns().subquery("q")
                    where_col: Any = sa.column(source.time_column)
                    stmt = sa.select(sa.text("*")).select_from(sub).where(
                        where_col >= sa.bindparam("window_start"), where_col < sa.bindparam("window_end"))
                else:
                    stmt = inner
            wanted = {k: v for k, v in params.items() if k in str(stmt)}
            result = conn.execute(stmt, wanted)
            cols = list(result.keys())
            rows = result.fetchall()
    except sa.exc.SQLAlchemyError as exc:
        raise InputError(f"input {name}: query failed on {masked(url)}: {str(exc).splitlines()[0]}") from None
    finally:
        engine.dispose()
    frame = rows_frame(rows, cols)
    entry = {"input": name, "path": f"{masked(url)} {source.table or 'query'}", "rows": frame.height,
             "digest": frame_digest(frame)}
    columns = declared_columns(source)
    key = list(source.key or [])
    if columns or key:
        missing = [c for c in dict.fromkeys([*columns, *key]) if c not in frame.columns]
        if missing:
            raise InputError(f"input {name}: the query returns no column(s) {', '.join(missing)}")
        label = f"{masked(url)} {source.table or 'query'}"
        numbered = frame.with_row_index(ROW).with_columns(pl.lit(0, dtype=pl.UInt32).alias(FILE))
        repeats = None
        if key:
            repeats = repeated_keys([key_frame(numbered.lazy(), key, columns, numbered.schema, source.time_column,
                                               window, job_tz)], len(key))
            if repeats.height:
                stats.tally(name, 0, 0, int(repeats[COPIES].sum()) - repeats.height)
                raise key_problem(name, key, repeats, [label])
        inspector = BatchInspector(name, [label], source, columns, numbered.schema, window, job_tz, stats, repeats)
        frame = inspector(inspector.stage(numbered.lazy()).collect())
        stats.counted = True
    else:
        stats.tally(name, frame.height, 0, 0)
    return frame.lazy(), entry
