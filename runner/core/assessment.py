"""Assessing windows: each window's state (done, stale, failed, running, waiting, missing) and why.

A pure function of the job specs (a loaded workspace), a ledger snapshot read
once (`Snapshot`), what the file system says of each window's inputs (an
`InputProbe`, supplied by `runner.engine.survey`) and the clock. One polars
frame per job, one row per window. What to run from it: `runner.core.planner`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

from runner.core import fingerprints as fp
from runner.core.states import State
from runner.core.windows import Cadence, Window
from runner.core.workspace import Workspace
from runner.model.spec import FileInput, JobInput
from runner.model.timeutil import format_instant, from_us, parse_utc, to_us

if TYPE_CHECKING:
    import polars as pl



@dataclass
class Snapshot:
    """The ledger, read once: window state rows per job and the live claims."""

    states: Mapping[str, Any]  # job -> its state rows (read ahead, so a mapping that may wait)
    claims: set[tuple[str, str]] = field(default_factory=set)


@dataclass(frozen=True)
class Probe:
    """What the file system says of one window's inputs now."""

    input_hash: str | None
    newest_mtime_ns: int | None
    waiting: str | None


InputProbe = Callable[[str, Window], Probe]


def _pairs(consumer: pl.DataFrame, ccad: Cadence, pcad: Cadence, source: JobInput, same_job: bool
           ) -> pl.DataFrame:
    """(window_key, producer_key, producer_end_us) for every producer window each consumer window reads."""
    import polars as pl

    starts, ends = consumer["start_us"], consumer["end_us"]
    if source.lag is not None:
        lo, hi = starts.shift(source.lag), ends.shift(source.lag)
    elif source.lookback is not None:
        back = int(source.lookback.total_seconds() * 1_000_000)
        lo, hi = starts - back, (starts if same_job else ends)
    else:
        lo, hi = starts, ends
    pstart = to_us(pcad.start)
    frame = pl.DataFrame({"window_key": consumer["window_key"], "lo": lo, "hi": hi}).with_columns(
        pl.max_horizontal(pl.col("lo"), pl.lit(pstart)).alias("lo"))
    frame = frame.filter(pl.col("lo").is_not_null() & (pl.col("hi") > pl.col("lo")))
    empty = pl.DataFrame(schema={"window_key": pl.String, "producer_key": pl.String, "producer_end_us": pl.Int64})
    if frame.height == 0:
        return empty
    first = pcad.window_at(from_us(frame.select(pl.col("lo").min()).item()))
    pspan = pcad.span(first.start if first is not None else pcad.start, from_us(frame.select(pl.col("hi").max()).item()))
    if len(pspan) == 0:
        return empty
    pends, pstarts = pspan.ends_us, pspan.starts_us
    frame = frame.with_columns(
        pends.search_sorted(frame["lo"], side="right").alias("i0"),
        pstarts.search_sorted(frame["hi"], side="left").alias("i1"),
    ).filter(pl.col("i1") > pl.col("i0"))
    keys = pl.DataFrame({"idx": pl.int_range(0, len(pspan), eager=True, dtype=pl.Int64),
                         "producer_key": pspan.keys(), "producer_end_us": pends})
    return (frame.select("window_key", pl.int_ranges("i0", "i1", dtype=pl.Int64).alias("idx"))
            .explode("idx").join(keys, on="idx", how="inner").select("window_key", "producer_key", "producer_end_us"))


