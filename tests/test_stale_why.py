"""`weir stale`, `weir why` and `weir impact` on the example jobs after a change.

The workspace is the repository's example jobs over three days of the demo's
landing data, backfilled (tests/helpers_plan.py). Expected values come from
outside weir: which jobs read which from the job files' YAML (yaml.safe_load),
which windows exist and what they recorded from the ledger (sqlite3), what a
unified diff of the changed SQL must contain (difflib), file sizes and times
(os.stat), window ids (zoneinfo), medians (statistics).
"""

from __future__ import annotations

import difflib
import os
import sqlite3
import statistics
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import yaml
from conftest_run import AT, cli, cli_json
from helpers_plan import (
    EXAMPLE_JOBS,
    LISBON,
    done_runs,
    downstream_of,
    edit,
    example_workspace,
    query,
    utc,
    wid,
    write_jobs,
)

OLD_LINE = "SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue"
NEW_LINE = "SELECT zone, fare, COUNT(*) * 2 AS rides, SUM(amount) AS revenue"


@pytest.fixture
def ws(tmp_path_factory, tmp_path) -> Path:
    return example_workspace(tmp_path_factory, tmp_path / "ws")


def done_windows(root: Path, jobs: set[str]) -> set[tuple[str, str]]:
    """(job, window id) of every done window of `jobs` (sqlite3 over weir_windows)."""
    rows = query(root, "SELECT job, window_key FROM weir_windows WHERE state = 'done'")
    return {(job, wid(utc(key))) for job, key in rows if job in jobs}


def stale_json(root: Path) -> dict:
    return cli_json(root, "stale", "--at", AT)


def test_one_changed_sql_line_makes_exactly_that_job_and_its_consumers_stale(ws):
    edit(ws / "jobs" / "rides_hourly.yaml", OLD_LINE, NEW_LINE)
    consumers = downstream_of(ws, "rides_hourly")  # from the job files' YAML
    assert consumers == {"rides_daily", "rides_rolling_7d", "rides_monthly"}
    result = stale_json(ws)
    listed = {(w["job"], w["window"]) for w in result["windows"]}
    assert listed == done_windows(ws, {"rides_hourly"} | consumers)
    for w in result["windows"]:
        if w["job"] == "rides_hourly":
            assert w["reasons"] == ["code"] and w["pending_upstream"] is False
        else:  # until the producer has re-run, early cutoff may still leave them current
            assert w["reasons"] == ["upstream"] and w["pending_upstream"] is True
    # text: one line per range, from the first window to the end of the last (zoneinfo ids)
    text = cli(ws, "stale", "--at", AT).stdout
    for job in ("rides_hourly", "rides_daily", "rides_rolling_7d"):
        keys = sorted(k for (k,) in query(ws, "SELECT window_key FROM weir_windows WHERE job = ?", (job,)))
        ends = sorted(e for (e,) in query(ws, "SELECT window_end FROM weir_windows WHERE job = ?", (job,)))
        line = next(ln for ln in text.splitlines() if ln.startswith(job + " "))
        assert wid(utc(keys[0])) in line and wid(utc(ends[-1])) in line and f" {len(keys)} " in line, line
        assert ("code" in line) if job == "rides_hourly" else ("upstream (pending upstream)" in line)
    assert f"{len(listed)} stale window(s)" in text
    assert not any(ln.startswith("dock_fleet") for ln in text.splitlines())

    before = {job: done_runs(ws, job) for job in EXAMPLE_JOBS}
    report = cli_json(ws, "backfill", "rides_hourly", "--downstream", "--at", AT, "--workers", "2")
    assert report["counts"]["rides_hourly"] == {"done": 72}
    assert stale_json(ws) == {"ranges": [], "windows": [], "unplanned": {}}
    assert all(not p["due"] for p in cli_json(ws, "plan", "--at", AT))
    # the data changed, so every stale window ran once more; dock_fleet did not run again
    for job in ("rides_hourly", "rides_daily", "rides_rolling_7d"):
        assert done_runs(ws, job) == {k: n + 1 for k, n in before[job].items()}
    assert done_runs(ws, "dock_fleet") == before["dock_fleet"]


