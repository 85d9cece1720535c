"""Benchmark: enumerating a year of windows, weir beside pandas.date_range.

Run by hand (not collected by pytest):

    python tests/bench/bench_windows.py [--repeats N]

For a job in Europe/Lisbon it enumerates one year (2026, local) of hourly and
of 1-minute windows with `Cadence.span` (start/end arrays), then separately
formats their ids with `.ids()`, and measures pandas `date_range` with the
same timezone over the same span in the same run. Each figure is the best of
several repeats. Results go to docs/performance.md by hand.
"""

from __future__ import annotations

import argparse
import gc
import platform
import time
from collections.abc import Callable
from datetime import datetime
from zoneinfo import ZoneInfo

import pandas as pd
import polars as pl

from runner.core.windows import Cadence
from runner.model.spec import WindowDecl

ZONE = "Europe/Lisbon"


def best_of(fn: Callable[[], object], repeats: int) -> tuple[float, object]:
    """Fastest wall time of `repeats` calls (after one warm-up) and the last result."""
    result = fn()
    best = float("inf")
    for _ in range(repeats):
        gc.collect()
        t0 = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - t0)
    return best, result


def row(label: str, seconds: float, count: int, reference: float | None = None) -> str:
    rate = count / seconds if seconds else float("inf")
    ratio = f"{seconds / reference:6.2f}x" if reference else "   1.00x"
    return f"  {label:<44} {count:>9,d} windows {seconds * 1000:9.2f} ms {rate:>14,.0f} windows/s {ratio}"


def bench(every: str, freq: str, repeats: int) -> list[str]:
    tz = ZoneInfo(ZONE)
    lo, hi = datetime(2026, 1, 1, tzinfo=tz), datetime(2027, 1, 1, tzinfo=tz)
    cad = Cadence.of(WindowDecl.model_validate({"every": every, "start": "2026-01-01", "timezone": ZONE}))

    t_pd, idx = best_of(lambda: pd.date_range("2026-01-01", "2027-01-01", freq=freq, tz=ZONE,
                                              inclusive="left"), repeats)
    t_span, span = best_of(lambda: cad.span(lo, hi), repeats)
    t_ids, _ = best_of(lambda: cad.span(lo, hi).ids(), repeats)
    t_pd_fmt, _ = best_of(lambda: pd.date_range("2026-01-01", "2027-01-01", freq=freq, tz=ZONE,
                                                inclusive="left").strftime("%Y-%m-%dT%H:%M%z"), repeats)
    # same windows, or the comparison means nothing
    assert len(span) == len(idx), (len(span), len(idx))
    assert span.starts_us.to_list() == [int(v) for v in idx.as_unit("us").asi8]
    n = len(span)
    return [
        f"every: {every} in {ZONE}, one year ({n:,} windows), best of {repeats}:",
        row(f"pandas date_range(freq={freq!r}, tz)", t_pd, n),
        row("weir Cadence.span (start/end arrays)", t_span, n, t_pd),
        row("weir Cadence.span + .ids() (ISO 8601 ids)", t_ids, n, t_pd),
        row("pandas date_range + strftime (ids, for scale)", t_pd_fmt, n, t_pd),
    ]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7)
    args = parser.parse_args()
    print(f"python {platform.python_version()}, polars {pl.__version__}, pandas {pd.__version__}, "
          f"{platform.machine()}")
    print("ratio = time / pandas date_range time (lower is better)")
    for every, freq in (("1h", "h"), ("1m", "min")):
        print("\n".join(bench(every, freq, args.repeats)))


if __name__ == "__main__":
    main()
