"""The static HTML report: one self-contained file for the operator's morning.

It answers, top to bottom: which jobs have windows that are not done (the
counts), where in time (a jobs x calendar days matrix), what runs next (the
plan for now), why (each job's state ranges with their reasons, and its run
durations and rows), and how the jobs hang together (the graph). Every
window's last run is one click away in the matrix.

The page has no external assets: CSS, script and SVG are inline, and nothing
is fetched. It is built from one survey of the ledger and the inputs
(`runner.status.survey`); windows are aggregated per day with polars, the
matrix is a handful of SVG paths per job (not one node per window), and the
per-window details travel as compact column arrays in one JSON block, so
20 jobs x a year of hourly windows stays a few MB.

`build_report(ws, ledger, at)` returns the HTML; `write_report(path, html)`
writes it atomically.
"""

from __future__ import annotations

import html
import json
import os
import tempfile
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any
from zoneinfo import ZoneInfo

from runner.timeutil import format_instant, from_us

if TYPE_CHECKING:
    import polars as pl

    from runner.ledger import Ledger
    from runner.windows import Cadence
    from runner.workspace import Workspace

# Top to bottom inside a matrix cell, and left to right in tables: worst first.
ORDER = ("failed", "stale", "missing", "waiting", "running", "done")
GLYPH = {"failed": "✗", "stale": "≈", "missing": "∅", "waiting": "…", "running": "▶", "done": "✓", "late": "◷"}
CODE = {"done": "d", "stale": "s", "failed": "f", "missing": "m", "waiting": "w", "running": "r"}
MEANING = {
    "failed": "its last run failed; the previous output, if any, is kept",
    "stale": "ran, but its spec, code, inputs or producers changed since",
    "missing": "due and never ran, inputs present",
    "waiting": "due, but its input files or producer windows are not there yet",
    "running": "claimed by a runner right now",
    "done": "ran, and nothing it depends on has changed since",
    "late": "a mark on top of the state: its newest input arrived more than late_after after the window ended",
}

MAX_DAYS = 800        # matrix and per-window details cover at most this many recent days
MAX_RANGES = 40       # state ranges listed per job (the rest are counted)
COL_W = 18            # matrix column (day) width, px
ROW_H = 24            # matrix row (job) height, px
HEAD_H = 34           # matrix header height (months, day numbers), px
FP_BYTES = 3          # fingerprint prefix shown per window (6 hex digits)
ERROR_CHARS = 400     # longest error text embedded per window
CHART_W = 360         # widest run chart, px (windows beyond that share a bar)


# ---------------------------------------------------------------- collecting


@dataclass
class JobView:
    """What the report shows of one job."""

    index: int
    name: str
    cadence: str
    tz: str
    description: str | None
    output: str
    counts: dict[str, int]
    late: int
    total: int
    cells: list[list[int]] = field(default_factory=list)   # day, first, n, per ORDER..., late
    ranges: list[dict[str, Any]] = field(default_factory=list)
    more_ranges: int = 0
    windows: dict[str, Any] = field(default_factory=dict)  # compact per-window columns
    older: int = 0                                          # windows before the matrix's first day
    chart: dict[str, Any] = field(default_factory=dict)
    plan: dict[str, Any] = field(default_factory=dict)


@dataclass
class ReportData:
    title: str
    at: datetime
    zone: ZoneInfo
    zone_note: str
    first_day: date
    days: int
    jobs: list[JobView]
    next_change: datetime | None
    strings: list[str]
    graph_svg: str
    assessed: dict[str, Any] = field(default_factory=dict)  # the survey behind it (for metrics)


def axis_zone(ws: Workspace) -> tuple[ZoneInfo, str]:
    """The zone of the common day axis: the jobs' own when they all share one, else UTC."""
    zones = sorted({ws.cadence(n).tz.key for n in ws.jobs})
    if len(zones) == 1:
        return ZoneInfo(zones[0]), f"Days are calendar days in {zones[0]}, the time zone of every job"
    if not zones:
        return ZoneInfo("UTC"), "Days are calendar days in UTC"
    return ZoneInfo("UTC"), (f"Days are calendar days in UTC (the jobs use {len(zones)} time zones: "
                             f"{', '.join(zones)})")


def next_due(cad: Cadence, at: datetime) -> datetime | None:
    """When the job's next window becomes due (end + settle), if that is after `at`."""
    limit = at - cad.settle
    window = cad.window_at(limit) if limit >= cad.start else None
    if window is None:
        first = cad.first()
        if first is not None and first.end + cad.settle > at:
            window = first
    if window is None:
        return None
    when = window.end + cad.settle
    return when if when > at else None


class _Strings:
    """A table of distinct texts (reasons, errors), referenced by index from the window arrays."""

    def __init__(self) -> None:
        self.items: list[str] = []
        self.index: dict[str, int] = {}

    def add(self, text: str | None) -> int:
        if not text:
            return -1
        if len(text) > ERROR_CHARS:
            text = text[:ERROR_CHARS] + " …"
        found = self.index.get(text)
        if found is None:
            found = self.index[text] = len(self.items)
            self.items.append(text)
        return found


def _clip(text: str, limit: int = ERROR_CHARS) -> str:
    return text if len(text) <= limit else text[:limit] + " …"


def _rle(values: list[int]) -> list[list[int]]:
    out: list[list[int]] = []
    for v in values:
        if out and out[-1][0] == v:
            out[-1][1] += 1
        else:
            out.append([v, 1])
    return out


def _deltas(values: list[int | None]) -> list[int | None]:
    """Each non-null value minus the previous non-null one (the first is kept as is)."""
    out: list[int | None] = []
    prev = 0
    for v in values:
        if v is None:
            out.append(None)
        else:
            out.append(v - prev)
            prev = v
    return out


def _with_days(frame: pl.DataFrame, zone: ZoneInfo, job_tz: str) -> pl.DataFrame:
    import polars as pl

    utc = pl.from_epoch(pl.col("start_us"), time_unit="us")
    return frame.sort("start_us").with_columns(
        utc.dt.replace_time_zone("UTC").dt.convert_time_zone(zone.key).dt.date().alias("day"),
        (utc.dt.replace_time_zone("UTC").dt.convert_time_zone(job_tz).dt.replace_time_zone(None) - utc)
        .dt.total_minutes().cast(pl.Int64).alias("offset_min"),
    )


