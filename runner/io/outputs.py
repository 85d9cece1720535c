"""Outputs with atomic replace: files through a hidden temporary file, tables in one transaction.

File outputs are written in canonical row order (sorted by every column) to
`.NAME.weir-tmp-HOST-PID-RANDOM` in the target folder, flushed and fsynced. The
caller then checks the staged data and either commits it (`os.replace` onto
the final name, then an fsync of the folder) or discards it. Readers see the
old file or the new one, never a partial or doubled one. Temporary files that
no live process writes any more (see `stale_temporary`) are removed before
the next write of the same output and by `sweep_temporaries` when a run or
tick starts.

Every write goes through a descriptor of the output folder opened and checked
just before: the folder resolves inside the workspace at that moment (symbolic
links followed), and the temporary file, the rename and the removals act on
that descriptor (`openat`-style), so a folder swapped for a link to elsewhere
later cannot send an output, or a removal, outside the workspace.

Table outputs delete the window's rows and insert the new ones in one
transaction, keyed by a `window_start` column (the window's UTC start).
"""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

from runner.core.fingerprints import batches_digest, frame_digest, sort_columns
from runner.errors import WeirError
from runner.io.databases import rows_frame
from runner.io.files import TMP_MARK, clean_leftovers, escapes, file_sha256, temporary_name

if TYPE_CHECKING:
    from datetime import datetime

    import polars as pl

    from runner.core.workspace import Workspace

STAMPS = ("window_start", "window_end", "run_id", "code_version")
_FLAGS = getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NOFOLLOW", 0)


class OutputError(WeirError):
    """An output cannot be written where it was asked to go."""


@dataclass
class Staged:
    """A written but not yet visible output file, in a folder held open (`folder`, a descriptor)."""

    final: Path
    tmp: Path
    fmt: str
    rows: int
    digest: str
    checksum: str
    size: int
    location: str
    frame: pl.DataFrame | None = None  # the written rows, kept when they were computed in memory
    folder: int = field(default=-1, repr=False)

    def scan(self) -> pl.LazyFrame:
        """The staged rows (from memory when kept, else read back from the temporary file)."""
        import polars as pl

        if self.frame is not None:
            return self.frame.lazy()
        return pl.scan_parquet(self.tmp) if self.fmt == "parquet" else pl.scan_csv(self.tmp)

    def commit(self) -> None:
        """Move the file onto its final name, inside the folder checked when it was staged."""
        try:
            os.replace(self.tmp.name, self.final.name, src_dir_fd=self.folder, dst_dir_fd=self.folder)
            with contextlib.suppress(OSError):
                os.fsync(self.folder)
        finally:
            self._close()

    def discard(self) -> None:
        try:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self.tmp.name, dir_fd=self.folder)
        finally:
            self._close()

    def _close(self) -> None:
        if self.folder >= 0:
            os.close(self.folder)
            self.folder = -1


def target(root: Path, relative: str) -> Path:
    """The final path of an output, refused when it leaves the workspace."""
    if escapes(root, relative):
        raise OutputError(f"output path {relative!r} leaves the workspace {root}; refusing to write there")
    return root / relative


