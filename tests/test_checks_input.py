"""Input schemas: each declared type, each column rule and the key, checked against outside references.

Expected values come from Python's own parsers (int, float, decimal,
datetime.fromisoformat, zoneinfo), from RFC 3339, from the YAML 1.2 core
schema and from pyarrow's type names; the source is named beside each check.
Where weir makes a choice of its own (blanks around values are allowed,
decimals in plain notation only, a leap second read as POSIX time reads it),
the test says so. The data is the invented city bike-share.
"""

from __future__ import annotations

import calendar
import csv
import random
import re
from datetime import UTC, date, datetime, timedelta, timezone
from decimal import Decimal, InvalidOperation
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from conftest_run import backfill, ledger_rows
from helpers_data import write_workspace
from hypothesis import given, settings
from hypothesis import strategies as st

pq = pytest.importorskip("pyarrow.parquet")
pa = pytest.importorskip("pyarrow")
np = pytest.importorskip("numpy")

DAY = "2026-03-22"
LANDING = f"state/landing/rides/{DAY}"
OUTPUT = f"state/warehouse/checked/{DAY}.parquet"
LISBON = ZoneInfo("Europe/Lisbon")


def job_text(schema: dict[str, str], *, sql: str = "SELECT * FROM rides", extra: str = "",
             on_bad_rows: str = "quarantine") -> str:
    """A daily job reading the day's CSV files with `schema` (column -> YAML flow text)."""
    columns = "".join(f"      {name}: {decl}\n" for name, decl in schema.items())
    return (
        "window: {every: 1d, start: 2026-03-22, timezone: Europe/Lisbon}\n"
        "inputs:\n"
        "  rides:\n"
        "    files: state/landing/rides/{start:%Y-%m-%d}/*.csv\n"
        f"    on_bad_rows: {on_bad_rows}\n"
        f"{extra}"
        "    schema:\n"
        f"{columns}"
        f"steps:\n  - sql: {sql}\n"
        "output:\n  path: state/warehouse/checked/{start:%Y-%m-%d}.parquet\n"
    )


def write_csv(root: Path, name: str, header: list[str], rows: list[list[str]]) -> Path:
    path = root / LANDING / name
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
    return path


def run_day(root: Path) -> dict[str, Any]:
    """Backfill the one window; return its entry of the report."""
    report = backfill(root, "checked", lo=DAY, hi="2026-03-23", expect=None)
    [window] = report["windows"]
    return window


def output_rows(root: Path) -> list[dict[str, Any]]:
    return pq.read_table(root / OUTPUT).to_pylist()  # pyarrow reads the file weir wrote


def rejected_rows(root: Path) -> list[dict[str, Any]]:
    return pq.read_table(root / (OUTPUT + ".rejected.parquet")).to_pylist()


# ---------------------------------------------------------------- references for each type

INT64 = np.iinfo(np.int64)  # numpy's int64 bounds


def ref_int(text: str) -> tuple[bool, Any]:
    try:
        value = int(text)  # Python's int() also allows surrounding blanks, as weir does
    except ValueError:
        return False, None
    return (INT64.min <= value <= INT64.max), value


def ref_float(text: str) -> tuple[bool, Any]:
    try:
        return True, float(text)  # Python's float()
    except ValueError:
        return False, None


def ref_decimal(text: str, precision: int = 12, scale: int = 2) -> tuple[bool, Any]:
    """Python's decimal module decides; weir's own choice on top: plain notation only (no exponent)."""
    t = text.strip()
    if "e" in t.lower() and t.lower() not in ("nan", "inf", "-inf"):
        return False, "places"
    try:
        value = Decimal(t)
    except InvalidOperation:
        return False, "type"
    if not value.is_finite():
        return False, "type"
    if value.as_tuple().exponent < -scale:
        return False, "places"
    if abs(value) >= Decimal(10) ** (precision - scale):
        return False, "type"
    return True, value.quantize(Decimal(1).scaleb(-scale))


