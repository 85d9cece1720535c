"""Window counts, bounds and lengths checked against references outside weir.

References used, named again beside each check:

* the IANA time zone database, read through the standard library's `zoneinfo`
  (UTC offsets, DST transitions, day lengths);
* croniter, as an independent generator for `every:` cadences (which weir
  computes without it);
* cronsim, a second cron implementation, for `cron:` cadences (which weir
  computes with croniter);
* pandas `date_range`, for fixed and calendar cadences;
* the standard library's `calendar` and `datetime`, for calendar facts;
* the POSIX crontab specification, for the day-of-month / day-of-week rule.

Expected values are derived from those references, never from weir.
"""

from __future__ import annotations

import calendar
import json
from datetime import UTC, date, datetime, time, timedelta
from zoneinfo import ZoneInfo

import pandas as pd
import pytest
from croniter import croniter
from cronsim import CronSim

from runner.core.windows import Cadence
from runner.model.spec import WindowDecl

# ---------------------------------------------------------------- helpers


def cadence(*, every: str | None = None, cron: str | None = None, tz: str = "UTC",
            start: str = "2026-01-01", end: str | None = None) -> Cadence:
    """A cadence built the way a job file builds it (through the spec model)."""
    decl = WindowDecl.model_validate(
        {k: v for k, v in {"every": every, "cron": cron, "timezone": tz, "start": start,
                           "end": end}.items() if v is not None})
    return Cadence.of(decl)


def local_midnight(tz: ZoneInfo, day: date) -> datetime:
    """The first instant of a local calendar day, by zoneinfo (IANA database).

    Where local midnight does not exist (a spring-forward gap at 00:00) the day
    starts at the end of the gap: the first UTC instant whose wall time is on it.
    """
    return first_instant_at_or_after(datetime.combine(day, time()), tz)


def first_instant_at_or_after(wall: datetime, tz: ZoneInfo) -> datetime:
    """The first UTC instant whose local wall time (zoneinfo) is at or after `wall`.

    Scans UTC minutes, so it knows nothing of weir's localizing code: in a
    spring-forward gap this is the end of the gap, in a repeated hour the first
    occurrence.
    """
    t = wall.replace(tzinfo=UTC) - timedelta(hours=15)
    while t.astimezone(tz).replace(tzinfo=None) < wall:
        t += timedelta(minutes=1)
    return t


def iso_offset(offset: timedelta) -> str:
    """An ISO 8601 extended-format UTC offset, `+01:00` (the ±hh:mm form; from memory)."""
    minutes = int(offset.total_seconds()) // 60
    sign = "-" if minutes < 0 else "+"
    hours, mins = divmod(abs(minutes), 60)
    return f"{sign}{hours:02d}:{mins:02d}"


def expected_id(instant: datetime, tz: ZoneInfo) -> str:
    """ISO 8601 local time with offset, from zoneinfo's view of `instant`."""
    local = instant.astimezone(tz)
    return f"{local:%Y-%m-%dT%H:%M}{iso_offset(local.utcoffset())}"


def us(instant: datetime) -> int:
    """Epoch microseconds, computed here with plain datetime arithmetic."""
    return (instant - datetime(1970, 1, 1, tzinfo=UTC)) // timedelta(microseconds=1)


def starts(span) -> list[int]:
    return span.starts_us.to_list()


def ends(span) -> list[int]:
    return span.ends_us.to_list()


def year_bounds(tz: ZoneInfo, year: int = 2026) -> tuple[datetime, datetime]:
    return local_midnight(tz, date(year, 1, 1)), local_midnight(tz, date(year + 1, 1, 1))


# DST days of 2026 in two hemispheres. The hour counts in the comments are
# from memory (EU: last Sunday of March/October at 01:00 UTC; New South Wales:
# first Sunday of April/October; Chile: first Saturday of April/September at
# 24:00); the tests take the actual length from zoneinfo and also check that
# memory agrees with it.
DST_DAYS = [
    ("Europe/Lisbon", date(2026, 3, 29), 23),     # spring forward, 01:00 -> 02:00
    ("Europe/Lisbon", date(2026, 10, 25), 25),    # fall back, 02:00 -> 01:00
    ("Australia/Sydney", date(2026, 4, 5), 25),   # fall back (southern autumn), 03:00 -> 02:00
    ("Australia/Sydney", date(2026, 10, 4), 23),  # spring forward, 02:00 -> 03:00
    ("America/Santiago", date(2026, 4, 4), 25),   # fall back at 24:00 -> 23:00
    ("America/Santiago", date(2026, 9, 6), 23),   # spring forward, 00:00 -> 01:00
]


