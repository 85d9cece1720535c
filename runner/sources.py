"""Inputs -> polars LazyFrames, plus what the fingerprint needs to know about them.

* File inputs: the path template is rendered for the window (every distinct
  rendering across it), globs are expanded, and each file is scanned lazily.
  When a schema or `time_column` is declared, every batch passes through one
  `BatchInspector` inside the streaming plan: it counts rows, keeps rows in
  `[start, end)`, casts declared columns and flags bad rows, in the same pass
  that computes the result.
* Job inputs: the recorded outputs of the producer windows.
* Database inputs: a table or query through SQLAlchemy, restricted to the
  window with bound parameters.
"""

from __future__ import annotations

import hashlib
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.errors import WeirError
from runner.spec import Column, DatabaseInput, FileInput

if TYPE_CHECKING:
    import polars as pl

    from runner.windows import Window

ROW = "__weir_row"


class InputError(WeirError):
    """An input cannot be read as declared (missing column, bad value, bad query)."""


class BadRows(InputError):
    """Bad rows under `on_bad_rows: fail`, or more bad rows than the limits allow."""


@dataclass
class FileSet:
    """The files matched by one file input for one window."""

    input: str
    patterns: list[str]
    paths: list[str]
    manifest: list[dict[str, Any]]
    newest_mtime_ns: int | None


def find_files(root: Path, name: str, source: FileInput, window: Window, index: Any = None) -> FileSet:
    """Render, glob and stat the files of one input (hidden files never match).

    `index` (a `fileindex.FileIndex` of this input) answers from one listing
    made beforehand instead of globbing again.
    """
    from runner.fileindex import manifest, window_files

    patterns, files = window_files(root, source.files, window, index)
    entries = manifest(root, name, files, source.fingerprint == "content")
    newest = max((m for _, _, m in files), default=None)
    return FileSet(name, patterns, [p for p, _, _ in files], entries, newest)


def _relative(root: Path, path: str) -> str:
    try:
        return Path(path).resolve().relative_to(root.resolve()).as_posix()
    except ValueError:
        return str(Path(path).resolve())


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def file_format(path: str, declared: str | None) -> str:
    if declared:
        return declared
    lower = path.lower()
    for suffix, fmt in ((".parquet", "parquet"), (".pq", "parquet"), (".ndjson", "ndjson"),
                        (".jsonl", "ndjson"), (".json", "ndjson"), (".csv", "csv"), (".csv.gz", "csv")):
        if lower.endswith(suffix):
            return fmt
    raise InputError(f"cannot tell the format of {path}; add format: csv, parquet or ndjson to the input")


@dataclass
class InputStats:
    """Figures of one window's inputs, filled in while the plan streams."""

    rows_read: int = 0
    rows_dropped: int = 0
    rows_rejected: int = 0
    counted: bool = False
    rejected: list[pl.DataFrame] = field(default_factory=list)
    limits: dict[str, tuple[int | None, float | None, int]] = field(default_factory=dict)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def check_fractions(self) -> None:
        """After the run: fail when bad rows exceed an input's `max_bad_fraction`."""
        for name, (_, fraction, rejected) in self.limits.items():
            if fraction is not None and self.rows_read and rejected / self.rows_read > fraction:
                raise BadRows(f"input {name}: {rejected} bad row(s) of {self.rows_read} "
                              f"({rejected / self.rows_read:.2%}) exceed max_bad_fraction {fraction:.2%}")


