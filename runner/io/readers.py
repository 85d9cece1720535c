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

import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.core.paths import database_url
from runner.io.databases import rows_frame
from runner.io.inputfiles import BadRows, InputError
from runner.model.columns import Column
from runner.model.spec import DatabaseInput, FileInput
from runner.model.templates import format_from_name

if TYPE_CHECKING:
    import polars as pl

    from runner.core.windows import Window
    from runner.io.inputfiles import FileRead

ROW = "__weir_row"  # a row's number in its file (0 = the first record after a CSV header)
FILE = "__weir_file"  # the file's place among the input's files

__all__ = ["BadRows", "InputError"]


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
    from runner.core.paths import expand

    return files_for_patterns(root, name, source, expand(source.files, window), index)


def files_for_patterns(root: Path, name: str, source: FileInput, patterns: list[str], index: Any = None) -> FileSet:
    """The files of one input matching already rendered `patterns`; InputError when one of them
    leads outside the workspace (and the folders the input allows)."""
    from runner.io.files import listing, manifest, relative
    from runner.io.inputfiles import confine, outside_roots

    files = listing(root, patterns, index)
    confine(name, [p for p, _, _ in files], outside_roots(root, source.allow_outside),
            lambda p: relative(root, p), getattr(index, "real_folders", None))
    entries = manifest(root, name, files, source.fingerprint == "content")
    newest = max((m for _, _, m in files), default=None)
    return FileSet(name, patterns, [p for p, _, _ in files], entries, newest)


def file_format(path: str, declared: str | None) -> str:
    fmt = declared or format_from_name(path)
    if fmt:
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
    limits: dict[str, tuple[int | None, float | None]] = field(default_factory=dict)
    judged: dict[str, list[int]] = field(default_factory=dict)  # input -> [rows in the window, bad rows]
    lock: threading.Lock = field(default_factory=threading.Lock)

    def tally(self, name: str, read: int, dropped: int, rejected: int) -> int:
        """Add one batch's figures; return the input's bad rows so far."""
        with self.lock:
            self.rows_read += read
            self.rows_dropped += dropped
            self.rows_rejected += rejected
            seen = self.judged.setdefault(name, [0, 0])
            seen[0] += read - dropped
            seen[1] += rejected
            return seen[1]

    def check_fractions(self) -> None:
        """After the run: fail when an input's bad rows exceed its `max_bad_fraction` of the
        rows it had inside the window."""
        for name, (rows, bad) in self.judged.items():
            fraction = self.limits.get(name, (None, None))[1]
            if fraction is not None and rows and bad / rows > fraction:
                raise BadRows(f"input {name}: {bad} bad row(s) of {rows} ({bad / rows:.2%}) exceed "
                              f"max_bad_fraction {fraction:.2%}")


# Positions order the rows of one input across its files: file number * 2**40 + row number.
POSITION = "__weir_position"
_FILE_SHIFT = 1 << 40


def _position() -> pl.Expr:
    import polars as pl

    return (pl.col(ROW).cast(pl.Int64) + pl.col(FILE).cast(pl.Int64) * _FILE_SHIFT).alias(POSITION)
_FIRST, _LAST, _COPIES, _REPEAT = "__weir_first", "__weir_last", "__weir_copies", "__weir_repeat"


def window_filter(columns: dict[str, Column], time_column: str | None, window: Window, job_tz: str
                  ) -> pl.Expr | None:
    """True on rows whose typed time column lies in the window (null where it did not read)."""
    import polars as pl

    from runner.io.casts import TYPED
    from runner.model.coltypes import polars_dtype

    if not time_column:
        return None
    dtype = polars_dtype(columns[time_column].type)
    t = pl.col(TYPED + time_column)
    if isinstance(dtype, pl.Date):
        t = t.cast(pl.Datetime("us"))
        dtype = pl.Datetime("us")
    if dtype.time_zone is None:
        t = t.dt.replace_time_zone(job_tz, ambiguous="earliest", non_existent="null")
    t = t.dt.convert_time_zone("UTC")
    return (t >= pl.lit(window.start)) & (t < pl.lit(window.end))


