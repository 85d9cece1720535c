"""Apache Avro schemas (`.avsc`) -> weir columns.

The file is parsed by fastavro's schema parser (`fastavro.parse_schema`),
which checks it against the Avro specification and collects its named types.
The top-level schema must be a record; each field becomes a column. Types
follow the specification's primitive and logical types; a logical type the
specification calls invalid (a `decimal` whose scale exceeds its precision, a
`date` on a `long`) or one it does not know is read as its underlying type,
as the specification requires of readers. The mapping table is in
docs/schema-files.md.

`avro_field` is shared with the Avro container-file reader
(`runner.io.avro_reader`), so a file's columns and a schema file's columns
are the same for the same schema.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

from runner.model.schemafiles import (
    ColumnDecl,
    SchemaFile,
    SchemaFileError,
    column_name,
    int_range,
)

# logical type -> the underlying types it may annotate (Avro specification 1.12, "Logical Types")
_LOGICAL_BASES = {
    "decimal": {"bytes", "fixed"},
    "big-decimal": {"bytes"},
    "uuid": {"string", "fixed"},
    "date": {"int"},
    "time-millis": {"int"},
    "time-micros": {"long"},
    "timestamp-millis": {"long"},
    "timestamp-micros": {"long"},
    "timestamp-nanos": {"long"},
    "local-timestamp-millis": {"long"},
    "local-timestamp-micros": {"long"},
    "local-timestamp-nanos": {"long"},
    "duration": {"fixed"},
}
MAX_PRECISION = 38  # weir's decimal(P,S), as polars holds it


@dataclass(frozen=True)
class AvroField:
    """One record field, as far as weir is concerned.

    `base` is the underlying Avro type (int, long, float, double, boolean,
    string, bytes, fixed or enum) and `logical` its valid logical type, if
    any. `decl` is the weir column, or None with `refusal` saying why weir has
    no column type for it (the container-file reader still reads such a field,
    as raw bytes or a time of day).
    """

    name: str
    nullable: bool
    base: str
    logical: str | None = None
    precision: int = 0
    scale: int = 0
    size: int = 0
    symbols: tuple[str, ...] = ()
    decl: ColumnDecl | None = None
    refusal: str | None = field(default=None, compare=False)


def read_avsc(path: str | Path) -> SchemaFile:
    """Map an Avro schema file; raise SchemaFileError naming the field weir cannot hold."""
    path = Path(path)
    schema, named = _parse(path)
    return SchemaFile(path, record_columns(path, schema, named), (path,))


def columns_from_avro(path: str | Path) -> dict[str, ColumnDecl]:
    """The columns of the record an `.avsc` file declares (file order)."""
    return read_avsc(path).columns


def _parse(path: Path) -> tuple[Any, dict[str, Any]]:
    import fastavro

    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise SchemaFileError(path, "", f"cannot read: {exc.strerror or exc}") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise SchemaFileError(path, "", f"not an Avro schema (Avro schemas are JSON): {exc}") from None
    named: dict[str, Any] = {}
    try:
        parsed = fastavro.parse_schema(raw, named_schemas=named)
    except Exception as exc:  # noqa: BLE001 - fastavro raises several types for a bad schema
        raise SchemaFileError(path, "", f"not a valid Avro schema: {exc}") from None
    return parsed, named


def record_fields(path: Path, schema: Any, named: dict[str, Any]) -> list[AvroField]:
    """Every field of a top-level record; refuses nesting, repeats and unions other than with null."""
    schema = _resolve(schema, named)
    if not isinstance(schema, dict) or schema.get("type") != "record":
        kind = schema.get("type") if isinstance(schema, dict) else schema
        raise SchemaFileError(path, "", f"the top-level schema is {_kind(kind)}, not a record: weir reads "
                              "a record's fields as columns")
    out: list[AvroField] = []
    for entry in schema["fields"]:
        out.append(avro_field(path, column_name(path, entry["name"]), entry["type"], named))
    return out


def record_columns(path: Path, schema: Any, named: dict[str, Any]) -> dict[str, ColumnDecl]:
    columns: dict[str, ColumnDecl] = {}
    for f in record_fields(path, schema, named):
        if f.decl is None:
            raise SchemaFileError(path, f.name, f.refusal or "has no weir column type")
        columns[f.name] = f.decl
    return columns


def avro_field(path: Path, name: str, schema: Any, named: dict[str, Any]) -> AvroField:
    """The weir view of one field's type (a union with null makes it nullable)."""
    nullable = False
    schema = _resolve(schema, named)
    if isinstance(schema, list):
        branches = [_resolve(b, named) for b in schema]
        others = [b for b in branches if b != "null"]
        if len(others) != 1 or len(branches) > 2:
            kinds = ", ".join(_kind(b.get("type") if isinstance(b, dict) else b) for b in branches)
            raise SchemaFileError(path, name, f"is a union of {kinds}: weir reads a union only of one type "
                                  "and null (a nullable column)")
        nullable = len(branches) == 2
        schema = others[0]
    base = schema.get("type") if isinstance(schema, dict) else schema
    if base == "null":
        raise SchemaFileError(path, name, "is always null: weir has no column type for it")
    if base == "record" or base == "error":
        raise SchemaFileError(path, name, "is a nested record: weir reads flat records only; move its fields "
                              "to the top-level record")
    if base in ("array", "map"):
        raise SchemaFileError(path, name, f"is {_kind(base)}, a repeated field: weir reads one value per "
                              "column")
    props = schema if isinstance(schema, dict) else {}
    logical = props.get("logicalType")
    if (logical not in _LOGICAL_BASES or base not in _LOGICAL_BASES[logical]
            or (logical == "uuid" and base == "fixed" and props.get("size") != 16)):
        logical = None  # unknown or misplaced logical types are read as the underlying type (spec)
    precision, scale = 0, 0
    if logical == "decimal":
        precision, scale = props["precision"], props.get("scale", 0)  # fastavro refuses invalid ones
    common: dict[str, Any] = {
        "name": name, "nullable": nullable, "base": base, "logical": logical, "precision": precision,
        "scale": scale, "size": props.get("size", 0), "symbols": tuple(props.get("symbols", ())),
    }
    decl, refusal = _decl(cast(str, base), logical, precision, scale, common["symbols"])
    if decl is not None:
        decl = {**decl, "nullable": nullable}
    return AvroField(**common, decl=decl, refusal=refusal)


