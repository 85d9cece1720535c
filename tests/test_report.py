"""`weir report`: the morning page, checked by Python's html.parser and by a real browser.

The workspace is small and arranged so that its days hold known mixes of
states: an invented bike-share job cut into 4-hour windows over four Lisbon
days (one day done, one with a failed window and windows never run, one never
run, one with no input files yet), and a daily job reading it. What the page
must show (each job's watermark, its problem ranges, its window counts) is
computed here by hand from the ledger read with Python's sqlite3 and from the
windows computed with zoneinfo (the IANA tz database), never from weir's
report code.

The browser is Debian's Chromium in headless mode, driven over the Chrome
DevTools Protocol (tests/helpers_browser.py); the browser tests skip, saying
why, when no Chromium can be found (CI installs it and turns skips into
failures).
"""

from __future__ import annotations

import json
import shlex
import shutil
import subprocess
from datetime import date, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from conftest_run import cli, ledger_rows
from helpers_browser import Browser, clipped_labels
from helpers_data import TZ, ride_rows, write_rides, write_workspace

AT = "2026-03-26T03:00:00Z"
DAYS = [date(2026, 3, 22), date(2026, 3, 23), date(2026, 3, 24), date(2026, 3, 25)]
BAD_FARE = '<b>&"fare"</b>'
DESCRIPTION = 'Rides & revenue per 4 hours <i>by zone</i>, "quoted"'
CONSUMER = "daily_totals"

FOUR_HOURLY = f"""\
description: '{DESCRIPTION}'
window: {{every: 4h, start: 2026-03-22T00:00, end: 2026-03-26T00:00, timezone: {TZ}}}
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
      SELECT zone, fare, COUNT(*) AS rides, SUM(amount) AS revenue
      FROM rides GROUP BY zone, fare
output:
  path: "state/warehouse/rides_4h/{{start:%Y-%m-%d/%H}}.parquet"
  checks:
    - key: [zone, fare]
"""

DAILY = f"""\
description: Rides per local day and zone.
window: {{every: 1d, start: 2026-03-22, end: 2026-03-26, timezone: {TZ}}}
inputs:
  four_hourly: {{job: rides_4h}}
steps:
  - sql: |
      SELECT zone, SUM(rides) AS rides FROM four_hourly GROUP BY zone
output:
  path: "state/warehouse/daily_totals/{{start:%Y-%m-%d}}.parquet"
"""


def _utc_bounds(day: date) -> tuple[str, str]:
    """A Lisbon local day as ledger keys (UTC starts), by zoneinfo."""
    zone = ZoneInfo(TZ)
    lo = datetime(day.year, day.month, day.day, tzinfo=zone).astimezone(ZoneInfo("UTC"))
    nxt = day + timedelta(days=1)
    hi = datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).astimezone(ZoneInfo("UTC"))
    return lo.strftime("%Y-%m-%dT%H:%M:%SZ"), hi.strftime("%Y-%m-%dT%H:%M:%SZ")


