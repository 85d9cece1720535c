"""Output checks guard the swap; stamps describe the run without changing the content digest.

Expected figures come from outside the code under test: DuckDB and Python's
csv, collections and decimal modules over the same input files, zoneinfo for
window bounds, Python's sqlite3 for the ledger, hashlib for file bytes and
git itself for the code version. The data is the invented city bike-share
(tests/helpers_data.py).
"""

from __future__ import annotations

import csv
import shutil
import subprocess
from collections import Counter
from datetime import UTC, date, datetime, timedelta
from decimal import Decimal
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from conftest_run import AT, backfill, cli_json, ledger_rows, sha256_file
from helpers_data import rides_file, write_rides, write_workspace

duckdb = pytest.importorskip("duckdb")
pq = pytest.importorskip("pyarrow.parquet")

LISBON = ZoneInfo("Europe/Lisbon")
DAY1, DAY2, DAY3 = date(2026, 3, 22), date(2026, 3, 23), date(2026, 3, 24)
GROUPED = "SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue FROM rides GROUP BY zone, fare"


def job_text(sql: str = GROUPED, checks: list[str] | None = None, stamp: bool = False,
             name: str = "rides_daily") -> str:
    lines = "".join(f"    - {c}\n" for c in checks or [])
    return (
        "window: {every: 1d, start: 2026-03-22, timezone: Europe/Lisbon}\n"
        "inputs:\n"
        "  rides:\n"
        "    files: state/landing/rides/{start:%Y-%m-%d}/*.csv\n"
        "    schema: {ride_id: str, started_at: datetime(Europe/Lisbon), zone: str, fare: str,"
        " amount: \"decimal(10,2)\"}\n"
        f"steps:\n  - sql: |\n      {sql}\n"
        f"output:\n  path: state/warehouse/{name}/{{start:%Y-%m-%d}}.parquet\n"
        + (f"  stamp: {str(stamp).lower()}\n" if stamp else "")
        + (f"  checks:\n{lines}" if checks else "")
    )


def output(root: Path, day: date, name: str = "rides_daily") -> Path:
    return root / f"state/warehouse/{name}/{day:%Y-%m-%d}.parquet"


def run(root: Path, day: date, job: str = "rides_daily", extra: tuple[str, ...] = ()) -> dict[str, Any]:
    report = backfill(root, job, lo=f"{day:%Y-%m-%d}", hi=f"{day + timedelta(days=1):%Y-%m-%d}", extra=extra,
                      expect=None)
    [window] = report["windows"]
    return window


def csv_rows(root: Path, day: date) -> list[dict[str, str]]:
    with open(rides_file(root, day), newline="") as fh:  # Python's csv module
        return list(csv.DictReader(fh))


def history(root: Path, job: str = "rides_daily") -> list[dict[str, Any]]:
    return cli_json(root, "history", job)


def set_sql(root: Path, text: str) -> None:
    (root / "jobs" / "rides_daily.yaml").write_text(text)


# ---------------------------------------------------------------- the guard


def test_a_repeated_output_key_fails_the_window_before_the_swap_and_history_names_the_check(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(checks=["key: [zone, fare]"])})
    write_rides(root, DAY1, rows=80)
    assert run(root, DAY1)["status"] == "done"
    good = sha256_file(output(root, DAY1))  # hashlib

    set_sql(root, job_text(sql="SELECT zone, fare, amount FROM rides", checks=["key: [zone, fare]"]))
    window = run(root, DAY1)
    assert window["status"] == "failed"
    assert sha256_file(output(root, DAY1)) == good  # the last good output stays, byte for byte

    pairs = Counter((r["zone"], r["fare"]) for r in csv_rows(root, DAY1))  # Python's collections.Counter
    repeated = {k: n for k, n in pairs.items() if n > 1}
    path = f"state/warehouse/rides_daily/{DAY1:%Y-%m-%d}.parquet"
    assert window["error"].startswith(
        f"output {path}: check key [zone, fare] failed: {len(repeated)} key value(s) appear more than once "
        f"({sum(repeated.values())} rows); e.g. ")
    assert window["error"].count("copies=") == min(5, len(repeated))
    latest = history(root)[0]
    assert latest["status"] == "failed" and latest["failed_check"] == "key [zone, fare]"
    [state] = ledger_rows(root, "SELECT state FROM weir_windows")  # sqlite3: the window is failed
    assert state["state"] == "failed"


