"""Protocol Buffers messages (`.proto` + a message name) -> weir columns.

The file is compiled by protoc (the one grpcio-tools ships, run as
`python -m grpc_tools.protoc` in a child process, so its messages come back
as text) into a descriptor set with every import, then read with protobuf's
descriptor classes. Imports are looked up in the file's own folder, then in
the well-known types grpcio-tools bundles (`google/protobuf/*.proto`). The
mapping table is in docs/schema-files.md.

A field is nullable when it has presence (`optional`, a proto2 optional, a
`oneof` member, a message-typed field) and is not `required`; a proto3 field
without `optional` always has a value (zero when unset), so it is not.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any, Literal

from runner.model.schemafiles import ColumnDecl, SchemaFile, SchemaFileError, column_name, int_range

PROTOC_TIMEOUT = 120  # seconds; a generous bound that turns a hung compiler into an error


def read_proto(path: str | Path, message: str, names: Literal["field", "json"] = "field") -> SchemaFile:
    """Map one message of a `.proto` file. `names`: columns named as the fields (`field`) or as
    protobuf's JSON mapping names them (`json`, lowerCamelCase), to match how the data was written."""
    path = Path(path)
    if names not in ("field", "json"):
        raise ValueError(f"names must be 'field' or 'json', not {names!r}")
    files = compile_proto(path)
    descriptor = _find(path, files, message)
    columns: dict[str, ColumnDecl] = {}
    for f in descriptor.fields:
        name = column_name(path, f.json_name if names == "json" else f.name)
        columns[name] = field_column(path, name, f)
    sources = [path, *(p for p in (path.parent / fp.name for fp in files)
                       if p.resolve() != path.resolve() and p.is_file())]
    return SchemaFile(path, columns, tuple(sources))


def columns_from_proto(path: str | Path, message: str, names: Literal["field", "json"] = "field"
                       ) -> dict[str, ColumnDecl]:
    """The columns of `message` (its fields, in declaration order)."""
    return read_proto(path, message, names).columns


def compile_proto(path: Path) -> list[Any]:
    """The FileDescriptorProtos of `path` and everything it imports, as protoc compiles them."""
    from importlib.resources import files

    from google.protobuf import descriptor_pb2

    if not path.is_file():
        raise SchemaFileError(path, "", "cannot read: no such file")
    bundled = files("grpc_tools") / "_proto"
    with tempfile.TemporaryDirectory(prefix="weir-protoc-") as tmp:
        out = Path(tmp) / "set.pb"
        command = [sys.executable, "-m", "grpc_tools.protoc", f"--proto_path={path.parent.resolve()}",
                   f"--proto_path={bundled}", "--include_imports", f"--descriptor_set_out={out}", path.name]
        try:
            done = subprocess.run(command, capture_output=True, text=True, timeout=PROTOC_TIMEOUT,
                                  cwd=path.parent.resolve())
        except subprocess.TimeoutExpired:
            raise SchemaFileError(path, "", f"protoc did not finish within {PROTOC_TIMEOUT}s") from None
        if done.returncode != 0 or not out.is_file():
            said = "; ".join(line.strip() for line in done.stderr.splitlines() if line.strip())
            raise SchemaFileError(path, "", f"protoc cannot compile it: {said or f'exit {done.returncode}'}")
        data = out.read_bytes()
    return list(descriptor_pb2.FileDescriptorSet.FromString(data).file)


def _find(path: Path, files: list[Any], message: str) -> Any:
    from google.protobuf import descriptor_pool

    pool = descriptor_pool.DescriptorPool()
    for proto in files:
        pool.Add(proto)
    own = next(proto for proto in files if proto.name == path.name)
    candidates = [message] + ([f"{own.package}.{message}"] if own.package else [])
    for name in candidates:
        try:
            return pool.FindMessageTypeByName(name)
        except KeyError:
            continue
    known = ", ".join(m.name for m in own.message_type) or "none"
    raise SchemaFileError(path, "", f"has no message {message!r} (its top-level messages: {known})")