def _windows_in_day(day: date, hours: int = 4) -> int:
    """How many 4-hour windows start in a Lisbon day (zoneinfo: 23, 24 or 25 hours long)."""
    lo, hi = (datetime.strptime(t, "%Y-%m-%dT%H:%M:%SZ") for t in _utc_bounds(day))
    return -(-int((hi - lo).total_seconds()) // (hours * 3600))


def _ledger_counts(root: Path, job: str, day: date) -> dict[str, int]:
    """Window states of one job's windows starting in a local day, read with Python's sqlite3."""
    lo, hi = _utc_bounds(day)
    rows = ledger_rows(root, "SELECT state, COUNT(*) AS n FROM weir_windows WHERE job = ? AND window_key >= ? "
                             "AND window_key < ? GROUP BY state", (job, lo, hi))
    return {r["state"]: r["n"] for r in rows}


@pytest.fixture(scope="module")
def arranged(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The arranged workspace, backfilled partly, and its report written with `weir report`."""
    root = write_workspace(tmp_path_factory.mktemp("report") / "ws", {"rides_4h": FOUR_HOURLY, CONSUMER: DAILY})
    # one ride on 23 March, in its first 16 hours, gets a fare outside the declared values: that window fails
    bad = next(i for i, r in enumerate(ride_rows(DAYS[1], rows=40)) if r["started_at"][11:13] < "16")
    for day in DAYS[:3]:  # no files for 25 March: its windows wait for their input
        write_rides(root, day, rows=40, replace={bad: {"fare": BAD_FARE}} if day == DAYS[1] else None)
    result = cli(root, "backfill", "rides_4h", "--from", "2026-03-22T00:00", "--to", "2026-03-23T16:00",
                 "--at", AT, "--workers", "1", "--json")
    assert result.exit_code == 1, result.stderr  # one window failed, by arrangement
    result = cli(root, "backfill", CONSUMER, "--from", "2026-03-22", "--to", "2026-03-23", "--at", AT,
                 "--workers", "1", "--json")
    assert result.exit_code == 0, result.stderr
    out = root / "state" / "report.html"
    result = cli(root, "report", "--at", AT, "--out", str(out))
    assert result.exit_code == 0, result.stderr
    return {"root": root, "html": out.read_text(encoding="utf-8"), "path": out, "stdout": result.stdout}


# ---------------------------------------------------------------- html.parser


class _Checker(HTMLParser):
    """Tracks open elements (HTML void elements excepted) and collects what the checks need."""

    VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}
    # SVG elements written self-closing (<rect/>) arrive as startendtag and never open
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.refs: list[str] = []
        self.scripts: list[tuple[dict[str, str | None], str]] = []
        self.styles: list[str] = []
        self.texts_by_id: dict[str, list[str]] = {}
        self._capture: list[tuple[str, int]] = []
        self._script: dict[str, str | None] | None = None
        self._buffer: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("src", "href", "xlink:href", "action", "srcset") and value is not None:
                self.refs.append(value)
            if name == "style" and value:
                self.styles.append(value)
        if tag in self.VOID:
            return
        self.stack.append(tag)
        ident = dict(attrs).get("id")
        if ident:
            self._capture.append((ident, len(self.stack)))
            self.texts_by_id.setdefault(ident, [])
        if tag in ("script", "style"):
            self._script = dict(attrs)
            self._buffer = []

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("src", "href", "xlink:href") and value is not None:
                self.refs.append(value)

    def handle_endtag(self, tag: str) -> None:
        if tag in self.VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> at line {self.getpos()[0]} closes <{self.stack[-1] if self.stack else ''}>")
            return
        if tag == "script" and self._script is not None:
            self.scripts.append((self._script, "".join(self._buffer)))
            self._script = None
        elif tag == "style" and self._script is not None:
            self.styles.append("".join(self._buffer))
            self._script = None
        self.stack.pop()
        self._capture = [(i, depth) for i, depth in self._capture if depth <= len(self.stack)]

    def handle_data(self, data: str) -> None:
        if self._script is not None:
            self._buffer.append(data)
            return
        for ident, _ in self._capture:
            self.texts_by_id[ident].append(data)


def _parse(text: str) -> _Checker:
    checker = _Checker()
    checker.feed(text)
    checker.close()
    return checker


def test_report_is_well_formed_by_html_parser(arranged: dict[str, Any]):
    # Reference: Python's html.parser tokenizes the page; every non-void element must be closed in order.
    checker = _parse(arranged["html"])
    assert checker.problems == []
    assert checker.stack == []
    assert arranged["html"].startswith("<!DOCTYPE html>")
    assert {"html", "head", "body", "svg", "table"} <= set(checker.tags)


def test_report_fetches_nothing_from_outside_the_file(arranged: dict[str, Any]):
    # Reference: html.parser's view of every src/href attribute, and the CSS text for @import and url().
    checker = _parse(arranged["html"])
    for ref in checker.refs:
        assert not ref.startswith(("http:", "https:", "//", "ftp:", "data:")), ref
        assert ref.startswith("#"), f"only links within the page are expected, found {ref!r}"
    assert all("src" not in attrs for attrs, _ in checker.scripts)
    assert "<link" not in arranged["html"].lower()
    for css in checker.styles:
        assert "@import" not in css
        for target in css.split("url(")[1:]:
            assert target.startswith("#"), target  # only in-page SVG patterns


def test_report_embeds_names_descriptions_and_errors_as_text_not_markup(arranged: dict[str, Any]):
    checker = _parse(arranged["html"])
    # html.parser unescapes character references: the texts read back exactly as written in the job files
    texts = "".join(checker.texts_by_id["job-0"])
    assert DESCRIPTION in texts
    assert CONSUMER in "".join(checker.texts_by_id["reach"])
    # no element came out of the description's or the bad fare's markup
    assert "i" not in checker.tags and "b" in checker.tags  # <b> is the report's own; see the count below
    own_b = arranged["html"].count("<b>")
    assert own_b == checker.tags.count("b")
    # the embedded data is JSON (Python's json) holding the failed run's error with the raw fare text
    data = next(body for attrs, body in checker.scripts if attrs.get("id") == "weir-data")
    assert "</" not in data and "<b>" not in data
    payload = json.loads(data)
    assert any(BAD_FARE in s for s in payload["strings"])
    assert [j["name"] for j in payload["jobs"]] == ["rides_4h", CONSUMER]


def test_report_command_says_where_it_wrote(arranged: dict[str, Any]):
    assert str(arranged["path"]) in arranged["stdout"]
    assert not list(arranged["path"].parent.glob(".report.html.*"))  # no temporary file left behind


def test_report_on_a_workspace_that_never_ran_shows_every_window_ready_or_waiting(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_4h": FOUR_HOURLY})
    write_rides(root, DAYS[0], rows=10)
    result = cli(root, "report", "--at", AT, "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)
    # 4-hour windows over 22..25 March (zoneinfo day lengths); the first day has input files, the rest none
    assert info["counts"]["ready"] == _windows_in_day(DAYS[0])
    assert "missing" not in info["counts"]  # weir's name for it is ready
    assert info["counts"]["waiting"] == sum(_windows_in_day(d) for d in DAYS[1:])
    assert not (root / "state" / "ledger.sqlite").exists()  # reporting never creates a ledger
    assert _parse(Path(info["report"]).read_text(encoding="utf-8")).problems == []


def test_jobs_in_different_time_zones_share_a_utc_time_axis(tmp_path: Path):
    tokyo = FOUR_HOURLY.replace(f"timezone: {TZ}", "timezone: Asia/Tokyo").replace("rides_4h/", "rides_4h_east/")
    root = write_workspace(tmp_path / "ws", {"rides_4h": FOUR_HOURLY, "rides_4h_east": tokyo})
    result = cli(root, "report", "--at", AT)
    assert result.exit_code == 0, result.stderr
    checker = _parse((root / "state" / "report.html").read_text(encoding="utf-8"))
    payload = json.loads(next(body for attrs, body in checker.scripts if attrs.get("id") == "weir-data"))
    # the axis starts at the Tokyo job's first window, local midnight of 22 March: in UTC (zoneinfo) the 21st
    first = datetime(2026, 3, 22, tzinfo=ZoneInfo("Asia/Tokyo")).timestamp()
    assert payload["a0"] == first
    assert "Times are in UTC" in "".join(checker.texts_by_id["reach"])


# ---------------------------------------------------------------- what the page must show, computed by hand


def _windows(job: str) -> list[tuple[datetime, datetime]]:
    """The arranged jobs' windows as UTC (start, end), from the Lisbon calendar by zoneinfo."""
    zone, utc = ZoneInfo(TZ), ZoneInfo("UTC")
    out = []
    for day in DAYS:
        lo = datetime(day.year, day.month, day.day, tzinfo=zone).astimezone(utc)
        nxt = day + timedelta(days=1)
        hi = datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).astimezone(utc)
        step = timedelta(hours=4) if job == "rides_4h" else hi - lo
        t = lo
        while t < hi:
            out.append((t, min(t + step, hi)))
            t += step
    return out


def _local_id(instant: datetime) -> str:
    """ISO 8601 local time with offset, minutes precision (Python's isoformat, zoneinfo)."""
    return instant.astimezone(ZoneInfo(TZ)).isoformat(timespec="minutes")


def _expected(root: Path, job: str) -> list[dict[str, Any]]:
    """Every due window of `job` with the state the page must show, from the ledger (sqlite3) and the
    arrangement: a window without a ledger row is ready when its day has input files, else waiting
    (for the consumer: waiting, its producer windows are not all done)."""
    rows = {r["window_key"]: r for r in ledger_rows(
        root, "SELECT window_key, state, good_run_id FROM weir_windows WHERE job = ?", (job,))}
    out = []
    for start, end in _windows(job):
        row = rows.get(start.strftime("%Y-%m-%dT%H:%M:%SZ"))
        if row is not None:
            state, has_output = row["state"], row["good_run_id"] is not None
        else:
            with_files = job == "rides_4h" and start.astimezone(ZoneInfo(TZ)).date() in DAYS[:3]
            state, has_output = ("ready" if with_files else "waiting"), False
        out.append({"id": _local_id(start), "end": _local_id(end), "state": state, "output": has_output})
    return out


def _watermark(windows: list[dict[str, Any]]) -> str | None:
    """Where the windows holding an output, from the first on, stop: the start of the first without one."""
    reach = None
    for w in windows:
        if not w["output"]:
            break
        reach = w["end"]
    return reach


def _ranges(job: str, windows: list[dict[str, Any]]) -> dict[tuple[str, str], dict[str, Any]]:
    """Per (job, state) of the windows not done: how many, first window, last end, how many runs of
    consecutive windows."""
    out: dict[tuple[str, str], dict[str, Any]] = {}
    prev = None
    for w in windows:
        if w["state"] != "done":
            entry = out.setdefault((job, w["state"]), {"count": 0, "first": w["id"], "ranges": 0})
            entry["count"] += 1
            entry["last_end"] = w["end"]
            if prev is None or prev["state"] != w["state"]:
                entry["ranges"] += 1
        prev = w
    return out


# ---------------------------------------------------------------- the browser


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory):
    b = Browser(tmp_path_factory.mktemp("chromium") / "profile")
    try:
        yield b
    finally:
        b.close()


