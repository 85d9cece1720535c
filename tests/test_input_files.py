"""Input files that lie: broken CSV rows, text encodings, cut-off files, symlinks, many small files.

Hardening issue 9, items 5, 7, 17 and the input half of 18. Every input file
here is written by hand as bytes. What a well-formed CSV record is comes from
RFC 4180 (section 2: each record has as many fields as the header, quotes
open and close fields, a doubled quote stands for one); the values and field
counts each test expects are read from the same bytes by Python's csv module
(an independent reader), JSON by the json module, text in other encodings by
Python's codecs, Parquet files are written by pyarrow, ledger figures read
with sqlite3. The data is the invented city bike-share.
"""

from __future__ import annotations

import csv
import io
import json
import os
from decimal import Decimal
from pathlib import Path
from typing import Any

import pytest
from conftest_run import cli, ledger_rows, only_window
from helpers_data import write_workspace

pq = pytest.importorskip("pyarrow.parquet")
pa = pytest.importorskip("pyarrow")

DAY, NEXT = "2026-03-22", "2026-03-23"
LANDING = f"state/landing/rides/{DAY}"
OUTPUT = f"state/warehouse/rides_in/{DAY}.parquet"
REJECTED = OUTPUT + ".rejected.parquet"
HEADER = b"ride_id,started_at,zone,fare,amount\n"
ROWS = [
    b"R0000001,2026-03-22T07:58:00Z,harbour,member,2.50",
    b"R0000002,2026-03-22T08:03:00Z,campus,casual,7.25",
    b"R0000003,2026-03-22T08:10:00Z,harbour,day_pass,12.00",
    b"R0000004,2026-03-22T09:41:00Z,old_town,member,3.10",
]
SCHEMA = """\
    schema:
      ride_id: str
      started_at: datetime(UTC)
      zone: str
      fare: str
      amount: "decimal(10,2)"
"""
TOTALS = "SELECT COUNT(*) AS rides, SUM(CAST(amount AS DOUBLE)) AS revenue FROM rides"


def job(schema: bool = False, on_bad_rows: str = "quarantine", extra: str = "", sql: str = TOTALS,
        files: str = "state/landing/rides/{start:%Y-%m-%d}/*.csv") -> str:
    return (
        "window: {every: 1d, start: 2026-03-22, end: 2026-03-24, timezone: UTC}\n"
        "inputs:\n"
        "  rides:\n"
        f"    files: \"{files}\"\n"
        f"    on_bad_rows: {on_bad_rows}\n"
        f"{extra}"
        f"{SCHEMA if schema else ''}"
        f"steps:\n  - sql: {sql}\n"
        "output:\n  path: state/warehouse/rides_in/{start:%Y-%m-%d}.parquet\n"
    )


def workspace(tmp_path: Path, text: str, files: dict[str, bytes]) -> Path:
    root = write_workspace(tmp_path / "ws", {"rides_in": text})
    for name, data in files.items():
        path = root / LANDING / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
    return root


def run_day(root: Path) -> dict[str, Any]:
    return only_window(root, "rides_in", DAY, NEXT)


def output(root: Path) -> list[dict[str, Any]]:
    return pq.read_table(root / OUTPUT).to_pylist()  # pyarrow reads the file weir wrote


def rejected(root: Path) -> list[dict[str, Any]]:
    return pq.read_table(root / REJECTED).to_pylist()


def csv_records(data: bytes, encoding: str = "utf-8") -> list[list[str]]:
    """The records after the header, as Python's csv module reads the bytes."""
    return list(csv.reader(io.StringIO(data.decode(encoding), newline="")))[1:]


def totals(records: list[list[str]]) -> tuple[int, float]:
    """Rides and revenue of the records that have the header's five fields (RFC 4180: a record has as
    many fields as the header), computed here with Decimal."""
    good = [r for r in records if len(r) == 5]
    return len(good), float(sum(Decimal(r[4]) for r in good))


# ---------------------------------------------------------------- item 7: broken CSV rows


