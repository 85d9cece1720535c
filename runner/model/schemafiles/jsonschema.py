"""JSON Schema files (`.json`) -> weir columns.

The file is checked against the meta-schema of the draft its `$schema`
declares (draft 4, 6, 7, 2019-09 or 2020-12; 2020-12 when it declares none)
with the jsonschema library's validator for that draft, and `$ref`s are
followed with the `referencing` library jsonschema uses, inside the file only
(a reference to another file or a URL is refused: weir never fetches one).

The top level describes one row: an object whose `properties` are the
columns, in file order, and whose `required` list makes them non-nullable.
Keywords that only annotate (`title`, `description`, `default`, `examples`,
and formats other than `date` and `date-time`) are ignored, and so are
keywords that cannot apply to a column's type (array or object keywords on a
string), as JSON Schema itself ignores them; a validation keyword weir cannot
check is refused rather than dropped. The mapping table is in
docs/schema-files.md. Numbers are read as exact decimals, so `multipleOf:
0.01` and `minimum: 0.1` keep their exact values.
"""

from __future__ import annotations

import json
import math
from decimal import Decimal
from pathlib import Path
from typing import Any

from runner.model.schemafiles import (
    ColumnDecl,
    SchemaFile,
    SchemaFileError,
    check_pattern,
    column_name,
    decimal_text,
    length_pattern,
    step_of_scale,
)

_TOP_IGNORED = {"$schema", "$id", "id", "$anchor", "$dynamicAnchor", "$vocabulary", "$comment", "$defs",
                "definitions", "title", "description", "examples", "default", "deprecated", "readOnly",
                "writeOnly", "type", "properties", "required", "additionalProperties",
                "unevaluatedProperties"}
# keywords that apply to every instance type, so weir must check them or refuse the column
_GENERAL = {"allOf", "anyOf", "oneOf", "not", "if", "then", "else"}
_DRAFTS_WITH_SIBLING_REFS = {"https://json-schema.org/draft/2019-09/schema",
                             "https://json-schema.org/draft/2020-12/schema"}


def read_jsonschema(path: str | Path) -> SchemaFile:
    """Map a JSON Schema file whose top level describes one row (an object with properties)."""
    path = Path(path)
    doc, validator = _load(path)
    resolver = _resolver(doc, validator)
    dialect = _dialect(validator)
    top, resolver = _deref(path, "", doc, resolver, dialect)
    if not isinstance(top, dict) or top.get("type", "object") != "object" or "properties" not in top:
        raise SchemaFileError(path, "", "the top level must be an object schema with properties (one column "
                              "each)")
    for key in top:
        if key not in _TOP_IGNORED and (key in _GENERAL or key in _OBJECT_CHECKS):
            raise SchemaFileError(path, "", f"the top level uses {key}: weir maps plain properties only")
    required = set(top.get("required", []))
    missing = sorted(required - set(top["properties"]))
    if missing:
        raise SchemaFileError(path, missing[0], "is required but has no schema under properties: weir "
                              "cannot tell its type")
    columns: dict[str, ColumnDecl] = {}
    for name, schema in top["properties"].items():
        name = column_name(path, name)
        columns[name] = _column(path, name, schema, name in required, resolver, dialect)
    return SchemaFile(path, columns, (path,))


def columns_from_jsonschema(path: str | Path) -> dict[str, ColumnDecl]:
    """The columns of a JSON Schema's top-level properties."""
    return read_jsonschema(path).columns


_OBJECT_CHECKS = {"patternProperties", "propertyNames", "minProperties", "maxProperties", "dependentRequired",
                  "dependentSchemas", "dependencies"}


def _load(path: Path) -> tuple[dict[str, Any], Any]:
    from jsonschema import SchemaError, validators
    from referencing.jsonschema import UnknownDialect, specification_with

    try:
        doc = json.loads(path.read_text(encoding="utf-8"), parse_float=Decimal)
    except OSError as exc:
        raise SchemaFileError(path, "", f"cannot read: {exc.strerror or exc}") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise SchemaFileError(path, "", f"not JSON: {exc}") from None
    if not isinstance(doc, dict):
        raise SchemaFileError(path, "", "the top level must be an object schema with properties")
    if "$schema" in doc:
        try:
            specification_with(str(doc["$schema"]))
        except UnknownDialect:
            raise SchemaFileError(path, "", f"unknown $schema {doc['$schema']!r}: use a JSON Schema draft "
                                  "(4, 6, 7, 2019-09 or 2020-12)") from None
    validator = validators.validator_for(doc, default=validators.Draft202012Validator)
    try:
        validator.check_schema(doc)
    except SchemaError as exc:
        where = "/".join(str(p) for p in exc.path)
        raise SchemaFileError(path, "", f"not a valid schema{f' at /{where}' if where else ''}: "
                              f"{exc.message}") from None
    return doc, validator