def _key_exprs(key: list[str], columns: dict[str, Column]) -> list[pl.Expr]:
    """The key columns as compared: declared ones typed, undeclared ones as read."""
    import polars as pl

    from runner.io.casts import TYPED

    return [pl.col(TYPED + k if k in columns else k).alias(f"__weir_key{i}") for i, k in enumerate(key)]


def key_frame(lf: pl.LazyFrame, key: list[str], columns: dict[str, Column], raw_schema: pl.Schema,
              time_column: str | None, window: Window, job_tz: str,
              samples: dict[str, pl.Series] | None = None) -> pl.LazyFrame:
    """An input's key columns (typed) and row positions, restricted to the window, read lazily."""
    import polars as pl

    from runner.io.casts import apply_fast, cast_frame, plan_casts, settle

    wanted = list(dict.fromkeys([*key, *([time_column] if time_column else [])]))
    declared = {c: columns[c] for c in wanted if c in columns}
    plan = plan_casts(declared, raw_schema, job_tz, samples)
    inside = window_filter(columns, time_column, window, job_tz)
    keys = _key_exprs(key, columns)
    position = _position()

    def batch(frame: pl.DataFrame) -> pl.DataFrame:
        frame = settle(frame, plan)
        if inside is not None:
            frame = frame.filter(inside.fill_null(True))
        return frame.select(*keys, position)

    probe = cast_frame(pl.DataFrame(schema={c: raw_schema[c] for c in [ROW, FILE, *wanted]}), plan
                       ).select(*keys, position)
    return apply_fast(lf.select(ROW, FILE, *wanted), plan).map_batches(batch, schema=probe.schema, streamable=True,
                                                                  validate_output_schema=False)


def repeated_keys(frames: list[pl.LazyFrame], size: int) -> pl.DataFrame:
    """Key values seen more than once across `frames` (from `key_frame`), with the positions
    of their first and last rows and how many rows have them.

    Rows with a null in the key are not compared (as a SQL UNIQUE constraint treats nulls:
    ISO/IEC 9075). The first pass counts a 64-bit hash of each key, so its memory grows with
    the number of distinct keys in the window (about 20 bytes each: 10 million distinct ride
    ids raised a run's peak by 150-200 MB), whatever the keys' width and the other columns. Only when some hash repeats (a repeated key, or rarely two
    keys with one hash) does a second pass read the key columns again and compare the
    values themselves, for the rows with those hashes only.
    """
    import polars as pl

    keys = [f"__weir_key{i}" for i in range(size)]
    everything = (frames[0] if len(frames) == 1 else pl.concat(frames)).drop_nulls(keys)
    digest = pl.struct(keys).hash().alias("__weir_hash")
    twice = (everything.select(digest).group_by("__weir_hash").agg(pl.len().alias(_COPIES))
             .filter(pl.col(_COPIES) > 1).collect(engine="streaming"))["__weir_hash"]
    if twice.is_empty():
        schema = everything.collect_schema()
        return pl.DataFrame(schema={**{k: schema[k] for k in keys}, _COPIES: pl.UInt32, _FIRST: pl.Int64,
                                    _LAST: pl.Int64})
    return (everything.filter(pl.struct(keys).hash().is_in(twice.implode())).group_by(keys)
            .agg(pl.len().alias(_COPIES), pl.col(POSITION).min().alias(_FIRST), pl.col(POSITION).max().alias(_LAST))
            .filter(pl.col(_COPIES) > 1).sort(_FIRST).collect(engine="streaming"))


def _where(labels: list[str], position: int) -> str:
    return f"{labels[position // _FILE_SHIFT]} row {position % _FILE_SHIFT + 1}"


def key_problem(name: str, key: list[str], repeats: pl.DataFrame, labels: list[str]) -> BadRows:
    """The error for repeated keys under `on_bad_rows: fail`, naming values and rows."""
    examples = []
    for row in repeats.head(5).iter_rows(named=True):
        values = ", ".join(f"{k}={row[f'__weir_key{i}']!r}" for i, k in enumerate(key))
        examples.append(f"{values} {row[_COPIES]} times (first {_where(labels, row[_FIRST])}, "
                        f"last {_where(labels, row[_LAST])})")
    total = int(repeats[_COPIES].sum())
    return BadRows(f"input {name}: key ({', '.join(key)}) repeated: {repeats.height} value(s) on {total} rows; "
                   f"e.g. {'; '.join(examples)}; fix the data or set on_bad_rows: quarantine or drop")