_SCALARS: dict[str, ColumnDecl] = {
    "TYPE_DOUBLE": {"type": "float"},
    "TYPE_FLOAT": {"type": "float"},
    "TYPE_INT64": {"type": "int"},
    "TYPE_SINT64": {"type": "int"},
    "TYPE_SFIXED64": {"type": "int"},
    "TYPE_INT32": {"type": "int", **int_range(32, True)},
    "TYPE_SINT32": {"type": "int", **int_range(32, True)},
    "TYPE_SFIXED32": {"type": "int", **int_range(32, True)},
    "TYPE_UINT32": {"type": "int", **int_range(32, False)},
    "TYPE_FIXED32": {"type": "int", **int_range(32, False)},
    "TYPE_UINT64": {"type": "int", **int_range(64, False)},
    "TYPE_FIXED64": {"type": "int", **int_range(64, False)},
    "TYPE_BOOL": {"type": "bool"},
    "TYPE_STRING": {"type": "str"},
}
# well-known message types that hold one value (google/protobuf/timestamp.proto, wrappers.proto)
_WELL_KNOWN: dict[str, ColumnDecl] = {
    "google.protobuf.Timestamp": {"type": "datetime(UTC)"},
    "google.protobuf.DoubleValue": _SCALARS["TYPE_DOUBLE"],
    "google.protobuf.FloatValue": _SCALARS["TYPE_FLOAT"],
    "google.protobuf.Int64Value": _SCALARS["TYPE_INT64"],
    "google.protobuf.UInt64Value": _SCALARS["TYPE_UINT64"],
    "google.protobuf.Int32Value": _SCALARS["TYPE_INT32"],
    "google.protobuf.UInt32Value": _SCALARS["TYPE_UINT32"],
    "google.protobuf.BoolValue": _SCALARS["TYPE_BOOL"],
    "google.protobuf.StringValue": _SCALARS["TYPE_STRING"],
}


def field_column(path: Path, name: str, f: Any) -> ColumnDecl:
    """One field as a weir column, or SchemaFileError naming it and its number."""
    from google.protobuf.descriptor import FieldDescriptor as FD

    kind = {getattr(FD, k): k for k in dir(FD) if k.startswith("TYPE_")}[f.type]
    where = f"(number {f.number}) "
    repeated = f.is_repeated if hasattr(f, "is_repeated") else f.label == FD.LABEL_REPEATED
    if repeated:
        what = "a map" if f.message_type is not None and f.message_type.GetOptions().map_entry else "repeated"
        raise SchemaFileError(path, name, f"{where}is {what}: weir reads one value per column")
    required = f.is_required if hasattr(f, "is_required") else f.label == FD.LABEL_REQUIRED
    nullable = bool(f.has_presence) and not required
    if kind == "TYPE_MESSAGE":
        full = f.message_type.full_name
        if full == "google.protobuf.BytesValue":
            raise SchemaFileError(path, name, f"{where}is BytesValue (binary): weir has no column type for "
                                  "binary values")
        if full not in _WELL_KNOWN:
            raise SchemaFileError(path, name, f"{where}is a nested message ({full}): weir reads flat messages "
                                  "only; move its fields to the top-level message")
        return {**_WELL_KNOWN[full], "nullable": nullable}
    if kind == "TYPE_GROUP":
        raise SchemaFileError(path, name, f"{where}is a group (a nested message): weir reads flat messages only")
    if kind == "TYPE_ENUM":
        return {"type": "str", "nullable": nullable, "values": [v.name for v in f.enum_type.values]}
    if kind == "TYPE_BYTES":
        raise SchemaFileError(path, name, f"{where}is bytes (binary): weir has no column type for binary values")
    return {**_SCALARS[kind], "nullable": nullable}
