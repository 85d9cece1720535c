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

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

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

    done = stats.filter(pl.col("status") == "done")
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
