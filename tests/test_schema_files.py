"""Schema files mapped to weir columns: Avro (.avsc), Protocol Buffers (.proto), XML Schema (.xsd), JSON Schema.

Each mapping is checked against the format's own definition and library: the Avro specification's
types (parsed by fastavro), the descriptor protoc itself writes, xmlschema's validation of the same
values, the jsonschema library's verdicts on the same values. Every mapped column must also pass the job
file's own `Column` model, as a typed-in `schema:` entry would.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import polars as pl
import pytest
import yaml
from helpers_schemas import RIDES_XSD

from runner.model.columns import Column
from runner.model.schemafiles import (
    SchemaFileError,
    columns_text,
    digest_input,
    read_schema_file,
    refine,
)
from runner.model.schemafiles.avro import columns_from_avro
from runner.model.schemafiles.jsonschema import columns_from_jsonschema
from runner.model.schemafiles.proto import columns_from_proto
from runner.model.schemafiles.xsd import columns_from_xsd


def write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text).lstrip())
    return path


def avsc(tmp_path: Path, *fields: dict, name: str = "ride.avsc") -> Path:
    schema = {"type": "record", "name": "Ride", "namespace": "bikes", "fields": list(fields)}
    return write(tmp_path / name, json.dumps(schema))


def valid_columns(columns: dict) -> dict:
    """Every mapped column passes the job file's Column model unchanged."""
    for name, decl in columns.items():
        column = Column.model_validate(decl)
        assert column.type == decl["type"], name
    return columns


def matches(pattern: str, values: list[str]) -> list[bool]:
    """Whether weir's pattern rule accepts each value (it runs in polars: `str.contains`)."""
    return pl.Series(values, dtype=pl.String).str.contains(pattern).to_list()


# ---------------------------------------------------------------- Avro


def test_avro_spec_examples_of_decimal_date_and_timestamp_millis_map_to_weir_types(tmp_path):
    # the three schemas are the Avro specification's own (1.11 and 1.12, "Logical Types": decimal's
    # example verbatim; date annotates an int, timestamp-millis a long), quoted from memory of the spec
    path = avsc(tmp_path,
                {"name": "amount", "type": {"type": "bytes", "logicalType": "decimal", "precision": 4, "scale": 2}},
                {"name": "day", "type": {"type": "int", "logicalType": "date"}},
                {"name": "started_at", "type": {"type": "long", "logicalType": "timestamp-millis"}})
    columns = valid_columns(columns_from_avro(path))
    assert columns == {
        "amount": {"type": "decimal(4,2)", "nullable": False},
        "day": {"type": "date", "nullable": False},
        "started_at": {"type": "datetime(UTC)", "nullable": False},  # an instant on the global timeline (spec)
    }


def test_avro_primitives_unions_with_null_enums_and_local_timestamps_map_as_documented(tmp_path):
    path = avsc(tmp_path,
                {"name": "docks", "type": "int"},
                {"name": "meters", "type": "long"},
                {"name": "speed", "type": "float"},
                {"name": "km", "type": "double"},
                {"name": "electric", "type": "boolean"},
                {"name": "zone", "type": ["null", "string"]},
                {"name": "fare", "type": {"type": "enum", "name": "Fare", "symbols": ["member", "casual"]}},
                {"name": "fare_again", "type": ["bikes.Fare", "null"]},
                {"name": "ended_local", "type": {"type": "long", "logicalType": "local-timestamp-micros"}},
                {"name": "ride_id", "type": {"type": "string", "logicalType": "uuid"}},
                {"name": "label", "type": {"type": "string", "logicalType": "not-a-logical-type"}})
    columns = valid_columns(columns_from_avro(path))
    # Avro int is 32-bit two's complement, long 64-bit (spec, "Primitive Types")
    assert columns["docks"] == {"type": "int", "nullable": False, "min": -(2**31), "max": 2**31 - 1}
    assert columns["meters"] == {"type": "int", "nullable": False}
    assert columns["speed"]["type"] == columns["km"]["type"] == "float"
    assert columns["electric"] == {"type": "bool", "nullable": False}
    assert columns["zone"] == {"type": "str", "nullable": True}
    assert columns["fare"] == {"type": "str", "nullable": False, "values": ["member", "casual"]}
    assert columns["fare_again"] == {"type": "str", "nullable": True, "values": ["member", "casual"]}
    assert columns["ended_local"] == {"type": "datetime", "nullable": False}
    # an unknown logical type is read as its underlying type (spec: "must ignore unknown logical types")
    assert columns["label"] == {"type": "str", "nullable": False}
    # the uuid pattern accepts RFC 9562's example UUID and nothing shorter
    assert matches(columns["ride_id"]["pattern"], ["f81d4fae-7dec-11d0-a765-00a0c91e6bf6", "f81d4fae"]) == [
        True, False]


