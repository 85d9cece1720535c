"""Job-file models: a job file is YAML validated by the pydantic models below.

Reading a file and mapping validation errors onto its lines is
`runner.model.loading`; a validated file becomes a `Job` (name, spec, marks).
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    Discriminator,
    Field,
    Tag,
    field_validator,
    model_validator,
)

from runner.errors import Problem
from runner.model.columns import Column, column_value, text_encoding
from runner.model.fields import Duration, Identifier, Model, Text
from runner.model.templates import SAMPLE_TIME, check_template, format_from_name, short
from runner.model.timeutil import BadValue, parse_instant, zone
from runner.model.yamlfile import Marked, dotted, source_text

_EVERY = re.compile(r"^\s*(\d+)\s*(m|h|d|w|mo|y)\s*$")
_RESERVED_NAMES = {"bounds"}


ColumnDecl = Annotated[Column, BeforeValidator(column_value)]
Columns = dict[Identifier, ColumnDecl]


def _percent(value: Any) -> float:
    raw = source_text(value)
    text = str(raw).strip()
    try:
        number = float(text[:-1]) / 100 if text.endswith("%") else float(text)
    except ValueError:
        raise ValueError(f"bad fraction {text!r}: write 50% or 0.5") from None
    if number < 0:
        raise ValueError("must not be negative")
    return number


Fraction = Annotated[float, BeforeValidator(_percent), Field(json_schema_extra={"examples": ["50%", 0.5]})]


class FileInput(Model):
    """Files matched by a path template (with globs) for each window."""

    files: Text = Field(description="path template relative to the workspace, e.g. data/{start:%Y-%m-%d}/*.csv")
    format: Literal["csv", "parquet", "ndjson"] | None = Field(
        default=None, description="file format; from the extension when absent"
    )
    time_column: Identifier | None = Field(
        default=None, description="keep only rows whose value lies in [start, end)"
    )
    columns: Columns | None = Field(default=None, alias="schema")
    required: bool = Field(default=True, description="when false, no files means an empty input")
    fingerprint: Literal["stat", "content"] = Field(
        default="stat", description="stat: path, size and mtime; content: a hash of the bytes"
    )
    extra: Literal["keep", "drop"] = "keep"
    key: list[Identifier] | None = Field(default=None, description="columns unique within the window")
    on_bad_rows: Literal["fail", "quarantine", "drop"] = "fail"
    max_bad_rows: int | None = Field(default=None, ge=0)
    max_bad_fraction: Fraction | None = Field(default=None, description="e.g. 2% or 0.02")
    encoding: Text | None = Field(
        default=None, description="text encoding of CSV and NDJSON files (default utf-8, a byte order mark "
                                  "accepted), e.g. latin-1, cp1252, utf-16"
    )
    allow_outside: list[Text] | None = Field(
        default=None, description="absolute folders outside the workspace whose files this input may read "
                                  "(symlinks are followed, then checked)"
    )

    @field_validator("files")
    @classmethod
    def _template(cls, value: str) -> str:
        check_template(value)
        return value

    @model_validator(mode="after")
    def _format_known(self) -> FileInput:
        if self.format is None:
            last = self.files.format(start=SAMPLE_TIME, end=SAMPLE_TIME).rsplit("/", 1)[-1]
            if format_from_name(last) is None and not any(c in last for c in "*?["):
                raise ValueError(f"cannot tell the format of {short(self.files)!r} from its name; add "
                                 "format: csv, parquet or ndjson")
        return self

    @field_validator("encoding")
    @classmethod
    def _encoding(cls, value: str | None) -> str | None:
        return None if value is None else text_encoding(value)

    @field_validator("allow_outside")
    @classmethod
    def _absolute(cls, value: list[str] | None) -> list[str] | None:
        for folder in value or []:
            if not Path(folder).is_absolute():
                raise ValueError(f"{folder!r} is not an absolute path; allow_outside lists folders outside "
                                 "the workspace, e.g. /srv/feeds")
        return value


class JobInput(Model):
    """Another job's output: the producer windows overlapping this window."""

    job: Text = Field(description="name of the producing job")
    lag: int | None = Field(default=None, ge=1, description="read the N-th earlier window instead")
    lookback: Duration | None = Field(
        default=None, description="read every producer window overlapping [start - lookback, end)"
    )
    columns: Columns | None = Field(
        default=None, alias="schema",
        description="the producer's output columns; needed only when they cannot be worked out from its SQL",
    )

    @model_validator(mode="after")
    def _one_shift(self) -> JobInput:
        if self.lag is not None and self.lookback is not None:
            raise ValueError("use either lag or lookback, not both")
        if self.lookback is not None and self.lookback <= timedelta(0):
            raise ValueError("lookback must be positive")
        return self


