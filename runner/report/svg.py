"""The page's drawings, as SVG text: state patterns, reach bars, a job's timeline with its run
charts, the time axis, and the dependency arcs.

Every state is drawn with a texture of its own (solid, stripes, cross-hatch,
dashes, dots, bars) as well as a colour, so the drawings read in greyscale;
the page also says each state in words. Text is placed so that it stays
inside its drawing: labels near an edge are anchored to that edge, and a
label that would run into its neighbour is left out.
"""

from __future__ import annotations

import html
import math
from datetime import UTC, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from runner.model.timeutil import from_us
from runner.report.data import GLYPH, ORDER, STRIP_BUCKETS, JobView

PLOT_W = 1200          # user units of the time axis in every drawing
GUTTER = 78            # left margin of a job's timeline, for the y-axis labels
CHAR_W = 0.62          # average glyph width of the page's sans-serif font, in ems (DejaVu Sans, measured)


def esc(value: Any) -> str:
    """Text or attribute value, escaped for HTML and SVG."""
    return html.escape(str(value), quote=True)


def num(v: float) -> str:
    """A coordinate with at most one decimal and no trailing zero."""
    text = f"{v:.1f}"
    return text[:-2] if text.endswith(".0") else text


def text_width(text: str, size: float) -> float:
    return len(text) * size * CHAR_W


PATTERNS = {
    "done": '<rect width="6" height="6" fill="var(--done)"/>',
    "stale": ('<rect width="6" height="6" fill="var(--stale)"/>'
              '<path d="M-1 1L1 -1M0 6L6 0M5 7L7 5" stroke="var(--stale-ink)" stroke-width="1.6"/>'),
    "failed": ('<rect width="6" height="6" fill="var(--failed)"/>'
               '<path d="M0 0L6 6M6 0L0 6" stroke="var(--failed-ink)" stroke-width="1.2"/>'),
    "waiting": ('<rect width="6" height="6" fill="var(--waiting)"/>'
                '<path d="M0 4.5H4" stroke="var(--waiting-ink)" stroke-width="1.2"/>'),
    "ready": ('<rect width="6" height="6" fill="var(--ready)"/>'
              '<circle cx="3" cy="3" r="1.1" fill="var(--ready-ink)"/>'),
    "running": ('<rect width="6" height="6" fill="var(--running)"/>'
                '<path d="M1.5 0V6" stroke="var(--running-ink)" stroke-width="1.4"/>'),
}


def pattern_defs() -> str:
    """One hidden SVG holding a fill pattern per state, referenced as url(#p-STATE)."""
    body = "".join(f'<pattern id="p-{s}" width="6" height="6" patternUnits="userSpaceOnUse">{PATTERNS[s]}</pattern>'
                   for s in ORDER)
    return f'<svg class="defs" width="0" height="0" aria-hidden="true"><defs>{body}</defs></svg>'


def swatch(state: str) -> str:
    return (f'<svg class="swatch" width="26" height="14" aria-hidden="true"><rect x="0.5" y="0.5" width="25" '
            f'height="13" fill="url(#p-{state})" stroke="var(--rule)"/></svg>')


# ---------------------------------------------------------------- the time axis


def ticks(axis: tuple[int, int], zone: ZoneInfo, width: float = PLOT_W,
          room: float | None = None) -> list[tuple[float, str]]:
    """Calendar ticks in `zone` over the axis, as (x in [0, width], label), at a step that leaves about
    90 px a label when the axis is drawn `room` px wide (default: `width`)."""
    a0, a1 = axis
    start, end = from_us(a0), from_us(a1)
    span = (end - start).total_seconds()
    steps: list[tuple[str, float]] = [("hour", 1), ("hour", 3), ("hour", 6), ("hour", 12), ("day", 1), ("day", 2),
                                      ("week", 1), ("week", 2), ("month", 1), ("month", 3), ("year", 1)]
    for unit, n in steps:
        approx = {"hour": 3600, "day": 86400, "week": 7 * 86400, "month": 30.4 * 86400, "year": 365 * 86400}[unit]
        if span / (approx * n) <= (room or width) / 90:
            break
    out: list[tuple[float, str]] = []
    local = start.astimezone(zone)
    t = _floor(local, unit, int(n))
    while t < end.astimezone(zone):
        if t >= local:
            x = (t.astimezone(UTC) - start).total_seconds() / span * width
            out.append((x, _label(t, unit, out == [])))
        t = _next(t, unit, int(n), zone)
    return out


