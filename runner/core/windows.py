"""Cadences and windows, DST-correct. Pure functions of (window spec, instants).

A window is a half-open interval `[start, end)` of absolute time. How a job's
time is cut into windows depends on its cadence:

* `every: N m|h` steps in absolute time from the job's start, so an hourly job
  has 23 windows on a spring-forward day and 25 on a fall-back day.
* `every: N d|w|mo|y` steps on the local calendar of the job's timezone, so a
  local day lasts 23, 24 or 25 hours and a month its own length. Month steps
  count from the start (a job starting on the 31st uses the last day of
  shorter months). A local start time that does not exist moves forward to the
  end of the gap; one that exists twice means the first.
* `cron: "..."` windows run from one fire time to the next (croniter), in the
  job's timezone; the first window starts at the first fire at or after the
  job's start.

Windows lie inside `[start, end)` of the job: none begins before `start`, none
ends after `end`. Window ids are ISO 8601 local starts with offset
(`2026-03-29T02:00+01:00`); the ledger keys them by their UTC start.

Enumerating `every:` cadences never calls croniter; sub-day cadences are
computed as integer arithmetic over whole ranges at once.
"""

from __future__ import annotations

import calendar
import re
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any
from zoneinfo import ZoneInfo

from runner.model.timeutil import (
    format_instant,
    format_utc,
    from_us,
    localize,
    parse_instant,
    short_duration,
    to_us,
    zone,
)

if TYPE_CHECKING:
    import polars as pl

    from runner.model.spec import WindowDecl

_US = 1_000_000
_FIXED_UNITS = {"m": 60 * _US, "h": 3600 * _US}
_EVERY = re.compile(r"^(\d+)(m|h|d|w|mo|y)$")


@dataclass(frozen=True, order=True)
class Window:
    """One window `[start, end)`; `start` and `end` are aware UTC datetimes."""

    start: datetime
    end: datetime
    tz: ZoneInfo

    @property
    def id(self) -> str:
        """ISO 8601 local start with offset, e.g. `2026-03-29T02:00+01:00`."""
        return format_instant(self.start, self.tz)

    @property
    def key(self) -> str:
        """The ledger key: the UTC start, `2026-03-29T01:00:00Z`."""
        return format_utc(self.start)

    @property
    def length(self) -> timedelta:
        return self.end - self.start

    @property
    def local_start(self) -> datetime:
        return self.start.astimezone(self.tz)

    @property
    def local_end(self) -> datetime:
        return self.end.astimezone(self.tz)

    def __str__(self) -> str:
        return self.id


class WindowSpan:
    """An ordered run of consecutive windows of one cadence, stored as arrays.

    `starts_us`/`ends_us` are epoch microseconds (UTC). Iterating yields
    `Window` objects; `ids()`, `keys()` and `frame()` stay vectorized.
    """

    __slots__ = ("starts_us", "ends_us", "tz")

    def __init__(self, starts_us: pl.Series, ends_us: pl.Series, tz: ZoneInfo):
        self.starts_us = starts_us
        self.ends_us = ends_us
        self.tz = tz

    @classmethod
    def from_lists(cls, starts: list[int], ends: list[int], tz: ZoneInfo) -> WindowSpan:
        import polars as pl

        return cls(pl.Series("start_us", starts, dtype=pl.Int64), pl.Series("end_us", ends, dtype=pl.Int64), tz)

    def __len__(self) -> int:
        return self.starts_us.len()

    def __iter__(self) -> Iterator[Window]:
        for s, e in zip(self.starts_us.to_list(), self.ends_us.to_list(), strict=True):
            yield Window(from_us(s), from_us(e), self.tz)

    def __getitem__(self, i: int) -> Window:
        return Window(from_us(self.starts_us[i]), from_us(self.ends_us[i]), self.tz)

    def ids(self) -> pl.Series:
        """Window ids (local ISO 8601 starts with offset), vectorized."""
        import polars as pl

        local = pl.from_epoch(self.starts_us, time_unit="us").dt.replace_time_zone("UTC").dt.convert_time_zone(
            self.tz.key
        )
        frame = pl.DataFrame({"t": local})
        whole = (self.starts_us % 60_000_000) == 0
        if bool(whole.all()):
            out = frame.select(pl.col("t").dt.strftime("%Y-%m-%dT%H:%M%:z")).to_series()
        else:
            out = frame.select(
                pl.when(pl.Series(whole))
                .then(pl.col("t").dt.strftime("%Y-%m-%dT%H:%M%:z"))
                .otherwise(pl.col("t").dt.strftime("%Y-%m-%dT%H:%M:%S%:z"))
            ).to_series()
        return out.alias("window")

    def keys(self) -> pl.Series:
        """Ledger keys (RFC 3339 UTC starts), vectorized."""
        import polars as pl

        return (
            pl.from_epoch(self.starts_us, time_unit="us")
            .dt.strftime("%Y-%m-%dT%H:%M:%SZ")
            .alias("window_key")
        )

    def frame(self) -> pl.DataFrame:
        """A frame with window, window_key, start_us, end_us."""
        import polars as pl

        return pl.DataFrame([self.ids(), self.keys(), self.starts_us.alias("start_us"), self.ends_us.alias("end_us")])


