"""The single-pass batch inspector: every batch of a file input passes through it once.

Inside the streaming plan, `BatchInspector` counts rows, keeps rows in the
window (`window_filter`), casts declared columns and flags bad rows (casts and
rules from `runner.io.casts`), and notes the input's figures (`InputStats`),
in the same pass that computes the result. Duplicate keys are found on the
side (`key_frame`, `repeated_keys`).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from runner.io.inputfiles import BadRows
from runner.model.columns import Column
from runner.model.spec import DatabaseInput, FileInput

if TYPE_CHECKING:
    import polars as pl

    from runner.core.windows import Window

ROW = "__weir_row"  # a row's number in its file (0 = the first record after a CSV header)
FILE = "__weir_file"  # the file's place among the input's files
_FIRST, _LAST, COPIES, _REPEAT = "__weir_first", "__weir_last", "__weir_copies", "__weir_repeat"
BAD, INSIDE = "__weir_bad", "__weir_inside"



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
    if getattr(dtype, "time_zone", None) is None:
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
    twice = (everything.select(digest).group_by("__weir_hash").agg(pl.len().alias(COPIES))
             .filter(pl.col(COPIES) > 1).collect(engine="streaming"))["__weir_hash"]
    if twice.is_empty():
        schema = everything.collect_schema()
        return pl.DataFrame(schema={**{k: schema[k] for k in keys}, COPIES: pl.UInt32, _FIRST: pl.Int64,
                                    _LAST: pl.Int64})
    return (everything.filter(pl.struct(keys).hash().is_in(twice.implode())).group_by(keys)
            .agg(pl.len().alias(COPIES), pl.col(POSITION).min().alias(_FIRST), pl.col(POSITION).max().alias(_LAST))
            .filter(pl.col(COPIES) > 1).sort(_FIRST).collect(engine="streaming"))


def _where(labels: list[str], position: int) -> str:
    return f"{labels[position // _FILE_SHIFT]} row {position % _FILE_SHIFT + 1}"


def key_problem(name: str, key: list[str], repeats: pl.DataFrame, labels: list[str]) -> BadRows:
    """The error for repeated keys under `on_bad_rows: fail`, naming values and rows."""
    examples = []
    for row in repeats.head(5).iter_rows(named=True):
        values = ", ".join(f"{k}={row[f'__weir_key{i}']!r}" for i, k in enumerate(key))
        examples.append(f"{values} {row[COPIES]} times (first {_where(labels, row[_FIRST])}, "
                        f"last {_where(labels, row[_LAST])})")
    total = int(repeats[COPIES].sum())
    return BadRows(f"input {name}: key ({', '.join(key)}) repeated: {repeats.height} value(s) on {total} rows; "
                   f"e.g. {'; '.join(examples)}; fix the data or set on_bad_rows: quarantine or drop")


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

        assert self.repeats is not None  # only called when keys repeat
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
                # reasons are worked out for the bad rows only (a rule or a repeated key: a reason each)
                assert self.reason is not None
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