# ---------------------------------------------------------------- IANA database (zoneinfo)


@pytest.mark.parametrize(("zone", "day", "hours_from_memory"), DST_DAYS)
def test_hourly_windows_on_a_dst_day_number_the_hours_zoneinfo_gives_the_day(zone, day, hours_from_memory):
    tz = ZoneInfo(zone)
    lo, hi = local_midnight(tz, day), local_midnight(tz, day + timedelta(days=1))
    day_hours = (hi - lo) / timedelta(hours=1)  # IANA database via zoneinfo
    assert day_hours == hours_from_memory  # memory agrees with the database
    span = cadence(every="1h", tz=zone).span(lo, hi)
    assert len(span) == day_hours
    # every window is exactly one hour of absolute time, back to back
    assert all(e - s == 3600 * 10**6 for s, e in zip(starts(span), ends(span), strict=True))
    assert starts(span)[0] == us(lo) and ends(span)[-1] == us(hi)


@pytest.mark.parametrize(("zone", "day", "hours_from_memory"), DST_DAYS)
def test_daily_window_on_a_dst_day_lasts_the_local_day_zoneinfo_gives(zone, day, hours_from_memory):
    tz = ZoneInfo(zone)
    lo, hi = local_midnight(tz, day), local_midnight(tz, day + timedelta(days=1))
    window = cadence(every="1d", tz=zone).window_at(lo + timedelta(hours=12))
    assert window is not None
    assert window.start == lo and window.end == hi  # local midnights from zoneinfo
    assert window.length == timedelta(hours=hours_from_memory)


@pytest.mark.parametrize(("zone", "day"), [("Europe/Lisbon", date(2026, 10, 25)),
                                           ("Australia/Sydney", date(2026, 4, 5))])
def test_repeated_fall_back_hour_gives_two_windows_with_the_offsets_zoneinfo_gives(zone, day):
    tz = ZoneInfo(zone)
    cad = cadence(every="1h", tz=zone)
    span = cad.span(local_midnight(tz, day), local_midnight(tz, day + timedelta(days=1)))
    ids = span.ids().to_list()
    # The repeated wall hour, found from zoneinfo: the local hour that two UTC
    # instants of the day map to (fold 0 and fold 1 of PEP 495).
    walls = [datetime.fromtimestamp(s / 1e6, UTC).astimezone(tz).replace(tzinfo=None) for s in starts(span)]
    repeated = [w for w in set(walls) if walls.count(w) == 2]
    assert len(repeated) == 1
    wall = repeated[0]
    first = wall.replace(tzinfo=tz, fold=0).utcoffset()
    second = wall.replace(tzinfo=tz, fold=1).utcoffset()
    assert first != second
    text = f"{wall:%Y-%m-%dT%H:%M}"
    assert f"{text}{iso_offset(first)}" in ids
    assert f"{text}{iso_offset(second)}" in ids
    assert ids.index(f"{text}{iso_offset(second)}") == ids.index(f"{text}{iso_offset(first)}") + 1
    # each id names exactly its own window (ISO 8601 with offset is unambiguous)
    for offset in (first, second):
        w = cad.window(f"{text}{iso_offset(offset)}")
        assert w.start == wall.replace(tzinfo=tz, fold=0 if offset == first else 1).astimezone(UTC)
        assert w.length == timedelta(hours=1)
    # a wall time without offset means the first occurrence (PEP 495 fold=0)
    assert cad.window(text).start == wall.replace(tzinfo=tz, fold=0).astimezone(UTC)


@pytest.mark.parametrize(("zone", "day", "missing_wall"), [
    ("Europe/Lisbon", date(2026, 3, 29), datetime(2026, 3, 29, 1, 0)),
    ("Australia/Sydney", date(2026, 10, 4), datetime(2026, 10, 4, 2, 0)),
])
def test_no_window_starts_in_the_skipped_spring_forward_hour(zone, day, missing_wall):
    tz = ZoneInfo(zone)
    # zoneinfo: this wall time does not exist (it does not survive a round trip via UTC)
    assert missing_wall.replace(tzinfo=tz).astimezone(UTC).astimezone(tz).replace(tzinfo=None) != missing_wall
    cad = cadence(every="1h", tz=zone)
    span = cad.span(local_midnight(tz, day), local_midnight(tz, day + timedelta(days=1)))
    assert not any(i.startswith(f"{missing_wall:%Y-%m-%dT%H}") for i in span.ids().to_list())
    # the non-existent hour names the window at the end of the gap (weir's rule:
    # shift forward), located here by scanning zoneinfo
    gap_end = first_instant_at_or_after(missing_wall, tz)
    assert cad.window(f"{missing_wall:%Y-%m-%dT%H:%M}").start == gap_end
    assert cad.window(f"{missing_wall:%Y-%m-%dT%H:%M}").id == expected_id(gap_end, tz)