class BatchInspector:
    """Called on every batch of one file: count, keep the window, cast, check, split bad rows."""

    def __init__(self, name: str, label: str, source: FileInput | DatabaseInput, columns: dict[str, Column],
                 raw_schema: pl.Schema, window: Window, job_tz: str, stats: InputStats):
        import polars as pl

        from runner.checks import cast_expr, column_rules

        self.name = name
        self.label = label
        self.stats = stats
        self.mode = getattr(source, "on_bad_rows", "fail")
        self.max_rows = getattr(source, "max_bad_rows", None)
        self.columns = columns
        present = [c for c in columns if c in raw_schema]
        self.casts = [cast_expr(c, columns[c].type, raw_schema[c], job_tz).alias(f"__typed_{c}") for c in present]
        self.rules = [r for c in present for r in column_rules(c, columns[c], raw_schema[c], job_tz)]
        self.time_column = source.time_column
        self.in_window: pl.Expr | None = None
        if self.time_column:
            from runner.coltypes import polars_dtype

            dtype = polars_dtype(columns[self.time_column].type)
            t = pl.col(f"__typed_{self.time_column}")
            if isinstance(dtype, pl.Date):
                t = t.cast(pl.Datetime("us"))
                dtype = pl.Datetime("us")
            if dtype.time_zone is None:
                t = t.dt.replace_time_zone(job_tz, ambiguous="earliest", non_existent="null")
            t = t.dt.convert_time_zone("UTC")
            self.in_window = (t >= pl.lit(window.start)) & (t < pl.lit(window.end))
        self.keep_extra = getattr(source, "extra", "keep") == "keep"
        self.output = [
            (pl.col(f"__typed_{c}").alias(c) if c in columns else pl.col(c))
            for c in raw_schema.names() if c != ROW and (c in columns or self.keep_extra)
        ]
        self.raw_names = [c for c in raw_schema.names() if c != ROW]

    def __call__(self, batch: pl.DataFrame) -> pl.DataFrame:
        import polars as pl

        height = batch.height
        frame = batch.with_columns(self.casts) if self.casts else batch
        dropped = 0
        if self.in_window is not None:
            inside = frame.select(self.in_window.fill_null(True)).to_series()
            dropped = height - int(inside.sum())
            if dropped:
                frame = frame.filter(inside)
        rejected = 0
        if self.rules and frame.height:
            reason = pl.coalesce([pl.when(r.bad).then(pl.lit(f"{r.column}: {r.label}")) for r in self.rules])
            frame = frame.with_columns(reason.alias("__reason"))
            bad = frame.filter(pl.col("__reason").is_not_null())
            rejected = bad.height
            if rejected:
                self._bad(bad)
                frame = frame.filter(pl.col("__reason").is_null())
        with self.stats.lock:
            self.stats.rows_read += height
            self.stats.rows_dropped += dropped
            self.stats.rows_rejected += rejected
            if rejected:
                limit, fraction, seen = self.stats.limits.get(self.name, (self.max_rows, None, 0))
                self.stats.limits[self.name] = (limit, fraction, seen + rejected)
                if self.max_rows is not None and seen + rejected > self.max_rows:
                    raise BadRows(f"input {self.name}: more than max_bad_rows {self.max_rows} bad rows "
                                  f"(at least {seen + rejected}); last in {self.label}")
        return frame.select(self.output)

    def _bad(self, bad: pl.DataFrame) -> None:
        import polars as pl

        if self.mode == "fail":
            first = bad.row(0, named=True)
            column = first["__reason"].split(":", 1)[0]
            value = first.get(column)
            more = f" ({bad.height} bad rows in this batch alone)" if bad.height > 1 else ""
            row = f", row {first[ROW] + 1}" if first.get(ROW) is not None else ""
            raise BadRows(
                f"input {self.name}: {self.label}{row}, column {column}: value {value!r} breaks rule "
                f"{first['__reason'].split(': ', 1)[1]}{more}; fix the data or set on_bad_rows: "
                "quarantine or drop")
        if self.mode == "quarantine":
            cols = [pl.col(c).cast(pl.String) for c in self.raw_names]
            kept = bad.select([
                *cols,
                pl.col("__reason").alias("reason"),
                pl.lit(self.label).alias("source_file"),
                (pl.col(ROW).cast(pl.Int64) + 1).alias("source_row") if ROW in bad.columns
                else pl.lit(None, dtype=pl.Int64).alias("source_row"),
                pl.lit(self.name).alias("input"),
            ])
            with self.stats.lock:
                self.stats.rejected.append(kept)

    def output_schema(self, raw_schema: pl.Schema) -> dict[str, Any]:
        """Columns and types of the batches this inspector returns."""
        from runner.coltypes import polars_dtype

        return {
            c: polars_dtype(self.columns[c].type) if c in self.columns else raw_schema[c]
            for c in raw_schema.names() if c != ROW and (c in self.columns or self.keep_extra)
        }