@pytest.mark.parametrize("schema", [False, True], ids=["no schema", "schema"])
def test_a_row_cut_short_is_a_bad_row_named_by_file_row_and_reason(tmp_path: Path, schema: bool):
    """Hardening item 7: a file cut mid-row gave a row of nulls, exit 0 and wrong totals."""
    data = HEADER + b"\n".join(ROWS) + b"\nR0000005,2026-03-22T10:13:00Z,harbour"
    root = workspace(tmp_path, job(schema), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "done", window
    records = csv_records(data)
    assert [len(r) for r in records] == [5, 5, 5, 5, 3]  # the csv module sees the cut record's 3 fields
    [row] = output(root)
    assert (row["rides"], row["revenue"]) == totals(records)
    [bad] = rejected(root)
    assert (bad["source_file"], bad["source_row"], bad["reason"]) == (
        f"{LANDING}/rides.csv", 5, "3 fields, the header has 5")
    assert [bad["ride_id"], bad["started_at"], bad["zone"], bad["fare"], bad["amount"]] == [*records[4], None, None]
    [run] = ledger_rows(root, "SELECT rows_rejected FROM weir_runs WHERE status = 'done'")
    assert run["rows_rejected"] == 1


def test_a_row_cut_short_fails_the_window_by_default_naming_file_row_and_reason(tmp_path: Path):
    """Hardening item 7: with the default on_bad_rows: fail, the cut row fails the window."""
    data = HEADER + b"\n".join(ROWS[:2]) + b"\nR0000003,2026-03-22T08:10:00Z,harb"
    text = job(on_bad_rows="fail")
    root = workspace(tmp_path, text, {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"] == (f"input rides: {LANDING}/rides.csv, row 3: 3 fields, the header has 5; "
                               "fix the data or set on_bad_rows: quarantine or drop")
    assert not (root / OUTPUT).exists()


@pytest.mark.parametrize("schema", [False, True], ids=["no schema", "schema"])
def test_a_line_of_nul_bytes_is_a_bad_row(tmp_path: Path, schema: bool):
    """Hardening item 7: a line of NUL bytes (a zero-padded file after a crash) became a row."""
    data = HEADER + b"\n".join(ROWS) + b"\n" + b"\x00" * 48 + b"\n"
    root = workspace(tmp_path, job(schema), {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    records = csv_records(data)
    assert records[4] == ["\x00" * 48]  # one field of NUL characters to the csv module
    [row] = output(root)
    assert (row["rides"], row["revenue"]) == totals(records)
    [bad] = rejected(root)
    assert (bad["source_row"], bad["reason"]) == (5, "NUL bytes (a damaged or zero-padded file?)")


def test_a_header_naming_a_column_twice_fails_naming_the_file(tmp_path: Path):
    """Hardening item 7: duplicate header names were accepted (polars renamed one)."""
    data = b"ride_id,started_at,zone,fare,fare\n" + b"\n".join(ROWS) + b"\n"
    root = workspace(tmp_path, job(), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"] == (f"input rides: {LANDING}/rides.csv, header: column name 'fare' appears twice "
                               "(columns 4 and 5); rows cannot be read by name")


@pytest.mark.parametrize("schema", [False, True], ids=["no schema", "schema"])
def test_a_row_with_extra_fields_is_a_bad_row(tmp_path: Path, schema: bool):
    """Hardening item 7: extra fields failed without file or row (schema) or were cut silently (none)."""
    data = HEADER + ROWS[0] + b"\n" + ROWS[1] + b",EXTRA\n" + ROWS[2] + b",\n" + ROWS[3] + b"\n"
    root = workspace(tmp_path, job(schema), {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    records = csv_records(data)
    assert [len(r) for r in records] == [5, 6, 6, 5]
    [row] = output(root)
    assert (row["rides"], row["revenue"]) == totals(records)
    assert [(b["source_row"], b["reason"]) for b in rejected(root)] == [
        (2, "6 fields, the header has 5"), (3, "6 fields, the header has 5")]


def test_a_row_with_extra_fields_under_fail_names_file_and_row(tmp_path: Path):
    """Hardening item 7: the error for extra fields names the file and the row."""
    data = HEADER + ROWS[0] + b"\n" + ROWS[1] + b",EXTRA\n"
    root = workspace(tmp_path, job(True, on_bad_rows="fail"), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"].startswith(f"input rides: {LANDING}/rides.csv, row 2: 6 fields, the header has 5;")


@pytest.mark.parametrize(("limits", "error"), [
    ("    max_bad_rows: 1\n", f"input rides: more than max_bad_rows 1 bad rows (at least 2); e.g. {LANDING}/rides.csv, "
                               "row 3: 3 fields, the header has 5"),
    ("    max_bad_rows: 2\n", None),
    ("    max_bad_fraction: 20%\n", "input rides: 2 bad row(s) of 8 (25.00%) exceed max_bad_fraction 20.00%"),
    ("    max_bad_fraction: 30%\n", None),
])
def test_broken_rows_count_toward_the_bad_row_limits(tmp_path: Path, limits: str, error: str | None):
    """Hardening item 7: broken rows count toward max_bad_rows and max_bad_fraction, with or without schema."""
    rows = ROWS + [r.replace(b"R000000", b"R000001") for r in ROWS]
    rows[2] = rows[2].rsplit(b",", 2)[0]  # 3 fields
    rows[6] = rows[6] + b",x"  # 6 fields
    data = HEADER + b"\n".join(rows) + b"\n"
    root = workspace(tmp_path, job(extra=limits), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == ("failed" if error else "done"), window
    assert window.get("error") == error


def test_blank_lines_are_skipped_not_read_as_rows_of_nulls(tmp_path: Path):
    """Hardening item 7: blank lines (here also a CRLF one and two at the end) became rows of nulls."""
    data = HEADER + ROWS[0] + b"\n\n" + ROWS[1] + b"\n\r\n" + ROWS[2] + b"\n\n\n"
    root = workspace(tmp_path, job(on_bad_rows="fail"), {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    with io.StringIO(data.decode(), newline="") as fh:
        expected = list(csv.DictReader(fh))  # DictReader skips blank rows
    [row] = output(root)
    assert (row["rides"], row["revenue"]) == (len(expected), float(sum(Decimal(r["amount"]) for r in expected)))


def test_quotes_that_break_rfc_4180_make_their_rows_bad(tmp_path: Path):
    """Hardening items 7 and 17: a quote inside an unquoted field, text after a closing quote and a
    quote never closed failed the window with polars' message and no file name."""
    data = (HEADER + ROWS[0] + b"\n"
            + b'R0000002,2026-03-22T08:03:00Z,harb"our,casual,7.25\n'
            + b'R0000003,2026-03-22T08:10:00Z,"harbour"x,day_pass,12.00\n'
            + ROWS[3] + b"\n"
            + b'R0000005,2026-03-22T10:13:00Z,"old_town,member,3.10\n')
    root = workspace(tmp_path, job(), {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    assert [(b["source_row"], b["reason"]) for b in rejected(root)] == [
        (2, "a quote inside an unquoted field"), (3, "text after the closing quote of a field"),
        (5, "a quoted field that is never closed")]
    # the csv module in strict mode refuses the last two as well
    for line in (data.splitlines()[3], data.splitlines()[5]):
        with pytest.raises(csv.Error):
            list(csv.reader([line.decode()], strict=True))
    [row] = output(root)
    assert row["rides"] == 2


def test_quoted_separators_doubled_quotes_and_line_breaks_stay_inside_their_fields(tmp_path: Path):
    """Hardening item 7: well-formed quoting is not mistaken for broken rows; values as the csv module reads them."""
    data = (HEADER + ROWS[0] + b"\r\n"
            + b'R0000002,2026-03-22T08:03:00Z,"old, town","casual ""flex""",7.25\r\n'
            + b'R0000003,2026-03-22T08:10:00Z,"harbour\r\nnorth",day_pass,"12.00"\r\n')
    root = workspace(tmp_path, job(on_bad_rows="fail", sql="SELECT * FROM rides"), {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    got = sorted((r["ride_id"], r["started_at"], r["zone"], r["fare"], r["amount"]) for r in output(root))
    expected = sorted((*r[:4], float(r[4])) for r in csv_records(data))  # amount is read as a number
    assert got == expected


def test_bad_rows_are_counted_once_with_a_key_read_in_two_passes(tmp_path: Path):
    """Hardening item 7: with key: the rows are read twice; a broken row is still one bad row."""
    data = HEADER + b"\n".join(ROWS) + b"\nR0000005,2026-03-22T10:13"
    root = workspace(tmp_path, job(True, extra="    key: [ride_id]\n"), {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    assert len(rejected(root)) == 1
    [run] = ledger_rows(root, "SELECT rows_read, rows_rejected FROM weir_runs WHERE status = 'done'")
    assert (run["rows_read"], run["rows_rejected"]) == (5, 1)


def run_here(root: Path, job_name: str, days: list[str], force: bool = False) -> list[str]:
    """Run windows in this process, one after the other as one worker process runs them (weir's own runs
    happen in worker processes, out of reach of a test's monkeypatching); their statuses."""
    from runner import api
    from runner.engine.context import RunContext
    from runner.engine.window import Attempt, run_attempt

    ws = api.workspace(root)
    ctx = RunContext(ws=ws, ledger=api.open_ledger(root))
    cad = ws.cadence(job_name)
    return [run_attempt(ctx, Attempt(job_name, cad.window(day).key, force=force)).status for day in days]


def test_a_file_is_examined_once_per_process_whatever_reads_it(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    """Hardening item 7 (brief): a file's bad rows are found once per run, not once per consumer:
    a lookup file read by both daily windows is examined once."""
    from runner.io import inputfiles, records
    data = HEADER + b"\n".join(ROWS) + b"\nR0000005,2026-03-22T10:13:00Z\n"
    root = workspace(tmp_path, job(files=f"{LANDING}/lookup.csv"), {"lookup.csv": data})
    examined: list[int] = []
    real_scan = records.Scan.run

    def counted(self: Any) -> Any:
        examined.append(1)
        return real_scan(self)

    monkeypatch.setattr(records.Scan, "run", counted)
    inputfiles._CACHE.items.clear()
    assert run_here(root, "rides_in", ["2026-03-22", "2026-03-23"]) == ["done", "done"]
    assert len(examined) == 1
    assert [r["rows_rejected"] for r in ledger_rows(root, "SELECT rows_rejected FROM weir_runs")] == [1, 1]


def test_a_large_clean_file_is_checked_once_across_runs_and_again_once_it_changes(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    """Hardening item 7 (its cost): a clean file's verdict is remembered by version (state/input-checks.sqlite),
    so re-runs over unchanged landing files skip the check; a changed file is checked again."""
    from runner.io import inputfiles
    data = HEADER + b"\n".join(ROWS) + b"\n"
    root = workspace(tmp_path, job(), {"rides.csv": data})
    checked: list[str] = []
    real_shape = inputfiles.shape

    def counted(*args: Any, **kwargs: Any) -> Any:
        checked.append("x")
        return real_shape(*args, **kwargs)

    monkeypatch.setattr(inputfiles, "shape", counted)
    monkeypatch.setattr(inputfiles, "REMEMBER", 0)  # remember files of every size
    for _ in range(2):
        inputfiles._CACHE.items.clear()  # a new process would start without it
        assert run_here(root, "rides_in", [DAY], force=True) == ["done"]
    assert checked == ["x"]
    assert (root / "state" / "input-checks.sqlite").exists()
    with open(root / LANDING / "rides.csv", "ab") as fh:
        fh.write(b"R0000005,2026-03-22T10:13:00Z\n")  # the same file, now with a broken row
    inputfiles._CACHE.items.clear()
    assert run_here(root, "rides_in", [DAY], force=True) == ["done"]
    assert checked == ["x", "x"]
    assert [(b["source_row"], b["reason"]) for b in rejected(root)] == [(5, "2 fields, the header has 5")]


# ---------------------------------------------------------------- item 17: encodings and read errors


def test_ndjson_with_a_utf8_byte_order_mark_reads_as_without_one(tmp_path: Path):
    """Hardening item 17: NDJSON starting with a UTF-8 byte order mark failed (TapeError)."""
    lines = [{"dock": "dock_01", "delta": 1}, {"dock": "dock_02", "delta": -1}, {"dock": "dock_01", "delta": 1}]
    data = b"\xef\xbb\xbf" + b"\n".join(json.dumps(x).encode() for x in lines) + b"\n"
    text = job(files="state/landing/rides/{start:%Y-%m-%d}/*.ndjson",
               sql="SELECT dock, SUM(delta) AS bikes FROM rides GROUP BY dock")
    root = workspace(tmp_path, text, {"docks.ndjson": data})
    assert run_day(root)["status"] == "done"
    expected: dict[str, int] = {}
    for line in data.decode("utf-8-sig").splitlines():  # Python's codec drops the mark
        item = json.loads(line)
        expected[item["dock"]] = expected.get(item["dock"], 0) + item["delta"]
    assert {r["dock"]: r["bikes"] for r in output(root)} == expected


def test_a_latin1_csv_reads_with_encoding_latin_1_as_pythons_codec_decodes_it(tmp_path: Path):
    """Hardening item 17: Latin-1 text could not be read at all; now `encoding:` decodes it."""
    data = HEADER + "\n".join([
        "R0000001,2026-03-22T07:58:00Z,praça_nova,member,2.50",
        "R0000002,2026-03-22T08:03:00Z,são_bento,casual,7.25",
        "R0000003,2026-03-22T08:10:00Z,praça_nova,day_pass,12.00",
    ]).encode("latin-1") + b"\n"
    text = job(extra="    encoding: latin-1\n", on_bad_rows="fail",
               sql="SELECT zone, COUNT(*) AS rides FROM rides GROUP BY zone")
    root = workspace(tmp_path, text, {"rides.csv": data})
    assert run_day(root)["status"] == "done"
    expected: dict[str, int] = {}
    for record in csv_records(data, "latin-1"):  # Python's latin-1 codec, then the csv module
        expected[record[2]] = expected.get(record[2], 0) + 1
    assert {r["zone"]: r["rides"] for r in output(root)} == expected


def test_text_not_in_the_files_encoding_is_a_bad_row_naming_file_row_and_the_fix(tmp_path: Path):
    """Hardening item 17: Latin-1 text gave polars' 'invalid utf-8 sequence' without the file name."""
    data = HEADER + ROWS[0] + b"\n" + "R0000002,2026-03-22T08:03:00Z,são_bento,casual,7.25\n".encode("latin-1")
    root = workspace(tmp_path, job(on_bad_rows="fail"), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "failed"
    with pytest.raises(UnicodeDecodeError):
        data.decode("utf-8")  # Python's codec agrees that this is not UTF-8
    assert window["error"].startswith(f"input rides: {LANDING}/rides.csv, row 2: bytes that are not valid utf-8 "
                                      "(declare the file's encoding: on the input)")


def test_a_utf16_file_reads_with_encoding_utf_16_and_is_refused_without(tmp_path: Path):
    """Hardening item 17: other encodings go through Python's codecs; a UTF-16 file read as UTF-8 is
    refused naming the file and the key to set."""
    data = (HEADER + b"\n".join(ROWS) + b"\n").decode().encode("utf-16")  # with its byte order mark
    root = workspace(tmp_path, job(on_bad_rows="fail"), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"] == (f"input rides: {LANDING}/rides.csv: starts with a UTF-16 byte order mark; "
                               "declare encoding: utf-16 on the input")
    (root / "jobs" / "rides_in.yaml").write_text(job(on_bad_rows="fail", extra="    encoding: utf-16\n"))
    assert run_day(root)["status"] == "done"
    [row] = output(root)
    assert (row["rides"], row["revenue"]) == totals(csv_records(data, "utf-16"))


def test_a_quote_never_closed_under_fail_names_file_and_row(tmp_path: Path):
    """Hardening item 17: an unterminated quote gave a message without the file name."""
    data = HEADER + ROWS[0] + b'\nR0000002,2026-03-22T08:03:00Z,"campus,casual,7.25\n' + ROWS[2] + b"\n"
    root = workspace(tmp_path, job(on_bad_rows="fail"), {"rides.csv": data})
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"].startswith(f"input rides: {LANDING}/rides.csv, row 2: a quoted field that is never "
                                      "closed")


def test_a_truncated_parquet_file_is_named(tmp_path: Path):
    """Hardening item 17: a Parquet file cut short (no footer) failed without naming the file."""
    table = pa.table({"ride_id": [f"R{i:07d}" for i in range(500)], "amount": [i / 4 for i in range(500)]})
    text = job(files="state/landing/rides/{start:%Y-%m-%d}/*.parquet")
    root = workspace(tmp_path, text.replace(TOTALS, "SELECT COUNT(*) AS rides FROM rides"), {})
    whole = root / LANDING / "a.parquet"
    whole.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, whole)  # pyarrow writes the reference file
    cut = whole.read_bytes()
    (root / LANDING / "b.parquet").write_bytes(cut[: len(cut) // 2])
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"].startswith(f"input rides: cannot read {LANDING}/b.parquet as Parquet: ")


def failed_ndjson_day(tmp_path: Path, data: bytes) -> str:
    """The error of a day whose only input file is NDJSON `data` (the window must fail)."""
    text = job(files="state/landing/rides/{start:%Y-%m-%d}/*.ndjson", sql="SELECT COUNT(*) AS n FROM rides")
    window = run_day(workspace(tmp_path, text, {"docks.ndjson": data}))
    assert window["status"] == "failed"
    return window["error"]


def test_a_cut_off_ndjson_file_names_file_and_line(tmp_path: Path):
    """Hardening item 17: NDJSON read errors name the file and the line."""
    data = b'{"dock": "dock_01", "delta": 1}\n{"dock": "dock_02", "delta": -1}\n{"dock": "dock_0'
    error = failed_ndjson_day(tmp_path, data)
    with pytest.raises(json.JSONDecodeError):
        json.loads(data.splitlines()[2])  # the json module agrees the third line is not whole
    assert error == (f"input rides: {LANDING}/docks.ndjson, line 3: the last line is cut off (it does "
                               "not end with the closing brace of an object)")


def test_an_ndjson_line_that_is_not_json_names_file_and_line(tmp_path: Path):
    """Hardening item 17: polars' NDJSON errors (TapeError and the like) named no file and no line."""
    data = b'{"dock": "dock_01", "delta": 1}\n{"dock": "dock_02", "delta": }\n{"dock": "dock_03", "delta": 1}\n'
    error = failed_ndjson_day(tmp_path, data)
    with pytest.raises(json.JSONDecodeError) as caught:
        json.loads(data.splitlines()[1])  # the json module's own message for the line
    assert error == f"input rides: {LANDING}/docks.ndjson, line 2: not JSON ({caught.value})"


def test_ndjson_that_is_not_utf8_names_file_and_line_and_reads_with_its_encoding(tmp_path: Path):
    """Hardening item 17: NDJSON in Latin-1 failed without the file name; `encoding:` reads it."""
    data = '{"dock": "doca_praça", "delta": 1}\n{"dock": "doca_sé", "delta": 1}\n'.encode("latin-1")
    text = job(files="state/landing/rides/{start:%Y-%m-%d}/*.ndjson",
               sql="SELECT dock, SUM(delta) AS bikes FROM rides GROUP BY dock")
    root = workspace(tmp_path, text, {"docks.ndjson": data})
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"].startswith(f"input rides: {LANDING}/docks.ndjson, line 1: bytes that are not valid "
                                      "utf-8")
    (root / "jobs" / "rides_in.yaml").write_text(text.replace("    on_bad_rows", "    encoding: latin-1\n"
                                                                                  "    on_bad_rows"))
    assert run_day(root)["status"] == "done"
    expected = {json.loads(line)["dock"] for line in data.decode("latin-1").splitlines()}
    assert {r["dock"] for r in output(root)} == expected


def test_an_unknown_encoding_is_a_located_problem(tmp_path: Path):
    """Hardening item 17: `encoding:` takes the names Python's codecs know, and text encodings only."""
    root = workspace(tmp_path, job(extra="    encoding: latin-99\n"), {})
    result = cli(root, "check")
    assert result.exit_code == 2
    assert "jobs/rides_in.yaml:6:15: inputs.rides.encoding: unknown encoding 'latin-99'" in result.stderr + result.stdout
    (root / "jobs" / "rides_in.yaml").write_text(job(extra="    encoding: base64\n"))
    result = cli(root, "check")
    assert "inputs.rides.encoding: 'base64' is not a text encoding" in result.stderr + result.stdout


# ---------------------------------------------------------------- item 18: symlinks


@pytest.fixture
def outside(tmp_path: Path) -> Path:
    """A folder outside the workspace with a file nobody meant to publish."""
    folder = tmp_path / "elsewhere"
    folder.mkdir()
    (folder / "secret.csv").write_bytes(HEADER + b"SECRET01,2026-03-22T07:00:00Z,vault,member,999.99\n")
    return folder


def test_an_input_symlink_leading_outside_the_workspace_is_refused(tmp_path: Path, outside: Path):
    """Hardening item 18: whoever could write the landing folder could pull any file into an output."""
    root = workspace(tmp_path, job(sql="SELECT * FROM rides"), {"rides.csv": HEADER + ROWS[0] + b"\n"})
    (root / LANDING / "more.csv").symlink_to(outside / "secret.csv")
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"] == (
        f"input rides: {LANDING}/more.csv leads outside the workspace (to {os.path.realpath(outside / 'secret.csv')}); "
        "weir reads only files inside the workspace or under a folder listed in the input's allow_outside:")
    assert not (root / OUTPUT).exists()
    plan = cli(root, "plan", "--at", "2026-06-01T00:00Z")
    assert "more.csv leads outside the workspace" in plan.stderr


def test_a_symlinked_folder_leading_outside_the_workspace_is_refused(tmp_path: Path, outside: Path):
    """Hardening item 18: a folder on the way that resolves outside is refused too."""
    root = workspace(tmp_path, job(sql="SELECT * FROM rides"), {})
    (root / LANDING).parent.mkdir(parents=True, exist_ok=True)
    (root / LANDING).symlink_to(outside, target_is_directory=True)
    window = run_day(root)
    assert window["status"] == "failed"
    assert f"{LANDING}/secret.csv leads outside the workspace (to {os.path.realpath(outside)})" in window["error"]


def test_allow_outside_admits_the_named_folder_and_nothing_else(tmp_path: Path, outside: Path):
    """Hardening item 18: a job may name folders outside the workspace it reads from."""
    feeds = tmp_path / "feeds"
    feeds.mkdir()
    (feeds / "rides.csv").write_bytes(HEADER + ROWS[0] + b"\n")
    text = job(sql="SELECT * FROM rides", extra=f"    allow_outside: [{feeds}]\n")
    root = workspace(tmp_path, text, {})
    (root / LANDING).mkdir(parents=True)
    (root / LANDING / "rides.csv").symlink_to(feeds / "rides.csv")
    assert run_day(root)["status"] == "done"
    assert [r["ride_id"] for r in output(root)] == ["R0000001"]
    (root / LANDING / "secret.csv").symlink_to(outside / "secret.csv")
    window = run_day(root)
    assert window["status"] == "failed" and "secret.csv leads outside the workspace" in window["error"]


def test_symlinks_that_stay_inside_the_workspace_are_read(tmp_path: Path):
    """Hardening item 18: the rule is about where files really are, not about symlinks as such."""
    root = workspace(tmp_path, job(sql="SELECT * FROM rides"), {})
    shared = root / "state" / "shared"
    shared.mkdir(parents=True)
    (shared / "rides.csv").write_bytes(HEADER + ROWS[1] + b"\n")
    (root / LANDING).mkdir(parents=True)
    (root / LANDING / "rides.csv").symlink_to(shared / "rides.csv")
    assert run_day(root)["status"] == "done"
    assert [r["ride_id"] for r in output(root)] == ["R0000002"]


def test_allow_outside_needs_absolute_folders_and_does_not_count_in_the_fingerprint(tmp_path: Path):
    """Hardening item 18: adding a permission does not make every window stale."""
    root = workspace(tmp_path, job(sql="SELECT * FROM rides"), {"rides.csv": HEADER + ROWS[0] + b"\n"})
    assert run_day(root)["status"] == "done"
    (root / "jobs" / "rides_in.yaml").write_text(job(sql="SELECT * FROM rides", extra="    allow_outside: [feeds]\n"))
    result = cli(root, "check")
    assert result.exit_code == 2
    assert "inputs.rides.allow_outside: 'feeds' is not an absolute path" in result.stderr + result.stdout
    (root / "jobs" / "rides_in.yaml").write_text(job(sql="SELECT * FROM rides",
                                                     extra=f"    allow_outside: [{tmp_path}]\n"))
    stale = cli(root, "stale", "--at", "2026-06-01T00:00Z", "--json")
    assert stale.exit_code == 0, stale.stderr
    assert json.loads(stale.stdout)["windows"] == []


# ---------------------------------------------------------------- item 5: many small files


def _small_files(count: int) -> dict[str, bytes]:
    """Small files, most with one header, some in another column order, some with a byte order
    mark, CRLF lines, blank lines or a broken row."""
    files = {}
    for i in range(count):
        rows = [f"R{i:05d}{j:02d},2026-03-22T{j % 24:02d}:{i % 60:02d}:00Z,zone_{i % 7},member,{(i + j) % 90}.{j:02d}"
                for j in range(i % 4)]
        if i % 11 == 3:
            header, body = b"zone,ride_id,started_at,fare,amount\n", [",".join(
                [r.split(",")[2], *r.split(",")[:2], *r.split(",")[3:]]) for r in rows]
        else:
            header, body = HEADER, rows
        data = header + "".join(line + "\n" for line in body).encode()
        if i % 13 == 5:
            data = b"\xef\xbb\xbf" + data
        if i % 17 == 2:
            data = data.replace(b"\n", b"\r\n")
        if i % 19 == 4:
            data += b"\n"
        if i % 23 == 6:
            data += b"R9999999,2026-03-22T23:00:00Z,zone_1"  # cut short
        files[f"part-{i:04d}.csv"] = data
    return files


def test_many_small_files_are_read_together_keeping_each_rows_file_and_row(tmp_path: Path):
    """Hardening item 5: small files are read as one text; rows, bad rows and their places are kept."""
    files = _small_files(300)
    root = workspace(tmp_path, job(True, sql="SELECT * FROM rides"), files)
    assert run_day(root)["status"] == "done"
    expected, bad = [], []
    for name, data in files.items():
        header, *records = csv.reader(io.StringIO(data.decode("utf-8-sig"), newline=""))
        for number, record in enumerate(records, start=1):  # blank lines are [] and keep their numbers
            if record and len(record) != len(header):
                bad.append((f"{LANDING}/{name}", number))
            elif record:
                named = dict(zip(header, record, strict=True))
                expected.append((named["ride_id"], named["zone"], Decimal(named["amount"])))
    got = sorted((r["ride_id"], r["zone"], r["amount"]) for r in output(root))
    assert got == sorted(expected)
    assert sorted((b["source_file"], b["source_row"]) for b in rejected(root)) == sorted(bad)
    assert len(bad) == 13


def test_the_plan_over_many_small_files_does_not_grow_with_their_number(tmp_path: Path):
    """Hardening item 5: one window over thousands of small CSV files was superlinear (580 s for
    20,000 one-row files): each file had its own scan and inspector in the plan."""
    from datetime import UTC, datetime
    from zoneinfo import ZoneInfo

    from runner.core.windows import Window
    from runner.io.inspect import InputStats
    from runner.io.readers import file_frame, find_files
    from runner.model.spec import FileInput

    source = FileInput.model_validate({"files": f"{LANDING}/*.csv", "schema": {"ride_id": "str", "amount": "float"},
                                       "on_bad_rows": "quarantine"})
    window = Window(datetime(2026, 3, 22, tzinfo=UTC), datetime(2026, 3, 23, tzinfo=UTC), ZoneInfo("UTC"))
    sizes = []
    for count in (20, 200):
        root = workspace(tmp_path / str(count), job(), _small_files(count))
        files = find_files(root, "rides", source, window)
        assert len(files.paths) == count
        lf = file_frame(root, "rides", source, files, window, "UTC", InputStats())
        sizes.append(len(lf.explain().splitlines()))
    assert sizes[1] == sizes[0]