@pytest.fixture(scope="module")
def shown(arranged: dict[str, Any], browser: Browser) -> dict[str, Any]:
    """The page opened in Chromium, and what it shows, read from its DOM."""
    browser.open(arranged["path"])
    return browser.evaluate("""(function(){
      var rows = {};
      document.querySelectorAll('table.overview tbody tr').forEach(function(tr){
        var wm = tr.querySelector('[data-watermark]');
        rows[tr.getAttribute('data-job')] = {watermark: wm ? wm.getAttribute('data-watermark') : null,
          states: tr.querySelector('td.states').textContent};
      });
      var problems = Array.from(document.querySelectorAll('li.problem')).map(function(li){
        return {job: li.getAttribute('data-job'), state: li.getAttribute('data-state'),
          first: li.getAttribute('data-first'), last_end: li.getAttribute('data-last-end'),
          count: Number(li.getAttribute('data-count')), ranges: Number(li.getAttribute('data-ranges')),
          text: li.textContent, commands: Array.from(li.querySelectorAll('code.command')).map(
            function(c){ return c.textContent; })};
      });
      return {overview: rows, problems: problems, errors: document.documentElement.getAttribute('data-script-errors')};
    })()""")


def test_browser_shows_each_jobs_watermark_as_computed_from_the_ledger(arranged: dict[str, Any],
                                                                        shown: dict[str, Any]):
    root = arranged["root"]
    assert shown["errors"] is None
    for job in ("rides_4h", CONSUMER):
        expected = _watermark(_expected(root, job))
        assert shown["overview"][job]["watermark"] == expected, job
    # the arrangement holds: both reach into 23 March and stop there
    assert shown["overview"]["rides_4h"]["watermark"].startswith("2026-03-23T")
    assert shown["overview"][CONSUMER]["watermark"] == "2026-03-23T00:00+00:00"