def test_not_null_names_the_rows_that_hold_nulls(tmp_path: Path):
    sql = "SELECT zone, fare, NULLIF(fare, 'casual') AS paid_fare, COUNT(*) AS rides FROM rides GROUP BY zone, fare"
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(sql=sql, checks=["not_null: [zone, paid_fare]"])})
    write_rides(root, DAY1, rows=120)
    window = run(root, DAY1)
    casual_zones = {r["zone"] for r in csv_rows(root, DAY1) if r["fare"] == "casual"}  # Python's set
    assert window["status"] == "failed"
    assert f"check not_null [zone, paid_fare] failed: {len(casual_zones)} row(s) have nulls; e.g. row " in window["error"]
    assert window["error"].count("paid_fare=None") == min(5, len(casual_zones))
    assert history(root)[0]["failed_check"] == "not_null [zone, paid_fare]"
    assert not output(root, DAY1).exists()


@pytest.mark.parametrize(("bounds", "passes"), [
    ("{min: 15, max: 15}", True), ("{min: 16}", False), ("{max: 14}", False)])
def test_rows_min_and_max_bound_the_output(tmp_path: Path, bounds: str, passes: bool):
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(checks=[f"rows: {bounds}"])})
    write_rides(root, DAY1, rows=150)
    groups = len({(r["zone"], r["fare"]) for r in csv_rows(root, DAY1)})
    assert groups == 15  # five zones x three fares, all present (Python's set)
    window = run(root, DAY1)
    assert (window["status"] == "done") is passes
    if not passes:
        word = "fewer" if "min" in bounds else "more"
        assert f"failed: {groups} row(s), {word} than 1" in window["error"]
        assert history(root)[0]["failed_check"].startswith("rows ")


def test_change_in_rows_compares_with_the_previous_window_and_not_on_the_first(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(
        sql="SELECT ride_id, zone, amount FROM rides", checks=["change: {rows: true, max_drop: 50%}"])})
    for day, count in ((DAY1, 100), (DAY2, 60), (DAY3, 20)):
        write_rides(root, day, rows=count)
    assert run(root, DAY1)["status"] == "done"  # the first window has nothing to compare with
    assert run(root, DAY2)["status"] == "done"  # 100 -> 60 is a 40% drop
    third = run(root, DAY3)
    before, now = len(csv_rows(root, DAY2)), len(csv_rows(root, DAY3))
    assert third["status"] == "failed"
    assert third["error"].endswith(f"check change of rows failed: rows fell {(before - now) / before:.1%}, from "
                                   f"{before} in the previous window to {now}; at most 50% allowed")
    assert history(root)[0]["failed_check"] == "change of rows"
    assert not output(root, DAY3).exists()


def test_change_of_a_column_sum_fails_on_a_sudden_rise(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(
        sql="SELECT zone, SUM(amount) AS revenue FROM rides GROUP BY zone",
        checks=["change: {column: revenue, max_rise: 100%, max_drop: 90%}"])})
    write_rides(root, DAY1, rows=60)
    write_rides(root, DAY2, rows=60, replace={i: {"amount": "99.99"} for i in range(40)})
    assert run(root, DAY1)["status"] == "done"
    window = run(root, DAY2)
    first = sum(Decimal(r["amount"]) for r in csv_rows(root, DAY1))  # Python's decimal module
    second = sum(Decimal(r["amount"]) for r in csv_rows(root, DAY2))
    rise = (second - first) / first
    assert rise > 1
    assert window["status"] == "failed"
    assert f"sum of revenue rose {float(rise):.1%}, from {float(first):g}" in window["error"]
    assert history(root)[0]["failed_check"] == "change of revenue"


def test_a_rule_reports_the_failing_row_count_duckdb_finds_and_at_most_five_examples(tmp_path: Path):
    rule = "rides >= 4 AND revenue < 60"
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(checks=["key: [zone, fare]",
                                                                             f'rule: "{rule}"'])})
    write_rides(root, DAY1, rows=150)
    before_rule = write_workspace(tmp_path / "plain", {"rides_daily": job_text()})
    shutil.copytree(root / "state" / "landing", before_rule / "state" / "landing")
    assert run(before_rule, DAY1)["status"] == "done"

    window = run(root, DAY1)
    # DuckDB groups the same CSV itself and counts the groups breaking the rule
    con = duckdb.connect()
    failing = con.execute(f"""
        SELECT COUNT(*) FROM (
            SELECT zone, fare, COUNT(*) AS rides, SUM(CAST(amount AS DECIMAL(10, 2))) AS revenue
            FROM read_csv(?, header = true, all_varchar = true) GROUP BY zone, fare)
        WHERE NOT ({rule})""", [str(rides_file(root, DAY1))]).fetchone()[0]
    assert failing > 5
    assert window["status"] == "failed"
    assert window["error"].startswith(f"output state/warehouse/rides_daily/{DAY1:%Y-%m-%d}.parquet: "
                                      f"check rule {rule} failed on {failing} row(s); e.g. row ")
    assert window["error"].count("row ") == 5  # five examples, each "row N: ..."
    # the same count by DuckDB over the output the job writes without the rule (pyarrow could do it too)
    same = con.execute(f"SELECT COUNT(*) FROM read_parquet(?) WHERE NOT ({rule})",
                       [str(output(before_rule, DAY1))]).fetchone()[0]
    assert same == failing
    assert history(root)[0]["failed_check"] == f"rule {rule}"


