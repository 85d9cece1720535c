"""Running windows reliably: idempotent re-runs, early cutoff, crashes, concurrency, faults, claims, ledger.

Expected values come from outside weir: DuckDB over the input CSV files,
Python's csv and sqlite3 modules, hashlib's SHA-256 and pyarrow's Parquet
reader; the source is named beside each check. The clock is injected with
`--at`; the only waits are for a subprocess to start running windows and the
random delays before it is killed.
"""

from __future__ import annotations

import csv
import json
import os
import random
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import textwrap
import threading
import time
from datetime import date, datetime
from decimal import Decimal
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from conftest_run import (
    AT,
    backfill,
    cli,
    cli_json,
    ledger_path,
    ledger_rows,
    output_files,
    sha256_file,
    spawn,
    statuses,
)
from helpers_data import (
    SEED,
    TZ,
    daily_job,
    rides_file,
    rollup_job,
    write_rides,
    write_workspace,
)

duckdb = pytest.importorskip("duckdb")
pq = pytest.importorskip("pyarrow.parquet")

DAY = date(2026, 3, 28)  # 24 hourly windows, Lisbon at +00:00
LO, HI = "2026-03-28", "2026-03-29"
HOURLY_DIR = "state/warehouse/rides_hourly"
TMP_MARK = ".weir-tmp-"


def window_id(day: date, hour: int) -> str:
    """A window's id: its local start in ISO 8601 with the offset (zoneinfo, IANA tz database)."""
    return datetime(day.year, day.month, day.day, hour, tzinfo=ZoneInfo(TZ)).isoformat(timespec="minutes")


def window_key(day: date, hour: int) -> str:
    start = datetime(day.year, day.month, day.day, hour, tzinfo=ZoneInfo(TZ)).astimezone(ZoneInfo("UTC"))
    return start.strftime("%Y-%m-%dT%H:%M:%SZ")


def hourly_file(root: Path, day: date, hour: int) -> Path:
    return root / HOURLY_DIR / f"{day:%Y-%m-%d}" / f"{hour:02d}.parquet"


@pytest.fixture
def rides_ws(tmp_path: Path) -> Path:
    """An hourly rollup and its daily consumer over one day of rides."""
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(), "rides_daily": daily_job()})
    write_rides(root, DAY)
    return root


def run_count(root: Path, job: str | None = None) -> int:
    if job is None:
        return ledger_rows(root, "SELECT COUNT(*) FROM weir_runs")[0][0]
    return ledger_rows(root, "SELECT COUNT(*) FROM weir_runs WHERE job = ?", (job,))[0][0]


def window_digests(root: Path, job: str) -> dict[str, str]:
    rows = ledger_rows(root, "SELECT window_key, output_digest FROM weir_windows WHERE job = ?", (job,))
    return {r["window_key"]: r["output_digest"] for r in rows}


def duckdb_hourly(files: list[Path]) -> dict[tuple[str, str, str], tuple[int, int]]:
    """Reference rollup: DuckDB reads the CSV files and buckets rides by UTC hour."""
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    rows = con.execute(
        """
        SELECT strftime(date_trunc('hour', started_at AT TIME ZONE 'UTC'), '%Y-%m-%dT%H:00:00Z'),
               zone, fare, COUNT(*), SUM(amount)
        FROM read_csv(?, header = true, columns = {'ride_id': 'VARCHAR', 'started_at': 'TIMESTAMPTZ',
                      'zone': 'VARCHAR', 'fare': 'VARCHAR', 'amount': 'DECIMAL(10,2)'})
        GROUP BY ALL
        """, [[str(f) for f in files]]).fetchall()
    return {(h, z, f): (n, cents(r)) for h, z, f, n, r in rows}


def cents(value: object) -> int:
    return int((Decimal(str(value)) * 100).to_integral_value())


def assert_ledger_matches_disk(root: Path) -> int:
    """Every done window's file exists and its recorded checksum is the file's SHA-256 (hashlib)."""
    rows = ledger_rows(root, """
        SELECT w.job, w.window_key, w.output, w.output_digest, r.output_checksum, r.output_digest AS run_digest
        FROM weir_windows w JOIN weir_runs r ON r.id = w.run_id WHERE w.state = 'done'""")
    checked = 0
    for r in rows:
        assert r["output_digest"] == r["run_digest"], dict(r)
        if r["output"].startswith("table "):
            continue
        path = root / r["output"]
        assert path.is_file(), dict(r)
        assert sha256_file(path) == r["output_checksum"], dict(r)
        checked += 1
    return checked


def table_rows(root: Path, table: str) -> list[tuple]:
    conn = sqlite3.connect(root / "state" / "out.sqlite", timeout=30)
    try:
        return sorted(conn.execute(f"SELECT window_start, zone, fare, rides, revenue FROM {table}").fetchall())
    finally:
        conn.close()