def test_weir_windows_lists_bounds_across_the_lisbon_spring_forward_gap(weir, make_workspace):
    root = make_workspace({"rides_hourly": """
        window: {every: 1h, start: 2026-03-01, timezone: Europe/Lisbon}
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "state/out/{start:%Y-%m-%dT%H%z}.parquet"}
    """})
    result = weir(root, "windows", "rides_hourly", "--from", "2026-03-29", "--to", "2026-03-29T04:00",
                  "--json", "--at", "2026-04-01T00:00Z")
    assert result.exit_code == 0, result.output
    rows = json.loads(result.stdout)
    tz = ZoneInfo("Europe/Lisbon")
    # Expected from zoneinfo: every UTC hour from local midnight to local 04:00.
    lo, hi = local_midnight(tz, date(2026, 3, 29)), first_instant_at_or_after(datetime(2026, 3, 29, 4), tz)
    hours = [lo + timedelta(hours=k) for k in range(int((hi - lo) / timedelta(hours=1)))]
    assert len(rows) == len(hours) == 3  # 00:00, (01:00 skipped), 02:00, 03:00
    assert [r["start"] for r in rows] == [expected_id(h, tz) for h in hours]
    assert [r["end"] for r in rows] == [expected_id(h + timedelta(hours=1), tz) for h in hours]
    assert [r["start_utc"] for r in rows] == [f"{h:%Y-%m-%dT%H:%M:%S}Z" for h in hours]
    assert all(r["length_seconds"] == 3600 for r in rows)
    # the local end of the first window jumps over the gap: 01:00 does not exist
    assert rows[0]["end"] == rows[1]["start"]


def test_weir_windows_lists_both_repeated_hours_of_the_lisbon_fall_back(weir, make_workspace):
    root = make_workspace({"rides_hourly": """
        window: {every: 1h, start: 2026-10-01, timezone: Europe/Lisbon}
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "state/out/{start:%Y-%m-%dT%H%z}.parquet"}
    """})
    # bounds without offsets: read in the job's timezone, 01:00 as its first occurrence
    result = weir(root, "windows", "rides_hourly", "--from", "2026-10-25T01:00", "--to", "2026-10-25T02:00",
                  "--json", "--at", "2026-11-01T00:00Z")
    assert result.exit_code == 0, result.output
    rows = json.loads(result.stdout)
    tz = ZoneInfo("Europe/Lisbon")
    wall = datetime(2026, 10, 25, 1, 0)
    first, second = (wall.replace(tzinfo=tz, fold=f).astimezone(UTC) for f in (0, 1))
    assert second - first == timedelta(hours=1)  # zoneinfo: the hour happens twice
    assert [r["start"] for r in rows] == [expected_id(first, tz), expected_id(second, tz)]
    assert [r["start"] for r in rows] == ["2026-10-25T01:00+01:00", "2026-10-25T01:00+00:00"]  # from memory: WEST, WET
    assert [r["length"] for r in rows] == ["PT1H", "PT1H"]  # ISO 8601 duration


def test_daily_window_starts_at_the_end_of_a_midnight_gap_in_santiago():
    tz = ZoneInfo("America/Santiago")
    day = date(2026, 9, 6)
    midnight = datetime.combine(day, time())
    # zoneinfo: 00:00 does not exist there that day (clocks jump to 01:00)
    assert midnight.replace(tzinfo=tz).astimezone(UTC).astimezone(tz).replace(tzinfo=None) != midnight
    window = cadence(every="1d", tz="America/Santiago").window(day.isoformat())
    gap_end = first_instant_at_or_after(midnight, tz)
    assert window.start == gap_end
    assert window.id == expected_id(gap_end, tz)
    assert window.end == local_midnight(tz, day + timedelta(days=1))


# ---------------------------------------------------------------- croniter as reference for every:


