"""Bad rows: fail, quarantine or drop; the limits beyond which a window fails anyway; the rejected file.

The reference for which rows are bad, and why, is DuckDB: it reads the same
CSV file itself and applies the same rules in SQL (TRY_CAST for types, IN for
value sets, comparisons for min/max, regexp_matches for patterns). Ledger
figures are read with Python's sqlite3, output files with pyarrow and hashlib.
The data is the invented city bike-share.
"""

from __future__ import annotations

import csv
import random
import re
from pathlib import Path
from typing import Any

import pytest
from conftest_run import backfill, cli, cli_json, ledger_rows, sha256_file
from helpers_data import write_workspace

duckdb = pytest.importorskip("duckdb")
pq = pytest.importorskip("pyarrow.parquet")

DAY = "2026-03-22"
NEXT = "2026-03-23"
LANDING = f"state/landing/rides/{DAY}"
OUTPUT = f"state/warehouse/rides_checked/{DAY}.parquet"
REJECTED = OUTPUT + ".rejected.parquet"
ZONES = ["riverside", "old_town", "harbour", "hilltop", "campus"]
FARES = ["member", "casual", "day_pass"]

SCHEMA = """\
    schema:
      ride_id: {type: str, nullable: false, pattern: "^R[0-9]{7}$"}
      started_at: datetime(UTC)
      zone: {type: str, values: [riverside, old_town, harbour, hilltop, campus]}
      fare: {type: str, values: [member, casual, day_pass]}
      amount: {type: "decimal(10,2)", min: 0, max: 300}
      bikes: {type: int, min: 1}
"""


def job_text(on_bad_rows: str = "quarantine", limits: str = "", checks: str = "") -> str:
    return (
        "window: {every: 1d, start: 2026-03-22, timezone: Europe/Lisbon}\n"
        "inputs:\n"
        "  rides:\n"
        "    files: state/landing/rides/{start:%Y-%m-%d}/*.csv\n"
        f"    on_bad_rows: {on_bad_rows}\n"
        f"{limits}{SCHEMA}"
        "steps:\n"
        "  - sql: SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue FROM rides GROUP BY zone, fare\n"
        "output:\n"
        "  path: state/warehouse/rides_checked/{start:%Y-%m-%d}.parquet\n"
        f"{checks}"
    )


GOOD = {
    "ride_id": lambda rng, i: f"R{i:07d}",
    "started_at": lambda rng, i: f"2026-03-22T{rng.randrange(24):02d}:{rng.randrange(60):02d}:00Z",
    "zone": lambda rng, i: rng.choice(ZONES),
    "fare": lambda rng, i: rng.choice(FARES),
    "amount": lambda rng, i: f"{rng.randrange(0, 300)}.{rng.randrange(100):02d}",
    "bikes": lambda rng, i: str(rng.randrange(1, 4)),
}
# bad values both engines read the same way (DuckDB would round '1.5' to an integer; weir refuses it)
BAD = {
    "ride_id": ["", "R12", "r0000001", "R00000012"],
    "started_at": ["soon", "2026-02-30T10:00:00Z", "2026-03-22T24:30:00Z"],
    "zone": ["downtown", "Harbour"],
    "fare": ["weekly"],
    "amount": ["n/a", "-0.50", "300.01", "12345678901", "1.234"],
    "bikes": ["0", "-2", "two"],
}


def ride_rows(count: int, seed: int, bad_share: float) -> list[list[str]]:
    rng = random.Random(seed)
    rows = []
    for i in range(count):
        row = {c: make(rng, i) for c, make in GOOD.items()}
        if rng.random() < bad_share:
            column = rng.choice(list(BAD))
            row[column] = rng.choice(BAD[column])
        rows.append(list(row.values()))
    return rows


def write_rides(root: Path, rows: list[list[str]], name: str = "rides.csv") -> Path:
    path = root / LANDING / name
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(list(GOOD))
        writer.writerows(rows)
    return path


def run_day(root: Path) -> dict[str, Any]:
    report = backfill(root, "rides_checked", lo=DAY, hi=NEXT, expect=None)
    [window] = report["windows"]
    return window


def last_run(root: Path) -> Any:
    return ledger_rows(root, "SELECT * FROM weir_runs ORDER BY id DESC LIMIT 1")[0]  # Python's sqlite3


