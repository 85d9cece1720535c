"""Fuzzed input files: ragged rows, NUL bytes, byte order marks, encodings, cut-off files.

Hardening issue 9, items 7 and 17, bounded to a few seconds. Each example is
a CSV file built from rows whose kind is chosen: well-formed records (values
with separators, quotes, line breaks and accented letters, written by
Python's csv module), records with too few or too many fields, NUL bytes, a
quote inside an unquoted field, a carriage return inside an unquoted field,
bytes that are not UTF-8, blank lines; with or without a byte order mark,
LF or CRLF line ends, UTF-8 or Latin-1, and possibly cut off inside a last
record. Every row must either reach the output exactly as Python's csv
module reads it (an empty field may be null: polars reads an unquoted empty
field as null and a quoted one as an empty string), or be a bad row naming its
file and its record number (RFC 4180 section 2: a record has as many fields
as the header). The reading runs twice per example: small files read
together, and large files read on their own with the record check cut into
tiny chunks, so that chunk edges fall everywhere.
"""

from __future__ import annotations

import csv
import io
import os
import tempfile
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from unittest import mock
from zoneinfo import ZoneInfo

import polars as pl
from conftest_run import cli
from helpers_data import write_workspace
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runner.core.windows import Window
from runner.io import inputfiles, records
from runner.io.inspect import InputStats
from runner.io.readers import file_frame, find_files
from runner.model.spec import FileInput

HEADER = ["ride_id", "zone", "note"]
WINDOW = Window(datetime(2026, 3, 22, tzinfo=UTC), datetime(2026, 3, 23, tzinfo=UTC), ZoneInfo("UTC"))
LETTERS = "abcxyz019 ,\"'\r\néçß-"  # Latin-1 can encode every one
SCALE = int(os.environ.get("WEIR_FUZZ_SCALE", "1"))  # more examples by hand: WEIR_FUZZ_SCALE=50


@dataclass
class Row:
    data: bytes  # the record's bytes, without its line end
    good: bool


def _text(draw: st.DrawFn) -> str:
    return draw(st.text(LETTERS, min_size=0, max_size=8))


def _record(values: list[str], encoding: str) -> bytes:
    out = io.StringIO()
    csv.writer(out, lineterminator="\r\n").writerow(values)  # fields holding \r or \n are quoted
    return out.getvalue()[:-2].encode(encoding)


@st.composite
def rows(draw: st.DrawFn, encoding: str) -> Row:
    kind = draw(st.sampled_from(["good", "good", "good", "short", "long", "nul", "quote", "cr", "text", "blank"]))
    if kind == "good":
        values = [draw(st.text("R0123456789", min_size=1, max_size=6)), _text(draw), _text(draw)]
        data = _record(values, encoding)
        return Row(data, data != b"")
    if kind in ("short", "long"):
        count = draw(st.integers(1, 2)) if kind == "short" else draw(st.integers(4, 6))
        values = [draw(st.text("R0123456789", min_size=1, max_size=6))] + [_text(draw) for _ in range(count - 1)]
        return Row(_record(values, encoding), False)
    if kind == "nul":
        return Row(b"\x00" * draw(st.integers(1, 12)), False)
    if kind == "quote":
        return Row(b'R1,har"bour,x', False)
    if kind == "cr":
        return Row(b"R2,harb\rour,x", False)
    if kind == "text" and encoding == "utf-8":
        return Row(b"R3,s\xe3o_bento,x", False)  # Latin-1 bytes in a UTF-8 file
    return Row(b"", True)  # a blank line: skipped, neither data nor bad


def _expect(row: bytes, encoding: str) -> tuple[str, ...] | None:
    """The values of a record the csv module reads as one well-formed record of the header's
    fields, or None when it is not one (does not decode, holds NUL bytes, is cut inside a
    quoted field, has another number of fields)."""
    try:
        text = row.decode(encoding)
    except UnicodeDecodeError:
        return None
    if "\x00" in text:
        return None
    try:
        records = list(csv.reader(io.StringIO(text, newline=""), strict=True))
    except csv.Error:
        return None
    if len(records) != 1 or len(records[0]) != len(HEADER):
        return None
    return tuple(records[0])


@st.composite
def files(draw: st.DrawFn) -> tuple[bytes, list[tuple[str, ...] | None], str]:
    """(the file, per record after the header its expected values or None when bad (blank lines
    as ()), the encoding)."""
    encoding = draw(st.sampled_from(["utf-8", "latin-1"]))
    end = draw(st.sampled_from([b"\n", b"\r\n"]))
    body = draw(st.lists(rows(encoding), max_size=12))
    expected: list[tuple[str, ...] | None] = []
    for row in body:
        if row.data == b"":
            expected.append(())
        elif row.good:
            expected.append(_expect(row.data, encoding))
            assert expected[-1] is not None
        else:
            expected.append(None)
    records = [r.data for r in body]
    cut = draw(st.booleans())
    if cut:  # the file ends inside one more, well-formed record
        last = _record([draw(st.text("R0123456789", min_size=1, max_size=6)), _text(draw), _text(draw)], encoding)
        last = last[: draw(st.integers(1, len(last)))]
        records.append(last)
        value = _expect(last, encoding)
        expected.append(value if value is not None else None)
    bom = b"\xef\xbb\xbf" if encoding == "utf-8" and draw(st.booleans()) else b""
    data = bom + _record(HEADER, encoding) + end + end.join(records)
    if not cut and records and draw(st.booleans()):
        data += end
    return data, expected, encoding


