"""`weir plan --at T --json`: what is due, what waits, and why.

Due moments come from outside weir: zoneinfo (the IANA tz database) for
`every:` cadences across Lisbon's clock changes, cronsim (an independent cron
implementation) for `cron:` cadences; window ids are zoneinfo's ISO 8601
local starts. Ledger rows are read and set with Python's sqlite3, file times
with os.stat/os.utime. The clock is always injected with `--at`.
"""

from __future__ import annotations

import os
import sqlite3
from datetime import UTC, datetime, timedelta

import pytest
from conftest_run import cli, cli_json
from helpers_plan import (
    LISBON,
    at_text,
    bounds_job,
    daily_job,
    edit,
    hour_file,
    hourly_job,
    hours,
    land_hour,
    local_midnight,
    query,
    wid,
    wkey,
    write_jobs,
)

cronsim = pytest.importorskip("cronsim")


def plan(root, at: datetime, *jobs: str) -> dict[str, dict]:
    """`weir plan JOBS --at AT --json`, by job."""
    return {p["job"]: p for p in cli_json(root, "plan", *jobs, "--at", at_text(at))}


def due_ids(p: dict) -> list[str]:
    return [i["window"] for i in p["due"]]


# ---------------------------------------------------------------- due moments


def test_hourly_windows_are_due_from_end_plus_settle_across_spring_forward(tmp_path):
    # Lisbon 2026-03-29: 01:00 local (+00:00) jumps to 02:00 (+01:00) (IANA tz database)
    root = write_jobs(tmp_path / "ws", {"tally": bounds_job("every: 1h", "2026-03-28T22:00",
                                                             "2026-03-29T06:00", settle="10m")})
    first = datetime(2026, 3, 28, 22, tzinfo=LISBON).astimezone(UTC)
    last_end = datetime(2026, 3, 29, 6, tzinfo=LISBON).astimezone(UTC)
    starts = [s for s in hours(first, 12) if s + timedelta(hours=1) <= last_end]
    assert len(starts) == 7  # 22:00 .. 06:00 local is 7 hours of absolute time on this day (zoneinfo)
    settle = timedelta(minutes=10)
    for start in starts:
        due_at = start + timedelta(hours=1) + settle
        for at in (due_at - timedelta(seconds=1), due_at):
            expected = [wid(s) for s in starts if s + timedelta(hours=1) + settle <= at]
            p = plan(root, at)["tally"]
            assert due_ids(p) == expected, at
            assert {i["state"] for i in p["due"]} <= {"missing"}
    # the window ids carry the local offset, which changes inside the range (zoneinfo)
    assert {wid(s)[-6:] for s in starts} == {"+00:00", "+01:00"}


@pytest.mark.parametrize("first_day, days", [((2026, 3, 27), 4), ((2026, 10, 24), 4)],
                         ids=["spring-forward", "fall-back"])
def test_daily_windows_are_due_at_the_next_local_midnight_plus_settle(tmp_path, first_day, days):
    y, m, d = first_day
    start = datetime(y, m, d)
    end = start + timedelta(days=days)
    root = write_jobs(tmp_path / "ws", {"tally": bounds_job("every: 1d", f"{start:%Y-%m-%d}",
                                                             f"{end:%Y-%m-%d}", settle="30m")})
    # local midnights as instants (zoneinfo): one of these local days lasts 23 or 25 hours
    midnights = [local_midnight(*(start + timedelta(days=i)).timetuple()[:3]) for i in range(days + 1)]
    lengths = {(b - a) for a, b in zip(midnights, midnights[1:], strict=False)}
    assert lengths == {timedelta(hours=24), timedelta(hours=23 if m == 3 else 25)}
    for i in range(days):
        due_at = midnights[i + 1] + timedelta(minutes=30)
        for at in (due_at - timedelta(seconds=1), due_at):
            expected = [wid(s) for s, e in zip(midnights, midnights[1:], strict=False)
                        if e + timedelta(minutes=30) <= at]
            assert due_ids(plan(root, at)["tally"]) == expected, at


