"""Helpers for the planning tests (plan, tick, serve, stale, why, impact, verify).

Imported explicitly by tests/test_plan.py, test_tick.py, test_stale_why.py,
test_verify.py and test_plan_bad_input.py; not a pytest conftest.

* Instants and window names computed outside weir, with zoneinfo (the IANA
  tz database): `wid` is a window id (ISO 8601 local start with offset),
  `wkey` its ledger key (UTC start).
* Small job files of the invented bike-share and `land_hour`, which writes
  one hour of rides as a small CSV file (optionally with a chosen mtime).
* `gated_tick`: exactly what `weir tick` does (runner/cli/running.py `tick`): ask the
  idle-tick gate first, and tick in full only when it says so.
* `example_workspace`: a copy of the repository's example jobs over three
  days of the demo's landing data, backfilled once per test session.
"""

from __future__ import annotations

import os
import re
import shutil
import sqlite3
import sys
import textwrap
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from conftest_run import AT, cli_json

LISBON = ZoneInfo("Europe/Lisbon")
REPO = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------- instants (zoneinfo, not weir)


def utc(text: str) -> datetime:
    """An aware UTC datetime from ISO 8601 text (Python's datetime parser)."""
    value = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return value.astimezone(UTC)


def wid(instant: datetime, tz: ZoneInfo = LISBON) -> str:
    """A window id: the local start in ISO 8601 with its offset (zoneinfo, IANA tz database)."""
    local = instant.astimezone(tz)
    return local.isoformat(timespec="minutes" if local.second == 0 else "seconds")


def wkey(instant: datetime) -> str:
    """A ledger window key: the UTC start, RFC 3339."""
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def at_text(instant: datetime) -> str:
    """An `--at` value (UTC, with a Z)."""
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def local_midnight(year: int, month: int, day: int, tz: ZoneInfo = LISBON) -> datetime:
    """Local midnight as a UTC instant (zoneinfo)."""
    return datetime(year, month, day, tzinfo=tz).astimezone(UTC)


def hours(first: datetime, count: int) -> list[datetime]:
    """`count` consecutive UTC hour starts (absolute time: what an `every: 1h` cadence steps by)."""
    return [first + timedelta(hours=i) for i in range(count)]


# ---------------------------------------------------------------- job files and data

ROLLUP_SQL = """\
SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue
FROM rides
GROUP BY zone, fare
"""

RIDES_FILES = "state/landing/rides/{start:%Y-%m-%d}/{start:%H}-*.csv"


def hourly_job(start: str, end: str, settle: str = "10m", extra: str = "", sql: str = ROLLUP_SQL,
               time_column: str = "started_at", amount: str = "decimal(10,2)") -> str:
    """Rides and revenue per local hour, zone and fare, from one small CSV per hour."""
    return (
        "description: Rides and revenue per hour, zone and fare.\n"
        f"window: {{every: 1h, start: {start}, end: {end}, timezone: Europe/Lisbon, settle: {settle}}}\n"
        f"{extra}"
        "inputs:\n"
        "  rides:\n"
        f'    files: "{RIDES_FILES}"\n'
        f"    time_column: {time_column}\n"
        "    schema:\n"
        "      ride_id: {type: str, nullable: false}\n"
        "      started_at: datetime(Europe/Lisbon)\n"
        "      zone: str\n"
        "      fare: {type: str, values: [member, casual, day_pass]}\n"
        f'      amount: {{type: "{amount}", min: 0}}\n'
        "steps:\n"
        "  - sql: |\n" + textwrap.indent(sql, " " * 6) +
        "output:\n"
        '  path: "state/warehouse/rides_hourly/{start:%Y-%m-%d/%H}.parquet"\n'
        "  checks:\n"
        "    - key: [zone, fare]\n"
    )