def declared_columns(source: FileInput | DatabaseInput) -> dict[str, Column]:
    """Declared columns plus the time column (as `datetime`) when it is not declared."""
    columns = dict(source.columns or {})
    if source.time_column and source.time_column not in columns:
        columns[source.time_column] = Column(type="datetime")
    return columns


def _scan(path: str, fmt: str, text_columns: list[str], row_index: bool) -> pl.LazyFrame:
    import polars as pl

    index = ROW if row_index else None
    if fmt == "csv":
        return pl.scan_csv(path, schema_overrides={c: pl.String for c in text_columns} or None,
                           row_index_name=index, infer_schema_length=10_000)
    if fmt == "ndjson":
        lf = pl.scan_ndjson(path, schema_overrides={c: pl.String for c in text_columns} or None,
                            row_index_name=index, infer_schema_length=10_000)
        return lf
    return pl.scan_parquet(path, row_index_name=index)


def file_frame(root: Path, name: str, source: FileInput, files: FileSet, window: Window, job_tz: str,
               stats: InputStats, empty_schema: dict[str, Any] | None = None) -> pl.LazyFrame:
    """One LazyFrame over all files of an input for a window (inspected when declared)."""
    import polars as pl

    columns = declared_columns(source)
    if not files.paths:
        from runner.coltypes import polars_dtype

        schema = {c: polars_dtype(col.type) for c, col in columns.items()} if columns else (empty_schema or {})
        return pl.LazyFrame(schema=schema)
    stats.limits.setdefault(name, (source.max_bad_rows, source.max_bad_fraction, 0))
    frames = []
    for path in files.paths:
        fmt = file_format(path, source.format)
        label = _relative(root, path)
        if not columns:
            frames.append(_scan(path, fmt, [], row_index=False))
            continue
        text_cols = list(columns) if fmt in ("csv", "ndjson") else []
        lf = _scan(path, fmt, [], row_index=False)
        try:
            header = lf.collect_schema()
        except pl.exceptions.PolarsError as exc:
            raise InputError(f"input {name}: cannot read {label}: {str(exc).splitlines()[0]}") from None
        missing = [c for c in columns if c not in header]
        if missing:
            raise InputError(f"input {name}: {label} has no column(s) {', '.join(missing)} "
                             f"(declared in schema; it has {', '.join(header.names())})")
        text_cols = [c for c in text_cols if c in header]
        lf = _scan(path, fmt, text_cols, row_index=True)
        if source.extra == "drop":
            lf = lf.select([ROW, *columns])
        raw_schema = lf.collect_schema()
        inspector = BatchInspector(name, label, source, columns, raw_schema, window, job_tz, stats)
        out_schema = inspector.output_schema(raw_schema)
        frames.append(lf.map_batches(inspector, schema=out_schema, streamable=True,
                                     validate_output_schema=False))
    stats.counted = stats.counted or bool(columns)
    if len(frames) == 1:
        return frames[0]
    return pl.concat(frames, how="diagonal_relaxed")