def _read(root: Path, source: FileInput) -> tuple[pl.DataFrame, pl.DataFrame | None]:
    inputfiles._CACHE.items.clear()
    stats = InputStats()
    found = find_files(root, "rides", source, WINDOW)
    frame = file_frame(root, "rides", source, found, WINDOW, "UTC", stats).collect()
    bad = pl.concat(stats.rejected, how="diagonal_relaxed") if stats.rejected else None
    return frame, bad


@settings(max_examples=120 * SCALE, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(files(), st.booleans())
def test_every_row_reaches_the_output_as_the_csv_module_reads_it_or_is_a_located_bad_row(case, schema):
    """Hardening items 7 and 17: no row is lost, invented or changed, and none fails the read."""
    data, expected, encoding = case
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "in").mkdir()
        (root / "in" / "rides.csv").write_bytes(data)
        spec = {"files": "in/*.csv", "on_bad_rows": "quarantine", "encoding": encoding}
        if schema:
            spec["schema"] = {c: "str" for c in HEADER}
        source = FileInput.model_validate(spec)
        good = sorted((tuple(v if v != "" else None for v in e) for e in expected if e), key=repr)
        bad = {i for i, e in enumerate(expected, start=1) if e is None}
        for small, chunk in ((records.SMALL, records.CHUNK), (0, 7)):
            with mock.patch.multiple(records, SMALL=small, CHUNK=chunk):
                frame, rejected = _read(root, source)
            if schema:
                got = [tuple(v if v != "" else None for v in r) for r in frame.select(HEADER).rows()]
                assert sorted(got, key=repr) == good
            else:
                assert frame.height == len(good)
            got_bad = set() if rejected is None else set(rejected["source_row"].to_list())
            assert got_bad == bad
            if rejected is not None:
                assert set(rejected["source_file"]) == {"in/rides.csv"}
                assert rejected["reason"].null_count() == 0


JOB = """\
window: {every: 1d, start: 2026-03-22, end: 2026-03-23, timezone: UTC}
inputs:
  rides: {files: "in/*.%s", on_bad_rows: %s}
steps:
  - sql: SELECT COUNT(*) AS n FROM rides
output: {path: "out/{start:%%Y-%%m-%%d}.parquet"}
"""


@st.composite
def damaged(draw: st.DrawFn) -> tuple[str, bytes]:
    """A CSV or NDJSON file with a damage chosen at random."""
    fmt = draw(st.sampled_from(["csv", "ndjson"]))
    if fmt == "csv":
        data = b"ride_id,zone,amount\n" + b"".join(b"R%d,harbour,%d.50\n" % (i, i) for i in range(6))
    else:
        data = b"".join(b'{"ride_id": "R%d", "zone": "harbour", "amount": %d.5}\n' % (i, i) for i in range(6))
    damage = draw(st.sampled_from(["cut", "nul", "bom", "latin-1", "utf-16", "insert", "empty"]))
    at = draw(st.integers(0, len(data)))
    if damage == "cut":
        data = data[:at]
    elif damage == "nul":
        data = data[:at] + b"\x00" * draw(st.integers(1, 30)) + data[at:]
    elif damage == "bom":
        data = b"\xef\xbb\xbf" + data
    elif damage == "latin-1":
        data = data[:at] + "são".encode("latin-1") + data[at:]
    elif damage == "utf-16":
        data = data.decode().encode("utf-16")
    elif damage == "insert":
        data = data[:at] + draw(st.binary(min_size=1, max_size=6)) + data[at:]
    else:
        data = b""
    return fmt, data


@settings(max_examples=12 * SCALE, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(damaged(), st.sampled_from(["fail", "quarantine"]))
def test_a_damaged_file_never_ends_in_a_traceback(case, mode):
    """Hardening items 7 and 17: `weir run` over a damaged file ends done or failed with a message
    (exit 0 or 1), never an internal error (exit 70) or a traceback."""
    fmt, data = case
    with tempfile.TemporaryDirectory() as tmp:
        root = write_workspace(Path(tmp) / "ws", {"rides": JOB % (fmt, mode)})
        (root / "in").mkdir()
        (root / "in" / f"rides.{fmt}").write_bytes(data)
        result = cli(root, "run", "rides", "--window", "2026-03-22")
        text = result.stdout + result.stderr
        assert result.exit_code in (0, 1), text
        assert "Traceback" not in text and "internal error" not in text
        if result.exit_code == 1:
            assert f"in/rides.{fmt}" in text or "no files" in text, text