def table_duplicates(root: Path, table: str) -> list[tuple]:
    # Reference: SQLite itself counts rows per (window, zone, fare)
    conn = sqlite3.connect(root / "state" / "out.sqlite", timeout=30)
    try:
        return conn.execute(f"SELECT window_start, zone, fare, COUNT(*) FROM {table} "
                            "GROUP BY 1, 2, 3 HAVING COUNT(*) > 1").fetchall()
    finally:
        conn.close()


# ---------------------------------------------------------------- idempotency


def test_repeating_a_backfill_skips_every_window_and_records_no_run(rides_ws: Path):
    first = backfill(rides_ws, "rides_hourly", "rides_daily", lo=LO, hi=HI)
    assert statuses(first) == {"done": 25}
    runs = run_count(rides_ws)
    stamps = {p: (rides_ws / p).stat().st_mtime_ns for p in output_files(rides_ws, "state/warehouse")}
    assert len(stamps) == 25

    second = backfill(rides_ws, "rides_hourly", "rides_daily", lo=LO, hi=HI)
    assert statuses(second) == {"skipped": 25}
    assert run_count(rides_ws) == runs
    assert {p: (rides_ws / p).stat().st_mtime_ns for p in stamps} == stamps  # not even rewritten


def test_forced_rerun_writes_byte_identical_files_and_records_equal_digests(rides_ws: Path):
    backfill(rides_ws, "rides_hourly", "rides_daily", lo=LO, hi=HI)
    files = output_files(rides_ws, "state/warehouse")
    digests = {job: window_digests(rides_ws, job) for job in ("rides_hourly", "rides_daily")}

    forced = backfill(rides_ws, "rides_hourly", "rides_daily", lo=LO, hi=HI, extra=("--force", "--yes"))
    assert statuses(forced) == {"done": 25}
    assert forced["replaced"] == 25
    assert output_files(rides_ws, "state/warehouse") == files
    assert {job: window_digests(rides_ws, job) for job in digests} == digests
    runs = ledger_rows(rides_ws, "SELECT window_key, job, forced, output_digest, output_checksum FROM weir_runs "
                                 "WHERE status = 'done' ORDER BY id")
    assert len(runs) == 50
    by_window: dict[tuple[str, str], list[sqlite3.Row]] = {}
    for r in runs:
        by_window.setdefault((r["job"], r["window_key"]), []).append(r)
    for pair in by_window.values():
        assert [r["forced"] for r in pair] == [0, 1]
        assert pair[0]["output_digest"] == pair[1]["output_digest"]
        assert pair[0]["output_checksum"] == pair[1]["output_checksum"]
    assert assert_ledger_matches_disk(rides_ws) == 25

    # no duplicate keys in any file, and every ride counted once (pyarrow reads; csv module counts)
    total = 0
    for rel in output_files(rides_ws, HOURLY_DIR):
        rows = pq.read_table(rides_ws / rel).to_pylist()
        keys = [(r["zone"], r["fare"]) for r in rows]
        assert len(keys) == len(set(keys)), rel
        total += sum(r["rides"] for r in rows)
    with open(rides_file(rides_ws, DAY), newline="") as fh:
        assert total == len(list(csv.DictReader(fh)))


