"""Benchmarks for running windows (run by hand; not collected by pytest).

    python tests/bench/bench_run.py big   [--rows 45000000] [--repeats 3] [--baseline DIR] [--cold]
    python tests/bench/bench_run.py small [--hours 8760] [--sample 40] [--baseline DIR]
    python tests/bench/bench_run.py start [--repeats 10] [--baseline DIR]

`big`: one large window, a CSV of rides grouped by two low-cardinality
columns into Parquet. Whole processes side by side, best of N, wall time and
peak resident memory (from wait4's rusage of each child):
  - a hand-written polars script (lazy API, streaming engine, sink to file),
  - `weir run` on the same file and query,
  - a DuckDB script and a pandas script for reference;
  - with --baseline DIR, also `weir run` from another checkout (e.g. the main
    branch), to measure what a change costs side by side.
weir remembers input files it found well-formed (state/input-checks.sqlite),
so from the second round on `weir run` reads a file already checked; with
--cold that file is removed before every round: every run checks the CSV.

`small`: a year of hourly windows with small inputs. `weir backfill` over all
of them (default workers) against one process per window (what a cron line
calling a script costs: a sample of windows run as separate `python` processes,
scaled to the year). Also the median per-window overhead (run time outside
the steps) from the ledger. With --baseline, the same backfill by the weir
in DIR (another checkout, e.g. `git archive` of an earlier commit) is run
too, on a copy of the same data.

`start`: what starting a run costs: `weir run --force` of one window of 20
rows, over and over, interleaved with the weir in --baseline DIR when given.

Peak memory is the largest sum of the resident sizes of the program and
every process it started (worker processes included), sampled every 20 ms
from /proc; wait4's rusage would miss workers that a fork server parents.

Data is invented (the bike-share scenario) and generated with a fixed seed
under --dir (default /tmp/weir-bench).
"""

from __future__ import annotations

import argparse
import os
import platform
import sqlite3
import statistics
import subprocess
import sys
import textwrap
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

PY = sys.executable
WEIR = [PY, "-m", "runner"]


def measure(cmd: list[str], cwd: Path | None = None, env: dict | None = None) -> tuple[float, float]:
    """Wall seconds and peak RSS (MB) of one child process and everything it started (its session)."""
    import threading

    start = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peak = [0]
    done = threading.Event()

    def tree(pid: int) -> list[int]:
        """`pid` and its descendants, from /proc/PID/task/TID/children (proc(5))."""
        out, todo = [], [pid]
        while todo:
            p = todo.pop()
            out.append(p)
            try:
                for tid in os.listdir(f"/proc/{p}/task"):
                    with open(f"/proc/{p}/task/{tid}/children") as fh:
                        todo.extend(int(c) for c in fh.read().split())
            except OSError:
                continue
        return out

    def sample() -> None:
        page = os.sysconf("SC_PAGE_SIZE")
        while not done.wait(0.02):
            total = 0
            for pid in tree(proc.pid):
                try:
                    with open(f"/proc/{pid}/statm") as fh:
                        total += int(fh.read().split()[1]) * page
                except (OSError, IndexError, ValueError):
                    continue
            peak[0] = max(peak[0], total)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    done.set()
    sampler.join()
    err = proc.stderr.read().decode() if proc.stderr else ""
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"{' '.join(cmd)} failed:\n{err}")
    return wall, max(peak[0] / 2**20, usage.ru_maxrss / 1024)


def checkout_env(checkout: Path, ledger: Path | None = None) -> dict[str, str]:
    """The environment for running weir from `checkout` (first on PYTHONPATH, before what the
    caller's PYTHONPATH holds); `ledger`, when given, is that run's own SQLite ledger: checkouts
    may keep ledgers of different versions."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [str(checkout), os.environ.get("PYTHONPATH")] if p))
    if ledger is not None:
        env["WEIR_LEDGER"] = f"sqlite:///{ledger}"
    return env


def machine() -> str:
    import duckdb
    import pandas
    import polars

    return (f"{datetime.now(UTC):%Y-%m-%d}, {os.cpu_count()} cores, {platform.machine()}, "
            f"Python {platform.python_version()}, polars {polars.__version__}, duckdb {duckdb.__version__}, "
            f"pandas {pandas.__version__}")


# ---------------------------------------------------------------- big window

def make_big_csv(path: Path, rows: int) -> None:
    """Write the data in a child process: a child forked from a large parent reports the
    parent's resident memory as its own peak, so this process must stay small."""
    if path.exists():
        return
    subprocess.run([PY, __file__, "_generate", str(path), str(rows)], check=True)