BAD, INSIDE = "__weir_bad", "__weir_inside"


class BatchInspector:
    """Checks the batches of one input: count, keep the window, cast, judge, split bad rows.

    The work is in two parts. `stage` adds native expressions to the scan:
    the fast casts, a flag on rows that may break a rule and a flag on rows
    inside the window; polars runs them in its streaming engine on every
    core. Calling the inspector on a staged batch (inside `map_batches`) then
    reads the flagged rows again with the complete casts (`settle`), judges
    them, applies the window, the key and the limits, and sets the bad rows
    aside. In the common case no row is flagged and that second part is a
    few vectorized operations per batch.

    `repeats` (from `repeated_keys`) lists the key values seen more than once in
    the window; rows holding one of them, other than its first row, break the
    key rule. Batches carry each row's file (`FILE`, an index into `labels`)
    and its number in that file (`ROW`). `samples` (a few hundred values of
    text timestamp columns) pick the fast casts.
    """

    def __init__(self, name: str, labels: list[str], source: FileInput | DatabaseInput, columns: dict[str, Column],
                 raw_schema: pl.Schema, window: Window, job_tz: str, stats: InputStats,
                 repeats: pl.DataFrame | None = None, samples: dict[str, pl.Series] | None = None):
        import polars as pl

        from runner.io.casts import column_rules, plan_casts

        self.name = name
        self.labels = labels
        self.stats = stats
        self.mode = getattr(source, "on_bad_rows", "fail")
        self.max_rows = getattr(source, "max_bad_rows", None)
        self.columns = columns
        present = [c for c in columns if c in raw_schema]
        self.plan = plan_casts(columns, raw_schema, job_tz, samples)
        rules = [r for c in present for r in column_rules(c, columns[c], raw_schema[c], job_tz)]
        window_expr = window_filter(columns, source.time_column, window, job_tz)
        self.inside = window_expr.fill_null(True).alias(INSIDE) if window_expr is not None else None
        self.bad = pl.any_horizontal([r.bad for r in rules]).fill_null(False).alias(BAD) if rules else None
        reasons = [pl.when(r.bad).then(pl.lit(f"{r.column}: {r.label}")) for r in rules]
        self.repeats = None
        if repeats is not None and repeats.height:
            key = list(source.key or [])
            self.keys = _key_exprs(key, columns)
            self.position = _position()
            self.repeats = repeats.select(*[f"__weir_key{i}" for i in range(len(key))], _FIRST)
            reasons.append(pl.when(pl.col(_REPEAT)).then(pl.lit(f"key ({', '.join(key)}) repeated")))
        self.reason = pl.coalesce(reasons) if reasons else None
        self.keep_extra = getattr(source, "extra", "keep") == "keep"
        self.output = [
            (pl.col(f"__typed_{c}").alias(c) if c in columns else pl.col(c))
            for c in raw_schema.names() if c not in (ROW, FILE) and (c in columns or self.keep_extra)
        ]
        self.raw_names = [c for c in raw_schema.names() if c not in (ROW, FILE)]

    def stage(self, frame: pl.LazyFrame) -> pl.LazyFrame:
        """`frame` (raw columns and row numbers) with typed columns and the two flags, natively."""
        from runner.io.casts import apply_fast

        frame = apply_fast(frame, self.plan)
        flags = [e for e in (self.bad, self.inside) if e is not None]
        return frame.with_columns(flags) if flags else frame

    def _repeated(self, frame: pl.DataFrame) -> pl.Series:
        """True on rows whose key was seen on an earlier row of the window."""
        import polars as pl

        keys = frame.select(*self.keys, self.position)
        joined = keys.join(self.repeats, on=self.repeats.columns[:-1], how="left", maintain_order="left")
        return joined.select(pl.col(_FIRST).is_not_null() & (pl.col(_FIRST) != pl.col(POSITION))).to_series()

    def __call__(self, batch: pl.DataFrame) -> pl.DataFrame:
        """Judge one staged batch; return its good rows inside the window, as declared."""
        import polars as pl

        from runner.io.casts import settle

        height = batch.height
        frame = batch
        if self.bad is not None and frame[BAD].any():
            # rows that may be bad: read their values again with the complete casts, judge again
            suspects = frame.filter(pl.col(BAD))
            suspects = settle(suspects, self.plan).with_columns(
                [e for e in (self.bad, self.inside) if e is not None])
            frame = pl.concat([frame.filter(~pl.col(BAD)), suspects]).sort(ROW)
        dropped = 0
        if self.inside is not None:
            inside = frame[INSIDE]
            dropped = height - int(inside.sum())
            if dropped:
                frame = frame.filter(inside)
        rejected = 0
        bad = None
        if frame.height and (self.bad is not None or self.repeats is not None):
            mask = frame[BAD] if self.bad is not None else pl.repeat(False, frame.height, eager=True)
            if self.repeats is not None:
                repeated = self._repeated(frame)
                frame = frame.with_columns(repeated.alias(_REPEAT))
                mask = mask | repeated
            rejected = int(mask.sum())
            if rejected:
                # reasons are worked out for the bad rows only
                bad = frame.filter(mask).with_columns(self.reason.alias("__reason"))
                frame = frame.filter(~mask)
        seen = self.stats.tally(self.name, height, dropped, rejected)
        if bad is not None:
            self._bad(bad, seen)
        return frame.select(self.output)

    def _describe(self, row: dict[str, Any]) -> str:
        reason = row["__reason"]
        label = self.labels[row[FILE]]
        where = f"{label}, row {row[ROW] + 1}" if row.get(ROW) is not None else label
        if reason.startswith("key ("):
            return f"{where}: {reason}"
        column, rule = reason.split(": ", 1)
        return f"{where}, column {column}: value {row.get(column)!r} breaks rule {rule}"

    def _bad(self, bad: pl.DataFrame, seen: int) -> None:
        import polars as pl

        if self.mode == "fail":
            more = f" ({bad.height} bad rows in this batch alone)" if bad.height > 1 else ""
            raise BadRows(f"input {self.name}: {self._describe(bad.row(0, named=True))}{more}; fix the data "
                          "or set on_bad_rows: quarantine or drop")
        if self.max_rows is not None and seen > self.max_rows:
            raise BadRows(f"input {self.name}: more than max_bad_rows {self.max_rows} bad rows (at least {seen}); "
                          f"e.g. {self._describe(bad.row(0, named=True))}")
        if self.mode == "quarantine":
            cols = [pl.col(c).cast(pl.String) for c in self.raw_names]
            kept = bad.select([
                *cols,
                pl.col("__reason").alias("reason"),
                pl.Series("source_file", self.labels, dtype=pl.String).gather(bad[FILE]),
                (pl.col(ROW).cast(pl.Int64) + 1).alias("source_row") if ROW in bad.columns
                else pl.lit(None, dtype=pl.Int64).alias("source_row"),
                pl.lit(self.name).alias("input"),
            ])
            with self.stats.lock:
                self.stats.rejected.append(kept)

    def output_schema(self, raw_schema: pl.Schema) -> dict[str, Any]:
        """Columns and types of the batches this inspector returns."""
        from runner.model.coltypes import polars_dtype

        return {
            c: polars_dtype(self.columns[c].type) if c in self.columns else raw_schema[c]
            for c in raw_schema.names() if c not in (ROW, FILE) and (c in self.columns or self.keep_extra)
        }


