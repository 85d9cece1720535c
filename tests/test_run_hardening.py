"""Hardening of running windows (issue 9 items 2, 3, 4, 13 and 16; signals from issues 10 and 15).

Every test runs real processes: `weir` subprocesses whose python step sleeps,
holds the interpreter lock, ends its process with `os._exit`, is killed with
SIGKILL or raises a disk-full error, as a marker file in the workspace tells
it. Leases are a few seconds (`jobs/_settings.yaml`), so a lapse takes
seconds, not minutes; the only waits on the wall clock are bounded polls for a
subprocess to get going, and the few seconds a lease needs to lapse. Process
and signal facts come from the operating system (`os.kill`, /proc via
`os.waitpid`-free checks), expected ledger contents are read with Python's
sqlite3 module, file digests with hashlib.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import time
import uuid
from datetime import date, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from conftest_run import (
    AT,
    backfill,
    cli,
    cli_json,
    ledger_rows,
    sha256_file,
    spawn,
    statuses,
    wait_until,
)
from helpers_data import TZ, rollup_job, write_rides, write_workspace

DAY = date(2026, 3, 28)  # Lisbon at +00:00 (IANA tz database): local hours are UTC hours
LO, HI = "2026-03-28", "2026-03-29"
LEASE = 2  # seconds (the smallest lease weir allows): a lapse takes seconds
BOUND = 120  # seconds: turns a hang into a failure, never a measure of speed

TROUBLE_MODULE = '''\
"""The hourly rollup, with trouble on the hours named in state/trouble ("MODE HH,HH")."""
import ctypes
import errno
import os
import signal
import time
from pathlib import Path

import polars as pl

TROUBLE = Path(__file__).parent / "state" / "trouble"


def _mode(window):
    try:
        mode, _, hours = TROUBLE.read_text().strip().partition(" ")
    except FileNotFoundError:
        return None
    return mode if any(f"T{h}:00" in window.id for h in hours.split(",")) else None


def rollup(rides, window):
    mode = _mode(window)
    if mode == "sleep":
        time.sleep(3600)
    elif mode == "wait":  # until the test removes the file
        while TROUBLE.exists():
            time.sleep(0.05)
    elif mode == "spin":  # like a catastrophic regular expression: the interpreter lock is never let go
        while True:
            ctypes.PyDLL(None).sleep(10)  # a C call through PyDLL keeps the interpreter lock
    elif mode == "hold":  # the same, once, until the test lets go
        taken = TROUBLE.with_name("trouble.taken")
        os.replace(TROUBLE, taken)  # only the first run of the window holds
        while taken.exists():  # until the test removes it
            ctypes.PyDLL(None).sleep(10)  # a C call through PyDLL keeps the interpreter lock
    elif mode == "exit":
        os._exit(3)
    elif mode == "kill":
        os.kill(os.getpid(), signal.SIGKILL)  # as the kernel kills a process that ran out of memory
    elif mode == "disk-full":
        raise OSError(errno.ENOSPC, "No space left on device")
    return (rides.group_by("zone", "fare")
            .agg(pl.len().alias("rides"), pl.col("amount").sum().alias("revenue"))
            .with_columns(pl.lit(os.getpid()).alias("worker")))
'''


def window_id(hour: int) -> str:
    """A window's id: its local start in ISO 8601 with the offset (zoneinfo, IANA tz database)."""
    return datetime(DAY.year, DAY.month, DAY.day, hour, tzinfo=ZoneInfo(TZ)).isoformat(timespec="minutes")


def window_key(hour: int) -> str:
    start = datetime(DAY.year, DAY.month, DAY.day, hour, tzinfo=ZoneInfo(TZ)).astimezone(ZoneInfo("UTC"))
    return start.strftime("%Y-%m-%dT%H:%M:%SZ")


def trouble_ws(tmp_path: Path, extra: str = "", settings: str | None = f"lease: {LEASE}s\n",
               jobs: dict[str, str] | None = None) -> Path:
    """A workspace whose `rides_hourly` job runs the trouble module (a unique name per test)."""
    module = f"fleet_trouble_{uuid.uuid4().hex[:8]}"
    files = {f"{module}.py": TROUBLE_MODULE}
    if settings is not None:
        files["jobs/_settings.yaml"] = settings
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(
        steps=f"  - python: {module}:rollup\n", extra=extra), **(jobs or {})}, files)
    write_rides(root, DAY)
    return root