def _upstream(ws: Workspace, job: str, frame: pl.DataFrame, snapshot: Snapshot,
              assessed: dict[str, pl.DataFrame]) -> pl.DataFrame:
    """Per window: current upstream hash, whether all producers are done, and whether all are current."""
    import polars as pl

    ccad = ws.cadence(job)
    parts = []
    for name, source in ws.jobs[job].spec.inputs.items():
        if not isinstance(source, JobInput):
            continue
        same = source.job == job
        pairs = _pairs(frame, ccad, ws.cadence(source.job), source, same)
        recorded = snapshot.states.get(source.job)
        rec = (recorded.select(pl.col("window_key").alias("producer_key"), pl.col("state").alias("p_state"),
                               pl.col("output_digest").alias("p_digest"))
               if recorded is not None and recorded.height else
               pl.DataFrame(schema={"producer_key": pl.String, "p_state": pl.String, "p_digest": pl.String}))
        lazy = pairs.lazy().join(rec.lazy(), on="producer_key", how="left")
        if same:
            current = frame.lazy().select(pl.col("window_key").alias("producer_key"),
                                          (pl.col("state") == State.DONE).alias("p_current"))
        else:
            a = assessed.get(source.job)
            current = (a.lazy().select(pl.col("window_key").alias("producer_key"),
                                       ((pl.col("state") == State.DONE) & ~pl.col("pending")).alias("p_current"))
                       if a is not None else
                       pl.LazyFrame(schema={"producer_key": pl.String, "p_current": pl.Boolean}))
        lazy = lazy.join(current, on="producer_key", how="left").with_columns(
            pl.lit(name).alias("input"), pl.lit(source.job).alias("job"),
            pl.col("p_current").fill_null(False))
        parts.append(lazy)
    if not parts:
        return frame.select("window_key").with_columns(
            pl.lit(fp.upstream_part([]).hash).alias("up_hash"), pl.lit(True).alias("up_ready"),
            pl.lit(True).alias("up_current"), pl.lit(None, dtype=pl.String).alias("up_waiting"))
    # the exact canonical JSON that fingerprint.upstream_part hashes
    digest_json = pl.when(pl.col("p_digest").is_null()).then(pl.lit("null")).otherwise(
        pl.lit('"') + pl.col("p_digest") + pl.lit('"'))
    linked = pl.concat(parts).with_columns((
        pl.lit('{"digest":') + digest_json + pl.lit(',"input":"') + pl.col("input") + pl.lit('","job":"')
        + pl.col("job") + pl.lit('","window":"') + pl.col("producer_key") + pl.lit('"}')).alias("entry"))
    linked = linked.sort("window_key", "input", "job", "producer_key")
    grouped = linked.group_by("window_key", maintain_order=True).agg(
        pl.col("entry").str.join(",").alias("text"),
        (pl.col("p_state") == State.DONE).fill_null(False).all().alias("up_ready"),
        pl.col("p_current").all().alias("up_current"),
        pl.col("producer_key").filter((pl.col("p_state") != State.DONE) | pl.col("p_state").is_null()).first()
        .alias("first_missing"),
        pl.col("job").filter((pl.col("p_state") != State.DONE) | pl.col("p_state").is_null()).first()
        .alias("first_missing_job"),
        (pl.col("producer_key").filter((pl.col("p_state") != State.DONE) | pl.col("p_state").is_null()).len())
        .alias("missing_count"),
        pl.len().alias("count"),
    ).collect()
    texts = grouped["text"].to_list()
    hashes = [fp.digest("[" + t + "]") for t in texts]
    grouped = grouped.with_columns(pl.Series("up_hash", hashes, dtype=pl.String))
    out = frame.select("window_key").join(grouped, on="window_key", how="left").with_columns(
        pl.col("up_hash").fill_null(fp.upstream_part([]).hash),
        pl.col("up_ready").fill_null(True),
        pl.col("up_current").fill_null(True),
    )
    # messages only for the windows that wait (few), not a Python loop over every window
    blocked = out.filter(~pl.col("up_ready") & pl.col("first_missing").is_not_null())
    waiting = {
        key: f"waiting for {'itself' if pj == job else pj}: {n} of {c} producer window(s) not done "
             f"(first {format_instant(parse_utc(first), ws.cadence(pj).tz)})"
        for key, first, pj, n, c in blocked.select("window_key", "first_missing", "first_missing_job",
                                                   "missing_count", "count").iter_rows()
    }
    messages = pl.DataFrame({"window_key": list(waiting), "up_waiting": list(waiting.values())},
                            schema={"window_key": pl.String, "up_waiting": pl.String})
    return out.select("window_key", "up_hash", "up_ready", "up_current").join(
        messages, on="window_key", how="left", maintain_order="left")


