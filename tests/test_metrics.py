"""`weir report --metrics FILE`: window counts and run times for monitoring.

The file is read back with prometheus_client's text parser (the reference
implementation of the exposition format); the numbers it holds are compared
with the ledger read by Python's sqlite3, with window lengths from zoneinfo
(the IANA tz database) and with input file times set by the test itself.
"""

from __future__ import annotations

import os
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from conftest_run import cli, ledger_rows
from helpers_data import TZ, ride_rows, rides_file, write_rides, write_workspace

parser = pytest.importorskip("prometheus_client.parser")

AT = "2026-03-26T03:00:00Z"
DAYS = [date(2026, 3, 22), date(2026, 3, 23), date(2026, 3, 24)]
HOURS = 6
LATE_AFTER = timedelta(hours=1)

SIX_HOURLY = f"""\
description: Rides per 6 hours and zone.
window: {{every: {HOURS}h, start: 2026-03-22T00:00, end: 2026-03-26T00:00, timezone: {TZ}}}
late_after: 1h
inputs:
  rides:
    files: state/landing/rides/{{start:%Y-%m-%d}}/*.csv
    time_column: started_at
    schema:
      ride_id: {{type: str, nullable: false}}
      started_at: datetime({TZ})
      zone: str
      fare: {{type: str, values: [member, casual, day_pass]}}
      amount: {{type: "decimal(10,2)", min: 0}}
steps:
  - sql: |
      SELECT zone, COUNT(*) AS rides FROM rides GROUP BY zone
output:
  path: "state/warehouse/rides_6h/{{start:%Y-%m-%d/%H}}.parquet"
"""

# When each day's rides file "arrived" (its mtime): 23 March's long after that day ended, so its windows are late.
ARRIVED = {
    DAYS[0]: datetime(2026, 3, 22, 0, 30, tzinfo=UTC),
    DAYS[1]: datetime(2026, 3, 24, 9, 0, tzinfo=UTC),
    DAYS[2]: datetime(2026, 3, 24, 0, 10, tzinfo=UTC),
}


def _windows(day: date) -> list[tuple[datetime, datetime]]:
    """The 6-hour windows starting in a Lisbon local day, as UTC (start, end), by zoneinfo."""
    zone = ZoneInfo(TZ)
    lo = datetime(day.year, day.month, day.day, tzinfo=zone).astimezone(UTC)
    nxt = day + timedelta(days=1)
    hi = datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).astimezone(UTC)
    out, t = [], lo
    while t < hi:
        out.append((t, t + timedelta(hours=HOURS)))
        t += timedelta(hours=HOURS)
    return out


def _utc(text: str) -> datetime:
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)


def _samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """(name, sorted labels) -> value, as prometheus_client's parser reads the text."""
    out = {}
    for family in parser.text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