def test_a_rule_that_cannot_be_evaluated_fails_the_window_with_the_reason(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(checks=['rule: "no_such_column > 0"'])})
    write_rides(root, DAY1, rows=30)
    window = run(root, DAY1)
    assert window["status"] == "failed"
    assert "check rule no_such_column > 0 cannot be evaluated" in window["error"]
    assert "Traceback" not in window["error"]


# ---------------------------------------------------------------- stamps


def test_stamps_name_the_window_the_run_and_the_code_version(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(stamp=True)})
    write_rides(root, DAY1, rows=40)
    git = shutil.which("git")
    described = None
    if git:
        env = ["-c", "user.name=Dock Keeper", "-c", "user.email=docks@bikeshare.invalid"]
        subprocess.run([git, "init", "-q"], cwd=root, check=True)
        subprocess.run([git, *env, "add", "jobs"], cwd=root, check=True)
        subprocess.run([git, *env, "commit", "-q", "-m", "rides job"], cwd=root, check=True)
    assert run(root, DAY1)["status"] == "done"
    if git:
        described = subprocess.run([git, "describe", "--always", "--dirty", "--tags"], cwd=root,
                                   capture_output=True, text=True, check=True).stdout.strip()
    rows = pq.read_table(output(root, DAY1)).to_pylist()  # pyarrow
    [run_row] = ledger_rows(root, "SELECT id, code_version FROM weir_runs")
    # the local day's bounds in UTC, by zoneinfo
    start = datetime(2026, 3, 22, tzinfo=LISBON).astimezone(UTC)
    end = datetime(2026, 3, 23, tzinfo=LISBON).astimezone(UTC)
    for r in rows:
        assert r["window_start"] == start
        assert r["window_end"] == end
        assert r["run_id"] == run_row["id"]
        assert r["code_version"] == (run_row["code_version"] or "")
    if described:
        assert rows[0]["code_version"] == described
    assert sum(r["rides"] for r in rows) == len(csv_rows(root, DAY1))


def test_stamps_leave_the_digest_alone_so_a_forced_rerun_keeps_consumers_current(tmp_path: Path):
    consumer = (
        "window: {every: 1d, start: 2026-03-22, timezone: Europe/Lisbon}\n"
        "inputs:\n  daily: {job: rides_daily}\n"
        "steps:\n  - sql: SELECT zone, SUM(rides) AS rides FROM daily GROUP BY zone\n"
        "output:\n  path: state/warehouse/zones/{start:%Y-%m-%d}.parquet\n")
    root = write_workspace(tmp_path / "ws", {"rides_daily": job_text(stamp=True), "zones": consumer})
    write_rides(root, DAY1, rows=50)
    report = backfill(root, "rides_daily", "zones", lo="2026-03-22", hi="2026-03-23")
    assert [w["status"] for w in report["windows"]] == ["done", "done"]
    first_bytes = sha256_file(output(root, DAY1))

    forced = run(root, DAY1, extra=("--force", "--yes"))
    assert forced["status"] == "done"
    runs = ledger_rows(root, "SELECT id, output_digest, output_checksum FROM weir_runs WHERE job = 'rides_daily' "
                             "ORDER BY id")
    assert len(runs) == 2
    assert runs[0]["output_checksum"] != runs[1]["output_checksum"]  # the bytes differ (a new run_id) ...
    assert sha256_file(output(root, DAY1)) != first_bytes
    assert runs[0]["output_digest"] == runs[1]["output_digest"]  # ... the content does not
    assert {r["run_id"] for r in pq.read_table(output(root, DAY1)).to_pylist()} == {runs[1]["id"]}

    stale = cli_json(root, "stale", "--at", AT)
    assert stale["windows"] == []
    again = backfill(root, "zones", lo="2026-03-22", hi="2026-03-23")
    assert [w["status"] for w in again["windows"]] == ["skipped"]

    # and the check can fail: changed data upstream does make the consumer stale
    write_rides(root, DAY1, rows=51)
    assert run(root, DAY1)["status"] == "done"
    stale = cli_json(root, "stale", "--at", AT)
    assert [(w["job"], w["reasons"]) for w in stale["windows"]] == [("zones", ["upstream"])]