def test_table_output_holds_each_window_once_after_forced_and_changed_reruns(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_table": rollup_job(table="rides_per_hour")})
    write_rides(root, DAY)

    def assert_table_matches_inputs() -> None:
        assert table_duplicates(root, "rides_per_hour") == []
        ours = {(w, z, f): (n, cents(r)) for w, z, f, n, r in table_rows(root, "rides_per_hour")}
        assert ours == duckdb_hourly([rides_file(root, DAY)])  # reference: DuckDB over the CSV

    assert statuses(backfill(root, "rides_table", lo=LO, hi=HI)) == {"done": 24}
    assert_table_matches_inputs()
    for _ in range(2):
        assert statuses(backfill(root, "rides_table", lo=LO, hi=HI, extra=("--force", "--yes"))) == {"done": 24}
        assert_table_matches_inputs()
    write_rides(root, DAY, rows=35, seed=SEED + 1)  # new data for the same day: every hour changes
    assert statuses(backfill(root, "rides_table", lo=LO, hi=HI)) == {"done": 24}
    assert_table_matches_inputs()
    assert statuses(backfill(root, "rides_table", lo=LO, hi=HI)) == {"skipped": 24}


# ---------------------------------------------------------------- early cutoff


def test_cosmetic_sql_edit_reruns_the_producer_but_leaves_its_consumer_current(rides_ws: Path):
    backfill(rides_ws, "rides_hourly", "rides_daily", lo=LO, hi=HI)
    before = output_files(rides_ws, "state/warehouse")
    code_before = {r[0] for r in ledger_rows(rides_ws, "SELECT fp_code FROM weir_windows WHERE job = 'rides_hourly'")}
    # keywords' case and white space only (polars SQL column names are case-sensitive, so those stay)
    reformatted = "select zone,   fare,\n       count(*) as rides,\n  Sum(amount)  AS revenue\n\nfrom rides\ngroup   BY zone , fare\n"
    write_workspace(rides_ws, {"rides_hourly": rollup_job(sql=reformatted)})

    report = backfill(rides_ws, "rides_hourly", lo=LO, hi=HI, extra=("--downstream",))
    assert statuses(report, "rides_hourly") == {"done": 24}  # the code changed: the producer re-runs
    assert statuses(report, "rides_daily") == {"skipped": 1}  # its data did not: the consumer stays done
    assert run_count(rides_ws, "rides_daily") == 1
    assert output_files(rides_ws, "state/warehouse") == before
    code_after = {r[0] for r in ledger_rows(rides_ws, "SELECT fp_code FROM weir_windows WHERE job = 'rides_hourly'")}
    assert code_after.isdisjoint(code_before)

    assert statuses(backfill(rides_ws, "rides_daily", lo=LO, hi=HI)) == {"skipped": 1}
    assert run_count(rides_ws, "rides_daily") == 1


def test_changed_producer_result_reruns_its_consumer_on_a_downstream_backfill(rides_ws: Path):
    backfill(rides_ws, "rides_hourly", "rides_daily", lo=LO, hi=HI)
    upstream_before = ledger_rows(rides_ws, "SELECT fp_upstream FROM weir_windows WHERE job = 'rides_daily'")[0][0]
    members_only = "SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue\nFROM rides\n" \
                   "WHERE fare <> 'casual'\nGROUP BY zone, fare\n"
    write_workspace(rides_ws, {"rides_hourly": rollup_job(sql=members_only)})

    report = backfill(rides_ws, "rides_hourly", lo=LO, hi=HI, extra=("--downstream",))
    assert statuses(report, "rides_hourly") == {"done": 24}
    assert statuses(report, "rides_daily") == {"done": 1}
    assert ledger_rows(rides_ws, "SELECT fp_upstream FROM weir_windows WHERE job = 'rides_daily'")[0][0] \
        != upstream_before

    # Reference: DuckDB over the CSV, without casual rides, per zone for the day
    con = duckdb.connect()
    expected = {z: (n, cents(r)) for z, n, r in con.execute(
        """SELECT zone, COUNT(*), SUM(amount) FROM read_csv(?, header = true, columns = {'ride_id': 'VARCHAR',
           'started_at': 'VARCHAR', 'zone': 'VARCHAR', 'fare': 'VARCHAR', 'amount': 'DECIMAL(10,2)'})
           WHERE fare <> 'casual' GROUP BY zone""", [str(rides_file(rides_ws, DAY))]).fetchall()}
    daily = pq.read_table(rides_ws / f"state/warehouse/rides_daily/{DAY:%Y-%m-%d}.parquet").to_pylist()
    assert {r["zone"]: (r["rides"], cents(r["revenue"])) for r in daily} == expected


# ---------------------------------------------------------------- crashes


class Watcher(threading.Thread):
    """Reads every final-named output file with pyarrow, and the output table, over and over."""

    def __init__(self, root: Path, table: str):
        super().__init__(daemon=True)
        self.root, self.table = root, table
        self.stop = threading.Event()
        self.reads = 0
        self.table_reads = 0
        self.problems: list[str] = []

    def run(self) -> None:
        try:
            self._watch()
        except Exception as exc:  # noqa: BLE001 - a watcher that dies must say why, not stop reading silently
            self.problems.append(f"watcher stopped: {type(exc).__name__}: {exc}")

    def _watch(self) -> None:
        base = self.root / "state" / "warehouse"
        while not self.stop.is_set():
            for path in list(base.rglob("*.parquet")) if base.exists() else []:
                if path.name.startswith("."):
                    continue  # temporary files are hidden and never read
                try:
                    pq.read_table(path)  # reference reader: pyarrow must parse every visible file
                    self.reads += 1
                except Exception as exc:  # noqa: BLE001 - any failure to parse is what we look for
                    self.problems.append(f"{path.relative_to(self.root)}: {type(exc).__name__}: {exc}")
            try:
                dupes = table_duplicates(self.root, self.table)
                self.table_reads += 1
                if dupes:
                    self.problems.append(f"duplicate rows in {self.table}: {dupes[:3]}")
            except sqlite3.OperationalError:
                pass  # no table yet, or locked by a writer this instant
            self.stop.wait(0.02)  # leave the CPU to the runs being killed


def last_run_id(root: Path) -> int:
    try:
        return ledger_rows(root, "SELECT COALESCE(MAX(id), 0) FROM weir_runs")[0][0]
    except sqlite3.OperationalError:
        return 0  # no ledger yet


def _wait_until_running(root: Path, proc: subprocess.Popen[str], after: int, timeout: float = 60.0) -> bool:
    """Poll the ledger until a run newer than `after` has started (True), or `proc` has ended (False).

    Runs are recorded by `proc`'s worker processes, so they are told apart by id, not pid.
    """
    deadline = time.monotonic() + timeout
    while proc.poll() is None and time.monotonic() < deadline:
        if last_run_id(root) > after:
            return True
        time.sleep(0.01)
    return proc.poll() is None


def test_backfills_killed_at_random_moments_resume_to_a_clean_runs_outputs(tmp_path: Path):
    """Asserts outcomes, however many of the kills land mid-window on this machine (issue 14)."""
    jobs = {"rides_hourly": rollup_job(), "rides_daily": daily_job(),
            "rides_table": rollup_job(table="rides_per_hour")}
    clean = write_workspace(tmp_path / "clean", jobs)
    root = write_workspace(tmp_path / "ws", jobs)
    for ws in (clean, root):
        write_rides(ws, DAY)
    every = ("rides_hourly", "rides_daily", "rides_table")
    assert statuses(backfill(clean, *every, lo=LO, hi=HI)) == {"done": 49}

    rng = random.Random(SEED)
    watcher = Watcher(root, "rides_per_hour")
    watcher.start()
    kills = 0
    killed = False
    try:
        for _ in range(24):
            args = ["backfill", *every, "--to", HI, "--at", AT, "--workers", "1"]
            if killed and rng.random() < 0.5:
                args += ["--from", LO]  # resume what the killed run left
            else:  # a forced re-run from a random hour: there is always work to cut short
                args += ["--from", f"{LO}T{rng.randrange(24):02d}:00", "--force", "--yes"]
            before = last_run_id(root)
            proc = spawn(root, *args)
            try:
                # once it has started running windows, kill it after a random part of a second
                if _wait_until_running(root, proc, before):
                    proc.communicate(timeout=rng.uniform(0.0, 0.6))
                proc.communicate(timeout=60)
                killed = False
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)  # its own session: exactly what this test started
                proc.communicate()
                kills += 1
                killed = True
    finally:
        watcher.stop.set()
        watcher.join(10)
    # a run cut short stays `running` until its window finishes in a later run, which marks it `abandoned`;
    # at least one of 24 kills must have cut a window short, or this test would have tested nothing
    interrupted = ledger_rows(root, "SELECT COUNT(*) FROM weir_runs WHERE status IN ('running', 'abandoned')")[0][0]
    assert kills >= 1 and interrupted >= 1, (kills, interrupted)

    resumed = spawn(root, "backfill", *every, "--from", LO, "--to", HI, "--at", AT, "--workers", "1", "--json")
    out, err = resumed.communicate(timeout=60)
    assert resumed.returncode == 0, err
    assert set(statuses(json.loads(out))) <= {"done", "skipped"}

    assert watcher.problems == []
    assert watcher.reads >= 1 and watcher.table_reads >= 1  # it watched (how often depends on the machine)
    assert output_files(root, "state/warehouse") == output_files(clean, "state/warehouse")
    assert table_duplicates(root, "rides_per_hour") == []
    assert table_rows(root, "rides_per_hour") == table_rows(clean, "rides_per_hour")
    assert assert_ledger_matches_disk(root) == 25
    done = ledger_rows(root, "SELECT job, COUNT(*) FROM weir_windows WHERE state = 'done' GROUP BY job")
    assert {r[0]: r[1] for r in done} == {"rides_hourly": 24, "rides_daily": 1, "rides_table": 24}

    # temporary files a killed run left behind go with the next run of their window
    assert statuses(backfill(root, *every, lo=LO, hi=HI, extra=("--force", "--yes"))) == {"done": 49}
    assert [p for p in (root / "state" / "warehouse").rglob("*") if TMP_MARK in p.name] == []
    assert output_files(root, "state/warehouse") == output_files(clean, "state/warehouse")