def _dialect(validator: Any) -> str:
    meta = validator.META_SCHEMA
    return str(meta.get("$id", meta.get("id", ""))).rstrip("#")


def _resolver(doc: dict[str, Any], validator: Any) -> Any:
    from referencing import Registry
    from referencing.jsonschema import specification_with

    resource = specification_with(_dialect(validator)).create_resource(doc)
    uri = resource.id() or ""
    return Registry().with_resource(uri=uri, resource=resource).resolver(base_uri=uri)


def _deref(path: Path, name: str, schema: Any, resolver: Any, dialect: str) -> tuple[Any, Any]:
    """`schema` with its `$ref` chain followed inside the file (siblings of `$ref` apply from 2019-09)."""
    from referencing.exceptions import Unresolvable

    seen: set[str] = set()
    while isinstance(schema, dict) and "$ref" in schema:
        ref = str(schema["$ref"])
        if ref in seen:
            raise SchemaFileError(path, name, f"$ref {ref!r} refers to itself")
        seen.add(ref)
        try:
            resolved = resolver.lookup(ref)
        except Unresolvable:
            raise SchemaFileError(path, name, f"cannot follow $ref {ref!r}: weir follows references inside "
                                  "the file only") from None
        siblings = {k: v for k, v in schema.items() if k != "$ref"} if dialect in _DRAFTS_WITH_SIBLING_REFS else {}
        resolver = resolved.resolver
        target = resolved.contents
        schema = {**target, **siblings} if isinstance(target, dict) else target
    return schema, resolver


def _column(path: Path, name: str, schema: Any, required: bool, resolver: Any, dialect: str) -> ColumnDecl:
    schema, resolver = _deref(path, name, schema, resolver, dialect)
    if not isinstance(schema, dict):
        raise SchemaFileError(path, name, "is a boolean schema: weir cannot tell its type")
    nullable = not required
    for key in ("anyOf", "oneOf"):
        if key in schema:
            branches = [_deref(path, name, b, resolver, dialect)[0] for b in schema[key]]
            others = [b for b in branches if b != {"type": "null"}]
            if len(branches) != 2 or len(others) != 1 or not isinstance(others[0], dict):
                raise SchemaFileError(path, name, f"uses {key} with other branches than one type and null: weir "
                                      "reads a union only of one type and null (a nullable column)")
            nullable = True
            schema = {**{k: v for k, v in schema.items() if k != key}, **others[0]}
    for key in _GENERAL & set(schema):
        raise SchemaFileError(path, name, f"uses {key}: weir cannot check it; describe the column with type, "
                              "format, enum, bounds and pattern only")
    kind, null_type = _type(path, name, schema)
    nullable = nullable or null_type
    values = None
    if "const" in schema:
        values = [schema["const"]]
    elif "enum" in schema:
        values = list(schema["enum"])
    if values is not None and None in values:
        nullable = True
        values = [v for v in values if v is not None]
    decl = _typed(path, name, kind, schema)
    decl["nullable"] = nullable
    if values is not None:
        decl["values"] = [_plain(v, decl["type"]) for v in values]
    return decl


def _type(path: Path, name: str, schema: dict[str, Any]) -> tuple[str, bool]:
    """The one non-null JSON type of a column, and whether null is allowed too."""
    given = schema.get("type")
    if given is None:
        values = [v for v in schema.get("enum", [schema["const"]] if "const" in schema else []) if v is not None]
        kinds = {_json_type(v) for v in values}
        if len(kinds) != 1:
            raise SchemaFileError(path, name, "has no type (and no enum of one type): weir cannot tell its type")
        return kinds.pop(), False
    types = [given] if isinstance(given, str) else list(given)
    others = [t for t in types if t != "null"]
    if len(others) != 1:
        shown = ", ".join(types)
        raise SchemaFileError(path, name, f"has types {shown}: weir reads one type per column (and null)")
    kind = others[0]
    if kind == "object":
        raise SchemaFileError(path, name, "is an object (a nested record): weir reads flat rows only; move its "
                              "properties to the top level")
    if kind == "array":
        raise SchemaFileError(path, name, "is an array, a repeated field: weir reads one value per column")
    if kind == "null":
        raise SchemaFileError(path, name, "is always null: weir has no column type for it")
    return kind, len(others) != len(types)