def duckdb_reasons(path: Path) -> dict[int, str]:
    """Row number (1 = first data row) -> the first rule each bad row breaks, in schema order, by DuckDB."""
    con = duckdb.connect()
    con.execute("SET threads = 1")  # one reader thread: row_number() follows the file's order
    con.execute("SET TimeZone = 'UTC'")
    rows = con.execute(r"""
        WITH raw AS (
            SELECT row_number() OVER () AS line, *
            FROM read_csv(?, header = true, all_varchar = true)
        )
        SELECT line, CASE
            WHEN ride_id IS NULL THEN 'ride_id: not null'
            WHEN NOT regexp_matches(ride_id, '^R[0-9]{7}$') THEN 'ride_id: pattern ^R[0-9]{7}$'
            WHEN started_at IS NOT NULL AND TRY_CAST(started_at AS TIMESTAMPTZ) IS NULL
                THEN 'started_at: type datetime(UTC)'
            WHEN zone NOT IN ('riverside', 'old_town', 'harbour', 'hilltop', 'campus')
                THEN 'zone: one of riverside, old_town, harbour, hilltop, campus'
            WHEN fare NOT IN ('member', 'casual', 'day_pass') THEN 'fare: one of member, casual, day_pass'
            WHEN amount IS NOT NULL AND TRY_CAST(amount AS DECIMAL(10, 2)) IS NULL THEN 'amount: type decimal(10,2)'
            WHEN TRY_CAST(amount AS DECIMAL(38, 10)) <> TRY_CAST(amount AS DECIMAL(10, 2))
                THEN 'amount: at most 2 decimal places, no exponent'
            WHEN TRY_CAST(amount AS DECIMAL(10, 2)) < 0 THEN 'amount: min 0'
            WHEN TRY_CAST(amount AS DECIMAL(10, 2)) > 300 THEN 'amount: max 300'
            WHEN bikes IS NOT NULL AND TRY_CAST(bikes AS BIGINT) IS NULL THEN 'bikes: type int'
            WHEN TRY_CAST(bikes AS BIGINT) < 1 THEN 'bikes: min 1'
        END AS reason
        FROM raw
    """, [str(path)]).fetchall()
    return {line: reason for line, reason in rows if reason is not None}