def assess_job(ws: Workspace, job: str, at: datetime, snapshot: Snapshot, probe: InputProbe | None,
               recheck_all: bool, assessed: dict[str, pl.DataFrame]) -> pl.DataFrame:
    """Every due window of `job` with its state, reasons and flags (one row per window).

    Columns: window, window_key, start_us, end_us, state, reasons (list), pending,
    due (needs running now), late, failures, seconds, ingested_at, reason (text).
    `probe` reads inputs for windows inside the job's recheck horizon (every window
    with `recheck_all`) and for windows that have never run; None skips input checks.
    """
    import polars as pl

    spec = ws.jobs[job].spec
    cad = ws.cadence(job)
    span = cad.due(at)
    frame = span.frame()
    states = snapshot.states.get(job)
    if states is not None and states.height:
        frame = frame.join(states, on="window_key", how="left")
    missing = [pl.lit(None, dtype=dtype).alias(name) for name, dtype in _state_columns().items()
               if name not in frame.columns and name != "failures"]  # columns a snapshot may leave out
    failures = pl.col("failures").fill_null(0) if "failures" in frame.columns else pl.lit(0, dtype=pl.Int64)
    frame = frame.with_columns(*missing, failures.alias("failures"))
    up = _upstream(ws, job, frame, snapshot, assessed)
    frame = frame.join(up, on="window_key", how="left")
    # inputs: probed where cheap enough to matter
    horizon = to_us(at - spec.recheck)
    has_files = any(isinstance(s, FileInput) for s in spec.inputs.values())
    need = (pl.lit(True) if recheck_all else
            (pl.col("end_us") >= horizon) | pl.col("state").is_null() | (pl.col("state") == State.FAILED))
    probed = pl.DataFrame(schema={"in_hash": pl.String, "in_newest": pl.Int64, "in_waiting": pl.String})
    rows = pl.Series("i", [], dtype=pl.UInt32)
    if probe is not None and has_files:
        # with_columns, not select: a bare literal (recheck_all) would select one row, not one per window
        rows = frame.with_columns(need.alias("_need"))["_need"].arg_true()
        starts = frame["start_us"].gather(rows).to_list()
        ends = frame["end_us"].gather(rows).to_list()
        many = getattr(probe, "many", None)
        if many is not None:  # a batch of windows as arrays: no Window object per window
            results = many(job, cad.tz, starts, ends)
        else:
            results = [probe(job, Window(from_us(a), from_us(b), cad.tz)) for a, b in zip(starts, ends, strict=True)]
        if isinstance(results, list):
            probed = pl.DataFrame({"in_hash": [r.input_hash for r in results],
                                   "in_newest": [r.newest_mtime_ns for r in results],
                                   "in_waiting": [r.waiting for r in results]}, schema=probed.schema)
        else:
            probed = results
    # the probed rows back in place; windows not probed get nulls
    frame = frame.with_row_index("_i").join(
        probed.with_columns(rows.alias("_i")), on="_i", how="left", maintain_order="left").drop("_i")
    frame = frame.with_columns(
        (pl.col("window_key").is_in(
            pl.Series([k for j, k in snapshot.claims if j == job], dtype=pl.String).implode()))
        .alias("running"),
    )
    query = frame.lazy()  # from here on one query, collected once at the end
    done = pl.col("state") == State.DONE
    changed = [
        pl.when(done & ~pl.col("spec_ok")).then(pl.lit("spec")),
        pl.when(done & ~pl.col("code_ok")).then(pl.lit("code")),
        pl.when(done & pl.col("in_hash").is_not_null() & (pl.col("fp_input") != pl.col("in_hash")))
        .then(pl.lit("input")),
        pl.when(done & (pl.col("fp_upstream") != pl.col("up_hash")) & pl.col("up_ready")).then(pl.lit("upstream")),
        pl.when(done & pl.col("output_state").is_not_null()).then(pl.lit("output")),
    ]
    query = query.with_columns(pl.concat_list(changed).list.drop_nulls().alias("reasons"))
    self_chain = any(isinstance(s, JobInput) and s.job == job for s in spec.inputs.values())
    query = query.with_columns((~pl.col("up_current")).alias("pending"))
    if self_chain:
        not_current = (pl.col("state") != State.DONE) | pl.col("state").is_null() | (pl.col("reasons").list.len() > 0)
        query = query.with_columns(
            (pl.col("pending") | not_current.cast(pl.Int8).cum_max().shift(1, fill_value=0).cast(pl.Boolean))
            .alias("pending"))
    # a done window whose producers are not current is stale by upstream, pending their re-run
    query = query.with_columns(
        pl.when(done & pl.col("pending") & ~pl.col("reasons").list.contains("upstream"))
        .then(pl.concat_list("reasons", pl.lit(["upstream"])))
        .otherwise(pl.col("reasons")).alias("reasons"))
    # failed windows: retries left, backoff elapsed, or changed since the failure
    retries = spec.retries
    delay_us = int(spec.retry_delay.total_seconds() * 1_000_000)
    power = (pl.col("failures") - 1).clip(0, 30)
    retry_at = (pl.col("finished_at").str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", time_unit="us", time_zone="UTC",
                                                      strict=False)
                + pl.duration(microseconds=pl.lit(delay_us, dtype=pl.Int64) * pl.lit(2, dtype=pl.Int64).pow(power)))
    query = query.with_columns(
        pl.when(pl.col("failures") > 0).then(retry_at).alias("_retry_at"),
    ).with_columns(pl.col("_retry_at").dt.strftime("%Y-%m-%dT%H:%M:%S%.6fZ").alias("retry_at"))
    late_after = spec.late_after
    if late_after is not None:
        late_us = int(late_after.total_seconds() * 1_000_000)
        ingested_us = pl.col("ingested_at").str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", time_zone="UTC",
                                                            strict=False).dt.epoch("us")
        newest_us = pl.col("in_newest") // 1000
        query = query.with_columns(
            ((pl.coalesce(newest_us, ingested_us) - pl.col("end_us")) > late_us).fill_null(False).alias("late"))
    else:
        query = query.with_columns(pl.lit(False).alias("late"))
    state = (
        pl.when(pl.col("running")).then(pl.lit(State.RUNNING))
        .when(pl.col("state").is_null() & (pl.col("in_waiting").is_not_null() | ~pl.col("up_ready")))
        .then(pl.lit(State.WAITING))
        .when(pl.col("state").is_null()).then(pl.lit(State.MISSING))
        .when(pl.col("state") == State.FAILED).then(pl.lit(State.FAILED))
        .when(pl.col("reasons").list.len() > 0).then(pl.lit(State.STALE))
        .otherwise(pl.lit(State.DONE))
    )
    query = query.with_columns(state.alias("state_now"))
    retry_left = pl.col("failures") <= retries
    backoff_ok = pl.col("_retry_at").is_null() | (pl.col("_retry_at") <= pl.lit(at))
    failed_due = (pl.col("state_now") == State.FAILED) & pl.col("in_waiting").is_null() & pl.col("up_ready") & (
        retry_left & backoff_ok)
    due = (pl.col("state_now") == State.MISSING) | failed_due | (
        (pl.col("state_now") == State.STALE) & pl.col("up_ready") & ~pl.col("pending"))
    query = query.with_columns(due.alias("due"))
    reason = (
        pl.when(pl.col("state_now") == State.RUNNING).then(pl.lit("running in another process"))
        .when(pl.col("state_now") == State.WAITING).then(pl.coalesce("in_waiting", "up_waiting"))
        .when(pl.col("state_now") == State.MISSING).then(pl.lit("never ran"))
        .when((pl.col("state_now") == State.FAILED) & pl.col("due"))
        .then(pl.format("failed {} time(s); retry {} of {}", "failures", "failures", pl.lit(retries)))
        .when((pl.col("state_now") == State.FAILED) & retry_left & ~backoff_ok)
        .then(pl.format("failed; next retry after {}", "retry_at"))
        .when(pl.col("state_now") == State.FAILED)
        .then(pl.format("failed {} time(s); no retries left (weir backfill retries it)", "failures"))
        .when(pl.col("state_now") == State.STALE)
        .then(pl.lit("stale by ") + pl.col("reasons").list.join(", ")
              + pl.when(pl.col("pending")).then(pl.lit(" (pending upstream: may stay current once producers re-run)"))
              .otherwise(pl.lit("")))
        .otherwise(pl.lit(""))
    )
    query = query.with_columns(reason.alias("reason"))
    return query.select(
        "window", "window_key", "start_us", "end_us", pl.col("state_now").alias("state"), "reasons", "pending",
        "due", "late", "failures", "seconds", "ingested_at", "reason", "output", "output_digest", "run_id",
        "in_newest", pl.when((pl.col("state_now") == State.FAILED) & retry_left).then(pl.col("retry_at"))
        .alias("retry_at"),
    ).collect()