# YAML 1.2.2 core schema, section 10.3.2 (tag:yaml.org,2002:bool); 1 and 0 are weir's own additions
YAML_BOOL = {"true": True, "True": True, "TRUE": True, "false": False, "False": False, "FALSE": False,
             "1": True, "0": False}


def ref_bool(text: str) -> tuple[bool, Any]:
    t = text.strip()
    return (t in YAML_BOOL), YAML_BOOL.get(t)


def ref_date(text: str) -> tuple[bool, Any]:
    try:
        return True, date.fromisoformat(text.strip())  # Python's ISO 8601 calendar-date reader
    except ValueError:
        return False, None


def ref_naive(text: str) -> tuple[bool, Any]:
    try:
        value = datetime.fromisoformat(text.strip())  # Python's ISO 8601 reader
    except ValueError:
        return False, None
    if value.tzinfo is not None:  # weir's rule: an instant in a naive column is kept as its UTC wall time
        value = value.astimezone(UTC).replace(tzinfo=None)
    return True, value


def ref_lisbon(text: str) -> tuple[bool, Any]:
    try:
        value = datetime.fromisoformat(text.strip())
    except ValueError:
        return False, None
    if value.tzinfo is None:
        local = value.replace(tzinfo=LISBON)  # fold=0: the earlier of two repeated wall times (PEP 495)
        # a wall time in the spring-forward gap does not survive a round trip through UTC (zoneinfo)
        if local.astimezone(UTC).astimezone(LISBON).replace(tzinfo=None) != value:
            return False, None
        return True, local
    return True, value


TYPES = {
    "int": (ref_int, pa.int64(),
            ["7", "-3", "+8", " 12 ", "9223372036854775807", "9223372036854775808", "1.5", "abc", "0x10",
             "1e3", ""]),
    "float": (ref_float, pa.float64(),
              ["1.5", "-2e3", " 4.25 ", "1e308", "inf", "abc", "1,5", "0x1p3", ""]),
    "decimal(12,2)": (ref_decimal, pa.decimal128(12, 2),
                      ["1.50", "-0.01", "+3", ".5", "7.", "9999999999.99", "10000000000.00", "1.234", "1.235",
                       "1e2", "n/a", " 4.20 ", "NaN", "-", ""]),
    "bool": (ref_bool, pa.bool_(),
             ["true", "False", "TRUE", "1", "0", " false ", "yes", "t", "2", "on", ""]),
    "date": (ref_date, pa.date32(),
             ["2026-03-22", "2024-02-29", "2023-02-29", "2026-13-01", "22/03/2026", " 2026-03-23 ", "2026-3-2",
              ""]),
    "datetime": (ref_naive, pa.timestamp("us"),
                 ["2026-03-22T10:15:00", "2026-03-22T10:15:00.250", "2026-03-22 10:15", "2026-03-22T10:15:00Z",
                  "2026-03-22T10:15:00+01:00", "2026-03-22", "2026-03-22T25:00:00", "yesterday",
                  "2026-3-22T10:00:00", ""]),
    "datetime(Europe/Lisbon)": (ref_lisbon, pa.timestamp("us", tz="Europe/Lisbon"),
                                ["2026-03-22T10:15:00", "2026-03-29T01:30:00", "2026-10-25T01:30:00",
                                 "2026-03-22T10:15:00Z", "2026-06-01T12:00:00+02:00", "2026-03-22T10:15:00.5-03:00",
                                 "noon", ""]),
    "str": (lambda t: (True, t), pa.large_string(), ["riverside", " old town ", "", "ÿ-ünïcode"]),
}