def _floor(t: datetime, unit: str, n: int) -> datetime:
    if unit == "hour":
        return t.replace(minute=0, second=0, microsecond=0, hour=t.hour - t.hour % n)
    day = t.replace(hour=0, minute=0, second=0, microsecond=0)
    if unit == "day":
        return day
    if unit == "week":
        return day - timedelta(days=day.weekday())
    if unit == "month":
        return day.replace(day=1, month=1 + (day.month - 1) // n * n)
    return day.replace(day=1, month=1)


def _next(t: datetime, unit: str, n: int, zone: ZoneInfo) -> datetime:
    naive = t.replace(tzinfo=None)
    if unit == "hour":
        return (t.astimezone(UTC) + timedelta(hours=n)).astimezone(zone)
    if unit in ("day", "week"):
        naive += timedelta(days=n if unit == "day" else 7 * n)
    elif unit == "month":
        m = naive.month - 1 + n
        naive = naive.replace(year=naive.year + m // 12, month=m % 12 + 1)
    else:
        naive = naive.replace(year=naive.year + n)
    return naive.replace(tzinfo=zone)


def _label(t: datetime, unit: str, first: bool) -> str:
    if unit == "hour":
        return t.strftime("%d %b %H:%M") if first or t.hour == 0 else t.strftime("%H:%M")
    if unit in ("day", "week"):
        return t.strftime("%d %b %Y") if first or (t.month == 1 and t.day <= 7) else t.strftime("%d %b")
    if unit == "month":
        return t.strftime("%b %Y") if first or t.month == 1 else t.strftime("%b")
    return t.strftime("%Y")


def axis_labels(marks: list[tuple[float, str]], x0: float, width: float, y: float, size: float = 11) -> str:
    """Tick labels at y: each starts at its tick, the last one that would pass the right edge ends
    there instead, and one that would run into the label before it is left out (its tick stays)."""
    out = []
    right_of_last = -1e9
    for x, label in marks:
        w = text_width(label, size)
        left = x
        anchor = "start"
        if left + w > width:
            left, anchor = width - w, "end"
        if left < right_of_last + 8:
            continue
        right_of_last = left + w
        tx = x0 + (width if anchor == "end" else x + 2)
        out.append(f'<text class="tick" x="{num(tx)}" y="{num(y)}" text-anchor="{anchor}">{esc(label)}</text>')
    return "".join(out)


# ---------------------------------------------------------------- a job's windows along the axis


def _segments(view: JobView, x0: float, y: float, h: float, width: float) -> str:
    """The job's strip: one path per state, each slice run a rectangle (not-done runs at least 2 units wide)."""
    unit = width / STRIP_BUCKETS
    paths: dict[str, list[str]] = {s: [] for s in ORDER}
    for b0, b1, state in view.strip.get("segs", []):
        x = x0 + b0 * unit
        w = (b1 - b0 + 1) * unit
        if state != "done" and w < 2:
            w = 2
        paths[state].append(f"M{num(x)} {num(y)}h{num(w)}v{num(h)}h{num(-w)}z")
    out = []
    for state in reversed(ORDER):  # problems drawn last, on top
        if paths[state]:
            out.append(f'<path class="s-{state}" fill="url(#p-{state})" d="{"".join(paths[state])}">'
                       f'<title>{GLYPH[state]} {state}</title></path>')
    return "".join(out)


def _marks(buckets: list[int], x0: float, y: float, h: float, width: float, cls: str, title: str) -> str:
    if not buckets:
        return ""
    unit = width / STRIP_BUCKETS
    d = "".join(f"M{num(x0 + (b + 0.5) * unit)} {num(y)}v{num(h)}" for b in buckets)
    return f'<path class="{cls}" d="{d}" vector-effect="non-scaling-stroke"><title>{esc(title)}</title></path>'


def _x(us: int | None, axis: tuple[int, int], width: float) -> float | None:
    if us is None:
        return None
    a0, a1 = axis
    return (us - a0) / max(a1 - a0, 1) * width


def reach_bar(view: JobView, axis: tuple[int, int], now_us: int) -> str:
    """The overview's bar for one job: its windows along the shared axis, the watermark, late and
    overdue marks, and the clock. Drawn without text, so it may stretch to the column's width."""
    w, h = PLOT_W, 30
    parts = [_segments(view, 0, 8, 14, w)]
    parts.append(_marks(view.strip.get("late", []), 0, 2, 5, w, "m-late", f"{GLYPH['late']} late input"))
    parts.append(_marks(view.strip.get("overdue", []), 0, 23, 6, w, "m-overdue", f"{GLYPH['overdue']} overdue"))
    wm = _x(view.watermark_us, axis, w)
    if wm is not None:
        parts.append(f'<path class="watermark" d="M{num(wm)} 0V{h}" vector-effect="non-scaling-stroke">'
                     '<title>watermark: complete up to here</title></path>')
    now = _x(now_us, axis, w)
    if now is not None and 0 <= now <= w:
        parts.append(f'<path class="now" d="M{num(now)} 0V{h}" vector-effect="non-scaling-stroke"/>')
    label = f"{view.name}: windows along the time axis"
    return (f'<svg class="bar" viewBox="0 0 {w} {h}" preserveAspectRatio="none" role="img" '
            f'aria-label="{esc(label)}">{"".join(parts)}</svg>')


def _log_ticks(lo: float, hi: float, unit: str) -> list[tuple[float, str]]:
    """Decades between lo and hi (both > 0) with their labels."""
    out = []
    for e in range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1):
        v = 10.0 ** e
        out.append((v, _fmt(v, unit)))
    return out


def _fmt(v: float, unit: str) -> str:
    if unit == "s":
        if v < 1:
            return f"{v * 1000:.3g} ms"
        if v < 60:
            return f"{v:.3g} s"
        if v < 3600:
            return f"{v / 60:.3g} min"
        return f"{v / 3600:.3g} h"
    for scale, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if v >= scale:
            return f"{v / scale:.3g}{suffix}"
    return f"{v:.3g}"


def _chart(chart: dict[str, Any], y0: float, h: float, unit: str, title: str) -> str:
    """A run figure on a log scale: per slice of the axis a bar from the 10th to the 90th percentile,
    a stroke at the highest value, the median as a line (with dots when the slices are few);
    decades as grid lines."""
    x0 = GUTTER
    out = [f'<text class="ctitle" x="{x0 + 4}" y="{num(y0 + 11)}">{esc(title)}</text>']
    if not chart.get("n"):
        out.append(f'<text class="muted" x="{x0 + 4}" y="{num(y0 + h / 2)}">no finished runs</text>')
        return "".join(out)
    pts = chart["points"]
    positive = [v for p in pts for v in p[1:5] if v > 0]
    lo = min(positive) if positive else 1.0
    hi = max(positive) if positive else 1.0
    lo_e, hi_e = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    if hi_e == lo_e:
        hi_e += 1
    top, base = y0 + 18, y0 + h

    def y(v: float) -> float:
        if v <= 0:
            return base
        return base - (math.log10(v) - lo_e) / (hi_e - lo_e) * (base - top)

    for v, label in _log_ticks(10.0 ** lo_e, 10.0 ** hi_e, unit):
        yy = y(v)
        out.append(f'<path class="grid" d="M{x0} {num(yy)}h{PLOT_W}"/>'
                   f'<text class="tick" x="{x0 - 4}" y="{num(yy + 3.5)}" text-anchor="end">{esc(label)}</text>')
    step = PLOT_W / chart["buckets"]
    gaps = sorted(b - a for (a, *_), (b, *_) in zip(pts, pts[1:], strict=False))
    spacing = gaps[len(gaps) // 2] if gaps else 1
    bw = min(max(spacing * step * 0.7, 1.5), 10.0)
    band, line, tops, dots = [], [], [], []
    prev = None
    for b, p10, p50, p90, mx, _n in pts:
        x = x0 + (b + 0.5) * step
        joined = prev is not None and b - prev <= 3 * spacing
        line.append(f"{'L' if joined else 'M'}{num(x)} {num(y(p50))}")
        y90, y10 = y(p90), y(p10)
        if y10 - y90 < 1.5:
            y90, y10 = (y90 + y10) / 2 - 0.75, (y90 + y10) / 2 + 0.75
        band.append(f"M{num(x - bw / 2)} {num(y90)}h{num(bw)}V{num(y10)}h{num(-bw)}z")
        tops.append(f"M{num(x - bw / 2)} {num(y(mx))}h{num(bw)}")
        dots.append(f'<circle cx="{num(x)}" cy="{num(y(p50))}" r="2"/>')
        prev = b
    out.append(f'<path class="band" d="{"".join(band)}"><title>10th to 90th percentile</title></path>')
    out.append(f'<path class="top" d="{"".join(tops)}"><title>highest</title></path>')
    out.append(f'<path class="median" d="{"".join(line)}"><title>median</title></path>')
    if len(pts) <= 120:
        out.append(f'<g class="dots">{"".join(dots)}</g>')
    return "".join(out)


def timeline(view: JobView, axis: tuple[int, int], zone: ZoneInfo, now_us: int) -> str:
    """A job's history along the shared axis: its windows (states, late and overdue marks, watermark),
    then the duration and rows written of each window's last run on log scales, then the time axis."""
    w = GUTTER + PLOT_W + 6
    strip_y, strip_h = 20, 26
    c1 = strip_y + strip_h + 12
    ch = 104
    c2 = c1 + ch + 10
    axis_y = c2 + ch + 4
    h = axis_y + 18
    parts = [f'<text class="ctitle" x="{GUTTER - 6}" y="{strip_y + 17}" text-anchor="end">windows</text>',
             f'<rect class="track" x="{GUTTER}" y="{strip_y}" width="{PLOT_W}" height="{strip_h}"/>',
             _segments(view, GUTTER, strip_y, strip_h, PLOT_W),
             _marks(view.strip.get("late", []), GUTTER, strip_y - 8, 6, PLOT_W, "m-late",
                    f"{GLYPH['late']} late input"),
             _marks(view.strip.get("overdue", []), GUTTER, strip_y + strip_h + 1, 6, PLOT_W, "m-overdue",
                    f"{GLYPH['overdue']} overdue")]
    wm = _x(view.watermark_us, axis, PLOT_W)
    if wm is not None:
        parts.append(f'<path class="watermark" d="M{num(GUTTER + wm)} {strip_y - 10}V{strip_y + strip_h + 8}">'
                     '<title>watermark: complete up to here</title></path>')
    parts.append(_chart(view.chart.get("seconds", {}), c1, ch, "s", "duration"))
    parts.append(_chart(view.chart.get("rows", {}), c2, ch, "rows", "rows written"))
    marks = ticks(axis, zone)
    parts.append("".join(f'<path class="grid v" d="M{num(GUTTER + x)} {strip_y + strip_h}V{axis_y}"/>'
                         for x, _ in marks))
    parts.append(axis_labels(marks, GUTTER, PLOT_W, axis_y + 13))
    now = _x(now_us, axis, PLOT_W)
    if now is not None and 0 <= now <= PLOT_W:
        parts.append(f'<path class="now" d="M{num(GUTTER + now)} {strip_y - 10}V{axis_y}"><title>the report\'s '
                     'clock</title></path>')
    parts.append(f'<rect class="hit" x="{GUTTER}" y="0" width="{PLOT_W}" height="{axis_y}"/>')
    label = f"{view.name}: windows, run durations and rows written over time"
    return (f'<svg class="timeline" data-job="{view.index}" viewBox="0 0 {w} {h}" role="img" '
            f'aria-label="{esc(label)}" data-gutter="{GUTTER}" data-plot="{PLOT_W}">{"".join(parts)}</svg>')


# ---------------------------------------------------------------- what depends on what


ROW_H = 26


def arcs(views: list[JobView]) -> tuple[str, int]:
    """The dependency arcs of the jobs listed in dependency order, one row each: for each producer
    and reader an arc on the left from the producer's row to the reader's, nested by how many rows
    it spans, with an arrowhead at the reader. Returns the SVG and its width."""
    row = {v.name: i for i, v in enumerate(views)}
    edges = sorted({(row[p], row[v.name]) for v in views for _, p, _ in v.reads if p in row and p != v.name},
                   key=lambda e: (e[1] - e[0], e[0]))
    reach = max((b - a for a, b in edges), default=0)
    width = int(24 + min(reach, 30) * 14) if edges else 24
    right = width - 4
    out = []
    for a, b in edges:
        ya, yb = a * ROW_H + ROW_H / 2, b * ROW_H + ROW_H / 2
        bulge = 10 + min(b - a, 30) * 14
        x = right - bulge
        out.append(f'<path class="arc" data-from="{a}" data-to="{b}" d="M{right} {num(ya)}C{num(x)} {num(ya)} '
                   f'{num(x)} {num(yb)} {right - 4} {num(yb)}" marker-end="url(#arrowhead)">'
                   f'<title>{esc(views[b].name)} reads {esc(views[a].name)}</title></path>')
    height = max(len(views), 1) * ROW_H
    return (f'<svg class="arcs" width="{width}" height="{height}" viewBox="0 0 {width} {height}" aria-hidden="true">'
            '<defs><marker id="arrowhead" viewBox="0 0 8 8" refX="6" refY="4" markerWidth="6" markerHeight="6" '
            'orient="auto"><path d="M0 0L8 4L0 8z" class="head"/></marker></defs>'
            f'{"".join(out)}</svg>', width)


def fmt_seconds(v: float) -> str:
    return _fmt(v, "s")


def fmt_rows(v: float) -> str:
    return _fmt(v, "rows")