def test_next_run_of_a_window_removes_its_leftover_temporary_files(rides_ws: Path):
    backfill(rides_ws, "rides_hourly", lo=LO, hi=HI)
    final = hourly_file(rides_ws, DAY, 5)
    ended = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                           text=True, timeout=60)
    dead = int(ended.stdout)  # the process id of a writer that has ended (names without a host: older weir)
    mine = final.parent / f".{final.name}{TMP_MARK}{dead}-0badc0de"
    other = final.parent / f".06.parquet{TMP_MARK}{dead}-0badc0de"
    for leftover in (mine, other):
        leftover.write_bytes(b"PAR1 half a file")
    before = final.read_bytes()

    result = cli(rides_ws, "run", "rides_hourly", "--window", window_id(DAY, 5), "--force")
    assert result.exit_code == 0, result.output
    assert not mine.exists()
    assert not other.exists()  # a run sweeps every output folder (hardening item 12)
    assert final.read_bytes() == before


# ---------------------------------------------------------------- concurrency


@pytest.mark.parametrize("workers", ["1", "2"], ids=["in-process", "worker-processes"])
def test_two_backfills_started_together_run_each_window_exactly_once(tmp_path: Path, workers: str):
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job()})
    first = date(2026, 3, 27)
    for i in range(3):
        write_rides(root, date(2026, 3, 27 + i))
    args = ("backfill", "rides_hourly", "--from", f"{first}", "--to", "2026-03-30", "--at", AT, "--json")
    procs = [spawn(root, *args, "--workers", workers), spawn(root, *args, "--workers", workers)]
    reports = []
    for proc in procs:
        out, err = proc.communicate(timeout=120)
        assert proc.returncode == 0, err
        reports.append(json.loads(out))

    windows = 24 + 24 + 23
    done_per_window: dict[str, int] = {}
    for report in reports:
        assert len(report["windows"]) == windows
        assert set(statuses(report)) <= {"done", "skipped", "claimed"}
        for w in report["windows"]:
            done_per_window[w["window"]] = done_per_window.get(w["window"], 0) + (w["status"] == "done")
    assert len(done_per_window) == windows
    assert set(done_per_window.values()) == {1}
    rows = ledger_rows(root, "SELECT window_key, COUNT(*) AS n FROM weir_runs "
                             "WHERE status = 'done' GROUP BY window_key")
    assert len(rows) == windows and {r["n"] for r in rows} == {1}
    assert ledger_rows(root, "SELECT COUNT(*) FROM weir_runs WHERE status <> 'done'")[0][0] == 0