@pytest.mark.parametrize("declared", list(TYPES))
def test_each_declared_type_reads_and_rejects_values_as_python_does(tmp_path: Path, declared: str):
    ref, arrow_type, values = TYPES[declared]
    root = write_workspace(tmp_path / "ws", {"checked": job_text({"ride_id": "str", "v": f'"{declared}"'})})
    write_csv(root, "rides.csv", ["ride_id", "v"], [[f"r{i}", v] for i, v in enumerate(values)])
    assert run_day(root)["status"] == "done"

    table = pq.read_table(root / OUTPUT)
    if declared == "str":
        assert pa.types.is_string(table.schema.field("v").type) or pa.types.is_large_string(
            table.schema.field("v").type)
    else:
        assert table.schema.field("v").type == arrow_type  # pyarrow's name of the declared type
    got = {r["ride_id"]: r["v"] for r in table.to_pylist()}
    reasons = {r["ride_id"]: r["reason"] for r in rejected_rows(root)} if (
        root / (OUTPUT + ".rejected.parquet")).exists() else {}
    expected_good, expected_bad = {}, {}
    for i, text in enumerate(values):
        rid = f"r{i}"
        if text == "":
            expected_good[rid] = None  # an empty CSV field is a null, allowed by default (nullable: true)
            continue
        ok, value = ref(text)
        if ok:
            expected_good[rid] = value
        else:
            expected_bad[rid] = value
    assert got == expected_good
    assert set(reasons) == set(expected_bad)
    for rid, why in expected_bad.items():
        if why == "places":
            assert reasons[rid] == "v: at most 2 decimal places, no exponent"
        else:
            assert reasons[rid] == f"v: type {declared}"


# ---------------------------------------------------------------- RFC 3339 and decimals


def test_rfc3339_section_5_8_examples_read_as_the_instants_they_name(tmp_path: Path):
    # RFC 3339 section 5.8, all five examples, plus the space separator that section 5.6 allows
    examples = ["1985-04-12T23:20:50.52Z", "1996-12-19T16:39:57-08:00", "1990-12-31T23:59:60Z",
                "1990-12-31T15:59:60-08:00", "1937-01-01T12:00:27.87+00:20", "1996-12-19 16:39:57-08:00"]
    root = write_workspace(tmp_path / "ws", {"checked": job_text({"ride_id": "str", "t": "datetime(UTC)"},
                                                                 on_bad_rows="fail")})
    write_csv(root, "rides.csv", ["ride_id", "t"], [[f"r{i}", v] for i, v in enumerate(examples)])
    assert run_day(root)["status"] == "done"
    got = {r["ride_id"]: r["t"] for r in output_rows(root)}

    # Python's datetime.fromisoformat for the ones it can represent
    assert got["r0"] == datetime.fromisoformat("1985-04-12T23:20:50.52Z")
    assert got["r1"] == datetime.fromisoformat("1996-12-19T16:39:57-08:00")
    assert got["r4"] == datetime.fromisoformat("1937-01-01T12:00:27.87+00:20")
    assert got["r5"] == got["r1"]
    # the same by hand: 16:39:57 at -08:00 is 00:39:57 UTC the next day; +00:20 is twenty minutes ahead
    assert got["r1"] == datetime(1996, 12, 20, 0, 39, 57, tzinfo=UTC)
    assert got["r4"] == datetime(1937, 1, 1, 11, 40, 27, 870000, tzinfo=UTC)
    # Leap seconds: datetime cannot hold second 60 (fromisoformat refuses it). weir reads it as POSIX
    # time does, as the first instant of the next minute: calendar.timegm normalizes tm_sec = 60 the same way.
    with pytest.raises(ValueError):
        datetime.fromisoformat("1990-12-31T23:59:60+00:00")
    leap = datetime.fromtimestamp(calendar.timegm((1990, 12, 31, 23, 59, 60, 0, 0, 0)), UTC)
    assert leap == datetime(1991, 1, 1, tzinfo=UTC)
    assert got["r2"] == leap
    # 15:59:60 at -08:00 is the same leap second (RFC 3339 5.8 says so); timegm on the UTC fields agrees
    assert got["r3"] == datetime.fromtimestamp(calendar.timegm((1990, 12, 31, 15 + 8, 59, 60, 0, 0, 0)), UTC)


