"""XML Schema (`.xsd` + an element name) -> weir columns, and the row rule the XML reader shares.

The schema is loaded by xmlschema (XSD 1.0; only local files, never the
network). Rows are **the repeated element under the root**: the document's
root is a global element whose content holds exactly one element declaration
that may repeat (`maxOccurs` above 1); each of those elements is a row, and
other children of the root (a header, say) are not rows. `element` names
either that row element or the root. A row's columns are its attributes, then
its child elements, in declaration order, by local name; each must hold one
simple value. The mapping table is in docs/schema-files.md.

A column is nullable unless it must be there and cannot be nil: an element
with `minOccurs="0"`, `nillable="true"` or inside an `xs:choice`, an
attribute without `use="required"`.
"""

from __future__ import annotations

from dataclasses import dataclass
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
    int_range,
    length_pattern,
    step_of_scale,
)

XSD = "{http://www.w3.org/2001/XMLSchema}"


@dataclass(frozen=True)
class RowShape:
    """Where rows are in a document and which columns they have."""

    root: Any  # the root's XsdElement
    row: Any  # the row's XsdElement
    attributes: dict[str, Any]  # column -> XsdAttribute
    children: dict[str, Any]  # column -> XsdElement
    columns: dict[str, ColumnDecl]


def load_schema(path: str | Path) -> Any:
    """The xmlschema schema of `path`, reading local files only; SchemaFileError when it is no XSD."""
    import xmlschema

    path = Path(path)
    if not path.is_file():
        raise SchemaFileError(path, "", "cannot read: no such file")
    try:
        return xmlschema.XMLSchema10(str(path), allow="local")
    except (xmlschema.XMLSchemaException, OSError, SyntaxError, ValueError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SchemaFileError(path, "", f"not a valid XML Schema: {first}") from None


def read_xsd(path: str | Path, element: str) -> SchemaFile:
    """Map the rows of `element` (the row element or the root); see the module's row rule."""
    path = Path(path)
    schema = load_schema(path)
    shape = row_shape(path, schema, element)
    return SchemaFile(path, shape.columns, (path, *_included(schema, path)))


def columns_from_xsd(path: str | Path, element: str) -> dict[str, ColumnDecl]:
    """The columns of the rows of `element`: attributes first, then child elements."""
    return read_xsd(path, element).columns


def _included(schema: Any, path: Path) -> list[Path]:
    """Local files the schema includes or imports (not the XSD meta-schemas xmlschema ships)."""
    import xmlschema

    shipped = Path(xmlschema.__file__).resolve().parent
    out = []
    for other in schema.maps.iter_schemas():
        url = getattr(other, "url", None)
        if not url or not url.startswith("file://"):
            continue
        from urllib.parse import unquote, urlparse

        file = Path(unquote(urlparse(url).path)).resolve()
        if file != path.resolve() and shipped not in file.parents and file not in out:
            out.append(file)
    return sorted(out)


def row_shape(path: Path, schema: Any, element: str) -> RowShape:
    """The root and row declarations named by `element`, and the rows' columns."""
    root, row = _find_rows(path, schema, element)
    kind = row.type
    where = row.local_name
    if not kind.is_complex() or kind.has_simple_content() or kind.mixed:
        raise SchemaFileError(path, where, "rows must hold child elements and attributes only (no text of "
                              "their own)")
    attributes: dict[str, Any] = {}
    for key, attribute in kind.attributes.items():
        if key is None or not hasattr(attribute, "use"):
            raise SchemaFileError(path, where, "has an attribute wildcard (xs:anyAttribute): weir needs "
                                  "every column declared")
        if attribute.use == "prohibited":
            continue
        attributes[column_name(path, attribute.local_name)] = attribute
    children: dict[str, Any] = {}
    optional: set[str] = set()
    if kind.content is not None and not kind.is_empty():
        _walk(path, kind.content, children, optional, False)
    columns: dict[str, ColumnDecl] = {}
    for name, attribute in attributes.items():
        columns[name] = {**simple_column(path, name, attribute.type), "nullable": attribute.use != "required"}
    for name, child in children.items():
        if name in columns:
            raise SchemaFileError(path, name, "is both an attribute and a child element of the row")
        if child.type.is_complex():
            raise SchemaFileError(path, name, "is a nested element (it has child elements or attributes): "
                                  "weir reads one simple value per column")
        nullable = name in optional or child.min_occurs == 0 or bool(child.nillable)
        columns[name] = {**simple_column(path, name, child.type), "nullable": nullable}
    return RowShape(root, row, attributes, children, columns)


def _find_rows(path: Path, schema: Any, element: str) -> tuple[Any, Any]:
    repeated = []
    for top in schema.elements.values():
        for child in _repeated_children(top):
            if child.local_name == element:
                repeated.append((top, child))
    if len(repeated) == 1:
        return repeated[0]
    top = schema.elements.get(element)
    if top is not None:
        rows = _repeated_children(top)
        if len(rows) == 1:
            return top, rows[0]
        if len(rows) > 1:
            names = ", ".join(r.local_name for r in rows)
            raise SchemaFileError(path, "", f"the root {element} has several repeated elements ({names}): "
                                  "name the row element instead")
    if len(repeated) > 1:
        roots = ", ".join(t.local_name for t, _ in repeated)
        raise SchemaFileError(path, "", f"{element} repeats under several roots ({roots}): name the root "
                              "instead")
    known = ", ".join(schema.elements) or "none"
    raise SchemaFileError(path, "", f"{element} is neither an element that repeats under a global element "
                          f"nor a global element with one repeated child (global elements: {known})")


def _repeated_children(top: Any) -> list[Any]:
    """Element declarations directly in `top`'s content that may occur more than once."""
    content = getattr(top.type, "content", None) if top.type.is_complex() else None
    if content is None or not hasattr(content, "iter_elements"):
        return []
    return [e for e in content.iter_elements()
            if hasattr(e, "local_name") and hasattr(e, "type") and (e.max_occurs is None or e.max_occurs > 1)]


def _walk(path: Path, group: Any, out: dict[str, Any], optional: set[str], maybe_absent: bool) -> None:
    """Collect the child elements of a content model; refuse repeats and wildcards."""
    from xmlschema.validators import XsdAnyElement

    if group.max_occurs is None or group.max_occurs > 1:
        raise SchemaFileError(path, "", f"an xs:{group.model} in the row repeats: weir reads one value per "
                              "column")
    absent = maybe_absent or group.min_occurs == 0 or group.model == "choice"
    for particle in group:
        if hasattr(particle, "model"):
            _walk(path, particle, out, optional, absent)
            continue
        if isinstance(particle, XsdAnyElement):
            raise SchemaFileError(path, "", "the row has an element wildcard (xs:any): weir needs every "
                                  "column declared")
        name = column_name(path, particle.local_name)
        if particle.max_occurs is None or particle.max_occurs > 1:
            raise SchemaFileError(path, name, "is repeated (maxOccurs above 1): weir reads one value per column")
        if name in out:
            raise SchemaFileError(path, name, "is declared twice in the row")
        out[name] = particle
        if absent:
            optional.add(name)


# built-in XSD types -> weir types; integer types carry their range (XSD 1.0 part 2, section 3.3)
_INTS = {
    "integer": {}, "long": int_range(64, True), "int": int_range(32, True), "short": int_range(16, True),
    "byte": int_range(8, True), "nonNegativeInteger": {"min": 0}, "positiveInteger": {"min": 1},
    "nonPositiveInteger": {"max": 0}, "negativeInteger": {"max": -1}, "unsignedLong": int_range(64, False),
    "unsignedInt": int_range(32, False), "unsignedShort": int_range(16, False),
    "unsignedByte": int_range(8, False),
}
_TEXT = {"string", "normalizedString", "token", "language", "Name", "NCName", "NMTOKEN", "ID", "IDREF",
         "ENTITY", "anyURI"}
_OTHER = {"boolean": "bool", "float": "float", "double": "float", "date": "date", "dateTime": "datetime"}


def simple_column(path: Path, name: str, kind: Any) -> ColumnDecl:
    """The weir type and rules of a simple type: its built-in base, then its facets."""
    from xmlschema.validators import XsdAtomicBuiltin

    chain = []
    t = kind
    while t is not None and not isinstance(t, XsdAtomicBuiltin):
        if t.is_list() or t.is_union():
            what = "a list" if t.is_list() else "a union"
            raise SchemaFileError(path, name, f"has {what} type: weir reads one value of one type per column")
        chain.append(t)
        t = getattr(t, "base_type", None)
    traced = t.name if t is not None else None
    if traced is None or not traced.startswith(XSD):
        raise SchemaFileError(path, name, "has a type weir cannot trace to a built-in XSD type")
    builtin = traced[len(XSD):]
    facets: dict[str, list[Any]] = {}
    for level in chain:  # most derived first
        for key, facet in (getattr(level, "facets", None) or {}).items():
            if key:
                facets.setdefault(key[len(XSD):], []).append(facet)
    if builtin in _INTS:
        decl: ColumnDecl = {"type": "int", **_INTS[builtin]}
    elif builtin in _TEXT:
        decl = {"type": "str"}
    elif builtin == "decimal":
        decl = _decimal(path, name, facets)
    elif builtin in _OTHER:
        decl = {"type": _OTHER[builtin]}
    else:
        raise SchemaFileError(path, name, f"has type xs:{builtin}: weir has no column type for it")
    return _facets(path, name, decl, facets)


def _decimal(path: Path, name: str, facets: dict[str, list[Any]]) -> ColumnDecl:
    digits = min((f.value for f in facets.get("totalDigits", [])), default=None)
    places = min((f.value for f in facets.get("fractionDigits", [])), default=None)
    if places is None:
        raise SchemaFileError(path, name, "is xs:decimal without fractionDigits: weir's decimals need a scale "
                              "(add fractionDigits, and totalDigits for the precision)")
    if digits is None:
        digits = 38
    if not (1 <= digits <= 38 and places <= digits):
        raise SchemaFileError(path, name, f"is xs:decimal with totalDigits {digits} and fractionDigits "
                              f"{places}: weir's decimals hold 1 to 38 digits")
    return {"type": f"decimal({digits},{places})"}


def _facets(path: Path, name: str, decl: ColumnDecl, facets: dict[str, list[Any]]) -> ColumnDecl:
    """enumeration -> values, bounds -> min/max, pattern and lengths -> pattern."""
    kind = decl["type"]
    if "enumeration" in facets:
        decl["values"] = [_value(kind, v) for v in facets["enumeration"][0].enumeration]
    for key, pick, side in (("minInclusive", max, "min"), ("maxInclusive", min, "max")):
        found = [_bound(path, name, kind, f.value, 0) for f in facets.get(key, [])]
        exclusive = "minExclusive" if side == "min" else "maxExclusive"
        found += [_bound(path, name, kind, f.value, 1 if side == "min" else -1) for f in facets.get(exclusive, [])]
        if side in decl:
            found.append(decl[side])
        if found:
            decl[side] = pick(found, key=_order(kind))
    patterns = facets.get("pattern", [])
    lengths = {k: facets[k][0].value for k in ("length", "minLength", "maxLength") if k in facets}
    if patterns and kind != "str":
        raise SchemaFileError(path, name, "has a pattern on a non-text type: weir checks patterns on text only")
    if len(patterns) > 1 or (patterns and lengths):
        raise SchemaFileError(path, name, "has patterns or lengths at several levels of derivation: weir holds "
                              "one pattern per column; fold them into one xs:pattern")
    if patterns:
        decl["pattern"] = check_pattern(path, name, _translate(patterns[0].regexps))
    elif lengths:
        if kind != "str":
            raise SchemaFileError(path, name, "has a length facet on a non-text type: weir cannot check it")
        low = lengths.get("length", lengths.get("minLength"))
        high = lengths.get("length", lengths.get("maxLength"))
        decl["pattern"] = check_pattern(path, name, length_pattern(low, high))
    return decl


def _translate(regexps: list[str]) -> str:
    """XSD patterns of one restriction (any may match), as one anchored regular expression."""
    from elementpath.regex import translate_pattern

    parts = []
    for regexp in regexps:
        text = translate_pattern(regexp, xsd_version="1.0")
        # the translation anchors with `^(...)$(?!\n\Z)` for Python; weir's patterns run in polars, whose
        # `$` already means the very end and which has no lookaround
        suffix = "$(?!\\n\\Z)"
        if text.startswith("^") and text.endswith(suffix):
            text = text[1:-len(suffix)]
        parts.append(text)
    return "^(?:" + "|".join(parts) + ")$"


def _value(kind: str, value: Any) -> Any:
    if kind == "int":
        return int(value)
    if kind.startswith("decimal"):
        return decimal_text(value)
    if kind == "float":
        return float(value)
    if kind == "bool":
        return bool(value)
    return str(value)


def _bound(path: Path, name: str, kind: str, value: Any, step: int) -> Any:
    """An inclusive bound from an XSD bound; `step` +1/-1 makes an exclusive one inclusive."""
    if step == 0:
        return _value(kind, value)
    if kind == "int":
        return int(value) + step
    if kind.startswith("decimal"):
        scale = int(kind[:-1].split(",")[1])
        return decimal_text(Decimal(str(value)) + step * Decimal(step_of_scale(scale)))
    raise SchemaFileError(path, name, f"has an exclusive bound on a {kind} column: weir's min and max are "
                          "inclusive; use minInclusive/maxInclusive")


def _order(kind: str) -> Any:
    if kind == "int":
        return int
    if kind.startswith("decimal") or kind == "float":
        return Decimal
    return str  # ISO 8601 dates and times of one shape sort as text
