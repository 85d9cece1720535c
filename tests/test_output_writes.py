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