def test_rejected_rows_and_reasons_equal_duckdbs_count_over_the_same_file(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_checked": job_text()})
    rows = ride_rows(600, seed=5, bad_share=0.15)
    path = write_rides(root, rows)
    assert run_day(root)["status"] == "done"

    expected = duckdb_reasons(path)
    assert len(expected) > 50 and len(set(expected.values())) == 11  # every rule is broken somewhere
    rejected = pq.read_table(root / REJECTED).to_pylist()  # pyarrow reads the rejected file
    assert {r["source_row"]: r["reason"] for r in rejected} == expected
    assert {r["source_file"] for r in rejected} == {f"{LANDING}/rides.csv"}
    assert {r["input"] for r in rejected} == {"rides"}
    # each rejected row carries its values as read (text), so the offending value is there to see
    for r in rejected:
        assert [r[c] or "" for c in GOOD] == rows[r["source_row"] - 1]
    run = last_run(root)
    assert run["rows_read"] == len(rows)
    assert run["rows_rejected"] == len(expected)
    kept = pq.read_table(root / OUTPUT).to_pylist()
    assert sum(r["rides"] for r in kept) == len(rows) - len(expected)


def test_history_shows_the_rejected_count_that_the_ledger_records(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_checked": job_text(on_bad_rows="drop")})
    path = write_rides(root, ride_rows(200, seed=8, bad_share=0.1))
    assert run_day(root)["status"] == "done"
    bad = len(duckdb_reasons(path))
    assert last_run(root)["rows_rejected"] == bad
    [entry] = cli_json(root, "history", "rides_checked")
    assert entry["rows_rejected"] == bad
    text = cli(root, "history", "rides_checked").stdout
    header, row = [ln for ln in text.splitlines() if ln.strip()][:2]
    # the rejected column of the table holds the count (columns are aligned under their headers)
    start = header.index("rejected")
    assert row[start:start + len("rejected")].strip() == str(bad)
    assert not (root / REJECTED).exists()  # drop keeps no rejected file


def test_on_bad_rows_fail_fails_the_window_and_keeps_the_previous_output(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_checked": job_text(on_bad_rows="fail")})
    write_rides(root, ride_rows(100, seed=1, bad_share=0.0))
    assert run_day(root)["status"] == "done"
    before = sha256_file(root / OUTPUT)  # hashlib
    rows = ride_rows(100, seed=1, bad_share=0.0)
    rows[41][4] = "n/a"
    write_rides(root, rows)
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"].startswith(f"input rides: {LANDING}/rides.csv, row 42, column amount: value 'n/a' "
                                      "breaks rule type decimal(10,2)")
    assert sha256_file(root / OUTPUT) == before
    assert not (root / REJECTED).exists()
    assert last_run(root)["status"] == "failed"


@pytest.mark.parametrize("bad", [4, 5])
def test_max_bad_rows_fails_the_window_beyond_the_limit(tmp_path: Path, bad: int):
    root = write_workspace(tmp_path / "ws", {"rides_checked": job_text(limits="    max_bad_rows: 4\n")})
    rows = ride_rows(300, seed=2, bad_share=0.0)
    for i in random.Random(3).sample(range(len(rows)), bad):
        rows[i][5] = "0"  # bikes: min 1
    path = write_rides(root, rows)
    assert len(duckdb_reasons(path)) == bad
    window = run_day(root)
    if bad <= 4:
        assert window["status"] == "done"
        assert len(pq.read_table(root / REJECTED)) == bad
    else:
        assert window["status"] == "failed"
        assert "more than max_bad_rows 4 bad rows" in window["error"]
        assert re.search(r"row \d+, column bikes: value '0' breaks rule min 1", window["error"])
        assert not (root / OUTPUT).exists() and not (root / REJECTED).exists()


@pytest.mark.parametrize(("bad", "passes"), [(10, True), (11, False)])
def test_max_bad_fraction_fails_the_window_beyond_the_share_of_its_rows(tmp_path: Path, bad: int, passes: bool):
    root = write_workspace(tmp_path / "ws", {"rides_checked": job_text(limits="    max_bad_fraction: 5%\n")})
    rows = ride_rows(200, seed=4, bad_share=0.0)
    for i in random.Random(6).sample(range(len(rows)), bad):
        rows[i][2] = "downtown"
    path = write_rides(root, rows)
    share = len(duckdb_reasons(path)) / len(rows)
    assert (share <= 0.05) is passes  # 10 of 200 is exactly 5%: allowed; 11 is 5.5%
    window = run_day(root)
    if passes:
        assert window["status"] == "done"
    else:
        assert window["status"] == "failed"
        assert window["error"] == "input rides: 11 bad row(s) of 200 (5.50%) exceed max_bad_fraction 5.00%"
        assert not (root / OUTPUT).exists()
        assert last_run(root)["rows_rejected"] == 11


def test_the_rejected_file_is_replaced_with_the_output_and_removed_after_a_clean_run(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_checked": job_text(
        checks="  checks:\n    - rows: {min: 15}\n")})
    folder = (root / OUTPUT).parent
    rows = ride_rows(150, seed=9, bad_share=0.0)
    assert len({(r[2], r[3]) for r in rows}) == 15  # all five zones x three fares occur (Python's set)

    rows[3][2] = "downtown"
    rows[7][5] = "0"
    write_rides(root, rows)
    assert run_day(root)["status"] == "done"
    first = pq.read_table(root / REJECTED).to_pylist()
    assert sorted(r["source_row"] for r in first) == [4, 8]

    rows[3][2] = "harbour"
    rows[99][4] = "-1.00"
    write_rides(root, rows)
    assert run_day(root)["status"] == "done"
    second = pq.read_table(root / REJECTED).to_pylist()
    assert sorted((r["source_row"], r["reason"]) for r in second) == [(8, "bikes: min 1"), (100, "amount: min 0")]

    # a failing output check swaps neither file: both stay byte-identical (hashlib)
    output_sum, rejected_sum = sha256_file(root / OUTPUT), sha256_file(root / REJECTED)
    few = [[f"R{i:07d}", "2026-03-22T10:00:00Z", "campus", "member", "1.00", "1"] for i in range(20)]
    few[5][5] = "0"
    write_rides(root, few)
    window = run_day(root)
    assert window["status"] == "failed"
    assert window["error"] == f"output {OUTPUT}: check rows min 15 failed: 1 row(s), fewer than 15"
    assert sha256_file(root / OUTPUT) == output_sum
    assert sha256_file(root / REJECTED) == rejected_sum

    write_rides(root, ride_rows(150, seed=9, bad_share=0.0))
    assert run_day(root)["status"] == "done"
    assert (root / OUTPUT).exists()
    assert not (root / REJECTED).exists()
    assert [p.name for p in folder.iterdir() if p.name.startswith(".")] == []  # no temporary files left