def output_frame(paths: list[str], empty_schema: dict[str, Any] | None) -> pl.LazyFrame:
    """The concatenated outputs of producer windows (an empty frame when there are none)."""
    import polars as pl

    if not paths:
        return pl.LazyFrame(schema=empty_schema or {})
    frames = []
    for path in paths:
        fmt = "csv" if path.lower().endswith(".csv") else "parquet"
        frames.append(pl.scan_csv(path) if fmt == "csv" else pl.scan_parquet(path))
    return frames[0] if len(frames) == 1 else pl.concat(frames, how="diagonal_relaxed")


def table_rows(url: str, table: str, keys: list[str]) -> pl.DataFrame:
    """Rows of a table output for the given window keys (column window_start)."""
    import polars as pl
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
    frame = pl.DataFrame([tuple(r) for r in rows], schema=cols, orient="row", infer_schema_length=None)
    return frame.drop("window_start")


def database_frame(root: Path, name: str, source: DatabaseInput, window: Window, job_tz: str,
                   stats: InputStats) -> tuple[pl.LazyFrame, dict[str, Any]]:
    """Read the window's rows of a table or query; returns the frame and its manifest entry.

    The window restriction uses bound parameters (`:window_start`, `:window_end`,
    naive UTC datetimes), never string formatting.
    """
    import polars as pl
    import sqlalchemy as sa

    from runner.fingerprint import frame_digest

    url = _expand_sqlite(root, source.database)
    params = {"window_start": window.start.replace(tzinfo=None), "window_end": window.end.replace(tzinfo=None)}
    try:
        engine = sa.create_engine(url)
    except Exception as exc:  # noqa: BLE001 - any driver error is the user's URL
        raise InputError(f"input {name}: cannot open {_mask(url)}: {exc}") from None
    try:
        with engine.connect() as conn:
            if source.table is not None:
                tbl = sa.Table(source.table, sa.MetaData(), autoload_with=conn)
                stmt = sa.select(tbl)
                if source.time_column:
                    col = tbl.c[source.time_column]
                    stmt = stmt.where(col >= sa.bindparam("window_start"), col < sa.bindparam("window_end"))
            else:
                inner = sa.text(source.query)
                if source.time_column:
                    sub = inner.columns().subquery("q")
                    col = sa.column(source.time_column)
                    stmt = sa.select(sa.text("*")).select_from(sub).where(
                        col >= sa.bindparam("window_start"), col < sa.bindparam("window_end"))
                else:
                    stmt = inner
            wanted = {k: v for k, v in params.items() if k in str(stmt)}
            result = conn.execute(stmt, wanted)
            cols = list(result.keys())
            rows = result.fetchall()
    except sa.exc.SQLAlchemyError as exc:
        raise InputError(f"input {name}: query failed on {_mask(url)}: {str(exc).splitlines()[0]}") from None
    finally:
        engine.dispose()
    frame = pl.DataFrame([tuple(r) for r in rows], schema=cols, orient="row", infer_schema_length=None)
    entry = {"input": name, "path": f"{_mask(url)} {source.table or 'query'}", "rows": frame.height,
             "digest": frame_digest(frame)}
    columns = declared_columns(source)
    if columns:
        missing = [c for c in columns if c not in frame.columns]
        if missing:
            raise InputError(f"input {name}: the query returns no column(s) {', '.join(missing)}")
        inspector = BatchInspector(name, f"{_mask(url)} {source.table or 'query'}", source, columns,
                                   frame.with_row_index(ROW).schema, window, job_tz, stats)
        frame = inspector(frame.with_row_index(ROW))
        stats.counted = True
    else:
        with stats.lock:
            stats.rows_read += frame.height
    return frame.lazy(), entry


def _expand_sqlite(root: Path, url: str) -> str:
    """Relative SQLite paths are relative to the workspace, not the current folder."""
    prefix = "sqlite:///"
    if url.startswith(prefix) and not url.startswith(prefix + "/") and ":memory:" not in url:
        return prefix + str(root / url[len(prefix):])
    return url


def _mask(url: str) -> str:
    try:
        import sqlalchemy as sa

        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001
        return url
