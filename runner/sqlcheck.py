"""Static checks of SQL steps: undefined tables and columns, file-reading functions.

Each SQL step is resolved with polars' lazy SQL against *empty* frames that
carry the declared input schemas, so nothing is read. Where a schema is not
known (a file input without `schema:`, a python step), column errors cannot
be judged and are not reported; unknown tables always are.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from runner.coltypes import polars_dtype
from runner.spec import DatabaseInput, FileInput, Job, JobInput, SqlStep

if TYPE_CHECKING:
    import polars as pl

_COMMENT = re.compile(r"--[^\n]*|/\*.*?\*/", re.S)
_STRING = re.compile(r"'(?:[^']|'')*'")
_FILE_FUNCTIONS = re.compile(
    r"\b(read_csv|read_parquet|read_ipc|read_json|read_ndjson|read_delta|read_avro|read_excel|scan_\w+)\s*\(",
    re.I,
)
_RELATION = re.compile(r"relation '([^']+)' was not found")

BOUNDS_SCHEMA = {"window_start": ("datetime", "UTC"), "window_end": ("datetime", "UTC")}
STAMP_COLUMNS = ("window_start", "window_end", "run_id", "code_version")


@dataclass
class StepFinding:
    step: int
    message: str


@dataclass
class Resolution:
    """The outcome of resolving one job's steps: output schema (None if unknown) and findings."""

    output: pl.Schema | None
    findings: list[StepFinding] = field(default_factory=list)


def strip_sql(sql: str) -> str:
    """SQL text without comments and string literals (for pattern checks)."""
    return _STRING.sub("''", _COMMENT.sub(" ", sql))


def file_functions(sql: str) -> list[str]:
    """Table functions in `sql` that would read files behind weir's back."""
    return sorted({m.group(1).lower() for m in _FILE_FUNCTIONS.finditer(strip_sql(sql))})


def bounds_frame(start_us: int = 0, end_us: int = 0, empty: bool = False) -> pl.LazyFrame:
    """The one-row `bounds(window_start, window_end)` table (UTC)."""
    import polars as pl

    dtype = pl.Datetime("us", "UTC")
    if empty:
        return pl.LazyFrame(schema={"window_start": dtype, "window_end": dtype})
    return pl.LazyFrame(
        {"window_start": [start_us], "window_end": [end_us]},
        schema={"window_start": pl.Int64, "window_end": pl.Int64},
    ).with_columns(pl.col("window_start", "window_end").cast(dtype))


def declared_schema(columns: dict | None) -> pl.Schema | None:
    import polars as pl

    if not columns:
        return None
    return pl.Schema({name: polars_dtype(col.type) for name, col in columns.items()})


def resolve_job(job: Job, producer_schemas: dict[str, pl.Schema | None]) -> Resolution:
    """Resolve every step of `job` without data; `producer_schemas` maps job -> output schema."""
    import polars as pl

    known: dict[str, pl.Schema | None] = {}
    for name, source in job.spec.inputs.items():
        if isinstance(source, FileInput | DatabaseInput):
            known[name] = declared_schema(source.columns)
        elif isinstance(source, JobInput):
            known[name] = declared_schema(source.columns) or producer_schemas.get(source.job)
    result = Resolution(output=None)
    last: pl.Schema | None = None
    for index, step in enumerate(job.spec.steps):
        if not isinstance(step, SqlStep):
            last = None
            if step.name:
                known[step.name] = None
            continue
        used = file_functions(step.sql)
        if used:
            result.findings.append(StepFinding(index, (
                f"SQL reads files itself with {', '.join(used)}(); declare the files under inputs: "
                "instead, so weir can fingerprint them and wait for them")))
            last = None
            continue
        frames = {n: pl.LazyFrame(schema=s) if s is not None else pl.LazyFrame() for n, s in known.items()}
        frames["bounds"] = bounds_frame(empty=True)
        unknown = any(s is None for s in known.values())
        try:
            ctx = pl.SQLContext(frames=frames, eager=False)
            lf = ctx.execute(step.sql)
            schema = lf.collect_schema()
        except pl.exceptions.SQLInterfaceError as exc:
            last = None
            m = _RELATION.search(str(exc))
            if m:
                names = sorted(n for n in known)
                result.findings.append(StepFinding(index, (
                    f"table {m.group(1)!r} is not defined; this step can read "
                    f"{', '.join(names + ['bounds'])} (declare it under inputs:)")))
            else:
                result.findings.append(StepFinding(index, f"SQL error: {_first_line(exc)}"))
            continue
        except (pl.exceptions.ColumnNotFoundError, pl.exceptions.SchemaFieldNotFoundError) as exc:
            last = None
            if not unknown:
                result.findings.append(StepFinding(index, f"unknown column: {_first_line(exc)}"))
            continue
        except pl.exceptions.SQLSyntaxError as exc:
            last = None
            result.findings.append(StepFinding(index, f"SQL syntax error: {_first_line(exc)}"))
            continue
        except pl.exceptions.PolarsError as exc:
            last = None
            if not unknown:
                result.findings.append(StepFinding(index, f"SQL does not resolve: {_first_line(exc)}"))
            continue
        last = None if unknown and not schema else schema
        if step.name:
            known[step.name] = last
    if last is not None and job.spec.output.stamp:
        last = pl.Schema({
            **dict(last),
            "window_start": pl.Datetime("us", "UTC"),
            "window_end": pl.Datetime("us", "UTC"),
            "run_id": pl.Int64(),
            "code_version": pl.String(),
        })
    result.output = last
    return result


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
