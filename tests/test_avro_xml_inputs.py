"""Avro container files and XML files read into polars frames and bad rows.

Avro: files written by fastavro (the reference implementation weir does not write itself) read back to the
values written and to the values fastavro's own reader returns, then typed by weir's casts with the columns
the same schema maps to. XML: weir's rows, typed by weir's casts, agree with xmlschema's own decoding of the
document against its XSD, and the rows xmlschema finds invalid are exactly weir's bad rows.
"""

from __future__ import annotations

import datetime as dt
import json
import textwrap
from decimal import Decimal
from pathlib import Path

import fastavro
import polars as pl
import pytest
from helpers_schemas import RIDES_XSD

from runner.io.avro_reader import read_avro
from runner.io.casts import TYPED, cast_frame, column_rules, plan_casts
from runner.io.rejects import WHERE, UnreadableFile
from runner.io.xml_reader import read_xml
from runner.model.columns import Column
from runner.model.schemafiles.avro import columns_from_avro
from runner.model.schemafiles.xsd import columns_from_xsd

UTC = dt.UTC


def weir_cast(frame: pl.DataFrame, decls: dict) -> tuple[pl.DataFrame, pl.Series]:
    """`frame` through weir's casts for the declared columns: the typed values, and which rows break a
    rule (the cast itself, nullable, values, bounds, pattern)."""
    columns = {name: Column.model_validate(decl) for name, decl in decls.items()}
    typed = cast_frame(frame, plan_casts(columns, frame.schema, "UTC"))
    rules = [r for name in columns for r in column_rules(name, columns[name], frame.schema[name], "UTC")]
    broken = (typed.select(pl.any_horizontal([r.bad for r in rules]).fill_null(False)).to_series() if rules
              else pl.Series([False] * typed.height))
    return typed.select(pl.col(TYPED + name).alias(name) for name in columns), broken


def weir_typed(frame: pl.DataFrame, decls: dict) -> pl.DataFrame:
    """The typed values of `frame`, which must break no rule."""
    typed, broken = weir_cast(frame, decls)
    assert not broken.any(), typed.filter(broken)
    return typed


# ---------------------------------------------------------------- Avro

# the Avro specification's logical types (1.11/1.12, "Logical Types"); decimal's schema is the spec's example
SPEC_FIELDS = [
    {"name": "ride_id", "type": {"type": "string", "logicalType": "uuid"}},
    {"name": "docks", "type": "int"},
    {"name": "meters", "type": "long"},
    {"name": "km", "type": "double"},
    {"name": "speed", "type": "float"},
    {"name": "electric", "type": "boolean"},
    {"name": "zone", "type": ["null", "string"]},
    {"name": "fare", "type": {"type": "enum", "name": "Fare", "symbols": ["member", "casual"]}},
    {"name": "amount", "type": {"type": "bytes", "logicalType": "decimal", "precision": 4, "scale": 2}},
    {"name": "deposit", "type": {"type": "fixed", "name": "Money", "size": 8, "logicalType": "decimal",
                                 "precision": 12, "scale": 3}},
    {"name": "day", "type": {"type": "int", "logicalType": "date"}},
    {"name": "started_at", "type": {"type": "long", "logicalType": "timestamp-millis"}},
    {"name": "ended_at", "type": {"type": "long", "logicalType": "timestamp-micros"}},
    {"name": "logged_local", "type": {"type": "long", "logicalType": "local-timestamp-millis"}},
]
SCHEMA = {"type": "record", "name": "Ride", "namespace": "bikes", "fields": SPEC_FIELDS}


def spec_records(n: int) -> list[dict]:
    start = dt.datetime(2026, 3, 29, 0, 59, 59, 999000, tzinfo=UTC)  # the hour Lisbon springs forward
    return [{
        "ride_id": f"00000000-0000-4000-8000-{i:012d}",
        "docks": [-(2**31), 0, 2**31 - 1][i % 3],
        "meters": 2**40 + i,
        "km": 1.25 * i,
        "speed": 0.5 * i,  # exact in 32 bits
        "electric": i % 2 == 0,
        "zone": None if i % 4 == 0 else f"zone-{i % 3}",
        "fare": ["member", "casual"][i % 2],
        "amount": Decimal(i % 10000 - 5000).scaleb(-2),  # -50.00 .. 49.99 fit decimal(4,2)
        "deposit": Decimal("-123456789.123") + i,
        "day": dt.date(1969, 12, 31) + dt.timedelta(days=i),
        "started_at": start + dt.timedelta(milliseconds=i),
        "ended_at": start + dt.timedelta(microseconds=7 * i),
        "logged_local": dt.datetime(2026, 10, 25, 1, 30) + dt.timedelta(milliseconds=i),
    } for i in range(n)]