def declared_columns(source: FileInput | DatabaseInput) -> dict[str, Column]:
    """Declared columns plus the time column (as `datetime`) when it is not declared."""
    columns = dict(source.columns or {})
    if source.time_column and source.time_column not in columns:
        columns[source.time_column] = Column(type="datetime")
    return columns


def _scan(source: str | bytes, fmt: str, text_columns: list[str], row_index: bool) -> pl.LazyFrame:
    """A lazy read of one prepared file (`FileRead.source()`); CSV rows with too many fields
    are cut rather than refused: `inputfiles` has found them, and they are skipped by number."""
    import polars as pl

    index = ROW if row_index else None
    overrides = {c: pl.String for c in text_columns} or None
    if fmt == "csv":
        return pl.scan_csv(source, schema_overrides=overrides, row_index_name=index, infer_schema_length=10_000,
                           truncate_ragged_lines=True)
    if fmt == "ndjson":
        return pl.scan_ndjson(source, schema_overrides=overrides, row_index_name=index, infer_schema_length=10_000)
    return pl.scan_parquet(source, row_index_name=index)


def _skip(lf: pl.LazyFrame, read: FileRead) -> pl.LazyFrame:
    """`lf` without the rows of `read` that are not data (blank lines, bad records)."""
    import polars as pl

    if read.shape is None or not len(read.shape.skip):
        return lf
    return lf.filter(~pl.col(ROW).is_in(pl.Series(read.shape.skip, dtype=pl.Int64).implode()))


