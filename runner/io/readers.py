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

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.io.inputfiles import BadRows, InputError
from runner.io.inspect import (
    COPIES,
    FILE,
    ROW,
    BatchInspector,
    InputStats,
    key_frame,
    key_problem,
    repeated_keys,
)
from runner.model.columns import Column
from runner.model.spec import DatabaseInput, FileInput
from runner.model.templates import format_from_name

if TYPE_CHECKING:
    import polars as pl

    from runner.core.windows import Window
    from runner.io.inputfiles import FileRead


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
    from runner.io.inputfiles import EAGER
    from runner.io.records import json_problem

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
    from runner.io.records import SMALL

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

    from runner.io.records import reason_text

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
            stats.tally(name, 0, 0, int(repeats[COPIES].sum()) - repeats.height)
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