CRON_JOBS = {
    "fixed_0130": "30 1 * * *",     # 01:30 local: missing on the spring-forward day, twice on fall-back
    "half_hourly": "*/30 * * * *",  # absolute time through both changes
    "six_hourly": "0 */6 * * *",
    "sunday_0215": "15 2 * * 0",    # inside the spring-forward gap on Sunday 2026-03-29
    "daily_0100": "0 1 * * *",      # the first minute of the repeated hour in October
}


@pytest.mark.parametrize("first, end", [("2026-03-26", "2026-04-02"), ("2026-10-22", "2026-10-29")],
                         ids=["spring-forward", "fall-back"])
def test_cron_windows_are_due_when_cronsim_says_the_next_fire_plus_settle_has_passed(tmp_path, first, end):
    settle = timedelta(minutes=5)
    jobs = {name: bounds_job(f'cron: "{expr}"', first, end, settle="5m", name=name)
            for name, expr in CRON_JOBS.items()}
    root = write_jobs(tmp_path / "ws", jobs)
    start_local = datetime.fromisoformat(first).replace(tzinfo=LISBON)
    end_utc = datetime.fromisoformat(end).replace(tzinfo=LISBON).astimezone(UTC)
    fires: dict[str, list[datetime]] = {}
    for name, expr in CRON_JOBS.items():
        # cronsim yields fires strictly after its start: begin a minute early to include `first`
        it = cronsim.CronSim(expr, start_local - timedelta(minutes=1))
        out = []
        while True:
            fire = next(it)
            if fire.astimezone(UTC) > end_utc:
                break
            out.append(fire)
        fires[name] = out
    # clocks: every 7h13m through the range, plus each fixed job's due moments and one second before
    ats = [start_local.astimezone(UTC) + timedelta(minutes=433 * k) for k in range(1, 24)]
    for f in fires["fixed_0130"][1:] + fires["sunday_0215"][1:]:
        due_at = f.astimezone(UTC) + settle
        ats += [due_at - timedelta(seconds=1), due_at]
    for at in sorted(ats):
        planned = plan(root, at)
        for name, fs in fires.items():
            expected = [wid(a) for a, b in zip(fs, fs[1:], strict=False) if b.astimezone(UTC) + settle <= at]
            assert due_ids(planned[name]) == expected, (name, at)


@pytest.mark.parametrize("cadence, end, last_fire", [
    ('cron: "0 1 * * *"', "2026-04-02", datetime(2026, 4, 1, 1, tzinfo=LISBON)),
    ("every: 1h", "2026-03-28T05:30", datetime(2026, 3, 28, 5, tzinfo=LISBON)),
], ids=["cron", "every"])
def test_windows_stay_due_while_the_clock_is_between_the_last_full_window_and_the_job_end(
        tmp_path, cadence, end, last_fire):
    # the job's end is not a window boundary: the last full window ends at `last_fire`, and the
    # windows before it are due from their end (cronsim / zoneinfo give the expected starts)
    root = write_jobs(tmp_path / "ws", {"tally": bounds_job(cadence, "2026-03-28", end)})
    at = last_fire.astimezone(UTC) + timedelta(minutes=10)
    if cadence.startswith("cron"):
        fires = cronsim.CronSim("0 1 * * *", datetime(2026, 3, 28, tzinfo=LISBON) - timedelta(minutes=1))
        starts = []
        while (f := next(fires)) < last_fire:
            starts.append(f)
    else:
        starts = [s for s in hours(datetime(2026, 3, 28, tzinfo=LISBON).astimezone(UTC), 6)
                  if s < last_fire]
    assert due_ids(plan(root, at)["tally"]) == [wid(s) for s in starts]


# ---------------------------------------------------------------- states and reasons

