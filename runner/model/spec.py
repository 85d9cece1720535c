"""Job-file models and loading, with `FILE:LINE:COL: key.path: message` errors.

A job file is YAML validated by the pydantic models below. `load_job` parses
one file and returns a `Job` (name, spec, source marks) or raises
`SpecProblems` carrying *every* problem found in that file. The JSON Schema of
a job file (`weir schema`) is generated from `JobSpec`.
"""

from __future__ import annotations

import difflib
import re
import types
import typing
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import yaml
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    field_validator,
    model_validator,
)

from runner.errors import Problem, SpecProblems
from runner.model.timeutil import BadValue, parse_duration, parse_instant, zone
from runner.model.yamlfile import Marked, YamlLimit, load_marked, source_text


def _text(value: Any) -> Any:
    return source_text(value)


def _duration(value: Any) -> timedelta:
    try:
        return parse_duration(value)
    except BadValue as exc:
        raise ValueError(str(exc)) from None


Text = Annotated[str, BeforeValidator(_text)]
Duration = Annotated[
    timedelta,
    BeforeValidator(_duration),
    Field(json_schema_extra={"type": "string", "examples": ["10m", "1h", "7d", "PT10M"]}),
]
Identifier = Annotated[Text, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$")]

_EVERY = re.compile(r"^\s*(\d+)\s*(m|h|d|w|mo|y)\s*$")
_TYPE = re.compile(
    r"^(?:str|int|float|bool|date|datetime(?:\((?P<tz>[^)]+)\))?|decimal\((?P<p>\d+)\s*,\s*(?P<s>\d+)\))$"
)
_RESERVED_NAMES = {"bounds"}


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True, frozen=True, defer_build=True)