def test_browser_lists_each_problem_range_as_computed_from_the_ledger(arranged: dict[str, Any],
                                                                      shown: dict[str, Any]):
    root = arranged["root"]
    expected = {**_ranges("rides_4h", _expected(root, "rides_4h")), **_ranges(CONSUMER, _expected(root, CONSUMER))}
    assert {k[1] for k in expected} == {"failed", "ready", "waiting"}  # the arrangement holds
    listed = {(p["job"], p["state"]): {"count": p["count"], "first": p["first"], "ranges": p["ranges"],
                                       "last_end": p["last_end"]} for p in shown["problems"]}
    assert len(listed) == len(shown["problems"])  # one entry per job and state here (one reason each)
    assert listed == expected
    # the failed window's error reads as text, with the fare's markup characters intact
    failed = next(p for p in shown["problems"] if p["state"] == "failed")
    assert BAD_FARE in failed["text"]


def test_browser_says_every_state_in_words_and_glyphs_not_only_colour(arranged: dict[str, Any],
                                                                      shown: dict[str, Any], browser: Browser):
    from runner.report.data import GLYPH

    root = arranged["root"]
    for job in ("rides_4h", CONSUMER):
        counts: dict[str, int] = {}
        for w in _expected(root, job):
            counts[w["state"]] = counts.get(w["state"], 0) + 1
        text = shown["overview"][job]["states"]
        for state, n in counts.items():
            if state != "done":
                assert f"{GLYPH[state]} {n} {state}" in text, (job, state, text)
    for p in shown["problems"]:
        assert f"{GLYPH[p['state']]} {p['state']}" in p["text"]
    # every state drawn in a timeline or bar carries its name; each has a legend entry with its own pattern
    titles = browser.evaluate("Array.from(document.querySelectorAll('svg path[class^=\"s-\"] > title'))"
                              ".map(function(t){return t.textContent;})")
    assert titles and all(t.split(" ", 1)[1] in GLYPH for t in titles)
    legend = browser.evaluate("Array.from(document.querySelectorAll('.legend b')).map(function(b){"
                              "return b.textContent;})")
    for state in ("failed", "stale", "waiting", "ready", "running", "done"):
        assert f"{GLYPH[state]} {state}" in legend


