"""Small deterministic test data for the running tests (an invented city bike-share).

Everything here is seeded: the same call writes the same bytes, so a test can
write a clean copy of its inputs in two workspaces and compare the outputs.

* `write_rides`: one CSV of rides per local day,
  `state/landing/rides/YYYY-MM-DD/rides.csv`, columns ride_id, started_at
  (ISO 8601 with the local offset), zone, fare, amount (two decimals).
* `write_dock_changes`: one NDJSON of dock change events per local day,
  `state/landing/docks/YYYY-MM-DD.ndjson`, fields dock, at, delta (+1 or -1).
* `write_workspace`: job files (name -> YAML text) into a new workspace.
* Job-file texts used by several test modules.
"""

from __future__ import annotations

import csv
import json
import random
import textwrap
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

SEED = 20260322
TZ = "Europe/Lisbon"
ZONES = ("riverside", "old_town", "harbour", "hilltop", "campus")
FARES = ("member", "casual", "day_pass")
DOCKS = tuple(f"dock_{n:02d}" for n in range(1, 9))

RIDES_HEADER = ("ride_id", "started_at", "zone", "fare", "amount")


def _rng(kind: str, day: date, seed: int) -> random.Random:
    # one stream per (kind, day): a day's file does not depend on which other days were written
    return random.Random(f"{kind}:{seed}:{day.isoformat()}")


def days(first: date, count: int) -> list[date]:
    return [first + timedelta(days=i) for i in range(count)]


def ride_rows(day: date, rows: int = 60, seed: int = SEED, tz: str = TZ) -> list[dict[str, str]]:
    """The rides of one local day, as CSV text fields, in ride_id order.

    Every ride starts inside the local day (so an hourly job reading the day's
    folder keeps every row exactly once); minutes are random, so some hours
    have no rides at all.
    """
    rng = _rng("rides", day, seed)
    zone = ZoneInfo(tz)
    utc = ZoneInfo("UTC")
    # local midnights converted to UTC first: subtracting aware datetimes that share a tzinfo
    # gives the wall-clock difference, which is wrong on DST days
    midnight = datetime(day.year, day.month, day.day, tzinfo=zone).astimezone(utc)
    length = datetime.combine(day + timedelta(days=1), datetime.min.time(), zone).astimezone(utc) - midnight
    out = []
    for i in range(rows):
        # absolute offset from local midnight, so DST days have 23 or 25 hours of rides
        instant = (midnight + timedelta(seconds=rng.randrange(int(length.total_seconds())))).astimezone(zone)
        fare = rng.choice(FARES)
        cents = {"member": rng.randrange(50, 400), "casual": rng.randrange(150, 1200),
                 "day_pass": rng.randrange(500, 2000)}[fare]
        out.append({
            "ride_id": f"r{day:%Y%m%d}-{i:04d}",
            "started_at": instant.isoformat(timespec="seconds"),
            "zone": rng.choice(ZONES),
            "fare": fare,
            "amount": f"{cents // 100}.{cents % 100:02d}",
        })
    return out


def rides_file(root: Path, day: date) -> Path:
    return root / "state" / "landing" / "rides" / f"{day:%Y-%m-%d}" / "rides.csv"


def write_rides(root: Path, day: date, rows: int = 60, seed: int = SEED, tz: str = TZ,
                replace: dict[int, dict[str, str]] | None = None) -> Path:
    """Write one day's rides CSV under `root`; `replace` overrides fields of given row numbers."""
    data = ride_rows(day, rows, seed, tz)
    for i, fields in (replace or {}).items():
        data[i].update(fields)
    path = rides_file(root, day)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=RIDES_HEADER, lineterminator="\n")
        writer.writeheader()
        writer.writerows(data)
    return path


def dock_change_rows(day: date, events: int = 12, seed: int = SEED, tz: str = TZ) -> list[dict[str, object]]:
    """Dock change events of one local day (bike docked +1, bike taken -1)."""
    rng = _rng("docks", day, seed)
    zone = ZoneInfo(tz)
    out = []
    for _ in range(events):
        at = datetime(day.year, day.month, day.day, rng.randrange(4, 23), rng.randrange(60), tzinfo=zone)
        out.append({"dock": rng.choice(DOCKS), "at": at.isoformat(timespec="seconds"),
                    "delta": rng.choice((1, 1, -1))})
    return out


def docks_file(root: Path, day: date) -> Path:
    return root / "state" / "landing" / "docks" / f"{day:%Y-%m-%d}.ndjson"