def croniter_fires(expr: str, tz: ZoneInfo, lo: datetime, hi: datetime) -> list[int]:
    """Fire times of `expr` in [lo, hi], plus the first one at or after hi (croniter)."""
    it = croniter(expr, (lo - timedelta(seconds=1)).astimezone(tz))
    out = []
    while True:
        fire = it.get_next(datetime)
        out.append(us(fire))
        if fire >= hi:
            return out


@pytest.mark.parametrize("zone", ["UTC", "Europe/Lisbon", "America/Santiago"])
@pytest.mark.parametrize(("every", "expr"), [("1h", "0 * * * *"), ("1d", "0 0 * * *")])
def test_every_cadence_matches_croniter_equivalent_over_a_year(zone, every, expr):
    tz = ZoneInfo(zone)
    lo, hi = year_bounds(tz)
    fires = croniter_fires(expr, tz, lo, hi)  # croniter, an independent generator
    span = cadence(every=every, tz=zone).span(lo, hi)
    assert starts(span) == fires[:-1]
    assert ends(span) == fires[1:]


class CroniterCalled(Exception):
    """Raised by the trap below (not a ValueError, so no validator swallows it)."""


def test_enumerating_every_windows_never_calls_croniter(monkeypatch, weir, make_workspace):
    def refuse(*args, **kwargs):
        raise CroniterCalled("croniter was called for an every: cadence")

    for name in ("__init__", "get_next", "get_prev", "match", "is_valid", "expand"):
        monkeypatch.setattr(croniter, name, refuse)
    tz = ZoneInfo("Europe/Lisbon")
    lo, hi = year_bounds(tz)
    for every in ("15m", "1h", "1d", "1w", "1mo", "1y"):
        cad = cadence(every=every, tz="Europe/Lisbon", start="2025-01-01")
        span = cad.span(lo, hi)
        assert len(span.ids()) == len(span.keys()) == len(span)
        w = cad.window_at(lo + timedelta(days=100))
        assert w is not None
        assert cad.shift(w, 1) is not None and cad.shift(w, -1) is not None
        assert cad.window(w.id) == w
        assert cad.first() is not None
        cad.due(hi)
        cad.overlapping(lo, lo + timedelta(days=3))
    root = make_workspace({"rides_hourly": """
        window: {every: 1h, start: 2026-01-01, timezone: Europe/Lisbon}
        steps: [{sql: SELECT 1 AS rides}]
        output: {path: "state/out/{start:%Y-%m-%dT%H%z}.parquet"}
    """})
    assert weir(root, "windows", "rides_hourly", "--to", "2026-02-01", "--json", "--at", "2026-06-01T00:00Z").exit_code == 0
    assert weir(root, "check", "--at", "2026-06-01T00:00Z").exit_code == 0
    # the trap is live: a cron cadence does reach croniter and fails
    with pytest.raises(CroniterCalled):
        Cadence(None, "0 * * * *", tz, lo, None).span(lo, hi)


# ---------------------------------------------------------------- cronsim as reference for cron:


def cronsim_fires(expr: str, tz: ZoneInfo, lo: datetime, hi: datetime) -> list[int]:
    """Fire times of `expr` from lo, up to and including the first at or after hi (cronsim)."""
    out = []
    for fire in CronSim(expr, (lo - timedelta(seconds=1)).astimezone(tz)):
        out.append(us(fire))
        if fire >= hi:
            return out
    raise AssertionError("cronsim stopped")  # pragma: no cover


CRON_CASES = [
    ("UTC", "0 * * * *"),
    ("UTC", "30 1 * * *"),
    ("UTC", "15 6 * * 1-5"),
    ("UTC", "0 6 1,15 * 1"),
    ("UTC", "0 0 1 * *"),
    ("Europe/Lisbon", "0 * * * *"),
    ("Europe/Lisbon", "30 1 * * *"),      # fixed time inside the repeated hour in October
    ("Europe/Lisbon", "0 1-3 * * *"),
    ("Europe/Lisbon", "*/20 1 * * *"),    # wildcard minutes inside the March gap
    ("Europe/Lisbon", "0 6 1,15 * 1"),
    ("Australia/Sydney", "30 2 * * *"),   # fixed time inside the October gap
    ("Australia/Sydney", "5 */2 * * *"),  # wildcard hours across both changes
    ("Australia/Sydney", "0 2 * * 0"),
    ("America/Santiago", "59 23 * * *"),  # fixed time inside the April repeated hour
    ("America/Santiago", "0 */6 * * *"),  # midnight in the September gap
    ("America/Santiago", "0 0 * * *"),
]


