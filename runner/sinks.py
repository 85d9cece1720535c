"""Outputs with atomic replace: files through a hidden temporary file, tables in one transaction.

File outputs are written in canonical row order (sorted by every column) to
`.NAME.weir-tmp-PID-RANDOM` in the target folder, flushed and fsynced. The
caller then checks the staged data and either commits it (`os.replace` onto
the final name, then an fsync of the folder) or discards it. Readers see the
old file or the new one, never a partial or doubled one. Leftover temporary
files of a crashed run are removed before the next write of the same output.

Table outputs delete the window's rows and insert the new ones in one
transaction, keyed by a `window_start` column (the window's UTC start).
"""

from __future__ import annotations

import contextlib
import os
import secrets
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.errors import WeirError
from runner.fingerprint import batches_digest, frame_digest, sort_columns
from runner.paths import escapes
from runner.sources import file_sha256

if TYPE_CHECKING:
    import polars as pl

STAMPS = ("window_start", "window_end", "run_id", "code_version")
TMP_MARK = ".weir-tmp-"


class OutputError(WeirError):
    """An output cannot be written where it was asked to go."""


@dataclass
class Staged:
    """A written but not yet visible output file."""

    final: Path
    tmp: Path
    fmt: str
    rows: int
    digest: str
    checksum: str
    size: int
    location: str
    frame: pl.DataFrame | None = None  # the written rows, kept when they were computed in memory

    def scan(self) -> pl.LazyFrame:
        """The staged rows (from memory when kept, else read back from the temporary file)."""
        import polars as pl

        if self.frame is not None:
            return self.frame.lazy()
        return pl.scan_parquet(self.tmp) if self.fmt == "parquet" else pl.scan_csv(self.tmp)

    def commit(self) -> None:
        os.replace(self.tmp, self.final)
        _fsync_dir(self.final.parent)

    def discard(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.tmp.unlink()


def target(root: Path, relative: str) -> Path:
    """The final path of an output, refused when it leaves the workspace."""
    if escapes(root, relative):
        raise OutputError(f"output path {relative!r} leaves the workspace {root}; refusing to write there")
    return root / relative


def clean_leftovers(final: Path) -> int:
    """Remove temporary files a crashed run left beside `final`; return how many."""
    count = 0
    if not final.parent.is_dir():
        return 0
    prefix = f".{final.name}{TMP_MARK}"
    for entry in os.scandir(final.parent):
        if entry.name.startswith(prefix):
            try:
                os.unlink(entry.path)
                count += 1
            except FileNotFoundError:
                pass
    return count


def stage_file(root: Path, relative: str, result: pl.LazyFrame, fmt: str,
               stamps: dict[str, Any] | None = None, streaming: bool = True) -> Staged:
    """Write `result` in canonical order to a temporary file beside the final path.

    `streaming`: run the query on polars' streaming engine and sink straight to
    the file, then read the file back for its row count and digest (memory
    stays bounded whatever the size). Otherwise (small inputs) the query runs
    once in memory and the rows, digest and later checks all use that frame.
    """
    import polars as pl

    final = target(root, relative)
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create output folder {final.parent}: {exc.strerror or exc}") from None
    clean_leftovers(final)
    tmp = final.parent / f".{final.name}{TMP_MARK}{os.getpid()}-{secrets.token_hex(4)}"
    kept = None
    try:
        if not streaming:
            # small inputs: run the query once, then order the (small) result in memory
            collected = result.collect(engine="in-memory")
            keys = sort_columns(collected.schema, exclude=STAMPS)
            ordered = (collected.sort(keys, nulls_last=True, maintain_order=True) if keys and collected.height > 1
                       else collected).lazy()
        else:
            keys = sort_columns(result.collect_schema(), exclude=STAMPS)
            ordered = result.sort(keys, nulls_last=True, maintain_order=True) if keys else result
        if stamps:
            ordered = ordered.with_columns([pl.lit(v).alias(k) for k, v in stamps.items()])
        if fmt == "parquet" and streaming:
            ordered.sink_parquet(tmp, engine="streaming", sync_on_close="all")
            data_cols = [c for c in ordered.collect_schema().names() if c not in (stamps or {})]
            rows = 0
            batches = pl.scan_parquet(tmp).select(data_cols).collect_batches(engine="streaming")

            def counted():  # one pass over the file: count the rows while hashing them
                nonlocal rows
                for batch in batches:
                    rows += batch.height
                    yield batch

            digest = batches_digest(pl.scan_parquet(tmp).select(data_cols).collect_schema(), counted())
        else:
            frame = ordered.collect(engine="streaming" if streaming else "in-memory")
            rows = frame.height
            data = frame.drop([c for c in (stamps or {}) if c in frame.columns])
            digest = batches_digest(data.schema, [data])  # already in canonical order
            with open(tmp, "wb") as fh:
                if fmt == "parquet":
                    frame.write_parquet(fh)
                else:
                    frame.write_csv(fh)
                fh.flush()
                os.fsync(fh.fileno())
            kept = frame
    except OSError as exc:
        _unlink(tmp)
        raise OutputError(f"cannot write output {relative}: {exc.strerror or exc}") from None
    except BaseException:
        _unlink(tmp)
        raise
    size = tmp.stat().st_size
    return Staged(final, tmp, fmt, rows, digest, file_sha256(tmp), size, relative, kept)


def stage_frame_file(root: Path, relative: str, frame: pl.DataFrame) -> Staged:
    """Stage an in-memory frame as Parquet (used for rejected rows)."""
    return stage_file(root, relative, frame.lazy(), "parquet", streaming=False)


def _unlink(path: Path) -> None:
    with contextlib.suppress(FileNotFoundError):
        path.unlink()


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


# ---------------------------------------------------------------- tables


def _sql_type(dtype: Any) -> Any:
    import polars as pl
    import sqlalchemy as sa

    if dtype == pl.String or dtype == pl.Categorical:
        return sa.Text()
    if dtype.is_integer():
        return sa.BigInteger()
    if dtype.is_float():
        return sa.Float()
    if isinstance(dtype, pl.Decimal):
        return sa.Numeric(dtype.precision or 38, dtype.scale or 0)
    if dtype == pl.Boolean:
        return sa.Boolean()
    if dtype == pl.Date:
        return sa.Date()
    if isinstance(dtype, pl.Datetime):
        return sa.DateTime(timezone=dtype.time_zone is not None)
    return sa.Text()


def write_table(url: str, table: str, frame: pl.DataFrame, window_key: str) -> tuple[int, str]:
    """Replace the window's rows of `table` in one transaction; return (rows, digest).

    The digest is computed from the rows as read back inside the transaction,
    so `weir verify` can recompute it the same way later.
    """
    import polars as pl
    import sqlalchemy as sa

    from runner import engines

    keys = sort_columns(frame.schema)
    if keys and frame.height > 1:
        frame = frame.sort(keys, nulls_last=True, maintain_order=True)
    if "window_start" in frame.columns:
        raise OutputError("a table output may not have its own window_start column (weir keys rows by it)")
    if url.startswith("sqlite:///") and ":memory:" not in url:
        Path(url[len("sqlite:///"):]).parent.mkdir(parents=True, exist_ok=True)
    engine = engines.engine(url)
    try:
        with engine.begin() as conn:
            md = sa.MetaData()
            if sa.inspect(conn).has_table(table):
                tbl = sa.Table(table, md, autoload_with=conn)
                missing = [c for c in frame.columns if c not in tbl.c]
                if missing or "window_start" not in tbl.c:
                    raise OutputError(f"table {table} lacks column(s) {', '.join(missing or ['window_start'])}; "
                                      "alter it or write to a new table")
            else:
                tbl = sa.Table(table, md, sa.Column("window_start", sa.String(32), nullable=False, index=True),
                               *[sa.Column(c, _sql_type(t)) for c, t in frame.schema.items()])
                md.create_all(conn)
            conn.execute(sa.delete(tbl).where(tbl.c.window_start == window_key))
            if frame.height:
                rows = [{"window_start": window_key, **r} for r in frame.iter_rows(named=True)]
                conn.execute(sa.insert(tbl), rows)
            digest = table_digest(conn, tbl, window_key)
    except sa.exc.SQLAlchemyError as exc:
        raise OutputError(f"cannot write table {table}: {str(exc).splitlines()[0]}") from None
    finally:
        engine.dispose()
    del pl
    return frame.height, digest


def table_digest(conn: Any, tbl: Any, window_key: str) -> str:
    """Content digest of one window's rows in a table output, as read back."""
    import polars as pl
    import sqlalchemy as sa

    cols = [c for c in tbl.c if c.name != "window_start"]
    result = conn.execute(sa.select(*cols).where(tbl.c.window_start == window_key))
    names = list(result.keys())
    data = pl.DataFrame([tuple(r) for r in result.fetchall()], schema=names, orient="row", infer_schema_length=None)
    return frame_digest(data)


def read_table_digest(url: str, table: str, window_key: str) -> str | None:
    """The digest `write_table` would report for the rows now in the table (None if no table)."""
    import sqlalchemy as sa

    from runner import engines

    engine = engines.engine(url)
    try:
        with engine.execution_options(**engines.READ).begin() as conn:
            if not sa.inspect(conn).has_table(table):
                return None
            tbl = sa.Table(table, sa.MetaData(), autoload_with=conn)
            return table_digest(conn, tbl, window_key)
    finally:
        engine.dispose()