def write_dock_changes(root: Path, day: date, events: int = 12, seed: int = SEED, tz: str = TZ) -> Path:
    path = docks_file(root, day)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", encoding="utf-8") as fh:
        for row in dock_change_rows(day, events, seed, tz):
            fh.write(json.dumps(row) + "\n")
    return path


def write_workspace(root: Path, jobs: dict[str, str], files: dict[str, str] | None = None) -> Path:
    """A workspace at `root` with jobs/NAME.yaml for each job (dedented) and extra text files."""
    (root / "jobs").mkdir(parents=True, exist_ok=True)
    (root / "state").mkdir(exist_ok=True)
    for name, text in jobs.items():
        (root / "jobs" / f"{name}.yaml").write_text(textwrap.dedent(text), encoding="utf-8")
    for rel, text in (files or {}).items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text), encoding="utf-8")
    return root


# ---------------------------------------------------------------- job files

ROLLUP_SQL = """\
SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue
FROM rides
GROUP BY zone, fare
"""

HOURLY_PATH = "state/warehouse/rides_hourly/{start:%Y-%m-%d/%H}.parquet"
OUTPUT_DB = "sqlite:///state/out.sqlite"


def rollup_job(start: str = "2026-03-22T00:00", end: str = "2026-04-20T00:00", sql: str = ROLLUP_SQL,
               path: str = HOURLY_PATH, table: str | None = None, amount: str = '"decimal(10,2)"',
               steps: str | None = None, extra: str = "") -> str:
    """An hourly rides rollup per zone and fare (the example job's shape).

    `table` writes to that table of OUTPUT_DB instead of a file; `amount` is the
    declared type of the amount column; `steps` replaces the SQL step (YAML list
    items); `extra` is appended (top-level keys such as retries).
    """
    if steps is None:
        steps = "  - sql: |\n" + textwrap.indent(sql, " " * 6)
    if table is None:
        output = f'output:\n  path: "{path}"\n'
    else:
        output = f'output:\n  database: "{OUTPUT_DB}"\n  table: {table}\n'
    return (
        "description: Rides and revenue per hour, zone and fare.\n"
        f"window: {{every: 1h, start: {start}, end: {end}, timezone: {TZ}}}\n"
        "inputs:\n"
        "  rides:\n"
        "    files: state/landing/rides/{start:%Y-%m-%d}/*.csv\n"
        "    time_column: started_at\n"
        "    schema:\n"
        "      ride_id: {type: str, nullable: false}\n"
        f"      started_at: datetime({TZ})\n"
        "      zone: str\n"
        "      fare: {type: str, values: [member, casual, day_pass]}\n"
        f"      amount: {{type: {amount}, min: 0}}\n"
        f"steps:\n{steps}"
        f"{output}"
        "  checks:\n"
        "    - key: [zone, fare]\n"
        f"{extra}"
    )


def daily_job(producer: str = "rides_hourly", start: str = "2026-03-22") -> str:
    """A daily total per zone built from an hourly producer's outputs."""
    return textwrap.dedent(f"""\
        description: Rides and revenue per local day and zone.
        window: {{every: 1d, start: {start}, timezone: {TZ}}}
        inputs:
          hourly: {{job: {producer}}}
        steps:
          - sql: |
              SELECT zone, SUM(rides) AS rides, SUM(revenue) AS revenue
              FROM hourly GROUP BY zone
        output:
          path: "state/warehouse/rides_daily/{{start:%Y-%m-%d}}.parquet"
          checks:
            - key: [zone]
        """)


def fleet_job(start: str = "2026-01-01", name: str = "dock_fleet") -> str:
    """Bikes per dock, carried forward: yesterday's output plus today's change events."""
    return textwrap.dedent(f"""\
        description: Bikes per dock, carried forward from dock change events.
        window: {{every: 1d, start: {start}, timezone: {TZ}}}
        inputs:
          changes:
            files: "state/landing/docks/{{start:%Y-%m-%d}}.ndjson"
            time_column: at
            schema:
              dock: str
              at: datetime({TZ})
              delta: {{type: int, values: [1, -1]}}
          before:
            job: {name}
            lag: 1
            schema: {{dock: str, bikes: int}}
        steps:
          - sql: |
              SELECT dock, SUM(bikes) AS bikes FROM (
                SELECT dock, bikes FROM before
                UNION ALL
                SELECT dock, delta AS bikes FROM changes
              ) AS all_changes
              GROUP BY dock
        output:
          path: "state/warehouse/{name}/{{start:%Y-%m-%d}}.parquet"
          checks:
            - key: [dock]
        """)