class Column(_Model):
    """One declared input column: its type and the rules each value must meet."""

    type: Text = Field(
        description="str, int, float, bool, date, datetime, datetime(ZONE) or decimal(P,S)"
    )
    nullable: bool = True
    values: list[Any] | None = Field(default=None, description="the allowed values")
    min: Any = None
    max: Any = None
    pattern: Text | None = Field(default=None, description="a regular expression each value must match")

    @field_validator("type")
    @classmethod
    def _known_type(cls, value: str) -> str:
        value = value.strip()
        m = _TYPE.match(value)
        if not m:
            choices = ["str", "int", "float", "bool", "date", "datetime", "decimal(12,2)"]
            close = difflib.get_close_matches(value, choices, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise ValueError(
                f"unknown column type {value!r}{hint}; use str, int, float, bool, date, "
                "datetime, datetime(ZONE) or decimal(P,S)"
            )
        if m.group("tz"):
            try:
                zone(m.group("tz").strip())
            except BadValue as exc:
                raise ValueError(str(exc)) from None
        if m.group("p") and not (1 <= int(m.group("p")) <= 38 and 0 <= int(m.group("s")) <= int(m.group("p"))):
            raise ValueError("decimal(P,S) needs 1 <= P <= 38 and 0 <= S <= P")
        return value

    @field_validator("pattern")
    @classmethod
    def _regex(cls, value: str | None) -> str | None:
        if value is not None:
            try:
                re.compile(value)
            except re.error as exc:
                raise ValueError(f"bad regular expression: {exc}") from None
        return value

    @field_validator("values", mode="before")
    @classmethod
    def _value_texts(cls, value: Any) -> Any:
        return value


def text_encoding(name: str) -> str:
    """A declared encoding, checked to be a text encoding Python's codecs know."""
    import codecs

    try:
        info = codecs.lookup(name.strip())
    except LookupError:
        raise ValueError(f"unknown encoding {name!r}; use a name Python's codecs know, e.g. utf-8, latin-1, "
                         "cp1252, utf-16") from None
    if not getattr(info, "_is_text_encoding", True):
        raise ValueError(f"{name!r} is not a text encoding")
    return name.strip()


def _column(value: Any) -> Any:
    if isinstance(value, str):
        return {"type": value}
    return value


ColumnDecl = Annotated[Column, BeforeValidator(_column)]
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


class FileInput(_Model):
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
            last = self.files.format(start=_SAMPLE_TIME, end=_SAMPLE_TIME).rsplit("/", 1)[-1]
            if format_from_name(last) is None and not any(c in last for c in "*?["):
                raise ValueError(f"cannot tell the format of {_short(self.files)!r} from its name; add "
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


class JobInput(_Model):
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


class DatabaseInput(_Model):
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


class SqlStep(_Model):
    """A polars SQL query over the inputs, earlier named steps and `bounds`."""

    sql: Text
    name: Identifier | None = None


class PythonStep(_Model):
    """`package.module:function`, called with the inputs as LazyFrames and `window`."""

    python: Annotated[Text, Field(pattern=r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$")]
    name: Identifier | None = None


def _step_kind(value: Any) -> str | None:
    if isinstance(value, dict):
        return _closest_kind(value, {"sql": "sql step", "python": "python step"})
    return {SqlStep: "sql step", PythonStep: "python step"}.get(type(value))


Step = Annotated[
    Annotated[SqlStep, Tag("sql step")] | Annotated[PythonStep, Tag("python step")],
    Discriminator(
        _step_kind,
        custom_error_type="step_kind",
        custom_error_message="a step needs sql: or python:",
    ),
]


class RowsCheck(_Model):
    min: int | None = Field(default=None, ge=0)
    max: int | None = Field(default=None, ge=0)


class ChangeCheck(_Model):
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


class OutputCheck(_Model):
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


class Output(_Model):
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


class WindowDecl(_Model):
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


class JobSpec(_Model):
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


SETTINGS_FILE = "_settings.yaml"  # in jobs/: settings for every job of a workspace
DEFAULT_TIME_ALLOWED = timedelta(hours=1)
DEFAULT_LEASE = timedelta(minutes=2)
MIN_LEASE = timedelta(seconds=2)


class WorkspaceSettings(_Model):
    """`jobs/_settings.yaml`: settings that hold for every job of the workspace."""

    time_allowed: Duration = Field(
        default=DEFAULT_TIME_ALLOWED,
        description="how long one attempt at a window may run before weir stops it and records it failed; "
                    "a job's own time_allowed: wins")
    lease: Duration = Field(
        default=DEFAULT_LEASE,
        description="how long a runner's claim on a window (and the tick lock) lasts without renewal; "
                    "renewed every third of it while the runner lives")

    @field_validator("time_allowed")
    @classmethod
    def _positive_time(cls, value: timedelta) -> timedelta:
        if value <= timedelta(0):
            raise ValueError("time_allowed must be positive")
        return value

    @field_validator("lease")
    @classmethod
    def _long_enough(cls, value: timedelta) -> timedelta:
        if value < MIN_LEASE:
            raise ValueError(f"lease must be at least {int(MIN_LEASE.total_seconds())}s")
        return value


_TEMPLATE_FIELDS = {"start", "end"}
NAME_MAX = 255
"""Longest file or folder name in bytes (POSIX NAME_MAX on Linux and common file systems)."""
PATH_MAX = 4096
"""Longest path in bytes that Linux opens (PATH_MAX)."""
_SAMPLE_TIME = datetime(2026, 12, 31, 23, 59, 59)  # a sample instant: two-digit fields at their widest


def check_template(template: str) -> None:
    """Raise ValueError unless `template` only uses {start:...} and {end:...} and can name a file."""
    import string

    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise ValueError(f"bad path template {_short(template)!r}: {exc}") from None
    for _, field_name, spec, conversion in parsed:
        if field_name is None:
            continue
        if field_name not in _TEMPLATE_FIELDS:
            raise ValueError(
                f"unknown placeholder {{{_short(field_name)}}} in {_short(template)!r}: "
                "use {start:%Y-%m-%d} or {end:...}"
            )
        if conversion or (spec and "%" not in spec):
            raise ValueError(f"placeholder {{{field_name}:{_short(spec or '')}}} needs a strftime format "
                             "like %Y-%m-%d")
    sample = template.format(start=_SAMPLE_TIME, end=_SAMPLE_TIME)
    for name in sample.split("/"):
        if len(name.encode("utf-8", "surrogatepass")) > NAME_MAX:
            raise ValueError(f"a file or folder name of {len(name.encode('utf-8', 'surrogatepass')):,} bytes "
                             f"({_short(name)!r}) cannot exist: names are at most {NAME_MAX} bytes")
    if len(sample.encode("utf-8", "surrogatepass")) > PATH_MAX:
        raise ValueError(f"a path of {len(sample.encode('utf-8', 'surrogatepass')):,} bytes cannot be opened: "
                         f"paths are at most {PATH_MAX} bytes")


FORMAT_SUFFIXES = ((".parquet", "parquet"), (".pq", "parquet"), (".ndjson", "ndjson"), (".jsonl", "ndjson"),
                   (".json", "ndjson"), (".csv", "csv"), (".csv.gz", "csv"))


def format_from_name(path: str) -> str | None:
    """The input format a file name implies (csv, parquet, ndjson), or None."""
    lower = path.lower()
    for suffix, fmt in FORMAT_SUFFIXES:
        if lower.endswith(suffix):
            return fmt
    return None


def _short(text: str, limit: int = 60) -> str:
    return text if len(text) <= limit else f"{text[:limit]}..."


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


_JOB_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")

MAX_FILE_BYTES = 256 * 1024
"""The longest job file weir reads (a real one is a few KiB); see yamlfile for the other limits."""


def _position(raw: bytes, offset: int) -> tuple[int, int]:
    """1-based line and column (in characters) of byte `offset` of UTF-8 `raw`."""
    start = raw.rfind(b"\n", 0, offset) + 1
    return raw.count(b"\n", 0, offset) + 1, len(raw[start:offset].decode("utf-8", errors="replace")) + 1


def dotted(path: tuple[str | int, ...]) -> str:
    return ".".join(str(p) for p in path)


def _read_marked(file: Path, shown: str) -> Marked:
    """The YAML of `file` with its source marks; SpecProblems when it cannot be read or parsed."""
    try:
        with open(file, "rb") as handle:
            raw = handle.read(MAX_FILE_BYTES + 1)
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line, col = _position(raw, exc.start)
        raise SpecProblems([Problem(shown, line, col, "", f"cannot read {_kind(file)}: not UTF-8 text ({exc.reason})")]) from None
    except OSError as exc:
        raise SpecProblems([Problem(shown, 1, 1, "", f"cannot read {_kind(file)}: {exc}")]) from None
    if len(raw) > MAX_FILE_BYTES:
        line, col = _position(raw, MAX_FILE_BYTES)
        raise SpecProblems([Problem(shown, line, col, "", (
            f"{_kind(file)} longer than {MAX_FILE_BYTES // 1024} KiB, a limit of weir job files; "
            "split the job or move long SQL into a python step"))])
    try:
        return load_marked(text)
    except YamlLimit as exc:
        mark = exc.problem_mark
        line, col = (mark.line + 1, mark.column + 1) if mark else (1, 1)
        raise SpecProblems([Problem(shown, line, col, "", f"{exc.problem}, a limit of weir job files")]) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark else (1, 1)
        message = " ".join(str(p) for p in (exc.context, exc.problem) if p)
        raise SpecProblems([Problem(shown, line, col, "", f"malformed YAML: {message}")]) from None
    except yaml.YAMLError as exc:
        raise SpecProblems([Problem(shown, 1, 1, "", f"malformed YAML: {exc}")]) from None


def _kind(file: Path) -> str:
    return "workspace settings file" if file.name == SETTINGS_FILE else "job file"


def load_job(file: Path, display: str | None = None) -> Job:
    """Load and validate one job file; raise SpecProblems with every problem found."""
    shown = display or str(file)
    marked = _read_marked(file, shown)
    problems: list[Problem] = []
    name = file.stem
    if name.startswith("_"):
        problems.append(Problem(shown, 1, 1, "", (
            f"job name {name!r} (the file name) starts with _, which is kept for workspace files "
            f"such as jobs/{SETTINGS_FILE}; rename the file")))
    elif not _JOB_NAME.match(name):
        problems.append(Problem(shown, 1, 1, "", f"job name {name!r} (the file name) must be letters, digits and _"))
    for path, (line, col) in marked.duplicates:
        problems.append(Problem(shown, line, col, dotted(path), "key given twice; the last one would win silently"))
    if not isinstance(marked.data, dict):
        problems.append(Problem(shown, 1, 1, "", "a job file is a YAML mapping with window:, steps: and output:"))
        raise SpecProblems(problems)
    try:
        spec = JobSpec.model_validate(marked.data)
    except ValidationError as exc:
        problems.extend(_problems_from(exc, marked, shown))
        raise SpecProblems(problems) from None
    if problems:
        raise SpecProblems(problems)
    return Job(name=name, spec=spec, file=Path(shown), marks=marked)


def load_settings(file: Path, display: str | None = None) -> WorkspaceSettings:
    """Load and validate `jobs/_settings.yaml` (defaults when it does not exist); SpecProblems when invalid."""
    if not file.exists():
        return WorkspaceSettings()
    shown = display or str(file)
    marked = _read_marked(file, shown)
    problems = [Problem(shown, line, col, dotted(path), "key given twice; the last one would win silently")
                for path, (line, col) in marked.duplicates]
    data = {} if marked.data is None else marked.data
    if not isinstance(data, dict):
        raise SpecProblems([*problems, Problem(shown, 1, 1, "", "workspace settings are a YAML mapping")])
    try:
        settings = WorkspaceSettings.model_validate(data)
    except ValidationError as exc:
        raise SpecProblems([*problems, *_problems_from(exc, marked, shown, WorkspaceSettings)]) from None
    if problems:
        raise SpecProblems(problems)
    return settings


def _problems_from(exc: ValidationError, marked: Marked, shown: str,
                   model: type[BaseModel] | None = None) -> list[Problem]:
    out: list[Problem] = []
    seen: set[tuple[Any, ...]] = set()
    for error in exc.errors(include_url=False):
        loc = _data_path(error["loc"], marked.data)
        kind = error["type"]
        message = error["msg"]
        if message.startswith("Value error, "):
            message = message[len("Value error, "):]
        if message.startswith("Assertion failed, "):
            message = message[len("Assertion failed, "):]
        at_key = False
        if kind == "extra_forbidden":
            at_key = True
            field_name = str(loc[-1])
            allowed = _allowed_keys(error["loc"][:-1], model or JobSpec)
            close = difflib.get_close_matches(field_name, sorted(allowed), n=1, cutoff=0.6)
            hint = f" (did you mean {close[0]!r}?)" if close else (
                f" (allowed: {', '.join(sorted(allowed))})" if allowed else ""
            )
            message = f"unknown key {field_name!r}{hint}"
        elif kind == "missing":
            message = f"required key {str(loc[-1])!r} is missing"
            loc = loc[:-1] if loc else loc
        elif kind in ("literal_error", "enum"):
            message = f"{message}; got {error.get('input')!r}"
        line, col = marked.where(tuple(loc), key=at_key)
        shown_path = dotted(tuple(_data_path(error["loc"], marked.data, keep_missing=True)))
        key = (line, col, shown_path, message)
        if key in seen:
            continue
        seen.add(key)
        out.append(Problem(shown, line, col, shown_path, message))
    return out


_TAGS = {"file input", "job input", "database input", "sql step", "python step",
         "function-after[_known_type(), str]"}


def _data_path(loc: tuple[Any, ...], data: Any, keep_missing: bool = False) -> list[Any]:
    """Map a pydantic error location onto the YAML data, dropping union tags."""
    path: list[Any] = []
    node = data
    for part in loc:
        if isinstance(node, dict) and part in node:
            path.append(part)
            node = node[part]
        elif isinstance(node, dict) and part == "columns" and "schema" in node:
            path.append("schema")
            node = node["schema"]
        elif isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
            path.append(part)
            node = node[part]
        elif isinstance(part, str) and (part in _TAGS or part.startswith("function-")):
            continue
        elif keep_missing or isinstance(node, dict):
            path.append("schema" if part == "columns" else part)
            node = None
        else:
            continue
    return path


def _allowed_keys(loc: tuple[Any, ...], top: type[BaseModel]) -> set[str]:
    """The keys allowed at a pydantic location (for 'did you mean')."""
    model: Any = top
    for part in loc:
        model = _child_type(model, part)
        if model is None:
            return set()
    if isinstance(model, type) and issubclass(model, BaseModel):
        names = set()
        for fname, finfo in model.model_fields.items():
            names.add(finfo.alias or fname)
        return names
    return set()


_TAG_MODELS = {
    "file input": FileInput, "job input": JobInput, "database input": DatabaseInput,
    "sql step": SqlStep, "python step": PythonStep,
}


def _unwrap(tp: Any) -> Any:
    while True:
        origin = typing.get_origin(tp)
        if origin is Annotated:
            tp = typing.get_args(tp)[0]
            continue
        if origin in (Union, types.UnionType):
            args = [a for a in typing.get_args(tp) if a is not type(None)]
            if len(args) == 1:
                tp = args[0]
                continue
            return tp
        return tp


def _child_type(model: Any, part: Any) -> Any:
    model = _unwrap(model)
    if isinstance(part, str) and part in _TAG_MODELS:
        return _TAG_MODELS[part]
    origin = typing.get_origin(model)
    if origin in (Union, types.UnionType):
        return model  # wait for the tag
    if origin is dict:
        return typing.get_args(model)[1]
    if origin is list:
        return typing.get_args(model)[0]
    if isinstance(model, type) and issubclass(model, BaseModel):
        for fname, finfo in model.model_fields.items():
            if part in (fname, finfo.alias):
                return finfo.annotation
        return None
    return None


def job_schema() -> dict[str, Any]:
    """JSON Schema (draft 2020-12) of a job file, generated from the models."""
    schema = JobSpec.model_json_schema(by_alias=True, mode="validation")
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "weir job file"
    return schema
