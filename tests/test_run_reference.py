"""Running windows, checked against engines outside the project.

Every expected value here is computed by DuckDB, Python's sqlite3, pandas or
pyarrow over the same input files that weir reads; the source is named beside
each check. The data is the invented bike-share (tests/helpers_data.py), and
the range crosses Lisbon's spring-forward day (2026-03-29 has 23 hours), so
hourly buckets and local days are exercised where they are easiest to get wrong.
"""

from __future__ import annotations

import csv
import sqlite3
from datetime import UTC, date, datetime, timedelta
from decimal import Decimal
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from conftest_run import backfill, ledger_rows, statuses
from helpers_data import (
    TZ,
    daily_job,
    days,
    docks_file,
    fleet_job,
    rides_file,
    rollup_job,
    write_dock_changes,
    write_rides,
    write_workspace,
)

duckdb = pytest.importorskip("duckdb")
pd = pytest.importorskip("pandas")
pq = pytest.importorskip("pyarrow.parquet")
pl = pytest.importorskip("polars")

DAYS = days(date(2026, 3, 28), 2)  # Saturday, then Lisbon's 23-hour spring-forward Sunday


@pytest.fixture(scope="module")
def rollup_ws(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Hourly and daily rollups backfilled over two days (one of them a DST day)."""
    root = write_workspace(tmp_path_factory.mktemp("rollup") / "ws",
                           {"rides_hourly": rollup_job(), "rides_daily": daily_job()})
    for day in DAYS:
        write_rides(root, day, rows=80)
    report = backfill(root, "rides_hourly", "rides_daily", lo="2026-03-28", hi="2026-03-30")
    # 24 + 23 hourly windows and 2 daily ones (Europe/Lisbon DST rules: IANA tz database)
    assert statuses(report, "rides_hourly") == {"done": 47}
    assert statuses(report, "rides_daily") == {"done": 2}
    return root


def _done_outputs(root: Path, job: str) -> dict[str, Path]:
    """window_key (UTC start) -> output file, from the ledger's window states."""
    rows = ledger_rows(root, "SELECT window_key, output FROM weir_windows WHERE job = ? AND state = 'done'", (job,))
    return {r["window_key"]: root / r["output"] for r in rows}


def _cents(value: Decimal | float | str) -> int:
    return int((Decimal(str(value)) * 100).to_integral_value())


def _weir_hourly(root: Path) -> dict[tuple[str, str, str], tuple[int, int]]:
    out = {}
    for key, path in _done_outputs(root, "rides_hourly").items():
        for zone, fare, rides, revenue in pl.read_parquet(path).select("zone", "fare", "rides", "revenue").rows():
            out[(key, zone, fare)] = (rides, _cents(revenue))
    return out


def test_hourly_rollup_equals_duckdb_and_sqlite3_over_the_same_csv_files(rollup_ws: Path):
    files = [str(rides_file(rollup_ws, d)) for d in DAYS]
    weir = _weir_hourly(rollup_ws)

    # Reference 1: DuckDB reads the CSV files itself, parses the ISO 8601 offsets and buckets by UTC hour.
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    rows = con.execute(
        """
        SELECT strftime(date_trunc('hour', started_at AT TIME ZONE 'UTC'), '%Y-%m-%dT%H:00:00Z') AS hour,
               zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue
        FROM read_csv(?, header = true, columns = {'ride_id': 'VARCHAR', 'started_at': 'TIMESTAMPTZ',
                      'zone': 'VARCHAR', 'fare': 'VARCHAR', 'amount': 'DECIMAL(10,2)'})
        GROUP BY ALL
        """, [files]).fetchall()
    by_duckdb = {(h, z, f): (n, _cents(r)) for h, z, f, n, r in rows}

    # Reference 2: Python's sqlite3; the CSV is loaded with the csv module, and SQLite's
    # strftime converts "+HH:MM" offsets to UTC (SQLite date and time functions, time values 2-10).
    db = sqlite3.connect(":memory:")
    db.execute("CREATE TABLE rides (ride_id TEXT, started_at TEXT, zone TEXT, fare TEXT, amount TEXT)")
    for name in files:
        with open(name, newline="", encoding="utf-8") as fh:
            db.executemany("INSERT INTO rides VALUES (:ride_id, :started_at, :zone, :fare, :amount)",
                           list(csv.DictReader(fh)))
    rows = db.execute(
        """
        SELECT strftime('%Y-%m-%dT%H:00:00Z', started_at) AS hour, zone, fare, COUNT(*),
               SUM(CAST(ROUND(CAST(amount AS REAL) * 100) AS INTEGER))
        FROM rides GROUP BY 1, 2, 3
        """).fetchall()
    by_sqlite = {(h, z, f): (n, c) for h, z, f, n, c in rows}

    assert by_duckdb == by_sqlite  # the two references agree with each other first
    assert weir == by_duckdb
    assert sum(n for n, _ in weir.values()) == 160  # every written ride counted once (csv module: 2 x 80 rows)


def test_daily_rollup_over_hourly_outputs_equals_duckdb_per_local_day(rollup_ws: Path):
    files = [str(rides_file(rollup_ws, d)) for d in DAYS]
    weir = {}
    for key, path in _done_outputs(rollup_ws, "rides_daily").items():
        local_day = datetime.fromisoformat(key.replace("Z", "+00:00")).astimezone(ZoneInfo(TZ)).date()
        for zone, rides, revenue in pl.read_parquet(path).select("zone", "rides", "revenue").rows():
            weir[(local_day, zone)] = (rides, _cents(revenue))

    # Reference: DuckDB, local calendar day in Europe/Lisbon via timezone() (ICU time zones).
    con = duckdb.connect()
    rows = con.execute(
        f"""
        SELECT CAST(timezone('{TZ}', started_at) AS DATE) AS day, zone, COUNT(*), SUM(amount)
        FROM read_csv(?, header = true, columns = {{'ride_id': 'VARCHAR', 'started_at': 'TIMESTAMPTZ',
                      'zone': 'VARCHAR', 'fare': 'VARCHAR', 'amount': 'DECIMAL(10,2)'}})
        GROUP BY ALL
        """, [files]).fetchall()
    assert weir == {(d, z): (n, _cents(r)) for d, z, n, r in rows}


def test_parquet_outputs_read_back_identically_with_pyarrow_and_duckdb(rollup_ws: Path):
    outputs = {**_done_outputs(rollup_ws, "rides_hourly"), **{
        f"daily {k}": p for k, p in _done_outputs(rollup_ws, "rides_daily").items()}}
    written = {r["output"]: r["rows_written"] for r in ledger_rows(
        rollup_ws, "SELECT output, rows_written FROM weir_runs WHERE status = 'done'")}
    assert len(outputs) == 49
    con = duckdb.connect()
    nonempty = 0
    for path in outputs.values():
        ours = pl.read_parquet(path)  # weir's own view of the file
        # Reference 1: pyarrow's Parquet reader (Apache Arrow C++ implementation).
        arrow = pq.read_table(path)
        # Reference 2: DuckDB's own Parquet reader; a single-file scan keeps file order.
        rel = con.execute("SELECT * FROM read_parquet(?)", [str(path)])
        names = [d[0] for d in rel.description]
        duck_rows = rel.fetchall()

        assert arrow.column_names == names == ours.columns
        arrow_rows = [tuple(r[c] for c in names) for r in arrow.to_pylist()]
        assert arrow_rows == duck_rows == ours.rows()
        # the footer's row count (Parquet file metadata) is what the ledger recorded
        assert pq.ParquetFile(path).metadata.num_rows == len(duck_rows) == written[
            path.relative_to(rollup_ws).as_posix()]
        nonempty += bool(duck_rows)
    assert nonempty >= 30


def test_hundred_day_carry_forward_chain_equals_pandas_cumulative_sum(tmp_path: Path):
    first = date(2026, 1, 1)
    chain = days(first, 100)  # 1 January to 10 April 2026, across the spring-forward day
    root = write_workspace(tmp_path / "ws", {"dock_fleet": fleet_job(start=first.isoformat())})
    for day in chain:
        write_dock_changes(root, day)
    report = backfill(root, "dock_fleet", lo="2026-01-01", hi="2026-04-11")
    assert statuses(report) == {"done": 100}

    # Reference: pandas reads the same NDJSON files and takes a cumulative sum per dock over local days.
    events = pd.concat([pd.read_json(docks_file(root, d), lines=True, dtype=False)
                        for d in chain], ignore_index=True)
    events["day"] = pd.to_datetime(events["at"], utc=True).dt.tz_convert(TZ).dt.date
    per_day = events.pivot_table(index="day", columns="dock", values="delta", aggfunc="sum", fill_value=0)
    per_day = per_day.reindex(chain, fill_value=0)
    totals = per_day.cumsum()
    seen = events.pivot_table(index="day", columns="dock", values="delta", aggfunc="count", fill_value=0) \
        .reindex(chain, fill_value=0).cumsum() > 0

    outputs = _done_outputs(root, "dock_fleet")
    assert len(outputs) == 100
    for key, path in outputs.items():
        day = datetime.fromisoformat(key.replace("Z", "+00:00")).astimezone(ZoneInfo(TZ)).date()
        ours = dict(pl.read_parquet(path).select("dock", "bikes").rows())
        expected = {dock: int(totals.at[day, dock]) for dock in totals.columns if seen.at[day, dock]}
        assert ours == expected, day


def test_window_keys_in_the_ledger_are_the_utc_starts_of_local_hours(rollup_ws: Path):
    keys = sorted(_done_outputs(rollup_ws, "rides_hourly"))
    # Reference: zoneinfo (IANA tz database): local midnight of 28 March to local midnight of 30 March
    lo = datetime(2026, 3, 28, tzinfo=ZoneInfo(TZ)).astimezone(UTC)
    hi = datetime(2026, 3, 30, tzinfo=ZoneInfo(TZ)).astimezone(UTC)
    hours = int((hi - lo).total_seconds() // 3600)
    expected = [(lo + timedelta(hours=h)).strftime("%Y-%m-%dT%H:%M:%SZ") for h in range(hours)]
    assert keys == expected
