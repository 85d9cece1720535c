"""Helpers shared by the running tests (imported explicitly; not a pytest conftest).

* `cli(root, *args)`: the `weir` command in this process (click's CliRunner),
  with stdout and stderr kept apart.
* `cli_json(root, *args)`: the same with `--json`, parsed.
* `spawn(root, *args)`: `python -m runner` in a subprocess (its own session, so
  a test can kill exactly what it started).
* `ledger_rows(root, sql)`: rows of the workspace's ledger read with sqlite3.
* `sha256_file(path)`: hashlib's SHA-256 of a file's bytes.
* `wait_until(condition, seconds)`: a bounded poll for a subprocess to get going.
"""

from __future__ import annotations

import hashlib
import json
import os
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from click.testing import CliRunner, Result

AT = "2026-06-01T00:00:00Z"  # a clock late enough for every window the tests run to be due


def cli(root: Path, *args: str) -> Result:
    """`weir -C root ARGS` in this process; exceptions are left to `main` (one line, exit code)."""
    from runner.cli import main

    class _Main:
        name = "weir"

        def main(self, args: list[str], prog_name: str | None = None, **_: Any) -> None:
            main(list(args))

    return CliRunner().invoke(_Main(), ["-C", str(root), *args], catch_exceptions=False)  # type: ignore[arg-type]


def cli_json(root: Path, *args: str, expect: int | None = 0) -> Any:
    result = cli(root, *args, "--json")
    if expect is not None:
        assert result.exit_code == expect, (result.stdout, result.stderr)
    return json.loads(result.stdout)


def backfill(root: Path, *jobs: str, lo: str, hi: str, extra: tuple[str, ...] = (), expect: int | None = 0,
             workers: int = 1) -> dict[str, Any]:
    """`weir backfill JOBS --from lo --to hi --at AT --workers N --json`, parsed."""
    return cli_json(root, "backfill", *jobs, "--from", lo, "--to", hi, "--at", AT, "--workers", str(workers),
                    *extra, expect=expect)


def only_window(root: Path, job: str, lo: str, hi: str) -> dict[str, Any]:
    """Backfill a range holding exactly one window of `job`; that window's entry of the report."""
    [window] = backfill(root, job, lo=lo, hi=hi, expect=None)["windows"]
    return window


def statuses(report: dict[str, Any], job: str | None = None) -> dict[str, int]:
    """How many windows of a backfill report ended in each status."""
    out: dict[str, int] = {}
    for w in report["windows"]:
        if job is None or w["job"] == job:
            out[w["status"]] = out.get(w["status"], 0) + 1
    return out


def spawn(root: Path, *args: str, env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    """`python -m runner -C root ARGS` as a subprocess in its own session."""
    return subprocess.Popen(
        [sys.executable, "-m", "runner", "-C", str(root), *args],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
        env={**os.environ, **(env or {})},
    )


def ledger_path(root: Path) -> Path:
    return root / "state" / "ledger.sqlite"


def ledger_rows(root: Path, sql: str, params: tuple[Any, ...] = ()) -> list[sqlite3.Row]:
    """Rows of the ledger (Python's sqlite3, read only)."""
    conn = sqlite3.connect(f"file:{ledger_path(root)}?mode=ro", uri=True, timeout=30)
    conn.row_factory = sqlite3.Row
    try:
        return conn.execute(sql, params).fetchall()
    finally:
        conn.close()


def sha256_file(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def output_files(root: Path, folder: str) -> dict[str, bytes]:
    """Every visible (not hidden) file under `root/folder`, by relative path, with its bytes."""
    base = root / folder
    return {p.relative_to(root).as_posix(): p.read_bytes()
            for p in sorted(base.rglob("*")) if p.is_file() and not p.name.startswith(".")}


def wait_until(condition: Any, seconds: float = 120.0) -> bool:
    """Poll `condition` every 50 ms for at most `seconds`: a bound that turns a hang into a failure."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.05)
    return bool(condition())
