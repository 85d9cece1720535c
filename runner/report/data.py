"""What the morning page shows, collected from one survey of the ledger and the input files.

`collect(ws, ledger, at)` reads (the survey, each window's last run, each
job's newest runs) and hands the frames to the shaping functions below, which
are pure: `reach` (the watermark), `problem_groups`, `strip` (a job's windows
on the shared time axis), `run_chart` and `encode_windows`.

The survey re-checks the input files of every window (as `weir stale` does),
so the page never calls a window done whose inputs changed long ago.

States are shown under weir's names: `STATE_NAMES` is the one table from the
planner's values to the words the page and the metrics use.

One module because the page's data model (`ReportData`, `JobView`) and the
functions that fill it are read together: each shaping function fills one
part of a `JobView`, in the order the page shows them.
"""

from __future__ import annotations

import shlex
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import TYPE_CHECKING, Any, cast
from zoneinfo import ZoneInfo

from runner.core.ranges import range_numbers
from runner.model.timeutil import format_instant, from_us, to_us
from runner.report.encoding import deltas, rle, vlq

if TYPE_CHECKING:
    import polars as pl

    from runner.core.windows import Cadence
    from runner.core.workspace import Workspace
    from runner.io.ledger.store import Ledger

# The planner's state values -> the names shown (page, metrics, --json counts). The only such table.
STATE_NAMES = {"missing": "ready"}
# Shown states, worst first: the order of the overview, the problems and the legend.
ORDER = ("failed", "stale", "waiting", "ready", "running", "done")
GLYPH = {"failed": "⊗", "stale": "◐", "waiting": "◌", "ready": "○", "running": "◉", "done": "●",
         "overdue": "▲", "late": "◇", "dropped": "▾"}
MEANING = {
    "failed": "its last run failed; the output it had before, if any, is kept",
    "stale": "ran, but its spec, code, inputs or producers changed since",
    "waiting": "due, but its input files or producer windows are not there yet",
    "ready": "due and never ran; its inputs are there, the next pulse runs it",
    "running": "a runner holds it right now",
    "done": "ran, and nothing it depends on has changed since",
    "overdue": "past its job's deadline and not done",
    "late": "its newest input arrived more than late_after after the window ended",
    "dropped": "its last run dropped rows that fell outside the window",
}
PENDING = ", pending its producers"  # the end of a stale kind whose producers must re-run first
STATE_CODE = {"done": "d", "stale": "s", "failed": "f", "ready": "r", "waiting": "w", "running": "u"}

STRIP_BUCKETS = 1200   # a job's timeline: this many slices of the shared time axis
CHART_BUCKETS = 300    # run charts: windows per slice summarized by median and spread
MAX_SPANS = 3          # contiguous ranges spelled out per problem (the rest are counted)
MAX_LISTED = 60_000    # newest windows per job whose last runs the page can list
ERROR_CHARS = 400      # longest error text carried per window


def shown(state: str) -> str:
    """The name the page uses for a planner state."""
    return STATE_NAMES.get(state, state)


def deadline_of(spec: Any) -> timedelta | None:
    """A job's deadline: how long after a window's end it should be done (None: the job sets none)."""
    value = getattr(spec, "deadline", None)
    return value if isinstance(value, timedelta) else None


# ---------------------------------------------------------------- the shapes


@dataclass
class Problem:
    """One job's windows in one state for one kind of reason, and what to run about them."""

    job: str
    state: str
    kind: str
    count: int
    first: str                 # the first window's id (local ISO 8601)
    last_end: str              # where the last one ends
    first_end_us: int
    ranges: int                # contiguous ranges the windows form
    spans: list[tuple[str, str, int]]
    example: str
    overdue: int = 0
    command: str | None = None
    explain: str | None = None
    note: str | None = None