@pytest.mark.parametrize(("field", "said"), [
    ({"name": "dock", "type": {"type": "record", "name": "Dock", "fields": [{"name": "id", "type": "int"}]}},
     "nested record"),
    ({"name": "tags", "type": {"type": "array", "items": "string"}}, "repeated"),
    ({"name": "extras", "type": {"type": "map", "values": "long"}}, "repeated"),
    ({"name": "either", "type": ["null", "int", "string"]}, "union"),
    ({"name": "blob", "type": "bytes"}, "binary"),
    ({"name": "hash", "type": {"type": "fixed", "name": "Hash", "size": 8}}, "binary"),
    ({"name": "clock", "type": {"type": "int", "logicalType": "time-millis"}}, "time of day"),
    ({"name": "span", "type": {"type": "fixed", "name": "D", "size": 12, "logicalType": "duration"}}, "duration"),
    ({"name": "wide", "type": {"type": "bytes", "logicalType": "decimal", "precision": 40, "scale": 2}}, "38"),
])
def test_avro_shapes_weir_cannot_hold_are_refused_naming_the_field_and_the_file(tmp_path, field, said):
    path = avsc(tmp_path, {"name": "ok", "type": "int"}, field)
    with pytest.raises(SchemaFileError) as caught:
        columns_from_avro(path)
    assert caught.value.field == field["name"]
    assert caught.value.path == str(path)
    assert said in caught.value.message
    assert str(caught.value).startswith(f"{path}: field {field['name']}: ")


def test_avro_file_that_is_no_record_or_no_schema_is_refused_as_a_whole(tmp_path):
    enum = write(tmp_path / "enum.avsc", json.dumps({"type": "enum", "name": "E", "symbols": ["a"]}))
    broken = write(tmp_path / "broken.avsc", '{"type": "record", "name": "R", "fields": [')
    unknown = write(tmp_path / "unknown.avsc", json.dumps(
        {"type": "record", "name": "R", "fields": [{"name": "a", "type": "Nowhere"}]}))
    for path, said in ((enum, "not a record"), (broken, "JSON"), (unknown, "not a valid Avro schema")):
        with pytest.raises(SchemaFileError) as caught:
            columns_from_avro(path)
        assert caught.value.field == "" and said in caught.value.message


# ---------------------------------------------------------------- Protocol Buffers

RIDE_PROTO = """
    syntax = "proto3";
    package bikes.v1;
    import "google/protobuf/timestamp.proto";
    import "google/protobuf/wrappers.proto";
    enum Fare { FARE_UNSPECIFIED = 0; MEMBER = 1; CASUAL = 2; }
    message Ride {
      string zone_name = 7;
      string ride_id = 1;
      optional string note = 2;
      google.protobuf.Timestamp started_at = 3;
      Fare fare = 4;
      int32 docks = 5;
      uint32 seats = 6;
      uint64 meters = 8;
      sint64 delta = 9;
      double amount = 10;
      bool electric = 11;
      google.protobuf.Int64Value rating = 12;
      oneof paid_with { string card = 13; string voucher = 14; }
    }
"""


def protoc_descriptor(path: Path, message: str):
    """The message's DescriptorProto as protoc itself writes it (a descriptor set, read by protobuf)."""
    from importlib.resources import files

    from google.protobuf import descriptor_pb2

    out = path.parent / "set.pb"
    subprocess.run([sys.executable, "-m", "grpc_tools.protoc", f"-I{path.parent}",
                    f"-I{files('grpc_tools') / '_proto'}", f"--descriptor_set_out={out}", path.name],
                   check=True, cwd=path.parent, timeout=120)
    proto = descriptor_pb2.FileDescriptorSet.FromString(out.read_bytes()).file[0]
    return next(m for m in proto.message_type if m.name == message)