def _generate(path: Path, rows: int) -> None:
    import numpy as np
    import polars as pl

    path.parent.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(7)
    chunk = 5_000_000
    zones = np.array(["Riverside", "Old Town", "Harbour", "University", "Hillcrest"])
    fares = np.array(["member", "casual", "day_pass"])
    start = int(datetime(2026, 3, 22, tzinfo=UTC).timestamp() * 1_000_000)
    with open(path, "wb") as fh:
        for offset in range(0, rows, chunk):
            n = min(chunk, rows - offset)
            frame = pl.DataFrame({
                "ride_id": pl.int_range(offset, offset + n, eager=True).cast(pl.String),
                "started_at": pl.Series(start + rng.integers(0, 86_400_000_000, n)).cast(pl.Datetime("us", "UTC")),
                "zone": zones[rng.integers(0, len(zones), n)],
                "fare": fares[rng.integers(0, len(fares), n)],
                "amount": (rng.integers(50, 900, n) / 100.0),
            })
            frame.write_csv(fh, include_header=offset == 0)


HAND = """
import polars as pl, sys
(pl.scan_csv(sys.argv[1])
   .group_by("zone", "fare").agg(pl.len().alias("rides"), pl.col("amount").sum().alias("revenue"))
   .sort("zone", "fare")
   .sink_parquet(sys.argv[2], engine="streaming"))
"""

DUCK = """
import duckdb, sys
duckdb.sql(f"COPY (SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue FROM read_csv('{sys.argv[1]}') "
           f"GROUP BY zone, fare ORDER BY zone, fare) TO '{sys.argv[2]}' (FORMAT parquet)")
"""

PANDAS = """
import pandas as pd, sys
df = pd.read_csv(sys.argv[1], usecols=["zone", "fare", "amount"], engine="pyarrow")
out = df.groupby(["zone", "fare"]).agg(rides=("amount", "size"), revenue=("amount", "sum")).reset_index()
out.to_parquet(sys.argv[2])
"""

BIG_JOB = """
window: {every: 1d, start: 2026-03-22, timezone: UTC}
inputs:
  rides: {files: data/rides.csv}
steps:
  - sql: |
      SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue
      FROM rides GROUP BY zone, fare
output: {path: "out/{start:%Y-%m-%d}.parquet"}
"""


def bench_big(base: Path, rows: int, repeats: int, skip_pandas: bool, baseline: Path | None = None,
              cold: bool = False) -> None:
    data = base / "big" / "data" / "rides.csv"
    print(f"generating {rows:,} rows ...", flush=True)
    make_big_csv(data, rows)
    size_gb = data.stat().st_size / 1e9
    ws = base / "big"
    (ws / "jobs").mkdir(parents=True, exist_ok=True)
    (ws / "jobs" / "rides_big.yaml").write_text(BIG_JOB)
    scripts = {"hand": HAND, "duckdb": DUCK, "pandas": PANDAS}
    for name, text in scripts.items():  # file names must not shadow the modules they import
        (base / f"bench_{name}.py").write_text(textwrap.dedent(text))
    here = Path(__file__).resolve().parents[2]
    runs = {
        "polars script (streaming)": [PY, str(base / "bench_hand.py"), str(data), str(base / "hand.parquet")],
        "weir run": [*WEIR, "-C", str(ws), "run", "rides_big", "--window", "2026-03-22", "--force"],
        "duckdb script": [PY, str(base / "bench_duckdb.py"), str(data), str(base / "duck.parquet")],
    }
    envs = {}
    if baseline is not None:  # its own ledger: a newer weir's ledger is refused by an older one
        runs[f"weir run (baseline {baseline})"] = [*WEIR, "-C", str(ws), "--ledger",
                                                  f"sqlite:///{ws}/state/ledger-baseline.sqlite", "run", "rides_big",
                                                  "--window", "2026-03-22", "--force"]
        envs[f"weir run (baseline {baseline})"] = checkout_env(baseline.resolve())
    if not skip_pandas:
        runs["pandas script"] = [PY, str(base / "bench_pandas.py"), str(data), str(base / "pandas.parquet")]
    results: dict[str, list[tuple[float, float]]] = {k: [] for k in runs}
    for i in range(repeats):  # interleaved, so load on the machine hits every tool alike
        for name, cmd in runs.items():
            env = envs.get(name) or checkout_env(here)
            if cold:  # every run checks the CSV file's records again (see docs/performance.md)
                (ws / "state" / "input-checks.sqlite").unlink(missing_ok=True)
            results[name].append(measure(cmd, env=env))
            print(f"  round {i + 1}: {name}: {results[name][-1][0]:.2f}s {results[name][-1][1]:.0f} MB", flush=True)
    base_wall = min(w for w, _ in results["polars script (streaming)"])
    print(f"\nOne window over {size_gb:.2f} GB of CSV ({rows:,} rows); {machine()}; best of {repeats}"
          f"{'; every input check from scratch (--cold)' if cold else ''}")
    print("| program | wall | vs polars script | peak RSS |")
    print("| --- | ---: | ---: | ---: |")
    for name, vals in results.items():
        wall = min(w for w, _ in vals)
        rss = min(m for _, m in vals)
        print(f"| {name} | {wall:.2f} s | {wall / base_wall:.2f}x | {rss:.0f} MB |")