@dataclass
class JobView:
    """What the page shows of one job."""

    index: int
    name: str
    cadence: str
    tz: str
    description: str | None
    output: str
    deadline: timedelta | None = None
    unplanned: str | None = None
    counts: dict[str, int] = field(default_factory=lambda: dict.fromkeys(ORDER, 0))
    total: int = 0
    late: int = 0
    overdue: int = 0
    overdue_by_us: int = 0           # how far past its deadline the oldest overdue window is
    first_start_us: int | None = None
    last_end_us: int | None = None   # end of the newest due window
    watermark_us: int | None = None  # completed windows reach this far without a gap (None: not the first)
    after: int = 0                   # due windows after the watermark
    behind: dict[str, int] = field(default_factory=dict)  # not-done windows behind the watermark, by state
    ended: bool = False              # the job has an end and its last window is due
    next_due: datetime | None = None
    dropped_rows: int = 0
    dropped_windows: int = 0
    last_success: str | None = None
    problems: list[Problem] = field(default_factory=list)
    strip: dict[str, Any] = field(default_factory=dict)
    chart: dict[str, Any] = field(default_factory=dict)
    windows: dict[str, Any] = field(default_factory=dict)
    unlisted: int = 0                # older windows whose runs the page does not list
    reads: list[tuple[str, str, str]] = field(default_factory=list)  # (input, producer, how)
    readers: list[str] = field(default_factory=list)


@dataclass
class ReportData:
    title: str
    at: datetime
    zone: ZoneInfo
    zone_note: str
    axis: tuple[int, int]             # the shared time axis, UTC epoch microseconds [a0, a1)
    jobs: list[JobView]
    next_change: datetime | None
    strings: list[str]
    assessed: dict[str, Any] = field(default_factory=dict)  # the survey behind it (for metrics)

    def totals(self) -> dict[str, int]:
        return {s: sum(v.counts.get(s, 0) for v in self.jobs) for s in ORDER}


class Strings:
    """A table of distinct texts (reasons, errors), referenced by index from the window arrays."""

    def __init__(self) -> None:
        self.items: list[str] = []
        self.index: dict[str, int] = {}

    def add(self, text: str | None) -> int:
        if not text:
            return -1
        text = clip(text)
        found = self.index.get(text)
        if found is None:
            found = self.index[text] = len(self.items)
            self.items.append(text)
        return found


def clip(text: str, limit: int = ERROR_CHARS) -> str:
    return text if len(text) <= limit else text[:limit] + " …"