def test_proto_columns_follow_the_descriptor_protoc_writes_names_types_and_optional(tmp_path):
    from google.protobuf.descriptor_pb2 import FieldDescriptorProto as F

    path = write(tmp_path / "ride.proto", RIDE_PROTO)
    columns = valid_columns(columns_from_proto(path, "Ride"))
    described = protoc_descriptor(path, "Ride")
    # the fields in the order they are declared (not by number), by the names protoc records
    assert list(columns) == [f.name for f in described.field]
    assert [f.number for f in described.field][:2] == [7, 1]
    expected_type = {F.TYPE_STRING: "str", F.TYPE_ENUM: "str", F.TYPE_INT32: "int", F.TYPE_UINT32: "int",
                     F.TYPE_UINT64: "int", F.TYPE_SINT64: "int", F.TYPE_DOUBLE: "float", F.TYPE_BOOL: "bool"}
    for f in described.field:
        decl = columns[f.name]
        if f.type == F.TYPE_MESSAGE:
            assert decl["type"] == {".google.protobuf.Timestamp": "datetime(UTC)",
                                    ".google.protobuf.Int64Value": "int"}[f.type_name]
        else:
            assert decl["type"] == expected_type[f.type], f.name
        # nullable exactly where the field has presence: `optional` (proto3_optional), a oneof member
        # or a message-typed field; a plain proto3 scalar always has a value
        has_presence = f.proto3_optional or f.HasField("oneof_index") or f.type == F.TYPE_MESSAGE
        assert decl["nullable"] == has_presence, f.name
    # widths: int32 and uint32 ranges (protobuf language guide, scalar value types)
    assert columns["docks"] == {"type": "int", "nullable": False, "min": -(2**31), "max": 2**31 - 1}
    assert columns["seats"] == {"type": "int", "nullable": False, "min": 0, "max": 2**32 - 1}
    assert columns["meters"] == {"type": "int", "nullable": False, "min": 0}
    assert columns["fare"]["values"] == ["FARE_UNSPECIFIED", "MEMBER", "CASUAL"]


def test_proto_json_names_are_protocs_json_names(tmp_path):
    path = write(tmp_path / "ride.proto", RIDE_PROTO)
    described = protoc_descriptor(path, "Ride")
    columns = columns_from_proto(path, "bikes.v1.Ride", names="json")
    assert list(columns) == [f.json_name for f in described.field]
    assert "zoneName" in columns and "startedAt" in columns


def test_proto_required_in_proto2_is_not_nullable_and_optional_is(tmp_path):
    path = write(tmp_path / "dock.proto", """
        syntax = "proto2";
        message Dock { required int64 dock_id = 1; optional string name = 2; }
    """)
    assert columns_from_proto(path, "Dock") == {"dock_id": {"type": "int", "nullable": False},
                                                 "name": {"type": "str", "nullable": True}}


@pytest.mark.parametrize(("line", "field", "said"), [
    ("repeated string tags = 2;", "tags", "repeated"),
    ("map<string, int32> extras = 2;", "extras", "a map"),
    ("Stop stop = 2;", "stop", "nested message"),
    ("bytes blob = 2;", "blob", "binary"),
    ("google.protobuf.BytesValue blob = 2;", "blob", "binary"),
])
def test_proto_shapes_weir_cannot_hold_are_refused_naming_the_field_its_number_and_the_file(
        tmp_path, line, field, said):
    path = write(tmp_path / "trip.proto", f"""
        syntax = "proto3";
        import "google/protobuf/wrappers.proto";
        message Stop {{ int32 dock = 1; }}
        message Trip {{ int32 id = 1; {line} }}
    """)
    number = next(f.number for f in protoc_descriptor(path, "Trip").field if f.name == field)
    with pytest.raises(SchemaFileError) as caught:
        columns_from_proto(path, "Trip")
    assert (caught.value.field, caught.value.path) == (field, str(path))
    assert f"(number {number})" in caught.value.message and said in caught.value.message


