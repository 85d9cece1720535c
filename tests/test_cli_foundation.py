"""The foundation commands: check, windows, graph, schema, help and version."""

from __future__ import annotations

import json
import subprocess
import sys
from datetime import UTC, date, datetime, time, timedelta
from importlib.metadata import version
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

ROOT = Path(__file__).resolve().parent.parent
SYDNEY = ZoneInfo("Australia/Sydney")
AT = ("--at", "2026-05-01T00:00Z")  # the injected clock

DOCKS_HOURLY = """\
description: Bikes returned per dock and hour.
window: {every: 1h, start: 2026-03-01, timezone: Australia/Sydney, settle: 15m}
steps: [{sql: SELECT 1 AS returns}]
output: {path: "state/out/dock_returns/{start:%Y-%m-%dT%H%z}.parquet"}
"""
ZONES_MONTHLY = """\
window: {every: 1mo, start: 2026-01-01, end: 2027-01-01, timezone: Europe/Lisbon}
inputs:
  hourly: {job: dock_returns}
steps: [{sql: SELECT * FROM hourly}]
output: {path: "state/out/zones_monthly/{start:%Y-%m}.parquet"}
"""


@pytest.fixture
def ws(make_workspace):
    return make_workspace({"dock_returns": DOCKS_HOURLY, "zones_monthly": ZONES_MONTHLY})


def sydney_midnight_utc(day: date) -> datetime:
    return datetime.combine(day, time(), SYDNEY).astimezone(UTC)  # IANA database via zoneinfo


# ---------------------------------------------------------------- weir windows


def test_windows_bounds_without_offset_are_read_in_the_jobs_timezone(weir, ws):
    result = weir(ws, "windows", "dock_returns", "--from", "2026-04-05", "--to", "2026-04-06", "--json",
                  "--at", "2026-05-01T00:00Z")
    assert result.exit_code == 0, result.output
    rows = json.loads(result.stdout)
    lo, hi = sydney_midnight_utc(date(2026, 4, 5)), sydney_midnight_utc(date(2026, 4, 6))
    # zoneinfo: Sydney's 5 April 2026 lasts 25 hours (clocks go back; memory agrees)
    assert len(rows) == (hi - lo) / timedelta(hours=1) == 25
    assert rows[0]["start_utc"] == lo.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert rows[-1]["end_utc"] == hi.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert rows[0]["window"] == rows[0]["start"] == "2026-04-05T00:00+11:00"  # AEDT, zoneinfo
    assert rows[-1]["end"] == "2026-04-06T00:00+10:00"                      # AEST, zoneinfo
    assert {r["length"] for r in rows} == {"PT1H"} and {r["length_seconds"] for r in rows} == {3600}
    for a, b in zip(rows, rows[1:], strict=False):
        assert a["end"] == b["start"] and a["end_utc"] == b["start_utc"]


def test_windows_bounds_with_an_offset_mean_that_instant(weir, ws):
    local = weir(ws, "windows", "dock_returns", "--from", "2026-04-05", "--to", "2026-04-05T06:00", "--json", *AT)
    utc = weir(ws, "windows", "dock_returns", "--from", "2026-04-04T13:00Z", "--to", "2026-04-04T20:00:00+00:00",
               "--json", *AT)
    assert local.exit_code == utc.exit_code == 0
    # 2026-04-05 00:00 in Sydney is 2026-04-04 13:00 UTC (+11:00) and 06:00 is
    # 20:00 UTC (+10:00 after 03:00 daylight time ends), by zoneinfo
    assert sydney_midnight_utc(date(2026, 4, 5)) == datetime(2026, 4, 4, 13, tzinfo=UTC)
    assert datetime(2026, 4, 5, 6, tzinfo=SYDNEY).astimezone(UTC) == datetime(2026, 4, 4, 20, tzinfo=UTC)
    assert json.loads(local.stdout) == json.loads(utc.stdout)
    assert len(json.loads(local.stdout)) == 7


