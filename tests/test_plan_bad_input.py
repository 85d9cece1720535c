"""Bad input to plan, tick, stale, why, impact and verify: one clear line, non-zero exit, nothing written.

The commands of a test run through weir's entry point in one fresh process,
so that "nothing written" is checked after that process has exited (SQLite
removes its temporary files when the last connection closes). The ledger is damaged,
upgraded and locked with Python's sqlite3; file bytes and times are compared
with hashlib and os.stat.
"""

from __future__ import annotations

import hashlib
import json
import os
import sqlite3
import subprocess
import sys
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import pytest
from conftest_run import AT, cli_json
from helpers_plan import hourly_job, hours, land_hour, ledger_file, write_jobs

WINDOW = "2026-03-28T01:00"  # a window start of rides_hourly, local time


@pytest.fixture
def ws(tmp_path) -> Path:
    """rides_hourly with two windows done and a ledger (state/ledger.sqlite)."""
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T03:00")})
    for s in hours(datetime(2026, 3, 28, tzinfo=UTC), 2):
        land_hour(root, s)
    assert cli_json(root, "tick", "--at", AT)["counts"] == {"done": 2}  # hour 02 waits for its file
    (root / "state" / "tick-gate.json").unlink(missing_ok=True)
    return root


def snapshot(root: Path) -> dict[str, tuple[int, int, str]]:
    """Every file under state/: size, mtime_ns and SHA-256 (os.stat, hashlib)."""
    out = {}
    for p in sorted((root / "state").rglob("*")):
        if p.is_file():
            st = p.stat()
            out[p.relative_to(root).as_posix()] = (st.st_size, st.st_mtime_ns,
                                                   hashlib.sha256(p.read_bytes()).hexdigest())
    return out


DRIVER = """
import contextlib, io, json, sys
from runner.cli import main
results = []
for args in json.loads(sys.argv[1]):
    out, err, code = io.StringIO(), io.StringIO(), 0
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            main(args)
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    results.append({"args": args, "returncode": code, "stdout": out.getvalue(), "stderr": err.getvalue()})
print(json.dumps(results))
"""


def run_all(root: Path, commands: list[tuple[str, ...]], env: dict[str, str] | None = None) -> list[Result]:
    """Each command through `weir`'s entry point (`runner.cli.main`), all in one fresh process.

    The snapshot after it has exited is what "nothing written" is checked against.
    """
    argv = [["-C", str(root), *args] for args in commands]
    proc = subprocess.run([sys.executable, "-c", DRIVER, json.dumps(argv)], capture_output=True, text=True,
                          timeout=300, env={**os.environ, **(env or {})})
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    return [Result(**r) for r in json.loads(proc.stdout)]


@dataclass
class Result:
    args: list[str]
    returncode: int
    stdout: str
    stderr: str


def assert_one_clear_line(result: Result, *words: str) -> None:
    lines = result.stderr.splitlines()
    assert result.returncode not in (0, 1, 70), (result.args, result.returncode, result.stderr)
    assert len(lines) == 1 and lines[0].startswith("weir: "), (result.args, result.stderr)
    assert "Traceback" not in result.stderr and "internal error" not in result.stderr
    assert result.stdout == "", result.stdout
    for word in words:
        assert word in lines[0], (result.args, lines[0])


EVERY_COMMAND = [("plan", "--at", AT), ("tick", "--at", AT), ("stale", "--at", AT),
                 ("why", "rides_hourly", WINDOW, "--at", AT), ("impact", "--at", AT), ("verify",)]


def test_an_at_that_is_not_a_timestamp(ws):
    before = snapshot(ws)
    cases = [("plan", "--at", "yesterday"), ("tick", "--at", "2026-13-01"), ("stale", "--at", "2026-03-29T25:00"),
             ("why", "rides_hourly", WINDOW, "--at", "next tuesday"), ("impact", "--at", "")]
    for args, result in zip(cases, run_all(ws, cases), strict=True):
        assert_one_clear_line(result, "--at", repr(args[-1]))
        assert result.returncode == 2
    assert snapshot(ws) == before


