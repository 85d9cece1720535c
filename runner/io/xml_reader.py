"""XML files validated against their XML Schema -> a polars frame of text columns and bad rows.

Rows follow the rule of `runner.model.schemafiles.xsd`: the repeated element
under the root is a row, its attributes and child elements are its columns
(by local name, in declaration order). The document is parsed by xmlschema
with entities and DTDs refused (`defuse="always"`) and local files only, and
validated against the XSD with xmlschema (`iter_errors`).

Columns are text, like CSV columns, and weir's casts read them strictly:
values are whitespace-normalized as their XSD type says (`collapse` for every
non-string type), an absent element, an empty one or one with `xsi:nil="true"`
is null (as xmlschema decodes them), and a decimal's trailing zeros after the
point are dropped (`1.500` is `1.5`: XSD's `fractionDigits` limits the value,
not how it is written, while weir's decimal cast counts the written places).

A row (or any other child of the root) that breaks the XSD is a bad row:
`source_row` is its position among the root's child elements, from 1, and
`reason` lists what xmlschema found, each prefixed by the attribute or child
it concerns. A file that is not well-formed XML, whose root is not the
schema's root, or that breaks the XSD outside any row (the root's own
attributes, too few rows) raises `UnreadableFile` naming the file.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from runner.io.rejects import Rows, UnreadableFile, rejects_frame

XSI_NIL = "{http://www.w3.org/2001/XMLSchema-instance}nil"


def read_xml(path: str | Path, xsd: str | Path, element: str, label: str | None = None) -> Rows:
    """The rows of one XML file; `xsd` and `element` as for `columns_from_xsd`, `label` names the file
    in rejects and errors (the path when None). A bad XSD raises SchemaFileError, naming the XSD."""
    import xmlschema

    from runner.model.schemafiles.xsd import load_schema, row_shape

    path, xsd = Path(path), Path(xsd)
    label = label or str(path)
    schema = load_schema(xsd)
    shape = row_shape(xsd, schema, element)
    try:
        resource = xmlschema.XMLResource(str(path), allow="local", defuse="always")
    except (xmlschema.XMLResourceError, OSError, SyntaxError, ValueError) as exc:
        raise UnreadableFile(f"{label}: not well-formed XML: {_first_line(exc)}") from None
    root = resource.root
    if root.tag != shape.root.name:
        raise UnreadableFile(f"{label}: the root element is {_local(root.tag)}, not {shape.root.local_name} "
                             f"(the root {xsd.name} declares)")
    children = list(root)
    owner = {id(e): i for i, child in enumerate(children) for e in child.iter()}
    reasons: dict[int, list[str]] = {}
    for error in schema.iter_errors(resource):
        elem = getattr(error, "elem", None)
        if elem is root:
            index = getattr(error, "index", None)
            if isinstance(index, int) and 0 <= index < len(children):
                reasons.setdefault(index, []).append(f"{_local(children[index].tag)}: {error.reason}")
                continue
        number = owner.get(id(elem)) if elem is not None else None
        if elem is None or number is None:
            raise UnreadableFile(f"{label}: does not match {xsd.name}: {error.reason or error}")
        where = "" if elem is children[number] else f"{_local(elem.tag)}: "
        reasons.setdefault(number, []).append(where + str(error.reason))
    names = list(shape.columns)
    good: dict[str, list[str | None]] = {name: [] for name in names}
    bad: dict[str, list[str | None]] = {name: [] for name in names}
    bad_numbers, bad_reasons = [], []
    for number, child in enumerate(children):
        if number not in reasons and child.tag != shape.row.name:
            continue  # a valid child of the root that is not a row (a header, say)
        target = good
        if number in reasons:
            target = bad
            bad_numbers.append(number + 1)
            bad_reasons.append("; ".join(reasons[number]))
        for name, value in _values(shape, child).items():
            target[name].append(value)
    decimals = [name for name, decl in shape.columns.items() if decl["type"].startswith("decimal")]
    frame = _frame(good, decimals)
    rejects = rejects_frame(label, bad_numbers, bad_reasons, _frame(bad, decimals))
    return Rows(frame, rejects)


def _values(shape: Any, row: Any) -> dict[str, str | None]:
    """One row element's columns as normalized text (None where absent, empty or nil)."""
    out: dict[str, str | None] = {}
    for name, attribute in shape.attributes.items():
        text = row.get(attribute.name)
        out[name] = attribute.type.normalize(text) or None if text is not None else None
    for name, decl in shape.children.items():
        child = row.find(decl.name)
        if child is None or child.get(XSI_NIL) in ("true", "1"):
            out[name] = None
        else:
            out[name] = decl.type.normalize(child.text or "") or None
    return out


def _frame(values: dict[str, list[str | None]], decimals: list[str]) -> Any:
    import polars as pl

    frame = pl.DataFrame({name: pl.Series(name, v, dtype=pl.String) for name, v in values.items()})
    # 1.500 -> 1.5, 2.0 -> 2: the same value, written with the places weir's decimal cast counts
    return frame.with_columns(
        pl.col(c).str.replace(r"^([+-]?\d*\.\d*?)0+$", "${1}").str.replace(r"^([+-]?\d*)\.$", "${1}")
        .str.replace(r"^([+-]?)$", "${1}0")
        for c in decimals
    )


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__
