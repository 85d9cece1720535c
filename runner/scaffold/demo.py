"""The demo: an invented city bike-share network's landing data, then a backfill.

Everything here is made up: zones, docks, fares and rides come from a seeded
random generator, so the same files (same bytes, same modification times)
are written on every machine. The period runs from 2026-03-22 to 2026-04-05
in Europe/Lisbon, across the clock change of 2026-03-29.

Landing layout (inside the workspace):

    state/landing/rides/YYYY-MM-DD/HH-main.csv   rides started in local hour HH
    state/landing/rides/YYYY-MM-DD/HH-late.csv   a few hours get a second part, hours late
    state/landing/docks/YYYY-MM-DD.ndjson        dock changes: +1 a bike parked, -1 taken
"""

from __future__ import annotations

import json
import os
import random
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

from runner.io.files import write_atomic

TZ = ZoneInfo("Europe/Lisbon")
FIRST_DAY = datetime(2026, 3, 22)
DAYS = 14
SEED = 20260322
DEMO_JOBS = ("rides_hourly", "rides_daily", "rides_rolling_7d", "dock_fleet", "rides_monthly")

ZONES = {"Riverside": 1.3, "Old Town": 1.1, "Harbour": 0.9, "University": 1.0, "Hillcrest": 0.6}
FARES = (("member", 0.6), ("casual", 0.3), ("day_pass", 0.1))
HOURLY_PROFILE = [0.2, 0.1, 0.05, 0.05, 0.1, 0.3, 0.8, 1.6, 1.9, 1.1, 0.8, 0.9,
                  1.1, 1.0, 0.9, 1.0, 1.3, 1.9, 1.8, 1.2, 0.8, 0.6, 0.4, 0.3]
LATE_HOURS = {(3, 14), (5, 9), (8, 18), (11, 7)}  # (day index, local hour) with a late second part
BAD_ROWS = {(2, 10), (6, 17), (9, 8), (12, 13)}  # (day index, local hour) holding one bad row each


@dataclass
class LandingSummary:
    written: int
    unchanged: int
    rides: int
    dock_events: int
    bad_rows: int
    late_files: int


def _utc_hours(day: datetime) -> list[datetime]:
    """The UTC starts of the local hours of one local day (23, 24 or 25 of them)."""
    start = day.replace(tzinfo=TZ).astimezone(UTC)
    end = (day + timedelta(days=1)).replace(tzinfo=TZ).astimezone(UTC)
    hours = []
    t = start
    while t < end:
        hours.append(t)
        t += timedelta(hours=1)
    return hours


def _amount(rng: random.Random, fare: str) -> str:
    base = {"member": 0.9, "casual": 2.5, "day_pass": 0.0}[fare]
    minutes = rng.randint(3, 55)
    per_minute = {"member": 0.05, "casual": 0.15, "day_pass": 0.0}[fare]
    return f"{base + minutes * per_minute:.2f}"


def _write(path: Path, text: str, mtime: datetime) -> bool:
    """Write `text` unless the file already holds it; set its modification time. True if written."""
    stamp = int(mtime.timestamp())
    data = text.encode()
    if path.exists() and path.read_bytes() == data:
        st = path.stat()
        if int(st.st_mtime) != stamp:
            os.utime(path, (stamp, stamp))
        return False
    write_atomic(path, data, mtime=stamp)
    return True


