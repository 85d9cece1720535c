"""Durations, instants and local wall times: parsing, formatting, DST rules.

Pure functions, no I/O. Conventions used throughout weir:

* Durations are written `10m`, `1h`, `7d` (units s, m, h, d, w) or as
  ISO 8601 durations without years or months (`PT10M`, `P7D`).
* Instants are ISO 8601 / RFC 3339 timestamps. A timestamp without an offset
  (or a bare date) is a *local* wall time in the job's timezone.
* A local wall time that does not exist (the hour skipped when clocks spring
  forward) is shifted forward to the first instant after the gap; one that
  occurs twice (the hour repeated when clocks fall back) means the first
  occurrence. The same rules are used for window boundaries and user input.
"""

from __future__ import annotations

import re
from datetime import UTC, date, datetime, timedelta, tzinfo
from functools import lru_cache
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

_SHORT = re.compile(r"^\s*(\d+)\s*(s|m|h|d|w)\s*$")
_UNIT_SECONDS = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 7 * 86400}
_ISO = re.compile(
    r"^P(?!$)(?:(?P<w>\d+)W)?(?:(?P<d>\d+)D)?"
    r"(?:T(?=\d)(?:(?P<h>\d+)H)?(?:(?P<m>\d+)M)?(?:(?P<s>\d+(?:\.\d+)?)S)?)?$"
)


class BadValue(ValueError):
    """A value that cannot be parsed; the message says how to write it."""


def parse_duration(text: str | int | float | timedelta) -> timedelta:
    """Parse `10m`, `1h`, `7d`, `2w`, `30s` or ISO 8601 `PT10M`/`P7D`/`P1W`.

    Plain `0` means no duration. Months and years are refused here: they have
    no fixed length (use them as a window cadence instead).
    """
    if isinstance(text, timedelta):
        return text
    if isinstance(text, bool):
        raise BadValue(f"bad duration {text!r}: write a number and a unit, like 10m, 2h or 7d")
    if isinstance(text, int | float):
        if text == 0:
            return timedelta(0)
        raise BadValue(f"bad duration {text!r}: add a unit (s, m, h, d, w), like {text}m")
    raw = str(text).strip()
    if raw == "0":
        return timedelta(0)
    m = _SHORT.match(raw)
    if m:
        return timedelta(seconds=int(m.group(1)) * _UNIT_SECONDS[m.group(2)])
    iso = _ISO.match(raw.upper())
    if iso:
        parts = {k: float(v) if v else 0.0 for k, v in iso.groupdict().items()}
        return timedelta(
            weeks=parts["w"], days=parts["d"], hours=parts["h"], minutes=parts["m"], seconds=parts["s"]
        )
    raise BadValue(
        f"bad duration {raw!r}: write a number and a unit (s, m, h, d, w) like 10m or 7d, "
        "or an ISO 8601 duration like PT10M"
    )


def format_duration(value: timedelta) -> str:
    """ISO 8601 duration with days, hours, minutes and seconds (`P1DT1H`, `PT23H`, `PT0S`)."""
    total = value.total_seconds()
    sign = "-" if total < 0 else ""
    total = abs(total)
    days, rest = divmod(total, 86400)
    hours, rest = divmod(rest, 3600)
    minutes, seconds = divmod(rest, 60)
    out = f"{sign}P"
    if days:
        out += f"{int(days)}D"
    time = ""
    if hours:
        time += f"{int(hours)}H"
    if minutes:
        time += f"{int(minutes)}M"
    if seconds:
        # fixed-point: `:g` would write 1e-06 for a microsecond, which is not ISO 8601
        time += f"{seconds:.6f}".rstrip("0").rstrip(".") + "S"
    if time:
        out += "T" + time
    if out in ("P", "-P"):
        return "PT0S"
    return out