def _rfc3339(moment: datetime, offset_minutes: int, digits: int, zulu: bool, sep: str) -> str:
    local = moment.astimezone(timezone(timedelta(minutes=offset_minutes)))
    text = local.strftime(f"%Y-%m-%d{sep}%H:%M:%S")
    if digits:
        text += "." + f"{local.microsecond:06d}"[:digits]
    if zulu and offset_minutes == 0:
        return text + "Z"
    sign = "-" if offset_minutes < 0 else "+"
    return text + f"{sign}{abs(offset_minutes) // 60:02d}:{abs(offset_minutes) % 60:02d}"


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(
    st.datetimes(min_value=datetime(1900, 1, 1), max_value=datetime(2199, 12, 31), timezones=st.just(UTC)),
    st.integers(-23 * 60 - 59, 23 * 60 + 59), st.sampled_from([0, 1, 2, 3, 6]), st.booleans(),
    st.sampled_from(["T", "t", " "])), min_size=1, max_size=40), st.booleans())
def test_any_rfc3339_timestamp_reads_as_datetime_fromisoformat_reads_it(items, sampled):
    import polars as pl

    from runner.io.casts import apply_fast, cast_frame, parse_datetime, plan_casts
    from runner.model.columns import Column

    texts = [_rfc3339(m, off, d, z, sep) for m, off, d, z, sep in items]
    frame = pl.DataFrame({"t": texts})
    # the plan's fast casts are picked from a sample of the values (or from none)
    plan = plan_casts({"t": Column(type="datetime(UTC)")}, frame.schema, "UTC",
                      {"t": frame["t"].head(3)} if sampled else None)
    fast = apply_fast(frame.lazy(), plan).collect()["__typed_t"].to_list()
    both = cast_frame(frame, plan)["__typed_t"].to_list()
    full = frame.select(parse_datetime(pl.col("t"), "UTC")).to_series().to_list()
    # Python 3.11's datetime.fromisoformat reads RFC 3339 timestamps (upper-case T or a space)
    expected = [datetime.fromisoformat(t.replace("t", "T")) for t in texts]
    assert both == expected
    assert full == expected
    assert all(f is None or f == e for f, e in zip(fast, expected, strict=True))  # fast: right or left unread


def test_decimal_sums_equal_pythons_decimal_module_exactly(tmp_path: Path):
    rng = random.Random(7)
    # many 0.10s (0.1 has no exact binary form), cents that add up past float's exact range of cents
    amounts = ["0.10"] * 997 + ["0.20", "0.30", "0.70"] + [f"{rng.randrange(0, 10**10)}.{rng.randrange(100):02d}"
                                                           for _ in range(200)]
    zones = ["riverside" if i % 3 else "harbour" for i in range(len(amounts))]
    rng.shuffle(amounts)
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"zone": "str", "amount": '"decimal(12,2)"'}, on_bad_rows="fail",
        sql="SELECT zone, SUM(amount) AS revenue, COUNT(*) AS rides FROM rides GROUP BY zone")})
    write_csv(root, "rides.csv", ["zone", "amount"], [[z, a] for z, a in zip(zones, amounts, strict=True)])
    assert run_day(root)["status"] == "done"
    got = {r["zone"]: r["revenue"] for r in output_rows(root)}

    expected: dict[str, Decimal] = {}
    floats: dict[str, float] = {}
    for z, a in zip(zones, amounts, strict=True):
        expected[z] = expected.get(z, Decimal(0)) + Decimal(a)  # Python's decimal module: exact
        floats[z] = floats.get(z, 0.0) + float(a)
    assert got == expected
    assert any(Decimal(str(floats[z])) != expected[z] for z in expected)  # the data does expose float drift


# ---------------------------------------------------------------- columns present and absent