class DatabaseInput(Model):
    """A table or query through a SQLAlchemy URL, restricted to the window."""

    database: Text = Field(description="SQLAlchemy URL, e.g. sqlite:///state/app.sqlite")
    table: Text | None = None
    query: Text | None = None
    time_column: Identifier | None = None
    columns: Columns | None = Field(default=None, alias="schema")
    key: list[Identifier] | None = None
    fingerprint: Literal["content"] = "content"

    @model_validator(mode="after")
    def _table_or_query(self) -> DatabaseInput:
        if (self.table is None) == (self.query is None):
            raise ValueError("give exactly one of table: or query:")
        return self


def _closest_kind(value: dict[Any, Any], kinds: dict[str, str]) -> str | None:
    for key, tag in kinds.items():
        if key in value:
            return tag
    for key in value:
        close = difflib.get_close_matches(str(key), list(kinds), n=1, cutoff=0.7)
        if close:
            return kinds[close[0]]
    return None


def _input_kind(value: Any) -> str | None:
    if isinstance(value, dict):
        return _closest_kind(value, {"files": "file input", "job": "job input", "database": "database input"})
    if isinstance(value, BaseModel):
        return {FileInput: "file input", JobInput: "job input", DatabaseInput: "database input"}.get(
            type(value)
        )
    return None


Input = Annotated[
    Annotated[FileInput, Tag("file input")] | Annotated[JobInput, Tag("job input")] | Annotated[DatabaseInput, Tag("database input")],
    Discriminator(
        _input_kind,
        custom_error_type="input_kind",
        custom_error_message="an input needs one of files:, job: or database:",
    ),
]


class SqlStep(Model):
    """A polars SQL query over the inputs, earlier named steps and `bounds`."""

    sql: Text
    name: Identifier | None = None