def _ndjson(name: str, read: FileRead, text_columns: list[str], row_index: bool) -> pl.LazyFrame:
    """An NDJSON file of at most `inputfiles.EAGER` bytes, read at once: a line polars cannot read
    fails the window naming the file and, as Python's json module finds it, the line."""
    import polars as pl

    try:
        return pl.read_ndjson(read.source(), schema_overrides={c: pl.String for c in text_columns} or None,
                              row_index_name=ROW if row_index else None, infer_schema_length=None).lazy()
    except pl.exceptions.PolarsError as exc:
        raise _unreadable(name, read, exc) from None


def _unreadable(name: str, read: FileRead, exc: Exception) -> InputError:
    """The error for a file polars cannot read, naming it (and, for NDJSON, the line Python's json
    module cannot read)."""
    from runner.io.inputfiles import EAGER, json_problem

    if read.fmt == "ndjson" and read.size <= EAGER:
        found = json_problem(bytes(read.text()))
        if found is not None:
            return InputError(f"input {name}: {read.label}, line {found[0]}: {found[1]}")
    return InputError(f"input {name}: cannot read {read.label}: {str(exc).splitlines()[0]}")


def _one_file(name: str, number: int, read: FileRead, text_columns: list[str], numbered: bool) -> pl.LazyFrame:
    """One file read lazily (an NDJSON file of moderate size at once); with `numbered`, its rows
    carry FILE and ROW."""
    import polars as pl

    from runner.io.inputfiles import EAGER

    skips = read.shape is not None and len(read.shape.skip) > 0
    if read.fmt == "ndjson" and read.size <= EAGER:
        lf = _ndjson(name, read, text_columns, numbered)
    else:
        lf = _skip(_scan(read.source(), read.fmt, text_columns, numbered or skips), read)
    if numbered:
        return lf.with_columns(pl.lit(number, dtype=pl.UInt32).alias(FILE))
    return lf.drop(ROW) if skips else lf


def _small_files(numbers: list[int], reads: list[FileRead], text_columns: list[str], numbered: bool
                 ) -> pl.LazyFrame:
    """Small CSV files with one header, read as one text (their records one after another):
    one polars read instead of one per file, which for thousands of small files is most of
    the cost. Each row still carries its file and row number."""
    import numpy as np
    import polars as pl

    assert all(r.shape is not None for r in reads)
    counts = np.array([r.shape.rows for r in reads], dtype=np.int64)  # type: ignore[union-attr]
    text = reads[0].header_text + b"".join(r.body() for r in reads)
    try:
        frame = pl.read_csv(text, schema_overrides={c: pl.String for c in text_columns} or None,
                            infer_schema_length=None, truncate_ragged_lines=True)
    except pl.exceptions.PolarsError as exc:
        names = ", ".join(r.label for r in reads[:3]) + (" ..." if len(reads) > 3 else "")
        raise InputError(f"cannot read {names}: {str(exc).splitlines()[0]}") from None
    if frame.height != int(counts.sum()):
        raise InputError(f"reading {reads[0].label} and {len(reads) - 1} other file(s) together found "
                         f"{frame.height} rows where their records number {int(counts.sum())}")
    firsts = np.repeat(np.cumsum(counts) - counts, counts)
    rows = np.arange(frame.height, dtype=np.int64) - firsts
    keep = np.ones(frame.height, dtype=bool)
    for first, r in zip(np.cumsum(counts) - counts, reads, strict=True):
        keep[first + r.shape.skip] = False  # type: ignore[union-attr]
    if numbered:
        frame = frame.with_columns(pl.Series(ROW, rows, dtype=pl.UInt32),
                                   pl.Series(FILE, np.repeat(np.array(numbers, dtype=np.uint32), counts)))
    if not keep.all():
        frame = frame.filter(pl.Series(keep))
    return frame.lazy()