@pytest.mark.parametrize(("zone", "expr"), CRON_CASES)
def test_cron_windows_match_cronsim_over_a_year(zone, expr):
    tz = ZoneInfo(zone)
    lo, hi = year_bounds(tz)
    fires = cronsim_fires(expr, tz, lo, hi)  # cronsim, an independent cron implementation
    span = cadence(cron=expr, tz=zone, start="2025-12-01").span(lo, hi)
    assert starts(span) == fires[:-1]
    assert ends(span) == fires[1:]


def test_fixed_time_cron_fires_once_on_the_fall_back_night():
    # A daily job at 01:30 in Lisbon: 2026-10-25 repeats 01:00-02:00 (zoneinfo).
    # cron (cronsim) fires once, at the first 01:30; the day's window is then
    # as long as the local day, and no one-hour window appears.
    tz = ZoneInfo("Europe/Lisbon")
    cad = cadence(cron="30 1 * * *", tz="Europe/Lisbon")
    w = cad.window_at(datetime(2026, 10, 25, 12, tzinfo=tz))
    first_0130 = datetime(2026, 10, 25, 1, 30, tzinfo=tz, fold=0)
    assert w.start == first_0130.astimezone(UTC)
    assert w.end == datetime(2026, 10, 26, 1, 30, tzinfo=tz).astimezone(UTC)
    assert w.length == timedelta(hours=25)  # the local day's length, zoneinfo
    assert cad.window_at(datetime(2026, 10, 25, 1, 45, tzinfo=tz, fold=1)) == w
    assert cad.shift(w, -1).start == datetime(2026, 10, 26, 1, 30, tzinfo=tz).astimezone(UTC)
    assert cad.shift(cad.shift(w, -1), 1) == w


def test_cron_on_mondays_gives_one_window_per_monday_of_2026():
    # calendar fact from the standard library: 2026 has 52 Mondays (it starts on
    # a Thursday and is not a leap year; memory agrees)
    mondays = [date(2026, 1, 1) + timedelta(days=k) for k in range(365)
               if (date(2026, 1, 1) + timedelta(days=k)).weekday() == calendar.MONDAY]
    assert len(mondays) == 52
    tz = ZoneInfo("Europe/Lisbon")
    span = cadence(cron="0 0 * * 1", tz="Europe/Lisbon").span(*year_bounds(tz))
    assert len(span) == len(mondays)
    assert [w.local_start.date() for w in span] == mondays
    assert all(w.local_start.time() == time(0, 0) for w in span)
    # a week lasts 7 local days: 168 hours, 167 or 169 across a DST change (zoneinfo)
    for w in span:
        expected = local_midnight(tz, w.local_start.date() + timedelta(days=7)) - w.start
        assert w.length == expected


def test_cron_on_february_29_fires_only_in_leap_years():
    # calendar.isleap (Gregorian rule): 2028 and 2032 are leap years, 2029-2031 not
    cad = cadence(cron="0 0 29 2 *", start="2027-01-01")
    span = cad.span(datetime(2027, 1, 1, tzinfo=UTC), datetime(2033, 1, 1, tzinfo=UTC))
    leap = [y for y in range(2027, 2040) if calendar.isleap(y)]
    assert [w.start.date() for w in span] == [date(y, 2, 29) for y in leap if y < 2033]
    # each window runs to the next leap day
    assert [w.end.date() for w in span] == [date(y, 2, 29) for y in leap[1:3]]


def test_cron_with_day_of_month_and_day_of_week_matches_either():
    # POSIX crontab (IEEE Std 1003.1, the crontab utility, INPUT FILES; paraphrased
    # from memory): when both the day of the month and the day of the week are
    # given as elements or lists, a day matching EITHER of them matches. So
    # "0 0 13 * 5" fires on every 13th and on every Friday, not only on Fridays
    # falling on a 13th.
    span = cadence(cron="0 0 13 * 5").span(datetime(2026, 1, 1, tzinfo=UTC), datetime(2027, 1, 1, tzinfo=UTC))
    days = [date(2026, 1, 1) + timedelta(days=k) for k in range(365)]
    expected = [d for d in days if d.day == 13 or d.weekday() == calendar.FRIDAY]
    assert [w.start.date() for w in span] == expected
    # with only one of the two fields restricted, that one alone decides
    only_13th = cadence(cron="0 0 13 * *").span(datetime(2026, 1, 1, tzinfo=UTC), datetime(2027, 1, 1, tzinfo=UTC))
    assert [w.start.date() for w in only_13th] == [d for d in days if d.day == 13]
    only_fri = cadence(cron="0 0 * * 5").span(datetime(2026, 1, 1, tzinfo=UTC), datetime(2027, 1, 1, tzinfo=UTC))
    assert [w.start.date() for w in only_fri] == [d for d in days if d.weekday() == calendar.FRIDAY]