def test_patterns_differ_in_shape_not_only_in_colour():
    import re

    from runner.report.svg import PATTERNS

    # with every colour taken out, the six textures are still six different drawings
    shapes = {state: re.sub(r'(fill|stroke)="[^"]*"', "", body) for state, body in PATTERNS.items()}
    assert len(set(shapes.values())) == len(shapes)


def test_every_command_shown_parses_as_a_weir_command(arranged: dict[str, Any], shown: dict[str, Any]):
    import click

    from runner.cli import cli as weir_cli

    commands = [c for p in shown["problems"] for c in p["commands"]]
    assert any(c.startswith("weir backfill ") for c in commands)
    for command in commands:
        args = shlex.split(command)  # as a POSIX shell splits the pasted line
        assert args[0] == "weir"
        sub = weir_cli.get_command(click.Context(weir_cli), args[1])
        assert sub is not None, command
        sub.make_context(args[1], args[2:])  # click's own parser: raises on an unknown option or a bad value
    # the failed range's command, dry-run, names exactly the failed window the ledger holds (sqlite3)
    failed = next(p for p in shown["problems"] if p["state"] == "failed")
    run = next(c for c in failed["commands"] if " backfill " in c)
    result = cli(arranged["root"], *shlex.split(run)[1:], "--dry-run", "--at", AT, "--json")
    assert result.exit_code == 0, result.stderr
    [row] = ledger_rows(arranged["root"], "SELECT window_id FROM weir_windows WHERE job = 'rides_4h' AND "
                                          "state = 'failed'")
    planned = json.loads(result.stdout)["windows"]
    assert [w["window"] for w in planned if w["job"] == "rides_4h"] == [row["window_id"]]
    # its reader waits for that window, so the command carries --downstream and plans the reader's day too
    assert "--downstream" in run and [w["window"] for w in planned if w["job"] == CONSUMER] == [
        _local_id(datetime(2026, 3, 23, tzinfo=ZoneInfo(TZ)))]