# ---------------------------------------------------------------- faults


def assert_failed_cleanly(root: Path, job: str, report: dict, failed_id: str, *needles: str) -> str:
    """One failed window with a one-line message containing `needles`; every other window done.

    The message is also in state/logs/JOB/WINDOW.log with a traceback, and in `weir history --json`.
    """
    failed = [w for w in report["windows"] if w["status"] == "failed"]
    assert [w["window"] for w in failed] == [failed_id]
    message = failed[0]["reason"]
    assert "\n" not in message and message.strip()
    for needle in needles:
        assert needle in message, message
    assert {w["status"] for w in report["windows"] if w["window"] != failed_id} == {"done"}

    log = root / "state" / "logs" / job / f"{failed_id}.log"
    text = log.read_text()
    assert message in text and "Traceback (most recent call last)" in text

    history = cli_json(root, "history", job, "--window", failed_id)
    assert history[0]["status"] == "failed" and history[0]["error"] == message
    return message


def test_python_step_that_raises_fails_its_window_and_keeps_its_previous_output(rides_ws: Path):
    module = """\
        import polars as pl

        def rollup(rides, window):
            if window.start.hour == 3 and BROKEN:
                raise RuntimeError("dock sensor feed unreadable")
            return rides.group_by("zone", "fare").agg(pl.len().alias("rides"), pl.col("amount").sum().alias("revenue"))
        """
    steps = "  - python: fleet_steps_raising:rollup\n"
    write_workspace(rides_ws, {"rides_hourly": rollup_job(steps=steps)},
                    {"fleet_steps_raising.py": textwrap.dedent(module) + "BROKEN = False\n"})
    assert statuses(backfill(rides_ws, "rides_hourly", lo=LO, hi=HI)) == {"done": 24}
    before = output_files(rides_ws, HOURLY_DIR)

    write_workspace(rides_ws, {}, {"fleet_steps_raising.py": textwrap.dedent(module) + "BROKEN = True\n"})
    report = backfill(rides_ws, "rides_hourly", lo=LO, hi=HI, expect=1)
    assert_failed_cleanly(rides_ws, "rides_hourly", report, window_id(DAY, 3), "RuntimeError",
                          "dock sensor feed unreadable")
    assert output_files(rides_ws, HOURLY_DIR) == before  # the failed hour kept its file, the others rewrote the same
    state = ledger_rows(rides_ws, "SELECT state, output FROM weir_windows WHERE window_key = ?",
                        (window_key(DAY, 3),))[0]
    assert (state["state"], state["output"]) == ("failed", f"{HOURLY_DIR}/{DAY:%Y-%m-%d}/03.parquet")