# ---------------------------------------------------------------- many small windows

SMALL_JOB = """
window: {every: 1h, start: 2026-01-01, end: 2027-01-01, timezone: Europe/Lisbon}
inputs:
  rides: {files: "landing/{start:%Y-%m-%d}/{start:%H}.csv"}
steps:
  - sql: SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue FROM rides GROUP BY zone, fare
output: {path: "out/{start:%Y-%m-%d}/{start:%H%z}.parquet"}
"""

ONE_WINDOW = """
import polars as pl, sys
(pl.scan_csv(sys.argv[1]).group_by("zone", "fare")
   .agg(pl.len().alias("rides"), pl.col("amount").sum().alias("revenue"))
   .sort("zone", "fare").sink_parquet(sys.argv[2]))
"""


def make_small(ws: Path, hours: int) -> list[Path]:
    import random
    from zoneinfo import ZoneInfo

    rng = random.Random(11)
    tz = ZoneInfo("Europe/Lisbon")
    t = datetime(2026, 1, 1, tzinfo=tz).astimezone(UTC)
    files = []
    for _ in range(hours):
        local = t.astimezone(tz)
        path = ws / "landing" / local.strftime("%Y-%m-%d") / f"{local.strftime('%H')}.csv"
        if not path.exists():
            path.parent.mkdir(parents=True, exist_ok=True)
            rows = ["ride_id,zone,fare,amount"] + [
                f"R{rng.randrange(10**7):07d},{rng.choice(['Riverside', 'Harbour', 'Old Town'])},"
                f"{rng.choice(['member', 'casual'])},{rng.randrange(50, 900) / 100}" for _ in range(20)]
            path.write_text("\n".join(rows) + "\n")
        files.append(path)
        t += timedelta(hours=1)
    return files


def _fresh(ws: Path) -> None:
    """Forget every run (ledger and outputs), so that a backfill runs every window again."""
    import shutil

    for p in (ws / "state").glob("ledger.sqlite*"):
        p.unlink()
    shutil.rmtree(ws / "out", ignore_errors=True)