def test_proto_that_protoc_cannot_compile_is_refused_with_protocs_message(tmp_path):
    path = write(tmp_path / "bad.proto", 'syntax = "proto3";\nmessage X { strin a = 1; }\n')
    with pytest.raises(SchemaFileError) as caught:
        columns_from_proto(path, "X")
    assert '"strin" is not defined' in caught.value.message
    with pytest.raises(SchemaFileError, match="no message 'Nope'"):
        columns_from_proto(write(tmp_path / "ok.proto", RIDE_PROTO), "Nope")


def test_proto_digest_covers_the_files_it_imports(tmp_path):
    write(tmp_path / "common.proto", 'syntax = "proto3";\npackage bikes;\nenum Fare { A = 0; B = 1; }\n')
    path = write(tmp_path / "ride.proto", """
        syntax = "proto3";
        package bikes;
        import "common.proto";
        message Ride { Fare fare = 1; }
    """)
    found = read_schema_file(path, "Ride")
    assert [p.name for p in found.sources] == ["ride.proto", "common.proto"]
    before = found.digest_input()
    write(tmp_path / "common.proto", 'syntax = "proto3";\npackage bikes;\nenum Fare { A = 0; B = 1; C = 2; }\n')
    assert digest_input(path, "Ride") != before
    assert read_schema_file(path, "Ride").columns["fare"]["values"] == ["A", "B", "C"]


# ---------------------------------------------------------------- XML Schema

def test_xsd_row_columns_map_as_documented_by_row_or_root_name(tmp_path):
    path = write(tmp_path / "rides.xsd", RIDES_XSD)
    columns = valid_columns(columns_from_xsd(path, "ride"))
    assert columns_from_xsd(path, "rides") == columns  # the root names the same rows
    assert list(columns) == ["id", "station", "started_at", "zone", "fare", "amount", "day", "docks",
                             "electric", "km", "card", "voucher"]
    assert columns["id"]["nullable"] is False and columns["station"]["nullable"] is True
    assert columns["started_at"] == {"type": "datetime", "nullable": False}
    assert columns["zone"] == {"type": "str", "nullable": True}  # minOccurs="0"
    assert columns["fare"] == {"type": "str", "nullable": False, "values": ["member", "casual"]}
    # maxExclusive 500 with two places is at most 499.99
    assert columns["amount"] == {"type": "decimal(10,2)", "nullable": False, "min": "0", "max": "499.99"}
    assert columns["day"] == {"type": "date", "nullable": True}  # nillable="true"
    # unsignedShort is 0..65535, positiveInteger from 1 (XSD 1.0 part 2, sections 3.3.23 and 3.3.25)
    assert columns["docks"] == {"type": "int", "nullable": False, "min": 0, "max": 65535}
    assert columns["voucher"] == {"type": "int", "nullable": True, "min": 1}  # a choice member
    assert columns["card"] == {"type": "str", "nullable": True}
    assert columns["electric"]["type"] == "bool" and columns["km"]["type"] == "float"


def test_xsd_patterns_and_lengths_accept_exactly_what_xmlschema_accepts(tmp_path):
    import xmlschema

    path = write(tmp_path / "rides.xsd", RIDES_XSD)
    columns = columns_from_xsd(path, "ride")
    schema = xmlschema.XMLSchema10(str(path))
    ride = schema.elements["rides"].type.content[1]
    for name, values in (("id", ["R0000001", "R000001", "xR0000001", "R0000001x", "R\u0661234567"]),
                         ("station", ["", "ab", "abcd", "abcde"])):
        xsd_type = ride.attributes[name].type
        expected = [xsd_type.is_valid(v) for v in values]  # xmlschema's own verdict
        assert matches(columns[name]["pattern"], values) == expected, name


