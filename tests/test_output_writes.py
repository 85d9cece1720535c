"""Writing outputs safely: SQLite table outputs beside readers, leftover temporary files, folders
swapped for symbolic links (hardening issue 9, items 11, 12 and the output half of 18).

Independent witnesses: Python's sqlite3 as another client of the output database (holding a read
transaction, reading the journal mode, counting rows), polars scanning an output folder as a
reader would, os.stat and the file system for what was written where.
"""

from __future__ import annotations

import sqlite3
from datetime import date
from pathlib import Path

import pytest
from conftest_run import backfill, statuses
from helpers_data import rollup_job, write_rides, write_workspace

DAY = date(2026, 3, 28)  # 24 hourly windows, Lisbon at +00:00


def test_a_table_output_is_written_while_another_client_holds_a_read_transaction(tmp_path: Path):
    """Hardening item 11: a reader holding the output database over 5 s (the driver's default timeout)
    made the write fail with `database is locked`; outputs now use the ledger's WAL and busy timeout."""
    root = write_workspace(tmp_path / "ws", {"rides_table": rollup_job(table="rides_per_hour")})
    write_rides(root, DAY)
    first = backfill(root, "rides_table", lo="2026-03-28T00:00", hi="2026-03-28T12:00")
    assert statuses(first) == {"done": 12}
    db = root / "state" / "out.sqlite"
    reader = sqlite3.connect(db, isolation_level=None, timeout=60)
    try:
        reader.execute("BEGIN")
        held = reader.execute("SELECT COUNT(DISTINCT window_start) FROM rides_per_hour").fetchone()
        second = backfill(root, "rides_table", lo="2026-03-28T12:00", hi="2026-03-28T14:00")
        assert statuses(second) == {"done": 2}, second
        # the reader's snapshot did not move under it; after its transaction it sees every window
        assert reader.execute("SELECT COUNT(DISTINCT window_start) FROM rides_per_hour").fetchone() == held
        reader.execute("COMMIT")
        assert reader.execute("SELECT COUNT(DISTINCT window_start) FROM rides_per_hour").fetchone() > held
        # sqlite3: the database is in write-ahead-log mode, the reason a reader never blocks the writer
        assert reader.execute("PRAGMA journal_mode").fetchone() == ("wal",)
    finally:
        reader.close()


def files_under(folder: Path) -> list[str]:
    """Every file below `folder`, hidden ones included (the file system, not weir)."""
    return sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file())


FLAT_PATH = "state/warehouse/rides/{start:%Y-%m-%dT%H}.parquet"


def test_an_output_folder_swapped_for_a_link_outside_is_refused_by_a_long_lived_process(tmp_path: Path):
    """Hardening item 18 (outputs): a process that had written a folder once remembered its real path;
    after the folder was swapped for a symbolic link to elsewhere, the next window was written there."""
    from runner import api

    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(path=FLAT_PATH)})
    write_rides(root, DAY)
    outside = tmp_path / "outside"
    outside.mkdir()
    assert api.run(root, job="rides_hourly", window="2026-03-28T05:00").status == "done"  # one process from here on
    folder = root / "state" / "warehouse" / "rides"
    assert [p.name for p in folder.iterdir()] == ["2026-03-28T05.parquet"]
    folder.rename(root / "state" / "warehouse" / "rides.moved")
    folder.symlink_to(outside, target_is_directory=True)

    outcome = api.run(root, job="rides_hourly", window="2026-03-28T06:00")
    assert outcome.status == "failed" and "leaves the workspace" in (outcome.error or ""), outcome
    assert files_under(outside) == []  # nothing written there, not even a temporary file


