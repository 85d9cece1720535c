"""Output checks: the `checks:` of a job's output, run against the written (not yet swapped) result.

`check_output` raises `CheckFailed` naming the first failing check, the
failing row count and up to five examples; the run then keeps the old output.
Every check is a vectorized polars expression (rules of a `rows:` or `expect:`
check are guarded by the SQL guard, `runner.core.sqlcheck`).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import polars as pl

    from runner.model.spec import OutputCheck

EXAMPLES = 5


class CheckFailed(Exception):
    """An output check failed; `check` names it (e.g. `key [zone, fare]`)."""

    def __init__(self, check: str, message: str):
        self.check = check
        super().__init__(message)


def describe_check(check: OutputCheck) -> str:
    if check.key is not None:
        return f"key [{', '.join(check.key)}]"
    if check.not_null is not None:
        return f"not_null [{', '.join(check.not_null)}]"
    if check.rows is not None:
        bounds = [f"{k} {v}" for k, v in (("min", check.rows.min), ("max", check.rows.max)) if v is not None]
        return " ".join(["rows", *bounds])
    if check.change is not None:
        what = check.change.column or "rows"
        return f"change of {what}"
    return f"rule {check.rule}"


ROW_NUMBER = "__weir_row_number"


def _examples(frame: pl.DataFrame) -> str:
    """Up to five rows as `row N: col=value, ...` (N counts from 1 in the output's row order)."""
    out = []
    for r in frame.head(EXAMPLES).to_dicts():
        row = r.pop(ROW_NUMBER, None)
        values = ", ".join(f"{k}={v!r}" for k, v in r.items())
        out.append(f"row {row}: {values}" if row is not None else values)
    return "; ".join(out)


def check_output(frame: pl.LazyFrame, checks: list[OutputCheck], previous: pl.LazyFrame | None,
                 output: str | None = None) -> None:
    """Raise CheckFailed for the first failing check of a window's output.

    `previous` is the previous window's output, for `change` checks (skipped
    when there is none). `output` names the output in messages.
    """
    import polars as pl

    if not checks:
        return
    schema = frame.collect_schema()
    numbered = frame.with_row_index(ROW_NUMBER, offset=1)
    where = f"output {output}: " if output else ""
    for check in checks:
        name = describe_check(check)

        def failed(message: str, name: str = name) -> CheckFailed:
            return CheckFailed(name, f"{where}check {name} failed: {message}")

        if check.key is not None:
            _need(schema, check.key, name)
            dupes = (numbered.group_by(check.key)
                     .agg(pl.len().alias("copies"), pl.col(ROW_NUMBER).min().alias("first row"),
                          pl.col(ROW_NUMBER).max().alias("last row"))
                     .filter(pl.col("copies") > 1).sort("first row").collect())
            if dupes.height:
                total = int(dupes["copies"].sum())
                raise failed(f"{dupes.height} key value(s) appear more than once ({total} rows); "
                             f"e.g. {_examples(dupes)}")
        elif check.not_null is not None:
            _need(schema, check.not_null, name)
            bad = numbered.filter(pl.any_horizontal([pl.col(c).is_null() for c in check.not_null]))
            count = bad.select(pl.len()).collect().item()
            if count:
                shown = bad.select(ROW_NUMBER, *check.not_null, *[c for c in schema if c not in check.not_null])
                raise failed(f"{count} row(s) have nulls; e.g. {_examples(shown.head(EXAMPLES).collect())}")
        elif check.rows is not None:
            count = frame.select(pl.len()).collect().item()
            if check.rows.min is not None and count < check.rows.min:
                raise failed(f"{count} row(s), fewer than {check.rows.min}")
            if check.rows.max is not None and count > check.rows.max:
                raise failed(f"{count} row(s), more than {check.rows.max}")
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
                    raise failed(f"{what} fell {-change:.1%}, from {before:g} in the previous window to "
                                 f"{now:g}; at most {spec.max_drop:.0%} allowed")
                if spec.max_rise is not None and change > spec.max_rise:
                    raise failed(f"{what} rose {change:.1%}, from {before:g} in the previous window to "
                                 f"{now:g}; at most {spec.max_rise:.0%} allowed")
        elif check.rule is not None:
            from runner.core.sqlcheck import SqlRefused, check_rule

            try:  # before polars reads it: a subquery in a rule would open files
                check_rule(check.rule)
            except SqlRefused as exc:
                raise CheckFailed(name, f"{where}check {name}: {exc}") from None
            try:
                expr = pl.sql_expr(check.rule)
                bad = numbered.filter(~expr.fill_null(False))
                count = bad.select(pl.len()).collect().item()
            except pl.exceptions.PolarsError as exc:
                raise CheckFailed(name, f"{where}check {name} cannot be evaluated: "
                                        f"{str(exc).splitlines()[0]}") from None
            if count:
                raise CheckFailed(name, f"{where}check {name} failed on {count} row(s); "
                                        f"e.g. {_examples(bad.head(EXAMPLES).collect())}")


def _need(schema: pl.Schema, columns: list[str], name: str) -> None:
    missing = [c for c in columns if c not in schema]
    if missing:
        raise CheckFailed(name, f"check {name} names column(s) {', '.join(missing)} that the output does not "
                                f"have (it has {', '.join(schema.names())})")
