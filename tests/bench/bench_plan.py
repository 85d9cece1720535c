"""Benchmark: `weir plan`, `weir stale` and an idle `weir tick` over a year of hourly windows.

Run by hand (not collected by pytest):

    python tests/bench/bench_plan.py [--repeats N] [--dir DIR] [--profile plan|stale|tick|tick-full]

It builds a workspace of 20 jobs with one year (2026, UTC) of hourly windows
each, 175,200 windows in all: 10 jobs read one small CSV file per day
(`state/landing/src_NN/YYYY-MM-DD.csv`) and 10 jobs each read one of those
(a job input), so the upstream cascade is part of the work. The ledger is
written directly (sqlite3 `executemany`, the columns of runner.io.ledger.store's
tables), one done run and one done window state per window, with
fingerprints computed the way a run computes them (runner.core.fingerprints;
the input component through runner.engine.survey.InputProber), so that every
window is `done` and nothing is due. The benchmark checks that before it
times anything.

Then it times whole processes (`python -m runner`, start-up included; best
of N): `weir plan`, `weir stale`, and `weir tick` with nothing due, once
answered by the idle-tick gate and once with the gate file removed (a full
idle tick). Aims: plan and stale under 2 s each, the idle tick under 0.5 s.
`--profile` runs one of them in this process under cProfile instead.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import json
import os
import platform
import pstats
import shutil
import sqlite3
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

JOBS = 10  # producer jobs; as many consumers
AT = "2027-01-01T00:30:00Z"  # every 2026 window is due (settle 10m); the next one at 01:10
YEAR_START = datetime(2026, 1, 1, tzinfo=UTC)
WINDOWS = 8760

PRODUCER = """\
description: Rides per hour and zone at station group {n}.
window: {{every: 1h, start: 2026-01-01T00:00, timezone: UTC, settle: 10m}}
inputs:
  rides:
    files: state/landing/src_{n}/{{start:%Y-%m-%d}}.csv
    time_column: started_at
    schema:
      ride_id: str
      started_at: datetime
      zone: str
      amount: float
steps:
  - sql: |
      SELECT zone, COUNT(*) AS rides, SUM(amount) AS revenue
      FROM rides
      GROUP BY zone
output:
  path: state/warehouse/src_{n}/{{start:%Y/%m/%d/%H}}.parquet
"""

CONSUMER = """\
description: Revenue per ride per hour at station group {n}.
window: {{every: 1h, start: 2026-01-01T00:00, timezone: UTC, settle: 10m}}
inputs:
  hourly: {{job: src_{n}}}
steps:
  - sql: |
      SELECT zone, revenue / rides AS per_ride
      FROM hourly
output:
  path: state/warehouse/per_ride_{n}/{{start:%Y/%m/%d/%H}}.parquet
