"""The demo workspace end to end, checked against independent computations with pandas."""

from __future__ import annotations

import re
import shutil
import sqlite3
import statistics
from datetime import UTC, datetime, timedelta
from decimal import Decimal
from pathlib import Path
from zoneinfo import ZoneInfo

import pandas as pd
import polars as pl
import pytest

from runner import api
from runner.cli import main

ROOT = Path(__file__).resolve().parent.parent
LISBON = ZoneInfo("Europe/Lisbon")
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


@pytest.fixture(scope="module")
def demo_ws(tmp_path_factory) -> Path:
    """A copy of the repository's example jobs with the demo run in it (once for this module)."""
    root = tmp_path_factory.mktemp("demo")
    shutil.copytree(ROOT / "jobs", root / "jobs")
    assert api.demo(root, now=NOW, workers=1).backfill.failed == 0
    return root


def _landing_rides(root: Path) -> pd.DataFrame:
    frames = []
    for path in sorted((root / "state" / "landing" / "rides").glob("*/*.csv")):
        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
        frame["file"] = path
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def _valid(rides: pd.DataFrame) -> pd.Series:
    """The declared rules of jobs/rides_hourly.yaml, applied independently with pandas and re."""
    amount_ok = rides["amount"].map(lambda v: re.fullmatch(r"[-+]?\d+(\.\d{0,2})?", v) is not None)
    amount_ok &= rides["amount"].map(lambda v: amount_ok_value(v))
    return (rides["ride_id"].str.fullmatch(r"R[0-9]{7}") & rides["fare"].isin(["member", "casual", "day_pass"])
            & amount_ok)


def amount_ok_value(text: str) -> bool:
    try:
        return Decimal(text) >= 0
    except ArithmeticError:
        return False


def test_demo_daily_totals_equal_pandas_totals_from_the_landing_files(demo_ws: Path):
    rides = _landing_rides(demo_ws)
    rides = rides[_valid(rides)].copy()
    # pandas parses the ISO 8601 offsets; the local day comes from the IANA zone via pandas' tz support
    started = pd.to_datetime(rides["started_at"], utc=True).dt.tz_convert("Europe/Lisbon")
    rides["day"] = started.dt.strftime("%Y-%m-%d")
    rides["amount_d"] = rides["amount"].map(Decimal)
    expected = rides.groupby(["day", "zone"]).agg(rides=("ride_id", "size"), revenue=("amount_d", "sum"))
    got = []
    for path in sorted((demo_ws / "state" / "warehouse" / "rides_daily").glob("*.parquet")):
        frame = pl.read_parquet(path)
        for row in frame.iter_rows(named=True):
            got.append(((path.stem, row["zone"]), row["rides"], Decimal(str(row["revenue"]))))
    assert len(got) == len(expected)
    for key, n, revenue in got:
        assert n == expected.loc[key, "rides"], key
        assert revenue == expected.loc[key, "revenue"], key


def test_demo_covers_the_spring_forward_day_with_23_hourly_windows(demo_ws: Path):
    # the IANA database via zoneinfo: 2026-03-29 in Lisbon lasts 23 hours
    start = datetime(2026, 3, 29, tzinfo=LISBON).astimezone(UTC)
    end = datetime(2026, 3, 30, tzinfo=LISBON).astimezone(UTC)
    hours = int((end - start) / timedelta(hours=1))
    assert hours == 23
    con = sqlite3.connect(demo_ws / "state" / "ledger.sqlite")
    keys = [r[0] for r in con.execute(
        "SELECT window_key FROM weir_windows WHERE job = 'rides_hourly' AND state = 'done' "
        "AND window_key >= ? AND window_key < ?", (start.strftime("%Y-%m-%dT%H:%M:%SZ"),
                                                    end.strftime("%Y-%m-%dT%H:%M:%SZ")))]
    assert len(keys) == hours


def test_a_second_demo_run_does_nothing(demo_ws: Path):
    before = {p: p.stat().st_mtime_ns for p in (demo_ws / "state").rglob("*") if p.is_file()
              and "ledger.sqlite" not in p.name}
    done = api.demo(demo_ws, now=NOW, workers=1)
    summary, result = done.landing, done.backfill
    assert summary.written == 0
    assert {o.status for o in result.outcomes} == {"skipped"}
    after = {p: p.stat().st_mtime_ns for p in (demo_ws / "state").rglob("*") if p.is_file()
             and "ledger.sqlite" not in p.name}
    assert after == before


def test_late_windows_are_those_whose_files_arrived_over_an_hour_after_the_window(demo_ws: Path):
    # independent of weir: file modification times against each hour's end (late_after: 1h)
    late = set()
    for path in (demo_ws / "state" / "landing" / "rides").glob("*/*.csv"):
        day = datetime.strptime(path.parent.name, "%Y-%m-%d")
        hour = int(path.name[:2])
        start = datetime(day.year, day.month, day.day, hour, tzinfo=LISBON).astimezone(UTC)
        mtime = datetime.fromtimestamp(path.stat().st_mtime, UTC)
        if mtime - (start + timedelta(hours=1)) > timedelta(hours=1):
            late.add(start.strftime("%Y-%m-%dT%H:%M:%SZ"))
    assert late
    plan = api.plan(demo_ws, jobs=["rides_hourly"], at=NOW)
    assert plan[0].late == len(late)
    history = api.history(demo_ws, job="rides_hourly")
    flagged = {r["window_key"] for r in history if r["late"]}
    assert flagged == late