@pytest.fixture(scope="module")
def arranged(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    root = write_workspace(tmp_path_factory.mktemp("metrics") / "ws", {"rides_6h": SIX_HOURLY})
    bad = next(i for i, r in enumerate(ride_rows(DAYS[1], rows=30)) if r["started_at"][11:13] < "12")
    for day in DAYS:  # 25 March has no files: its windows wait
        write_rides(root, day, rows=30, replace={bad: {"amount": "-3.00"}} if day == DAYS[1] else None)
        stamp = ARRIVED[day].timestamp()
        os.utime(rides_file(root, day), (stamp, stamp))
    result = cli(root, "backfill", "rides_6h", "--from", "2026-03-22T00:00", "--to", "2026-03-24T00:00",
                 "--at", AT, "--workers", "1", "--json")
    assert result.exit_code == 1, result.stderr  # the window with the negative amount fails, by arrangement
    prom = root / "state" / "weir.prom"
    result = cli(root, "report", "--at", AT, "--out", str(root / "state" / "r.html"), "--metrics", str(prom))
    assert result.exit_code == 0, result.stderr
    return {"root": root, "prom": prom, "text": prom.read_text(encoding="utf-8")}


def test_metrics_file_parses_with_the_prometheus_client_parser(arranged: dict[str, Any]):
    families = {f.name: f for f in parser.text_string_to_metric_families(arranged["text"])}
    assert {"weir_windows", "weir_windows_late", "weir_windows_to_run", "weir_last_success_timestamp_seconds",
            "weir_last_run_duration_seconds", "weir_metrics_timestamp_seconds"} <= set(families)
    assert all(f.type == "gauge" and f.documentation for f in families.values())
    assert arranged["text"].endswith("\n")
    assert not list(arranged["prom"].parent.glob(".weir.prom.*"))  # the temporary file was renamed, not left


def test_window_counts_per_state_equal_the_ledger_read_with_sqlite3(arranged: dict[str, Any]):
    samples = _samples(arranged["text"])
    rows = ledger_rows(arranged["root"], "SELECT state, COUNT(*) AS n FROM weir_windows WHERE job = 'rides_6h' "
                                         "GROUP BY state")
    ledger = {r["state"]: r["n"] for r in rows}
    assert ledger.get("failed") == 1  # the arrangement holds

    def value(state: str) -> float:
        return samples[("weir_windows", (("job", "rides_6h"), ("state", state)))]

    assert value("done") == ledger["done"]
    assert value("failed") == ledger["failed"]
    ran = sum(ledger.values())
    with_files = sum(len(_windows(d)) for d in DAYS)  # zoneinfo
    all_due = with_files + len(_windows(date(2026, 3, 25)))
    assert value("ready") == with_files - ran  # inputs there, never ran (weir calls them ready)
    assert ("weir_windows", (("job", "rides_6h"), ("state", "missing"))) not in samples
    assert value("waiting") == all_due - with_files  # no input files yet
    assert value("stale") == 0 and value("running") == 0
    # a pulse would run the ready windows; the failed one has no retries left (retries: 0)
    assert samples[("weir_windows_to_run", (("job", "rides_6h"),))] == with_files - ran


def test_late_windows_equal_those_whose_files_arrived_after_late_after(arranged: dict[str, Any]):
    # Reference: the file times this test set, against window ends from zoneinfo (late: mtime - end > late_after)
    expected = sum(1 for d in DAYS for _, end in _windows(d) if ARRIVED[d] - end > LATE_AFTER)
    assert expected > 0
    assert _samples(arranged["text"])[("weir_windows_late", (("job", "rides_6h"),))] == expected


def test_last_success_and_last_run_equal_the_ledgers_newest_runs(arranged: dict[str, Any]):
    samples = _samples(arranged["text"])
    key = (("job", "rides_6h"),)
    done = ledger_rows(arranged["root"], "SELECT MAX(finished_at) AS t FROM weir_runs WHERE job = 'rides_6h' "
                                         "AND status = 'done'")[0]["t"]
    assert samples[("weir_last_success_timestamp_seconds", key)] == pytest.approx(_utc(done).timestamp(), abs=1e-3)
    last = ledger_rows(arranged["root"], "SELECT status, finished_at, seconds FROM weir_runs WHERE job = 'rides_6h' "
                                         "AND status IN ('done', 'failed') ORDER BY finished_at DESC, id DESC LIMIT 1")[0]
    assert samples[("weir_last_run_duration_seconds", key)] == pytest.approx(last["seconds"])
    assert samples[("weir_last_run_timestamp_seconds", key)] == pytest.approx(_utc(last["finished_at"]).timestamp(),
                                                                              abs=1e-3)
    assert samples[("weir_last_run_failed", key)] == (1 if last["status"] == "failed" else 0)
    # the clock the figures are for is the --at given (Python's datetime)
    assert samples[("weir_metrics_timestamp_seconds", ())] == datetime(2026, 3, 26, 3, tzinfo=UTC).timestamp()


def test_label_values_with_quotes_backslashes_and_newlines_read_back_unchanged():
    from runner.report.metrics import Family

    family = Family("weir_test_values", 'Help with a \\ backslash and a "quote".')
    odd = 'a "quoted" \\path\\ and a\nnew line'
    family.add(3, job=odd, state="done")
    [parsed] = parser.text_string_to_metric_families(family.render())  # prometheus_client's parser
    assert parsed.samples[0].labels == {"job": odd, "state": "done"}
    assert parsed.samples[0].value == 3
    assert parsed.documentation == 'Help with a \\ backslash and a "quote".'


def test_watermark_is_where_the_windows_holding_an_output_stop(arranged: dict[str, Any]):
    # by hand: the 6-hour windows from zoneinfo, in order; the watermark is the start of the first one
    # whose ledger row (sqlite3) has no good run
    good = {r["window_key"] for r in ledger_rows(arranged["root"], "SELECT window_key FROM weir_windows WHERE "
                                                   "job = 'rides_6h' AND good_run_id IS NOT NULL")}
    reach = None
    for start, end in (w for d in [*DAYS, date(2026, 3, 25)] for w in _windows(d)):
        if start.strftime("%Y-%m-%dT%H:%M:%SZ") not in good:
            break
        reach = end
    assert reach is not None and reach < datetime(2026, 3, 24, tzinfo=UTC)  # it stops at the failed window
    samples = _samples(arranged["text"])
    assert samples[("weir_watermark_timestamp_seconds", (("job", "rides_6h"),))] == reach.timestamp()
    assert samples[("weir_windows_not_done_behind_watermark", (("job", "rides_6h"),))] == 0
    assert samples[("weir_rows_dropped", (("job", "rides_6h"),))] == sum(
        r["n"] or 0 for r in ledger_rows(arranged["root"], "SELECT r.rows_dropped AS n FROM weir_windows w JOIN "
                                                          "weir_runs r ON r.id = w.run_id WHERE w.job = 'rides_6h'"))
    # no deadline is set, so no overdue figure is claimed
    assert not [k for k in samples if k[0] == "weir_windows_overdue"]


def test_metrics_of_a_workspace_that_never_ran_have_no_last_success(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_6h": SIX_HOURLY})
    prom = tmp_path / "out" / "weir.prom"
    result = cli(root, "report", "--at", AT, "--out", str(tmp_path / "r.html"), "--metrics", str(prom))
    assert result.exit_code == 0, result.stderr
    samples = _samples(prom.read_text(encoding="utf-8"))
    assert not [k for k in samples if k[0] == "weir_last_success_timestamp_seconds"]
    # no input files at all: every due window (zoneinfo count) waits
    due = sum(len(_windows(d)) for d in [*DAYS, date(2026, 3, 25)])
    assert samples[("weir_windows", (("job", "rides_6h"), ("state", "waiting")))] == due


def test_metrics_on_their_own_say_what_the_reports_metrics_say(arranged: dict[str, Any]):
    # `metrics_text` without the page's data takes a lighter path (no drawing); the figures must not differ
    from runner.engine.loading import load_workspace
    from runner.io.ledger.store import Ledger, default_url
    from runner.report.data import collect
    from runner.report.metrics import metrics_text

    ws = load_workspace(arranged["root"], thorough=False)
    ledger = Ledger(default_url(ws.root), create=False)
    at = datetime(2026, 3, 26, 3, tzinfo=UTC)
    try:
        alone = _samples(metrics_text(ws, ledger, at))
        shared = _samples(metrics_text(ws, ledger, at, data=collect(ws, ledger, at)))
    finally:
        ledger.dispose()
    assert alone == shared
    assert ("weir_windows", (("job", "rides_6h"), ("state", "failed"))) in alone