def short_duration(value: timedelta) -> str:
    """Compact human form (`10m`, `1h30m`, `2d`) for tables and messages."""
    seconds = int(value.total_seconds())
    if seconds == 0:
        return "0s"
    parts = []
    for unit, size in (("d", 86400), ("h", 3600), ("m", 60), ("s", 1)):
        count, seconds = divmod(seconds, size)
        if count:
            parts.append(f"{count}{unit}")
    return "".join(parts)


@lru_cache(maxsize=512)
def zone(name: str) -> ZoneInfo:
    """The IANA zone `name`; raises BadValue with a close match when unknown."""
    try:
        if not name or name != name.strip() or name.startswith("/"):
            raise ZoneInfoNotFoundError(name)
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError, OSError):
        import difflib
        import zoneinfo

        close = difflib.get_close_matches(name, sorted(zoneinfo.available_timezones()), n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else " (use an IANA name like Europe/Lisbon)"
        raise BadValue(f"unknown timezone {name!r}{hint}") from None


def localize(naive: datetime, tz: tzinfo) -> datetime:
    """Attach `tz` to a naive local wall time and return the instant in UTC.

    Non-existent wall times (spring-forward gap) move forward to the first
    instant after the gap; repeated wall times (fall-back) take the first one.
    """
    first = naive.replace(tzinfo=tz, fold=0)
    utc = first.astimezone(UTC)
    if utc.astimezone(tz).replace(tzinfo=None) == naive:
        return utc
    # In a gap: fold=1 gives an instant before the transition, fold=0 one after
    # it. The transition is the first instant whose local offset is the later one.
    lo = naive.replace(tzinfo=tz, fold=1).astimezone(UTC)
    hi = utc
    if lo > hi:
        lo, hi = hi, lo
    after = hi.astimezone(tz).utcoffset()
    while hi - lo > timedelta(seconds=1):
        mid = lo + (hi - lo) / 2
        mid = mid.replace(microsecond=0)
        if mid.astimezone(tz).utcoffset() == after:
            hi = mid
        else:
            lo = mid
    return hi


_DATE_ONLY = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def parse_instant(text: str | datetime | date, tz: tzinfo) -> datetime:
    """Parse an ISO 8601 date or timestamp; no offset means local time in `tz`.

    Returns an aware datetime in UTC. Accepts `2026-03-29`, `2026-03-29T06:00`,
    `2026-03-29 06:00:00`, `2026-03-29T06:00+01:00` and `...Z`.
    """
    if isinstance(text, datetime):
        value = text
    elif isinstance(text, date):
        value = datetime(text.year, text.month, text.day)
    else:
        raw = str(text).strip()
        try:
            if _DATE_ONLY.match(raw):
                value = datetime.fromisoformat(raw)
            else:
                value = datetime.fromisoformat(raw.replace("z", "Z"))
        except ValueError:
            raise BadValue(
                f"bad timestamp {raw!r}: use ISO 8601, like 2026-03-29, 2026-03-29T06:00 "
                "or 2026-03-29T06:00+01:00"
            ) from None
    if value.tzinfo is None:
        return localize(value, tz)
    return value.astimezone(UTC)


def format_instant(instant: datetime, tz: tzinfo) -> str:
    """ISO 8601 local time with offset, minutes precision when seconds are zero."""
    local = instant.astimezone(tz)
    spec = "minutes" if local.second == 0 and local.microsecond == 0 else "seconds"
    return local.isoformat(timespec=spec)


def format_utc(instant: datetime) -> str:
    """RFC 3339 UTC form used as the ledger key: `2026-01-01T00:00:00Z`."""
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def parse_utc(text: str) -> datetime:
    """Inverse of `format_utc`."""
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=UTC)


def to_us(instant: datetime) -> int:
    """Epoch microseconds of an aware datetime (exact integer arithmetic)."""
    delta = instant - _EPOCH
    return (delta.days * 86400 + delta.seconds) * 1_000_000 + delta.microseconds


def from_us(us: int) -> datetime:
    """Aware UTC datetime of epoch microseconds."""
    return _EPOCH + timedelta(microseconds=us)


_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