def daily_job(producer: str = "rides_hourly", start: str = "2026-03-28", end: str = "2026-04-05",
              settle: str = "30m", extra: str = "") -> str:
    """Rides and revenue per local day and zone, from every hourly window of the day."""
    return (
        "description: Rides and revenue per local day and zone.\n"
        f"window: {{every: 1d, start: {start}, end: {end}, timezone: Europe/Lisbon, settle: {settle}}}\n"
        f"{extra}"
        "inputs:\n"
        f"  hourly: {{job: {producer}}}\n"
        "steps:\n"
        "  - sql: |\n"
        "      SELECT zone, SUM(rides) AS rides, SUM(revenue) AS revenue\n"
        "      FROM hourly\n"
        "      GROUP BY zone\n"
        "output:\n"
        f'  path: "state/warehouse/{producer}_daily/{{start:%Y-%m-%d}}.parquet"\n'
    )


def bounds_job(cadence: str, start: str, end: str, settle: str = "0m", tz: str = "Europe/Lisbon",
               name: str = "tally") -> str:
    """A job without inputs (one row per window: its bounds), for due-moment checks without data."""
    return (
        "description: One row per window, for checking due moments.\n"
        f"window: {{{cadence}, start: {start}, end: {end}, timezone: {tz}, settle: {settle}}}\n"
        "steps:\n"
        "  - sql: SELECT window_start, window_end FROM bounds\n"
        "output:\n"
        f'  path: "state/warehouse/{name}/{{start:%Y-%m-%dT%H%M%z}}.parquet"\n'
    )


ZONES = ("riverside", "old_town", "harbour")
FARES = ("member", "casual", "day_pass")


def ride_lines(start: datetime, rows: int, salt: str = "") -> list[str]:
    """CSV lines of `rows` rides starting inside the hour that begins at `start` (UTC)."""
    out = []
    for i in range(rows):
        began = (start + timedelta(minutes=(7 * i + 3) % 60)).astimezone(LISBON)
        cents = 150 + 37 * i + len(salt)
        out.append(f"r{start:%Y%m%d%H}{salt}-{i:03d},{began.isoformat(timespec='seconds')},"
                   f"{ZONES[i % len(ZONES)]},{FARES[i % len(FARES)]},{cents // 100}.{cents % 100:02d}\n")
    return out


def hour_file(root: Path, start: datetime, part: str = "main") -> Path:
    """Where the rides of the local hour starting at `start` land (the job's `files:` template)."""
    local = start.astimezone(LISBON)
    return root / "state" / "landing" / "rides" / f"{local:%Y-%m-%d}" / f"{local:%H}-{part}.csv"


def land_hour(root: Path, start: datetime, rows: int = 3, part: str = "main", mtime: datetime | None = None,
              salt: str = "") -> Path:
    """Write one hour of rides; `mtime` sets the file's modification time (os.utime)."""
    path = hour_file(root, start, part)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("ride_id,started_at,zone,fare,amount\n" + "".join(ride_lines(start, rows, salt)))
    if mtime is not None:
        stamp = mtime.timestamp()
        os.utime(path, (stamp, stamp))
    return path


def write_jobs(root: Path, jobs: dict[str, str], files: dict[str, str] | None = None) -> Path:
    """A workspace at `root`: jobs/NAME.yaml per job and any extra files (relative path -> text)."""
    (root / "jobs").mkdir(parents=True, exist_ok=True)
    (root / "state").mkdir(exist_ok=True)
    for name, text in jobs.items():
        (root / "jobs" / f"{name}.yaml").write_text(text)
    for rel, text in (files or {}).items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return root


def edit(path: Path, old: str, new: str) -> None:
    """Replace `old` (which must occur) by `new` in a text file."""
    text = path.read_text()
    assert old in text, f"{old!r} not in {path}"
    path.write_text(text.replace(old, new))


# ---------------------------------------------------------------- the ledger, read with sqlite3


def ledger_file(root: Path) -> Path:
    return root / "state" / "ledger.sqlite"