def test_browser_clips_no_label_and_the_page_fits_its_width(arranged: dict[str, Any], browser: Browser):
    browser.open(arranged["path"])
    clipped = clipped_labels(browser)
    assert clipped == []
    # the axis under the bars shows its labels (some may be left out, none is cut)
    assert browser.evaluate("document.querySelectorAll('.axis-labels .al:not(.hidden)').length") >= 2
    assert browser.errors() == []


def test_browser_lists_a_clicked_windows_last_runs_as_the_ledger_holds_them(arranged: dict[str, Any],
                                                                            browser: Browser):
    root = arranged["root"]
    browser.open(arranged["path"])
    point = browser.evaluate("weirReport.pointFor('rides_4h', '2026-03-22T10:00+00:00')")
    browser.click(point["x"], point["y"])
    listed = browser.evaluate("Array.from(document.querySelectorAll('#wl-0 tbody tr')).map(function(r){"
                              "return [r.className].concat(Array.from(r.cells).map(function(c){"
                              "return c.textContent;}));})")
    runs = {r["window_id"]: r for r in ledger_rows(
        root, "SELECT w.window_id, r.seconds, r.rows_written, r.finished_at FROM weir_windows w "
              "JOIN weir_runs r ON r.id = w.run_id WHERE w.job = 'rides_4h'")}
    assert listed, "a click on the timeline lists windows"
    here = [row for row in listed if "here" in row[0]]
    assert [row[1] for row in here] == ["2026-03-22T08:00+00:00"]  # the window holding 10:00 (4-hour windows)
    every = {w["id"]: w for w in _expected(root, "rides_4h")}
    for _cls, window_id, state, finished, duration, rows, _reason in listed:
        assert state.split(" ")[1] == every[window_id]["state"]
        run = runs.get(window_id)
        if run is None:
            assert finished == "never"
            continue
        assert finished.startswith(f"{run['finished_at'][:10]} {run['finished_at'][11:16]} UTC")
        assert float(duration.removesuffix(" s")) == pytest.approx(run["seconds"], abs=0.006)
        if run["rows_written"] is not None:
            assert int(rows.split(" ")[0].replace(",", "")) == run["rows_written"]
    assert browser.errors() == []


def test_window_figures_survive_the_trip_through_the_page_encoding(arranged: dict[str, Any], browser: Browser):
    import polars as pl

    from runner.report.encoding import vlq

    values = [0, 1, -1, 15, 16, -16, 31, 32, 123, 1023, 1024, -99999, 86_400, 3_600 * 24 * 366, 2**40 + 5, None,
              7, None, -(2**33)]
    browser.open(arranged["path"])
    # the page's own decoder, run by Chromium's JavaScript engine, gives back what Python encoded
    decoded = browser.evaluate(f"weirReport.vlq({json.dumps(vlq(pl.Series(values, dtype=pl.Int64)))})")
    assert decoded == values
    assert browser.errors() == []


def test_numbers_are_encoded_as_base64_vlq():
    import polars as pl

    from runner.report.encoding import vlq

    # Base64 VLQ as in the source map format (revision 3), values as commonly quoted for it (from memory):
    # 0 -> "A", 1 -> "C", -1 -> "D", 15 -> "e", 16 -> "gB", 123 -> "2H"
    assert vlq(pl.Series([0, 1, -1, 15, 16, 123], dtype=pl.Int64)) == "ACDegB2H"
    assert vlq(pl.Series([None], dtype=pl.Int64)) == "B"


# ---------------------------------------------------------------- shapes, without a browser