H0 = datetime(2026, 3, 28, 0, tzinfo=UTC)  # Lisbon is at +00:00 on this day (IANA tz database)
HOURS = hours(H0, 4)
DAY_DUE = local_midnight(2026, 3, 29) + timedelta(minutes=30)  # end of the local day + settle 30m


@pytest.fixture
def pair(tmp_path):
    """rides_hourly (4 windows, settle 10m) and its daily consumer (1 window), no data yet."""
    return write_jobs(tmp_path / "ws", {
        "rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T04:00"),
        "rides_daily": daily_job(end="2026-03-29"),
    })


def tick(root, at: datetime) -> dict:
    return cli_json(root, "tick", "--at", at_text(at), expect=None)


def test_missing_windows_are_due_and_windows_without_input_files_wait_naming_the_input(pair):
    for h in HOURS[:3]:
        land_hour(pair, h)
    at = HOURS[3] + timedelta(hours=1, minutes=10)  # the last hour's end + settle
    p = plan(pair, at, "rides_hourly")["rides_hourly"]
    assert due_ids(p) == [wid(h) for h in HOURS[:3]]
    assert [i["state"] for i in p["due"]] == ["missing"] * 3
    assert [i["window"] for i in p["waiting"]] == [wid(HOURS[3])]
    # the pattern it waits for: the job's `files:` template rendered with Python's strftime
    pattern = f"state/landing/rides/{HOURS[3].astimezone(LISBON):%Y-%m-%d/%H}-*.csv"
    assert "rides" in p["waiting"][0]["reason"] and pattern in p["waiting"][0]["reason"]
    assert p["counts"]["missing"] == 3 and p["counts"]["waiting"] == 1


def test_consumer_waits_for_its_producers_and_counts_those_not_done(pair):
    for h in HOURS[:3]:
        land_hour(pair, h)
    p = plan(pair, DAY_DUE)["rides_daily"]
    assert due_ids(p) == [] and [i["window"] for i in p["waiting"]] == [wid(local_midnight(2026, 3, 28))]
    assert "rides_hourly" in p["waiting"][0]["reason"] and "4 of 4" in p["waiting"][0]["reason"]
    assert tick(pair, DAY_DUE)["counts"].get("done") == 3
    p = plan(pair, DAY_DUE)["rides_daily"]
    assert "1 of 4" in p["waiting"][0]["reason"]  # hour 3 has no file: 1 of the 4 hourly windows
    # before its own end + settle the daily window is neither due nor waiting
    early = plan(pair, DAY_DUE - timedelta(seconds=1))["rides_daily"]
    assert early["due"] == [] and early["waiting"] == []


def test_failed_window_is_due_only_with_retries_left_and_after_its_backoff(pair):
    for h in HOURS[:3]:
        land_hour(pair, h)
    bad = land_hour(pair, HOURS[3])
    with open(bad, "a") as fh:  # a negative amount breaks `min: 0`: the window fails
        fh.write(f"rbad,{HOURS[3].astimezone(LISBON).isoformat()},harbour,member,-1.00\n")
    at = DAY_DUE
    result = tick(pair, at)
    # the daily window went along (its producers ran in this tick) and still waits for hour 3
    assert result["counts"] == {"done": 3, "failed": 1, "waiting": 1}
    job = pair / "jobs" / "rides_hourly.yaml"
    p = plan(pair, at, "rides_hourly")["rides_hourly"]
    assert p["counts"]["failed"] == 1 and due_ids(p) == []  # retries: 0 (the default) leaves none
    # The failure happened at `failed_at` (set with sqlite3: the ledger records real times)
    failed_at = at - timedelta(seconds=10)
    stamp = failed_at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    assert query(pair, "SELECT failures FROM weir_windows WHERE job='rides_hourly' AND window_key=?",
                 (wkey(HOURS[3]),)) == [(1,)]
    edit(job, "settle: 10m}\n", "settle: 10m}\nretries: 2\nretry_delay: 1m\n")
    # a retry waits retry_delay (1m) after the first failure, doubling per failure after that
    # (the job file's documented rule); beyond `retries` failures nothing is retried
    for failures, delay in ((1, timedelta(minutes=1)), (2, timedelta(minutes=2)), (3, None)):
        set_failure(pair, wkey(HOURS[3]), stamp, failures)
        later = plan(pair, failed_at + timedelta(hours=1), "rides_hourly")["rides_hourly"]
        if delay is None:
            assert due_ids(later) == [] and later["counts"]["failed"] == 1
            continue
        p = plan(pair, failed_at + delay - timedelta(seconds=1), "rides_hourly")["rides_hourly"]
        assert due_ids(p) == []
        p = plan(pair, failed_at + delay, "rides_hourly")["rides_hourly"]
        assert due_ids(p) == [wid(HOURS[3])]
        assert p["due"][0]["state"] == "failed" and f"retry {failures} of 2" in p["due"][0]["reason"]