"""


def build(root: Path) -> None:
    """Job files, landing files and a full ledger consistent with them."""
    from runner.core import fingerprints as fp
    from runner.core.windows import Window
    from runner.engine.loading import load_workspace
    from runner.engine.prepare import spec_and_code
    from runner.engine.survey import InputProber
    from runner.io.ledger.schema import runs, texts, windows
    from runner.io.ledger.store import Ledger, default_url
    from runner.model.timeutil import format_instant

    (root / "jobs").mkdir(parents=True)
    (root / "state").mkdir()
    for i in range(1, JOBS + 1):
        n = f"{i:02d}"
        (root / "jobs" / f"src_{n}.yaml").write_text(PRODUCER.format(n=n))
        (root / "jobs" / f"per_ride_{n}.yaml").write_text(CONSUMER.format(n=n))
        folder = root / "state" / "landing" / f"src_{n}"
        folder.mkdir(parents=True)
        for d in range(366):  # 2026 and the first day of 2027
            day = YEAR_START + timedelta(days=d)
            path = folder / f"{day:%Y-%m-%d}.csv"
            path.write_text("ride_id,started_at,zone,amount\n"
                            f"r{n}{d:04d},{day:%Y-%m-%d}T08:15:00,harbour,2.5\n")
            stamp = (day + timedelta(days=1, minutes=5)).timestamp()
            os.utime(path, (stamp, stamp))
    ws = load_workspace(root, thorough=False)
    url = default_url(root.resolve())
    Ledger(url).dispose()  # creates the schema
    probe = InputProber(ws)
    state_cols = [c.name for c in windows.columns]
    run_cols = [c.name for c in runs.columns]
    run_rows: list[tuple] = []
    state_rows: list[tuple] = []
    text_rows: dict[str, tuple[str, str, str]] = {}
    digests: dict[tuple[str, str], str] = {}
    run_id = 0
    for name in ws.order:  # producers before consumers: their digests are needed downstream
        cad = ws.cadence(name)
        spec_p, code_p = spec_and_code(ws, name)
        text_rows[spec_p.hash] = (spec_p.hash, "spec", spec_p.text)
        text_rows[code_p.hash] = (code_p.hash, "code", code_p.text)
        span = cad.span(YEAR_START, YEAR_START + timedelta(hours=WINDOWS))
        assert len(span) == WINDOWS
        producer = name.replace("per_ride_", "src_") if name.startswith("per_ride_") else None
        tmpl = ws.jobs[name].spec.output.path
        for w in span:
            key, end_key = w.key, Window(w.end, w.end, w.tz).key
            if producer is None:
                found = probe(name, w)
                input_p = fp.Part(found.input_hash, "")
                ingested = datetime.fromtimestamp(found.newest_mtime_ns / 1e9, UTC)
                upstream_p = fp.upstream_part([])
            else:
                input_p = fp.input_part([])
                ingested = None
                upstream_p = fp.upstream_part([{"input": "hourly", "job": producer, "window": key,
                                                "digest": digests[(producer, key)]}])
            parts = {"spec": spec_p, "code": code_p, "input": input_p, "upstream": upstream_p}
            total = fp.total(key, end_key, parts)
            digest = fp.digest(f"{name}|{key}")
            digests[(name, key)] = digest
            run_id += 1
            output = tmpl.format(start=w.local_start, end=w.local_end)
            seconds = 0.05 + (run_id % 7) / 100
            started = w.end + timedelta(minutes=11)
            finished = started + timedelta(seconds=seconds)
            common = {
                "job": name, "window_key": key, "window_end": end_key, "window_id": format_instant(w.start, w.tz),
                "fingerprint": total, "fp_spec": spec_p.hash, "fp_code": code_p.hash, "fp_input": input_p.hash,
                "fp_upstream": upstream_p.hash, "output": output, "output_digest": digest,
                "output_checksum": fp.digest(output), "seconds": seconds,
                "ingested_at": ingested.strftime("%Y-%m-%dT%H:%M:%S.%fZ") if ingested else None,
                "finished_at": finished.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            }
            run = {**common, "id": run_id, "attempt": 1, "status": "done", "forced": False,
                   "started_at": started.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), "step_seconds": seconds / 2,
                   "rows_read": 1, "rows_dropped": 0, "rows_rejected": 0, "rows_written": 1,
                   "host": "bench", "pid": 1, "weir_version": "bench"}
            state = {**common, "state": "done", "run_id": run_id, "last_fingerprint": total,
                     "good_run_id": run_id, "failures": 0, "output_state": None}
            run_rows.append(tuple(run.get(c) for c in run_cols))
            state_rows.append(tuple(state.get(c) for c in state_cols))
        print(f"  {name}: {WINDOWS} windows", file=sys.stderr)
    conn = sqlite3.connect(root / "state" / "ledger.sqlite")
    try:
        with conn:
            conn.executemany(f"INSERT INTO {runs.name} ({', '.join(run_cols)}) "
                             f"VALUES ({', '.join('?' * len(run_cols))})", run_rows)
            conn.executemany(f"INSERT INTO {windows.name} ({', '.join(state_cols)}) "
                             f"VALUES ({', '.join('?' * len(state_cols))})", state_rows)
            conn.executemany(f"INSERT INTO {texts.name} (hash, kind, body) VALUES (?, ?, ?)",
                             list(text_rows.values()))
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        conn.close()


def weir(root: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "runner", "-C", str(root), *args], capture_output=True,
                          text=True, timeout=600)


def check(root: Path) -> None:
    """Every window done and current, nothing due, nothing stale: or the timings mean nothing."""
    plan = json.loads(weir(root, "plan", "--at", AT, "--json").stdout)
    assert len(plan) == 2 * JOBS
    for p in plan:
        assert p["counts"]["done"] == WINDOWS and not p["due"] and not p["waiting"], (p["job"], p["counts"])
    stale = json.loads(weir(root, "stale", "--at", AT, "--json").stdout)
    assert stale["windows"] == [], stale["ranges"][:3]


def best_of(repeats: int, args: tuple[str, ...], root: Path, before=None) -> float:
    best = float("inf")
    for _ in range(repeats):
        if before is not None:
            before()
        t0 = time.perf_counter()
        result = weir(root, *args)
        elapsed = time.perf_counter() - t0
        assert result.returncode == 0, result.stderr
        best = min(best, elapsed)
    return best


def profile(root: Path, what: str) -> None:
    from runner.cli import main

    gate = root / "state" / "tick-gate.json"
    args = {"plan": ["plan"], "stale": ["stale"], "tick": ["tick"], "tick-full": ["tick"]}[what]
    if what == "tick-full":
        gate.unlink(missing_ok=True)
    prof = cProfile.Profile()
    prof.enable()
    with contextlib.suppress(SystemExit):
        main(["-C", str(root), *args, "--at", AT])
    prof.disable()
    stats = pstats.Stats(prof, stream=sys.stderr)
    stats.sort_stats("cumulative").print_stats(40)
    stats.sort_stats("tottime").print_stats(25)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--dir", type=Path, help="build (or reuse) the workspace here; default: a temporary folder")
    parser.add_argument("--profile", choices=["plan", "stale", "tick", "tick-full"])
    args = parser.parse_args()
    tmp = None
    if args.dir is None:
        tmp = Path(tempfile.mkdtemp(prefix="weir-bench-plan-"))
        root = tmp / "ws"
    else:
        root = args.dir
    try:
        if not (root / "state" / "ledger.sqlite").exists():
            t0 = time.perf_counter()
            build(root)
            print(f"built {2 * JOBS} jobs x {WINDOWS} windows in {time.perf_counter() - t0:.1f}s", file=sys.stderr)
            check(root)
        if args.profile:
            profile(root, args.profile)
            return
        import polars as pl

        gate = root / "state" / "tick-gate.json"
        at_later = "2027-01-01T00:31:00Z"  # before the next window's end + settle (01:10)
        load = ", ".join(f"{v:.1f}" for v in os.getloadavg())
        print(f"date {datetime.now(UTC):%Y-%m-%d}; {os.cpu_count()} cores ({platform.machine()}); "
              f"python {platform.python_version()}, polars {pl.__version__}; load average {load}")
        print(f"{2 * JOBS} jobs x {WINDOWS:,} hourly windows = {2 * JOBS * WINDOWS:,} windows, all done; "
              f"best of {args.repeats}, whole processes")
        rows = []
        rows.append(("weir plan", best_of(args.repeats, ("plan", "--at", AT), root), 2.0))
        rows.append(("weir stale", best_of(args.repeats, ("stale", "--at", AT), root), 2.0))
        assert weir(root, "tick", "--at", AT).returncode == 0 and gate.exists()
        rows.append(("weir tick (idle, gate holds)", best_of(args.repeats, ("tick", "--at", at_later), root), 0.5))
        rows.append(("weir tick (idle, gate removed)",
                     best_of(args.repeats, ("tick", "--at", at_later), root,
                             before=lambda: gate.unlink(missing_ok=True)), 0.5))
        rows.append(("python -m runner --version (start-up floor)", best_of(args.repeats, ("--version",), root),
                     None))
        for label, seconds, aim in rows:
            verdict = "" if aim is None else ("  meets the aim" if seconds < aim else f"  MISSES the aim ({aim} s)")
            print(f"  {label:<46} {seconds:7.3f} s{verdict}")
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