def test_a_cosmetic_sql_change_reruns_the_producer_and_leaves_its_consumers_done(ws):
    edit(ws / "jobs" / "rides_hourly.yaml", "      FROM rides\n", "      FROM   rides   \n")
    result = stale_json(ws)
    assert {w["job"] for w in result["windows"]} == {"rides_hourly", "rides_daily", "rides_rolling_7d"}
    before = {job: done_runs(ws, job) for job in EXAMPLE_JOBS}
    first = cli_json(ws, "tick", "--at", AT)
    assert first["counts"] == {"done": 72}
    second = cli_json(ws, "tick", "--at", AT)
    assert second["counts"] == {}
    assert stale_json(ws) == {"ranges": [], "windows": [], "unplanned": {}}
    assert done_runs(ws, "rides_hourly") == {k: n + 1 for k, n in before["rides_hourly"].items()}
    for job in ("rides_daily", "rides_rolling_7d", "dock_fleet"):  # same data upstream: early cutoff
        assert done_runs(ws, job) == before[job]


def _sql(path: Path) -> str:
    return yaml.safe_load(path.read_text())["steps"][0]["sql"]


def test_why_shows_the_changed_sql_line_as_a_unified_diff(ws):
    job = ws / "jobs" / "rides_hourly.yaml"
    old_sql = _sql(job)
    edit(job, OLD_LINE, NEW_LINE)
    new_sql = _sql(job)
    # what any unified diff of the two texts must contain: difflib's changed lines
    changed = [ln.rstrip("\n") for ln in difflib.unified_diff(old_sql.splitlines(True), new_sql.splitlines(True))
               if ln[:1] in "+-" and not ln.startswith(("+++", "---"))]
    assert changed == ["-" + OLD_LINE, "+" + NEW_LINE]
    window = wid(datetime(2026, 3, 25, 10, tzinfo=LISBON))
    info = cli_json(ws, "why", "rides_hourly", window, "--at", AT)
    assert info["state"] == "stale" and info["reasons"] == ["code"]
    assert set(info["changes"]) == {"code"}
    lines = info["changes"]["code"].splitlines()
    assert all(c in lines for c in changed)
    assert any(ln.startswith("@@") for ln in lines)
    text = cli(ws, "why", "rides_hourly", window, "--at", AT).stdout
    assert all(c in text.splitlines() for c in changed)


def test_why_lists_the_spec_fields_that_changed(ws):
    job = ws / "jobs" / "rides_hourly.yaml"
    edit(job, 'amount: {type: "decimal(10,2)", min: 0}', 'amount: {type: "decimal(12,2)", min: 0}')
    edit(job, "    time_column: started_at      # rows outside [start, end) are dropped and counted\n", "")
    window = wid(datetime(2026, 3, 25, 10, tzinfo=LISBON))
    info = cli_json(ws, "why", "rides_hourly", window, "--at", AT)
    assert info["reasons"] == ["spec"]
    changes = {c["field"]: (c["was"], c["now"]) for c in info["changes"]["spec"]}
    amount = [f for f in changes if f.endswith("amount.type")]
    assert len(amount) == 1 and changes[amount[0]] == ("decimal(10,2)", "decimal(12,2)")
    column = [f for f in changes if f.endswith("time_column")]
    assert len(column) == 1 and changes[column[0]] == ("started_at", None)
    assert len(changes) == 2
    text = cli(ws, "why", "rides_hourly", window, "--at", AT).stdout
    assert "'decimal(10,2)' -> 'decimal(12,2)'" in text and "'started_at' -> None" in text