def trouble(root: Path, mode: str, *hours: int) -> Path:
    path = root / "state" / "trouble"
    path.write_text(f"{mode} {','.join(f'{h:02d}' for h in hours)}\n")
    return path


def rows(root: Path, sql: str, params: tuple = ()) -> list:
    try:
        return ledger_rows(root, sql, params)
    except Exception:  # noqa: BLE001 - no ledger (or no table) yet
        return []


def running_runs(root: Path) -> list:
    return rows(root, "SELECT id, job, window_key, pid FROM weir_runs WHERE status = 'running'")


def alive(pid: int) -> bool:
    """Whether a process exists and is not a zombie (the kernel's view: /proc, proc(5))."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] not in ("Z", "X")
    except FileNotFoundError:
        return False


def finish(proc: subprocess.Popen[str]) -> tuple[int, str, str]:
    try:
        out, err = proc.communicate(timeout=BOUND)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)  # its own session: exactly what this test started
        proc.communicate()
        raise
    return proc.returncode, out, err


def history(root: Path, hour: int, job: str = "rides_hourly") -> list[tuple[int, str, str | None]]:
    return [(r["attempt"], r["status"], r["error"]) for r in rows(
        root, "SELECT attempt, status, error FROM weir_runs WHERE job = ? AND window_key = ? ORDER BY id",
        (job, window_key(hour)))]


# ---------------------------------------------------------------- item 2: time limits


@pytest.mark.parametrize("mode", ["sleep", "spin"], ids=["sleeps", "holds-the-interpreter"])
def test_a_step_past_its_time_allowed_is_stopped_fails_with_retries_and_frees_the_tick_lock(tmp_path: Path,
                                                                                           mode: str):
    """Hardening item 2: a step that would run for an hour is stopped at the job's time_allowed."""
    root = trouble_ws(tmp_path, extra="time_allowed: 2s\nretries: 1\nretry_delay: 0s\n")
    trouble(root, mode, 3)
    code, out, err = finish(spawn(root, "tick", "--at", AT, "--json"))
    assert code == 1, err
    report = json.loads(out)
    assert statuses(report) == {"done": 23, "failed": 1}
    failed = next(w for w in report["windows"] if w["status"] == "failed")
    assert failed["window"] == window_id(3)
    assert failed["reason"].startswith("time limit of 2s reached"), failed
    assert history(root, 3) == [(1, "failed", failed["reason"]), (2, "failed", failed["reason"])]
    # the tick lock and every claim are released, no run is left running
    assert rows(root, "SELECT * FROM weir_locks") == []
    assert rows(root, "SELECT * FROM weir_claims") == []
    assert running_runs(root) == []
    log = (root / "state" / "logs" / "rides_hourly" / f"{window_id(3)}.log").read_text()
    assert log.count("time limit of 2s reached") == 2


def test_the_workspace_time_allowed_holds_for_jobs_without_their_own(tmp_path: Path):
    """Hardening item 2: jobs/_settings.yaml gives the default; a job's own time_allowed wins."""
    own = rollup_job(path="state/warehouse/rides_own/{start:%Y-%m-%d/%H}.parquet",
                     steps="  - sql: SELECT zone, fare, COUNT(*) AS rides FROM rides GROUP BY zone, fare\n",
                     extra="time_allowed: 1h\n")
    root = trouble_ws(tmp_path, settings=f"time_allowed: 2s\nlease: {LEASE}s\n", jobs={"rides_own": own})
    trouble(root, "sleep", 3)
    report = backfill(root, "rides_hourly", "rides_own", lo=f"{LO}T03:00", hi=f"{LO}T04:00", expect=1)
    by_job = {w["job"]: w for w in report["windows"]}
    assert by_job["rides_hourly"]["status"] == "failed"
    assert by_job["rides_hourly"]["reason"].startswith("time limit of 2s reached")
    assert by_job["rides_own"]["status"] == "done"