def _ranges(frame: pl.DataFrame, cad: Cadence, limit: int) -> tuple[list[dict[str, Any]], int]:
    """Runs of consecutive windows in the same not-done state for the same kind of reason; late runs too."""
    import polars as pl

    if frame.height == 0:
        return [], 0
    kind = (
        pl.when(pl.col("state") == "stale")
        .then(pl.lit("stale by ") + pl.col("reasons").list.join(", ")
              + pl.when(pl.col("pending")).then(pl.lit(" (pending upstream)")).otherwise(pl.lit("")))
        .when((pl.col("state") == "waiting") & pl.col("reason").fill_null("").str.starts_with("waiting"))
        .then(pl.col("reason").str.split(":").list.first())
        .when(pl.col("state") == "waiting")
        .then(pl.lit("waiting for ") + pl.col("reason").fill_null("").str.split(":").list.first())
        .when(pl.col("state") == "done").then(pl.lit(""))
        .otherwise(pl.col("state"))
    )
    parts = []
    for label, expr in (("state", kind), ("late", pl.when(pl.col("late")).then(pl.lit("late")).otherwise(pl.lit("")))):
        example = (pl.when(pl.col("run_error").is_not_null() & (pl.col("state") == "failed"))
                   .then(pl.col("reason") + pl.lit(": ") + pl.col("run_error")).otherwise(pl.col("reason")))
        f = frame.select("start_us", "end_us", "state", example.alias("reason"), expr.alias("kind"))
        f = f.with_columns(
            ((pl.col("kind") != pl.col("kind").shift(1)) | (pl.col("start_us") != pl.col("end_us").shift(1)))
            .fill_null(True).cum_sum().alias("group"))
        f = f.filter(pl.col("kind") != "")
        grouped = f.group_by("group", maintain_order=True).agg(
            pl.col("kind").first(), pl.col("state").first(), pl.col("reason").first(),
            pl.col("start_us").first().alias("first"), pl.col("end_us").last().alias("last_end"),
            pl.len().alias("count"),
        ).with_columns(pl.lit(label).alias("what"))
        parts.append(grouped)
    rows = pl.concat(parts).sort("first", "what").to_dicts()
    out = []
    for r in rows[:limit]:
        state = "late" if r["what"] == "late" else r["state"]
        out.append({
            "state": state, "kind": r["kind"], "count": r["count"], "example": _clip(r["reason"] or ""),
            "first": format_instant(from_us(r["first"]), cad.tz),
            "last_end": format_instant(from_us(r["last_end"]), cad.tz),
        })
    return out, max(0, len(rows) - limit)


def collect(ws: Workspace, ledger: Ledger, at: datetime) -> ReportData:
    """Survey the ledger and the inputs once and shape everything the page shows."""
    import polars as pl

    from runner.planner import job_plans, next_change
    from runner.status import survey

    assessed = survey(ws, ledger, at, None, extras=True)
    plans = {p.job: p for p in job_plans(ws, assessed, cap=True)}
    zone, zone_note = axis_zone(ws)
    at_day = at.astimezone(zone).date()
    framed = {}
    for name, frame in assessed.items():
        framed[name] = _with_days(frame, zone, ws.cadence(name).tz.key)
    days_seen = [d for f in framed.values() if f.height for d in (f["day"].min(), f["day"].max())]
    upcoming = next_change(ws, assessed, at)
    # the axis runs to today while some job still has windows to come; once every job has
    # ended (an `end:` in the past), to its last window, so the matrix shows where the windows are
    last_day = max([at_day, *days_seen]) if upcoming is not None or not days_seen else max(days_seen)
    first_day = min(days_seen) if days_seen else at_day
    first_day = max(first_day, last_day - timedelta(days=MAX_DAYS - 1))
    n_days = (last_day - first_day).days + 1
    strings = _Strings()
    views = []
    for i, name in enumerate(assessed):
        cad = ws.cadence(name)
        spec = ws.jobs[name].spec
        frame = framed[name]
        counts = {s: 0 for s in ORDER}
        for state, n in frame.group_by("state").len().iter_rows():
            counts[state] = n
        out = spec.output
        view = JobView(index=i, name=name, cadence=cad.describe(), tz=cad.tz.key, description=spec.description,
                       output=out.path if out.path is not None else f"table {out.table}", counts=counts,
                       late=int(frame["late"].sum()) if frame.height else 0, total=frame.height)
        runs = ledger.last_runs(name)
        runs = runs.rename({c: f"run_{c}" for c in runs.columns if c != "run_id"})
        frame = frame.join(runs, on="run_id", how="left", maintain_order="left").with_columns(
            ((pl.col("day") - pl.lit(first_day)).dt.total_days()).cast(pl.Int64).alias("d"))
        view.ranges, view.more_ranges = _ranges(frame, cad, MAX_RANGES)
        view.older = int((frame["d"] < 0).sum()) if frame.height else 0
        frame = frame.filter(pl.col("d") >= 0)
        view.cells = _cells(frame)
        view.windows = _encode_windows(frame, strings)
        view.chart = _chart(frame)
        view.plan = _plan(plans.get(name), cad, at)
        views.append(view)
    return ReportData(
        title=ws.root.name, at=at, zone=zone, zone_note=zone_note, first_day=first_day, days=n_days,
        jobs=views, next_change=upcoming, strings=strings.items,
        graph_svg=graph_svg(ws, views), assessed=assessed,
    )


def _cells(frame: pl.DataFrame) -> list[list[int]]:
    import polars as pl

    if frame.height == 0:
        return []
    agg = frame.with_row_index("i").group_by("d", maintain_order=True).agg(
        pl.col("i").min().alias("first"), pl.len().alias("n"),
        *[(pl.col("state") == s).sum().alias(s) for s in ORDER],
        pl.col("late").sum().alias("late"),
    ).sort("d")
    cols = ["d", "first", "n", *ORDER, "late"]
    return [list(map(int, row)) for row in agg.select(cols).iter_rows()]


B64 = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/"


def vlq(values: pl.Series) -> str:
    """Signed integers as one Base64 VLQ string (5 bits a digit, lowest first, bit 6 = more digits follow;
    the sign in the lowest bit of the first digit), nulls as "B" (a negative zero, never made otherwise)."""
    import polars as pl

    cache: dict[int | None, str] = {None: "B"}
    out = []
    for v in values.cast(pl.Int64).to_list():
        text = cache.get(v)
        if text is None:
            text = cache[v] = _vlq_one(v)
        out.append(text)
    return "".join(out)


def _vlq_one(value: int) -> str:
    z = (-value << 1) | 1 if value < 0 else value << 1
    chars = []
    while True:
        digit, z = z & 31, z >> 5
        chars.append(B64[digit | 32 if z else digit])
        if not z:
            return "".join(chars)


def _fingerprints(values: pl.Series) -> str:
    """The first FP_BYTES bytes of each hex fingerprint, packed and Base64-encoded (zeros where none)."""
    import base64

    import polars as pl

    hexes = (values.cast(pl.String).fill_null("").str.slice(0, FP_BYTES * 2).str.pad_end(FP_BYTES * 2, "0")
             .str.replace_all("[^0-9a-fA-F]", "0"))
    return base64.b64encode(bytes.fromhex("".join(hexes.to_list()))).decode("ascii")