def set_failure(root, key: str, finished_at: str, failures: int) -> None:
    """The window's last failure time and count, as a ledger snapshot would hold them (sqlite3)."""
    conn = sqlite3.connect(root / "state" / "ledger.sqlite")
    try:
        with conn:
            conn.execute("UPDATE weir_windows SET finished_at=?, failures=? WHERE job='rides_hourly' "
                         "AND window_key=?", (finished_at, failures, key))
    finally:
        conn.close()


def test_a_window_claimed_by_another_process_is_running_and_neither_due_nor_run(pair):
    from runner.io.ledger.store import Ledger, default_url

    for h in HOURS:
        land_hour(pair, h)
    at = HOURS[3] + timedelta(hours=1, minutes=10)
    ledger = Ledger(default_url(pair.resolve()))
    try:
        assert ledger.claim("rides_hourly", wkey(HOURS[1]), "another-host:4242:1", 600)
        p = plan(pair, at, "rides_hourly")["rides_hourly"]
        assert due_ids(p) == [wid(h) for h in HOURS if h != HOURS[1]]
        assert p["counts"]["running"] == 1
        ran = tick(pair, at)
        assert [w["window"] for w in ran["windows"] if w["status"] == "done"] == due_ids(p)
        assert wkey(HOURS[1]) not in {k for (k,) in query(pair, "SELECT window_key FROM weir_runs")}
    finally:
        ledger.dispose()


MIXED_JOB = """\
description: Rides per zone and hour, with each zone's docks from the operations database.
window: {every: 1h, start: 2026-03-28T00:00, end: 2026-03-28T02:00, timezone: Europe/Lisbon, settle: 10m}
inputs:
  rides:
    files: "state/landing/rides/{start:%Y-%m-%d}/{start:%H}-*.csv"
    schema: {ride_id: str, started_at: datetime(Europe/Lisbon), zone: str, fare: str, amount: float}
  docks:
    database: sqlite:///state/operations.sqlite
    table: zone_docks
    schema: {zone: str, docks: int}
steps:
  - sql: |
      SELECT r.zone, COUNT(*) AS rides, MAX(d.docks) AS docks
      FROM rides r JOIN docks d ON r.zone = d.zone
      GROUP BY r.zone
output:
  path: "state/warehouse/zone_load/{start:%Y-%m-%d/%H}.parquet"
"""


def test_a_job_that_also_reads_a_table_still_waits_for_its_input_files(tmp_path):
    root = write_jobs(tmp_path / "ws", {"zone_load": MIXED_JOB})
    conn = sqlite3.connect(root / "state" / "operations.sqlite")
    try:
        with conn:
            conn.execute("CREATE TABLE zone_docks (zone TEXT, docks INTEGER)")
            conn.executemany("INSERT INTO zone_docks VALUES (?, ?)", [("riverside", 12), ("harbour", 8)])
    finally:
        conn.close()
    land_hour(root, HOURS[0])
    p = plan(root, HOURS[1] + timedelta(hours=1, minutes=10))["zone_load"]
    assert due_ids(p) == [wid(HOURS[0])]
    assert [i["window"] for i in p["waiting"]] == [wid(HOURS[1])] and "rides" in p["waiting"][0]["reason"]