def test_time_allowed_is_not_part_of_the_spec_fingerprint(tmp_path: Path):
    """Hardening item 2: raising a limit does not make every window stale."""
    root = trouble_ws(tmp_path)
    assert statuses(backfill(root, "rides_hourly", lo=LO, hi=HI)) == {"done": 24}
    job = root / "jobs" / "rides_hourly.yaml"
    job.write_text(job.read_text() + "time_allowed: 45m\n")
    assert cli_json(root, "stale", "--at", AT)["windows"] == []
    assert statuses(backfill(root, "rides_hourly", lo=LO, hi=HI)) == {"skipped": 24}


def test_workspace_settings_problems_are_located_and_job_names_with_a_leading_underscore_refused(tmp_path: Path):
    root = trouble_ws(tmp_path, settings="lease: 1s\ntime_alowed: 5m\n")
    (root / "jobs" / "_helpers.yaml").write_text((root / "jobs" / "rides_hourly.yaml").read_text())
    result = cli(root, "check", "--at", AT)
    assert result.exit_code == 2
    lines = sorted(ln.replace(f"{root}/", "") for ln in result.stderr.splitlines() if ".yaml:" in ln)
    assert lines == [
        "jobs/_helpers.yaml:1:1: job name '_helpers' (the file name) starts with _, which is kept for workspace "
        "files such as jobs/_settings.yaml; rename the file",
        "jobs/_settings.yaml:1:8: lease: lease must be at least 2s",  # the value, after "lease: "
        "jobs/_settings.yaml:2:1: time_alowed: unknown key 'time_alowed' (did you mean 'time_allowed'?)",
    ]


def test_the_fork_server_of_workers_never_loads_polars():
    """Workers are forked from a server that imported weir's modules: polars must not be among them
    (a process must not fork once polars has started its threads)."""
    import sys

    script = ("import importlib, sys; from runner.engine.workers import PRELOAD; "
              "[importlib.import_module(m) for m in PRELOAD]; print(sorted(m for m in sys.modules if m == 'polars'))")
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=BOUND, check=True)
    assert out.stdout.strip() == "[]"


# ---------------------------------------------------------------- item 4: workers that die


@pytest.mark.parametrize("workers", [1, 2])
@pytest.mark.parametrize(("mode", "said"), [
    ("exit", "the worker process running it ended with exit status 3"),
    ("kill", "the worker process running it was killed by signal 9 (SIGKILL"),
], ids=["os-exit", "sigkill"])
def test_a_worker_that_dies_fails_its_window_with_the_reason_and_everything_else_runs(
        tmp_path: Path, workers: int, mode: str, said: str):
    """Hardening item 4: one dying worker (os._exit, or SIGKILL as for memory) fails only its window."""
    table = rollup_job(table="rides_per_hour")
    root = trouble_ws(tmp_path, extra="retries: 1\nretry_delay: 0s\n", jobs={"rides_table": table})
    trouble(root, mode, 3)
    report = backfill(root, "rides_hourly", "rides_table", lo=LO, hi=HI, workers=workers, expect=1)
    assert statuses(report, "rides_table") == {"done": 24}
    assert statuses(report, "rides_hourly") == {"done": 23, "failed": 1}
    failed = next(w for w in report["windows"] if w["status"] == "failed")
    assert failed["window"] == window_id(3) and failed["reason"].startswith(said), failed
    assert history(root, 3) == [(1, "failed", failed["reason"]), (2, "failed", failed["reason"])]
    done = rows(root, "SELECT job, COUNT(*) FROM weir_windows WHERE state = 'done' GROUP BY job")
    assert {r[0]: r[1] for r in done} == {"rides_hourly": 23, "rides_table": 24}
    assert running_runs(root) == [] and rows(root, "SELECT * FROM weir_claims") == []


# ---------------------------------------------------------------- item 3: claims that must not lapse