def test_monthly_windows_list_each_months_length_in_iso_8601(weir, ws):
    result = weir(ws, "windows", "zones_monthly", "--json", *AT)
    assert result.exit_code == 0, result.output
    rows = json.loads(result.stdout)
    assert len(rows) == 12
    # calendar.monthrange days, minus or plus the DST hour in March and October (zoneinfo, Lisbon)
    assert [r["length"] for r in rows][:4] == ["P31D", "P28D", "P30DT23H", "P30D"]
    assert rows[9]["length"] == "P31DT1H"


def test_windows_default_to_the_job_start_and_the_clock(weir, ws):
    result = weir(ws, "windows", "dock_returns", "--json", "--at", "2026-03-01T05:00+11:00")
    rows = json.loads(result.stdout)
    # starts before --at: local 00:00, 01:00, ..., 04:00
    assert [r["start"][11:16] for r in rows] == ["00:00", "01:00", "02:00", "03:00", "04:00"]


def test_windows_prints_a_table_with_a_count(weir, ws):
    result = weir(ws, "windows", "dock_returns", "--from", "2026-04-05T01:00", "--to", "2026-04-05T04:00", *AT)
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert lines[0].split()[:3] == ["window", "(local", "start)"]
    assert "2026-04-05T02:00+11:00" in result.stdout and "2026-04-05T02:00+10:00" in result.stdout
    assert lines[-1] == "4 window(s) of dock_returns, every 1h (Australia/Sydney, settle 15m)"


@pytest.mark.parametrize(("args", "words"), [
    (("windows", "dock_retuns"), "unknown job 'dock_retuns' (did you mean 'dock_returns'?)"),
    (("windows", "dock_returns", "--from", "yesterday"), "--from: bad timestamp 'yesterday'"),
    (("windows", "dock_returns", "--from", "2026-04-06", "--to", "2026-04-05"), "must be after --from"),
    (("check", "--at", "soon"), "--at: bad timestamp 'soon'"),
])
def test_bad_arguments_get_one_line_and_exit_2(weir, ws, args, words):
    result = weir(ws, *args, *([] if "--at" in args else AT))
    assert result.exit_code == 2
    assert words in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert "Traceback" not in result.output


def test_a_folder_without_jobs_is_not_a_workspace(weir, tmp_path):
    result = weir(tmp_path, "check", *AT)
    assert result.exit_code == 2
    assert "is not a weir workspace" in result.output


# ---------------------------------------------------------------- weir check


def test_check_summarizes_each_job_in_dependency_order(weir, ws):
    result = weir(ws, "check", "--at", "2026-03-01T03:20+11:00")
    assert result.exit_code == 0, result.output
    assert result.stdout.splitlines()[-1] == "2 job(s) valid, in order: dock_returns -> zones_monthly"
    assert "every 1h (Australia/Sydney, settle 15m)" in result.stdout
    assert "hourly: job dock_returns" in result.stdout


def test_check_json_counts_due_windows_with_the_settle_time(weir, ws):
    # at 03:20 local, windows ending 01:00, 02:00, 03:00 are due (end + 15m <= now);
    # the one ending 03:00 is due from 03:15
    result = weir(ws, "check", "--json", "--at", "2026-03-01T03:20+11:00")
    data = json.loads(result.stdout)
    assert data["ok"] is True
    jobs = {j["name"]: j for j in data["jobs"]}
    assert jobs["dock_returns"]["windows_due"] == 3
    assert jobs["dock_returns"]["first_window"] == "2026-03-01T00:00+11:00"  # AEDT, zoneinfo
    # 03:20 in Sydney is 16:20 UTC on 28 February: only January has ended in Lisbon
    assert jobs["zones_monthly"]["windows_due"] == 1
    early = json.loads(weir(ws, "check", "--json", "--at", "2026-03-01T03:14+11:00").stdout)
    assert {j["name"]: j["windows_due"] for j in early["jobs"]}["dock_returns"] == 2