def _reasons(root, at: datetime) -> dict[tuple[str, str], list[str]]:
    return {(w["job"], w["window"]): w["reasons"]
            for w in cli_json(root, "stale", "--at", at_text(at))["windows"]}


def test_stale_windows_are_due_with_the_component_that_changed(pair):
    for h in HOURS:
        land_hour(pair, h)
    at = DAY_DUE
    assert tick(pair, at)["counts"] == {"done": 5}
    day = wid(local_midnight(2026, 3, 28))
    job = pair / "jobs" / "rides_hourly.yaml"

    # spec: a declared column type; the output's revenue type changes, so the consumer's input does too
    edit(job, '"decimal(10,2)"', '"float"')
    planned = plan(pair, at)
    assert due_ids(planned["rides_hourly"]) == [wid(h) for h in HOURS]
    assert all(i["state"] == "stale" and "spec" in i["reason"] for i in planned["rides_hourly"]["due"])
    assert due_ids(planned["rides_daily"]) == [] and planned["rides_daily"]["counts"]["stale"] == 1
    assert {tuple(v) for v in _reasons(pair, at).values()} == {("spec",), ("upstream",)}
    tick(pair, at)  # re-runs the hourly windows only: the daily one is pending until they have
    planned = plan(pair, at)
    assert due_ids(planned["rides_hourly"]) == []
    assert due_ids(planned["rides_daily"]) == [day]
    assert "upstream" in planned["rides_daily"]["due"][0]["reason"]
    assert tick(pair, at)["counts"] == {"done": 1}

    # code: a SQL line (the same rows, in another grouping order)
    edit(job, "GROUP BY zone, fare", "GROUP BY fare, zone")
    planned = plan(pair, at)
    assert due_ids(planned["rides_hourly"]) == [wid(h) for h in HOURS]
    assert all("code" in i["reason"] for i in planned["rides_hourly"]["due"])
    assert {tuple(v) for (j, _), v in _reasons(pair, at).items() if j == "rides_hourly"} == {("code",)}
    tick(pair, at)
    assert all(not p["due"] for p in plan(pair, at).values())  # same rows: the daily window stays current

    # input: one hour's file rewritten with one more ride
    land_hour(pair, HOURS[1], rows=4)
    planned = plan(pair, at)
    assert due_ids(planned["rides_hourly"]) == [wid(HOURS[1])]
    assert "input" in planned["rides_hourly"]["due"][0]["reason"]
    assert _reasons(pair, at) == {("rides_hourly", wid(HOURS[1])): ["input"],
                                  ("rides_daily", day): ["upstream"]}


def test_jobs_are_planned_and_ticked_in_dependency_order(tmp_path):
    # names sort against the dependency order: a_daily reads z_hourly
    root = write_jobs(tmp_path / "ws", {
        "z_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T02:00").replace("rides_hourly", "z_hourly"),
        "a_daily": daily_job(producer="z_hourly", end="2026-03-29"),
    })
    for h in HOURS[:2]:
        land_hour(root, h)
    order = [p["job"] for p in cli_json(root, "plan", "--at", at_text(DAY_DUE))]
    from helpers_plan import jobs_reading

    readers = jobs_reading(root)  # from the YAML files
    assert readers == {"z_hourly": {"a_daily"}}
    assert order.index("z_hourly") < order.index("a_daily")
    ran = [w["job"] for w in tick(root, DAY_DUE)["windows"] if w["status"] == "done"]
    assert ran == ["z_hourly", "z_hourly", "a_daily"]


