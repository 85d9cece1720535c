"""Properties of windows that must hold for every cadence, timezone and range.

hypothesis draws cadences (fixed, calendar and cron), timezones with ordinary,
half-hour and 45-minute offsets and DST rules, job starts (some inside DST
gaps or repeated hours), optional job ends and query ranges, and checks:
windows tile time without gap or overlap, each window's end is the next one's
start, counting agrees with the span, `window_at` finds the window holding an
instant, `shift` steps to neighbours, and ids round-trip.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runner.core.windows import Cadence
from runner.model.spec import WindowDecl
from runner.model.timeutil import parse_utc

ZONES = [
    "UTC",
    "Europe/Lisbon",
    "Australia/Sydney",
    "America/Santiago",
    "America/New_York",
    "Asia/Kolkata",         # +05:30, no DST
    "Australia/Lord_Howe",  # DST moves the clock by 30 minutes
    "Pacific/Chatham",      # +12:45 / +13:45
]
EVERY = ["1m", "5m", "7m", "15m", "90m", "1h", "2h", "5h", "25h", "1d", "2d", "1w", "2w", "1mo", "3mo", "1y"]
CRON = ["0 * * * *", "*/15 * * * *", "30 1 * * *", "0 2 * * *", "5 */2 * * *", "0 0 * * 1",
        "0 6 1,15 * 1", "0 0 1 * *", "45 23 * * 0", "0 9-17 * * 1-5"]
# rough window length in seconds, only to size query ranges
APPROX = {"m": 60, "h": 3600, "d": 86400, "w": 7 * 86400, "mo": 30 * 86400, "y": 365 * 86400}
CRON_APPROX = {e: 3600 if "* * * *" in e.split(" ", 1)[1] else 86400 for e in CRON}
CRON_APPROX.update({"*/15 * * * *": 900, "0 0 * * 1": 7 * 86400, "0 0 1 * *": 30 * 86400,
                    "45 23 * * 0": 7 * 86400, "0 6 1,15 * 1": 5 * 86400})

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def approx_step(every: str | None, cron: str | None) -> int:
    if cron is not None:
        return CRON_APPROX[cron]
    count = int("".join(c for c in every if c.isdigit()))
    return count * APPROX[every.lstrip("0123456789")]


@st.composite
def cadences(draw, kinds=("every", "cron")) -> tuple[Cadence, int]:
    """A cadence built through the job-file model, and its rough step in seconds."""
    kind = draw(st.sampled_from(kinds))
    every = draw(st.sampled_from(EVERY)) if kind == "every" else None
    cron = draw(st.sampled_from(CRON)) if kind == "cron" else None
    zone = draw(st.sampled_from(ZONES))
    start = draw(st.datetimes(datetime(2025, 9, 1), datetime(2026, 9, 1)))
    # whole minutes mostly; sometimes a DST-prone local hour (1-3 h) to land in gaps
    start = start.replace(second=0, microsecond=0)
    if draw(st.booleans()):
        start = start.replace(hour=draw(st.sampled_from([0, 1, 2, 3])))
    step = approx_step(every, cron)
    decl = {"every": every, "cron": cron, "timezone": zone, "start": start.isoformat(timespec="minutes"),
            "settle": draw(st.sampled_from(["0m", "10m", "2h", "P1D"]))}
    if draw(st.booleans()):
        length = draw(st.integers(1, 60)) * step + draw(st.integers(0, step))
        decl["end"] = (start + timedelta(seconds=length)).isoformat(timespec="minutes")
    decl = {k: v for k, v in decl.items() if v is not None}
    return Cadence.of(WindowDecl.model_validate(decl)), step


def instants(cad: Cadence, step: int, span_steps: int = 40):
    """Instants from a little before the job's start to span_steps windows after it (any microsecond)."""
    lo = cad.start - timedelta(seconds=2 * step)
    hi = cad.start + timedelta(seconds=span_steps * step)
    return st.integers(0, int((hi - lo).total_seconds() * 1_000_000)).map(
        lambda n: lo + timedelta(microseconds=n))


def tiles(span) -> None:
    s, e = span.starts_us.to_list(), span.ends_us.to_list()
    assert all(a < b for a, b in zip(s, e, strict=True)), "a window is empty or reversed"
    assert all(b == c for b, c in zip(e, s[1:], strict=False)), "gap or overlap between windows"


@SETTINGS
@given(data=st.data())
def test_windows_tile_time_without_gap_or_overlap_and_stay_in_range(data):
    cad, step = data.draw(cadences())
    lo = data.draw(instants(cad, step))
    hi = lo + timedelta(seconds=data.draw(st.integers(0, 30 * step)))
    span = cad.span(lo, hi)
    tiles(span)
    lo_us = (lo - datetime(1970, 1, 1, tzinfo=UTC)) // timedelta(microseconds=1)
    hi_us = (hi - datetime(1970, 1, 1, tzinfo=UTC)) // timedelta(microseconds=1)
    assert all(lo_us <= s < hi_us for s in span.starts_us.to_list())
    windows = list(span)
    assert all(w.start >= cad.start for w in windows)
    if cad.end is not None:
        assert all(w.end <= cad.end for w in windows)
    # nothing is left out at the front: the window holding lo (if any) ends where the span begins
    if windows:
        before = cad.window_at(lo)
        if before is not None and before.start < lo:
            assert before.end == windows[0].start


