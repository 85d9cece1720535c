"""Benchmark: `weir report` over 20 jobs x one year of hourly windows (175,200 windows).

Run by hand (not collected by pytest):

    python tests/bench/bench_report.py [--dir DIR] [--repeats N] [--no-browser] [--baseline REV]

The page is measured side by side with the report as it was at git revision
--baseline (default 76b34c1, the last one with runner/report.py): its
report.py and metrics.py are loaded from git into modules of their own and
run on the same workspace and ledger in the same rounds, old and new in turn.

It writes a workspace of 20 invented bike-share jobs (4 reading a database
table, 16 reading earlier jobs, in 5 layers), all hourly in Europe/Lisbon over
2025, and a synthetic ledger straight through `runner.io.ledger.store` (SQLAlchemy
Core): mostly done windows with fingerprints that match the job files, a few
failed windows, two jobs whose March windows ran with older code (stale by
code, and their readers stale by upstream), late inputs, windows never run and
windows waiting for a failed producer, and one live claim. Then it times
`build_report` (survey included) and `metrics_text`, reports the page's size,
and loads it in headless Chromium over the DevTools protocol to time the load
and a first click on a day. Results go to docs/performance.md by hand.
"""

from __future__ import annotations

import argparse
import gc
import gzip
import importlib.util
import os
import platform
import random
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

import polars as pl
import sqlalchemy as sa

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # the tests folder: the DevTools client (helpers_browser.py)

from runner.core import fingerprints as fp  # noqa: E402
from runner.core.assessment import Snapshot, assess_job  # noqa: E402
from runner.core.planner import _upstream  # noqa: E402
from runner.engine.loading import load_workspace  # noqa: E402
from runner.engine.prepare import spec_and_code  # noqa: E402
from runner.io.files import write_atomic  # noqa: E402
from runner.io.ledger import schema as ledger_schema  # noqa: E402
from runner.io.ledger import store as ledger_mod  # noqa: E402
from runner.report import build_report  # noqa: E402
from runner.report.data import collect  # noqa: E402
from runner.report.metrics import metrics_text  # noqa: E402
from runner.report.page import render  # noqa: E402

AT = datetime(2026, 1, 1, 0, 30, tzinfo=UTC)  # every window of 2025 (Lisbon) is due
ROOTS = ["rides_riverside", "rides_old_town", "dock_moves", "fare_payments"]
ERRORS = [
    "check key [zone, fare] failed: 2 duplicate row(s); e.g. zone='harbour', fare='member'",
    'input trips: column amount: value "-3.50" breaks rule min 0; fix the data or set on_bad_rows',
    "step 1 (sql): Binder Error: column \"revenue\" not found; candidates: <rides>, <amount>",
]


def job_names() -> list[str]:
    return ROOTS + [f"zone_rollup_{i:02d}" for i in range(16)]


def write_jobs(root: Path) -> None:
    (root / "jobs").mkdir(parents=True, exist_ok=True)
    (root / "state").mkdir(exist_ok=True)
    names = job_names()
    window = "window: {every: 1h, start: 2025-01-01T00:00, timezone: Europe/Lisbon, settle: 10m}\n"
    for name in ROOTS:
        (root / "jobs" / f"{name}.yaml").write_text(
            f"description: Hourly {name.replace('_', ' ')} per zone (invented bike-share).\n{window}"
            "late_after: 1h\n"
            "inputs:\n  trips: {database: 'sqlite:///state/source.sqlite', table: trips, time_column: started_at}\n"
            "steps:\n  - sql: SELECT zone, COUNT(*) AS rides FROM trips GROUP BY zone\n"
            f"output: {{path: 'state/warehouse/{name}/{{start:%Y/%m/%d/%H%z}}.parquet'}}\n")
    for i in range(16):
        name = names[4 + i]
        producers = [names[i]] + ([names[i + 1]] if i % 3 == 0 else [])
        inputs = "".join(f"  in_{k}: {{job: {p}}}\n" for k, p in enumerate(producers))
        (root / "jobs" / f"{name}.yaml").write_text(
            f"description: Rides per zone, layer {i // 4 + 1} of the invented rollups.\n{window}"
            f"inputs:\n{inputs}"
            "steps:\n  - sql: SELECT zone, SUM(rides) AS rides FROM in_0 GROUP BY zone\n"
            f"output: {{path: 'state/warehouse/{name}/{{start:%Y/%m/%d/%H%z}}.parquet'}}\n")