def test_a_declared_column_missing_from_a_file_fails_the_window_naming_file_and_column(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"checked": job_text({"ride_id": "str", "zone": "str",
                                                                  "amount": "float"})})
    write_csv(root, "a.csv", ["ride_id", "zone", "amount"], [["r1", "harbour", "1.0"]])
    write_csv(root, "b.csv", ["ride_id", "amount"], [["r2", "2.0"]])
    window = run_day(root)
    assert window["status"] == "failed"
    assert f"{LANDING}/b.csv" in window["error"]
    assert "no column(s) zone" in window["error"]
    assert f"{LANDING}/a.csv" not in window["error"]
    assert not (root / OUTPUT).exists()
    [run] = ledger_rows(root, "SELECT status, error FROM weir_runs")  # sqlite3 reads the ledger
    assert run["status"] == "failed" and "b.csv" in run["error"]


@pytest.mark.parametrize("extra", ["keep", "drop"])
def test_undeclared_columns_are_kept_unless_extra_drop(tmp_path: Path, extra: str):
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"ride_id": "str", "amount": '"decimal(12,2)"'}, extra=f"    extra: {extra}\n")})
    write_csv(root, "rides.csv", ["ride_id", "dock", "amount", "note"],
              [["r1", "dock_01", "1.00", "ok"], ["r2", "dock_02", "2.50", ""]])
    assert run_day(root)["status"] == "done"
    names = pq.read_table(root / OUTPUT).column_names
    if extra == "drop":
        assert sorted(names) == ["amount", "ride_id"]
    else:
        assert sorted(names) == ["amount", "dock", "note", "ride_id"]
        assert {r["ride_id"]: r["dock"] for r in output_rows(root)} == {"r1": "dock_01", "r2": "dock_02"}


# ---------------------------------------------------------------- column rules

def test_each_column_rule_rejects_exactly_the_rows_its_reference_rejects(tmp_path: Path):
    rng = random.Random(11)
    good = [lambda i: f"R{i:07d}", lambda i: rng.choice(["member", "casual", "day_pass"]),
            lambda i: rng.choice(["0.00", "12.50", "500.00", "250.25"]),
            lambda i: rng.choice(["2026-03-22T08:00:00Z", "2026-01-01T00:00:00Z", "2026-12-31T23:59:59Z"]),
            lambda i: rng.choice(["1", "2", "3"])]
    bad = [["x", "R12", "", "R0000001a"], ["student", "Member"], ["-0.01", "500.01"],
           ["2025-12-31T23:59:59Z", "2027-01-01T00:00:00Z"], ["5", "7"]]
    rows = []
    for i in range(160):
        row = [make(i) for make in good]
        if rng.random() < 0.6:  # break one column of most rows, any of them
            column = rng.randrange(len(bad))
            row[column] = rng.choice(bad[column])
        rows.append(row)
    schema = {
        "ride_id": '{type: str, nullable: false, pattern: "^R[0-9]{7}$"}',
        "fare": "{type: str, values: [member, casual, day_pass]}",
        "amount": '{type: "decimal(12,2)", min: 0, max: 500}',
        "started_at": '{type: "datetime(UTC)", min: "2026-01-01T00:00:00Z", max: "2026-12-31T23:59:59Z"}',
        "bikes": "{type: int, values: [1, 2, 3]}",
    }
    root = write_workspace(tmp_path / "ws", {"checked": job_text(schema)})
    write_csv(root, "rides.csv", list(schema), rows)
    assert run_day(root)["status"] == "done"

    def reference(row: list[str]) -> str | None:
        ride, fare, amount, started, bikes = row
        if ride == "":
            return "ride_id: not null"
        if not re.search(r"^R[0-9]{7}$", ride):  # Python's re, the same expression
            return "ride_id: pattern ^R[0-9]{7}$"
        if fare not in ("member", "casual", "day_pass"):
            return "fare: one of member, casual, day_pass"
        if Decimal(amount) < 0:
            return "amount: min 0"
        if Decimal(amount) > 500:
            return "amount: max 500"
        moment = datetime.fromisoformat(started)
        if moment < datetime(2026, 1, 1, tzinfo=UTC):
            return "started_at: min 2026-01-01T00:00:00Z"
        if moment > datetime(2026, 12, 31, 23, 59, 59, tzinfo=UTC):
            return "started_at: max 2026-12-31T23:59:59Z"
        if int(bikes) not in (1, 2, 3):
            return "bikes: one of 1, 2, 3"
        return None

    expected = {i + 1: reference(r) for i, r in enumerate(rows)}
    got = {r["source_row"]: r["reason"] for r in rejected_rows(root)}
    assert got == {n: why for n, why in expected.items() if why is not None}
    assert len(output_rows(root)) == sum(1 for why in expected.values() if why is None)
    assert set(expected.values()) - {None} == {
        "ride_id: not null", "ride_id: pattern ^R[0-9]{7}$", "fare: one of member, casual, day_pass",
        "amount: min 0", "amount: max 500", "started_at: min 2026-01-01T00:00:00Z",
        "started_at: max 2026-12-31T23:59:59Z", "bikes: one of 1, 2, 3"}  # every rule was exercised