def write_avro(path: Path, records: list[dict], schema: dict = SCHEMA, **options) -> Path:
    with open(path, "wb") as fh:
        fastavro.writer(fh, fastavro.parse_schema(schema), records, **options)
    return path


@pytest.mark.parametrize("codec", ["null", "deflate"])
def test_avro_files_written_by_fastavro_read_back_to_the_values_written(tmp_path, codec):
    records = spec_records(2500)
    path = write_avro(tmp_path / "rides.avro", records, codec=codec, sync_interval=4000)
    with open(path, "rb") as fh:
        reference = list(fastavro.reader(fh))  # fastavro's own decoding of its logical types
    rows = read_avro(path)
    assert rows.rejects.height == 0
    got = rows.frame.to_dicts()
    for mine, theirs, written in zip(got, reference, records, strict=True):
        theirs = {**theirs, "ride_id": str(theirs["ride_id"])}  # fastavro returns uuid.UUID objects
        assert mine == theirs == written
    assert rows.frame.schema["amount"] == pl.Decimal(4, 2)
    assert rows.frame.schema["started_at"] == pl.Datetime("us", "UTC")
    assert rows.frame.schema["logged_local"] == pl.Datetime("us", None)
    assert rows.frame.schema["docks"] == pl.Int32 and rows.frame.schema["speed"] == pl.Float32


def test_avro_columns_from_the_same_schema_type_the_read_values_through_weirs_casts(tmp_path):
    records = spec_records(300)
    path = write_avro(tmp_path / "rides.avro", records)
    avsc = tmp_path / "ride.avsc"
    avsc.write_text(json.dumps(SCHEMA))
    decls = columns_from_avro(avsc)
    typed = weir_typed(read_avro(path).frame, decls)
    assert typed.to_dicts() == records  # e.g. amount Decimal("-50.00"), started_at an aware UTC instant
    assert typed.schema["started_at"] == pl.Datetime("us", "UTC")
    assert typed.schema["docks"] == pl.Int64


def test_avro_values_weir_cannot_hold_are_bad_rows_with_file_record_and_reason(tmp_path):
    fields = [{"name": "n", "type": "long"},
              {"name": "amount", "type": {"type": "bytes", "logicalType": "decimal", "precision": 4, "scale": 2}},
              {"name": "at", "type": {"type": "long", "logicalType": "timestamp-millis"}},
              {"name": "clock", "type": {"type": "int", "logicalType": "time-millis"}}]
    schema = {"type": "record", "name": "R", "fields": fields}
    records = []
    for i in range(1, 9001):
        unscaled = 123456 if i == 7777 else 1234  # 1234.56 has six digits: more than precision 4 (spec)
        at = 2**62 if i == 8000 else i  # ms since the epoch beyond what microseconds in 64 bits hold
        clock = 86_400_000 if i == 8000 else 1000  # a time-millis value is below one day (spec)
        # fastavro writes the underlying bytes as given; weir must judge them
        records.append({"n": i, "amount": unscaled.to_bytes(4, "big", signed=True), "at": at, "clock": clock})
    path = write_avro(tmp_path / "r.avro", records, schema=schema, sync_interval=500)
    rows = read_avro(path, label="landing/r.avro")
    assert rows.frame.height == 8998 and 7777 not in rows.frame["n"] and 8000 not in rows.frame["n"]
    bad = rows.rejects.to_dicts()
    assert [r["source_row"] for r in bad] == [7777, 8000]  # record numbers run on across blocks
    assert list(rows.rejects.columns[:3]) == list(WHERE)
    assert bad[0]["source_file"] == "landing/r.avro"
    assert bad[0]["reason"] == "amount: more digits than decimal(4,2) holds"
    assert bad[0]["amount"] == "1234.56" and bad[0]["n"] == "7777"
    assert bad[1]["reason"].startswith("at: timestamp-millis value outside") and "clock:" in bad[1]["reason"]
    assert bad[1]["at"] == str(2**62)
    assert rows.frame["amount"][0] == Decimal("12.34")


