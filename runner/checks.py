"""Data checks as vectorized polars expressions: declared input columns and output checks.

Input side: `typed_columns` turns raw values (strings from CSV/NDJSON, or
typed Parquet columns) into the declared types, and `column_rules` lists, per
column, a (rule label, bad-row expression) pair for: the cast itself,
`nullable`, `values`, `min`/`max`, `pattern`. Everything is an expression over
a whole batch; there is no Python loop over rows.

Output side: `check_output` runs the `checks:` of a job's output against the
written (not yet swapped) result and raises `CheckFailed` naming the check,
the failing row count and up to five examples.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from runner.coltypes import polars_dtype

if TYPE_CHECKING:
    import polars as pl

    from runner.spec import Column, OutputCheck

EXAMPLES = 5


class CheckFailed(Exception):
    """An output check failed; `check` names it (e.g. `key [zone, fare]`)."""

    def __init__(self, check: str, message: str):
        self.check = check
        super().__init__(message)


# ---------------------------------------------------------------- input columns

_NAIVE_FORMATS = ("%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%dT%H:%M", "%Y-%m-%d")


def parse_datetime(expr: pl.Expr, tz: str | None, local_tz: str = "UTC") -> pl.Expr:
    """ISO 8601 / RFC 3339 text -> Datetime(us, tz). Null where the text does not parse.

    Text with an offset (or `Z`) is an absolute instant. Text without one is a
    wall time in `tz` (the declared zone) or, for a naive `datetime` column,
    stays naive (an instant with an offset becomes its UTC wall time).
    Ambiguous wall times take the first occurrence; wall times in a
    spring-forward gap do not exist and give null (a bad value). Second 60 (a
    leap second) reads as the first instant of the next minute, as POSIX time
    counts it. This is the complete reader; `read_datetimes` is the fast one.
    """
    import polars as pl

    text = expr.str.strip_chars().str.replace(r"[zZ]$", "+00:00").str.replace(r"^(\d{4}-\d{2}-\d{2})[ tT]", "${1}T")
    aware = text.str.to_datetime("%Y-%m-%dT%H:%M:%S%.f%:z", time_unit="us", strict=False, time_zone="UTC",
                                 cache=False)
    aware_min = text.str.to_datetime("%Y-%m-%dT%H:%M%:z", time_unit="us", strict=False, time_zone="UTC",
                                     cache=False)
    naive = pl.coalesce([text.str.to_datetime(f, time_unit="us", strict=False, cache=False)
                         for f in _NAIVE_FORMATS])
    if tz is None:
        return pl.coalesce([aware.dt.replace_time_zone(None), aware_min.dt.replace_time_zone(None), naive])
    local = naive.dt.replace_time_zone(tz, ambiguous="earliest", non_existent="null")
    return pl.coalesce([
        aware.dt.convert_time_zone(tz), aware_min.dt.convert_time_zone(tz), local,
    ])


_OFFSET = r"^[+-](?:[01]\d|2[0-3]):[0-5]\d$"
_FRACTION = r"^\.\d{1,9}$"


def read_datetimes(text: pl.Series, tz: str | None) -> pl.Series:
    """`parse_datetime` for a whole batch of text, with the same results, fast.

    The common RFC 3339 shape `YYYY-MM-DDTHH:MM:SS[.fraction](Z|+HH:MM)` (or
    the same without an offset) is read with polars' fixed-format fast path
    and integer arithmetic on the offset; only the values that shape does not
    fit (other separators, minutes only, dates, leap seconds, bad values) go
    through `parse_datetime`, which is about ten times slower per value.
    """
    import polars as pl

    dtype = pl.Datetime("us", tz)
    if text.dtype != pl.String:
        text = text.cast(pl.String)
    t = pl.col("t")
    frame = pl.DataFrame({"t": text}).select(
        t, t.str.tail(6).alias("tail"), t.str.len_bytes().alias("len"),
        # lengths 19, 20 and 25 are the shapes without a fraction: naive, Z and +HH:MM
        (~t.str.len_bytes().is_in([19, 20, 25])).any().alias("odd"))
    # the suffix (Z, +HH:MM or none) is worked out once per distinct tail (a batch has a handful)
    suffix = _suffixes(frame["tail"].unique())
    plain = suffix["cut"].min() == 0 if suffix.height else False
    odd = bool(frame["odd"][0]) if frame.height else False
    out = _instant(frame, tz, odd, plain, suffix).alias(text.name)
    missed = text.is_not_null() & out.is_null()
    if missed.any():
        where = missed.arg_true()
        again = pl.DataFrame({"t": text.gather(where)}).select(parse_datetime(pl.col("t"), tz)).to_series()
        out = out.scatter(where, again.cast(dtype))
    return out


def _suffixes(tails: pl.Series) -> pl.DataFrame:
    """Per distinct 6-character tail: the offset in minutes and how many characters it takes."""
    import polars as pl

    t = pl.col("t")
    zulu = t.str.ends_with("Z") | t.str.ends_with("z")
    offset = t.str.contains(_OFFSET)
    return pl.DataFrame({"t": tails}).drop_nulls().select(
        t,
        minutes=pl.when(zulu).then(0).when(offset)
        .then((t.str.slice(1, 2).cast(pl.Int64) * 60 + t.str.slice(4, 2).cast(pl.Int64))
              * pl.when(t.str.starts_with("-")).then(-1).otherwise(1)),
        cut=pl.when(zulu).then(1).when(offset).then(6).otherwise(0),
    )


def _instant(frame: pl.DataFrame, tz: str | None, fractions: bool, plain: bool, suffix: pl.DataFrame) -> pl.Series:
    """The instants of columns t, tail and len of `frame` (null where the fast shape does not fit).

    `fractions`: some values may carry a fraction of a second; `plain`: some
    values may have no offset (wall times in `tz`). One lazy query, so every
    intermediate column is computed once.
    """
    import polars as pl

    t, tail, wall, off = pl.col("t"), pl.col("tail"), pl.col("wall"), pl.col("off")
    steps = frame.lazy().with_columns(
        wall=t.str.head(19).str.to_datetime("%Y-%m-%dT%H:%M:%S", time_unit="us", strict=False, cache=False),
        off=tail.replace_strict(suffix["t"], suffix["minutes"], default=None, return_dtype=pl.Int64))
    if fractions:
        rest = pl.col("len").cast(pl.Int64) - 19 - tail.replace_strict(suffix["t"], suffix["cut"], default=0,
                                                                       return_dtype=pl.Int64)
        steps = steps.with_columns(fraction=t.str.slice(19, rest.clip(lower_bound=0)), rest=rest)
        fraction = pl.col("fraction")
        micros = fraction.str.slice(1).str.pad_end(6, "0").str.head(6).cast(pl.Int64, strict=False)
        steps = steps.with_columns(wall=pl.when(pl.col("rest") <= 0).then(wall)
                                   .when(fraction.str.contains(_FRACTION))
                                   .then(wall + pl.duration(microseconds=micros)))
    instant = (wall - pl.duration(minutes=off)).dt.replace_time_zone("UTC")
    if tz is None:
        out = pl.when(off.is_not_null()).then(instant.dt.replace_time_zone(None)).otherwise(wall)
    elif plain or fractions:
        local = wall.dt.replace_time_zone(tz, ambiguous="earliest", non_existent="null")
        out = pl.when(off.is_not_null()).then(instant.dt.convert_time_zone(tz)).otherwise(local)
    else:
        out = instant.dt.convert_time_zone(tz)
    return steps.select(out.cast(pl.Datetime("us", tz))).collect(engine="in-memory").to_series()


def cast_expr(name: str, declared: str, source: pl.DataType, local_tz: str = "UTC", fast: bool = False) -> pl.Expr:
    """Expression casting column `name` (currently of dtype `source`) to its declared type.

    Text may carry surrounding blanks, and booleans any letter case. `fast`
    leaves those out: a value they would have read comes out null, and
    `cast_frame` reads it again with the full expression.
    """
    import polars as pl

    target = polars_dtype(declared)
    col = pl.col(name)
    if source == target:
        return col
    is_text = source == pl.String
    text = col if fast or not is_text else col.str.strip_chars()
    if isinstance(target, pl.Datetime):
        if is_text:
            return parse_datetime(col, target.time_zone, local_tz)
        if isinstance(source, pl.Datetime):
            if source.time_zone is None and target.time_zone is not None:
                return col.dt.cast_time_unit("us").dt.replace_time_zone(
                    target.time_zone, ambiguous="earliest", non_existent="null")
            if source.time_zone is not None and target.time_zone is not None:
                return col.dt.cast_time_unit("us").dt.convert_time_zone(target.time_zone)
            if source.time_zone is not None:
                return col.dt.cast_time_unit("us").dt.replace_time_zone(None)
            return col.dt.cast_time_unit("us")
        return col.cast(target, strict=False)
    if isinstance(target, pl.Date) and is_text:
        return text.str.to_date("%Y-%m-%d", strict=False, cache=False)
    if isinstance(target, pl.Boolean) and is_text:
        return (text if fast else text.str.to_lowercase()).replace_strict(
            {"true": True, "false": False, "1": True, "0": False}, default=None, return_dtype=pl.Boolean)
    if is_text and target != pl.String:
        return text.cast(target, strict=False)
    return col.cast(target, strict=False)


TYPED = "__typed_"


@dataclass(frozen=True)
class Cast:
    """How one declared column of a batch becomes `__typed_<column>`: a fast expression
    over the whole batch, and the full one for the values the fast one left null."""

    column: str
    expr: pl.Expr | None  # None: text to datetime, read by `read_datetimes`
    retry: pl.Expr | None = None
    zone: str | None = None


def casts_for(columns: dict[str, Column], schema: pl.Schema, local_tz: str) -> list[Cast]:
    """The casts of the declared columns present in a batch schema."""
    import polars as pl

    out = []
    for name, column in columns.items():
        if name not in schema:
            continue
        target = polars_dtype(column.type)
        if isinstance(target, pl.Datetime) and schema[name] == pl.String:
            out.append(Cast(name, None, zone=target.time_zone))
            continue
        fast = cast_expr(name, column.type, schema[name], local_tz, fast=True).alias(TYPED + name)
        full = cast_expr(name, column.type, schema[name], local_tz).alias(TYPED + name)
        out.append(Cast(name, fast, None if str(full) == str(fast) else full))
    return out


def cast_frame(frame: pl.DataFrame, casts: list[Cast]) -> pl.DataFrame:
    """`frame` with a `__typed_<column>` column per cast (null where a value does not read)."""
    import polars as pl

    exprs = [c.expr for c in casts if c.expr is not None]
    out = frame.with_columns(exprs) if exprs else frame
    texts = [read_datetimes(frame[c.column], c.zone).alias(TYPED + c.column) for c in casts if c.expr is None]
    if texts:
        out = out.with_columns(texts)
    for c in casts:
        if c.retry is None:
            continue
        missed = out.select(pl.col(c.column).is_not_null() & pl.col(TYPED + c.column).is_null()).to_series()
        if missed.any():
            where = missed.arg_true()
            again = frame[where].select(c.retry).to_series()
            out = out.with_columns(out[TYPED + c.column].scatter(where, again))
    return out


_DECIMAL = re.compile(r"^decimal\((\d+)\s*,\s*(\d+)\)$")


@dataclass(frozen=True)
class Rule:
    """One rule on one column: a label for messages and an expression true on bad rows."""

    column: str
    label: str
    bad: pl.Expr


def column_rules(name: str, column: Column, source: pl.DataType, local_tz: str) -> list[Rule]:
    """Rules for one declared column. Expressions see the raw column as `name` and
    the cast column as `__typed_<name>`."""
    import polars as pl

    raw = pl.col(name)
    typed = pl.col(TYPED + name)
    rules: list[Rule] = []
    if source != polars_dtype(column.type):
        rules.append(Rule(name, f"type {column.type}", raw.is_not_null() & typed.is_null()))
        m = _DECIMAL.match(column.type)
        if m and source == pl.String:
            scale = int(m.group(2))
            pattern = rf"^\s*[-+]?(\d+(\.\d{{0,{scale}}})?|\.\d{{1,{scale}}})\s*$"
            # the cast rounds extra places and reads exponents (1e-3 -> 0.00): both would lose the value
            rules.append(Rule(name, f"at most {scale} decimal places, no exponent",
                              raw.is_not_null() & typed.is_not_null() & ~raw.str.contains(pattern)))
    if not column.nullable:
        rules.append(Rule(name, "not null", raw.is_null()))
    if column.values is not None:
        allowed = _literals(column, column.values)
        rules.append(Rule(name, f"one of {', '.join(map(str, column.values))}",
                          typed.is_not_null() & ~typed.is_in(pl.Series(allowed, dtype=polars_dtype(column.type)).implode())))
    if column.min is not None:
        low = _literals(column, [column.min])[0]
        rules.append(Rule(name, f"min {column.min}", typed.is_not_null() & (typed < pl.lit(low, dtype=polars_dtype(column.type)))))
    if column.max is not None:
        high = _literals(column, [column.max])[0]
        rules.append(Rule(name, f"max {column.max}", typed.is_not_null() & (typed > pl.lit(high, dtype=polars_dtype(column.type)))))
    if column.pattern is not None:
        rules.append(Rule(name, f"pattern {column.pattern}",
                          typed.is_not_null() & ~typed.cast(pl.String).str.contains(column.pattern)))
    return rules


def _literals(column: Column, values: list[Any]) -> list[Any]:
    """Declared values as Python values of the column's type."""
    import polars as pl

    from runner.yamlfile import source_text

    texts = [source_text(v) if not isinstance(v, str) else v for v in values]
    series = pl.Series("v", [str(t) for t in texts], dtype=pl.String)
    frame = pl.DataFrame([series])
    out = frame.select(cast_expr("v", column.type, pl.String(), "UTC")).to_series()
    if out.null_count():
        from runner.errors import WeirError

        bad = [t for t, v in zip(texts, out.to_list(), strict=True) if v is None]
        raise WeirError(f"schema: value(s) {', '.join(map(str, bad))} are not of type {column.type}")
    return out.to_list()