def test_a_step_holding_the_interpreter_past_the_lease_keeps_its_claim(tmp_path: Path):
    """Hardening item 3: renewals come from the supervising process, so a second run finds the window claimed."""
    root = trouble_ws(tmp_path)
    marker = trouble(root, "hold", 5).with_name("trouble.taken")
    first = spawn(root, "run", "rides_hourly", "--window", window_id(5), "--json")
    try:
        assert wait_until(lambda: running_runs(root) or first.poll() is not None)
        assert first.poll() is None, first.communicate()
        time.sleep(2 * LEASE)  # the lease would have lapsed twice over without renewals
        second = cli_json(root, "run", "rides_hourly", "--window", window_id(5))
        assert second["status"] == "claimed", second
    finally:
        marker.unlink(missing_ok=True)
    code, out, err = finish(first)
    assert code == 0, err
    assert json.loads(out)["status"] == "done"
    assert [r[1] for r in history(root, 5)] == ["done"]


def test_a_paused_runner_whose_claim_was_taken_over_neither_swaps_nor_records_done(tmp_path: Path):
    """Hardening item 3 (fencing): a runner stopped past its lease resumes after another run finished."""
    root = trouble_ws(tmp_path)
    marker = trouble(root, "wait", 6)
    paused = spawn(root, "run", "rides_hourly", "--window", window_id(6), "--json")
    try:
        assert wait_until(lambda: running_runs(root) or paused.poll() is not None)
        assert paused.poll() is None, paused.communicate()
        os.killpg(paused.pid, signal.SIGSTOP)  # the runner, its fork server and its worker
        time.sleep(2 * LEASE)
        marker.unlink()
        taker = cli_json(root, "run", "rides_hourly", "--window", window_id(6))
        assert taker["status"] == "done", taker
    finally:
        os.killpg(paused.pid, signal.SIGCONT)
    code, out, err = finish(paused)
    assert code == 0, err
    outcome = json.loads(out)
    assert outcome["status"] == "claimed" and "claim lost" in outcome["reason"], outcome
    assert [r[1] for r in history(root, 6)] == ["abandoned", "done"]
    # the file on disk is the one the ledger records (hashlib), written by the run that held the claim
    state = rows(root, "SELECT output, output_checksum FROM weir_windows WHERE window_key = ?", (window_key(6),))[0]
    assert sha256_file(root / state["output"]) == state["output_checksum"]
    assert rows(root, "SELECT * FROM weir_claims") == []


def test_a_runner_whose_claim_is_taken_over_stops_that_window(tmp_path: Path):
    """Hardening item 3 (and issue 10): the supervisor's next renewal sees the claim held by another
    runner and stops the worker, instead of letting it compute a result that would be thrown away."""
    import sqlite3

    root = trouble_ws(tmp_path)
    trouble(root, "wait", 8)  # the step would wait for ever
    runner = spawn(root, "run", "rides_hourly", "--window", window_id(8), "--json")
    assert wait_until(lambda: rows(root, "SELECT * FROM weir_claims WHERE fence > 0") or runner.poll() is not None)
    con = sqlite3.connect(root / "state" / "ledger.sqlite", timeout=30)
    with con:  # another runner takes the window over (as after a lapse), with a newer fencing number
        con.execute("UPDATE weir_claims SET owner = 'depot-server:4242:1', fence = fence + 1000")
    con.close()
    code, out, err = finish(runner)
    assert code == 0, err
    outcome = json.loads(out)
    assert outcome["status"] == "claimed" and "claim lost" in outcome["reason"], outcome
    assert [r[1] for r in history(root, 8)] == ["abandoned"]
    assert rows(root, "SELECT owner FROM weir_claims")[0][0] == "depot-server:4242:1"  # not ours to release


# ---------------------------------------------------------------- item 13: one rule for gone holders