def _describe(path: Path) -> tuple[str, str]:
    """A file's size and modification time as `why` must name them (os.stat, UTC)."""
    st = path.stat()
    return f"{st.st_size} bytes", datetime.fromtimestamp(st.st_mtime, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def test_new_changed_and_removed_input_files_make_a_done_window_stale_and_why_names_them(ws):
    folder = ws / "state" / "landing" / "rides" / "2026-03-25"
    ten = datetime(2026, 3, 25, 10, tzinfo=LISBON)
    two = datetime(2026, 3, 25, 14, tzinfo=LISBON)  # the demo lands a late second part for this hour
    main, late = folder / "10-main.csv", folder / "14-late.csv"
    assert late.exists()
    was_main, was_late = _describe(main), _describe(late)
    with open(main, "a") as fh:
        fh.write(f"R9999991,{(ten + timedelta(minutes=5)).isoformat()},Harbour,member,1.10\n")
    os.utime(main, (utc("2026-04-01T08:00:00Z").timestamp(),) * 2)
    extra = folder / "10-extra.csv"
    extra.write_text("ride_id,started_at,zone,fare,amount\n"
                     f"R9999992,{(ten + timedelta(minutes=9)).isoformat()},Riverside,casual,3.40\n")
    late.unlink()
    result = stale_json(ws)
    by_window = {(w["job"], w["window"]): w["reasons"] for w in result["windows"]}
    assert by_window == {("rides_hourly", wid(ten)): ["input"], ("rides_hourly", wid(two)): ["input"],
                         ("rides_daily", wid(datetime(2026, 3, 25, tzinfo=LISBON))): ["upstream"],
                         **{("rides_rolling_7d", wid(datetime(2026, 3, d, tzinfo=LISBON))): ["upstream"]
                            for d in (25, 26)}}
    info = cli_json(ws, "why", "rides_hourly", wid(ten), "--at", AT)
    changes = {c["path"]: c for c in info["changes"]["input"]}
    rel = "state/landing/rides/2026-03-25/"
    assert set(changes) == {rel + "10-main.csv", rel + "10-extra.csv"}
    assert changes[rel + "10-extra.csv"]["change"] == "added" and changes[rel + "10-extra.csv"]["was"] is None
    assert all(part in changes[rel + "10-extra.csv"]["now"] for part in _describe(extra))
    assert changes[rel + "10-main.csv"]["change"] == "changed"
    assert all(part in changes[rel + "10-main.csv"]["was"] for part in was_main)
    assert all(part in changes[rel + "10-main.csv"]["now"] for part in _describe(main))
    info = cli_json(ws, "why", "rides_hourly", wid(two), "--at", AT)
    assert [(c["change"], c["path"]) for c in info["changes"]["input"]] == [("removed", rel + "14-late.csv")]
    assert all(part in info["changes"]["input"][0]["was"] for part in was_late)


def test_why_lists_the_producer_windows_whose_output_digests_changed(ws):
    edit(ws / "jobs" / "rides_hourly.yaml", OLD_LINE, NEW_LINE)
    cli_json(ws, "backfill", "rides_hourly", "--at", AT, "--workers", "2")
    day = datetime(2026, 3, 25, tzinfo=LISBON)
    info = cli_json(ws, "why", "rides_daily", wid(day), "--at", AT)
    assert info["state"] == "stale" and info["reasons"] == ["upstream"] and info["pending_upstream"] is False
    # the hours of that local day (zoneinfo), with the digests of their first and last done runs (sqlite3)
    lo, hi = day.astimezone(UTC), (day + timedelta(days=1)).astimezone(UTC)
    expected = {}
    for key, in query(ws, "SELECT DISTINCT window_key FROM weir_runs WHERE job = 'rides_hourly'"):
        if lo <= utc(key) < hi:
            digests = [d for (d,) in query(ws, "SELECT output_digest FROM weir_runs WHERE job = 'rides_hourly' "
                                               "AND window_key = ? AND status = 'done' ORDER BY id", (key,))]
            expected[key] = (digests[0], digests[-1])
    assert len(expected) == 24
    got = {c["window"]: (c["was"], c["now"]) for c in info["changes"]["upstream"]}
    assert got == expected
    assert all(c["job"] == "rides_hourly" for c in info["changes"]["upstream"])


def test_why_shows_lateness_and_the_last_run_figures(ws):
    two = datetime(2026, 3, 25, 14, tzinfo=LISBON)
    end = two + timedelta(hours=1)
    files = sorted((ws / "state" / "landing" / "rides" / "2026-03-25").glob("14-*.csv"))
    newest = max(datetime.fromtimestamp(f.stat().st_mtime, UTC) for f in files)
    info = cli_json(ws, "why", "rides_hourly", wid(two), "--at", AT)
    assert info["state"] == "done" and info["changes"] == {}
    assert info["ingestion"]["late"] is True  # the job's late_after is 1h
    assert newest - end > timedelta(hours=1)
    seconds = int((newest - end).total_seconds())
    assert seconds % 60 == 0  # the demo's file times are whole minutes
    h, m = divmod(seconds // 60, 60)
    assert info["ingestion"]["after_window_end"] == f"PT{h}H" + (f"{m}M" if m else "")  # ISO 8601 duration
    key = two.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    row = query(ws, "SELECT id, status, rows_read, rows_dropped, rows_rejected, rows_written, fingerprint, "
                    "output_digest FROM weir_runs WHERE job='rides_hourly' AND window_key=? ORDER BY id DESC "
                    "LIMIT 1", (key,))[0]
    last = info["last_run"]
    assert (last["id"], last["status"], last["rows_read"], last["rows_dropped"], last["rows_rejected"],
            last["rows_written"], last["fingerprint"], last["output_digest"]) == row
    text = cli(ws, "why", "rides_hourly", wid(two), "--at", AT).stdout
    assert "LATE" in text and f"last run #{row[0]} done" in text


def test_plan_counts_late_windows_per_job_from_the_newest_input_times(ws):
    # late: the newest input file of the hour changed more than late_after (1h) after its end (os.stat)
    late = 0
    for key, end in query(ws, "SELECT window_key, window_end FROM weir_windows WHERE job = 'rides_hourly'"):
        local = utc(key).astimezone(LISBON)
        files = list((ws / "state" / "landing" / "rides" / f"{local:%Y-%m-%d}").glob(f"{local:%H}-*.csv"))
        newest = max(datetime.fromtimestamp(f.stat().st_mtime, UTC) for f in files)
        late += newest - utc(end) > timedelta(hours=1)
    planned = {p["job"]: p for p in cli_json(ws, "plan", "--at", AT)}
    assert late >= 1 and planned["rides_hourly"]["late"] == late
    assert all(planned[j]["late"] == 0 for j in planned if j != "rides_hourly")  # no late_after there


def test_impact_estimates_median_recorded_seconds_times_windows_over_workers(ws):
    edit(ws / "jobs" / "rides_hourly.yaml", OLD_LINE, NEW_LINE)
    rows = {r["job"]: r for r in cli_json(ws, "impact", "--at", AT, "--workers", "2")}
    expected_counts = {"rides_hourly": {"code": 72}, "rides_daily": {"upstream": 3},
                       "rides_rolling_7d": {"upstream": 3}, "dock_fleet": {}, "rides_monthly": {}}
    for job, by_reason in expected_counts.items():
        assert rows[job]["by_reason"] == by_reason
        assert rows[job]["windows"] == sum(by_reason.values())
        seconds = [s for (s,) in query(ws, "SELECT seconds FROM weir_runs WHERE job = ? AND status = 'done'",
                                       (job,))]
        if seconds:
            median = statistics.median(seconds)
            assert rows[job]["median_seconds"] == pytest.approx(median)
            assert rows[job]["estimated_seconds"] == pytest.approx(median * rows[job]["windows"] / 2)
        else:
            assert rows[job]["estimated_seconds"] is None
    text = cli(ws, "impact", "--at", AT, "--workers", "2").stdout
    assert f"{72 + 3 + 3} window(s) would be recomputed" in text


MOVES_JOB = """\
description: Bikes moved per dock and day, from the operations database.
window: {every: 1d, start: 2026-03-24, end: 2026-03-26, timezone: Europe/Lisbon}
inputs:
  moves:
    database: sqlite:///state/operations.sqlite
    table: dock_moves
    time_column: at
    schema: {dock: str, at: datetime, delta: int}
steps:
  - sql: SELECT dock, SUM(delta) AS moved FROM moves GROUP BY dock
output:
  path: "state/warehouse/moves/{start:%Y-%m-%d}.parquet"
"""


def test_why_does_not_report_a_database_input_as_removed_when_nothing_changed(tmp_path):
    root = write_jobs(tmp_path / "ws", {"moves": MOVES_JOB})
    with sqlite3.connect(root / "state" / "operations.sqlite") as conn:
        conn.execute("CREATE TABLE dock_moves (dock TEXT, at TEXT, delta INTEGER)")
        conn.execute("INSERT INTO dock_moves VALUES ('dock_01', '2026-03-24 10:00:00', 1)")
    conn.close()
    assert cli_json(root, "tick", "--at", AT)["counts"] == {"done": 2}
    info = cli_json(root, "why", "moves", "2026-03-24", "--at", AT)
    assert info["state"] == "done" and info["changes"] == {}


HOLDING_STEP = '''"""A step that stays in its window until the test lets it go (files as the signal, not a clock)."""
import pathlib
import time

HERE = pathlib.Path(__file__).parent


def hold(rides):
    (HERE / "started").touch()
    deadline = time.monotonic() + 120  # a generous bound, turning a hang into a failure
    while not (HERE / "go").exists() and time.monotonic() < deadline:
        time.sleep(0.02)
    return rides
'''


def test_why_of_a_window_being_run_says_running_instead_of_empty_row_counts(tmp_path):
    """Hardening item 19: a running run has no row counts yet; `why` said `read -, dropped , rejected ,`."""
    import time

    from conftest_run import spawn
    from helpers_plan import hourly_job, land_hour

    job = hourly_job("2026-03-28T00:00", "2026-03-28T01:00").replace(
        "steps:\n", "steps:\n  - python: holding_step:hold\n    name: held\n", 1).replace(
        "FROM rides\n", "FROM held\n", 1)
    root = write_jobs(tmp_path / "ws", {"rides_hourly": job}, {"holding_step.py": HOLDING_STEP})
    land_hour(root, datetime(2026, 3, 28, tzinfo=UTC))
    window = wid(datetime(2026, 3, 28, tzinfo=UTC))
    proc = spawn(root, "run", "rides_hourly", "--window", window)
    try:
        deadline = time.monotonic() + 120  # a bound for the subprocess to reach its step
        while not (root / "started").exists() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        assert (root / "started").exists(), proc.communicate(timeout=60)
        result = cli(root, "why", "rides_hourly", window, "--at", AT)
        assert result.exit_code == 0, result.stderr
        last = next(line for line in result.stdout.splitlines() if line.startswith("last run"))
        assert "running" in last and "started" in last
        assert "dropped ," not in last and "rejected ," not in last and "written ;" not in last
        assert cli_json(root, "why", "rides_hourly", window, "--at", AT)["last_run"]["status"] == "running"
    finally:
        (root / "go").touch()
        out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    done = cli(root, "why", "rides_hourly", window, "--at", AT).stdout
    # a finished run: figures as numbers (3 rides landed, 3 zone x fare rows written)
    assert "read 3, dropped 0, rejected 0, written 3;" in done
