"""Benchmark: `weir check` of one job with many SQL steps, and of job files that attack the loader.

Run by hand (not collected by pytest):

    python tests/bench/bench_check.py [--repeats N] [--steps N ...]

For each step count it writes a job whose steps are chained (step i reads
step i-1, as `SELECT merchant, n FROM s{i-1}`) and times `load_workspace`
in this process (what `weir check` does before it prints: YAML, the models,
the SQL guard and the static SQL resolution), best of `--repeats` after a
warm-up, and one whole `weir check` process for the largest count. Cost per
step side by side shows whether checking grows linearly. Then the time to
refuse three attack files (the 353-byte alias bomb, 20,000 nested brackets,
20,001 scalars). Results go to docs/performance.md by hand.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HEAD = """\
window: {every: 1h, start: 2026-01-01T00:00, timezone: UTC}
inputs:
  pay:
    files: landing/pay/{start:%Y-%m-%d}/{start:%H}.csv
    schema: {pay_id: str, merchant: str, amount: "decimal(10,2)"}
output:
  path: state/out/{start:%Y-%m-%d}/{start:%H}.parquet
steps:
  - name: s0
    sql: SELECT merchant, COUNT(*) AS n FROM pay GROUP BY merchant
"""

BOMB = "".join(
    f"l{i}: &l{i} [{', '.join([f'*l{i - 1}'] * 10) if i else ', '.join(['lol'] * 10)}]\n" for i in range(10)
) + "window: *l9\n"


def chained(steps: int) -> str:
    return HEAD + "".join(f"  - name: s{i}\n    sql: SELECT merchant, n FROM s{i - 1}\n" for i in range(1, steps))


def best_load(root: Path, repeats: int) -> float:
    from runner.engine.loading import load_workspace
    from runner.errors import SpecProblems

    best = float("inf")
    for _ in range(repeats + 1):  # the first is a warm-up (imports, sqlglot's dialect)
        t0 = time.perf_counter()
        with contextlib.suppress(SpecProblems):
            load_workspace(root)
        best = min(best, time.perf_counter() - t0)
    return best


def workspace(base: Path, name: str, text: str) -> Path:
    root = base / name
    (root / "jobs").mkdir(parents=True)
    (root / "jobs" / "pay_hourly.yaml").write_text(text)
    return root


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--steps", type=int, nargs="*", default=[10, 100, 1000, 3000])
    parser.add_argument("--no-attacks", action="store_true", help="skip the attack files (for older code)")
    args = parser.parse_args()
    import polars

    import runner

    print(f"# {time.strftime('%Y-%m-%d')} {platform.machine()} nproc={os.cpu_count()} "
          f"python {platform.python_version()} polars {polars.__version__}; weir from {Path(runner.__file__).parent}")
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp)
        print("| steps | load_workspace | per step |")
        print("| ---: | ---: | ---: |")
        for n in args.steps:
            t = best_load(workspace(base, f"s{n}", chained(n)), args.repeats)
            print(f"| {n:,} | {t * 1000:.0f} ms | {t / n * 1e6:.0f} µs |")
        n = max(args.steps)
        root = base / f"s{n}"
        t0 = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "runner", "-C", str(root), "check", "--at", "2026-01-05T00:00Z"],
                              capture_output=True, text=True, cwd=tmp)  # not this checkout: -m puts cwd first
        print(f"\nwhole `weir check` process, {n:,} steps: {time.perf_counter() - t0:.2f} s (exit {done.returncode})")
        if args.no_attacks:
            return
        print("\n| attack file | refused in |")
        print("| --- | ---: |")
        for name, text in [("alias bomb (353 bytes)", BOMB),
                           ("20,000 nested brackets", "window: " + "[" * 20000 + "]" * 20000 + "\n"),
                           ("20,001 scalars", "x: [" + ",".join(["1"] * 20_001) + "]\n")]:
            t = best_load(workspace(base, name.split()[0] + str(len(text)), text), args.repeats)
            print(f"| {name} | {t * 1000:.1f} ms |")


if __name__ == "__main__":
    main()