def test_a_bad_row_under_fail_names_file_row_column_rule_and_value(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"ride_id": "str", "fare": "{type: str, values: [member, casual, day_pass]}"}, on_bad_rows="fail")})
    rows = [[f"r{i}", "member"] for i in range(30)]
    rows[17][1] = "weekly"
    path = write_csv(root, "rides.csv", ["ride_id", "fare"], rows)
    window = run_day(root)
    assert window["status"] == "failed"
    with open(path, newline="") as fh:  # the csv module numbers the data rows
        row_number = next(i for i, r in enumerate(csv.DictReader(fh), start=1) if r["fare"] == "weekly")
    assert window["error"].startswith(
        f"input rides: {LANDING}/rides.csv, row {row_number}, column fare: value 'weekly' breaks rule "
        "one of member, casual, day_pass")
    assert not (root / OUTPUT).exists()


# ---------------------------------------------------------------- key


def _key_files(root: Path) -> dict[str, list[list[str]]]:
    files = {
        "a.csv": [["r1", "harbour"], ["r2", "campus"], ["r1", "hilltop"], ["r3", "campus"], ["", "harbour"]],
        "b.csv": [["r4", "harbour"], ["r2", "riverside"], ["r1", "campus"], ["", "campus"], ["r5", "campus"]],
    }
    for name, rows in files.items():
        write_csv(root, name, ["ride_id", "zone"], rows)
    return files


def _repeats(files: dict[str, list[list[str]]]) -> dict[tuple[str, int], str]:
    """(file, row) of every row whose ride_id was seen on an earlier row, files in path order
    (a plain Python pass; nulls are never equal, as in a SQL UNIQUE constraint, ISO/IEC 9075)."""
    seen: set[str] = set()
    out = {}
    for name in sorted(files):
        for i, (ride, _) in enumerate(files[name], start=1):
            if ride == "":
                continue
            if ride in seen:
                out[(f"{LANDING}/{name}", i)] = ride
            seen.add(ride)
    return out


@pytest.mark.parametrize("mode", ["quarantine", "drop"])
def test_repeated_keys_across_files_reject_every_row_after_the_first(tmp_path: Path, mode: str):
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"ride_id": "str", "zone": "str"}, extra="    key: [ride_id]\n", on_bad_rows=mode)})
    files = _key_files(root)
    window = run_day(root)
    assert window["status"] == "done"
    repeats = _repeats(files)
    kept = [r for r in output_rows(root)]
    assert len(kept) == sum(len(rows) for rows in files.values()) - len(repeats)
    ids = [r["ride_id"] for r in kept if r["ride_id"] is not None]
    assert len(ids) == len(set(ids))
    # the first occurrence is the one kept: r1 in harbour (a.csv row 1), r2 in campus (a.csv row 2)
    assert {(r["ride_id"], r["zone"]) for r in kept if r["ride_id"] in ("r1", "r2")} == {
        ("r1", "harbour"), ("r2", "campus")}
    [run] = ledger_rows(root, "SELECT rows_rejected FROM weir_runs")
    assert run["rows_rejected"] == len(repeats)
    rejected = OUTPUT + ".rejected.parquet"
    if mode == "quarantine":
        got = {(r["source_file"], r["source_row"]): (r["ride_id"], r["reason"]) for r in rejected_rows(root)}
        assert got == {k: (ride, "key (ride_id) repeated") for k, ride in repeats.items()}
    else:
        assert not (root / rejected).exists()