class Cadence:
    """How one job's time is cut into windows. Build with `Cadence.of(decl)`."""

    def __init__(self, every: str | None, cron: str | None, tz: ZoneInfo, start: datetime,
                 end: datetime | None, settle: timedelta = timedelta(0)):
        self.every = every
        self.cron = cron
        self.tz = tz
        self.start = start.astimezone(UTC)
        self.end = end.astimezone(UTC) if end is not None else None
        self.settle = settle
        self.count = 0
        self.unit = ""
        if every is not None:
            m = _EVERY.match(every)
            if not m:
                raise ValueError(f"bad cadence {every!r}")
            self.count, self.unit = int(m.group(1)), m.group(2)
        elif cron is None:
            raise ValueError("a cadence needs every or cron")
        self._local_anchor = self.start.astimezone(tz).replace(tzinfo=None)

    @classmethod
    def of(cls, decl: WindowDecl) -> Cadence:
        tz = zone(decl.timezone)
        start = parse_instant(decl.start, tz)
        end = parse_instant(decl.end, tz) if decl.end else None
        return cls(decl.every, decl.cron, tz, start, end, decl.settle)

    # ------------------------------------------------------------ describing

    def describe(self) -> str:
        what = f"every {self.every}" if self.every else f"cron '{self.cron}'"
        extra = f", settle {short_duration(self.settle)}" if self.settle else ""
        return f"{what} ({self.tz.key}{extra})"

    @property
    def kind(self) -> str:
        if self.cron is not None:
            return "cron"
        return "fixed" if self.unit in _FIXED_UNITS else "calendar"

    def parse(self, text: str | datetime) -> datetime:
        """An instant from user text; no offset means local time in this timezone."""
        return parse_instant(text, self.tz)

    # ------------------------------------------------------------ core queries

    def span(self, lo: datetime | None = None, hi: datetime | None = None) -> WindowSpan:
        """Windows whose start lies in `[lo, hi)` (defaults: the job's start, its end).

        With neither `hi` nor a job end the range is unbounded; pass `hi`.
        """
        lo_us = to_us(lo) if lo is not None else None
        hi_us = to_us(hi) if hi is not None else None
        if hi_us is None and self.end is None:
            raise ValueError("an open-ended cadence needs an upper bound")
        kind = self.kind
        if kind == "fixed":
            return self._fixed_span(lo_us, hi_us)
        if kind == "calendar":
            return self._calendar_span(lo_us, hi_us)
        return self._cron_span(lo_us, hi_us)

    def ending_by(self, instant: datetime, lo: datetime | None = None) -> WindowSpan:
        """Windows (from `lo`, default the first) whose end is at or before `instant`."""
        last = self.window_at(instant - timedelta(microseconds=1))
        if last is None:
            if self.end is not None and instant > self.start:
                # past the last window that fits before the job's end (or past the end itself):
                # every window of the range that has ended by now
                every = self.span(lo, self.end)
                ended = every.ends_us <= to_us(instant)
                return WindowSpan(every.starts_us.filter(ended), every.ends_us.filter(ended), self.tz)
            return self.span(self.start, self.start)  # before the first window ends
        hi = last.start if last.end > instant else last.end
        if lo is not None and hi < lo:
            hi = lo
        return self.span(lo, hi)

    def due(self, now: datetime, lo: datetime | None = None) -> WindowSpan:
        """Windows due at `now`: `end + settle <= now`."""
        return self.ending_by(now - self.settle, lo)

    def overlapping(self, lo: datetime, hi: datetime) -> WindowSpan:
        """Windows that overlap `[lo, hi)` (a window ending exactly at `lo` does not)."""
        first = self.window_at(lo)
        start = first.start if first is not None else lo
        return self.span(start, hi)

    def window_at(self, instant: datetime) -> Window | None:
        """The window containing `instant`, or None outside the job's range."""
        t = to_us(instant)
        if t < to_us(self.start) or (self.end is not None and t >= to_us(self.end)):
            return None
        kind = self.kind
        if kind == "fixed":
            step = self.count * _FIXED_UNITS[self.unit]
            k = (t - to_us(self.start)) // step
            window: Window | None = self._fixed_window(k)
        elif kind == "calendar":
            k = self._calendar_index(instant)
            if k < 0:
                return None
            window = Window(self._calendar_start(k), self._calendar_start(k + 1), self.tz)
        else:
            window = self._cron_window_at(instant)
        if window is None or (self.end is not None and window.end > self.end):
            return None
        return window

    def window(self, window_id: str) -> Window:
        """The window whose id (or start, in any ISO 8601 form) is `window_id`.

        Raises ValueError naming the nearest windows when it is not a window start.
        """
        instant = self.parse(window_id)
        found = self.window_at(instant)
        if found is not None and found.start == instant:
            return found
        if found is not None:
            nxt = self.window_at(found.end)
            near = found.id + (f" or {nxt.id}" if nxt is not None else "")
            raise ValueError(f"{window_id!r} is not a window start; the nearest windows start at {near}")
        first = self.first()
        hint = f"the first window starts at {first.id}" if first else "the job has no windows"
        if self.end is not None and instant >= self.end:
            hint = f"the job ends at {format_instant(self.end, self.tz)}"
        raise ValueError(f"{window_id!r} is outside the job's windows; {hint}")

    def first(self) -> Window | None:
        """The job's first window."""
        if self.kind == "cron":
            first_fire = self._cron_next(self.start, inclusive=True)
            return self.window_at(first_fire) if first_fire is not None else None
        return self.window_at(self.start)

    def shift(self, window: Window, n: int) -> Window | None:
        """The window `n` places earlier (n > 0) or later (n < 0); None outside the range."""
        kind = self.kind
        if kind == "fixed":
            step = self.count * _FIXED_UNITS[self.unit]
            k = (to_us(window.start) - to_us(self.start)) // step - n
            if k < 0:
                return None
            w = self._fixed_window(k)
            return None if self.end is not None and w.end > self.end else w
        if kind == "calendar":
            k = self._calendar_index(window.start) - n
            if k < 0:
                return None
            w = Window(self._calendar_start(k), self._calendar_start(k + 1), self.tz)
            return None if self.end is not None and w.end > self.end else w
        current: Window | None = window
        for _ in range(abs(n)):
            if current is None:
                return None
            if n > 0:
                current = self.window_at(current.start - timedelta(microseconds=1))
            else:
                current = self.window_at(current.end)
        return current

    # ------------------------------------------------------------ fixed cadences

    def _fixed_window(self, k: int) -> Window:
        step = self.count * _FIXED_UNITS[self.unit]
        s = to_us(self.start) + k * step
        return Window(from_us(s), from_us(s + step), self.tz)

    def _fixed_span(self, lo_us: int | None, hi_us: int | None) -> WindowSpan:
        import polars as pl

        a = to_us(self.start)
        step = self.count * _FIXED_UNITS[self.unit]
        k0 = 0 if lo_us is None else max(0, -((a - lo_us) // step))  # ceil((lo-a)/step)
        limits = []
        if hi_us is not None:
            limits.append(-((a - hi_us) // step))
        if self.end is not None:
            limits.append((to_us(self.end) - a) // step)
        k1 = max(k0, min(limits))
        starts = pl.int_range(k0, k1, eager=True, dtype=pl.Int64) * step + a
        return WindowSpan(starts.alias("start_us"), (starts + step).alias("end_us"), self.tz)

    # ------------------------------------------------------------ calendar cadences

    def _calendar_local(self, k: int) -> datetime:
        base = self._local_anchor
        if self.unit in ("d", "w"):
            days = k * self.count * (7 if self.unit == "w" else 1)
            return base + timedelta(days=days)
        months = k * self.count * (12 if self.unit == "y" else 1)
        index = base.year * 12 + (base.month - 1) + months
        year, month = divmod(index, 12)
        day = min(base.day, calendar.monthrange(year, month + 1)[1])
        return base.replace(year=year, month=month + 1, day=day)

    def _calendar_start(self, k: int) -> datetime:
        if k == 0:
            return self.start
        return localize(self._calendar_local(k), self.tz)

    def _calendar_index(self, instant: datetime) -> int:
        """Index k of the calendar window containing `instant` (may be negative)."""
        local = instant.astimezone(self.tz).replace(tzinfo=None)
        base = self._local_anchor
        if self.unit in ("d", "w"):
            size = self.count * (7 if self.unit == "w" else 1)
            k = (local - base).days // size
        else:
            size = self.count * (12 if self.unit == "y" else 1)
            k = ((local.year - base.year) * 12 + local.month - base.month) // size
        while k > 0 and self._calendar_start(k) > instant:
            k -= 1
        while self._calendar_start(k + 1) <= instant:
            k += 1
        if k == 0 and instant < self.start:
            return -1
        return k

    def _calendar_span(self, lo_us: int | None, hi_us: int | None) -> WindowSpan:
        k = 0
        if lo_us is not None and lo_us > to_us(self.start):
            lo = from_us(lo_us)
            k = self._calendar_index(lo)
            if to_us(self._calendar_start(k)) < lo_us:
                k += 1
        starts: list[int] = []
        ends: list[int] = []
        end_us = to_us(self.end) if self.end is not None else None
        s = to_us(self._calendar_start(k))
        while hi_us is None or s < hi_us:
            e = to_us(self._calendar_start(k + 1))
            if end_us is not None and e > end_us:
                break
            starts.append(s)
            ends.append(e)
            k += 1
            s = e
        return WindowSpan.from_lists(starts, ends, self.tz)

    # ------------------------------------------------------------ cron cadences

    def _cron_iter(self, after: datetime) -> Any:
        from croniter import croniter

        assert self.cron is not None  # only cron cadences get here
        return _CronFires(croniter(self.cron, after.astimezone(self.tz)), self.cron, self.tz)

    def _cron_next(self, instant: datetime, inclusive: bool) -> datetime:
        probe = instant - timedelta(seconds=1) if inclusive else instant
        fire = self._cron_iter(probe).get_next(datetime)
        return fire.astimezone(UTC)

    def _cron_window_at(self, instant: datetime) -> Window | None:
        probe = instant.replace(microsecond=0) + timedelta(seconds=1)
        it = self._cron_iter(probe)
        start = it.get_prev(datetime).astimezone(UTC)
        if start < self.start:
            return None
        end = self._cron_next(start, inclusive=False)
        return Window(start, end, self.tz)

    def _cron_span(self, lo_us: int | None, hi_us: int | None) -> WindowSpan:
        lo = self.start if lo_us is None else max(self.start, from_us(lo_us))
        it = self._cron_iter(lo - timedelta(seconds=1))
        end_us = to_us(self.end) if self.end is not None else None
        starts: list[int] = []
        ends: list[int] = []
        s = to_us(it.get_next(datetime).astimezone(UTC))
        while s < to_us(lo):  # croniter works in whole seconds; lo may not be one
            s = to_us(it.get_next(datetime).astimezone(UTC))
        while hi_us is None or s < hi_us:
            e = to_us(it.get_next(datetime).astimezone(UTC))
            if end_us is not None and e > end_us:
                break
            starts.append(s)
            ends.append(e)
            s = e
        return WindowSpan.from_lists(starts, ends, self.tz)


class _CronFires:
    """croniter's fire times, held to cron's own rule at DST changes.

    An expression with a fixed minute and hour (`30 1 * * *`) fires once when
    a wall time repeats (croniter fires at both, which would cut a one-hour
    window out of a daily job) and moves forward out of a spring-forward gap.
    Any other expression (`*/15 * * * *`, `5 */2 * * *`) runs in absolute time:
    it fires at both repeated wall times and never at a wall time that croniter
    made up at the end of a gap. This is the rule of Debian's cron, which the
    independent cronsim library also follows.
    """

    def __init__(self, it: Any, expr: str, tz: ZoneInfo):
        fields = expr.split()
        self._it = it
        self._expr = expr
        self._tz = tz
        self._fixed = not fields[0].startswith("*") and not fields[1].startswith("*")

    def _keep(self, fire: datetime) -> bool:
        wall = fire.replace(tzinfo=None)
        utc = fire.astimezone(UTC)
        if self._fixed:
            return wall.replace(tzinfo=self._tz, fold=0).astimezone(UTC) == utc
        if (utc - timedelta(microseconds=1)).astimezone(self._tz).utcoffset() == fire.utcoffset():
            return True  # not at a clock change
        from croniter import croniter

        return bool(croniter.match(self._expr, wall))

    def get_next(self, kind: Any = datetime) -> datetime:
        while True:
            fire = self._it.get_next(kind)
            if self._keep(fire):
                return fire

    def get_prev(self, kind: Any = datetime) -> datetime:
        while True:
            fire = self._it.get_prev(kind)
            if self._keep(fire):
                return fire