def open_folder(root: Path, relative: str, create: bool = True) -> int:
    """A descriptor of the folder that will hold `relative` (created if need be), checked to lie inside
    the workspace now: writes through it stay there whatever later happens to the path.

    Without `create`, a missing folder raises FileNotFoundError.
    """
    final = target(root, relative)
    try:
        if create:
            final.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(final.parent, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_CLOEXEC", 0))
    except (FileNotFoundError, NotADirectoryError):
        if not create:
            raise FileNotFoundError(final.parent) from None
        raise OutputError(f"cannot create output folder {final.parent}") from None
    except OSError as exc:
        raise OutputError(f"cannot create output folder {final.parent}: {exc.strerror or exc}") from None
    try:
        real = os.path.realpath(final.parent)
        base = os.path.realpath(root)
        held, there = os.fstat(fd), os.stat(real)
        if os.path.commonpath([base, real]) != base or (held.st_dev, held.st_ino) != (there.st_dev, there.st_ino):
            raise OutputError(f"output folder {final.parent} leaves the workspace {root} (a symbolic link?); "
                              "refusing to write there")
    except BaseException:
        os.close(fd)
        raise
    return fd


def sweep_temporaries(ws: Workspace, at: datetime) -> int:
    """Remove stale temporary files (`stale_temporary`) from the folders of every file output; return
    how many. The folders are those that the windows starting before `at` render to (the latest
    `graph.MOST_WINDOWS` of each job)."""
    from runner.core.graph import output_span
    from runner.core.paths import output_paths

    folders: set[str] = set()
    for name, job in ws.jobs.items():
        template = job.spec.output.path
        if template is not None:
            _, paths = output_paths(template, output_span(ws.cadence(name), at))
            folders.update(paths.str.replace(r"(?:^|/)[^/]*$", "").unique().to_list())
    count = 0
    for folder in sorted(folders):
        try:
            fd = open_folder(ws.root, os.path.join(folder, "-"), create=False)
        except (FileNotFoundError, OutputError):
            continue  # not written yet; or leading outside, where nothing is removed
        try:
            count += clean_leftovers(fd)
        finally:
            os.close(fd)
    return count


def open_append(root: Path, relative: str) -> IO[str]:
    """A text file inside the workspace opened for appending (a log), never through a link leaving it."""
    folder = open_folder(root, relative)
    try:
        fd = os.open(os.path.basename(relative), os.O_WRONLY | os.O_APPEND | os.O_CREAT | _FLAGS, 0o666,
                     dir_fd=folder)
    finally:
        os.close(folder)
    return os.fdopen(fd, "a", encoding="utf-8")


def remove(root: Path, relative: str) -> bool:
    """Remove an output file (inside the workspace only); False when there was none."""
    folder = open_folder(root, relative)
    try:
        os.unlink(os.path.basename(relative), dir_fd=folder)
        return True
    except FileNotFoundError:
        return False
    finally:
        os.close(folder)


def stage_file(root: Path, relative: str, result: pl.LazyFrame, fmt: str,
               stamps: dict[str, Any] | None = None, streaming: bool = True) -> Staged:
    """Write `result` in canonical order to a temporary file beside the final path.

    `streaming`: run the query on polars' streaming engine and sink straight to
    the file, then read the file back for its row count and digest (memory
    stays bounded whatever the size). Otherwise (small inputs) the query runs
    once in memory and the rows, digest and later checks all use that frame.
    The file is created and written through the checked folder descriptor.
    """
    import polars as pl

    final = target(root, relative)
    folder = open_folder(root, relative)
    tmp = final.parent / temporary_name(final.name)
    kept = None
    try:
        clean_leftovers(folder, prefix=f".{final.name}{TMP_MARK}")
        with os.fdopen(os.open(tmp.name, os.O_WRONLY | os.O_CREAT | os.O_EXCL | _FLAGS, 0o666, dir_fd=folder),
                       "wb") as fh:
            if not streaming:
                # small inputs: run the query once, then order the (small) result in memory
                collected = result.collect(engine="in-memory")
                keys = sort_columns(collected.schema, exclude=STAMPS)
                ordered = (collected.sort(keys, nulls_last=True, maintain_order=True)
                           if keys and collected.height > 1 else collected).lazy()
            else:
                keys = sort_columns(result.collect_schema(), exclude=STAMPS)
                ordered = result.sort(keys, nulls_last=True, maintain_order=True) if keys else result
            if stamps:
                ordered = ordered.with_columns([pl.lit(v).alias(k) for k, v in stamps.items()])
            if fmt == "parquet" and streaming:
                ordered.sink_parquet(fh, engine="streaming")
                frame = None
            else:
                frame = ordered.collect(engine="streaming" if streaming else "in-memory")
                if fmt == "parquet":
                    frame.write_parquet(fh)
                else:
                    frame.write_csv(fh)
            fh.flush()
            os.fsync(fh.fileno())
            size = os.fstat(fh.fileno()).st_size
        if frame is None:  # streamed: count and hash the rows in one pass over the written file
            data_cols = [c for c in ordered.collect_schema().names() if c not in (stamps or {})]
            rows = 0
            batches = pl.scan_parquet(tmp).select(data_cols).collect_batches(engine="streaming")

            def counted():
                nonlocal rows
                for batch in batches:
                    rows += batch.height
                    yield batch

            digest = batches_digest(pl.scan_parquet(tmp).select(data_cols).collect_schema(), counted())
        else:
            rows = frame.height
            data = frame.drop([c for c in (stamps or {}) if c in frame.columns])
            digest = batches_digest(data.schema, [data])  # already in canonical order
            kept = frame
        checksum = file_sha256(tmp)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp.name, dir_fd=folder)
        os.close(folder)
        if isinstance(exc, OSError):
            raise OutputError(f"cannot write output {relative}: {exc.strerror or exc}") from None
        raise
    return Staged(final, tmp, fmt, rows, digest, checksum, size, relative, kept, folder)


def stage_frame_file(root: Path, relative: str, frame: pl.DataFrame) -> Staged:
    """Stage an in-memory frame as Parquet (used for rejected rows)."""
    return stage_file(root, relative, frame.lazy(), "parquet", streaming=False)


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

    from runner.core.paths import database_file
    from runner.io import databases as engines

    keys = sort_columns(frame.schema)
    if keys and frame.height > 1:
        frame = frame.sort(keys, nulls_last=True, maintain_order=True)
    if "window_start" in frame.columns:
        raise OutputError("a table output may not have its own window_start column (weir keys rows by it)")
    file = database_file(".", url)
    if file is not None:
        Path(file).parent.mkdir(parents=True, exist_ok=True)
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
    import sqlalchemy as sa

    cols = [c for c in tbl.c if c.name != "window_start"]
    result = conn.execute(sa.select(*cols).where(tbl.c.window_start == window_key))
    names = list(result.keys())
    data = rows_frame(result.fetchall(), names)
    return frame_digest(data)


def read_table_digest(url: str, table: str, window_key: str) -> str | None:
    """The digest `write_table` would report for the rows now in the table (None if no table)."""
    import sqlalchemy as sa

    from runner.io import databases as engines
    engine = engines.engine(url)
    try:
        with engine.execution_options(**engines.READ).begin() as conn:
            if not sa.inspect(conn).has_table(table):
                return None
            tbl = sa.Table(table, sa.MetaData(), autoload_with=conn)
            return table_digest(conn, tbl, window_key)
    finally:
        engine.dispose()