def test_bad_rows_are_quarantined_beside_their_outputs(demo_ws: Path):
    rides = _landing_rides(demo_ws)
    bad = rides[~_valid(rides)]
    assert len(bad) > 0
    rejected = [pl.read_parquet(p) for p in (demo_ws / "state" / "warehouse" / "rides_hourly").rglob(
        "*.rejected.parquet")]
    ids = sorted(r for frame in rejected for r in frame["ride_id"].to_list())
    assert ids == sorted(bad["ride_id"].tolist())
    assert all(frame["reason"].null_count() == 0 for frame in rejected)


def test_the_monthly_table_holds_one_row_per_zone_for_march(demo_ws: Path):
    con = sqlite3.connect(demo_ws / "state" / "warehouse" / "reports.sqlite")
    rows = con.execute("SELECT window_start, zone, rides FROM rides_monthly").fetchall()
    # March 2026 starts at midnight Lisbon time, which is UTC+0 then (zoneinfo)
    march = datetime(2026, 3, 1, tzinfo=LISBON).astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    assert {r[0] for r in rows} == {march}
    assert len({r[1] for r in rows}) == len(rows) == 5
    daily = pl.concat([pl.read_parquet(p) for p in (demo_ws / "state" / "warehouse" / "rides_daily").glob(
        "2026-03-*.parquet")])
    assert sum(r[2] for r in rows) == daily["rides"].sum()


def test_weir_demo_refuses_a_workspace_without_the_example_jobs(tmp_path: Path, capsys):
    (tmp_path / "jobs").mkdir()
    with pytest.raises(SystemExit) as exc:
        main(["-C", str(tmp_path), "demo"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "weir init" in err and "Traceback" not in err
    assert not (tmp_path / "state" / "landing").exists()


def test_weir_init_starts_a_workspace_that_checks_clean(tmp_path: Path, capsys):
    target = tmp_path / "new"
    main(["init", str(target)])
    assert (target / "jobs" / "rides_per_hour.yaml").exists()
    assert (target / "state" / "README.md").exists()
    main(["-C", str(target), "check"])
    assert "1 job(s) valid" in capsys.readouterr().out
    with pytest.raises(SystemExit) as exc:
        main(["init", str(target)])
    assert exc.value.code == 2


def test_advise_reports_medians_and_percentiles_of_the_recorded_runs(demo_ws: Path):
    con = sqlite3.connect(demo_ws / "state" / "ledger.sqlite")
    rows = con.execute("SELECT seconds, step_seconds, rows_written FROM weir_runs "
                       "WHERE job = 'rides_hourly' AND status = 'done'").fetchall()
    advice = {a.job: a.as_dict() for a in api.advise(demo_ws, jobs=[])}["rides_hourly"]
    # Python's statistics module as the reference for the median
    assert advice["runs"] == len(rows)
    assert advice["seconds_median"] == pytest.approx(statistics.median(r[0] for r in rows))
    assert advice["rows_median"] == pytest.approx(statistics.median(r[2] for r in rows))
    overhead = statistics.median((r[0] - (r[1] or 0)) / r[0] for r in rows)
    assert advice["overhead_share"] == pytest.approx(overhead)
    assert advice["suggestions"]


def test_readme_change_makes_exactly_the_daily_job_and_its_readers_stale(demo_ws: Path, tmp_path: Path):
    root = tmp_path / "ws"
    shutil.copytree(demo_ws, root)
    job = root / "jobs" / "rides_daily.yaml"
    text = job.read_text()
    assert "SUM(revenue) AS revenue" in text
    job.write_text(text.replace("SUM(revenue) AS revenue", "ROUND(SUM(revenue), 0) AS revenue"))
    stale = api.stale(root, jobs=[], at=NOW).as_dict()
    jobs = {w["job"] for w in stale["windows"]}
    assert jobs == {"rides_daily", "rides_rolling_7d", "rides_monthly"}
    assert {tuple(w["reasons"]) for w in stale["windows"] if w["job"] == "rides_daily"} == {("code",)}
    result = api.backfill(root, jobs=["rides_daily"], at=NOW, downstream=True, workers=1)
    assert result.failed == 0
    assert api.stale(root, jobs=[], at=NOW).windows == []



def test_the_daily_change_check_keeps_the_last_good_output_when_a_day_arrives_half_empty(demo_ws, tmp_path):
    root = tmp_path / "ws"
    shutil.copytree(demo_ws, root)
    daily = root / "state" / "warehouse" / "rides_daily" / "2026-03-31.parquet"
    good = daily.read_bytes()
    for hour in range(7, 20):  # a partial delivery: the busy hours of 2026-03-31 keep only their header
        path = root / "state" / "landing" / "rides" / "2026-03-31" / f"{hour:02d}-main.csv"
        path.write_text(path.read_text().splitlines()[0] + "\n")
    result = api.backfill(root, jobs=["rides_hourly"], lo="2026-03-31", hi="2026-04-01", at=NOW, downstream=True,
                          workers=1)
    failed = [o for o in result.outcomes if o.status == "failed"]
    assert [(o.job, o.window) for o in failed] == [("rides_daily", "2026-03-31T00:00+01:00")]
    assert "check change of rides failed" in failed[0].reason
    assert daily.read_bytes() == good  # the swap never happened
    # independent of weir: the drop the check saw, from pandas over the hourly outputs it read
    hourly = pd.concat([pd.read_parquet(p) for p in
                        (root / "state" / "warehouse" / "rides_hourly" / "2026-03-31").glob("*.parquet")])
    before = pl.read_parquet(root / "state" / "warehouse" / "rides_daily" / "2026-03-30.parquet")["rides"].sum()
    assert hourly["rides"].sum() < 0.4 * before
    done = api.demo(root, now=NOW, workers=1)
    summary, result = done.landing, done.backfill  # the missing data arrives
    assert summary.written == 13 and result.failed == 0
    assert api.stale(root, jobs=[], at=NOW).windows == []