def test_cast_failure_names_the_file_row_column_and_value_and_keeps_the_previous_output(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(amount="float")})
    write_rides(root, DAY)
    assert statuses(backfill(root, "rides_hourly", lo=LO, hi=HI)) == {"done": 24}
    before = output_files(root, HOURLY_DIR)

    path = write_rides(root, DAY, replace={17: {"amount": "n/a"}})
    with open(path, newline="") as fh:  # reference: the csv module numbers the data rows from 1
        rows = list(csv.DictReader(fh))
    row = next(i for i, r in enumerate(rows, start=1) if r["amount"] == "n/a")
    hour = datetime.fromisoformat(rows[row - 1]["started_at"]).astimezone(ZoneInfo(TZ)).hour

    report = backfill(root, "rides_hourly", lo=LO, hi=HI, expect=1)
    message = assert_failed_cleanly(root, "rides_hourly", report, window_id(DAY, hour),
                                    f"state/landing/rides/{DAY:%Y-%m-%d}/rides.csv", f"row {row}", "amount", "'n/a'")
    assert "float" in message
    assert output_files(root, HOURLY_DIR) == before


def _permissions_enforced(tmp: Path) -> list[str] | None:
    """A command prefix under which a read-only folder stays read-only, or None when there is none.

    Root ignores permissions; `setpriv` (util-linux) can drop the capabilities that let it.
    """
    probe = tmp / "probe"
    probe.mkdir(mode=0o555)
    prefix: list[str] = []
    if os.geteuid() == 0:
        setpriv = shutil.which("setpriv")
        if setpriv is None:
            return None
        prefix = [setpriv, "--bounding-set=-dac_override,-dac_read_search,-fowner"]
    tried = subprocess.run([*prefix, sys.executable, "-c", f"open({str(probe / 'x')!r}, 'w')"],
                           capture_output=True, text=True, timeout=60)
    return prefix if tried.returncode != 0 and "PermissionError" in tried.stderr else None


def test_read_only_output_folder_fails_its_windows_and_keeps_their_outputs(tmp_path: Path):
    prefix = _permissions_enforced(tmp_path)
    if prefix is None:
        pytest.skip("permissions cannot be enforced here; see the parent-is-a-file test")
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job()})
    for day in (DAY, date(2026, 3, 29)):
        write_rides(root, day)
    assert statuses(backfill(root, "rides_hourly", lo=LO, hi="2026-03-30")) == {"done": 47}
    folder = root / HOURLY_DIR / f"{DAY:%Y-%m-%d}"
    before = output_files(root, HOURLY_DIR)
    folder.chmod(0o555)
    try:
        proc = subprocess.run(
            [*prefix, sys.executable, "-m", "runner", "-C", str(root), "backfill", "rides_hourly", "--from", LO,
             "--to", "2026-03-30", "--at", AT, "--workers", "1", "--force", "--yes", "--json"],
            capture_output=True, text=True, timeout=120)
    finally:
        folder.chmod(0o755)
    assert proc.returncode == 1, proc.stderr
    report = json.loads(proc.stdout)
    assert statuses(report) == {"failed": 24, "done": 23}
    assert output_files(root, HOURLY_DIR) == before
    failed = {w["window"]: w["reason"] for w in report["windows"] if w["status"] == "failed"}
    assert set(failed) == {window_id(DAY, h) for h in range(24)}
    history = {h["window_id"]: h for h in cli_json(root, "history", "rides_hourly", "--limit", "1000")
               if h["status"] == "failed"}
    for wid, reason in failed.items():
        message = history[wid]["error"]
        assert "\n" not in message and "Permission denied" in message, message
        assert message in (root / "state" / "logs" / "rides_hourly" / f"{wid}.log").read_text()
        # forced re-runs of windows whose outputs are intact and current: they stay done (hardening item 16)
        assert reason == f"{message} (the previous output is intact and current: the window stays done)"
    states = ledger_rows(root, "SELECT state, COUNT(*) FROM weir_windows GROUP BY state")
    assert {r[0]: r[1] for r in states} == {"done": 47}


def test_output_folder_that_cannot_be_created_fails_its_windows_and_the_rest_still_run(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job()})
    sunday = date(2026, 3, 29)
    for day in (DAY, sunday):
        write_rides(root, day)
    assert statuses(backfill(root, "rides_hourly", lo=LO, hi="2026-03-30")) == {"done": 47}
    saturday_files = output_files(root, f"{HOURLY_DIR}/{DAY:%Y-%m-%d}")
    digests = window_digests(root, "rides_hourly")
    # a file where Sunday's folder should be: mkdir fails even for root, unlike a chmod
    sunday_dir = root / HOURLY_DIR / f"{sunday:%Y-%m-%d}"
    sunday_dir.rename(sunday_dir.with_name("sunday-saved"))
    sunday_dir.write_text("not a folder")
    # Sunday's first window only, so one window fails among the 24 of Saturday
    report = backfill(root, "rides_hourly", lo=LO, hi="2026-03-29T01:00", extra=("--force", "--yes"), expect=1)
    message = assert_failed_cleanly(root, "rides_hourly", report, window_id(sunday, 0),
                                    f"{sunday:%Y-%m-%d}")
    assert "folder" in message or "directory" in message
    assert output_files(root, f"{HOURLY_DIR}/{DAY:%Y-%m-%d}") == saturday_files
    assert sunday_dir.read_text() == "not a folder"
    # the failed window still names its last good output, so consumers and digests keep referring to it
    assert window_digests(root, "rides_hourly") == digests

    sunday_dir.unlink()
    sunday_dir.with_name("sunday-saved").rename(sunday_dir)
    report = backfill(root, "rides_hourly", lo=LO, hi="2026-03-30")
    assert statuses(report) == {"done": 1, "skipped": 46}


