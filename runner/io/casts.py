"""Declared input columns as vectorized polars expressions: casts and the rules each value must meet.

Input side: `plan_casts` turns raw values (strings from CSV/NDJSON, or typed
Parquet columns) into the declared types in two steps: fast native
expressions over the whole batch (`apply_fast`), then the complete casts for
the few values the fast ones could not read (`settle`). `column_rules` lists,
per column, a (rule label, bad-row expression) pair for: the cast itself,
`nullable`, `values`, `min`/`max`, `pattern`. Everything is an expression over
a whole batch, or a subset of it; there is no Python loop over rows.
Output checks: `runner.engine.checks`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING, Any

from runner.model.coltypes import polars_dtype

if TYPE_CHECKING:
    import polars as pl

    from runner.model.columns import Column

TYPED = "__typed_"  # prefix of the typed copy of a declared column inside a batch


# ---------------------------------------------------------------- input columns

_NAIVE_FORMATS = ("%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%dT%H:%M", "%Y-%m-%d")
_SHAPE = r"^\d{4}-\d{2}-\d{2}(?:[Tt ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?(?:[zZ]|[+-]\d{2}:?\d{2})?)?$"


def parse_datetime(expr: pl.Expr, tz: str | None, local_tz: str = "UTC") -> pl.Expr:
    """ISO 8601 / RFC 3339 text -> Datetime(us, tz). Null where the text does not parse.

    Text with an offset (or `Z`) is an absolute instant. Text without one is a
    wall time in `tz` (the declared zone) or, for a naive `datetime` column,
    stays naive (an instant with an offset becomes its UTC wall time).
    Ambiguous wall times take the first occurrence; wall times in a
    spring-forward gap do not exist and give null (a bad value). Second 60 (a
    leap second) reads as the first instant of the next minute, as POSIX time
    counts it (so does `calendar.timegm`). This is the complete reader; `fast_datetime` is the fast one.
    """
    import polars as pl

    stripped = expr.str.strip_chars()
    # ISO 8601 fields have fixed widths; the parsers below would also take 2026-3-2
    shaped = pl.when(stripped.str.contains(_SHAPE)).then(stripped)
    text = shaped.str.replace(r"[zZ]$", "+00:00").str.replace(r"^(\d{4}-\d{2}-\d{2})[ tT]", "${1}T")
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


_FRACTION = r"^\.\d{1,9}$"


@lru_cache(maxsize=1)
def _offsets() -> tuple[list[str], list[int]]:
    """Every RFC 3339 numeric offset `+HH:MM` / `-HH:MM` (hours 00-23) and its minutes."""
    keys, minutes = [], []
    for sign in (1, -1):
        for hour in range(24):
            for minute in range(60):
                keys.append(f"{'+' if sign > 0 else '-'}{hour:02d}:{minute:02d}")
                minutes.append(sign * (hour * 60 + minute))
    return keys, minutes


def _offset_minutes(text: pl.Expr) -> pl.Expr:
    """Minutes east of UTC of text `+HH:MM` / `-HH:MM`; null for anything else.

    The text is looked up among every offset (an Enum of them: streaming, unlike
    `replace_strict`, which gathers the whole column first).
    """
    import polars as pl

    keys, _ = _offsets()
    index = text.cast(pl.Enum(keys), strict=False).to_physical().cast(pl.Int64)
    half = len(keys) // 2  # the + offsets, then the - offsets, each in minute order
    return pl.when(index < half).then(index).otherwise(half - index)


@dataclass(frozen=True)
class TextShape:
    """What a sample of timestamp text holds: fractions of a second, values without an offset."""

    fractions: bool = True
    plain: bool = True


def text_shape(sample: pl.Series) -> TextShape:
    """The shape of a sample of timestamp text (when in doubt, the general shape)."""
    import polars as pl

    t = pl.col("t")
    found = pl.DataFrame({"t": sample.cast(pl.String)}).drop_nulls().select(
        fractions=(~t.str.len_bytes().is_in([19, 20, 25])).any(),
        plain=(~(t.str.ends_with("Z") | t.str.ends_with("z") | t.str.tail(6).is_in(_offsets()[0]))).any())
    if found.height == 0:
        return TextShape()
    return TextShape(bool(found["fractions"][0]), bool(found["plain"][0]))


def fast_datetime(name: str, tz: str | None, shape: TextShape) -> list[list[pl.Expr]]:
    """Stages of expressions reading text column `name` as `__typed_<name>`, natively and fast.

    Only the common RFC 3339 shape `YYYY-MM-DDTHH:MM:SS[.fraction](Z|+HH:MM)`,
    or the same without an offset, is read: polars' fixed-format fast path and
    integer arithmetic on the offset. Every other value (other separators,
    minutes only, a date, a leap second, a bad value) comes out null, and
    `settle` reads it again with `parse_datetime`, about thirty times slower
    per value. `shape` leaves out the branches a file does not need; a value
    that needs one anyway is also left to `settle`. Results agree with
    `parse_datetime` wherever they are not null.
    """
    import polars as pl

    t = pl.col(name)
    h = f"__weir_dt_{name}_"
    first = [
        t.str.head(19).str.to_datetime("%Y-%m-%dT%H:%M:%S", time_unit="us", strict=False, cache=False)
        .alias(h + "wall"),
        _offset_minutes(t.str.tail(6)).alias(h + "off"),
        (t.str.ends_with("Z") | t.str.ends_with("z")).alias(h + "zulu"),
    ]
    wall, zulu, off = pl.col(h + "wall"), pl.col(h + "zulu"), pl.col(h + "off")
    # characters between the seconds and the suffix: none, or a fraction of a second
    rest = (t.str.len_bytes().cast(pl.Int64) - 19
            - pl.when(zulu).then(1).when(off.is_not_null()).then(6).otherwise(0))
    second = [pl.when(zulu).then(0).otherwise(off).alias(h + "off")]
    if shape.fractions:
        fraction = t.str.slice(19, rest.clip(lower_bound=0))
        micros = fraction.str.slice(1).str.pad_end(6, "0").str.head(6).cast(pl.Int64, strict=False)
        second.append(pl.when(rest == 0).then(wall).when(fraction.str.contains(_FRACTION))
                      .then(wall + pl.duration(microseconds=micros)).alias(h + "wall"))
    else:
        second.append(pl.when(rest == 0).then(wall).alias(h + "wall"))
    instant = (wall - pl.duration(minutes=off)).dt.replace_time_zone("UTC")
    if tz is None:
        typed = pl.when(off.is_not_null()).then(instant.dt.replace_time_zone(None)).otherwise(wall)
    elif shape.plain:
        local = wall.dt.replace_time_zone(tz, ambiguous="earliest", non_existent="null")
        typed = pl.when(off.is_not_null()).then(instant.dt.convert_time_zone(tz)).otherwise(local)
    else:
        typed = instant.dt.convert_time_zone(tz)
    return [first, second, [typed.cast(pl.Datetime("us", tz)).alias(TYPED + name)]]


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
        # ISO 8601 calendar dates are exactly ten characters; the parser would also take 2026-3-2
        return pl.when(text.str.len_bytes() == 10).then(text.str.to_date("%Y-%m-%d", strict=False, cache=False))
    if isinstance(target, pl.Boolean) and is_text:
        # is_in streams; replace_strict would gather the whole column first
        word = text if fast else text.str.to_lowercase()
        yes, no = (["true", "True", "TRUE", "1"], ["false", "False", "FALSE", "0"]) if fast else (["true", "1"],
                                                                                                 ["false", "0"])
        return pl.when(word.is_in(yes)).then(True).when(word.is_in(no)).then(False)
    if is_text and target != pl.String:
        return text.cast(target, strict=False)
    return col.cast(target, strict=False)


@dataclass(frozen=True)
class CastPlan:
    """How the declared columns of a batch become `__typed_<column>` columns.

    `stages` are native expressions over the whole batch, applied in order
    (`apply_fast`); they may leave a value null when they cannot be sure of
    it. `full` holds the complete cast of each column, which `settle` applies
    to those values only. `helpers` are scratch columns the stages add.
    """

    stages: list[list[pl.Expr]]
    full: dict[str, pl.Expr]
    helpers: list[str]


def plan_casts(columns: dict[str, Column], schema: pl.Schema, local_tz: str,
               samples: dict[str, pl.Series] | None = None) -> CastPlan:
    """The cast plan of the declared columns present in `schema`; `samples` (a few hundred
    values of text timestamp columns) let the plan skip branches the data does not need."""
    import polars as pl

    stages: list[list[pl.Expr]] = [[], [], []]
    full: dict[str, pl.Expr] = {}
    helpers: list[str] = []
    for name, column in columns.items():
        if name not in schema:
            continue
        target = polars_dtype(column.type)
        complete = cast_expr(name, column.type, schema[name], local_tz).alias(TYPED + name)
        if isinstance(target, pl.Datetime) and schema[name] == pl.String:
            sample = (samples or {}).get(name)
            shape = text_shape(sample) if sample is not None else TextShape()
            for stage, exprs in zip(stages, fast_datetime(name, target.time_zone, shape), strict=True):
                stage.extend(exprs)
            helpers += [f"__weir_dt_{name}_{part}" for part in ("wall", "off", "zulu")]
            full[name] = complete
            continue
        quick = cast_expr(name, column.type, schema[name], local_tz, fast=True).alias(TYPED + name)
        stages[0].append(quick)
        if str(quick) != str(complete):
            full[name] = complete
    return CastPlan([s for s in stages if s], full, helpers)


def apply_fast(frame: pl.LazyFrame, plan: CastPlan) -> pl.LazyFrame:
    """`frame` with the plan's typed columns from its fast stages (scratch columns dropped)."""
    for stage in plan.stages:
        frame = frame.with_columns(stage)
    return frame.drop(plan.helpers) if plan.helpers else frame