def _state_columns() -> dict[str, Any]:
    """The window-state columns the assessment reads, with their types (a snapshot may omit some)."""
    import polars as pl

    return {
        "state": pl.String, "failures": pl.Int64, "run_id": pl.Int64, "output_state": pl.String,
        "spec_ok": pl.Boolean, "code_ok": pl.Boolean, "fp_input": pl.String, "fp_upstream": pl.String,
        "finished_at": pl.String, "last_fingerprint": pl.String, "output_digest": pl.String,
        "ingested_at": pl.String, "output": pl.String, "seconds": pl.Float64,
    }


def parse_run_time(text: str) -> datetime:
    """A ledger run time (`...%fZ`) as an aware datetime."""
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)


class Assessment(dict[str, "pl.DataFrame"]):
    """Job -> assessed frame, in dependency order, plus the jobs that could not be planned.

    `unplanned` maps a job to why it could not be assessed: an error of its own,
    or a producer that could not be assessed. Those jobs are left out of the
    mapping, so one broken job never stops the planning of the others.
    """

    def __init__(self, frames: dict[str, pl.DataFrame] | None = None,
                 unplanned: dict[str, str] | None = None):
        super().__init__(frames or {})
        self.unplanned: dict[str, str] = dict(unplanned or {})


def assess(ws: Workspace, at: datetime, snapshot: Snapshot, probe: InputProbe | None, jobs: list[str] | None = None,
           recheck_all: bool = False) -> Assessment:
    """Assess every due window of `jobs` (and, for the upstream cascade, their producers).

    A job whose assessment raises is reported in `unplanned` with the error, and so
    is every job reading it (directly or not); the other jobs are assessed as usual.
    """

    wanted = ws.select(jobs or [])
    needed = set(ws.upstream(wanted))
    assessed: dict[str, pl.DataFrame] = {}
    unplanned: dict[str, str] = {}
    for name in ws.order:
        if name not in needed:
            continue
        broken = [p for p in ws.producers(name) if p in unplanned and p != name]
        if broken:
            unplanned[name] = f"its producer {broken[0]} could not be planned"
            continue
        try:
            assessed[name] = assess_job(ws, name, at, snapshot, probe, recheck_all, assessed)
        except Exception as exc:  # noqa: BLE001 - one job's failure must not stop the others
            unplanned[name] = f"{type(exc).__name__}: {exc}"
    chosen = set(wanted)
    return Assessment({n: assessed[n] for n in ws.order if n in chosen and n in assessed},
                      {n: why for n, why in unplanned.items() if n in chosen})