def query(root: Path, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Rows of the workspace's ledger, read with Python's sqlite3."""
    conn = sqlite3.connect(ledger_file(root), timeout=30)
    try:
        return conn.execute(sql, params).fetchall()
    finally:
        conn.close()


def done_runs(root: Path, job: str) -> dict[str, int]:
    """window_key -> number of `done` runs of `job` (sqlite3 over weir_runs)."""
    return dict(query(root, "SELECT window_key, COUNT(*) FROM weir_runs WHERE job = ? AND status = 'done' "
                            "GROUP BY window_key", (job,)))


def checkpoint(root: Path) -> None:
    """Fold the ledger's write-ahead log into its main file (sqlite3), so a plain copy is complete."""
    conn = sqlite3.connect(ledger_file(root), timeout=30)
    try:
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        conn.close()


# ---------------------------------------------------------------- ticking


def gated_tick(root: Path, at: datetime, ws: Any = None) -> Any:
    """What `weir tick --at AT` does: the gate first (`api.tick`), a full tick only when it says so;
    with `ws` the tick reuses that loaded workspace.

    Returns None when the gate held (an idle tick that stopped early), else api.tick's TickResult.
    """
    from runner import api
    from runner.engine import gate

    if gate.fresh(root.resolve(), at, None) is not None:
        return None
    return api.tick(root, at=at, ws=ws, workers=1)


def use_modules_of(root: Path, prefix: str) -> None:
    """Before an in-process tick of one of several workspaces sharing python step module names:
    forget the imported modules named `prefix*` and put `root` first on sys.path, so that the
    next import reads this workspace's file."""
    for name in [m for m in sys.modules if m.startswith(prefix)]:
        del sys.modules[name]
    text = str(root.resolve())
    if text in sys.path:
        sys.path.remove(text)
    sys.path.insert(0, text)


# ---------------------------------------------------------------- the example jobs, backfilled once

EXAMPLE_FIRST, EXAMPLE_END = "2026-03-24", "2026-03-27"
EXAMPLE_JOBS = ("rides_hourly", "rides_daily", "rides_rolling_7d", "dock_fleet", "rides_monthly")
_template: Path | None = None


def _shorten(text: str, first: str | None, end: str) -> str:
    """The example job file with its window range cut to [first, end) (operational keys only)."""
    if first is not None:
        text = re.sub(r"(?m)^(\s*start:\s*)2026-03-22", rf"\g<1>{first}", text)
    return re.sub(r"(?m)^(\s*end:\s*)2026-04-05", rf"\g<1>{end}", text)


def example_workspace(tmp_path_factory: Any, dest: Path) -> Path:
    """A fresh copy of the example jobs (three days, 2026-03-24..27) with everything done at AT.

    The repository's jobs/ are copied with their ranges shortened (dock_fleet keeps its
    first day, where its docks are filled), the demo's landing data is written, and every
    job is backfilled; that is done once per session and copied (mtimes kept) per test.
    """
    global _template
    if _template is None:
        from runner.scaffold import demo
        base = tmp_path_factory.mktemp("examples") / "ws"
        (base / "jobs").mkdir(parents=True)
        (base / "state").mkdir()
        for name in EXAMPLE_JOBS:
            text = (REPO / "jobs" / f"{name}.yaml").read_text()
            first = None if name in ("dock_fleet", "rides_monthly") else EXAMPLE_FIRST
            (base / "jobs" / f"{name}.yaml").write_text(_shorten(text, first, EXAMPLE_END))
        demo.write_landing(base)
        report = cli_json(base, "backfill", *EXAMPLE_JOBS, "--at", AT, "--workers", "2")
        assert {w["status"] for w in report["windows"]} == {"done"}, report["counts"]
        checkpoint(base)
        _template = base
    shutil.copytree(_template, dest, copy_function=shutil.copy2)
    return dest


def jobs_reading(root: Path) -> dict[str, set[str]]:
    """producer -> the jobs whose `inputs` name it (yaml.safe_load of the job files, not weir's graph)."""
    import yaml

    out: dict[str, set[str]] = {}
    for path in sorted((root / "jobs").glob("*.yaml")):
        data = yaml.safe_load(path.read_text())
        for source in (data.get("inputs") or {}).values():
            if isinstance(source, dict) and "job" in source and source["job"] != path.stem:
                out.setdefault(source["job"], set()).add(path.stem)
    return out


def downstream_of(root: Path, job: str) -> set[str]:
    """Every job that reads `job`, directly or transitively (from the job files' YAML)."""
    readers = jobs_reading(root)
    seen: set[str] = set()
    todo = [job]
    while todo:
        for consumer in readers.get(todo.pop(), set()):
            if consumer not in seen:
                seen.add(consumer)
                todo.append(consumer)
    return seen