def _encode_windows(frame: pl.DataFrame, strings: _Strings) -> dict[str, Any]:
    """Per-window columns, compact: run-length starts and offsets, one char per state, Base64 VLQ numbers.

    `s`: a state code per window (upper case: late); `cs`: the last run's duration in centiseconds;
    `rw`: rows written; `fin`: the last run's finish (Unix seconds), each minus the previous one;
    `fp`: fingerprint prefixes; `x`: [index, reason, error, rows read] for windows not done.
    """
    import polars as pl

    if frame.height == 0:
        return {"n": 0}
    starts = (frame["start_us"] // 1_000_000).to_list()
    steps = [b - a for a, b in zip(starts, starts[1:], strict=False)]
    codes = frame.select(
        pl.col("state").replace_strict(CODE, default="d").alias("c"), "late").iter_rows()
    state = "".join(c.upper() if late else c for c, late in codes)
    finished = frame.select(
        pl.col("run_finished_at").str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", time_zone="UTC", strict=False)
        .dt.epoch("s"))[:, 0].to_list()
    extras = []
    for i, (st, reason, error, rows_read) in enumerate(
            frame.select("state", "reason", "run_error", "run_rows_read").iter_rows()):
        if st != "done" or error:
            extras.append([i, strings.add(reason), strings.add(error if st == "failed" else None),
                           rows_read])
    return {
        "n": frame.height,
        "t0": starts[0],
        "step": _rle(steps),
        "off": _rle(frame["offset_min"].to_list()),
        "s": state,
        "cs": vlq(frame.select((pl.col("run_seconds") * 100).round())[:, 0]),
        "rw": vlq(frame["run_rows_written"]),
        "fin": vlq(pl.Series(_deltas(finished), dtype=pl.Int64)),
        "fp": _fingerprints(frame["run_fingerprint"]),
        "x": extras,
    }


def _chart(frame: pl.DataFrame) -> dict[str, Any]:
    """Durations and rows written of the windows' last runs, oldest to newest, in at most CHART_W buckets.

    Each bucket holds consecutive windows (one window per bucket when they fit)
    and keeps their median and max.
    """
    import polars as pl

    if frame.height == 0:
        return {}
    n = frame.height
    buckets = min(n, CHART_W)
    agg = frame.with_row_index("i").with_columns((pl.col("i") * buckets // n).alias("b")).group_by("b").agg(
        *[getattr(pl.col(c), f)().alias(f"{c}_{f}") for c in ("run_seconds", "run_rows_written")
          for f in ("median", "max")]).sort("b")
    days = frame.select(pl.col("day").first().alias("a"), pl.col("day").last().alias("z")).row(0)
    return {"n": n, "buckets": buckets, "first": days[0].isoformat(), "last": days[1].isoformat(),
            "seconds": agg.select("b", "run_seconds_median", "run_seconds_max").rows(),
            "rows": agg.select("b", "run_rows_written_median", "run_rows_written_max").rows()}


def _plan(plan: Any, cad: Cadence, at: datetime) -> dict[str, Any]:
    nxt = next_due(cad, at)
    out: dict[str, Any] = {"next_due": format_instant(nxt, cad.tz) if nxt else None,
                           "due": 0, "held": 0, "waiting": 0, "first": None, "reason": None,
                           "first_waiting": None, "waiting_reason": None}
    if plan is None:
        return out
    out.update(due=len(plan.due), held=plan.held_back, waiting=len(plan.waiting))
    if plan.due:
        out.update(first=plan.due[0].window.id, reason=plan.due[0].reason, last=plan.due[-1].window.id)
    if plan.waiting:
        out.update(first_waiting=plan.waiting[0].window.id, waiting_reason=plan.waiting[0].reason)
    return out


# ---------------------------------------------------------------- drawing


def _e(value: Any) -> str:
    """Text or attribute value, escaped for HTML."""
    return html.escape(str(value), quote=True)


def _n(value: int) -> str:
    return f"{value:,}"


def _json_for_script(data: Any) -> str:
    """JSON that is safe inside a <script> element (no `<`, `>`, `&` or line separators left raw)."""
    text = json.dumps(data, ensure_ascii=False, separators=(",", ":"), allow_nan=False)
    for raw, esc in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"), ("\u2028", "\\u2028"),
                     ("\u2029", "\\u2029")):
        text = text.replace(raw, esc)
    return text


PATTERNS = """
<pattern id="p-stale" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">
<rect width="6" height="6" fill="var(--stale)"/><rect width="2" height="6" fill="var(--stale-ink)"/></pattern>
<pattern id="p-failed" width="5" height="5" patternUnits="userSpaceOnUse">
<rect width="5" height="5" fill="var(--failed)"/><path d="M0 0L5 5M5 0L0 5" stroke="#fff" stroke-width="1"/></pattern>
<pattern id="p-missing" width="4" height="4" patternUnits="userSpaceOnUse">
<rect width="4" height="4" fill="#fff"/><circle cx="2" cy="2" r="0.9" fill="var(--missing-ink)"/></pattern>
<pattern id="p-waiting" width="4" height="4" patternUnits="userSpaceOnUse">
<rect width="4" height="4" fill="var(--waiting)"/><rect y="3" width="4" height="1" fill="var(--waiting-ink)"/></pattern>
<pattern id="p-running" width="4" height="4" patternUnits="userSpaceOnUse">
<rect width="4" height="4" fill="var(--running)"/><rect x="3" width="1" height="4" fill="#fff"/></pattern>
<pattern id="p-done" width="4" height="4" patternUnits="userSpaceOnUse">
<rect width="4" height="4" fill="var(--done)"/></pattern>
"""


def _fill(state: str) -> str:
    return f"url(#p-{state})"


def _split(counts: list[int], height: int) -> list[int]:
    """Band heights for the states' counts: proportional, at least 2 px for any non-zero state."""
    total = sum(counts)
    if total == 0:
        return [0] * len(counts)
    hs = [max(2, round(height * c / total)) if c else 0 for c in counts]
    while sum(hs) != height:
        i = max(range(len(hs)), key=lambda k: hs[k])
        hs[i] += 1 if sum(hs) < height else -1
    return hs


def matrix_svg(data: ReportData) -> str:
    """The jobs x days matrix: per job one path per state (bands stacked in each day's cell), plus counts."""
    width = data.days * COL_W
    height = HEAD_H + len(data.jobs) * ROW_H
    out = [f'<svg id="matrix" class="matrix" width="{width}" height="{height}" viewBox="0 0 {width} {height}" '
           f'tabindex="0" role="img" aria-label="windows of each job by day and state" '
           f'data-first-day="{data.first_day.isoformat()}" data-days="{data.days}">']
    at_day = (data.at.astimezone(data.zone).date() - data.first_day).days
    # header: month names where a month starts, day numbers, weekend tint
    head = []
    for d in range(data.days):
        day = data.first_day + timedelta(days=d)
        x = d * COL_W
        if day.weekday() >= 5:
            head.append(f'<rect class="wkend" x="{x}" y="{HEAD_H - 14}" width="{COL_W}" '
                        f'height="{height - HEAD_H + 14}"/>')
        if d == 0 or day.day == 1:
            label = day.strftime("%b %Y") if (d == 0 or day.month == 1) else day.strftime("%b")
            head.append(f'<text class="month" x="{x + 2}" y="12">{_e(label)}</text>'
                        f'<line class="msep" x1="{x}" x2="{x}" y1="0" y2="{height}"/>')
        head.append(f'<text class="dnum" x="{x + COL_W / 2}" y="{HEAD_H - 4}">{day.day}</text>')
    out.extend(head)
    if 0 <= at_day < data.days:
        out.append(f'<rect class="today" x="{at_day * COL_W}" y="{HEAD_H - 14}" width="{COL_W}" '
                   f'height="{height - HEAD_H + 14}"><title>the report\'s clock: '
                   f'{_e(format_instant(data.at, data.zone))}</title></rect>')
    inner_h = ROW_H - 6
    for j, job in enumerate(data.jobs):
        y0 = HEAD_H + j * ROW_H + 3
        paths: dict[str, list[str]] = {s: [] for s in ORDER}
        late: list[str] = []
        texts = []
        for cell in job.cells:
            d, _first, n = cell[0], cell[1], cell[2]
            counts = cell[3:3 + len(ORDER)]
            x = d * COL_W + 1
            w = COL_W - 2
            y = y0
            for state, h in zip(ORDER, _split(counts, inner_h), strict=True):
                if h:
                    paths[state].append(f"M{x} {y}h{w}v{h}h-{w}z")
                    y += h
            if cell[-1]:
                late.append(f"M{x + w - 7} {y0}h7v7z")
            bad = n - counts[-1]
            if bad:
                label = str(bad) if bad < 1000 else "1k+"
                texts.append(f'<text x="{x + w / 2}" y="{y0 + inner_h / 2 + 3.5}">{label}</text>')
        out.append(f'<g class="row" data-job="{j}">')
        for state in ORDER:
            if paths[state]:
                out.append(f'<path class="s-{state}" fill="{_fill(state)}" d="{"".join(paths[state])}"/>')
        if late:
            out.append(f'<path class="late" d="{"".join(late)}"/>')
        if texts:
            out.append(f'<g class="counts">{"".join(texts)}</g>')
        out.append("</g>")
    out.append(f'<rect id="sel" class="sel" x="-100" y="-100" width="{COL_W}" height="{ROW_H}"/>')
    out.append("</svg>")
    return "".join(out)


def legend_html() -> str:
    items = []
    for state in ORDER:
        items.append(
            f'<li><svg width="22" height="16" aria-hidden="true"><rect x="1" y="1" width="20" height="14" '
            f'fill="{_fill(state)}" stroke="var(--rule)"/></svg><b>{GLYPH[state]} {state}</b> '
            f'<span>{_e(MEANING[state])}</span></li>')
    items.append(
        '<li><svg width="22" height="16" aria-hidden="true"><rect x="1" y="1" width="20" height="14" '
        'fill="url(#p-done)" stroke="var(--rule)"/><path class="late" d="M14 1h7v7z"/></svg>'
        f'<b>{GLYPH["late"]} late</b> <span>{_e(MEANING["late"])}</span></li>')
    return (f'<svg width="0" height="0" style="position:absolute" aria-hidden="true"><defs>{PATTERNS}</defs></svg>'
            f'<ul class="legend">{"".join(items)}</ul>')


def _num(v: float) -> str:
    """A coordinate with at most one decimal and no trailing zero."""
    text = f"{v:.1f}"
    return text[:-2] if text.endswith(".0") else text


def _spark(chart: dict[str, Any], which: str) -> str:
    """A small bar chart of one figure per window, oldest to newest (bucketed: highest bar, median line)."""
    title = "duration per window (s)" if which == "seconds" else "rows written per window"
    pts = [p for p in chart.get(which, []) if p[2] is not None]
    if not pts:
        return f'<figure class="spark"><figcaption>{title}: no runs yet</figcaption></figure>'
    buckets = chart["buckets"]
    step = min(12.0, CHART_W / buckets)
    w, h, top_pad, foot = round(step * buckets), 60, 12, 12
    base = h - foot
    top = max(p[2] for p in pts) or 1

    def y(v: float | None) -> float:
        return base if v is None else round(top_pad + (base - top_pad) * (1 - v / top), 1)

    bars, line = [], []
    bw = max(1.0, round(step - (1 if step >= 3 else 0), 1))
    for b, mid, hi in pts:
        x = _num(b * step + bw / 2)
        bars.append(f"M{x} {base}V{_num(min(y(hi), base - 1))}")
        line.append(f"{x},{_num(y(mid))}")
    fmt = (lambda v: f"{v:.3g} s") if which == "seconds" else (lambda v: f"{_n(int(v))} rows")
    per = chart["n"] / buckets
    how = ("one bar per window, oldest to newest" if per == 1 else
           f"each bar is the highest of about {per:.3g} windows, the line their median")
    width = max(w, 150)
    return (
        f'<figure class="spark"><figcaption>{title}: {_e(how)}</figcaption>'
        f'<svg width="{width}" height="{h}" viewBox="0 0 {width} {h}" role="img" '
        f'aria-label="{_e(title)}, {_n(chart["n"])} windows, at most {_e(fmt(top))}">'
        f'<line class="axis" x1="0" x2="{w}" y1="{base + 0.5}" y2="{base + 0.5}"/>'
        f'<text class="tick" x="0" y="8">{_e(fmt(top))}</text>'
        f'<path class="band" stroke-width="{bw}" d="{"".join(bars)}"/>'
        + (f'<polyline class="median" points="{" ".join(line)}"/>' if per > 1 else "")
        + f'<text class="tick" x="0" y="{h - 1}">{_e(chart["first"])}</text>'
        f'<text class="tick" x="{width}" y="{h - 1}" text-anchor="end">{_e(chart["last"])}</text></svg></figure>'
    )


def _node_status(v: JobView) -> str:
    bad = [f"{GLYPH[s]} {_n(v.counts[s])} {s}" for s in ORDER[:-1] if v.counts.get(s)]
    if bad:
        return ", ".join(bad)
    return f"{GLYPH['done']} all {_n(v.total)} done" if v.total else "nothing due yet"


def graph_svg(ws: Workspace, views: list[JobView]) -> str:
    """The job graph, layered left to right by dependency order; each node links to its job's section."""
    from runner.spec import JobInput

    by_name = {v.name: v for v in views}
    names = [v.name for v in views]
    if not names:
        return '<p class="muted">No jobs.</p>'
    edges: dict[tuple[str, str], list[str]] = {}  # (producer, reader) -> the reader's input names
    for n in names:
        for input_name, source in ws.jobs[n].spec.inputs.items():
            if isinstance(source, JobInput) and source.job != n and source.job in by_name:
                edges.setdefault((source.job, n), []).append(input_name)
    producers: dict[str, list[str]] = {n: [] for n in names}
    for a, b in edges:
        producers[b].append(a)
    layer: dict[str, int] = {}
    for n in names:
        preds = [p for p in producers[n] if p in layer]
        layer[n] = 1 + max((layer[p] for p in preds), default=-1)
    columns: dict[int, list[str]] = {}
    for n in names:
        columns.setdefault(layer[n], []).append(n)
    status = {n: _node_status(by_name[n]) for n in names}
    nh, gap_y, gap_x, top = 54, 22, 90, 34
    widths = {n: max(150.0, 7.6 * len(n) + 28, 6.3 * len(by_name[n].cadence) + 28, 6.3 * len(status[n]) + 28)
              for n in names}
    xs: dict[int, float] = {}
    x = 12.0
    for c in sorted(columns):
        xs[c] = x
        x += max(widths[n] for n in columns[c]) + gap_x
    ys: dict[str, float] = {}
    for c in sorted(columns):
        # readers sit level with the average of their producers, pushed down where they would overlap
        want = {}
        for i, n in enumerate(columns[c]):
            preds = [ys[p] for p in producers[n] if p in ys]
            want[n] = sum(preds) / len(preds) if preds else top + i * (nh + gap_y)
        below = top
        for n in sorted(columns[c], key=lambda n: (want[n], names.index(n))):
            ys[n] = max(want[n], below)
            below = ys[n] + nh + gap_y
    pos = {n: (xs[layer[n]], ys[n]) for n in names}
    width = int(x - gap_x + 24)
    height = int(max(ys.values()) + nh + 12)
    out = [f'<svg class="graph" width="{width}" height="{height}" viewBox="0 0 {width} {height}" role="img" '
           'aria-label="job graph: producers on the left, their readers to the right">',
           '<defs><marker id="arrow" viewBox="0 0 8 8" refX="7" refY="4" markerWidth="7" markerHeight="7" '
           'orient="auto-start-reverse"><path d="M0 0L8 4L0 8z" fill="var(--ink-2)"/></marker></defs>']
    for (a, b), inputs in sorted(edges.items()):
        x1, y1 = pos[a][0] + widths[a], pos[a][1] + nh / 2
        x2, y2 = pos[b][0] - 2, pos[b][1] + nh / 2
        dx = max(30.0, (x2 - x1) / 2)
        out.append(f'<path class="edge" d="M{x1:.1f} {y1:.1f}C{x1 + dx:.1f} {y1:.1f} {x2 - dx:.1f} {y2:.1f} '
                   f'{x2:.1f} {y2:.1f}" marker-end="url(#arrow)"/>')
        mx, my = (x1 + x2) / 2, (y1 + y2) / 2 - 4
        out.append(f'<text class="elabel" x="{mx:.1f}" y="{my:.1f}">{_e(", ".join(inputs))}</text>')
    for n in names:
        v = by_name[n]
        gx, gy = pos[n]
        w = widths[n]
        worst = next((s for s in ORDER if v.counts.get(s)), "done")
        out.append(f'<a href="#job-{v.index}"><g class="node">'
                   f'<rect class="box" x="{gx:.1f}" y="{gy:.1f}" width="{w:.1f}" height="{nh}" rx="5"/>'
                   f'<rect x="{gx:.1f}" y="{gy:.1f}" width="8" height="{nh}" fill="{_fill(worst)}" class="stripe"/>'
                   f'<text class="nname" x="{gx + 14:.1f}" y="{gy + 17:.1f}">{_e(n)}</text>'
                   f'<text class="nsub" x="{gx + 14:.1f}" y="{gy + 31:.1f}">{_e(v.cadence)}</text>'
                   f'<text class="nsub" x="{gx + 14:.1f}" y="{gy + 45:.1f}">{_e(status[n])}</text></g></a>')
        selfs = [(i, s) for i, s in ws.jobs[n].spec.inputs.items() if isinstance(s, JobInput) and s.job == n]
        if selfs:
            sx = gx + w - 40
            out.append(f'<path class="edge self" d="M{sx:.1f} {gy:.1f}C{sx:.1f} {gy - 24:.1f} {sx + 30:.1f} '
                       f'{gy - 24:.1f} {sx + 30:.1f} {gy - 2:.1f}" marker-end="url(#arrow)"/>')
            what = ", ".join(f"{i} (lag {s.lag})" if s.lag else f"{i} (lookback)" for i, s in selfs)
            out.append(f'<text class="elabel" x="{sx + 15:.1f}" y="{gy - 24:.1f}">{_e(what)}</text>')
    out.append("</svg>")
    return "".join(out)


def _counts_table(data: ReportData) -> str:
    head = "".join(f'<th class="num" title="{_e(MEANING[s])}">{GLYPH[s]} {s}</th>' for s in ORDER)
    rows = []
    totals = {s: 0 for s in ORDER}
    late_total = 0
    for v in data.jobs:
        cells = []
        for s in ORDER:
            c = v.counts.get(s, 0)
            totals[s] += c
            cls = f"num c-{s}" if c and s != "done" else "num"
            cells.append(f'<td class="{cls}">{_n(c) if c else ""}</td>')
        late_total += v.late
        flag = "" if v.total == v.counts.get("done", 0) else ' class="attn"'
        rows.append(f'<tr{flag}><th scope="row"><a href="#job-{v.index}">{_e(v.name)}</a></th>{"".join(cells)}'
                    f'<td class="num">{_n(v.late) if v.late else ""}</td><td class="num">{_n(v.total)}</td></tr>')
    foot = "".join(f'<td class="num">{_n(totals[s])}</td>' for s in ORDER)
    return (f'<table class="counts"><thead><tr><th>job</th>{head}<th class="num">{GLYPH["late"]} late</th>'
            f'<th class="num">windows due</th></tr></thead><tbody>{"".join(rows)}</tbody>'
            f'<tfoot><tr><th>all jobs</th>{foot}<td class="num">{_n(late_total)}</td>'
            f'<td class="num">{_n(sum(v.total for v in data.jobs))}</td></tr></tfoot></table>')


def _plan_table(data: ReportData) -> str:
    rows = []
    for v in data.jobs:
        p = v.plan
        if p["due"]:
            span = p["first"] if p["due"] == 1 else f'{p["first"]} .. {p["last"]}'
            run = (f'<b>{_n(p["due"])}</b> window(s): <code>{_e(span)}</code>'
                   f'<div class="why">first: {_e(p["reason"])}</div>')
            if p["held"]:
                run += f'<div class="why">{_n(p["held"])} more held back by max_catch_up (later ticks)</div>'
        else:
            run = '<span class="muted">nothing</span>'
        if p["waiting"]:
            wait = (f'{_n(p["waiting"])} window(s), first <code>{_e(p["first_waiting"])}</code>'
                    f'<div class="why">{_e(p["waiting_reason"])}</div>')
        else:
            wait = '<span class="muted">none</span>'
        nxt = f'<code>{_e(p["next_due"])}</code>' if p["next_due"] else '<span class="muted">no more windows</span>'
        rows.append(f'<tr><th scope="row"><a href="#job-{v.index}">{_e(v.name)}</a></th><td>{run}</td>'
                    f'<td>{wait}</td><td>{nxt}</td></tr>')
    return ('<table class="plan"><thead><tr><th>job</th><th>the next tick runs</th><th>waiting</th>'
            f'<th>next window due at</th></tr></thead><tbody>{"".join(rows)}</tbody></table>')


def _job_section(v: JobView, data: ReportData) -> str:
    items = []
    for r in v.ranges:
        s = r["state"]
        span = r["first"] if r["count"] == 1 else f'{r["first"]} .. {r["last_end"]}'
        example = ""
        if s in ("failed", "waiting") and r["example"]:
            example = f'<div class="why">e.g. {_e(r["example"])}</div>'
        hint = ""
        if s in ("stale", "missing", "failed"):
            hint = (f'<div class="hint"><code>weir backfill {_e(v.name)} --from {_e(r["first"])} '
                    f'--to {_e(r["last_end"])}</code></div>')
        label = r["kind"] if s != "late" else "late input"
        items.append(f'<li class="r-{s}"><span class="glyph" aria-hidden="true">{GLYPH[s]}</span> '
                     f'<b>{_e(label)}</b>, {_n(r["count"])} window{"s" if r["count"] != 1 else ""}, '
                     f'<code>{_e(span)}</code>{example}{hint}</li>')
    if v.more_ranges:
        items.append(f'<li class="muted">… and {_n(v.more_ranges)} more ranges (weir stale and weir plan '
                     'list them all)</li>')
    ranges = (f'<ul class="ranges">{"".join(items)}</ul>' if items else
              (f'<p class="ok">{GLYPH["done"]} every one of its {_n(v.total)} due windows is done.</p>'
               if v.total else '<p class="muted">No window is due yet.</p>'))
    older = (f'<p class="muted">{_n(v.older)} windows before {data.first_day.isoformat()} are counted here but '
             'not drawn in the matrix.</p>' if v.older else "")
    desc = f'<p>{_e(v.description)}</p>' if v.description else ""
    return (f'<section class="job" id="job-{v.index}"><h3>{_e(v.name)}</h3>{desc}'
            f'<p class="meta">{_e(v.cadence)} · output <code>{_e(v.output)}</code> · {_n(v.total)} windows due</p>'
            f'{ranges}{older}<div class="sparks">{_spark(v.chart, "seconds")}'
            f'{_spark(v.chart, "rows")}</div></section>')


def render(data: ReportData) -> str:
    """The page."""
    at_utc = data.at.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")
    at_local = format_instant(data.at, data.zone)
    not_done = sum(v.total - v.counts.get("done", 0) for v in data.jobs)
    total = sum(v.total for v in data.jobs)
    if data.next_change is not None:
        nxt = (f'the plan next changes at <b>{_e(format_instant(data.next_change, data.zone))}</b> '
               f'(in {_e(_ago(data.next_change - data.at))})')
    else:
        nxt = "no job has windows left to come due"
    verdict = (f'<b>{_n(not_done)}</b> of {_n(total)} due windows are not done' if not_done else
               f'all {_n(total)} due windows are done')
    payload = {
        "at": int(data.at.timestamp()), "zone": data.zone.key, "firstDay": data.first_day.isoformat(),
        "days": data.days, "colW": COL_W, "rowH": ROW_H, "headH": HEAD_H, "fpBytes": FP_BYTES,
        "order": list(ORDER), "glyph": GLYPH, "strings": data.strings,
        "jobs": [{"name": v.name, "tz": v.tz, "cells": v.cells, "w": v.windows} for v in data.jobs],
    }
    labels = "".join(
        f'<div class="mlabel{" attn" if v.total != v.counts.get("done", 0) else ""}" style="height:{ROW_H}px">'
        f'<a href="#job-{v.index}" title="{_e(v.cadence)}">{_e(v.name)}</a></div>' for v in data.jobs)
    sections = "".join(_job_section(v, data) for v in data.jobs)
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="weir">
<title>weir report: {_e(data.title)} at {_e(at_utc)}</title>
<style>{CSS}</style>
</head>
<body>
<script>window.__weirErrors=[];window.addEventListener("error",function(e){{window.__weirErrors.push(String(e.message));document.documentElement.setAttribute("data-script-errors",String(window.__weirErrors.length));}});</script>
<header class="top">
<p class="kicker">weir report</p>
<h1>{_e(data.title)}</h1>
<p class="when">as of {_e(at_local)} ({_e(at_utc)}) · {verdict} · {nxt}</p>
</header>
<main>
<section id="counts"><h2>Which jobs have windows that are not done</h2>{_counts_table(data)}</section>
<section id="days"><h2>Where in time</h2>
<p class="note">{_e(data.zone_note)}; a window counts on the day it starts. Each cell splits that day's windows by
state, worst at the top; the number is how many are not done. Point at a cell for its counts; click it (or use the
arrow keys) to list its windows and their last runs.</p>
{legend_html()}
<div class="mx"><div class="mlabels" style="padding-top:{HEAD_H}px">{labels}</div>
<div class="mscroll" id="mscroll">{matrix_svg(data)}</div></div>
<div id="tip" class="tip" role="tooltip" hidden></div>
<div id="detail" class="detail" aria-live="polite"><p class="muted">Click a day cell to list its windows: state, last
run (finished, duration, rows), fingerprint and reason. <code>weir why JOB WINDOW</code> explains one in full.</p></div>
</section>
<section id="plan"><h2>What runs next</h2><p class="note">What <code>weir tick</code> would do at the report's clock;
{nxt}.</p>{_plan_table(data)}</section>
<section id="jobs"><h2>Why: each job's windows that are not done</h2>{sections}</section>
<section id="graph"><h2>How the jobs hang together</h2><p class="note">Producers on the left, the jobs that read them
to the right; labels name the inputs. The stripe shows the worst state of a job's windows.</p>
<div class="gscroll">{data.graph_svg}</div></section>
</main>
<footer><p class="muted">Written by weir from the ledger and the input files; no part of this page is fetched
from anywhere.</p></footer>
<script type="application/json" id="weir-data">{_json_for_script(payload)}</script>
<script>{JS}</script>
</body>
</html>
"""


def _ago(delta: timedelta) -> str:
    s = int(delta.total_seconds())
    if s < 3600:
        return f"{max(s // 60, 0)} min"
    if s < 86400:
        return f"{s // 3600} h {s % 3600 // 60} min"
    return f"{s // 86400} d {s % 86400 // 3600} h"


def build_report(ws: Workspace, ledger: Ledger, at: datetime) -> str:
    """The whole report as one self-contained HTML page, for the clock `at`."""
    return render(collect(ws, ledger, at))


def write_report(path: Path | str, text: str) -> Path:
    """Write `text` to `path` atomically: a temporary file beside it, flushed, then renamed over it."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target


# ---------------------------------------------------------------- page style and script

CSS = """
:root{--ink:#1f2430;--ink-2:#4a5263;--muted:#6b7280;--paper:#faf9f6;--card:#fff;--rule:#d9d6ce;
--done:#cfe2d6;--stale:#e8b84a;--stale-ink:#a87a12;--failed:#c2412d;--missing-ink:#7a7f8a;
--waiting:#b9d3ec;--waiting-ink:#4f7fae;--running:#7d62a8;--late:#1f2430;--accent:#2f5d8a}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:14px/1.45 system-ui,-apple-system,"Segoe UI",
"DejaVu Sans",sans-serif}
code{white-space:nowrap;font:12px/1.3 ui-monospace,"DejaVu Sans Mono",monospace;background:#f1efe9;padding:0 3px;border-radius:3px}
a{color:var(--accent)}
header.top{padding:18px 28px 10px;border-bottom:3px solid var(--ink)}
.kicker{margin:0;text-transform:uppercase;letter-spacing:.12em;font-size:11px;color:var(--muted)}
h1{margin:2px 0 4px;font-size:24px}
.when{margin:0;color:var(--ink-2)}
main{padding:4px 28px 20px}
h2{font-size:17px;margin:26px 0 8px;padding-bottom:3px;border-bottom:1px solid var(--rule)}
h3{font-size:15px;margin:0 0 4px}
.note{color:var(--ink-2);max-width:70em;margin:4px 0 8px}
.muted{color:var(--muted)}
table{border-collapse:collapse;background:var(--card);border:1px solid var(--rule)}
th,td{padding:4px 10px;text-align:left;vertical-align:top;border-bottom:1px solid #eeebe4}
thead th{font-size:12px;color:var(--ink-2);background:#f4f2ec;white-space:nowrap}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums}
tfoot th,tfoot td{font-weight:600;background:#f4f2ec}
tr.attn th a{font-weight:700}
td.c-failed{color:#fff;background:var(--failed);font-weight:700}
td.c-stale{background:#f6e1ad;font-weight:700}
td.c-missing{background:#eceef1;font-weight:700}
td.c-waiting{background:#dce9f6;font-weight:700}
td.c-running{background:#e4dcf0;font-weight:700}
.legend{list-style:none;padding:0;margin:6px 0 10px;display:grid;grid-template-columns:repeat(auto-fill,minmax(330px,1fr));
gap:4px 18px;font-size:12px}
.legend li{display:flex;align-items:flex-start;gap:6px}
.legend b{white-space:nowrap}
.legend svg{flex:none}
.legend span{color:var(--ink-2)}
.mx{display:flex;border:1px solid var(--rule);background:var(--card)}
.mlabels{flex:none;border-right:1px solid var(--rule);background:var(--card);z-index:1}
.mlabel{display:flex;align-items:center;padding:0 10px;font-size:12.5px;white-space:nowrap}
.mlabel.attn a{font-weight:700}
.mscroll{overflow-x:auto;flex:1}
.matrix{display:block;cursor:pointer;outline:none}
.matrix:focus-visible{box-shadow:inset 0 0 0 2px var(--accent)}
.matrix .month{font-size:11px;font-weight:600;fill:var(--ink)}
.matrix .dnum{font-size:9px;fill:var(--muted);text-anchor:middle}
.matrix .msep{stroke:var(--rule)}
.matrix .wkend{fill:#f3f1ec}
.matrix .today{fill:none;stroke:var(--accent);stroke-width:1.5;stroke-dasharray:3 2}
.matrix .counts text{font-size:9px;font-weight:700;text-anchor:middle;fill:#111;paint-order:stroke;
stroke:#fff;stroke-width:2.5px;pointer-events:none}
.late{fill:var(--late)}
.sel{fill:none;stroke:var(--ink);stroke-width:2;pointer-events:none}
.tip{position:fixed;z-index:10;background:var(--ink);color:#fff;padding:6px 9px;border-radius:4px;font-size:12px;
pointer-events:none;white-space:pre;max-width:40em;box-shadow:0 2px 6px rgba(0,0,0,.25)}
.detail{margin-top:10px}
.detail table{font-size:12.5px}
.detail td{white-space:nowrap}
.detail td:last-child{white-space:normal}
.detail td.err{color:var(--failed);max-width:40em;white-space:pre-wrap}
.detail .cnt{margin:6px 0}
.plan .why,.ranges .why{color:var(--ink-2);font-size:12.5px}
.job{background:var(--card);border:1px solid var(--rule);border-radius:6px;padding:12px 16px;margin:12px 0}
.job .meta{color:var(--ink-2);margin:0 0 6px}
.ranges{margin:6px 0;padding-left:0;list-style:none}
.ranges li{margin:3px 0;padding-left:22px;text-indent:-22px}
.ranges .glyph{display:inline-block;width:18px;text-indent:0;text-align:center;font-weight:700}
.r-failed .glyph{color:var(--failed)}.r-stale .glyph{color:var(--stale-ink)}.r-waiting .glyph{color:var(--waiting-ink)}
.hint{text-indent:0;margin:1px 0 4px}
.hint code{background:none;color:var(--ink-2)}
.ok{color:#2d6a4f;font-weight:600}
.sparks{display:flex;flex-wrap:wrap;gap:8px 28px}
.spark{margin:4px 0 0}
.spark figcaption{font-size:11.5px;color:var(--ink-2)}
.spark .band{fill:none;stroke:#9fb6cc}
.spark .median{fill:none;stroke:var(--ink);stroke-width:1.2}
.spark .axis{stroke:var(--rule)}
.spark .tick{font-size:9px;fill:var(--muted)}
.gscroll{overflow-x:auto;background:var(--card);border:1px solid var(--rule);border-radius:6px}
.graph .node rect.box{fill:#fff;stroke:var(--ink-2)}
.graph a:hover rect.box{stroke-width:2}
.graph .nname{font-size:12.5px;font-weight:700;fill:var(--ink)}
.graph .nsub{font-size:10.5px;fill:var(--ink-2)}
.graph .edge{fill:none;stroke:var(--ink-2);stroke-width:1.3}
.graph .edge.self{stroke-dasharray:4 3}
.graph .elabel{font-size:10.5px;fill:var(--ink-2);text-anchor:middle;paint-order:stroke;stroke:#fff;stroke-width:3px}
footer{padding:8px 28px 24px}
"""

JS = r"""
(function () {
  "use strict";
  var D = JSON.parse(document.getElementById("weir-data").textContent);
  var svg = document.getElementById("matrix");
  var scroller = document.getElementById("mscroll");
  var tip = document.getElementById("tip");
  var detail = document.getElementById("detail");
  var sel = document.getElementById("sel");
  var ORDER = D.order, G = D.glyph;
  var NAMES = {d: "done", s: "stale", f: "failed", m: "missing", w: "waiting", r: "running"};
  var byDay = D.jobs.map(function (job) {
    var m = {};
    job.cells.forEach(function (c) { m[c[0]] = c; });
    return m;
  });
  var decoded = {};
  var current = null;

  function pad(n, w) { n = String(Math.abs(n)); while (n.length < (w || 2)) { n = "0" + n; } return n; }
  function dayLabel(d) {
    var t = new Date(D.firstDay + "T00:00:00Z");
    t.setUTCDate(t.getUTCDate() + d);
    return t.getUTCFullYear() + "-" + pad(t.getUTCMonth() + 1) + "-" + pad(t.getUTCDate());
  }
  function isoLocal(sec, offMin) {
    var t = new Date((sec + offMin * 60) * 1000);
    var s = t.getUTCFullYear() + "-" + pad(t.getUTCMonth() + 1) + "-" + pad(t.getUTCDate()) + "T" +
      pad(t.getUTCHours()) + ":" + pad(t.getUTCMinutes());
    if (t.getUTCSeconds()) { s += ":" + pad(t.getUTCSeconds()); }
    return s + (offMin < 0 ? "-" : "+") + pad(Math.floor(Math.abs(offMin) / 60)) + ":" + pad(Math.abs(offMin) % 60);
  }
  function utcText(sec) {
    var t = new Date(sec * 1000);
    return t.getUTCFullYear() + "-" + pad(t.getUTCMonth() + 1) + "-" + pad(t.getUTCDate()) + " " +
      pad(t.getUTCHours()) + ":" + pad(t.getUTCMinutes()) + "Z";
  }
  function ago(sec) {
    var s = D.at - sec, neg = s < 0;
    s = Math.abs(s);
    var txt = s < 3600 ? Math.round(s / 60) + " min" : s < 86400 ? Math.floor(s / 3600) + " h" :
      Math.floor(s / 86400) + " d " + Math.floor((s % 86400) / 3600) + " h";
    return neg ? txt + " after the report's clock" : txt + " ago";
  }
  function num(n) { return n === null || n === undefined ? "" : n.toLocaleString("en-US"); }

  var B64 = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/", DIGIT = {};
  for (var b = 0; b < 64; b++) { DIGIT[B64.charAt(b)] = b; }
  function vlq(text) {
    var out = [], i = 0, n = (text || "").length;
    while (i < n) {
      var val = 0, scale = 1, c;
      do { c = DIGIT[text.charAt(i++)]; val += (c % 32) * scale; scale *= 32; } while (c >= 32 && i < n);
      out.push(val === 1 ? null : (val % 2 ? -(val - 1) / 2 : val / 2));
    }
    return out;
  }

  function decode(j) {
    if (decoded[j]) { return decoded[j]; }
    var w = D.jobs[j].w, n = w.n || 0, start = new Array(n), off = new Array(n), fin = new Array(n), extra = {};
    var deltas = vlq(w.fin), cs = vlq(w.cs), rw = vlq(w.rw), fp = atob(w.fp || "");
    var i = 0, t = w.t0, k, r;
    if (n) { start[0] = t; i = 1; }
    for (k = 0; k < (w.step || []).length; k++) {
      for (r = 0; r < w.step[k][1]; r++) { t += w.step[k][0]; start[i++] = t; }
    }
    i = 0;
    for (k = 0; k < (w.off || []).length; k++) {
      for (r = 0; r < w.off[k][1]; r++) { off[i++] = w.off[k][0]; }
    }
    var last = 0;
    for (i = 0; i < n; i++) {
      if (deltas[i] === null) { fin[i] = null; } else { last += deltas[i]; fin[i] = last; }
    }
    (w.x || []).forEach(function (e) { extra[e[0]] = e; });
    decoded[j] = {start: start, off: off, fin: fin, cs: cs, rw: rw, fp: fp, extra: extra};
    return decoded[j];
  }

  function countsText(c) {
    var parts = [];
    ORDER.forEach(function (s, k) { if (c[3 + k]) { parts.push(G[s] + " " + s + " " + c[3 + k]); } });
    if (c[3 + ORDER.length]) { parts.push(G.late + " late " + c[3 + ORDER.length]); }
    return parts;
  }

  function cellAt(ev) {
    var box = svg.getBoundingClientRect();
    var x = ev.clientX - box.left, y = ev.clientY - box.top - D.headH;
    if (y < 0) { return null; }
    var d = Math.floor(x / D.colW), j = Math.floor(y / D.rowH);
    if (j < 0 || j >= D.jobs.length || d < 0 || d >= D.days) { return null; }
    return {j: j, d: d, cell: byDay[j][d] || null};
  }

  function showTip(ev) {
    var hit = cellAt(ev);
    if (!hit) { tip.hidden = true; return; }
    var lines = [D.jobs[hit.j].name + " · " + dayLabel(hit.d) + " (" + D.zone + ")"];
    if (hit.cell) {
      lines.push(hit.cell[2] + " window" + (hit.cell[2] === 1 ? "" : "s") + ": " + countsText(hit.cell).join(", "));
    } else { lines.push("no due windows start on this day"); }
    tip.textContent = lines.join("\n");
    tip.hidden = false;
    var x = Math.min(ev.clientX + 14, window.innerWidth - tip.offsetWidth - 8);
    tip.style.left = x + "px";
    tip.style.top = (ev.clientY + 16) + "px";
  }

  function el(tag, text, cls) {
    var e = document.createElement(tag);
    if (text !== undefined && text !== null) { e.textContent = text; }
    if (cls) { e.className = cls; }
    return e;
  }

  function select(j, d) {
    if (j < 0 || j >= D.jobs.length || d < 0 || d >= D.days) { return; }
    current = {j: j, d: d};
    sel.setAttribute("x", d * D.colW);
    sel.setAttribute("y", D.headH + j * D.rowH);
    var job = D.jobs[j], cell = byDay[j][d] || null;
    detail.textContent = "";
    var h = el("h3", job.name + " · " + dayLabel(d) + " (" + D.zone + ")");
    detail.appendChild(h);
    if (!cell) {
      detail.appendChild(el("p", "No due windows of this job start on this day.", "muted"));
      return;
    }
    var cnt = el("p", cell[2] + " window" + (cell[2] === 1 ? "" : "s") + ": " + countsText(cell).join(", "), "cnt");
    cnt.setAttribute("data-job", job.name);
    cnt.setAttribute("data-day", dayLabel(d));
    ORDER.forEach(function (s, k) { cnt.setAttribute("data-" + s, cell[3 + k]); });
    cnt.setAttribute("data-late", cell[3 + ORDER.length]);
    detail.appendChild(cnt);
    var w = job.w, x = decode(j);
    var table = el("table"), thead = el("thead"), tr = el("tr");
    ["window (" + job.tz + ")", "state", "last run finished", "duration", "rows written", "fingerprint",
     "reason"].forEach(function (t) { tr.appendChild(el("th", t)); });
    thead.appendChild(tr);
    table.appendChild(thead);
    var body = el("tbody");
    for (var i = cell[1]; i < cell[1] + cell[2]; i++) {
      var code = w.s.charAt(i), late = code !== code.toLowerCase(), state = NAMES[code.toLowerCase()];
      var row = el("tr");
      row.className = "w-" + state;
      row.appendChild(el("td", isoLocal(x.start[i], x.off[i])));
      row.appendChild(el("td", G[state] + " " + state + (late ? " " + G.late + " late" : "")));
      row.appendChild(el("td", x.fin[i] === null ? "never" : utcText(x.fin[i]) + " (" + ago(x.fin[i]) + ")"));
      var cs = x.cs[i];
      row.appendChild(el("td", cs === null ? "" : cs < 1 ? "< 0.01 s" : (cs / 100).toFixed(cs < 100000 ? 2 : 0) + " s",
        "num"));
      var e = x.extra[i], rr = e && e[3] !== null && e[3] !== undefined ? num(e[3]) + " read" : "";
      row.appendChild(el("td", x.rw[i] === null ? rr : num(x.rw[i]) + (rr ? " (" + rr + ")" : ""), "num"));
      var fp = "";
      for (var k = i * D.fpBytes; k < (i + 1) * D.fpBytes && x.fin[i] !== null; k++) {
        fp += ("0" + x.fp.charCodeAt(k).toString(16)).slice(-2);
      }
      row.appendChild(el("td", fp));
      var why = el("td", e && e[1] >= 0 ? D.strings[e[1]] : "");
      if (e && e[2] >= 0) { why.appendChild(el("div", D.strings[e[2]], "err")); }
      row.appendChild(why);
      body.appendChild(row);
    }
    table.appendChild(body);
    detail.appendChild(table);
  }

  svg.addEventListener("mousemove", showTip);
  svg.addEventListener("mouseleave", function () { tip.hidden = true; });
  svg.addEventListener("click", function (ev) {
    var hit = cellAt(ev);
    if (hit) { select(hit.j, hit.d); svg.focus({preventScroll: true}); }
  });
  svg.addEventListener("keydown", function (ev) {
    var c = current || {j: 0, d: D.days - 1}, moves = {ArrowLeft: [0, -1], ArrowRight: [0, 1], ArrowUp: [-1, 0],
      ArrowDown: [1, 0]};
    var m = moves[ev.key];
    if (!m) { return; }
    ev.preventDefault();
    var j = Math.max(0, Math.min(D.jobs.length - 1, c.j + m[0])), d = Math.max(0, Math.min(D.days - 1, c.d + m[1]));
    select(j, d);
    var left = d * D.colW;
    if (left < scroller.scrollLeft || left + D.colW > scroller.scrollLeft + scroller.clientWidth) {
      scroller.scrollLeft = left - scroller.clientWidth / 2;
    }
  });
  scroller.scrollLeft = scroller.scrollWidth;

  window.weirReport = {
    select: select,
    vlq: vlq,
    cellCenter: function (jobName, day) {
      var j = -1;
      D.jobs.forEach(function (job, k) { if (job.name === jobName) { j = k; } });
      var d = Math.round((Date.parse(day + "T00:00:00Z") - Date.parse(D.firstDay + "T00:00:00Z")) / 86400000);
      if (j < 0 || d < 0 || d >= D.days) { return null; }
      scroller.scrollLeft = d * D.colW - scroller.clientWidth / 2;
      var box = svg.getBoundingClientRect(), y = box.top + D.headH + j * D.rowH;
      if (y < 0 || y + D.rowH > window.innerHeight) {
        window.scrollBy(0, y - window.innerHeight / 2);
        box = svg.getBoundingClientRect();
      }
      return {x: box.left + d * D.colW + D.colW / 2, y: box.top + D.headH + j * D.rowH + D.rowH / 2};
    }
  };
})();
"""
