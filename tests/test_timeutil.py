"""Durations, instants and offsets against ISO 8601, RFC 3339, zoneinfo and pandas."""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from runner.model.timeutil import (
    BadValue,
    format_duration,
    format_instant,
    format_utc,
    from_us,
    localize,
    parse_duration,
    parse_instant,
    parse_utc,
    short_duration,
    to_us,
    zone,
)

LISBON = ZoneInfo("Europe/Lisbon")

# ---------------------------------------------------------------- durations


@pytest.mark.parametrize(("text", "expected"), [
    # ISO 8601 durations (format PnW / PnDTnHnMnS; clause numbers not quoted, from memory)
    ("PT10M", timedelta(minutes=10)),
    ("P7D", timedelta(days=7)),
    ("P1W", timedelta(weeks=1)),
    ("P1DT1H", timedelta(days=1, hours=1)),
    ("PT1H30M", timedelta(hours=1, minutes=30)),
    ("PT36H", timedelta(hours=36)),           # ISO 8601 allows a value above the carry point
    ("PT0.5S", timedelta(milliseconds=500)),  # a decimal fraction of the lowest-order component
    ("PT0S", timedelta(0)),
    ("pt10m", timedelta(minutes=10)),         # lower case, as people type it
    # weir's short forms (units s, m, h, d, w)
    ("30s", timedelta(seconds=30)),
    ("10m", timedelta(minutes=10)),
    ("1h", timedelta(hours=1)),
    ("7d", timedelta(days=7)),
    ("2w", timedelta(weeks=2)),
    (" 10 m ", timedelta(minutes=10)),
])
def test_durations_parse_iso_8601_and_short_forms(text, expected):
    assert parse_duration(text) == expected


@pytest.mark.parametrize("text", ["P", "PT", "P1Y", "P1M", "1mo", "1y", "10", "10 minutes", "-1h", "1.5h", "PT1H2"])
def test_durations_without_fixed_length_or_unit_are_refused_with_a_hint(text):
    with pytest.raises(BadValue, match=r"bad duration .*(10m|PT10M)"):
        parse_duration(text)


def test_a_bare_number_other_than_zero_needs_a_unit():
    assert parse_duration(0) == timedelta(0)
    with pytest.raises(BadValue, match="add a unit"):
        parse_duration(10)
    with pytest.raises(BadValue):
        parse_duration(True)


@pytest.mark.parametrize(("value", "expected"), [
    # ISO 8601 duration representations, written by hand
    (timedelta(hours=23), "PT23H"),    # a spring-forward day
    (timedelta(hours=25), "P1DT1H"),   # a fall-back day
    (timedelta(hours=1), "PT1H"),
    (timedelta(minutes=15), "PT15M"),
    (timedelta(days=31), "P31D"),
    (timedelta(days=30, hours=23), "P30DT23H"),
    (timedelta(seconds=90), "PT1M30S"),
    (timedelta(milliseconds=1500), "PT1.5S"),
    (timedelta(microseconds=1), "PT0.000001S"),
    (timedelta(0), "PT0S"),            # ISO 8601 needs at least one component
])
def test_durations_format_as_iso_8601(value, expected):
    assert format_duration(value) == expected


_ISO_DURATION = re.compile(r"^P(?:\d+D)?(?:T(?:\d+H)?(?:\d+M)?(?:\d+(?:\.\d+)?S)?)?$")


@settings(max_examples=200, deadline=None)
@given(st.timedeltas(min_value=timedelta(0), max_value=timedelta(days=3650)))
def test_formatted_durations_are_iso_8601_and_agree_with_pandas(value):
    text = format_duration(value)
    # ISO 8601 duration grammar (day and time components only), written here from memory
    assert _ISO_DURATION.match(text) and text not in ("P", "PT"), text
    assert parse_duration(text) == value
    # pandas parses ISO 8601 durations independently
    assert pd.Timedelta(text) == pd.Timedelta(value)
    # pandas writes its own form (P0DT23H0M0S: every component, always): its
    # text differs from weir's, so compare the values it stands for
    assert parse_duration(pd.Timedelta(value).isoformat()) == value


def test_pandas_iso_text_for_a_23_hour_day_reads_back_to_23_hours():
    text = pd.Timedelta(hours=23).isoformat()  # pandas' own spelling
    assert text != format_duration(timedelta(hours=23))  # the forms do differ
    assert parse_duration(text) == timedelta(hours=23)