@pytest.mark.parametrize(("row", "field", "said"), [
    ('<xs:element name="dock"><xs:complexType><xs:sequence><xs:element name="id" type="xs:int"/>'
     '</xs:sequence></xs:complexType></xs:element>', "dock", "nested element"),
    ('<xs:element name="tag" type="xs:string" maxOccurs="3"/>', "tag", "repeated"),
    ('<xs:element name="tags"><xs:simpleType><xs:list itemType="xs:string"/></xs:simpleType></xs:element>',
     "tags", "a list"),
    ('<xs:element name="price" type="xs:decimal"/>', "price", "fractionDigits"),
    ('<xs:element name="day"><xs:simpleType><xs:restriction base="xs:date">'
     '<xs:minExclusive value="2026-01-01"/></xs:restriction></xs:simpleType></xs:element>', "day", "exclusive"),
    ('<xs:element name="photo" type="xs:base64Binary"/>', "photo", "xs:base64Binary"),
    ('<xs:element name="clock" type="xs:time"/>', "clock", "xs:time"),
    ('<xs:element name="ride-id" type="xs:string"/>', "ride-id", "not a weir column name"),
])
def test_xsd_shapes_weir_cannot_hold_are_refused_naming_the_field_and_the_file(tmp_path, row, field, said):
    path = write(tmp_path / "r.xsd", f"""
        <xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema">
          <xs:element name="rows"><xs:complexType><xs:sequence>
            <xs:element name="row" maxOccurs="unbounded"><xs:complexType><xs:sequence>
              <xs:element name="ok" type="xs:int"/>
              {row}
            </xs:sequence></xs:complexType></xs:element>
          </xs:sequence></xs:complexType></xs:element>
        </xs:schema>
    """)
    with pytest.raises(SchemaFileError) as caught:
        columns_from_xsd(path, "row")
    assert (caught.value.field, caught.value.path) == (field, str(path))
    assert said in caught.value.message


def test_xsd_element_that_names_no_rows_is_refused_listing_the_global_elements(tmp_path):
    path = write(tmp_path / "rides.xsd", RIDES_XSD)
    with pytest.raises(SchemaFileError, match="global elements: rides"):
        columns_from_xsd(path, "zone")


def test_xsd_digest_covers_included_schema_files(tmp_path):
    write(tmp_path / "types.xsd", """
        <xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema">
          <xs:simpleType name="Zone"><xs:restriction base="xs:string">
            <xs:enumeration value="north"/></xs:restriction></xs:simpleType>
        </xs:schema>
    """)
    path = write(tmp_path / "main.xsd", """
        <xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema">
          <xs:include schemaLocation="types.xsd"/>
          <xs:element name="rows"><xs:complexType><xs:sequence>
            <xs:element name="row" maxOccurs="unbounded"><xs:complexType><xs:sequence>
              <xs:element name="zone" type="Zone"/>
            </xs:sequence></xs:complexType></xs:element>
          </xs:sequence></xs:complexType></xs:element>
        </xs:schema>
    """)
    found = read_schema_file(path, "row")
    assert [p.name for p in found.sources] == ["main.xsd", "types.xsd"]
    before = found.digest_input()
    (tmp_path / "types.xsd").write_text((tmp_path / "types.xsd").read_text().replace(
        '<xs:enumeration value="north"/>', '<xs:enumeration value="north"/><xs:enumeration value="south"/>'))
    assert digest_input(path, "row") != before


# ---------------------------------------------------------------- JSON Schema

RIDE_JSON = {
    "$schema": "https://json-schema.org/draft/2020-12/schema",
    "title": "A ride",
    "type": "object",
    "required": ["ride_id", "fare", "amount", "docks"],
    "additionalProperties": False,
    "$defs": {"money": {"type": "number", "multipleOf": 0.01, "minimum": 0}},
    "properties": {
        "ride_id": {"type": "string", "pattern": "^R[0-9]{7}$"},
        "zone": {"type": ["string", "null"], "maxLength": 20},
        "fare": {"enum": ["member", "casual", "day_pass"]},
        "amount": {"$ref": "#/$defs/money", "exclusiveMaximum": 1000},
        "docks": {"type": "integer", "minimum": 0, "exclusiveMaximum": 100},
        "started_at": {"type": "string", "format": "date-time"},
        "day": {"anyOf": [{"type": "string", "format": "date"}, {"type": "null"}]},
        "electric": {"type": "boolean", "description": "an annotation, ignored"},
        "km": {"type": "number", "minimum": 0.5},
        "email": {"type": "string", "format": "email"},
    },
}