def test_after_a_crash_plan_why_and_tick_all_treat_the_dead_runners_windows_as_free(tmp_path: Path):
    """Hardening item 13: a claim whose holder is provably gone is free for every command at once."""
    root = trouble_ws(tmp_path, settings=None)  # the default two-minute lease: expiry plays no part
    marker = trouble(root, "wait", 7)
    crashed = spawn(root, "run", "rides_hourly", "--window", window_id(7))
    assert wait_until(lambda: running_runs(root) or crashed.poll() is not None)
    os.killpg(crashed.pid, signal.SIGKILL)
    crashed.communicate()
    marker.unlink()
    assert len(rows(root, "SELECT * FROM weir_claims")) == 1  # left behind, not expired

    plan = {p["job"]: p for p in cli_json(root, "plan", "--at", AT)}["rides_hourly"]
    assert plan["counts"].get("running", 0) == 0
    assert window_id(7) in [w["window"] for w in plan["due"]]
    assert cli_json(root, "why", "rides_hourly", window_id(7), "--at", AT)["state"] == "missing"
    ran = cli_json(root, "tick", "--at", AT, expect=None)
    assert {w["window"]: w["status"] for w in ran["windows"]}[window_id(7)] == "done"
    assert [r[1] for r in history(root, 7)] == ["abandoned", "done"]


def test_a_runner_killed_alone_leaves_no_worker_behind(tmp_path: Path):
    """Hardening items 4 and 13: SIGKILL to the runner only (as the kernel's out-of-memory killer may
    choose it) takes its worker with it, so no step goes on writing for a runner that is gone."""
    root = trouble_ws(tmp_path, settings=None)
    trouble(root, "wait", 7)
    runner = spawn(root, "run", "rides_hourly", "--window", window_id(7))
    assert wait_until(lambda: running_runs(root) or runner.poll() is not None)
    worker = running_runs(root)[0]["pid"]
    assert worker != runner.pid and alive(worker)
    os.kill(runner.pid, signal.SIGKILL)
    try:
        assert wait_until(lambda: not alive(worker), 30)
    finally:
        os.killpg(runner.pid, signal.SIGKILL)  # whatever is left of what this test started
        runner.communicate()
    plan = {p["job"]: p for p in cli_json(root, "plan", "--at", AT)}["rides_hourly"]
    assert window_id(7) in [w["window"] for w in plan["due"]]


# ---------------------------------------------------------------- item 16: failed forced re-runs


def test_a_failed_forced_rerun_of_an_intact_current_window_leaves_it_done(tmp_path: Path):
    """Hardening item 16: disk full during --force; the old outputs are intact and current, so they stay done."""
    root = trouble_ws(tmp_path)
    assert statuses(backfill(root, "rides_hourly", lo=LO, hi=HI)) == {"done": 24}
    before = {p: sha256_file(p) for p in (root / "state" / "warehouse").rglob("*.parquet")}
    changed = root / "state" / "warehouse" / "rides_hourly" / f"{DAY:%Y-%m-%d}" / "10.parquet"
    changed.write_bytes(changed.read_bytes() + b"\0")  # this one's output is no longer what was recorded
    trouble(root, "disk-full", 9, 10)
    report = backfill(root, "rides_hourly", lo=f"{LO}T09:00", hi=f"{LO}T11:00", extra=("--force", "--yes"),
                      expect=1)
    reasons = {w["window"]: w["reason"] for w in report["windows"]}
    assert statuses(report) == {"failed": 2}
    assert reasons[window_id(9)].endswith("(the previous output is intact and current: the window stays done)")
    assert "stays done" not in reasons[window_id(10)]
    states = {r[0]: r[1] for r in rows(root, "SELECT window_key, state FROM weir_windows")}
    assert states[window_key(9)] == "done" and states[window_key(10)] == "failed"
    assert [r[1] for r in history(root, 9)] == ["done", "failed"]  # the failed attempt stays in history
    # with retries: 0 a failed window waits for a person; hour 9 is not one of those
    plan = {p["job"]: p for p in cli_json(root, "plan", "--at", AT)}["rides_hourly"]
    assert (plan["counts"]["done"], plan["counts"]["failed"]) == (23, 1)
    assert {p: sha256_file(p) for p in before if p != changed} == {p: h for p, h in before.items() if p != changed}


# ---------------------------------------------------------------- SIGTERM and Ctrl-C