def write_landing(root: Path) -> LandingSummary:
    """Write (or leave in place, when identical) the demo's landing files under `root/state/landing`."""
    rng = random.Random(SEED)
    written = unchanged = rides = bad = late = events = 0
    zones = list(ZONES)
    fare_names = [f for f, _ in FARES]
    fare_weights = [w for _, w in FARES]
    ride_number = 0
    for d in range(DAYS):
        day = FIRST_DAY + timedelta(days=d)
        weekend = day.weekday() >= 5
        folder = root / "state" / "landing" / "rides" / day.strftime("%Y-%m-%d")
        for hour_utc in _utc_hours(day):
            local = hour_utc.astimezone(TZ)
            profile = HOURLY_PROFILE[local.hour] * (0.7 if weekend else 1.0)
            parts: dict[str, list[str]] = {"main": [], "late": []}
            is_late = (d, local.hour) in LATE_HOURS
            for zone in zones:
                count = max(0, int(rng.gauss(12 * profile * ZONES[zone], 2)))
                for _ in range(count):
                    ride_number += 1
                    fare = rng.choices(fare_names, fare_weights)[0]
                    started = hour_utc + timedelta(seconds=rng.randrange(3600))
                    row = (f"R{ride_number:07d},{started.astimezone(TZ).isoformat()},{zone},{fare},"
                           f"{_amount(rng, fare)}")
                    part = "late" if is_late and rng.random() < 0.3 else "main"
                    parts[part].append(row)
                    rides += 1
            if (d, local.hour) in BAD_ROWS:
                ride_number += 1
                started_text = (hour_utc + timedelta(minutes=30)).astimezone(TZ).isoformat()
                kind = rng.choice(["amount", "fare", "negative"])
                amount = {"amount": "n/a", "fare": "1.20", "negative": "-3.00"}[kind]
                fare = "bonus" if kind == "fare" else "member"
                parts["main"].append(f"R{ride_number:07d},{started_text},Harbour,{fare},{amount}")
                bad += 1
            end = hour_utc + timedelta(hours=1)
            header = "ride_id,started_at,zone,fare,amount\n"
            for part, rows in parts.items():
                if not rows and part == "late":
                    continue  # the main part is written even for an hour without rides
                arrived = end + (timedelta(hours=rng.randint(5, 9)) if part == "late" else timedelta(minutes=3))
                name = f"{local.strftime('%H')}-{part}.csv"
                if _write(folder / name, header + "".join(r + "\n" for r in rows), arrived):
                    written += 1
                else:
                    unchanged += 1
                late += part == "late"
    docks = [f"{z[:3].upper()}-{i:02d}" for z in zones for i in range(1, 5)]
    bikes = {dock: 0 for dock in docks}
    for d in range(DAYS):
        day = FIRST_DAY + timedelta(days=d)
        lines = []
        start = day.replace(tzinfo=TZ)
        if d == 0:
            for dock in docks:
                for _ in range(8):
                    bikes[dock] += 1
                    lines.append({"dock": dock, "at": start.isoformat(), "delta": 1})
        for _ in range(250):
            full = [k for k, v in bikes.items() if v > 0]
            taken, parked = rng.choice(full), rng.choice(docks)
            when = (start.astimezone(UTC) + timedelta(seconds=rng.randrange(82800))).astimezone(TZ).isoformat()
            bikes[taken] -= 1
            bikes[parked] += 1
            lines.append({"dock": taken, "at": when, "delta": -1})
            lines.append({"dock": parked, "at": when, "delta": 1})
        events += len(lines)
        end = (day + timedelta(days=1)).replace(tzinfo=TZ).astimezone(UTC) + timedelta(minutes=15)
        text = "".join(json.dumps(x) + "\n" for x in lines)
        path = root / "state" / "landing" / "docks" / f"{day.strftime('%Y-%m-%d')}.ndjson"
        if _write(path, text, end):
            written += 1
        else:
            unchanged += 1
    return LandingSummary(written, unchanged, rides, events, bad, late)


def demo_clock(now: datetime) -> datetime:
    """The clock the demo runs at: now, but never before the period (and its settle times) is over."""
    after = (FIRST_DAY + timedelta(days=DAYS + 1)).replace(tzinfo=TZ).astimezone(UTC)
    return max(now, after)


def missing_jobs(root: Path) -> list[str]:
    return [j for j in DEMO_JOBS if not (root / "jobs" / f"{j}.yaml").exists()]