# ---------------------------------------------------------------- pandas date_range


def pandas_starts(freq: str, zone: str, lo: datetime, hi: datetime, **kwargs) -> list[int]:
    """UTC epoch microseconds of pandas.date_range(lo, hi, freq, tz) incl. the first >= hi."""
    local_lo = lo.astimezone(ZoneInfo(zone)).replace(tzinfo=None)
    local_hi = (hi + timedelta(days=40)).astimezone(ZoneInfo(zone)).replace(tzinfo=None)
    idx = pd.date_range(local_lo, local_hi, freq=freq, tz=zone, **kwargs).as_unit("us")
    values = [int(v) for v in idx.asi8]  # tz-aware asi8: UTC epoch (pandas docs)
    n = sum(1 for v in values if v < us(hi))
    return values[: n + 1]


@pytest.mark.parametrize(("zone", "every", "freq"), [
    ("UTC", "1h", "h"),
    ("Europe/Lisbon", "1h", "h"),           # pandas steps "h" in absolute time
    ("Europe/Lisbon", "15m", "15min"),
    ("Australia/Sydney", "1h", "h"),
    ("Europe/Lisbon", "1d", "D"),           # pandas 3: "D" is a calendar day on tz-aware ranges
    ("Australia/Sydney", "1d", "D"),
    ("Europe/Lisbon", "1w", "7D"),
    ("Europe/Lisbon", "1mo", "MS"),         # month starts
    ("Australia/Sydney", "1mo", "MS"),
])
def test_every_cadence_matches_pandas_date_range_over_a_year(zone, every, freq):
    tz = ZoneInfo(zone)
    lo, hi = year_bounds(tz)
    expected = pandas_starts(freq, zone, lo, hi)
    span = cadence(every=every, tz=zone).span(lo, hi)
    assert starts(span) == expected[:-1]
    assert ends(span) == expected[1:]


def test_daily_cadence_matches_pandas_shift_forward_where_midnight_does_not_exist():
    # pandas date_range(nonexistent="shift_forward") moves a missing local
    # midnight to the first instant after the gap, weir's rule too.
    zone = "America/Santiago"
    lo, hi = year_bounds(ZoneInfo(zone))
    expected = pandas_starts("D", zone, lo, hi, nonexistent="shift_forward")
    span = cadence(every="1d", tz=zone).span(lo, hi)
    assert starts(span) == expected[:-1]
    assert ends(span) == expected[1:]


# ---------------------------------------------------------------- months and calendar


@pytest.mark.parametrize("zone", ["UTC", "Europe/Lisbon", "Australia/Sydney"])
def test_monthly_windows_last_the_month_days_from_calendar_adjusted_for_dst(zone):
    tz = ZoneInfo(zone)
    span = cadence(every="1mo", tz=zone).span(*year_bounds(tz))
    assert len(span) == 12
    for month, w in enumerate(span, start=1):
        days = calendar.monthrange(2026, month)[1]  # standard library calendar
        first = datetime(2026, month, 1, tzinfo=tz)
        nxt = datetime(2026 + month // 12, month % 12 + 1, 1, tzinfo=tz)
        # a month of local days, minus the hour gained in offset by its end (zoneinfo)
        dst_shift = nxt.utcoffset() - first.utcoffset()
        assert w.length == timedelta(days=days) - dst_shift
        assert w.id == expected_id(first.astimezone(UTC), tz)


def test_monthly_windows_starting_on_the_31st_use_the_last_day_of_shorter_months():
    span = cadence(every="1mo", start="2026-01-31").span(datetime(2026, 1, 1, tzinfo=UTC),
                                                       datetime(2027, 1, 1, tzinfo=UTC))
    # standard library calendar: the last day of each month, capped at 31
    expected = [date(2026, m, min(31, calendar.monthrange(2026, m)[1])) for m in range(1, 13)]
    assert [w.start.date() for w in span] == expected