_SIMPLE: dict[str, dict[str, Any]] = {
    "boolean": {"type": "bool"},
    "int": {"type": "int", **int_range(32, True)},
    "long": {"type": "int"},
    "float": {"type": "float"},
    "double": {"type": "float"},
    "string": {"type": "str"},
}
# canonical text form of a UUID (RFC 9562, section 4), as the Avro specification's uuid refers to it
UUID_PATTERN = "^[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$"


def _decl(base: str, logical: str | None, precision: int, scale: int, symbols: tuple[str, ...]
          ) -> tuple[ColumnDecl | None, str | None]:
    if logical == "decimal":
        if precision > MAX_PRECISION:
            return None, (f"is decimal with precision {precision}: weir's decimals hold at most "
                          f"{MAX_PRECISION} digits")
        return {"type": f"decimal({precision},{scale})"}, None
    if logical == "uuid":
        return {"type": "str", "pattern": UUID_PATTERN}, None
    if logical == "date":
        return {"type": "date"}, None
    if logical in ("timestamp-millis", "timestamp-micros", "timestamp-nanos"):
        return {"type": "datetime(UTC)"}, None
    if logical in ("local-timestamp-millis", "local-timestamp-micros", "local-timestamp-nanos"):
        return {"type": "datetime"}, None
    if logical in ("time-millis", "time-micros"):
        return None, f"is a time of day ({logical}): weir has no column type for it"
    if logical == "duration":
        return None, "is a duration: weir has no column type for it"
    if logical == "big-decimal":
        return None, "is big-decimal (a scale per value): weir's decimals need one precision and scale"
    if base == "enum":
        return {"type": "str", "values": list(symbols)}, None
    if base in ("bytes", "fixed"):
        return None, f"is {base} (binary): weir has no column type for binary values"
    if base in _SIMPLE:
        return dict(_SIMPLE[base]), None
    return None, f"has type {base!r}, which weir cannot read"


def _resolve(schema: Any, named: dict[str, Any]) -> Any:
    """A named type referred to by name, replaced by its definition."""
    if isinstance(schema, str) and schema in named:
        return named[schema]
    return schema


def _kind(kind: Any) -> str:
    return {"array": "an array", "map": "a map", "record": "a record", "enum": "an enum",
            "error": "an error record"}.get(str(kind), repr(kind))