def utc_text_us(us: int) -> str:
    return datetime.fromtimestamp(us / 1e6, UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def key_text(us: int) -> str:
    return datetime.fromtimestamp(us / 1e6, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def fill_ledger(root: Path, seed: int = 7) -> int:
    """Write runs and window states for every due window; returns how many windows got a row."""
    rng = random.Random(seed)
    ws = load_workspace(root, thorough=False)
    ledger = ledger_mod.Ledger(ledger_mod.default_url(root))
    assessed: dict[str, pl.DataFrame] = {}
    states: dict[str, pl.DataFrame] = {}
    run_id = 0
    written = 0
    stale_jobs = {ROOTS[1], "zone_rollup_05"}
    march = (datetime(2025, 3, 1, tzinfo=UTC), datetime(2025, 4, 1, tzinfo=UTC))
    for name in ws.order:
        cad = ws.cadence(name)
        frame = cad.due(AT).frame()
        spec_p, code_p = spec_and_code(ws, name)
        snap = Snapshot(states=dict(states))
        up = _upstream(ws, name, frame, snap, assessed)  # the planner's own upstream hash, so readers are current
        frame = frame.join(up, on="window_key", how="left", maintain_order="left")
        runs, wins = [], []
        n = frame.height
        for i, (wid, key, s_us, e_us, up_hash, ready) in enumerate(frame.select(
                "window", "window_key", "start_us", "end_us", "up_hash", "up_ready").iter_rows()):
            if not ready:
                continue  # a producer window is not done: this one waits
            if name == ROOTS[2] and i >= n - 5:
                continue  # never ran: missing
            if name.startswith("zone_rollup_1") and i >= n - 3:
                continue
            failed = rng.random() < 0.0015
            code = code_p.hash
            if name in stale_jobs and march[0].timestamp() * 1e6 <= s_us < march[1].timestamp() * 1e6:
                code = "0" * len(code_p.hash)  # ran with older code
            finished = e_us + 600_000_000 + rng.randrange(1_000_000, 90_000_000)
            late = name in ROOTS and rng.random() < 0.01
            ingested = utc_text_us(e_us + (7_200_000_000 if late else 180_000_000)) if name in ROOTS else None
            seconds = round(rng.lognormvariate(-1.0, 0.6), 4)
            rows = rng.randrange(20, 400)
            digest = fp.digest(f"{name}:{key}:out")
            parts = {"fp_spec": spec_p.hash, "fp_code": code, "fp_input": fp.digest(f"{name}:{key}:in"),
                     "fp_upstream": up_hash}
            fingerprint = fp.digest("".join(parts.values()))
            run_id += 1
            run = {"id": run_id, "job": name, "window_key": key, "window_end": key_text(e_us), "window_id": wid,
                   "attempt": 1, "status": "failed" if failed else "done", "forced": False,
                   "fingerprint": fingerprint, **parts, "started_at": utc_text_us(finished - int(seconds * 1e6)),
                   "finished_at": utc_text_us(finished), "seconds": seconds, "step_seconds": seconds * 0.6,
                   "rows_read": rows * 12, "rows_dropped": 0, "rows_rejected": 0,
                   "rows_written": None if failed else rows,
                   "output": None if failed else f"state/warehouse/{name}/{key}.parquet",
                   "output_digest": None if failed else digest, "output_checksum": None,
                   "error": rng.choice(ERRORS) if failed else None, "failed_check": None, "host": "bench",
                   "pid": 1, "code_version": None, "weir_version": "bench", "ingested_at": ingested}
            runs.append(run)
            wins.append({"job": name, "window_key": key, "window_end": key_text(e_us), "window_id": wid,
                         "state": run["status"], "run_id": run_id,
                         "fingerprint": None if failed else fingerprint,
                         **({k: None for k in parts} if failed else parts), "output": run["output"],
                         "output_digest": run["output_digest"], "output_checksum": None,
                         "last_fingerprint": fingerprint, "good_run_id": None if failed else run_id,
                         "failures": 1 if failed else 0, "ingested_at": ingested,
                         "finished_at": run["finished_at"], "seconds": seconds, "output_state": None})
        with ledger.engine.begin() as conn:
            for k in range(0, len(runs), 5000):
                conn.execute(sa.insert(ledger_schema.runs), runs[k:k + 5000])
                conn.execute(sa.insert(ledger_schema.windows), wins[k:k + 5000])
        written += len(wins)
        states[name] = ledger.plan_states(name, spec_p.hash, code_p.hash, upstream=True, digests=True,
                                          extras=True)
        assessed[name] = assess_job(ws, name, AT, Snapshot(states=dict(states)), None, False, assessed)
    # one window being worked on right now (claims expire on the real clock)
    last_key = assessed[ROOTS[0]]["window_key"][-1]
    with ledger.engine.begin() as conn:
        conn.execute(sa.insert(ledger_schema.claims).values(job=ROOTS[0], window_key=last_key, owner="bench:1:1",
                                                         expires=time.time() + 7200))
    ledger.dispose()
    return written


def old_modules(rev: str):
    """The report and metrics modules as they were at git revision `rev`, loaded under names of their own."""
    repo = HERE.parent.parent
    out = []
    for name in ("report", "metrics"):
        text = subprocess.run(["git", "show", f"{rev}:runner/{name}.py"], cwd=repo, capture_output=True, text=True,
                              check=True).stdout
        spec = importlib.util.spec_from_loader(f"old_{name}", loader=None)
        module = importlib.util.module_from_spec(spec)
        sys.modules[f"old_{name}"] = module  # dataclasses look their module up while the class is made
        exec(compile(text, f"{rev}:runner/{name}.py", "exec"), module.__dict__)  # noqa: S102 - our own file
        out.append(module)
    return out


def rounds(fns: dict[str, object], repeats: int) -> dict[str, tuple[float, object]]:
    """Best time of each function over `repeats` rounds, the functions taking turns within a round."""
    best: dict[str, tuple[float, object]] = {k: (float("inf"), None) for k in fns}
    for _ in range(repeats):
        for key, fn in fns.items():
            gc.collect()
            t0 = time.perf_counter()
            result = fn()
            took = time.perf_counter() - t0
            if took < best[key][0]:
                best[key] = (took, result)
    return best


def browser_load(page: Path, repeats: int, new: bool) -> dict[str, float]:
    from helpers_browser import Browser

    with tempfile.TemporaryDirectory() as profile:
        b = Browser(Path(profile) / "profile", width=1400, height=1000)
        try:
            loads = []
            for _ in range(repeats):
                t0 = time.perf_counter()
                b.open(page)
                loads.append(time.perf_counter() - t0)
            errors = b.errors()
            if new:  # list the windows around a time, twice (the first decodes the job's arrays)
                click = b.evaluate("(function(){var t=performance.now(); weirReport.listAt('zone_rollup_03', "
                                   "'2025-06-01T12:00+01:00'); var a=performance.now()-t; t=performance.now(); "
                                   "weirReport.listAt('zone_rollup_03', '2025-06-02T12:00+01:00');"
                                   "return [a, performance.now()-t];})()")
            else:
                click = b.evaluate("(function(){var t=performance.now(); weirReport.select(7, 40);"
                                   "var a=performance.now()-t; t=performance.now(); weirReport.select(7, 41);"
                                   "return [a, performance.now()-t];})()")
            nodes = b.evaluate("document.getElementsByTagName('*').length")
            heap = b.call("Runtime.getHeapUsage")
        finally:
            b.close()
    return {"wall": min(loads), "first_click": click[0] / 1000, "next_click": click[1] / 1000, "nodes": nodes,
            "heap_mb": heap["usedSize"] / 2**20, "errors": len(errors)}


def machine() -> str:
    cpu = next((line.split(":", 1)[1].strip() for line in Path("/proc/cpuinfo").read_text().splitlines()
                if line.startswith("model name")), platform.processor()) if Path("/proc/cpuinfo").exists() else ""
    try:
        chrome = subprocess.run(["chromium", "--version"], capture_output=True, text=True, timeout=30).stdout.strip()
    except (OSError, subprocess.TimeoutExpired):
        chrome = "no chromium"
    return (f"{datetime.now(UTC):%Y-%m-%d}, {os.cpu_count()} cores ({cpu}), {platform.machine()}, "
            f"Python {platform.python_version()}, polars {pl.__version__}, SQLAlchemy {sa.__version__}, {chrome}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--dir", type=Path, help="workspace folder to (re)use; default: a temporary one")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-browser", action="store_true")
    ap.add_argument("--baseline", default="76b34c1", help="git revision of the old report to compare with")
    args = ap.parse_args()
    tmp = None
    if args.dir is None:
        tmp = tempfile.TemporaryDirectory(prefix="weir-bench-report-")
        root = Path(tmp.name)
    else:
        root = args.dir
    ledger_file = root / "state" / "ledger.sqlite"
    if not ledger_file.exists():
        write_jobs(root)
        t0 = time.perf_counter()
        n = fill_ledger(root)
        print(f"ledger: {n:,} window rows written in {time.perf_counter() - t0:.1f} s ({root})")
    old_report, old_metrics = old_modules(args.baseline)
    ws = load_workspace(root, thorough=False)
    ledger = ledger_mod.Ledger(ledger_mod.default_url(root), create=False)
    from runner.engine.survey import survey

    old_data = old_report.collect(ws, ledger, AT)
    data = collect(ws, ledger, AT)
    best = rounds({
        "survey (plan's input check)": lambda: survey(ws, ledger, AT, None, extras=True),
        "survey (every window's inputs)": lambda: survey(ws, ledger, AT, None, recheck_all=True, extras=True),
        "old build_report": lambda: old_report.build_report(ws, ledger, AT),
        "new build_report": lambda: build_report(ws, ledger, AT),
        "old collect": lambda: old_report.collect(ws, ledger, AT),
        "new collect": lambda: collect(ws, ledger, AT),
        "old render": lambda: old_report.render(old_data),
        "new render": lambda: render(data),
        "old metrics_text alone": lambda: old_metrics.metrics_text(ws, ledger, AT),
        "new metrics_text alone": lambda: metrics_text(ws, ledger, AT),
        "old metrics_text reusing": lambda: old_metrics.metrics_text(ws, ledger, AT, assessed=old_data.assessed),
        "new metrics_text reusing": lambda: metrics_text(ws, ledger, AT, data=data),
    }, args.repeats)
    print(machine())
    total = sum(v.total for v in data.jobs)
    print(f"windows: {total:,} over {len(data.jobs)} jobs; states {data.totals()}; "
          f"late {sum(v.late for v in data.jobs):,}; load average {os.getloadavg()[0]:.1f}; best of {args.repeats}")
    for key, (took, _) in best.items():
        print(f"{key:34s} {took:7.3f} s")
    pages = {"old": best["old build_report"][1], "new": best["new build_report"][1]}
    outs = {}
    for which, page in pages.items():
        out = write_atomic(root / "state" / f"report-{which}.html", page)
        outs[which] = out
        size = out.stat().st_size
        print(f"{which} page: {size:,} bytes ({size / 2**20:.2f} MiB), gzip {len(gzip.compress(page.encode())):,} bytes")
    if not args.no_browser:
        for which, out in outs.items():
            b = browser_load(out, args.repeats, new=which == "new")
            print(f"{which} page in chromium: navigation to load event {b['wall']:.2f} s; first listing "
                  f"{b['first_click'] * 1000:.0f} ms, next {b['next_click'] * 1000:.0f} ms; {b['nodes']:,} elements; "
                  f"JS heap {b['heap_mb']:.0f} MB; console errors {b['errors']}")
    ledger.dispose()
    if tmp is not None:
        tmp.cleanup()


if __name__ == "__main__":
    main()