def words(delta: timedelta) -> str:
    """A duration in plain words, two units at most: `37 d 22 h`, `5 h 10 min`, `40 s`."""
    s = int(abs(delta.total_seconds()))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min"
    if s < 86400:
        h, m = divmod(s // 60, 60)
        return f"{h} h {m} min" if m else f"{h} h"
    d, h = divmod(s // 3600, 24)
    return f"{d} d {h} h" if h else f"{d} d"


def axis_zone(ws: Workspace) -> tuple[ZoneInfo, str]:
    """The zone of the shared time axis: the jobs' own when they all share one, else UTC."""
    zones = sorted({ws.cadence(n).tz.key for n in ws.jobs})
    if len(zones) == 1:
        return ZoneInfo(zones[0]), f"Times are in {zones[0]}, the time zone of every job"
    if not zones:
        return ZoneInfo("UTC"), "Times are in UTC"
    return ZoneInfo("UTC"), f"Times are in UTC (the jobs use {len(zones)} time zones: {', '.join(zones)})"


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


def with_shown_states(frame: pl.DataFrame, at: datetime, deadline: timedelta | None) -> pl.DataFrame:
    """The assessed frame, oldest first, with shown state names, `has_output` and `overdue` columns.

    A window holds an output when it is done or stale, or when a failed or running
    one keeps the output of an earlier good run (the ledger keeps its path).
    """
    import polars as pl

    state = pl.col("state").replace(STATE_NAMES)
    out = frame.sort("start_us").with_columns(state.alias("state"))
    has = pl.col("state").is_in(["done", "stale"]) | pl.col("output").is_not_null()
    if deadline is None:
        overdue = pl.lit(False)
    else:
        limit = to_us(at) - int(deadline.total_seconds() * 1_000_000)
        overdue = (pl.col("state") != "done") & (pl.col("end_us") <= limit)
    return out.with_columns(has.alias("has_output"), overdue.alias("overdue"))


def reach(frame: pl.DataFrame) -> tuple[int | None, int]:
    """The watermark (the end of the longest run of windows, from the first, that all hold an output)
    and how many windows lie behind it. None when the first window holds none."""
    gaps = (~frame["has_output"]).arg_true()
    k = int(gaps[0]) if len(gaps) else frame.height
    return (int(frame["end_us"][k - 1]) if k else None), k


def _kind() -> Any:
    """Each window's kind of problem: its state and the gist of its reason ("" for done windows)."""
    import polars as pl

    head = pl.col("reason").fill_null("").str.split(":").list.first()
    return (
        pl.when(pl.col("state") == "stale")
        .then(pl.lit("stale by ") + pl.col("reasons").list.join(", ")
              + pl.when(pl.col("pending")).then(pl.lit(PENDING)).otherwise(pl.lit("")))
        .when((pl.col("state") == "waiting") & head.str.starts_with("waiting"))
        .then(head)
        .when(pl.col("state") == "waiting").then(pl.lit("waiting for ") + head)
        .when(pl.col("state") == "ready").then(pl.lit("ready to run"))
        .when(pl.col("state") == "done").then(pl.lit(""))
        .otherwise(pl.col("state"))
    )


def problem_groups(job: str, frame: pl.DataFrame, tz: ZoneInfo) -> list[Problem]:
    """The job's windows that are not done, as one Problem per kind (state and reason), oldest first.

    `frame` is `with_shown_states` output joined with the last runs (`run_error`).
    """
    import polars as pl

    if frame.height == 0:
        return []
    example = (pl.when(pl.col("run_error").is_not_null() & (pl.col("state") == "failed"))
               .then(pl.col("run_error")).otherwise(pl.col("reason")))
    f = frame.select("start_us", "end_us", "state", "overdue", example.alias("example"), _kind().alias("kind"))
    # a new range where the kind changes or the windows stop touching (done windows break ranges too)
    f = f.with_columns(range_numbers("kind").alias("range")).filter(pl.col("kind") != "")
    if f.height == 0:
        return []
    ranges = f.group_by("range", maintain_order=True).agg(
        pl.col("kind").first(), pl.col("state").first(), pl.col("start_us").first(), pl.col("end_us").last(),
        pl.col("end_us").first().alias("first_end"), pl.len().alias("n"), pl.col("example").first(),
        pl.col("overdue").sum())
    out = []
    for kind, part in ranges.group_by("kind", maintain_order=True):
        rows = part.rows(named=True)
        spans = [(format_instant(from_us(r["start_us"]), tz), format_instant(from_us(r["end_us"]), tz), r["n"])
                 for r in rows[:MAX_SPANS]]
        out.append(Problem(
            job=job, state=rows[0]["state"], kind=str(kind[0]), count=int(part["n"].sum()),
            first=spans[0][0], last_end=format_instant(from_us(rows[-1]["end_us"]), tz),
            first_end_us=int(rows[0]["first_end"]), ranges=len(rows), spans=spans,
            example=clip(next((r["example"] for r in rows if r["example"]), "") or ""),
            overdue=int(part["overdue"].sum())))
    return out


def strip(frame: pl.DataFrame, axis: tuple[int, int], buckets: int = STRIP_BUCKETS) -> dict[str, Any]:
    """A job's windows on the shared time axis, cut into `buckets` slices.

    Each window covers the slices from its start to its end; a slice shows the
    worst state among the windows starting in it. Returns `segs` ([first slice,
    last slice, state]: consecutive slices of one state merged) and the slices
    holding late and overdue windows.
    """
    import polars as pl

    if frame.height == 0:
        return {"segs": [], "late": [], "overdue": []}
    a0, a1 = axis
    span = max(a1 - a0, 1)
    rank = pl.col("state").replace_strict({s: i for i, s in enumerate(ORDER)}, default=len(ORDER) - 1,
                                          return_dtype=pl.Int64)
    b0 = ((pl.col("start_us") - a0) * buckets // span).clip(0, buckets - 1)
    b1 = ((pl.col("end_us") - a0) * buckets // span - 1).clip(0, buckets - 1)
    f = frame.select(b0.alias("b0"), b1.alias("b1"), rank.alias("rank"), "late", "overdue")
    f = f.with_columns(pl.max_horizontal("b0", "b1").alias("b1"))
    per = f.group_by("b0").agg(pl.col("rank").min(), pl.col("b1").max(), pl.col("late").any(),
                               pl.col("overdue").any()).sort("b0")
    per = per.with_columns(
        ((pl.col("rank") != pl.col("rank").shift(1)) | (pl.col("b0") > pl.col("b1").shift(1) + 1))
        .fill_null(True).cum_sum().alias("seg"))
    segs = per.group_by("seg", maintain_order=True).agg(pl.col("b0").first(), pl.col("b1").max(),
                                                        pl.col("rank").first())
    return {
        "segs": [[a, b, ORDER[r]] for a, b, r in segs.select("b0", "b1", "rank").iter_rows()],
        "late": per.filter(pl.col("late"))["b0"].to_list(),
        "overdue": per.filter(pl.col("overdue"))["b0"].to_list(),
    }


def run_chart(frame: pl.DataFrame, column: str, axis: tuple[int, int],
              buckets: int = CHART_BUCKETS) -> dict[str, Any]:
    """One figure of the windows' last runs over time: per slice of the axis its 10th, 50th and 90th
    percentile and its highest value, and over all windows the median, the 90th percentile and the
    highest with its window."""
    import polars as pl

    f = frame.filter(pl.col(column).is_not_null())
    if f.height == 0:
        return {"n": 0}
    a0, a1 = axis
    span = max(a1 - a0, 1)
    b = ((pl.col("start_us") - a0) * buckets // span).clip(0, buckets - 1).alias("b")
    v = pl.col(column).cast(pl.Float64)
    per = f.group_by(b).agg(v.quantile(0.1, "nearest").alias("lo"), v.median().alias("mid"),
                            v.quantile(0.9, "nearest").alias("hi"), v.max().alias("top"),
                            pl.len().alias("n")).sort("b")
    top = f.sort(column, descending=True).row(0, named=True)
    values = f[column].cast(pl.Float64)
    return {
        "n": f.height, "buckets": buckets,
        "points": [[int(r[0]), *(float(x) for x in r[1:5]), int(r[5])] for r in per.iter_rows()],
        "median": float(cast(float, values.median()) or 0), "p90": float(cast(float, values.quantile(0.9, "nearest")) or 0),
        "max": float(top[column]), "max_window": top["window"],
        "min_positive": float(cast(float, values.filter(values > 0).min()) or 0) if (values > 0).any() else 0.0,
    }


def encode_windows(frame: pl.DataFrame, strings: Strings) -> dict[str, Any]:
    """Per-window columns for the page's window list, compact (see `runner.report.encoding`).

    `s`: a state code per window (upper case: late); `cs`: the last run's duration in
    centiseconds; `rw`: rows written; `fin`: the last run's finish (Unix seconds), each
    minus the previous one; `x`: [index, reason, error, rows read, rows dropped] for the
    windows not done or that dropped rows.
    """
    import polars as pl

    if frame.height == 0:
        return {"n": 0}
    starts = (frame["start_us"] // 1_000_000).to_list()
    ends = (frame["end_us"] // 1_000_000).to_list()
    steps = [b - a for a, b in zip(starts, starts[1:], strict=False)]
    codes = frame.select(pl.col("state").replace_strict(STATE_CODE, default="d"), "late").iter_rows()
    finished = frame.select(
        pl.col("run_finished_at").str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", time_zone="UTC", strict=False)
        .dt.epoch("s"))[:, 0].to_list()
    extras = []
    notable = frame.with_row_index("i").filter(
        (pl.col("state") != "done") | (pl.col("run_rows_dropped").fill_null(0) > 0))
    for i, st, reason, error, read, dropped in notable.select(
            "i", "state", "reason", "run_error", "run_rows_read", "run_rows_dropped").iter_rows():
        extras.append([i, strings.add(reason), strings.add(error if st == "failed" else None), read,
                       dropped or 0])
    return {
        "n": frame.height, "t0": starts[0], "step": rle(steps),
        "len": rle([e - s for s, e in zip(starts, ends, strict=True)]),
        "off": rle(frame["offset_min"].to_list()),
        "s": "".join(c.upper() if late else c for c, late in codes),
        "cs": vlq(frame.select((pl.col("seconds") * 100).round())[:, 0]),
        "rw": vlq(frame["run_rows_written"]),
        "fin": vlq(pl.Series(deltas(finished), dtype=pl.Int64)),
        "x": extras,
    }


# ---------------------------------------------------------------- reading


def window_runs(ledger: Ledger, job: str) -> pl.DataFrame:
    """Each window's last finished run (the run its state row points at): the figures the page
    shows that the survey does not bring. One query."""
    import polars as pl
    import sqlalchemy as sa

    from runner.io.ledger.schema import runs, windows

    schema = {"run_id": pl.Int64, "run_finished_at": pl.String, "run_rows_read": pl.Int64,
              "run_rows_dropped": pl.Int64, "run_rows_written": pl.Int64, "run_error": pl.String}
    if ledger.engine is None:
        return pl.DataFrame(schema=schema)
    q = (sa.select(runs.c.id, runs.c.finished_at, runs.c.rows_read, runs.c.rows_dropped, runs.c.rows_written,
                   runs.c.error)
         .select_from(windows.join(runs, runs.c.id == windows.c.run_id)).where(windows.c.job == job))
    with ledger.engine.connect() as conn:
        rows = conn.execute(q).cursor.fetchall()
    return pl.DataFrame(rows, schema=schema, orient="row")


def _local_offsets(frame: pl.DataFrame, tz: str) -> pl.DataFrame:
    import polars as pl

    utc = pl.from_epoch(pl.col("start_us"), time_unit="us").dt.replace_time_zone("UTC")
    return frame.with_columns(
        (utc.dt.convert_time_zone(tz).dt.replace_time_zone(None) - utc.dt.replace_time_zone(None))
        .dt.total_minutes().cast(pl.Int64).alias("offset_min"))


def time_axis(frames: dict[str, pl.DataFrame], at: datetime, open_ended: bool) -> tuple[int, int]:
    """The shared time axis: from the first due window of any job to the clock (to the last window's
    end once every job has ended)."""
    firsts = [int(cast(int, f["start_us"].min())) for f in frames.values() if f.height]
    lasts = [int(cast(int, f["end_us"].max())) for f in frames.values() if f.height]
    now = to_us(at)
    if not firsts:
        return now - 86_400_000_000, now
    a0 = min(firsts)
    a1 = max(now, *lasts) if open_ended else max(lasts)
    return a0, max(a1, a0 + 3_600_000_000)


def job_view(ws: Workspace, index: int, name: str) -> JobView:
    from runner.model.spec import JobInput

    spec = ws.jobs[name].spec
    cad = ws.cadence(name)
    out = spec.output
    view = JobView(index=index, name=name, cadence=cad.describe(), tz=cad.tz.key, description=spec.description,
                   output=out.path if out.path is not None else f"table {out.table}", deadline=deadline_of(spec))
    for input_name, source in spec.inputs.items():
        if isinstance(source, JobInput):
            how = (f"lag {source.lag}" if source.lag else "lookback") if source.job == name else ""
            view.reads.append((input_name, source.job, how))
    view.readers = [n for n in ws.order if n != name and any(
        isinstance(s, JobInput) and s.job == name for s in ws.jobs[n].spec.inputs.values())]
    return view


def shape_job(view: JobView, frame: pl.DataFrame, runs: pl.DataFrame, cad: Cadence, at: datetime,
              axis: tuple[int, int], strings: Strings) -> None:
    """Fill `view` from the job's assessed frame and its windows' last runs."""
    import polars as pl

    frame = with_shown_states(frame, at, view.deadline)
    frame = frame.join(runs, on="run_id", how="left", maintain_order="left")
    for state, n in frame.group_by("state").len().iter_rows():
        view.counts[state] = n
    view.total = frame.height
    view.late = int(frame["late"].sum()) if frame.height else 0
    view.next_due = next_due(cad, at)
    view.ended = cad.end is not None and view.next_due is None
    if frame.height:
        view.first_start_us = int(frame["start_us"][0])
        view.last_end_us = int(frame["end_us"][-1])
    view.watermark_us, k = reach(frame)
    view.after = frame.height - k
    behind = frame.head(k).filter(pl.col("state") != "done")
    view.behind = {s: n for s, n in behind.group_by("state").len().sort("state").iter_rows()}
    overdue = frame.filter(pl.col("overdue"))
    view.overdue = overdue.height
    if overdue.height and view.deadline is not None:
        view.overdue_by_us = to_us(at) - int(overdue["end_us"][0]) - int(view.deadline.total_seconds() * 1e6)
    dropped = frame["run_rows_dropped"].fill_null(0)
    view.dropped_rows = int(dropped.sum())
    view.dropped_windows = int((dropped > 0).sum())
    view.problems = problem_groups(view.name, frame, cad.tz)
    view.strip = strip(frame, axis)
    view.chart = {"seconds": run_chart(frame, "seconds", axis),
                  "rows": run_chart(frame.rename({"run_rows_written": "rows"}), "rows", axis)}
    listed = frame.tail(MAX_LISTED)
    view.unlisted = frame.height - listed.height
    view.windows = encode_windows(_local_offsets(listed, cad.tz.key), strings)


def link_commands(views: list[JobView]) -> None:
    """The command for each problem: one per job and kind, ready to paste.

    Failed, stale and ready windows are run again with `weir backfill` over
    their whole span (windows already current in it are skipped); a job whose
    readers wait for it or are stale pending it gets `--downstream`, and their
    own problems point at it. Windows waiting for input files have nothing to
    run: `weir why` says what they wait for.
    """
    by_name = {v.name: v for v in views}
    follows: dict[str, list[str]] = {}  # reader -> producers whose fix it waits for
    for v in views:
        for p in v.problems:
            if p.state == "waiting" and p.kind.startswith("waiting for ") and p.kind[12:] in by_name:
                follows.setdefault(v.name, []).append(p.kind[12:])
            elif p.state == "stale" and p.kind.endswith(PENDING):
                follows.setdefault(v.name, []).extend(
                    producer for _, producer, _ in v.reads if producer != v.name and by_name[producer].problems)
    downstream = {producer for producers in follows.values() for producer in producers}
    for v in views:
        for p in v.problems:
            p.explain = shlex.join(["weir", "why", v.name, p.first])
            upstream = sorted(set(follows.get(v.name, [])) - {v.name})
            if p.state in ("failed", "ready") or (p.state == "stale" and not p.kind.endswith(PENDING)):
                args = ["weir", "backfill", v.name, "--from", p.first, "--to", p.last_end]
                if v.name in downstream:
                    args.append("--downstream")
                p.command = shlex.join(args)
                if p.state == "failed":
                    p.note = "fix the cause first (see the error), then run it again"
            elif p.state == "stale" or (p.state == "waiting" and upstream and p.kind[12:] in upstream):
                names = upstream if p.state == "stale" else [p.kind[12:]]
                if names:
                    p.note = ("runs once " + " and ".join(names) + " is fixed: its command above runs this job "
                              "too (--downstream)")
                elif any(producer == v.name for _, producer, _ in v.reads):
                    p.note = "carries forward from its own earlier windows: run it after fixing those"
                    p.command = shlex.join(["weir", "backfill", v.name, "--from", p.first, "--to", p.last_end])
                else:
                    p.command = shlex.join(["weir", "backfill", v.name, "--from", p.first, "--to", p.last_end])
            elif p.kind == "waiting for itself":
                p.note = "carries forward from its own earlier windows: runs once they are done"
            elif p.state == "waiting":
                p.note = "nothing to run until the input arrives; weir why says which files it waits for"
            elif p.state == "running":
                p.note = "a runner holds it right now; nothing to do"


def collect(ws: Workspace, ledger: Ledger, at: datetime) -> ReportData:
    """Survey the ledger and every window's inputs once and shape everything the page shows."""
    from runner.core.planner import next_change
    from runner.engine.survey import survey

    assessed = survey(ws, ledger, at, None, recheck_all=True, extras=True)
    zone, zone_note = axis_zone(ws)
    upcoming = next_change(ws, assessed, at)
    axis = time_axis(assessed, at, upcoming is not None)
    newest = ledger.newest_runs()
    strings = Strings()
    views = []
    unplanned = getattr(assessed, "unplanned", {})
    for i, name in enumerate(ws.order):
        view = job_view(ws, i, name)
        view.last_success = newest.get(name, {}).get("success")
        if name in assessed:
            shape_job(view, assessed[name], window_runs(ledger, name), ws.cadence(name), at, axis, strings)
        else:
            view.unplanned = unplanned.get(name, "not planned")
        views.append(view)
    link_commands(views)
    return ReportData(title=ws.root.name, at=at, zone=zone, zone_note=zone_note, axis=axis, jobs=views,
                      next_change=upcoming, strings=strings.items, assessed=assessed)