def file_frames(name: str, reads: list[FileRead], text_columns: dict[int, list[str]], numbered: bool
                ) -> list[pl.LazyFrame]:
    """Lazy frames over the prepared files of one input: small CSV files sharing a header
    together, every other file on its own."""
    from runner.io.inputfiles import SMALL

    frames = []
    together: dict[tuple[tuple[str, ...], tuple[str, ...]], list[int]] = {}
    for i, read in enumerate(reads):
        if read.fmt == "csv" and read.size <= SMALL and read.header is not None:
            together.setdefault((read.header, tuple(text_columns.get(i, []))), []).append(i)
        else:
            frames.append(_one_file(name, i, read, text_columns.get(i, []), numbered))
    for (_, texts), members in together.items():
        frames.append(_small_files(members, [reads[i] for i in members], list(texts), numbered))
    return frames


def judge_records(name: str, source: FileInput, read: FileRead, stats: InputStats, inspected: bool) -> None:
    """Count a CSV file's bad records once and treat them as the input says (`on_bad_rows`,
    `max_bad_rows`); the rows of an input without declared columns are counted here too."""
    import polars as pl

    from runner.io.inputfiles import reason_text

    found = read.shape
    if found is None:
        return
    bad = len(found.bad_rows)
    good = found.rows - len(found.skip)
    seen = stats.tally(name, bad if inspected else bad + good, 0, bad)
    if not bad:
        return
    expected = len(read.header or ())

    def where(i: int) -> str:
        reason = reason_text(int(found.bad_code[i]), int(found.bad_fields[i]), expected, read.encoding)
        return f"{read.label}, row {int(found.bad_rows[i]) + 1}: {reason}"

    if source.on_bad_rows == "fail":
        more = f" ({bad} bad rows in this file)" if bad > 1 else ""
        raise BadRows(f"input {name}: {where(0)}{more}; fix the data or set on_bad_rows: quarantine or drop")
    if source.max_bad_rows is not None and seen > source.max_bad_rows:
        raise BadRows(f"input {name}: more than max_bad_rows {source.max_bad_rows} bad rows (at least {seen}); "
                      f"e.g. {where(0)}")
    if source.on_bad_rows == "quarantine":
        fields = read.bad_records()
        header = list(read.header or ())
        columns: dict[str, list[Any]] = {c: [f[j] if j < len(f) else None for f in fields] for j, c in enumerate(header)}
        kept = pl.DataFrame({
            **columns,
            "reason": [reason_text(int(c), int(n), expected, read.encoding)
                       for c, n in zip(found.bad_code, found.bad_fields, strict=True)],
            "source_file": [read.label] * bad,
            "source_row": (found.bad_rows + 1).tolist(),
            "input": [name] * bad,
        }, schema={**{c: pl.String for c in header}, "reason": pl.String, "source_file": pl.String,
                   "source_row": pl.Int64, "input": pl.String})
        with stats.lock:
            stats.rejected.append(kept)