@pytest.mark.parametrize("command", ["tick", "backfill"])
def test_sigterm_stops_workers_releases_claims_and_the_tick_lock_in_one_line(tmp_path: Path, command: str):
    """Issue 10 item 10: `kill PID` (SIGTERM to the runner alone) leaves no claim or lock held."""
    root = trouble_ws(tmp_path, settings=None)
    trouble(root, "wait", 2, 3)
    args = ["tick", "--at", AT] if command == "tick" else [
        "backfill", "rides_hourly", "--from", LO, "--to", HI, "--at", AT]
    proc = spawn(root, *args, "--workers", "2")
    assert wait_until(lambda: len(running_runs(root)) == 2 or proc.poll() is not None)
    workers = {r["pid"] for r in running_runs(root)}
    assert proc.poll() is None and len(workers) == 2, proc.communicate()
    os.kill(proc.pid, signal.SIGTERM)
    code, _, err = finish(proc)
    assert code == 128 + signal.SIGTERM
    assert err.strip().splitlines() == [err.strip()] and "SIGTERM" in err and "Traceback" not in err, err
    assert rows(root, "SELECT * FROM weir_claims") == [] and rows(root, "SELECT * FROM weir_locks") == []
    assert running_runs(root) == []
    assert {r[0] for r in rows(root, "SELECT status FROM weir_runs WHERE pid IN (?, ?)", tuple(workers))} == {
        "abandoned"}
    assert wait_until(lambda: not any(alive(pid) for pid in workers), 30)


def test_ctrl_c_stops_every_worker_without_tracebacks_and_exits_130(tmp_path: Path):
    """Issue 15 item 7: SIGINT to the process group, as a terminal sends it."""
    root = trouble_ws(tmp_path, settings=None)
    trouble(root, "wait", 2, 3)
    proc = spawn(root, "backfill", "rides_hourly", "--from", LO, "--to", HI, "--at", AT, "--workers", "2")
    assert wait_until(lambda: len(running_runs(root)) == 2 or proc.poll() is not None)
    workers = {r["pid"] for r in running_runs(root)}
    os.killpg(proc.pid, signal.SIGINT)
    code, _, err = finish(proc)
    assert code == 130
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("weir: interrupted by SIGINT"), err
    assert "Traceback" not in err and "KeyboardInterrupt" not in err
    assert rows(root, "SELECT * FROM weir_claims") == [] and running_runs(root) == []
    assert wait_until(lambda: not any(alive(pid) for pid in workers), 30)
    # a later run resumes: the interrupted windows run, the rest are current
    (root / "state" / "trouble").unlink()
    assert set(statuses(backfill(root, "rides_hourly", lo=LO, hi=HI))) <= {"done", "skipped"}


# ---------------------------------------------------------------- the ledger


def test_a_ledger_of_schema_1_gains_fencing_numbers_and_keeps_its_claims(tmp_path: Path):
    """Claims gained a fencing number (schema 2); a ledger written before is upgraded in place."""
    import sqlite3

    from runner.io.ledger.schema import SCHEMA_VERSION
    from runner.io.ledger.store import Ledger

    path = tmp_path / "ledger.sqlite"
    con = sqlite3.connect(path)  # the schema 1 tables as the previous weir created them
    with con:
        con.execute("CREATE TABLE weir_meta (key VARCHAR(64) PRIMARY KEY, value TEXT NOT NULL)")
        con.execute("INSERT INTO weir_meta VALUES ('schema_version', '1')")
        con.execute("CREATE TABLE weir_claims (job VARCHAR(200), window_key VARCHAR(32), owner VARCHAR(200) NOT NULL, "
                    "expires FLOAT NOT NULL, PRIMARY KEY (job, window_key))")
        con.execute("INSERT INTO weir_claims VALUES ('rides_hourly', '2026-03-28T05:00:00Z', 'depot-server:4242:1', "
                    "4102444800.0)")
    con.close()
    Ledger(f"sqlite:///{path}").dispose()
    con = sqlite3.connect(path)
    try:
        assert SCHEMA_VERSION == 2
        assert con.execute("SELECT value FROM weir_meta WHERE key = 'schema_version'").fetchone() == ("2",)
        assert con.execute("SELECT owner, fence FROM weir_claims").fetchall() == [("depot-server:4242:1", 0)]
    finally:
        con.close()