def test_short_durations_are_compact():
    assert short_duration(timedelta(minutes=10)) == "10m"
    assert short_duration(timedelta(hours=1, minutes=30)) == "1h30m"
    assert short_duration(timedelta(days=2)) == "2d"
    assert short_duration(timedelta(0)) == "0s"
    assert parse_duration(short_duration(timedelta(hours=1))) == timedelta(hours=1)


# ---------------------------------------------------------------- instants (RFC 3339, ISO 8601)


@pytest.mark.parametrize(("text", "utc"), [
    # RFC 3339 section 5.8, the examples, with the UTC instant each one names
    ("1985-04-12T23:20:50.52Z", datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=UTC)),
    ("1996-12-19T16:39:57-08:00", datetime(1996, 12, 20, 0, 39, 57, tzinfo=UTC)),
    ("1937-01-01T12:00:27.87+00:20", datetime(1937, 1, 1, 11, 40, 27, 870000, tzinfo=UTC)),
    # RFC 3339 5.6 NOTE: "T" and "Z" may be lower case; a space may replace "T"
    ("1985-04-12t23:20:50.52z", datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=UTC)),
    ("1985-04-12 23:20:50.52Z", datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=UTC)),
])
def test_rfc_3339_examples_parse_to_the_instant_they_name(text, utc):
    # a zone other than UTC proves the explicit offset wins over the job's zone
    assert parse_instant(text, LISBON) == utc


def test_rfc_3339_leap_second_example_is_refused_with_a_clear_message():
    # RFC 3339 5.8 also shows 1990-12-31T23:59:60Z, a leap second. Python's
    # datetime has no second 60, so weir refuses it in one clear line rather
    # than guessing (a known limitation).
    with pytest.raises(BadValue, match="bad timestamp '1990-12-31T23:59:60Z': use ISO 8601"):
        parse_instant("1990-12-31T23:59:60Z", UTC)


def test_iso_8601_week_date_is_read_as_its_calendar_day():
    # ISO 8601 week dates: week 1 holds the year's first Thursday. 2026-01-01
    # is a Thursday (memory; datetime agrees below), so week 1 starts Monday
    # 2025-12-29 and 2026-W13-7 is 12 weeks and 6 days later: Sunday 2026-03-29.
    assert datetime(2026, 1, 1).isoweekday() == 4
    expected_day = datetime(2025, 12, 29) + timedelta(weeks=12, days=6)
    assert parse_instant("2026-W13-7", UTC) == expected_day.replace(tzinfo=UTC)


def test_a_date_or_time_without_offset_is_local_to_the_given_zone():
    # zoneinfo: Lisbon is UTC+01:00 on 2026-06-01 (summer time), UTC+00:00 in January
    assert parse_instant("2026-06-01", LISBON) == datetime(2026, 6, 1, tzinfo=LISBON).astimezone(UTC)
    assert parse_instant("2026-06-01T06:00", LISBON) == datetime(2026, 5, 31, 23, 0, tzinfo=UTC) + timedelta(hours=6)
    assert parse_instant("2026-01-15T06:00", LISBON) == datetime(2026, 1, 15, 6, 0, tzinfo=UTC)


@pytest.mark.parametrize("text", ["yesterday", "2026-13-01", "2026-02-30", "26-01-01", "", "2026-01-01T25:00"])
def test_bad_timestamps_are_refused_with_a_hint(text):
    with pytest.raises(BadValue, match="use ISO 8601"):
        parse_instant(text, UTC)


def _scan_first_at_or_after(wall: datetime, tz: ZoneInfo) -> datetime:
    """First UTC instant (minute steps) whose local wall time per zoneinfo is >= wall."""
    t = wall.replace(tzinfo=UTC) - timedelta(hours=15)
    while t.astimezone(tz).replace(tzinfo=None) < wall:
        t += timedelta(minutes=1)
    return t


@pytest.mark.parametrize(("zone_name", "wall"), [
    ("Europe/Lisbon", datetime(2026, 3, 29, 1, 30)),        # 01:00 -> 02:00
    ("Australia/Sydney", datetime(2026, 10, 4, 2, 0)),      # 02:00 -> 03:00
    ("America/Santiago", datetime(2026, 9, 6, 0, 0)),       # 00:00 -> 01:00
    ("Australia/Lord_Howe", datetime(2026, 10, 4, 2, 15)),  # 02:00 -> 02:30, a half-hour change
])
def test_local_time_in_a_spring_forward_gap_moves_to_the_end_of_the_gap(zone_name, wall):
    tz = ZoneInfo(zone_name)
    # zoneinfo: the wall time does not survive a round trip, so it does not exist
    assert wall.replace(tzinfo=tz).astimezone(UTC).astimezone(tz).replace(tzinfo=None) != wall
    expected = _scan_first_at_or_after(wall, tz)
    assert localize(wall, tz) == expected
    assert parse_instant(wall.isoformat(), tz) == expected
    # and the instant just before it is still on the old offset (zoneinfo)
    assert (expected - timedelta(seconds=1)).astimezone(tz).utcoffset() != expected.astimezone(tz).utcoffset()