def test_jsonschema_required_enum_minimum_and_pattern_map_as_documented(tmp_path):
    path = write(tmp_path / "ride.json", json.dumps(RIDE_JSON))
    columns = valid_columns(columns_from_jsonschema(path))
    assert columns == {
        "ride_id": {"type": "str", "nullable": False, "pattern": "^R[0-9]{7}$"},
        "zone": {"type": "str", "nullable": True, "pattern": "(?s)^.{0,20}$"},
        "fare": {"type": "str", "nullable": False, "values": ["member", "casual", "day_pass"]},
        "amount": {"type": "decimal(38,2)", "nullable": False, "min": "0", "max": "999.99"},
        "docks": {"type": "int", "nullable": False, "min": 0, "max": 99},
        "started_at": {"type": "datetime(UTC)", "nullable": True},  # RFC 3339 date-time has an offset
        "day": {"type": "date", "nullable": True},
        "electric": {"type": "bool", "nullable": True},
        "km": {"type": "float", "nullable": True, "min": 0.5},
        "email": {"type": "str", "nullable": True},  # other formats annotate only
    }


def test_jsonschema_bounds_patterns_and_lengths_agree_with_the_jsonschema_library(tmp_path):
    from jsonschema import Draft202012Validator

    path = write(tmp_path / "ride.json", json.dumps(RIDE_JSON))
    columns = columns_from_jsonschema(path)
    for name, values in (("docks", [-1, 0, 99, 100]), ("amount", [0, 999.99, 1000])):
        checker = Draft202012Validator({"type": "number", **{k: v for k, v in RIDE_JSON["properties"][name].items()
                                                            if k in ("minimum", "exclusiveMaximum")}})
        low, high = float(columns[name]["min"]), float(columns[name]["max"])
        assert [low <= v <= high for v in values] == [checker.is_valid(v) for v in values], name
    for name, texts in (("ride_id", ["R0000001", "R000001", "R00000012", "xR0000001"]),
                        ("zone", ["", "north", "n" * 20, "n" * 21])):
        checker = Draft202012Validator(RIDE_JSON["properties"][name])
        assert matches(columns[name]["pattern"], texts) == [checker.is_valid(t) for t in texts], name


def test_jsonschema_draft4_exclusive_minimum_flag_and_draft7_refs_are_read_per_their_draft(tmp_path):
    draft4 = write(tmp_path / "d4.json", json.dumps({
        "$schema": "http://json-schema.org/draft-04/schema#", "type": "object", "required": ["n"],
        "properties": {"n": {"type": "integer", "minimum": 0, "exclusiveMinimum": True}}}))
    assert columns_from_jsonschema(draft4) == {"n": {"type": "int", "nullable": False, "min": 1}}
    # before 2019-09, keywords beside $ref are ignored (draft 7, section 8.3)
    draft7 = write(tmp_path / "d7.json", json.dumps({
        "$schema": "http://json-schema.org/draft-07/schema#", "type": "object",
        "definitions": {"id": {"type": "string"}},
        "properties": {"id": {"$ref": "#/definitions/id", "maxLength": 3}}}))
    assert columns_from_jsonschema(draft7) == {"id": {"type": "str", "nullable": True}}


@pytest.mark.parametrize(("prop", "said"), [
    ({"type": "object", "properties": {"a": {"type": "string"}}}, "nested record"),
    ({"type": "array", "items": {"type": "string"}}, "repeated"),
    ({"type": ["string", "integer"]}, "one type per column"),
    ({"oneOf": [{"type": "string"}, {"type": "integer"}]}, "union"),
    ({"$ref": "other.json#/$defs/x"}, "inside the file only"),
    ({"type": "string", "allOf": [{"minLength": 1}]}, "allOf"),
    ({"type": "string", "pattern": "^a", "maxLength": 3}, "one pattern per column"),
    ({"type": "number", "multipleOf": 0.5}, "power of ten"),
    ({"type": "number", "exclusiveMinimum": 0}, "exclusive bound on a float"),
    ({"type": "string", "pattern": "^(?=a)"}, "lookaround"),
])
def test_jsonschema_shapes_weir_cannot_hold_are_refused_naming_the_field_and_the_file(tmp_path, prop, said):
    path = write(tmp_path / "s.json", json.dumps({"type": "object", "properties": {"ok": {"type": "integer"},
                                                                                   "bad": prop}}))
    with pytest.raises(SchemaFileError) as caught:
        columns_from_jsonschema(path)
    assert (caught.value.field, caught.value.path) == ("bad", str(path))
    assert said in caught.value.message