def test_inputs_are_rechecked_only_inside_the_recheck_horizon_but_always_by_stale(tmp_path):
    starts = hours(H0, 6)
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T06:00",
                                                                   extra="recheck: 2h\n")})
    for h in starts:
        land_hour(root, h)
    at = starts[-1] + timedelta(hours=1, minutes=30)
    assert tick(root, at)["counts"] == {"done": 6}
    horizon = at - timedelta(hours=2)  # the job's recheck: 2h
    # one more ride lands for every hour, each file is rewritten
    for h in starts:
        land_hour(root, h, rows=4)
    inside = [wid(h) for h in starts if h + timedelta(hours=1) >= horizon]
    outside = [wid(h) for h in starts if h + timedelta(hours=1) < horizon]
    assert inside and outside
    p = plan(root, at)["rides_hourly"]
    assert due_ids(p) == inside
    assert p["counts"]["done"] == len(outside)
    stale = cli_json(root, "stale", "--at", at_text(at))
    assert [w["window"] for w in stale["windows"]] == [wid(h) for h in starts]
    assert {tuple(w["reasons"]) for w in stale["windows"]} == {("input",)}


# ---------------------------------------------------------------- late data


def test_late_inputs_are_flagged_in_plan_and_why_and_counted_per_job(tmp_path):
    starts = hours(H0, 4)
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T04:00",
                                                                   extra="late_after: 1h\n")})
    # newest input file's mtime after the window end: 5m, 90m, 30m, 61m (os.utime)
    after = [timedelta(minutes=5), timedelta(minutes=90), timedelta(minutes=30), timedelta(minutes=61)]
    for h, a in zip(starts, after, strict=True):
        land_hour(root, h, mtime=h + timedelta(hours=1) + a)
    land_hour(root, starts[0], part="extra", mtime=starts[0] + timedelta(hours=3))  # a later second file
    late = [h for h, a in zip(starts, after, strict=True) if a > timedelta(hours=1)] + [starts[0]]
    at = starts[-1] + timedelta(hours=3)
    p = plan(root, at)["rides_hourly"]
    assert {i["window"] for i in p["due"] if i["late"]} == {wid(h) for h in late}
    assert p["late"] == len(late)
    assert tick(root, at)["counts"] == {"done": 4}
    p = plan(root, at)["rides_hourly"]
    assert p["late"] == len(late) and p["due"] == []
    for h, a in zip(starts, after, strict=True):
        info = cli_json(root, "why", "rides_hourly", wid(h), "--at", at_text(at))
        newest = max(os.stat(f).st_mtime for f in hour_file(root, h).parent.glob(f"{h.astimezone(LISBON):%H}-*.csv"))
        lateness = datetime.fromtimestamp(newest, UTC) - (h + timedelta(hours=1))
        assert info["ingestion"]["late"] is (lateness > timedelta(hours=1)), wid(h)
        assert info["ingestion"]["newest_input"].startswith(f"{datetime.fromtimestamp(newest, UTC):%Y-%m-%dT%H:%M:%S}")
        # ISO 8601 duration of the lateness: whole minutes here (the standard's PnDTnHnMnS form)
        mins = int(lateness.total_seconds() // 60)
        expected = "PT" + (f"{mins // 60}H" if mins >= 60 else "") + (f"{mins % 60}M" if mins % 60 else "")
        assert info["ingestion"]["after_window_end"] == expected, (wid(h), a)
    text = cli(root, "why", "rides_hourly", wid(starts[1]), "--at", at_text(at)).stdout
    assert "LATE" in text
    # history flags the same runs, and keeps the newest input time the flag is computed from
    for h in starts:
        (run,) = cli_json(root, "history", "rides_hourly", "--window", wid(h))
        assert run["late"] is (h in late), wid(h)
    (run,) = cli_json(root, "history", "rides_hourly", "--window", wid(starts[1]))
    assert run["ingested_at"].startswith(at_text(starts[1] + timedelta(hours=2, minutes=30))[:19])
    assert "done late" in cli(root, "history", "rides_hourly", "--window", wid(starts[1])).stdout
