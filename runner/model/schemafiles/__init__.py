"""Column declarations from the schema files teams already keep.

An input's columns can come from an Apache Avro schema (`.avsc`), a Protocol
Buffers message (`.proto`), an XML Schema element (`.xsd`) or a JSON Schema
(`.json`). Each format module maps its file to weir's columns: a dict of
column name -> `ColumnDecl`, the plain mapping a job file's `schema:` entry
holds (`type`, `nullable`, `values`, `min`, `max`, `pattern`), so the job
file's own `Column` model validates it like typed-in columns. The mapping
tables, and what is refused, are in docs/schema-files.md.

A shape weir cannot hold in flat, typed columns (a nested record, a union
other than with null, a repeated field, a type weir has no column type for)
raises `SchemaFileError(path, field, message)`: the job-file loader turns it
into a located problem.

`SchemaFile.digest_input()` is the bytes the spec fingerprint takes from the
file (and from every file it includes), `SchemaFile.text()` the normalized
columns that `weir why` diffs. Libraries are imported inside the functions
that use them, so commands that read no schema file pay nothing for them.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any

from runner.errors import WeirError

ColumnDecl = dict[str, Any]
"""One column as a job file's `schema:` entry holds it: type, nullable, values, min, max, pattern."""

KEYS = ("type", "nullable", "values", "min", "max", "pattern")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


class SchemaFileError(WeirError):
    """A schema file weir cannot turn into columns; `field` is "" when the whole file is at fault."""

    def __init__(self, path: str | Path, field: str, message: str):
        self.path = str(path)
        self.field = field
        self.message = message
        where = f"{self.path}: field {field}" if field else self.path
        super().__init__(f"{where}: {message}")


@dataclass(frozen=True)
class SchemaFile:
    """The columns mapped from a schema file, and every file the mapping read (the named one first)."""

    path: Path
    columns: dict[str, ColumnDecl]
    sources: tuple[Path, ...]

    def digest_input(self) -> bytes:
        """The bytes the spec fingerprint hashes: each file read, as its name relative to the schema
        file's folder, its length and its bytes, so an edit to any of them changes the digest."""
        return digest_input_of(self.path, self.sources)

    def text(self) -> str:
        """The mapped columns, one line each, for diffs (see `columns_text`)."""
        return columns_text(self.columns)


def digest_input_of(path: Path, sources: tuple[Path, ...] | list[Path]) -> bytes:
    """Length-prefixed names and bytes of `sources`, named relative to `path`'s folder."""
    base = Path(path).resolve().parent
    parts = []
    for source in sources:
        resolved = Path(source).resolve()
        try:
            name = resolved.relative_to(base).as_posix()
        except ValueError:
            name = resolved.as_posix()
        data = resolved.read_bytes()
        label = name.encode()
        parts.append(b"%d:%s%d:" % (len(label), label, len(data)) + data)
    return b"".join(parts)


FORMATS = {".avsc": "avro", ".proto": "proto", ".xsd": "xsd", ".json": "jsonschema"}


def read_schema_file(path: str | Path, name: str | None = None) -> SchemaFile:
    """Map a schema file by its extension; `name` is the message (`.proto`) or element (`.xsd`)."""
    path = Path(path)
    kind = FORMATS.get(path.suffix.lower())
    if kind is None:
        raise SchemaFileError(path, "", f"unknown schema file type {path.suffix or '(none)'!r}: use "
                              ".avsc, .proto, .xsd or .json")
    if kind in ("proto", "xsd") and not name:
        what = "message" if kind == "proto" else "element"
        raise SchemaFileError(path, "", f"a {path.suffix} schema needs the name of the {what} to read")
    if kind == "avro":
        from runner.model.schemafiles.avro import read_avsc

        return read_avsc(path)
    if kind == "proto":
        from runner.model.schemafiles.proto import read_proto

        return read_proto(path, name or "")
    if kind == "xsd":
        from runner.model.schemafiles.xsd import read_xsd

        return read_xsd(path, name or "")
    from runner.model.schemafiles.jsonschema import read_jsonschema

    return read_jsonschema(path)


def digest_input(path: str | Path, name: str | None = None) -> bytes:
    """The bytes of a schema file and of the files it includes, for the spec fingerprint."""
    return read_schema_file(path, name).digest_input()


def columns_text(columns: dict[str, ColumnDecl]) -> str:
    """One line per column, in the file's order, as a flow mapping a job file could hold:
    `amount: {type: "decimal(10,2)", nullable: false, min: "0"}`."""
    lines = []
    for name, decl in columns.items():
        rules = ", ".join(f"{key}: {json.dumps(decl[key])}" for key in KEYS if decl.get(key) is not None)
        lines.append(f"{name}: {{{rules}}}")
    return "\n".join(lines) + ("\n" if lines else "")


def refine(from_file: dict[str, ColumnDecl], inline: dict[str, Any] | None) -> dict[str, ColumnDecl]:
    """A file's columns refined by a job file's inline `schema:`: an inline key replaces the file's
    value of that key for that column (`type` too); an inline column the file lacks is added last."""
    out = {name: dict(decl) for name, decl in from_file.items()}
    for name, given in (inline or {}).items():
        extra = {"type": given} if isinstance(given, str) else dict(given)
        out[name] = {**out.get(name, {}), **extra}
    return out


# ---------------------------------------------------------------- shared by the format modules


def column_name(path: Path, name: str) -> str:
    """`name` if it can be a weir column name (letters, digits, _; not starting with a digit)."""
    if not _NAME.match(name):
        raise SchemaFileError(path, name, "is not a weir column name (letters, digits and _, not starting "
                              "with a digit); rename it in the schema file")
    return name


def int_range(bits: int, signed: bool) -> dict[str, int]:
    """min/max of an integer of `bits` bits; none for signed 64-bit, which is weir's own int."""
    if signed:
        return {} if bits >= 64 else {"min": -(1 << (bits - 1)), "max": (1 << (bits - 1)) - 1}
    return {"min": 0} if bits >= 64 else {"min": 0, "max": (1 << bits) - 1}


def check_pattern(path: Path, field: str, pattern: str) -> str:
    """`pattern` if both Python's `re` (the job-file check) and polars (the run) compile it."""
    try:
        re.compile(pattern)
    except re.error as exc:
        raise SchemaFileError(path, field, f"pattern {pattern!r} is not a regular expression weir can use: "
                              f"{exc}") from None
    import polars as pl

    try:
        pl.select(pl.lit("").str.contains(pattern))
    except pl.exceptions.PolarsError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SchemaFileError(path, field, f"pattern {pattern!r} is not a regular expression weir can use "
                              f"(lookaround and backreferences are not supported): {first}") from None
    return pattern


def length_pattern(low: int | None, high: int | None) -> str:
    """A pattern holding text to between `low` and `high` characters (either may be None)."""
    return f"(?s)^.{{{low or 0},{'' if high is None else high}}}$"


def decimal_text(value: Any) -> str:
    """A decimal bound as exact text (`0.01`, never `1E-2`)."""
    return format(Decimal(str(value)), "f")


def step_of_scale(scale: int) -> str:
    """The smallest step of a decimal with `scale` places (`0.01` for 2), as exact text."""
    return decimal_text(Decimal(1).scaleb(-scale))