def test_jsonschema_file_invalid_against_its_draft_or_of_an_unknown_draft_is_refused(tmp_path):
    wrong = write(tmp_path / "wrong.json", json.dumps({"type": "object", "properties": {"a": {"type": "text"}}}))
    with pytest.raises(SchemaFileError, match="not a valid schema at /properties/a/type"):
        columns_from_jsonschema(wrong)
    unknown = write(tmp_path / "unknown.json", json.dumps({"$schema": "https://example.invalid/s", "type": "object",
                                                           "properties": {}}))
    with pytest.raises(SchemaFileError, match="unknown \\$schema"):
        columns_from_jsonschema(unknown)


# ---------------------------------------------------------------- shared


def test_schema_file_digest_changes_with_any_byte_and_not_otherwise(tmp_path):
    path = avsc(tmp_path, {"name": "zone", "type": "string"})
    first = digest_input(path)
    assert digest_input(path) == first
    path.write_text(path.read_text() + " ")  # a trailing blank: the same schema, other bytes
    assert digest_input(path) != first
    assert read_schema_file(path).columns == {"zone": {"type": "str", "nullable": False}}


def test_normalized_text_is_one_yaml_flow_mapping_per_column_and_diffs_by_line(tmp_path):
    import difflib

    before = avsc(tmp_path, {"name": "zone", "type": "string"},
                  {"name": "amount", "type": {"type": "bytes", "logicalType": "decimal", "precision": 8, "scale": 2}},
                  name="a.avsc")
    after = avsc(tmp_path, {"name": "zone", "type": "string"},
                 {"name": "amount", "type": {"type": "bytes", "logicalType": "decimal", "precision": 10, "scale": 2}},
                 name="b.avsc")
    old, new = read_schema_file(before), read_schema_file(after)
    for line in old.text().splitlines():  # PyYAML reads each line back to the mapped column
        name, decl = next(iter(yaml.safe_load(line).items()))
        assert decl == old.columns[name]
    changed = [d for d in difflib.unified_diff(old.text().splitlines(), new.text().splitlines(), lineterm="", n=0)
               if d[:1] in "+-" and d[:3] not in ("+++", "---")]
    assert changed == ['-amount: {type: "decimal(8,2)", nullable: false}',
                       '+amount: {type: "decimal(10,2)", nullable: false}']
    assert columns_text({}) == ""


def test_inline_columns_refine_a_files_columns_key_by_key(tmp_path):
    path = write(tmp_path / "ride.proto", RIDE_PROTO)
    mapped = columns_from_proto(path, "Ride")
    refined = refine(mapped, {"started_at": "datetime(Europe/Lisbon)", "zone_name": {"values": ["north", "south"]},
                              "extra": {"type": "int"}})
    assert refined["started_at"] == {"type": "datetime(Europe/Lisbon)", "nullable": True}
    assert refined["zone_name"] == {"type": "str", "nullable": False, "values": ["north", "south"]}
    assert list(refined)[-1] == "extra" and mapped["started_at"]["type"] == "datetime(UTC)"
    valid_columns(refined)


def test_schema_file_kind_comes_from_its_extension_and_names_are_required_where_needed(tmp_path):
    with pytest.raises(SchemaFileError, match="unknown schema file type '.yaml'"):
        read_schema_file(tmp_path / "x.yaml")
    with pytest.raises(SchemaFileError, match="name of the message"):
        read_schema_file(write(tmp_path / "r.proto", RIDE_PROTO))
    with pytest.raises(SchemaFileError, match="name of the element"):
        read_schema_file(write(tmp_path / "r.xsd", RIDES_XSD))


def test_reading_schema_modules_imports_no_schema_library_until_a_file_is_read():
    """Commands that read no schema file pay nothing for the libraries (imports are lazy)."""
    code = ("import sys; import runner.model.schemafiles.avro, runner.model.schemafiles.proto, "
            "runner.model.schemafiles.xsd, runner.model.schemafiles.jsonschema, runner.io.avro_reader, "
            "runner.io.xml_reader; heavy = ['fastavro', 'google.protobuf', 'grpc_tools', 'xmlschema', "
            "'elementpath', 'jsonschema', 'referencing', 'polars']; print([m for m in heavy if m in sys.modules])")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120)
    assert done.stdout.strip() == "[]"
