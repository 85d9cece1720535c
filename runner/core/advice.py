"""Advice on window sizes, from what the ledger recorded. Pure functions of run figures.

Per job: rows and seconds per window (median and 95th percentile), and the
share of each run spent outside the steps (claiming, fingerprinting, the
ledger): the overhead. Windows that are too small spend most of their time
in overhead: a coarser cadence does the same work with fewer runs. Windows
that are too large show long tails or take long: a finer cadence, or
splitting the work by a low-cardinality column (date, category, method),
keeps each run short and bounded in memory.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from runner.core.sqlcheck import aliases, groupings
from runner.core.states import RunStatus
from runner.errors import Problem
from runner.model.spec import Job, SqlStep

if TYPE_CHECKING:
    import polars as pl

# Thresholds (chosen here, not taken from elsewhere): overhead above half of a
# run's time on runs under a second; a p95 over 5x the median; runs over 15 minutes.
OVERHEAD_SHARE = 0.5
SMALL_RUN_SECONDS = 1.0
TAIL_RATIO = 5.0
LONG_RUN_SECONDS = 15 * 60
MIN_RUNS = 5


@dataclass
class JobAdvice:
    job: str
    runs: int
    rows_median: float | None = None
    rows_p95: float | None = None
    seconds_median: float | None = None
    seconds_p95: float | None = None
    overhead_share: float | None = None
    suggestions: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


def advise_job(job: str, cadence: str, stats: pl.DataFrame) -> JobAdvice:
    """Advice for one job from its finished runs (columns seconds, step_seconds, rows_written, status)."""
    import polars as pl

    done = stats.filter(pl.col("status") == RunStatus.DONE)
    advice = JobAdvice(job, done.height)
    if done.height == 0:
        advice.suggestions.append("no finished runs yet: nothing to judge")
        return advice
    figures = done.select(
        pl.col("rows_written").median().alias("rows_median"),
        pl.col("rows_written").quantile(0.95, "nearest").alias("rows_p95"),
        pl.col("seconds").median().alias("seconds_median"),
        pl.col("seconds").quantile(0.95, "nearest").alias("seconds_p95"),
        ((pl.col("seconds") - pl.col("step_seconds").fill_null(0)).clip(0) / pl.col("seconds"))
        .median().alias("overhead_share"),
    ).row(0, named=True)
    for key, value in figures.items():
        setattr(advice, key, float(value) if value is not None else None)
    if done.height < MIN_RUNS:
        advice.suggestions.append(f"only {done.height} run(s) recorded: too few to judge")
        return advice
    med, p95, share = advice.seconds_median or 0, advice.seconds_p95 or 0, advice.overhead_share or 0
    if share > OVERHEAD_SHARE and med < SMALL_RUN_SECONDS:
        advice.suggestions.append(
            f"windows look too small: {share:.0%} of a median run ({med:.3f}s) is overhead outside the steps; "
            f"a coarser cadence than {cadence} would do the same work in fewer runs")
    if med > 0 and p95 > TAIL_RATIO * med and p95 > SMALL_RUN_SECONDS:
        advice.suggestions.append(
            f"long tail: the slowest 5% of runs take {p95:.1f}s, over {TAIL_RATIO:g}x the median {med:.1f}s; "
            "look for uneven windows (busy days, late bulk loads) or split the work by a low-cardinality column")
    if med > LONG_RUN_SECONDS:
        advice.suggestions.append(
            f"windows look too large: a median run takes {med / 60:.1f} minutes; a finer cadence than "
            f"{cadence} keeps each run short, restartable and bounded in memory")
    if not advice.suggestions:
        advice.suggestions.append("window size looks right")
    return advice





# ---------------------------------------------------------------- grouping by a nearly unique column
#
# A SQL step that groups (`GROUP BY`) or splits (`PARTITION BY`) by a column
# whose values are almost all distinct, such as an id or a raw timestamp, makes
# about one group per row: the work is cut into batches of one. Common practice
# (a rule of thumb, not a standard) is to group and split by low-cardinality
# attributes such as a date, a category or a method, never by ids or raw
# timestamps; a timestamp is truncated first (`date_trunc('hour', started_at)`).
# The judgement is made on a small sample of the latest input, read by
# `runner.engine.samples` for `weir check` only; it is advice and never fails it.

MIN_ROWS = 100  # a smaller sample says nothing about how many distinct values there are
NEARLY_UNIQUE = 0.5  # distinct values / sampled rows above this: about one group per row


def grouped_columns(job: Job) -> set[str]:
    """The bare columns the job's SQL steps group or split by (what a sample needs to read)."""
    return {g.column for step in job.spec.steps if isinstance(step, SqlStep) for g in groupings(step.sql)}


def grouping_advice(job: Job, samples: Mapping[str, pl.DataFrame | None]) -> list[Problem]:
    """Warnings for the SQL steps of one job that group or split by a nearly unique column of
    a file input, judged on `samples` (input name -> rows of its newest files, or None)."""
    wanted = [(i, g) for i, step in enumerate(job.spec.steps) if isinstance(step, SqlStep)
              for g in groupings(step.sql)]
    out: list[Problem] = []
    for input_name, data in samples.items():
        if data is None or data.height < MIN_ROWS:
            continue
        for index, g in wanted:
            step = job.spec.steps[index]
            assert isinstance(step, SqlStep)
            if g.column not in data.columns or (g.table is not None and g.table != input_name
                                                 and g.table not in aliases(step.sql, input_name)):
                continue
            distinct = data[g.column].n_unique()
            if distinct / data.height > NEARLY_UNIQUE:
                out.append(job.problem(("steps", index, "sql"), (
                    f"step {index + 1} {g.clause} by {g.column}, which has {distinct:,} distinct values in "
                    f"{data.height:,} sampled rows of input {input_name} (groups of "
                    f"{data.height / distinct:.1f} rows on average); group or split by a low-cardinality "
                    "column (a date, a category, a method), and truncate timestamps first "
                    "(date_trunc('hour', ...))"), severity="warning"))
    return out