def settle(frame: pl.DataFrame, plan: CastPlan) -> pl.DataFrame:
    """Read again, with the complete casts, the values the fast stages left null."""
    import polars as pl

    for name, complete in plan.full.items():
        missed = frame.select(pl.col(name).is_not_null() & pl.col(TYPED + name).is_null()).to_series()
        if missed.any():
            where = missed.arg_true()
            again = frame[where].select(complete).to_series()
            frame = frame.with_columns(frame[TYPED + name].scatter(where, again.cast(frame.schema[TYPED + name])))
    return frame


def cast_frame(frame: pl.DataFrame, plan: CastPlan) -> pl.DataFrame:
    """`frame` with every typed column of the plan, complete (fast stages, then `settle`)."""
    return settle(apply_fast(frame.lazy(), plan).collect(), plan)


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
        if polars_dtype(column.type) == pl.String:
            # a lookup in an Enum of the allowed texts is about twice as fast as is_in on strings
            outside = typed.cast(pl.Enum(list(dict.fromkeys(allowed))), strict=False).is_null()
        else:
            outside = ~typed.is_in(pl.Series(allowed, dtype=polars_dtype(column.type)).implode())
        rules.append(Rule(name, f"one of {', '.join(map(str, column.values))}", typed.is_not_null() & outside))
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

    from runner.model.yamlfile import source_text

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


