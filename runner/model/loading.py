"""Reading job files and workspace settings, with every problem as `FILE:LINE:COL: key.path: message`.

`load_job` parses one file and returns a `Job` (name, spec, source marks) or
raises `SpecProblems` carrying *every* problem found in that file; pydantic's
errors are mapped back onto the YAML's lines and columns. The JSON Schema of a
job file (`weir schema`) is generated from `JobSpec`.
"""

from __future__ import annotations

import difflib
import re
import types
import typing
from pathlib import Path
from typing import Annotated, Any, Union

import yaml
from pydantic import BaseModel, ValidationError

from runner.errors import Problem, SpecProblems
from runner.model.settings import SETTINGS_FILE, WorkspaceSettings
from runner.model.spec import DatabaseInput, FileInput, Job, JobInput, JobSpec, PythonStep, SqlStep
from runner.model.yamlfile import Marked, YamlLimit, dotted, load_marked

_JOB_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


MAX_FILE_BYTES = 256 * 1024
"""The longest job file weir reads (a real one is a few KiB); see yamlfile for the other limits."""


def _position(raw: bytes, offset: int) -> tuple[int, int]:
    """1-based line and column (in characters) of byte `offset` of UTF-8 `raw`."""
    start = raw.rfind(b"\n", 0, offset) + 1
    return raw.count(b"\n", 0, offset) + 1, len(raw[start:offset].decode("utf-8", errors="replace")) + 1


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
            allowed = allowed_keys(error["loc"][:-1], model or JobSpec)
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


def allowed_keys(loc: tuple[Any, ...], top: type[BaseModel]) -> set[str]:
    """The keys allowed at a pydantic location (for 'did you mean')."""
    model: Any = top
    for part in loc:
        model = child_type(model, part)
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


def child_type(model: Any, part: Any) -> Any:
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
