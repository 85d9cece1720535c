"""Avro container files (`.avro`) -> a typed polars frame and bad rows.

fastavro reads the container (header, codecs, blocks, sync markers) and
decodes each record's binary encoding; weir then converts the logical types
itself, a column at a time in polars, from their underlying values. Polars'
own `read_avro` is about ten times faster but was not used: measured with
polars 2.1, it returns a `decimal` value with more digits than its declared
precision as if it fitted, and stops the whole file, without naming a record,
on a map field (even one not read), a union other than with null, a
`duration`, or a timestamp beyond its range. fastavro's own logical-type
conversion stops the whole file too on a date or time past year 9999.
Converting from the underlying values, a value weir cannot hold is a bad row
of its own, with its record number.

Columns have the polars type of the Avro type (int -> Int32, long -> Int64,
float -> Float32, `decimal(P,S)` -> Decimal(P,S), `timestamp-millis` and
`-micros` -> Datetime(us, UTC), `-nanos` -> Datetime(ns, UTC), `local-`
timestamps without a zone, `date` -> Date, `time-*` -> Time, enums and
`uuid` -> String, bytes and fixed -> Binary); weir's casts take them from
there, as from Parquet. Bad records: a decimal with more digits than its
precision, a timestamp or time of day outside what weir can hold. A file that
is not Avro, or whose blocks are damaged, raises `UnreadableFile` naming the
file and the first record that could not be read.
"""

from __future__ import annotations

import json
import uuid
from decimal import Decimal
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from runner.io.rejects import Rows, UnreadableFile, rejects_frame

if TYPE_CHECKING:
    import polars as pl

    from runner.model.schemafiles.avro import AvroField

_I64 = (1 << 63) - 1


def read_avro(path: str | Path, columns: list[str] | None = None, label: str | None = None) -> Rows:
    """The records of one Avro container file; `columns` limits the fields read (all when None),
    `label` names the file in rejects and errors (the path when None)."""
    import fastavro
    import polars as pl

    from runner.model.schemafiles import SchemaFileError
    from runner.model.schemafiles.avro import MAX_PRECISION, avro_field

    path = Path(path)
    label = label or str(path)
    try:
        fh = open(path, "rb")  # noqa: SIM115 - closed below, after the blocks are read
    except OSError as exc:
        raise UnreadableFile(f"{label}: cannot read: {exc.strerror or exc}") from None
    with fh:
        try:
            blocks = fastavro.block_reader(fh)
            raw_schema = json.loads(blocks.metadata["avro.schema"])
        except Exception as exc:  # noqa: BLE001 - fastavro raises several types for a bad header
            raise UnreadableFile(f"{label}: not an Avro container file: {exc}") from None
        named: dict[str, Any] = {}
        try:
            schema = fastavro.parse_schema(raw_schema, named_schemas=named)
        except Exception as exc:  # noqa: BLE001
            raise UnreadableFile(f"{label}: its Avro schema is not valid: {exc}") from None
        if not isinstance(schema, dict) or schema.get("type") != "record":
            raise UnreadableFile(f"{label}: its records are not Avro records with fields")
        fields = []
        for entry in schema["fields"]:
            if columns is not None and entry["name"] not in columns:
                continue
            try:
                f = avro_field(path, entry["name"], entry["type"], named)
            except SchemaFileError as exc:
                raise UnreadableFile(f"{label}: field {exc.field}: {exc.message}") from None
            if f.logical == "decimal" and f.precision > MAX_PRECISION:
                raise UnreadableFile(f"{label}: field {f.name}: {f.refusal}")
            fields.append(f)
        values = _decode(fastavro, blocks, fh, raw_schema, [f.name for f in fields], label)
    count = len(values[fields[0].name]) if fields else 0
    converted: dict[str, Any] = {}
    reasons: list[str | None] = [None] * count
    for f in fields:
        series, bad = _convert(f, values[f.name])
        converted[f.name] = series
        for i in bad.arg_true().to_list() if bad is not None else []:
            said = f"{f.name}: {_why(f)}"
            reasons[i] = said if reasons[i] is None else f"{reasons[i]}; {said}"
    frame = pl.DataFrame(list(converted.values()))
    bad = pl.Series([r is not None for r in reasons], dtype=pl.Boolean)
    bad_rows = bad.arg_true().to_list()
    shown = frame.filter(bad)
    for f in fields:
        if f.logical in _CAN_BE_BAD:
            raw = pl.Series(f.name, [_raw_text(f, values[f.name][i]) for i in bad_rows], dtype=pl.String)
            shown = shown.with_columns(pl.col(f.name).cast(pl.String).fill_null(raw))
    rejects = rejects_frame(label, [i + 1 for i in bad_rows], [reasons[i] for i in bad_rows], shown)
    if bad_rows:
        frame = frame.filter(~bad)
    return Rows(frame, rejects)