@SETTINGS
@given(data=st.data())
def test_spans_add_up_split_at_any_instant(data):
    cad, step = data.draw(cadences())
    a = data.draw(instants(cad, step))
    b = a + timedelta(microseconds=data.draw(st.integers(0, 15 * step * 1_000_000)))
    c = b + timedelta(microseconds=data.draw(st.integers(0, 15 * step * 1_000_000)))
    left, right, whole = cad.span(a, b), cad.span(b, c), cad.span(a, c)
    assert left.starts_us.to_list() + right.starts_us.to_list() == whole.starts_us.to_list()
    assert left.ends_us.to_list() + right.ends_us.to_list() == whole.ends_us.to_list()


@SETTINGS
@given(data=st.data())
def test_fixed_cadence_count_is_the_span_divided_by_the_step(data):
    cad, _ = data.draw(cadences(kinds=("every",)).filter(lambda c: c[0].kind == "fixed"))
    step = cad.count * {"m": 60, "h": 3600}[cad.unit]
    i = data.draw(st.integers(0, 200))
    n = data.draw(st.integers(0, 200))
    lo = cad.start + timedelta(seconds=i * step)
    hi = lo + timedelta(seconds=n * step)
    span = cad.span(lo, hi)
    if cad.end is not None:
        n = max(0, min(n, (cad.end - lo) // timedelta(seconds=step)))
    assert len(span) == n
    assert all(e - s == step * 1_000_000 for s, e in zip(span.starts_us, span.ends_us, strict=True))


@SETTINGS
@given(data=st.data())
def test_window_at_holds_the_instant_and_is_a_window_of_the_span(data):
    cad, step = data.draw(cadences())
    t = data.draw(instants(cad, step))
    w = cad.window_at(t)
    if w is None:
        # only before the first window or past the last one of a bounded job
        first = cad.first()
        if first is None or t < first.start:
            return
        assert cad.end is not None, t
        every = cad.span(None, cad.end)
        assert len(every) == 0 or t >= every[len(every) - 1].end, t
        return
    assert w.start <= t < w.end
    same = cad.span(w.start, w.end)
    assert len(same) == 1 and same[0] == w


@SETTINGS
@given(data=st.data())
def test_shift_by_one_is_the_neighbouring_window(data):
    cad, step = data.draw(cadences())
    w = cad.window_at(data.draw(instants(cad, step)))
    if w is None:
        return
    before = cad.shift(w, 1)
    after = cad.shift(w, -1)
    if before is None:
        assert cad.window_at(w.start - timedelta(microseconds=1)) is None
    else:
        assert before.end == w.start
        assert cad.shift(before, -1) == w
    if after is None:
        assert cad.window_at(w.end) is None
    else:
        assert after.start == w.end
        assert cad.shift(after, 1) == w
    two = cad.shift(w, 2)
    assert two == (cad.shift(before, 1) if before is not None else None)


@SETTINGS
@given(data=st.data())
def test_window_ids_and_keys_round_trip(data):
    cad, step = data.draw(cadences())
    lo = data.draw(instants(cad, step))
    span = cad.span(lo, lo + timedelta(seconds=10 * step))
    ids, keys = span.ids().to_list(), span.keys().to_list()
    for w, wid, key in zip(span, ids, keys, strict=True):
        assert wid == w.id  # vectorized ids agree with one-by-one ids
        assert cad.window(wid) == w  # the id names its window, across DST
        assert key == w.key and parse_utc(key) == w.start
        # the id is valid ISO 8601 with offset (datetime.fromisoformat reads it)
        assert datetime.fromisoformat(wid) == w.start


@SETTINGS
@given(data=st.data())
def test_due_windows_are_exactly_those_ended_a_settle_time_before_now(data):
    cad, step = data.draw(cadences())
    now = data.draw(instants(cad, step, span_steps=20))
    due = list(cad.due(now))
    assert all(w.end + cad.settle <= now for w in due)
    # the window after the last due one (or the first window) is not due yet
    nxt = cad.shift(due[-1], -1) if due else cad.first()
    if nxt is not None:
        assert nxt.end + cad.settle > now
    if due:
        assert due[0] == cad.first()
    tiles(cad.due(now))


@SETTINGS
@given(data=st.data())
def test_overlapping_returns_exactly_the_windows_meeting_a_range(data):
    cad, step = data.draw(cadences())
    lo = data.draw(instants(cad, step, span_steps=20))
    hi = lo + timedelta(seconds=data.draw(st.integers(1, 5 * step)))
    found = list(cad.overlapping(lo, hi))
    assert all(w.start < hi and w.end > lo for w in found)
    if found:
        before, after = cad.shift(found[0], 1), cad.shift(found[-1], -1)
        assert before is None or before.end <= lo
        assert after is None or after.start >= hi
