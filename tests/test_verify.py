"""`weir verify`: outputs deleted or changed outside weir are found, marked stale, and restored.

Expected values come from outside weir: SHA-256 of file bytes (hashlib), the
ledger's rows (sqlite3), Parquet read and rewritten with pyarrow, and table
rows changed with sqlite3.
"""

from __future__ import annotations

import hashlib
import sqlite3
from datetime import datetime
from pathlib import Path

import pytest
from conftest_run import AT, cli, cli_json
from helpers_plan import (
    LISBON,
    done_runs,
    example_workspace,
    query,
    wid,
    wkey,
    write_jobs,
)

pq = pytest.importorskip("pyarrow.parquet")
pa = pytest.importorskip("pyarrow")

TEN = datetime(2026, 3, 25, 10, tzinfo=LISBON)
ELEVEN = datetime(2026, 3, 25, 11, tzinfo=LISBON)
NOON = datetime(2026, 3, 25, 12, tzinfo=LISBON)


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def output_of(root: Path, job: str, start: datetime) -> Path:
    (rel,) = query(root, "SELECT output FROM weir_windows WHERE job = ? AND window_key = ?", (job, wkey(start)))[0]
    return root / rel


@pytest.fixture
def ws(tmp_path_factory, tmp_path) -> Path:
    return example_workspace(tmp_path_factory, tmp_path / "ws")


@pytest.mark.parametrize("restore", ["tick", "backfill"])
def test_deleted_and_changed_outputs_are_reported_made_stale_and_restored(ws, restore):
    gone, edited, kept = (output_of(ws, "rides_hourly", t) for t in (TEN, ELEVEN, NOON))
    original = {p: sha256(p) for p in (gone, edited, kept)}
    # the ledger's checksums are the SHA-256 of the files weir wrote (hashlib)
    for p, digest in original.items():
        assert query(ws, "SELECT output_checksum FROM weir_windows WHERE output = ?",
                     (p.relative_to(ws).as_posix(),)) == [(digest,)]
    gone.unlink()
    table = pq.read_table(edited)
    rides = table.column("rides").to_pylist()
    pq.write_table(table.set_column(table.schema.get_field_index("rides"), "rides",
                                    pa.array([r + 1 for r in rides], type=table.schema.field("rides").type)),
                   edited)
    before = {job: done_runs(ws, job) for job in ("rides_hourly", "rides_daily")}

    result = cli(ws, "verify", "rides_hourly")
    assert result.exit_code == 1
    problems = cli_json(ws, "verify", "rides_hourly", expect=1)
    assert {(p["window"], p["problem"]) for p in problems} == {(wid(TEN), "missing"), (wid(ELEVEN), "changed")}
    assert f"missing  rides_hourly {wid(TEN)}" in result.stdout
    assert f"changed  rides_hourly {wid(ELEVEN)}" in result.stdout
    assert "2 output problem(s)" in result.stdout

    stale = cli_json(ws, "stale", "--at", AT)
    hourly = {w["window"]: w["reasons"] for w in stale["windows"] if w["job"] == "rides_hourly"}
    assert hourly == {wid(TEN): ["output"], wid(ELEVEN): ["output"]}
    why = cli_json(ws, "why", "rides_hourly", wid(TEN), "--at", AT)
    assert why["state"] == "stale" and "missing" in why["changes"]["output"]

    if restore == "tick":
        ran = cli_json(ws, "tick", "--at", AT)
    else:
        ran = cli_json(ws, "backfill", "rides_hourly", "--from", wid(TEN), "--to", wid(NOON), "--at", AT)
    assert {(w["window"], w["status"]) for w in ran["windows"] if w["status"] == "done"} == \
        {(wid(TEN), "done"), (wid(ELEVEN), "done")}
    # restored byte for byte (hashlib); the untouched output was left alone
    assert {p: sha256(p) for p in original} == original
    assert cli_json(ws, "verify") == []
    assert cli_json(ws, "stale", "--at", AT)["windows"] == []
    # the same data came back: the daily window that reads those hours did not run again (early cutoff)
    assert done_runs(ws, "rides_daily") == before["rides_daily"]
    assert done_runs(ws, "rides_hourly") == {k: n + (k in (wkey(TEN), wkey(ELEVEN)))
                                            for k, n in before["rides_hourly"].items()}


def test_untouched_outputs_pass_and_verify_exits_0(ws):
    result = cli(ws, "verify")
    assert result.exit_code == 0 and "0 output problem(s)" in result.stdout
    assert query(ws, "SELECT COUNT(*) FROM weir_windows WHERE output_state IS NOT NULL") == [(0,)]