def _decode(fastavro: Any, blocks: Any, fh: Any, raw_schema: Any, names: list[str], label: str
            ) -> dict[str, list[Any]]:
    """Every record's underlying values, block by block, with logical types left unconverted."""
    writer = fastavro.parse_schema(_underlying(raw_schema))
    values: dict[str, list[Any]] = {name: [] for name in names}
    done = 0
    iterator = iter(blocks)
    while True:
        try:
            block = next(iterator)
        except StopIteration:
            break
        except Exception as exc:  # noqa: BLE001 - damaged block: bad sync marker, codec error, cut short
            raise UnreadableFile(f"{label}: damaged from record {done + 1} on: {exc!r}") from None
        # the block's decompressed bytes, decoded again with logical types taken away
        data = block.bytes_
        data.seek(0)
        for _ in range(block.num_records):
            try:
                record = fastavro.schemaless_reader(data, writer, None)
            except Exception as exc:  # noqa: BLE001
                raise UnreadableFile(f"{label}: record {done + 1} cannot be decoded: {exc!r}") from None
            for name in names:
                values[name].append(record[name])
            done += 1
    return values


def _underlying(schema: Any) -> Any:
    """`schema` with every logicalType removed, so records decode to their underlying values."""
    if isinstance(schema, dict):
        return {k: _underlying(v) for k, v in schema.items() if k != "logicalType"}
    if isinstance(schema, list):
        return [_underlying(v) for v in schema]
    return schema


_BASE = {"int": "Int32", "long": "Int64", "float": "Float32", "double": "Float64", "boolean": "Boolean",
         "string": "String", "enum": "String", "bytes": "Binary", "fixed": "Binary"}
# timestamps as weir holds them: microseconds, except nanoseconds kept as they are
_STAMPS: dict[str, tuple[Literal["ns", "us", "ms"], str | None]] = {"timestamp-millis": ("us", "UTC"), "timestamp-micros": ("us", "UTC"), "timestamp-nanos": ("ns", "UTC"),
           "local-timestamp-millis": ("us", None), "local-timestamp-micros": ("us", None),
           "local-timestamp-nanos": ("ns", None)}
_DAY_MS = 86_400_000
_CAN_BE_BAD = {"decimal", "time-millis", "time-micros", "timestamp-millis", "local-timestamp-millis"}


def _convert(f: AvroField, raw: list[Any]) -> tuple[pl.Series, pl.Series | None]:
    """One column's values as its polars type, and a mask of the values weir cannot hold."""
    import polars as pl

    logical = f.logical
    if logical == "decimal":
        unscaled = [None if b is None else int.from_bytes(b, "big", signed=True) for b in raw]
        limit = 10 ** f.precision
        bad = pl.Series([n is not None and not -limit < n < limit for n in unscaled], dtype=pl.Boolean)
        numbers = [None if n is None or not -limit < n < limit else Decimal(n).scaleb(-f.scale) for n in unscaled]
        return pl.Series(f.name, numbers, dtype=pl.Decimal(f.precision, f.scale)), bad
    if logical == "uuid" and f.base == "fixed":
        return pl.Series(f.name, [None if b is None else str(uuid.UUID(bytes=b)) for b in raw], dtype=pl.String), None
    base = pl.Series(f.name, raw, dtype=getattr(pl, _BASE[f.base]))
    if logical == "date":
        return base.cast(pl.Date), None
    if logical in ("time-millis", "time-micros"):
        per_day = _DAY_MS if logical == "time-millis" else _DAY_MS * 1000
        to_ns = 1_000_000 if logical == "time-millis" else 1_000
        bad = ((base < 0) | (base >= per_day)).fill_null(False)
        good = pl.when(~bad).then(base.cast(pl.Int64) * to_ns)
        return pl.select(good.cast(pl.Time).alias(f.name)).to_series(), bad
    if logical in _STAMPS:
        unit, tz = _STAMPS[logical]
        if logical.endswith("millis"):
            bad = ((base > _I64 // 1000) | (base < -(_I64 // 1000))).fill_null(False)
            micros = pl.select(pl.when(~bad).then(base * 1000).alias(f.name)).to_series()
            return micros.cast(pl.Datetime(unit, tz)), bad
        return base.cast(pl.Datetime(unit, tz)), None
    return base, None


def _why(f: AvroField) -> str:
    if f.logical == "decimal":
        return f"more digits than decimal({f.precision},{f.scale}) holds"
    if f.logical in ("time-millis", "time-micros"):
        return f"{f.logical} value outside one day"
    return f"{f.logical} value outside the microsecond range weir holds"


def _raw_text(f: AvroField, value: Any) -> str | None:
    """A value that could not be converted, as text (a decimal's exact value, a number as stored)."""
    if value is None:
        return None
    if f.logical == "decimal":
        return format(Decimal(int.from_bytes(value, "big", signed=True)).scaleb(-f.scale), "f")
    return str(value)