def test_at_without_offset_is_read_as_utc(weir, ws):
    a = json.loads(weir(ws, "check", "--json", "--at", "2026-02-28T16:20").stdout)
    b = json.loads(weir(ws, "check", "--json", "--at", "2026-03-01T03:20+11:00").stdout)
    assert a == b


def test_check_accepts_the_example_workspace():
    proc = subprocess.run([sys.executable, "-m", "runner", "-C", str(ROOT), "check", "--at", "2026-04-10T00:00Z"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert "job(s) valid" in proc.stdout


# ---------------------------------------------------------------- weir graph


def test_graph_command_prints_each_format(weir, ws):
    text = weir(ws, "graph")
    assert text.exit_code == 0
    assert text.stdout == "dock_returns\nzones_monthly  <- dock_returns (hourly)\n"
    dot = weir(ws, "graph", "--format", "dot").stdout
    assert dot.startswith("digraph weir {") and '"dock_returns" -> "zones_monthly" [label="hourly"];' in dot
    mermaid = weir(ws, "graph", "--format", "mermaid").stdout
    assert mermaid.splitlines()[0] == "flowchart LR"
    assert "dock_returns -->|hourly| zones_monthly" in mermaid
    bad = weir(ws, "graph", "--format", "png")
    assert bad.exit_code == 2 and "png" in bad.output


# ---------------------------------------------------------------- weir schema


def test_schema_is_json_schema_describing_a_job_file(weir, ws):
    result = weir(ws, "schema")
    assert result.exit_code == 0
    schema = json.loads(result.stdout)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert {"window", "inputs", "steps", "output"} <= set(schema["properties"])
    assert set(schema["required"]) == {"window", "steps", "output"}
    assert schema["additionalProperties"] is False
    defs = schema["$defs"]
    assert {"every", "cron", "start", "end", "timezone", "settle"} <= set(defs["WindowDecl"]["properties"])
    # job files write `schema:` for columns; the JSON Schema must use that key
    assert "schema" in defs["FileInput"]["properties"] and "columns" not in defs["FileInput"]["properties"]


def test_example_job_files_use_only_keys_the_schema_knows(weir):
    import yaml

    schema = json.loads(weir(ROOT, "schema").stdout)
    defs = schema["$defs"]
    for file in sorted((ROOT / "jobs").glob("*.yaml")):
        data = yaml.safe_load(file.read_text())
        assert set(data) <= set(schema["properties"]), file
        assert set(data["window"]) <= set(defs["WindowDecl"]["properties"]), file
        assert set(data["output"]) <= set(defs["Output"]["properties"]), file


# ---------------------------------------------------------------- help and version


# Every command, as the README's command table lists them.
COMMANDS = ["check", "windows", "graph", "schema", "run", "backfill", "history", "plan", "tick", "serve",
            "stale", "why", "impact", "verify", "report", "advise", "demo", "init"]


def test_help_lists_every_command_and_no_other(weir, tmp_path):
    from runner.cli import cli

    result = weir(tmp_path, "--help")
    assert result.exit_code == 0
    for command in COMMANDS:
        assert f"  {command} " in result.stdout
    assert sorted(cli.commands) == sorted(COMMANDS)


@pytest.mark.parametrize("command", COMMANDS)
def test_each_command_has_help(weir, tmp_path, command):
    result = weir(tmp_path, command, "--help")
    assert result.exit_code == 0, result.output
    assert result.stdout.startswith(f"Usage: weir {command}")
    assert len(result.stdout.splitlines()) > 3  # a description, not only the usage line


def test_module_entry_point_reports_the_installed_version():
    proc = subprocess.run([sys.executable, "-m", "runner", "--version"], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0
    # the version the installed distribution declares (importlib.metadata, from pyproject)
    assert proc.stdout.strip() == f"weir, version {version('weir')}"


def test_an_unknown_command_is_a_usage_error(weir, tmp_path):
    result = weir(tmp_path, "frobnicate")
    assert result.exit_code == 2
    assert "No such command" in result.output