def test_a_log_folder_linked_outside_the_workspace_receives_no_log(tmp_path: Path):
    """Hardening item 18 (outputs): a `state/logs` symbolic link sent failed windows' logs outside."""
    from conftest_run import ledger_rows

    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(path=FLAT_PATH)})
    write_rides(root, DAY, replace={0: {"amount": "-5.00"}})  # a negative amount: the window fails
    outside = tmp_path / "outside"
    outside.mkdir()
    (root / "state" / "logs").symlink_to(outside, target_is_directory=True)
    report = backfill(root, "rides_hourly", lo="2026-03-28T00:00", hi="2026-03-29T00:00", expect=1)
    failed = [w for w in report["windows"] if w["status"] == "failed"]
    assert len(failed) == 1 and "amount" in failed[0]["error"]
    assert files_under(outside) == []
    # the failure is still recorded (sqlite3 reads the ledger)
    assert [r[0] for r in ledger_rows(root, "SELECT status FROM weir_runs WHERE status = 'failed'")] == ["failed"]


LEAVE_A_TEMPORARY = """
import os, sys
from pathlib import Path
from runner.io.outputs import temporary_name
folder = Path(sys.argv[1])
(folder / temporary_name(sys.argv[2])).write_bytes(b"PAR1 half a file")
os._exit(9)  # a writer that died mid-write: nothing tidies up after it
"""


@pytest.mark.parametrize("command", ["tick", "run", "backfill"])
def test_temporary_files_of_dead_writers_are_swept_when_a_run_or_tick_starts(tmp_path: Path, command: str):
    """Hardening item 12: a crash during a forced run of a current window left a `.weir-tmp-*` file that
    nothing removed (nothing re-runs a current window), and a polars scan of the folder failed."""
    import os
    import subprocess
    import sys
    import time

    import polars as pl

    root = write_workspace(tmp_path / "ws", {"rides_hourly": rollup_job(path=FLAT_PATH)})
    write_rides(root, DAY)
    assert statuses(backfill(root, "rides_hourly", lo="2026-03-28T00:00", hi="2026-03-29T00:00")) == {"done": 24}
    folder = root / "state" / "warehouse" / "rides"
    crashed = subprocess.run([sys.executable, "-c", LEAVE_A_TEMPORARY, str(folder), "2026-03-28T05.parquet"],
                             timeout=120)
    assert crashed.returncode == 9
    (dead,) = [p for p in folder.iterdir() if p.name.startswith(".")]
    # weir's own name, but of a writer that is alive (this process) or of another host, recently: kept
    from runner.io.outputs import temporary_name

    alive = folder / temporary_name("2026-03-28T06.parquet")
    alive.write_bytes(b"PAR1 being written")
    elsewhere = folder / ".2026-03-28T07.parquet.weir-tmp-other-host-4242-0badc0de"
    elsewhere.write_bytes(b"PAR1 being written elsewhere")
    abandoned = folder / ".2026-03-28T08.parquet.weir-tmp-other-host-4243-0badc0de"
    abandoned.write_bytes(b"PAR1 left two days ago")
    two_days_ago = time.time() - 2 * 86400
    os.utime(abandoned, (two_days_ago, two_days_ago))
    not_ours = folder / ".notes.weir-tmp-draft"  # not a name weir gives: never touched
    not_ours.write_bytes(b"someone's notes")
    with pytest.raises(pl.exceptions.PolarsError):  # polars: the folder cannot be scanned like this
        pl.scan_parquet(folder).collect()

    if command == "tick":
        from conftest_run import cli_json

        assert cli_json(root, "tick", "--at", "2026-06-01T00:00:00Z")["counts"] == {}
    elif command == "run":
        from conftest_run import cli

        result = cli(root, "run", "rides_hourly", "--window", "2026-03-28T09:00")
        assert result.exit_code == 0, result.stderr
    else:  # every window current: nothing runs, the sweep still happens
        assert statuses(backfill(root, "rides_hourly", lo="2026-03-28T00:00", hi="2026-03-29T00:00")) == {
            "skipped": 24}
    assert not dead.exists() and not abandoned.exists()
    assert alive.exists() and elsewhere.exists() and not_ours.exists()
    for kept in (alive, elsewhere, not_ours):
        kept.unlink()
    assert pl.scan_parquet(folder).collect().height > 0  # polars reads the folder again