# ---------------------------------------------------------------- output checks


def describe_check(check: OutputCheck) -> str:
    if check.key is not None:
        return f"key [{', '.join(check.key)}]"
    if check.not_null is not None:
        return f"not_null [{', '.join(check.not_null)}]"
    if check.rows is not None:
        return f"rows min {check.rows.min} max {check.rows.max}"
    if check.change is not None:
        what = check.change.column or "rows"
        return f"change of {what}"
    return f"rule {check.rule}"


def _examples(frame: pl.DataFrame) -> str:
    rows = frame.head(EXAMPLES).to_dicts()
    return "; ".join(", ".join(f"{k}={v!r}" for k, v in r.items()) for r in rows)


def check_output(frame: pl.LazyFrame, checks: list[OutputCheck], previous: pl.LazyFrame | None) -> None:
    """Raise CheckFailed for the first failing check of a window's output.

    `previous` is the previous window's output, for `change` checks (skipped
    when there is none).
    """
    import polars as pl

    if not checks:
        return
    schema = frame.collect_schema()
    for check in checks:
        name = describe_check(check)
        if check.key is not None:
            _need(schema, check.key, name)
            dupes = (frame.group_by(check.key).agg(pl.len().alias("copies")).filter(pl.col("copies") > 1)
                     .sort(check.key).collect())
            if dupes.height:
                total = int(dupes["copies"].sum())
                raise CheckFailed(name, f"check {name} failed: {dupes.height} key value(s) appear more than "
                                        f"once ({total} rows); e.g. {_examples(dupes)}")
        elif check.not_null is not None:
            _need(schema, check.not_null, name)
            bad = frame.filter(pl.any_horizontal([pl.col(c).is_null() for c in check.not_null]))
            count = bad.select(pl.len()).collect().item()
            if count:
                raise CheckFailed(name, f"check {name} failed: {count} row(s) have nulls; "
                                        f"e.g. {_examples(bad.head(EXAMPLES).collect())}")
        elif check.rows is not None:
            count = frame.select(pl.len()).collect().item()
            if check.rows.min is not None and count < check.rows.min:
                raise CheckFailed(name, f"check {name} failed: {count} row(s), fewer than {check.rows.min}")
            if check.rows.max is not None and count > check.rows.max:
                raise CheckFailed(name, f"check {name} failed: {count} row(s), more than {check.rows.max}")
        elif check.change is not None:
            if previous is None:
                continue
            spec = check.change
            if spec.column is not None:
                _need(schema, [spec.column], name)
                now = frame.select(pl.col(spec.column).sum()).collect().item() or 0
                before = previous.select(pl.col(spec.column).sum()).collect().item() or 0
                what = f"sum of {spec.column}"
            else:
                now = frame.select(pl.len()).collect().item()
                before = previous.select(pl.len()).collect().item()
                what = "rows"
            now, before = float(now), float(before)
            if before > 0:
                change = (now - before) / before
                if spec.max_drop is not None and -change > spec.max_drop:
                    raise CheckFailed(name, f"check {name} failed: {what} fell {-change:.1%} "
                                            f"(from {before:g} to {now:g}); at most {spec.max_drop:.0%} allowed")
                if spec.max_rise is not None and change > spec.max_rise:
                    raise CheckFailed(name, f"check {name} failed: {what} rose {change:.1%} "
                                            f"(from {before:g} to {now:g}); at most {spec.max_rise:.0%} allowed")
        elif check.rule is not None:
            try:
                expr = pl.sql_expr(check.rule)
                bad = frame.filter(~expr.fill_null(False))
                count = bad.select(pl.len()).collect().item()
            except pl.exceptions.PolarsError as exc:
                raise CheckFailed(name, f"check {name} cannot be evaluated: {str(exc).splitlines()[0]}") from None
            if count:
                raise CheckFailed(name, f"check {name} failed on {count} row(s); "
                                        f"e.g. {_examples(bad.head(EXAMPLES).collect())}")


def _need(schema: pl.Schema, columns: list[str], name: str) -> None:
    missing = [c for c in columns if c not in schema]
    if missing:
        raise CheckFailed(name, f"check {name} names column(s) {', '.join(missing)} that the output does not "
                                f"have (it has {', '.join(schema.names())})")
