"""Benchmark: one window of 10 million rides with a declared schema, beside the same job without one.

Run by hand (not collected by pytest):

    python tests/bench/bench_schema.py [--rows N] [--repeats N] [--dir DIR] [--jobs NAME ...]

It writes one local day of invented bike-share rides as CSV (ride_id,
started_at with its offset, zone, fare, amount) and job files that read that
file with the same SQL step (rides and revenue per zone and fare):

* rides_plain: no schema (the baseline);
* rides_checked: a schema declaring types, `values`, `min` and `pattern`
  (the aim: at most 25% more wall time than rides_plain);
* rides_text_only: every column declared `str`, no rules: what reading every
  column through the inspector costs before any check (for the analysis);
* rides_keyed: rides_checked plus `key: [ride_id]` (10 million distinct keys).

It times whole `weir run --force` processes, alternating the jobs in each
round so that load from elsewhere falls on all of them, and reports the best
of `--repeats` rounds: wall time and CPU time (user + system of the child
process). Before reporting it checks that every job counted the same rides
per zone and fare. Results go to docs/performance.md by hand.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import polars as pl

DAY = "2026-03-22"
TZ = "Europe/Lisbon"
SQL = "SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue FROM rides GROUP BY zone, fare"

SCHEMA = f"""\
    schema:
      ride_id: {{type: str, nullable: false, pattern: "^R[0-9]{{8}}$"}}
      started_at: datetime({TZ})
      zone: {{type: str, values: [riverside, old_town, harbour, hilltop, campus]}}
      fare: {{type: str, values: [member, casual, day_pass]}}
      amount: {{type: "decimal(10,2)", min: 0}}
"""
# every column declared as text, no rules: what reading every column through the inspector costs
TEXT_ONLY = """\
    schema: {ride_id: str, started_at: str, zone: str, fare: str, amount: str}
"""


def job(name: str, schema: str = "", extra: str = "", amount: str = "amount") -> str:
    return (f"window: {{every: 1d, start: {DAY}, timezone: {TZ}}}\n"
            "inputs:\n  rides:\n    files: state/landing/rides/{start:%Y-%m-%d}/*.csv\n"
            f"{schema}{extra}"
            f"steps:\n  - sql: {SQL.replace('SUM(amount)', f'SUM({amount})')}\n"
            f"output:\n  path: state/warehouse/{name}/{{start:%Y-%m-%d}}.parquet\n")


JOBS = {
    "rides_plain": job("rides_plain"),
    "rides_checked": job("rides_checked", SCHEMA),
    # not part of the aim: the price of the floor and of a key
    "rides_text_only": job("rides_text_only", TEXT_ONLY, amount="CAST(amount AS DOUBLE)"),
    "rides_keyed": job("rides_keyed", SCHEMA, "    key: [ride_id]\n"),
}


def write_rides(path: Path, rows: int, seed: int = 20260322) -> None:
    """One local day of rides, generated column-wise (no Python loop over rows)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    start = pl.datetime(2026, 3, 22, time_zone=TZ)
    frame = pl.DataFrame({
        "n": np.arange(rows, dtype=np.int64),
        "second": rng.integers(0, 86_400, rows),
        "zone": rng.integers(0, 5, rows),
        "fare": rng.integers(0, 3, rows),
        "cents": rng.integers(50, 2_000, rows),
    })
    frame = frame.select(
        ride_id=pl.lit("R") + pl.col("n").cast(pl.String).str.zfill(8),
        started_at=(start + pl.duration(seconds=pl.col("second"))).dt.strftime("%Y-%m-%dT%H:%M:%S%:z"),
        zone=pl.col("zone").replace_strict(dict(enumerate(["riverside", "old_town", "harbour", "hilltop",
                                                           "campus"])), return_dtype=pl.String),
        fare=pl.col("fare").replace_strict(dict(enumerate(["member", "casual", "day_pass"])),
                                           return_dtype=pl.String),
        amount=(pl.col("cents") // 100).cast(pl.String) + "." + (pl.col("cents") % 100).cast(pl.String).str.zfill(2),
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.write_csv(path)


def run_once(root: Path, job: str) -> tuple[float, float]:
    """Wall seconds and CPU seconds (user + system, all threads) of one `weir run` process."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "runner", "-C", str(root), "run", job, "--window", DAY, "--force"],
                          capture_output=True, text=True)
    seconds = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise SystemExit(f"{job} failed:\n{proc.stdout}\n{proc.stderr}")
    return seconds, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--dir", type=Path, default=None, help="workspace folder (default: a temporary one)")
    parser.add_argument("--jobs", nargs="+", default=list(JOBS), help="which of the jobs to time (rides_plain always)")
    args = parser.parse_args()
    args.jobs = ["rides_plain", *[j for j in args.jobs if j != "rides_plain"]]
    base = args.dir or Path(tempfile.mkdtemp(prefix="weir-bench-schema-"))
    root = base / "ws"
    (root / "jobs").mkdir(parents=True, exist_ok=True)
    (root / "state").mkdir(exist_ok=True)
    for name, text in JOBS.items():
        (root / "jobs" / f"{name}.yaml").write_text(text)
    csv = root / "state" / "landing" / "rides" / DAY / "rides.csv"
    if not csv.exists() or pl.scan_csv(csv).select(pl.len()).collect().item() != args.rows:
        t0 = time.perf_counter()
        write_rides(csv, args.rows)
        print(f"wrote {args.rows:,} rows ({csv.stat().st_size / 1e6:,.0f} MB) in {time.perf_counter() - t0:.1f}s")
    print(f"python {platform.python_version()}, polars {pl.__version__}, {platform.machine()}, "
          f"{os.cpu_count()} cpu(s); workspace {root}")
    jobs = [j for j in JOBS if j in args.jobs]
    walls: dict[str, list[float]] = {j: [] for j in jobs}
    cpus: dict[str, list[float]] = {j: [] for j in jobs}
    run_once(root, "rides_plain")  # warm-up: page cache, imports
    for _ in range(args.repeats):
        for job in jobs:  # side by side, alternating, so load from elsewhere falls on all of them
            wall, cpu = run_once(root, job)
            walls[job].append(wall)
            cpus[job].append(cpu)
    results = {j: pl.read_parquet(root / f"state/warehouse/{j}/{DAY}.parquet").sort("zone", "fare") for j in jobs}
    for j, frame in results.items():
        # same rides counted, or the comparison means nothing
        assert frame.select("zone", "fare", "rides").equals(results["rides_plain"].select("zone", "fare", "rides")), j
        assert int(frame["rides"].sum()) == args.rows, j
    base_wall, base_cpu = min(walls["rides_plain"]), min(cpus["rides_plain"])
    print(f"{args.rows:,} rows, best of {args.repeats}; every run: "
          + "; ".join(f"{j} {' '.join(f'{s:.2f}' for s in ws)}" for j, ws in walls.items()))
    print(f"  {'job':<18} {'wall s':>8} {'ratio':>7} {'cpu s':>8} {'ratio':>7}")
    for j in jobs:
        w, c = min(walls[j]), min(cpus[j])
        print(f"  {j:<18} {w:8.2f} {w / base_wall:6.2f}x {c:8.2f} {c / base_cpu:6.2f}x")

if __name__ == "__main__":
    main()