def test_month_ticks_follow_the_calendar_and_no_label_passes_the_right_edge():
    import re

    from runner.model.timeutil import to_us
    from runner.report.svg import axis_labels, text_width, ticks

    zone = ZoneInfo(TZ)
    lo, hi = datetime(2025, 8, 10, tzinfo=zone), datetime(2025, 11, 3, tzinfo=zone)
    marks = ticks((to_us(lo), to_us(hi)), zone, 400)
    # the first of each month inside the span, by the Lisbon calendar (zoneinfo); months read "Sep" etc.
    firsts = [datetime(2025, m, 1, tzinfo=zone) for m in (9, 10, 11)]
    assert [t for _, t in marks] == ["Sep 2025", "Oct", "Nov"]
    utc = ZoneInfo("UTC")  # absolute time: Python subtracts two times of one zone on the wall clock
    for (x, _), first in zip(marks, firsts, strict=True):
        assert x == pytest.approx((first.astimezone(utc) - lo.astimezone(utc)) / (hi.astimezone(utc) - lo.astimezone(utc))
                                  * 400)
    # "Nov" starts 10 units before the right edge: it is drawn whole, ending at the edge
    assert 400 - marks[-1][0] < text_width("Nov", 11)
    svg = axis_labels(marks, 0, 400, 12)
    assert 'text-anchor="end">Nov<' in svg
    for x, anchor, label in re.findall(r'x="([\d.]+)" y="[\d.]+" text-anchor="(\w+)">([^<]+)<', svg):
        right = float(x) + (text_width(label, 11) if anchor == "start" else 0)
        assert right <= 400 + 0.5, label


def test_overdue_windows_are_those_past_the_deadline_and_not_done():
    """Issue 15, deadlines: at a clock past the deadline exactly the windows past it are overdue."""
    import polars as pl

    from runner.model.timeutil import to_us
    from runner.report.data import with_shown_states

    zone = ZoneInfo(TZ)
    days = [date(2026, 3, 28) + timedelta(days=i) for i in range(5)]
    # local days 28 to 31 March (zoneinfo: the 29th lasts 23 hours)
    starts = [datetime(d.year, d.month, d.day, tzinfo=zone) for d in days[:4]]
    ends = [datetime(d.year, d.month, d.day, tzinfo=zone) for d in days[1:]]
    frame = pl.DataFrame({"start_us": [to_us(s) for s in starts], "end_us": [to_us(e) for e in ends],
                          "state": ["done", "failed", "missing", "waiting"], "output": [None] * 4},
                         schema_overrides={"output": pl.String})
    at = datetime(2026, 3, 31, 5, 30, tzinfo=zone)
    deadline = timedelta(hours=6)
    shaped = with_shown_states(frame, at, deadline)
    # by hand: not done and end + 6 h <= 05:30 on the 31st. The failed window ended on the 30th at 00:00
    # (overdue since 06:00 that day); the ready one ended on the 31st at 00:00 and is due by 06:00 (not
    # yet); the waiting one has not even ended; the done one is never overdue
    assert shaped["overdue"].to_list() == [False, True, False, False]
    assert shaped["state"].to_list() == ["done", "failed", "ready", "waiting"]
    assert not with_shown_states(frame, at, None)["overdue"].any()


# ---------------------------------------------------------------- the files the page is made of


def test_the_pages_script_parses(tmp_path: Path):
    node = shutil.which("node") or shutil.which("nodejs")
    if node is None:
        pytest.skip("no node found (install Debian's `nodejs` package; .ci/run does)")
    script = Path(__file__).resolve().parent.parent / "runner" / "report" / "assets" / "report.js"
    done = subprocess.run([node, "--check", str(script)], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    # and a script with a syntax error fails the same check, so the check can fail
    broken = tmp_path / "broken.js"
    broken.write_text(script.read_text(encoding="utf-8") + "\n(function () {\n", encoding="utf-8")
    assert subprocess.run([node, "--check", str(broken)], capture_output=True, timeout=60).returncode != 0
