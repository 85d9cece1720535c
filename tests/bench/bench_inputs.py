"""Benchmark: one window over many small CSV files (run by hand; not collected by pytest).

    python tests/bench/bench_inputs.py [--files 20000] [--repeats 3] [--baseline DIR]

Hardening issue 9, item 5: one window over 20,000 one-row CSV files took 580 s
and 2.5 GB in `weir run`. Whole processes, side by side and interleaved, best
of N, wall time and peak resident memory (wait4's rusage of each child):
  - a plain polars script: `pl.scan_csv` over the list of files, the same
    aggregation, written to Parquet;
  - `weir run` of a job without a schema;
  - `weir run` of a job with a schema and a time column (each row cast,
    checked and kept to the window);
  - with --baseline DIR, the same two `weir run`s from another checkout (e.g.
    the main branch), given --baseline-timeout seconds each.

The files hold invented card payments (`P00000001,2026-01-01T04:12:00Z,17.50`)
and are written once under --dir (default /tmp/weir-bench).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_run import PY, WEIR, checkout_env, machine, measure  # noqa: E402

PLAIN = """\
window: {every: 1d, start: 2026-01-01, end: 2026-01-02}
inputs:
  pay: {files: "in/{start:%Y-%m-%d}/*.csv"}
steps: [{sql: "SELECT COUNT(*) AS n, SUM(amount) AS total FROM pay"}]
output: {path: "out/plain/{start:%Y-%m-%d}.parquet"}
"""

CHECKED = """\
window: {every: 1d, start: 2026-01-01, end: 2026-01-02}
inputs:
  pay:
    files: "in/{start:%Y-%m-%d}/*.csv"
    time_column: at
    schema: {id: str, at: datetime, amount: "decimal(10,2)"}
steps: [{sql: "SELECT COUNT(*) AS n, SUM(amount) AS total FROM pay"}]
output: {path: "out/checked/{start:%Y-%m-%d}.parquet"}
"""

SCRIPT = """\
import glob, sys
import polars as pl
paths = sorted(glob.glob(sys.argv[1]))
(pl.scan_csv(paths).select(pl.len().alias("n"), pl.col("amount").sum().alias("total"))
   .sink_parquet(sys.argv[2], engine="streaming"))
"""


def make_files(ws: Path, count: int) -> int:
    """`count` one-row files of invented payments; their total size in bytes."""
    folder = ws / "in" / "2026-01-01"
    folder.mkdir(parents=True, exist_ok=True)
    existing = sorted(folder.glob("*.csv"))
    if len(existing) != count:
        for old in existing:
            old.unlink()
        for i in range(count):
            (folder / f"p{i:06d}.csv").write_text(
                f"id,at,amount\nP{i:08d},2026-01-01T{i % 24:02d}:{i % 60:02d}:00Z,{100 + i % 900}.50\n")
    return sum(p.stat().st_size for p in folder.glob("*.csv"))


def measure_or_timeout(cmd: list[str], cwd: Path, env: dict[str, str], timeout: float) -> tuple[float, float] | None:
    """`measure`, or None when the process runs longer than `timeout` seconds (then killed)."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    while True:
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid:
            if os.waitstatus_to_exitcode(status) != 0:
                raise SystemExit(f"{' '.join(cmd)} failed")
            return time.perf_counter() - start, usage.ru_maxrss / 1024
        if time.perf_counter() - start > timeout:
            os.killpg(proc.pid, 9)  # its own session: exactly what this benchmark started
            os.wait4(proc.pid, 0)
            return None
        time.sleep(0.05)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--dir", type=Path, default=Path("/tmp/weir-bench"))
    parser.add_argument("--files", type=int, default=20_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--baseline", type=Path, help="another checkout whose `weir run` to time beside this one")
    parser.add_argument("--baseline-timeout", type=float, default=120.0)
    args = parser.parse_args()
    ws = args.dir / f"small-files-{args.files}"
    (ws / "jobs").mkdir(parents=True, exist_ok=True)
    (ws / "jobs" / "pay_plain.yaml").write_text(PLAIN)
    (ws / "jobs" / "pay_checked.yaml").write_text(CHECKED)
    size = make_files(ws, args.files)
    script = args.dir / "bench_small_files_polars.py"
    script.write_text(textwrap.dedent(SCRIPT))
    here = Path(__file__).resolve().parents[2]
    runs: dict[str, tuple[list[str], Path]] = {
        "polars script (scan_csv over the list)": (
            [PY, str(script), str(ws / "in" / "2026-01-01" / "*.csv"), str(args.dir / "small-files.parquet")], here),
    }
    for job in ("pay_plain", "pay_checked"):
        cmd = [*WEIR, "-C", str(ws), "run", job, "--window", "2026-01-01", "--force"]
        runs[f"weir run, {'no schema' if job == 'pay_plain' else 'schema and time column'}"] = (cmd, here)
        if args.baseline is not None:
            runs[f"weir run ({args.baseline}), {'no schema' if job == 'pay_plain' else 'schema'}"] = (
                cmd, args.baseline.resolve())
    results: dict[str, list[tuple[float, float] | None]] = {k: [] for k in runs}
    for i in range(args.repeats):
        for name, (cmd, checkout) in runs.items():
            env = checkout_env(checkout, None if checkout == here else args.dir / "small-files-compare-ledger.sqlite")
            if checkout == here:
                results[name].append(measure(cmd, cwd=args.dir, env=env))
            elif not results[name] or results[name][-1] is not None:
                results[name].append(measure_or_timeout(cmd, args.dir, env, args.baseline_timeout))
            last = results[name][-1]
            shown = "timed out" if last is None else f"{last[0]:.2f}s {last[1]:.0f} MB"
            print(f"  round {i + 1}: {name}: {shown}", flush=True)
    base = min(w for w, _ in (r for r in results["polars script (scan_csv over the list)"] if r))
    print(f"\nOne window over {args.files:,} one-row CSV files ({size / 1e3:.0f} kB); {machine()}; "
          f"best of {args.repeats}")
    print("| program | wall | vs polars script | peak RSS |")
    print("| --- | ---: | ---: | ---: |")
    for name, vals in results.items():
        done = [v for v in vals if v is not None]
        if not done:
            print(f"| {name} | over {args.baseline_timeout:.0f} s | | |")
            continue
        wall, rss = min(w for w, _ in done), min(m for _, m in done)
        print(f"| {name} | {wall:.2f} s | {wall / base:.2f}x | {rss:.0f} MB |")


if __name__ == "__main__":
    main()