def file_frame(root: Path, name: str, source: FileInput, files: FileSet, window: Window, job_tz: str,
               stats: InputStats, empty_schema: dict[str, Any] | None = None) -> pl.LazyFrame:
    """One LazyFrame over all files of an input for a window (inspected when declared).

    Each file is prepared first (`inputfiles.prepare`: where it really is, its
    encoding, the shape of its CSV records), and its bad records are counted
    and treated once (`judge_records`). With `key:`, the key columns of every
    file are read and aggregated first (`repeated_keys`: one more pass over
    the files, reading only those columns), because a key can only be judged
    unique against the whole window: the rows are read twice, and memory
    grows with the number of distinct keys, not with the data.
    """
    import polars as pl

    from runner.io.files import relative
    from runner.io.inputfiles import outside_roots, prepare

    columns = declared_columns(source)
    key = list(source.key or [])
    if not files.paths:
        from runner.model.coltypes import polars_dtype

        schema = {c: polars_dtype(col.type) for c, col in columns.items()} if columns else (empty_schema or {})
        return pl.LazyFrame(schema=schema)
    stats.limits[name] = (source.max_bad_rows, source.max_bad_fraction)
    roots = outside_roots(root, source.allow_outside)
    folders: dict[str, str] = {}
    reads = [prepare(name, path, relative(root, path), file_format(path, source.format), source.encoding, roots,
                     folders) for path in files.paths]
    inspected = bool(columns or key)
    wanted = list(dict.fromkeys([*columns, *key]))
    text_columns: dict[int, list[str]] = {}
    for i, read in enumerate(reads):
        if not inspected:
            continue
        if read.header is not None:
            header: list[str] = list(read.header)
        else:
            try:
                header = _scan(read.source(), read.fmt, [], row_index=False).collect_schema().names()
            except pl.exceptions.PolarsError as exc:
                raise _unreadable(name, read, exc) from None
        missing = [c for c in wanted if c not in header]
        if missing:
            raise InputError(f"input {name}: {read.label} has no column(s) {', '.join(missing)} "
                             f"(declared in schema or key; it has {', '.join(header)})")
        if read.fmt in ("csv", "ndjson"):
            text_columns[i] = [c for c in columns if c in header]
    for read in reads:
        judge_records(name, source, read, stats, inspected)
    frames = file_frames(name, reads, text_columns, inspected)
    lf = frames[0] if len(frames) == 1 else pl.concat(frames, how="diagonal_relaxed")
    if not inspected:
        return lf
    if source.extra == "drop":
        lf = lf.select([ROW, FILE, *wanted])
    try:
        raw = lf.collect_schema()
    except pl.exceptions.PolarsError as exc:
        raise InputError(f"input {name}: cannot read its files ({reads[0].label} ...): "
                         f"{str(exc).splitlines()[0]}") from None
    samples = _samples(lf, columns, raw)
    labels = [read.label for read in reads]
    repeats = None
    if key:
        repeats = repeated_keys([key_frame(lf, key, columns, raw, source.time_column, window, job_tz, samples)],
                                len(key))
        if repeats.height and source.on_bad_rows == "fail":
            stats.tally(name, 0, 0, int(repeats[_COPIES].sum()) - repeats.height)
            raise key_problem(name, key, repeats, labels)
    inspector = BatchInspector(name, labels, source, columns, raw, window, job_tz, stats, repeats, samples)
    stats.counted = True
    return inspector.stage(lf).map_batches(inspector, schema=inspector.output_schema(raw), streamable=True,
                                           validate_output_schema=False)


SAMPLE = 500  # rows of each text timestamp column read to pick its fast cast


def _samples(lf: pl.LazyFrame, columns: dict[str, Column], raw: pl.Schema) -> dict[str, pl.Series]:
    """The first values of the declared timestamp columns that are read as text."""
    import polars as pl

    from runner.model.coltypes import polars_dtype

    wanted = [c for c, col in columns.items()
              if c in raw and raw[c] == pl.String and isinstance(polars_dtype(col.type), pl.Datetime)]
    if not wanted:
        return {}
    try:
        head = lf.select(wanted).head(SAMPLE).collect()
    except pl.exceptions.PolarsError:
        return {}  # the full read reports the problem
    return {c: head[c] for c in wanted}


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
    from runner.io.databases import masked

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
        rows = frame.with_row_index(ROW).with_columns(pl.lit(0, dtype=pl.UInt32).alias(FILE))
        repeats = None
        if key:
            repeats = repeated_keys([key_frame(rows.lazy(), key, columns, rows.schema, source.time_column,
                                               window, job_tz)], len(key))
            if repeats.height:
                stats.tally(name, 0, 0, int(repeats[_COPIES].sum()) - repeats.height)
                raise key_problem(name, key, repeats, [label])
        inspector = BatchInspector(name, [label], source, columns, rows.schema, window, job_tz, stats, repeats)
        frame = inspector(inspector.stage(rows.lazy()).collect())
        stats.counted = True
    else:
        stats.tally(name, frame.height, 0, 0)
    return frame.lazy(), entry