def test_verify_of_one_job_leaves_the_others_unchecked(ws):
    output_of(ws, "rides_daily", datetime(2026, 3, 25, tzinfo=LISBON)).unlink()
    assert cli_json(ws, "verify", "rides_hourly") == []
    problems = cli_json(ws, "verify", "rides_daily", expect=1)
    assert [(p["job"], p["problem"]) for p in problems] == [("rides_daily", "missing")]


DAYS_JOB = """\
description: Docks per day, kept in a table.
window: {every: 1d, start: 2026-03-24, end: 2026-03-27, timezone: Europe/Lisbon}
steps:
  - sql: SELECT window_end AS day_end, 20 AS docks FROM bounds
output:
  database: sqlite:///state/reports.sqlite
  table: dock_days
"""


def test_table_outputs_changed_or_deleted_outside_weir_are_found_and_restored(tmp_path):
    root = write_jobs(tmp_path / "ws", {"dock_days": DAYS_JOB})
    assert cli_json(root, "tick", "--at", AT)["counts"] == {"done": 3}
    days = [datetime(2026, 3, d, tzinfo=LISBON) for d in (24, 25, 26)]
    db = root / "state" / "reports.sqlite"
    with sqlite3.connect(db) as conn:
        original = sorted(conn.execute("SELECT * FROM dock_days").fetchall())
        conn.execute("UPDATE dock_days SET docks = 21 WHERE window_start = ?", (wkey(days[0]),))
        conn.execute("DELETE FROM dock_days WHERE window_start = ?", (wkey(days[1]),))
    conn.close()
    problems = cli_json(root, "verify", expect=1)
    assert {(p["window"], p["problem"]) for p in problems} == {(wid(days[0]), "changed"), (wid(days[1]), "missing")}
    assert {w["window"] for w in cli_json(root, "stale", "--at", AT)["windows"]} == {wid(days[0]), wid(days[1])}
    assert cli_json(root, "tick", "--at", AT)["counts"] == {"done": 2}
    with sqlite3.connect(db) as conn:
        assert sorted(conn.execute("SELECT * FROM dock_days").fetchall()) == original
    conn.close()
    assert cli_json(root, "verify") == []


def test_verify_without_a_ledger_reports_nothing_and_creates_none(tmp_path):
    root = write_jobs(tmp_path / "ws", {"dock_days": DAYS_JOB})
    assert cli_json(root, "verify") == []
    assert not (root / "state" / "ledger.sqlite").exists()



def test_a_corrupted_output_database_is_reported_and_its_windows_marked_like_missing_ones(tmp_path):
    """Hardening item 14: verify on a corrupted output SQLite file ended in `internal error: DatabaseError`."""
    root = write_jobs(tmp_path / "ws", {"dock_days": DAYS_JOB})
    assert cli_json(root, "tick", "--at", AT)["counts"] == {"done": 3}
    days = [wid(datetime(2026, 3, d, tzinfo=LISBON)) for d in (24, 25, 26)]
    db = root / "state" / "reports.sqlite"
    for suffix in ("-wal", "-shm"):
        Path(f"{db}{suffix}").unlink(missing_ok=True)
    db.write_bytes(b"not the bytes of any database\n" * 300)
    with pytest.raises(sqlite3.DatabaseError, match="not a database"):  # sqlite3 agrees it is unreadable
        sqlite3.connect(db).execute("SELECT * FROM dock_days")
    result = cli(root, "verify")
    assert result.exit_code == 1, result.stderr
    assert "internal error" not in result.stderr and "Traceback" not in result.stderr
    assert "3 output problem(s)" in result.stdout
    problems = cli_json(root, "verify", expect=1)
    assert {(p["window"], p["problem"]) for p in problems} == {(d, "unreadable") for d in days}
    assert all("not a database" in p["detail"] for p in problems)
    # marked like missing ones: stale by output, and why says what verify found
    stale = cli_json(root, "stale", "--at", AT)["windows"]
    assert {(w["window"], tuple(w["reasons"])) for w in stale} == {(d, ("output",)) for d in days}
    why = cli_json(root, "why", "dock_days", days[0], "--at", AT)
    assert why["state"] == "stale" and "unreadable" in why["changes"]["output"]
    assert query(root, "SELECT COUNT(*) FROM weir_windows WHERE output_state = 'unreadable'") == [(3,)]