def test_repeated_keys_under_fail_fail_the_window_naming_values_and_rows(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"ride_id": "str", "zone": "str"}, extra="    key: [ride_id]\n", on_bad_rows="fail")})
    files = _key_files(root)
    window = run_day(root)
    assert window["status"] == "failed"
    error = window["error"]
    assert error.startswith("input rides: key (ride_id) repeated: 2 value(s) on 5 rows")
    assert f"ride_id='r1' 3 times (first {LANDING}/a.csv row 1, last {LANDING}/b.csv row 3)" in error
    assert f"ride_id='r2' 2 times (first {LANDING}/a.csv row 2, last {LANDING}/b.csv row 2)" in error
    assert len(_repeats(files)) == 3
    assert not (root / OUTPUT).exists()


def test_a_key_of_two_columns_compares_typed_values_and_ignores_rows_outside_the_window(tmp_path: Path):
    # time_column keeps the local day 2026-03-22 (Europe/Lisbon is UTC+0 then: IANA tz database)
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"dock": "str", "at": "datetime(Europe/Lisbon)", "bikes": "int"},
        extra="    time_column: at\n    key: [dock, at]\n")})
    write_csv(root, "docks.csv", ["dock", "at", "bikes"], [
        ["dock_01", "2026-03-22T08:00:00Z", "3"],
        ["dock_01", "2026-03-22T08:00:00+00:00", "4"],  # the same instant written differently: a repeat
        ["dock_01", "2026-03-22T09:00:00Z", "5"],
        ["dock_02", "2026-03-22T08:00:00Z", "1"],
        ["dock_03", "2026-03-21T23:00:00Z", "9"],  # before the window: dropped, claims nothing
        ["dock_03", "2026-03-21T23:00:00Z", "9"],
        ["dock_03", "2026-03-22T10:00:00Z", "2"],
    ])
    assert run_day(root)["status"] == "done"
    assert sorted((r["dock"], r["bikes"]) for r in output_rows(root)) == [
        ("dock_01", 3), ("dock_01", 5), ("dock_02", 1), ("dock_03", 2)]
    assert [(r["source_row"], r["reason"]) for r in rejected_rows(root)] == [(2, "key (dock, at) repeated")]
    [run] = ledger_rows(root, "SELECT rows_read, rows_dropped, rows_rejected FROM weir_runs")
    assert (run["rows_read"], run["rows_dropped"], run["rows_rejected"]) == (7, 2, 1)


def test_unique_keys_reject_nothing(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"checked": job_text(
        {"ride_id": "int", "zone": "str"}, extra="    key: [ride_id]\n", on_bad_rows="fail")})
    write_csv(root, "a.csv", ["ride_id", "zone"], [[str(i), "harbour"] for i in range(0, 400, 2)])
    write_csv(root, "b.csv", ["ride_id", "zone"], [[f" {i} ", "campus"] for i in range(1, 400, 2)])
    assert run_day(root)["status"] == "done"
    ids = [r["ride_id"] for r in output_rows(root)]
    assert sorted(ids) == list(range(400))  # every ride kept once (Python's range)
    [run] = ledger_rows(root, "SELECT rows_rejected FROM weir_runs")
    assert run["rows_rejected"] == 0
    assert not (root / (OUTPUT + ".rejected.parquet")).exists()