def test_retries_turn_a_first_failure_into_done_and_record_every_attempt(tmp_path: Path):
    module = """\
        from pathlib import Path

        import polars as pl

        MARKER = Path(__file__).parent / "state" / "feed-ready"

        def rollup(rides):
            if not MARKER.exists():
                MARKER.write_text("the first attempt was here")
                raise RuntimeError("dock feed not ready yet")
            return rides.group_by("zone", "fare").agg(pl.len().alias("rides"), pl.col("amount").sum().alias("revenue"))
        """
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(
        steps="  - python: fleet_steps_flaky:rollup\n", extra="retries: 2\nretry_delay: 0s\n")},
        {"fleet_steps_flaky.py": module})
    write_rides(root, DAY)

    outcome = cli_json(root, "run", "rides_hourly", "--window", window_id(DAY, 9))
    assert outcome["status"] == "done"
    runs = ledger_rows(root, "SELECT attempt, status, error FROM weir_runs ORDER BY id")
    assert [(r["attempt"], r["status"]) for r in runs] == [(1, "failed"), (2, "done")]
    assert "dock feed not ready yet" in runs[0]["error"]
    history = cli_json(root, "history", "rides_hourly")
    assert [(h["attempt"], h["status"]) for h in history] == [(2, "done"), (1, "failed")]
    state = ledger_rows(root, "SELECT state, failures FROM weir_windows")[0]
    assert (state["state"], state["failures"]) == ("done", 0)


def test_retries_give_up_after_the_last_attempt(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(
        steps="  - python: fleet_steps_always:rollup\n", extra="retries: 2\nretry_delay: 0s\n")},
        {"fleet_steps_always.py": "def rollup(rides):\n    raise RuntimeError('dock feed gone')\n"})
    write_rides(root, DAY)
    result = cli(root, "run", "rides_hourly", "--window", window_id(DAY, 9), "--json")
    assert result.exit_code == 1
    assert json.loads(result.stdout)["status"] == "failed"
    runs = ledger_rows(root, "SELECT attempt, status FROM weir_runs ORDER BY id")
    assert [(r["attempt"], r["status"]) for r in runs] == [(1, "failed"), (2, "failed"), (3, "failed")]


# ---------------------------------------------------------------- claims


def _ledger(root: Path):
    from runner.io.ledger.store import Ledger

    return Ledger(f"sqlite:///{ledger_path(root)}")


def _this_process() -> str:
    from runner.io.owners import owner_id

    return owner_id()


@pytest.mark.parametrize("owner", [
    "depot-server:4242:1",  # another host: its liveness cannot be known, only its expiry
    f"{socket.gethostname()}:4242:7:0000000000000000:cafe",  # same host name, another machine or container
    _this_process(),  # a live process of this machine: this test
], ids=["other-host", "same-name-elsewhere", "live-local-process"])
def test_window_claimed_by_a_live_owner_is_skipped_as_claimed(rides_ws: Path, owner: str):
    _ledger(rides_ws).claim("rides_hourly", window_key(DAY, 4), owner, ttl=3600)
    report = backfill(rides_ws, "rides_hourly", lo=LO, hi=HI)
    assert statuses(report) == {"done": 23, "claimed": 1}
    assert [w["window"] for w in report["windows"] if w["status"] == "claimed"] == [window_id(DAY, 4)]
    assert not hourly_file(rides_ws, DAY, 4).exists()
    assert run_count(rides_ws) == 23
    assert _ledger(rides_ws).claimed("rides_hourly") == {("rides_hourly", window_key(DAY, 4)): owner}


def test_expired_claim_is_taken_over(rides_ws: Path):
    _ledger(rides_ws).claim("rides_hourly", window_key(DAY, 4), "depot-server:4242:1", ttl=1e-6)
    report = backfill(rides_ws, "rides_hourly", lo=LO, hi=HI)
    assert statuses(report) == {"done": 24}
    assert hourly_file(rides_ws, DAY, 4).exists()
    assert _ledger(rides_ws).claimed() == {}