def test_avro_field_weir_cannot_read_fails_only_when_it_is_read(tmp_path):
    schema = {"type": "record", "name": "R", "fields": [
        {"name": "n", "type": "int"}, {"name": "extras", "type": {"type": "map", "values": "int"}}]}
    path = write_avro(tmp_path / "m.avro", [{"n": 1, "extras": {"a": 1}}, {"n": 2, "extras": {}}], schema=schema)
    assert read_avro(path, columns=["n"]).frame["n"].to_list() == [1, 2]
    with pytest.raises(UnreadableFile, match=r"m.avro: field extras: is a map"):
        read_avro(path)


def test_avro_file_that_is_not_avro_or_is_cut_short_raises_naming_the_file(tmp_path):
    junk = tmp_path / "junk.avro"
    junk.write_text("ride_id,zone\nR1,north\n")
    with pytest.raises(UnreadableFile, match=r"^landing/junk.avro: not an Avro container file"):
        read_avro(junk, label="landing/junk.avro")
    whole = write_avro(tmp_path / "whole.avro", spec_records(3000), sync_interval=2000).read_bytes()
    cut = tmp_path / "cut.avro"
    cut.write_bytes(whole[: len(whole) * 2 // 3])
    with pytest.raises(UnreadableFile, match=r"cut.avro: damaged from record \d+ on"):
        read_avro(cut)


def test_avro_timestamp_nanos_reads_exactly_and_weir_keeps_microseconds(tmp_path):
    # timestamp-nanos (Avro 1.12) is a long of nanoseconds since the epoch; fastavro writes the long as given
    schema = {"type": "record", "name": "R", "fields": [
        {"name": "at", "type": {"type": "long", "logicalType": "timestamp-nanos"}}]}
    nanos = 1_774_747_800_123_456_789  # 2026-03-29T01:30:00.123456789Z
    path = write_avro(tmp_path / "n.avro", [{"at": nanos}], schema=schema)
    frame = read_avro(path).frame
    assert frame.schema["at"] == pl.Datetime("ns", "UTC")
    assert frame["at"].cast(pl.Int64).to_list() == [nanos]
    typed = weir_typed(frame, {"at": {"type": "datetime(UTC)"}})
    assert typed["at"].to_list() == [dt.datetime(2026, 3, 29, 1, 30, 0, 123456, tzinfo=UTC)]


def test_avro_file_without_records_has_the_columns_of_its_schema(tmp_path):
    path = write_avro(tmp_path / "empty.avro", [])
    rows = read_avro(path)
    assert rows.frame.height == 0 and rows.frame.schema["day"] == pl.Date
    assert rows.rejects.height == 0 and rows.rejects.columns[:3] == list(WHERE)


# ---------------------------------------------------------------- XML

GOOD_RIDES = [
    '<ride id="R0000001"><started_at>2026-03-29T00:30:00Z</started_at><zone> north side </zone><fare>member</fare>'
    '<amount>1.50</amount><day>2026-03-29</day><docks>3</docks><electric>true</electric><km>2.5</km><card>4242</card></ride>',
    '<ride id="R0000002"><started_at> 2026-03-29T02:30:00+01:00 </started_at><fare>casual</fare>'
    '<amount>+12</amount><day xsi:nil="true"/><docks>65535</docks><electric>0</electric><km>1E3</km><voucher>7</voucher></ride>',
    '<ride id="R0000003"><started_at>2026-03-29T03:00:00.250</started_at><zone></zone><fare>member</fare>'
    '<amount>7.500</amount><day>2026-03-30</day><docks>0</docks><electric>1</electric><km>INF</km><card> 99 </card></ride>',
]
BAD_RIDES = [
    # docks above unsignedShort's 65535; the fare outside the enumeration; a bad id and three decimal places
    '<ride id="R0000004"><started_at>2026-03-29T04:00:00Z</started_at><fare>member</fare>'
    '<amount>1</amount><day>2026-03-29</day><docks>70000</docks><electric>true</electric><km>1</km><card>1</card></ride>',
    '<ride id="bad"><started_at>2026-03-29T04:00:00Z</started_at><fare>guest</fare>'
    '<amount>2.555</amount><day>2026-03-29</day><docks>1</docks><electric>true</electric><km>1</km><card>1</card></ride>',
]


def write_xml(path: Path, rides: list[str], header: str = "<exported>2026-03-30T00:00:00Z</exported>") -> Path:
    body = "\n  ".join(rides)
    path.write_text(f'<?xml version="1.0"?>\n<rides xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">\n'
                    f"  {header}\n  {body}\n</rides>\n")
    return path


@pytest.fixture
def xsd(tmp_path) -> Path:
    path = tmp_path / "rides.xsd"
    path.write_text(textwrap.dedent(RIDES_XSD).lstrip())
    return path


def test_xml_rows_typed_by_weirs_casts_agree_with_xmlschemas_own_decoding(tmp_path, xsd):
    import xmlschema

    path = write_xml(tmp_path / "rides.xml", GOOD_RIDES)
    rows = read_xml(path, xsd, "ride")
    assert rows.rejects.height == 0 and rows.frame.height == 3
    assert set(rows.frame.schema.dtypes()) == {pl.String}  # text, cast by weir like CSV
    typed = weir_typed(rows.frame, columns_from_xsd(xsd, "ride")).to_dicts()
    decoded = xmlschema.XMLSchema10(str(xsd)).to_dict(str(path), decimal_type=Decimal)["ride"]
    for mine, theirs in zip(typed, decoded, strict=True):
        assert mine["id"] == theirs["@id"]
        assert mine["fare"] == theirs["fare"] and mine["zone"] == theirs.get("zone")  # empty is null in both
        assert mine["amount"] == theirs["amount"]  # Decimal('1.50') == Decimal('1.5')
        assert mine["docks"] == theirs["docks"] and mine["electric"] == theirs["electric"]
        assert mine["km"] == theirs["km"]  # 1E3 and INF are xs:double lexical forms (XSD 1.0 part 2, 3.2.5)
        day = theirs["day"] if isinstance(theirs["day"], str) else None  # xsi:nil decodes to a dict of attributes
        assert mine["day"] == (dt.date.fromisoformat(day) if day else None)
        # a plain weir datetime holds an instant with an offset as its UTC wall time; Python's ISO 8601
        # reader is the reference for the text xmlschema returns
        instant = dt.datetime.fromisoformat(theirs["started_at"].strip())
        if instant.tzinfo is not None:
            instant = instant.astimezone(UTC).replace(tzinfo=None)
        assert mine["started_at"] == instant
    assert typed[0]["zone"] == " north side "  # xs:string keeps its blanks
    assert typed[2]["amount"] == Decimal("7.5")


def test_xml_rows_xmlschema_finds_invalid_are_exactly_the_bad_rows(tmp_path, xsd):
    import xmlschema

    path = write_xml(tmp_path / "rides.xml", [GOOD_RIDES[0], BAD_RIDES[0], GOOD_RIDES[1], BAD_RIDES[1], "<extra/>"])
    rows = read_xml(path, xsd, "ride", label="landing/rides.xml")
    schema = xmlschema.XMLSchema10(str(xsd))
    invalid = sorted({int(e.path.split("[")[1].split("]")[0]) for e in schema.iter_errors(str(path))
                      if e.path.startswith("/rides/ride[")})  # xmlschema's own list of invalid rides
    assert invalid == [2, 4]  # the second and fourth ride
    # positions count the root's children from 1: the header is 1, the rides 2-5, <extra/> 6
    assert rows.rejects["source_row"].to_list() == [3, 5, 6]
    assert rows.frame["id"].to_list() == ["R0000001", "R0000002"]
    reasons = rows.rejects["reason"].to_list()
    assert reasons[0].startswith("docks: ")
    assert "attribute id='bad'" in reasons[1] and "fare: " in reasons[1] and "amount: " in reasons[1]
    assert reasons[2].startswith("extra: Unexpected child")
    assert rows.rejects.columns == [*WHERE, *rows.frame.columns]
    assert rows.rejects.row(0, named=True)["docks"] == "70000"
    assert set(rows.rejects["source_file"]) == {"landing/rides.xml"}


def test_xml_decimal_written_with_more_places_than_its_scale_but_the_same_value_is_not_a_bad_value(tmp_path, xsd):
    """XSD's fractionDigits limits the value, so 7.500 is valid for two places; weir's decimal cast counts
    written places, so the reader drops trailing zeros (XML Schema 1.0 part 2, section 4.3.12)."""
    path = write_xml(tmp_path / "rides.xml", [GOOD_RIDES[2]])
    rows = read_xml(path, xsd, "ride")
    assert rows.frame["amount"].to_list() == ["7.5"]
    assert weir_typed(rows.frame, columns_from_xsd(xsd, "ride"))["amount"].to_list() == [Decimal("7.50")]


@pytest.mark.parametrize(("text", "said"), [
    ("<rides><ride", "not well-formed XML"),
    ('<?xml version="1.0"?><trips/>', "the root element is trips, not rides"),
    ('<?xml version="1.0"?><rides/>', "does not match rides.xsd"),  # the header element is missing
    ('<?xml version="1.0"?><!DOCTYPE rides [<!ENTITY z "north">]><rides><exported>2026-03-30T00:00:00Z'
     "</exported></rides>", "not well-formed XML"),  # entities and DTDs are refused outright
])
def test_xml_file_that_cannot_be_read_as_rows_raises_naming_the_file(tmp_path, xsd, text, said):
    path = tmp_path / "rides.xml"
    path.write_text(text)
    with pytest.raises(UnreadableFile) as caught:
        read_xml(path, xsd, "ride", label="landing/rides.xml")
    assert str(caught.value).startswith("landing/rides.xml: ") and said in str(caught.value)


def test_xml_with_a_namespace_and_a_referenced_row_element_reads_by_local_names(tmp_path):
    xsd = tmp_path / "ns.xsd"
    xsd.write_text(textwrap.dedent("""
        <xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema" targetNamespace="urn:bikes" xmlns="urn:bikes"
                   elementFormDefault="qualified">
          <xs:element name="docks"><xs:complexType><xs:sequence>
            <xs:element ref="dock" maxOccurs="unbounded"/>
          </xs:sequence></xs:complexType></xs:element>
          <xs:element name="dock"><xs:complexType><xs:sequence>
            <xs:element name="bikes" type="xs:int"/>
          </xs:sequence><xs:attribute name="name" type="xs:string" use="required"/></xs:complexType></xs:element>
        </xs:schema>
    """).lstrip())
    doc = tmp_path / "docks.xml"
    doc.write_text('<docks xmlns="urn:bikes"><dock name="Praça"><bikes>4</bikes></dock>'
                   '<dock name="Cais"><bikes>x</bikes></dock></docks>')
    rows = read_xml(doc, xsd, "docks")
    assert rows.frame.to_dicts() == [{"name": "Praça", "bikes": "4"}]
    assert rows.rejects["source_row"].to_list() == [2] and rows.rejects["reason"][0].startswith("bikes: ")


@pytest.mark.parametrize(("element", "value"), [
    ("day", "2026-03-29Z"),  # xs:date may carry a zone (XSD 1.0 part 2, 3.2.9); weir's dates have none
    ("started_at", "2026-03-29T24:00:00"),  # 24:00:00 is the end of a day in xs:dateTime (3.2.7)
    ("started_at", "12026-03-29T00:00:00"),  # xs:dateTime years may have more than four digits
])
def test_xml_values_xsd_accepts_but_weirs_casts_do_not_are_bad_values_as_documented(tmp_path, xsd, element, value):
    import xmlschema

    ride = GOOD_RIDES[0].replace("<day>2026-03-29</day>", f"<day>{value}</day>") if element == "day" else \
        GOOD_RIDES[0].replace("<started_at>2026-03-29T00:30:00Z</started_at>", f"<started_at>{value}</started_at>")
    path = write_xml(tmp_path / "rides.xml", [ride])
    assert xmlschema.XMLSchema10(str(xsd)).is_valid(str(path))  # valid for the XSD
    rows = read_xml(path, xsd, "ride")
    assert rows.rejects.height == 0 and rows.frame[element].to_list() == [value]
    typed, broken = weir_cast(rows.frame.select(element), {element: columns_from_xsd(xsd, "ride")[element]})
    assert broken.to_list() == [True] and typed[element].to_list() == [None]