class PythonStep(Model):
    """`package.module:function`, called with the inputs as LazyFrames and `window`."""

    python: Annotated[Text, Field(pattern=r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$")]
    name: Identifier | None = None


def _step_kind(value: Any) -> str | None:
    if isinstance(value, dict):
        return _closest_kind(value, {"sql": "sql step", "python": "python step"})
    kinds: dict[type, str] = {SqlStep: "sql step", PythonStep: "python step"}
    return kinds.get(type(value))


Step = Annotated[
    Annotated[SqlStep, Tag("sql step")] | Annotated[PythonStep, Tag("python step")],
    Discriminator(
        _step_kind,
        custom_error_type="step_kind",
        custom_error_message="a step needs sql: or python:",
    ),
]


class RowsCheck(Model):
    min: int | None = Field(default=None, ge=0)
    max: int | None = Field(default=None, ge=0)


class ChangeCheck(Model):
    """Compare with the previous window's output (rows, or the sum of a column)."""

    column: Identifier | None = None
    rows: bool | None = None
    max_drop: Fraction | None = None
    max_rise: Fraction | None = None

    @model_validator(mode="after")
    def _what(self) -> ChangeCheck:
        if (self.column is None) == (not self.rows):
            raise ValueError("give either column: NAME or rows: true")
        if self.max_drop is None and self.max_rise is None:
            raise ValueError("give max_drop:, max_rise: or both")
        return self


class OutputCheck(Model):
    """One check on a window's output; exactly one key per list item."""

    key: list[Identifier] | None = None
    not_null: list[Identifier] | None = None
    rows: RowsCheck | None = None
    change: ChangeCheck | None = None
    rule: Text | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> OutputCheck:
        given = [k for k in ("key", "not_null", "rows", "change", "rule") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError("each check has exactly one of key, not_null, rows, change, rule")
        return self


class Output(Model):
    """Where a window's result goes: a file path template or a database table."""

    path: Text | None = Field(default=None, description="file path template relative to the workspace")
    format: Literal["parquet", "csv"] | None = None
    database: Text | None = None
    table: Text | None = None
    checks: list[OutputCheck] = Field(default_factory=list)
    stamp: bool = Field(default=False, description="add window_start, window_end, run_id, code_version columns")

    @model_validator(mode="after")
    def _one_target(self) -> Output:
        if (self.path is None) == (self.table is None):
            raise ValueError("give exactly one of path: (a file) or table: (with database:)")
        if self.table is not None and self.database is None:
            raise ValueError("a table output needs database: (a SQLAlchemy URL)")
        return self

    @field_validator("path")
    @classmethod
    def _template(cls, value: str | None) -> str | None:
        if value is not None:
            check_template(value)
        return value

    @property
    def key(self) -> list[str] | None:
        """The columns of the first `key` check: the output's sort and identity key."""
        for check in self.checks:
            if check.key:
                return list(check.key)
        return None

    @property
    def file_format(self) -> str:
        if self.format:
            return self.format
        return "csv" if (self.path or "").lower().endswith(".csv") else "parquet"


class WindowDecl(Model):
    """How time is cut: a cadence, a timezone, a start, an optional end, a settle time."""

    every: Text | None = Field(default=None, description="N and a unit: m, h, d, w, mo, y (e.g. 15m, 1h, 1d, 1mo)")
    cron: Text | None = Field(default=None, description="five-field cron expression")
    start: Text = Field(description="first window start, local to timezone (2026-01-01 or 2026-01-01T00:00)")
    end: Text | None = Field(default=None, description="no window extends past this instant")
    timezone: Text = "UTC"
    settle: Duration = Field(default=timedelta(0), description="how long after a window ends it becomes due")

    @field_validator("every")
    @classmethod
    def _every(cls, value: str | None) -> str | None:
        if value is None:
            return None
        m = _EVERY.match(value)
        if not m or int(m.group(1)) == 0:
            raise ValueError(
                f"bad cadence {value!r}: write a positive number and a unit m, h, d, w, mo or y, "
                "like 15m, 1h, 1d, 1mo"
            )
        return f"{int(m.group(1))}{m.group(2)}"

    @field_validator("cron")
    @classmethod
    def _cron(cls, value: str | None) -> str | None:
        if value is None:
            return None
        from croniter import croniter

        fields = value.split()
        if len(fields) != 5 or not croniter.is_valid(value):
            raise ValueError(
                f"bad cron expression {value!r}: five fields (minute hour day-of-month month "
                "day-of-week), like '0 6 * * 1'"
            )
        return " ".join(fields)

    @field_validator("timezone")
    @classmethod
    def _tz(cls, value: str) -> str:
        try:
            zone(value)
        except BadValue as exc:
            raise ValueError(str(exc)) from None
        return value

    @field_validator("start", "end")
    @classmethod
    def _instant(cls, value: str | None) -> str | None:
        if value is None:
            return None
        try:
            datetime.fromisoformat(str(value).strip().replace("z", "Z"))
        except ValueError:
            raise ValueError(
                f"bad timestamp {value!r}: use ISO 8601, like 2026-01-01 or 2026-01-01T00:00"
            ) from None
        return str(value).strip()

    @model_validator(mode="after")
    def _consistent(self) -> WindowDecl:
        if (self.every is None) == (self.cron is None):
            raise ValueError("give exactly one of every: or cron:")
        if self.end is not None:
            tz = zone(self.timezone)
            if parse_instant(self.end, tz) <= parse_instant(self.start, tz):
                raise ValueError(f"end {self.end} is not after start {self.start}")
        if self.settle < timedelta(0):
            raise ValueError("settle must not be negative")
        return self


class JobSpec(Model):
    """A job file: inputs, a window cadence, steps and one output."""

    description: Text | None = None
    window: WindowDecl
    inputs: dict[Identifier, Input] = Field(default_factory=dict)
    steps: list[Step] = Field(min_length=1)
    output: Output
    retries: int = Field(default=0, ge=0, le=100, description="extra attempts after a failure")
    retry_delay: Duration = Field(default=timedelta(seconds=30), description="first backoff; doubles per attempt")
    recheck: Duration = Field(default=timedelta(days=3), description="plan/tick re-check inputs of windows this recent")
    max_catch_up: int | None = Field(default=None, ge=1, description="most windows of this job one tick runs")
    late_after: Duration | None = Field(default=None, description="inputs newer than end + this are late")
    time_allowed: Duration | None = Field(
        default=None, description="how long one attempt at a window may run before it is stopped and fails "
                                  "(default: the workspace's, see jobs/_settings.yaml)")

    @field_validator("time_allowed")
    @classmethod
    def _positive_time(cls, value: timedelta | None) -> timedelta | None:
        if value is not None and value <= timedelta(0):
            raise ValueError("time_allowed must be positive")
        return value

    @field_validator("inputs")
    @classmethod
    def _names(cls, value: dict[str, Any]) -> dict[str, Any]:
        seen: set[str] = set()
        for name in value:
            if name.lower() in _RESERVED_NAMES:
                raise ValueError(f"input name {name!r} is reserved (the table of window bounds)")
            if name.lower() in seen:  # SQL finds tables without regard to case
                raise ValueError(f"input names {name!r} and another differ only in case; SQL cannot tell "
                                 "them apart")
            seen.add(name.lower())
        return value

    @model_validator(mode="after")
    def _step_names(self) -> JobSpec:
        seen = {name.lower() for name in self.inputs}  # SQL finds tables without regard to case
        for step in self.steps:
            if step.name is not None:
                if step.name.lower() in seen or step.name.lower() in _RESERVED_NAMES:
                    raise ValueError(f"step name {step.name!r} is already an input, step or reserved name")
                seen.add(step.name.lower())
        return self


# ---------------------------------------------------------------- loading


@dataclass(frozen=True)
class Job:
    """A validated job: its name (the file stem), spec, file and source marks."""

    name: str
    spec: JobSpec
    file: Path
    marks: Marked

    def where(self, *path: str | int, key: bool = False) -> tuple[int, int]:
        return self.marks.where(tuple(path), key=key)

    def problem(self, path: tuple[str | int, ...], message: str, severity: str = "error",
                display: str | None = None, key: bool = False) -> Problem:
        line, col = self.marks.where(path, key=key)
        return Problem(str(self.file), line, col, display or dotted(path), message, severity)