@pytest.mark.parametrize(("zone_name", "wall"), [
    ("Europe/Lisbon", datetime(2026, 10, 25, 1, 30)),
    ("Australia/Sydney", datetime(2026, 4, 5, 2, 30)),
    ("America/Santiago", datetime(2026, 4, 4, 23, 30)),
    ("Australia/Lord_Howe", datetime(2026, 4, 5, 1, 45)),   # 02:00 -> 01:30
])
def test_repeated_local_time_means_its_first_occurrence(zone_name, wall):
    tz = ZoneInfo(zone_name)
    first = wall.replace(tzinfo=tz, fold=0).astimezone(UTC)   # PEP 495: fold=0 is the earlier
    second = wall.replace(tzinfo=tz, fold=1).astimezone(UTC)
    assert second > first  # zoneinfo: the wall time happens twice
    assert localize(wall, tz) == first == _scan_first_at_or_after(wall, tz)
    assert parse_instant(wall.isoformat(), tz) == first
    # an explicit offset picks the second one
    offset = second.astimezone(tz).strftime("%z")
    assert parse_instant(f"{wall.isoformat()}{offset[:3]}:{offset[3:]}", tz) == second


# ---------------------------------------------------------------- formatting ids and keys

# RFC 3339 section 5.6 (date-time), transcribed from its ABNF
_RFC3339 = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(?:\.\d+)?(?:Z|[+-]\d{2}:\d{2})$")
# ISO 8601-1 extended format, local time with UTC offset, minutes or seconds precision
_ISO_LOCAL = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(?::\d{2})?[+-]\d{2}:\d{2}$")


@pytest.mark.parametrize(("zone_name", "local"), [
    ("Europe/Lisbon", datetime(2026, 7, 1, 9, 0)),
    ("America/Santiago", datetime(2026, 7, 1, 9, 0)),
    ("Asia/Kolkata", datetime(2026, 7, 1, 9, 0)),      # +05:30
    ("Pacific/Chatham", datetime(2026, 7, 1, 9, 0)),   # +12:45
    ("UTC", datetime(2026, 7, 1, 9, 0)),
])
def test_window_id_form_carries_the_offset_zoneinfo_gives(zone_name, local):
    tz = ZoneInfo(zone_name)
    instant = local.replace(tzinfo=tz).astimezone(UTC)
    text = format_instant(instant, tz)
    offset = local.replace(tzinfo=tz).utcoffset()  # IANA database via zoneinfo
    minutes = int(offset.total_seconds()) // 60
    sign = "-" if minutes < 0 else "+"
    assert text == f"{local:%Y-%m-%dT%H:%M}{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"
    assert _ISO_LOCAL.match(text)
    assert parse_instant(text, UTC) == instant
    assert format_instant(instant + timedelta(seconds=7), tz).endswith(
        f"{local:%H:%M}:07{text[-6:]}")  # seconds appear only when not zero


def test_ledger_keys_are_rfc_3339_utc_and_round_trip():
    instant = datetime(2026, 3, 29, 1, 0, tzinfo=UTC)
    key = format_utc(instant.astimezone(LISBON))
    assert key == "2026-03-29T01:00:00Z"
    assert _RFC3339.match(key)
    assert parse_utc(key) == instant


@settings(max_examples=200, deadline=None)
@given(st.datetimes(min_value=datetime(1900, 1, 1), max_value=datetime(2200, 1, 1), timezones=st.just(UTC)))
def test_epoch_microseconds_agree_with_pandas(instant):
    # pandas keeps timestamps as integer epoch counts; its microsecond count is
    # an independent reference for weir's integer arithmetic
    assert to_us(instant) == pd.Timestamp(instant).value // 1000  # pandas counts nanoseconds
    assert from_us(to_us(instant)) == instant


def test_unknown_timezone_suggests_the_nearest_iana_name():
    with pytest.raises(BadValue, match="unknown timezone 'Europe/Lisbn' \\(did you mean 'Europe/Lisbon'\\?\\)"):
        zone("Europe/Lisbn")
    for bad in ("", " UTC", "/etc/passwd", "../UTC"):
        with pytest.raises(BadValue, match="unknown timezone"):
            zone(bad)
    assert zone("Australia/Sydney") == ZoneInfo("Australia/Sydney")