def bench_small(base: Path, hours: int, sample: int, baseline: Path | None, repeats: int = 1) -> None:
    import shutil

    ws = base / "small"
    (ws / "jobs").mkdir(parents=True, exist_ok=True)
    (ws / "jobs" / "rides_by_hour.yaml").write_text(SMALL_JOB)
    files = make_small(ws, hours)
    env = checkout_env(Path(__file__).resolve().parents[2])
    first = files[0].parent.name
    last = (datetime.strptime(files[-1].parent.name, "%Y-%m-%d") + timedelta(days=1)).strftime("%Y-%m-%d")
    args = ["backfill", "rides_by_hour", "--from", first, "--to", last, "--at", "2027-01-02T00:00Z"]
    ways = {"this": (ws, env)}
    if baseline is not None:
        old = base / "small-baseline"
        shutil.rmtree(old, ignore_errors=True)
        shutil.copytree(ws, old)  # the same landing files
        ways["baseline"] = (old, checkout_env(baseline.resolve()))
    runs: dict[str, list[float]] = {k: [] for k in ways}
    rss: dict[str, list[float]] = {k: [] for k in ways}
    for i in range(repeats):  # interleaved, so load on the machine hits both alike
        for name, (where, how) in ways.items():
            _fresh(where)
            print(f"round {i + 1}: {name} weir backfill of {hours} hourly windows ...", flush=True)
            wall, peak = measure([*WEIR, "-C", str(where), *args], env=how)
            runs[name].append(wall)
            rss[name].append(peak)
            print(f"  {wall:.1f} s, {peak:.0f} MB", flush=True)
    weir_wall, weir_rss = min(runs["this"]), max(rss["this"])
    script = base / "one_window.py"
    script.write_text(textwrap.dedent(ONE_WINDOW))
    out = base / "one_window_out"
    out.mkdir(exist_ok=True)
    step = max(1, len(files) // sample)
    walls = []
    for i, f in enumerate(files[::step][:sample]):
        walls.append(measure([PY, str(script), str(f), str(out / f"{i}.parquet")])[0])
    per_process = statistics.median(walls)
    con = sqlite3.connect(ws / "state" / "ledger.sqlite")  # the last run of this checkout
    rows = con.execute("SELECT seconds, step_seconds FROM weir_runs WHERE status = 'done'").fetchall()
    overhead = statistics.median(s - (st or 0) for s, st in rows)
    run_median = statistics.median(s for s, _ in rows)
    print(f"\n{hours} hourly windows (20 rows each); {machine()}")
    print("| way | wall for the year | per window |")
    print("| --- | ---: | ---: |")
    print(f"| one `python` process per window (median of {len(walls)}, times {hours}) | "
          f"{per_process * hours:.0f} s | {per_process * 1000:.0f} ms |")
    print(f"| `weir backfill` (all windows, default workers) | {weir_wall:.1f} s | {weir_wall / hours * 1000:.1f} ms |")
    if baseline is not None:
        old_wall, old_rss = min(runs["baseline"]), max(rss["baseline"])
        print(f"| baseline `weir backfill` ({baseline}) | {old_wall:.1f} s | {old_wall / hours * 1000:.1f} ms |")
        print(f"peak RSS of the baseline backfill and its workers {old_rss:.0f} MB; best of {repeats} each, "
              f"all walls: this {[round(w, 1) for w in runs['this']]}, "
              f"baseline {[round(w, 1) for w in runs['baseline']]}")
    print(f"speed-up: {per_process * hours / weir_wall:.0f}x; {len(rows)} runs recorded; median run {run_median * 1000:.1f} ms, "
          f"median overhead outside the steps {overhead * 1000:.1f} ms; peak RSS of the backfill and its workers "
          f"{weir_rss:.0f} MB")


def bench_start(base: Path, repeats: int, baseline: Path | None) -> None:
    """`weir run --force` of one small window, again and again: what starting a run costs."""
    ways = {"weir run (this checkout)": (base / "start", Path(__file__).resolve().parents[2])}
    if baseline is not None:
        ways[f"weir run (baseline {baseline})"] = (base / "start-baseline", baseline)
    for ws, _ in ways.values():
        (ws / "jobs").mkdir(parents=True, exist_ok=True)
        (ws / "jobs" / "rides_by_hour.yaml").write_text(SMALL_JOB)
        make_small(ws, 1)
        _fresh(ws)
    results: dict[str, list[tuple[float, float]]] = {k: [] for k in ways}
    results["python -c 'import polars' (for scale)"] = []
    for _ in range(repeats):  # interleaved, so load on the machine hits every way alike
        for name, (ws, code) in ways.items():
            cmd = [*WEIR, "-C", str(ws), "run", "rides_by_hour", "--window", "2026-01-01T00:00", "--force"]
            results[name].append(measure(cmd, env=checkout_env(code)))
        results["python -c 'import polars' (for scale)"].append(measure([PY, "-c", "import polars"]))
    print(f"\n`weir run --force` of one 20-row window, {repeats} times interleaved; {machine()}")
    print("| way | best | median | peak RSS (median) |")
    print("| --- | ---: | ---: | ---: |")
    for name, vals in results.items():
        walls = [w for w, _ in vals]
        print(f"| {name} | {min(walls):.2f} s | {statistics.median(walls):.2f} s | "
              f"{statistics.median(m for _, m in vals):.0f} MB |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    if len(sys.argv) == 4 and sys.argv[1] == "_generate":
        _generate(Path(sys.argv[2]), int(sys.argv[3]))
        return
    parser.add_argument("what", choices=["big", "small", "start"])
    parser.add_argument("--baseline", type=Path, help="another weir checkout to run side by side")
    parser.add_argument("--dir", type=Path, default=Path("/tmp/weir-bench"))
    parser.add_argument("--rows", type=int, default=45_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--hours", type=int, default=8760)
    parser.add_argument("--sample", type=int, default=40)
    parser.add_argument("--skip-pandas", action="store_true")
    parser.add_argument("--cold", action="store_true", help="forget which input files weir found well-formed")
    args = parser.parse_args()
    args.dir.mkdir(parents=True, exist_ok=True)
    if args.what == "big":
        bench_big(args.dir, args.rows, args.repeats, args.skip_pandas, args.baseline, args.cold)
    elif args.what == "start":
        bench_start(args.dir, args.repeats, args.baseline)
    else:
        bench_small(args.dir, args.hours, args.sample, args.baseline, args.repeats)


if __name__ == "__main__":
    main()
