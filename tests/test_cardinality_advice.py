"""Batch-size advice in `weir check`: grouping or splitting by a nearly unique column is warned about.

The rule is common practice (named in runner/core/advice.py): work is grouped and
split by low-cardinality attributes (a date, a category, a method), never by
ids or raw timestamps. Distinct counts expected here come from Python's csv
module and sets over the same files weir samples. The data is the invented
city bike-share (tests/helpers_data.py).
"""

from __future__ import annotations

import csv
import json
import os
from datetime import date
from pathlib import Path

import pytest
from conftest_run import AT, cli
from helpers_data import days, rides_file, write_rides, write_workspace

DAYS = days(date(2026, 3, 22), 3)
SCHEMA = ('    schema: {ride_id: str, started_at: "datetime(Europe/Lisbon)", zone: str, fare: str,'
          ' amount: "decimal(10,2)"}\n')


def job_text(sql: str, fmt: str = SCHEMA) -> str:
    return (
        "window: {every: 1d, start: 2026-03-22, timezone: Europe/Lisbon}\n"
        "inputs:\n"
        "  rides:\n"
        "    files: state/landing/rides/{start:%Y-%m-%d}/*.csv\n"
        f"{fmt}"
        "steps:\n"
        "  - sql: |\n"
        + "".join(f"      {line}\n" for line in sql.splitlines())
        + "output:\n  path: state/warehouse/advised/{start:%Y-%m-%d}.parquet\n"
    )


def check(root: Path):
    return cli(root, "check", "--at", AT)


def sampled(root: Path) -> list[dict[str, str]]:
    rows = []
    for day in DAYS:
        with open(rides_file(root, day), newline="") as fh:  # Python's csv module
            rows.extend(csv.DictReader(fh))
    return rows


def test_grouping_by_an_id_is_warned_about_with_the_sampled_counts(tmp_path: Path):
    sql = "SELECT ride_id, zone, SUM(amount) AS revenue\nFROM rides\nGROUP BY ride_id, zone"
    root = write_workspace(tmp_path / "ws", {"advised": job_text(sql)})
    for day in DAYS:
        write_rides(root, day, rows=60)
    result = check(root)
    assert result.exit_code == 0  # advice never fails the check
    rows = sampled(root)
    distinct = len({r["ride_id"] for r in rows})
    warnings = [ln for ln in result.stderr.splitlines() if "warning:" in ln]
    assert len(warnings) == 1  # zone (five values) is not warned about
    assert "advised.yaml:" in warnings[0]
    assert f"steps.0.sql: warning: step 1 groups by ride_id, which has {distinct:,} distinct values in " \
           f"{len(rows):,} sampled rows of input rides" in warnings[0]
    assert "low-cardinality" in warnings[0]
    as_json = cli(root, "check", "--at", AT, "--json")
    assert as_json.exit_code == 0
    assert any("groups by ride_id" in w for w in json.loads(as_json.stdout)["warnings"])


def test_splitting_by_a_raw_timestamp_is_warned_about(tmp_path: Path):
    sql = ("SELECT ride_id, ROW_NUMBER() OVER (PARTITION BY started_at ORDER BY ride_id) AS n\n"
           "FROM rides")
    root = write_workspace(tmp_path / "ws", {"advised": job_text(sql)})
    for day in DAYS:
        write_rides(root, day, rows=60)
    result = check(root)
    assert result.exit_code == 0
    distinct = len({r["started_at"] for r in sampled(root)})
    assert f"step 1 splits by started_at, which has {distinct:,} distinct values" in result.stderr


@pytest.mark.parametrize("sql", [
    "SELECT zone, fare, COUNT(*) AS rides FROM rides GROUP BY zone, fare",
    "SELECT date_trunc('hour', started_at) AS hour, COUNT(*) AS rides FROM rides\n"
    "GROUP BY date_trunc('hour', started_at)",
    "-- GROUP BY ride_id would be one group per ride\nSELECT zone, 'GROUP BY ride_id' AS note FROM rides",
])
def test_low_cardinality_groups_expressions_and_comments_get_no_advice(tmp_path: Path, sql: str):
    root = write_workspace(tmp_path / "ws", {"advised": job_text(sql)})
    for day in DAYS:
        write_rides(root, day, rows=60)
    result = check(root)
    assert result.exit_code == 0
    assert "warning" not in result.stderr


def test_no_input_files_yet_means_no_advice(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"advised": job_text("SELECT ride_id FROM rides GROUP BY ride_id")})
    result = check(root)
    assert result.exit_code == 0
    assert result.stderr == ""


def test_an_unreadable_sample_never_fails_the_check(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"advised": job_text("SELECT ride_id FROM rides GROUP BY ride_id",
                                                                 fmt="    format: parquet\n" + SCHEMA)})
    path = rides_file(root, DAYS[0])
    path.parent.mkdir(parents=True)
    path.write_bytes(b"ride_id\nthis is not parquet\n" * 50)
    result = check(root)
    assert result.exit_code == 0
    assert "Traceback" not in result.stderr + result.stdout
    assert "warning" not in result.stderr


def _write_ids(path: Path, ids: list[str]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["ride_id", "zone"])
        writer.writerows([[i, "harbour"] for i in ids])


def test_the_sample_is_the_newest_input_and_at_most_ten_thousand_rows(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"advised": job_text("SELECT ride_id FROM rides GROUP BY ride_id",
                                                                 fmt="")})
    unique, repeating = rides_file(root, DAYS[0]), rides_file(root, DAYS[1])
    _write_ids(unique, [f"r{i:06d}" for i in range(10_000)])
    _write_ids(repeating, [f"r{i % 10:06d}" for i in range(10_000)])

    os.utime(unique, ns=(1_700_000_000_000_000_000,) * 2)
    os.utime(repeating, ns=(1_800_000_000_000_000_000,) * 2)  # newest: ten distinct ids in 10,000 rows
    assert "warning" not in check(root).stderr

    os.utime(unique, ns=(1_900_000_000_000_000_000,) * 2)  # now the unique ids are the latest input
    result = check(root)
    assert "step 1 groups by ride_id, which has 10,000 distinct values in 10,000 sampled rows" in result.stderr