def _json_type(value: Any) -> str:
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, Decimal | float):
        return "number"
    if isinstance(value, str):
        return "string"
    return "object"


def _typed(path: Path, name: str, kind: str, schema: dict[str, Any]) -> ColumnDecl:
    if kind == "string":
        fmt = schema.get("format")
        decl: ColumnDecl = {"type": {"date": "date", "date-time": "datetime(UTC)"}.get(fmt or "", "str")}
        pattern = schema.get("pattern")
        low, high = schema.get("minLength"), schema.get("maxLength")
        if (pattern is not None or low is not None or high is not None) and decl["type"] != "str":
            raise SchemaFileError(path, name, f"has a pattern or length on format {fmt}: weir checks patterns on "
                                  "text only")
        if pattern is not None and (low is not None or high is not None):
            raise SchemaFileError(path, name, "has both a pattern and a length: weir holds one pattern per "
                                  "column; fold the length into the pattern")
        if pattern is not None:
            decl["pattern"] = check_pattern(path, name, str(pattern))
        elif low is not None or high is not None:
            decl["pattern"] = check_pattern(path, name, length_pattern(low, high))
        return decl
    if kind == "boolean":
        return {"type": "bool"}
    if kind == "integer":
        step = schema.get("multipleOf")
        if step is not None and Decimal(step) != 1:
            raise SchemaFileError(path, name, f"has multipleOf {step}: weir cannot check it on integers")
        return {"type": "int", **_bounds(path, name, schema, "int")}
    if kind == "number":
        step = schema.get("multipleOf")
        if step is None:
            return {"type": "float", **_bounds(path, name, schema, "float")}
        places = _places(Decimal(step))
        if places is None:
            raise SchemaFileError(path, name, f"has multipleOf {step}: weir reads multipleOf only as a power of "
                                  "ten (0.01 -> decimal with 2 places)")
        kind_text = f"decimal(38,{places})"
        return {"type": kind_text, **_bounds(path, name, schema, kind_text)}
    raise SchemaFileError(path, name, f"has type {kind!r}, which weir cannot read")


def _places(step: Decimal) -> int | None:
    """S when `step` is 10**-S (S >= 0)."""
    sign, digits, exponent = step.normalize().as_tuple()
    if sign or digits != (1,) or not isinstance(exponent, int) or exponent > 0:
        return None
    return -exponent


def _bounds(path: Path, name: str, schema: dict[str, Any], kind: str) -> dict[str, Any]:
    """minimum/maximum and their exclusive forms (numbers from draft 6, flags in draft 4) as inclusive
    min/max."""
    out: dict[str, Any] = {}
    for side, inclusive, exclusive in (("min", "minimum", "exclusiveMinimum"),
                                       ("max", "maximum", "exclusiveMaximum")):
        found: list[tuple[Decimal, bool]] = []
        flag = schema.get(exclusive)
        if inclusive in schema:
            found.append((Decimal(schema[inclusive]), flag is True))
        if flag is not None and not isinstance(flag, bool):
            found.append((Decimal(flag), True))
        if not found:
            continue
        # the tighter of the given bounds; at equal values the exclusive one
        pick = max if side == "min" else min
        value, strict = pick(found, key=lambda b: (b[0], b[1] if side == "min" else not b[1]))
        out[side] = _inclusive(path, name, kind, value, strict, side)
    return out


def _inclusive(path: Path, name: str, kind: str, value: Decimal, strict: bool, side: str) -> Any:
    if kind == "int":
        if side == "min":
            return math.floor(value) + 1 if strict else math.ceil(value)
        return math.ceil(value) - 1 if strict else math.floor(value)
    if kind.startswith("decimal"):
        if not strict:
            return decimal_text(value)
        step = Decimal(step_of_scale(int(kind[:-1].split(",")[1])))
        return decimal_text(value + step if side == "min" else value - step)
    if strict:
        raise SchemaFileError(path, name, "has an exclusive bound on a float column: weir's min and max are "
                              "inclusive; use minimum/maximum, or multipleOf for a decimal")
    return float(value)


def _plain(value: Any, kind: str) -> Any:
    """An enum value as the job file would hold it (exact decimals as text)."""
    if isinstance(value, Decimal):
        return decimal_text(value) if kind.startswith("decimal") else float(value)
    return value