def test_an_unknown_job(ws):
    before = snapshot(ws)
    cases = [("plan", "rides_hourli", "--at", AT), ("stale", "rides_hourli", "--at", AT),
             ("why", "rides_hourli", WINDOW, "--at", AT), ("verify", "rides_hourli")]
    for result in run_all(ws, cases):
        assert_one_clear_line(result, "'rides_hourli'", "rides_hourly")
        assert result.returncode == 2
    assert snapshot(ws) == before


def test_an_unknown_window_or_one_that_is_not_a_window_start(ws):
    before = snapshot(ws)
    cases = {("why", "rides_hourly", "2027-06-01T00:00", "--at", AT): ("outside",),
             ("why", "rides_hourly", "2026-03-28T01:30", "--at", AT): ("not a window start", "2026-03-28T01:00"),
             ("why", "rides_hourly", "soon", "--at", AT): ("'soon'",)}
    for (_, words), result in zip(cases.items(), run_all(ws, list(cases)), strict=True):
        assert_one_clear_line(result, *words)
        assert result.returncode == 2
    assert snapshot(ws) == before


def test_a_ledger_written_by_a_newer_weir_is_refused_by_every_command(ws):
    with sqlite3.connect(ledger_file(ws)) as conn:  # a later schema version, as a newer weir would write
        conn.execute("UPDATE weir_meta SET value = '99' WHERE key = 'schema_version'")
    conn.close()
    before = snapshot(ws)
    for result in run_all(ws, EVERY_COMMAND):
        assert_one_clear_line(result, "newer weir", "99")
    assert snapshot(ws) == before
    with sqlite3.connect(ledger_file(ws)) as conn:
        assert conn.execute("SELECT value FROM weir_meta WHERE key = 'schema_version'").fetchall() == [("99",)]
    conn.close()


def test_a_corrupt_ledger_is_reported_and_left_as_it_is(ws):
    path = ledger_file(ws)
    for suffix in ("-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)
    path.write_bytes(b"these are not the bytes of a ledger, nor of any database\n" * 200)
    before = snapshot(ws)
    for result in run_all(ws, EVERY_COMMAND):
        assert_one_clear_line(result, "not a readable database")
    assert snapshot(ws) == before


def test_an_empty_ledger_file_is_refused_by_every_command_and_left_as_it_is(ws):
    """Hardening item 15: a 0-byte ledger (a file cut to nothing) read as an empty ledger recomputed everything."""
    path = ledger_file(ws)
    for suffix in ("-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)
    path.write_bytes(b"")
    before = snapshot(ws)
    commands = [*EVERY_COMMAND, ("backfill", "rides_hourly", "--at", AT), ("run", "rides_hourly", "--window", WINDOW)]
    for result in run_all(ws, commands):
        assert_one_clear_line(result, str(path), "empty")
        assert result.returncode == 2
    assert snapshot(ws) == before
    assert path.stat().st_size == 0 and not Path(str(path) + "-wal").exists()


HOLD = """
import sqlite3, sys
holder = sqlite3.connect(sys.argv[1], isolation_level=None)
holder.execute("PRAGMA locking_mode=EXCLUSIVE")
holder.execute("BEGIN EXCLUSIVE")
holder.execute("UPDATE weir_meta SET value = value WHERE key = 'schema_version'")
print("held", flush=True)
sys.stdin.read()
holder.execute("ROLLBACK")
"""


def test_a_locked_ledger_is_reported_after_a_short_wait(ws):
    # An exclusive lock held by another process that has written (sqlite3's EXCLUSIVE locking mode).
    # Another process, because closing any descriptor of the file in this one (reading it for the
    # snapshot) would drop this process's POSIX locks on it.
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(ledger_file(ws))], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        before = snapshot(ws)
        for result in run_all(ws, EVERY_COMMAND, env={"WEIR_LEDGER_TIMEOUT": "1"}):
            assert_one_clear_line(result, "locked")
        assert snapshot(ws) == before
    finally:
        holder.communicate("", timeout=60)
    assert holder.returncode == 0


def test_commands_that_only_read_create_no_ledger(tmp_path):
    root = write_jobs(tmp_path / "ws", {"rides_hourly": hourly_job("2026-03-28T00:00", "2026-03-28T03:00")})
    readers = [args for args in EVERY_COMMAND if args[0] != "tick"]
    assert [r.returncode for r in run_all(root, readers)] == [0] * len(readers)
    assert snapshot(root) == {}