def test_claim_of_an_ended_process_on_this_host_is_taken_over_before_it_expires(rides_ws: Path):
    # a real process takes the claim in its own name and ends without releasing it
    script = ("import sys; from runner.io.ledger.store import Ledger; from runner.io.owners import owner_id; "
              "sys.exit(0 if Ledger(sys.argv[1]).claim('rides_hourly', sys.argv[2], owner_id(), 3600) else 1)")
    subprocess.run([sys.executable, "-c", script, f"sqlite:///{ledger_path(rides_ws)}", window_key(DAY, 4)],
                   check=True, timeout=60)
    assert list(_ledger(rides_ws).claimed()) == []  # provably gone: free for every command at once (item 13)
    assert ledger_rows(rides_ws, "SELECT COUNT(*) FROM weir_claims")[0][0] == 1
    report = backfill(rides_ws, "rides_hourly", lo=LO, hi=HI)
    assert statuses(report) == {"done": 24}
    assert _ledger(rides_ws).claimed() == {}


# ---------------------------------------------------------------- refusals


@pytest.mark.parametrize("template", [
    "../outside/{start:%Y-%m-%d/%H}.parquet",
    "/tmp/weir-outside/{start:%Y-%m-%d/%H}.parquet",
    "state/{start:%Y-%m-%d/%H}/../../../../outside.parquet",
    "state/{start:../../../%Y-%m-%d/%H}.parquet",
])
def test_check_refuses_an_output_path_that_leaves_the_workspace(tmp_path: Path, template: str):
    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(path=template)})
    result = cli(root, "check", "--at", AT)
    assert result.exit_code == 2
    lines = [ln for ln in result.stderr.splitlines() if "rides_hourly.yaml:" in ln]
    assert len(lines) == 1 and "output.path" in lines[0] and "leaves the workspace" in lines[0]
    assert "Traceback" not in result.output


def _one_line_error(result) -> str:
    lines = [ln for ln in result.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.output
    return lines[0]


def test_ledger_from_a_newer_weir_is_refused_with_one_line(rides_ws: Path):
    from runner.io.ledger.schema import SCHEMA_VERSION

    backfill(rides_ws, "rides_hourly", lo=LO, hi="2026-03-28T02:00")
    conn = sqlite3.connect(ledger_path(rides_ws))
    with conn:
        conn.execute("UPDATE weir_meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION + 1),))
    conn.close()
    for args in (("backfill", "rides_hourly", "--from", LO, "--to", HI, "--at", AT, "--workers", "1"),
                 ("history", "rides_hourly")):
        result = cli(rides_ws, *args)
        assert result.exit_code == 2
        line = _one_line_error(result)
        assert "newer" in line and str(SCHEMA_VERSION + 1) in line
    version = ledger_rows(rides_ws, "SELECT value FROM weir_meta WHERE key = 'schema_version'")[0][0]
    assert version == str(SCHEMA_VERSION + 1)  # left as it was, not rewritten
    assert not hourly_file(rides_ws, DAY, 5).exists()


def test_corrupt_ledger_file_gives_one_line_and_is_left_untouched(rides_ws: Path):
    garbage = random.Random(SEED).randbytes(8192)
    ledger_path(rides_ws).write_bytes(garbage)
    for args in (("backfill", "rides_hourly", "--from", LO, "--to", HI, "--at", AT, "--workers", "1"),
                 ("history", "rides_hourly")):
        result = cli(rides_ws, *args)
        assert result.exit_code == 2
        line = _one_line_error(result)
        assert "ledger" in line and str(ledger_path(rides_ws)) in line
    assert ledger_path(rides_ws).read_bytes() == garbage
    assert not (rides_ws / HOURLY_DIR).exists()


def test_a_table_output_in_a_sqlite_file_whose_folder_does_not_exist_yet_is_written(tmp_path: Path):
    job = rollup_job(table="rides_per_hour").replace("sqlite:///state/out.sqlite",
                                                     "sqlite:///state/new/folder/out.sqlite")
    root = write_workspace(tmp_path / "ws", {"rides_table": job})
    write_rides(root, DAY)
    assert not (root / "state" / "new").exists()
    assert statuses(backfill(root, "rides_table", lo=LO, hi=HI)) == {"done": 24}
    # sqlite3 (the standard library) as an independent reader of the written table
    con = sqlite3.connect(root / "state" / "new" / "folder" / "out.sqlite")
    hours_with_rides = {w for w, _, _ in duckdb_hourly([rides_file(root, DAY)])}  # reference: DuckDB
    assert con.execute("SELECT COUNT(DISTINCT window_start) FROM rides_per_hour").fetchone()[0] == len(
        hours_with_rides)
