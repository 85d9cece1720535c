"""`weir report`: the HTML page, checked by Python's html.parser and by a real browser.

The workspace is small and arranged so that its days hold known mixes of
states: an invented bike-share job cut into 4-hour windows over four Lisbon
days (one day done, one with a failed window and windows never run, one never
run, one with no input files yet), and a daily job reading it. Expected counts
come from the ledger read with Python's sqlite3 and from window lengths
computed with zoneinfo (the IANA tz database), never from weir's report code.

The browser is Debian's Chromium in headless mode, driven over the Chrome
DevTools Protocol (its JSON-RPC over WebSocket, RFC 6455) with a small
standard-library client below; the test skips, saying why, when no Chromium
can be found.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import shutil
import signal
import socket
import subprocess
import time
import urllib.parse
import urllib.request
from datetime import date, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from conftest_run import cli, ledger_rows
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
    assert CONSUMER in "".join(checker.texts_by_id["counts"])
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


def test_report_on_a_workspace_that_never_ran_shows_every_window_missing_or_waiting(tmp_path: Path):
    root = write_workspace(tmp_path / "ws", {"rides_4h": FOUR_HOURLY})
    write_rides(root, DAYS[0], rows=10)
    result = cli(root, "report", "--at", AT, "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)
    # 4-hour windows over 22..25 March (zoneinfo day lengths); the first day has input files, the rest none
    assert info["counts"]["missing"] == _windows_in_day(DAYS[0])
    assert info["counts"]["waiting"] == sum(_windows_in_day(d) for d in DAYS[1:])
    assert not (root / "state" / "ledger.sqlite").exists()  # reporting never creates a ledger
    assert _parse(Path(info["report"]).read_text(encoding="utf-8")).problems == []


def test_jobs_in_different_time_zones_share_a_utc_day_axis(tmp_path: Path):
    tokyo = FOUR_HOURLY.replace(f"timezone: {TZ}", "timezone: Asia/Tokyo").replace("rides_4h/", "rides_4h_east/")
    root = write_workspace(tmp_path / "ws", {"rides_4h": FOUR_HOURLY, "rides_4h_east": tokyo})
    result = cli(root, "report", "--at", AT)
    assert result.exit_code == 0, result.stderr
    page = (root / "state" / "report.html").read_text(encoding="utf-8")
    # the first window of the Tokyo job starts at local midnight of 22 March: in UTC (zoneinfo) that is the 21st
    first = datetime(2026, 3, 22, tzinfo=ZoneInfo("Asia/Tokyo")).astimezone(ZoneInfo("UTC")).date()
    assert f'data-first-day="{first.isoformat()}"' in page
    assert "calendar days in UTC" in page


# ---------------------------------------------------------------- the browser


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


class WebSocket:
    """A minimal RFC 6455 client: text frames out (masked), text/continuation/ping/close frames in."""

    GUID = "258EAFA5-E914-47DA-95CA-C5AB0DC85B11"

    def __init__(self, url: str, timeout: float = 30.0):
        parts = urllib.parse.urlsplit(url)
        self.sock = socket.create_connection((parts.hostname, parts.port), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET {parts.path} HTTP/1.1\r\nHost: {parts.hostname}:{parts.port}\r\n"
                           "Upgrade: websocket\r\nConnection: Upgrade\r\n"
                           f"Sec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n").encode())
        data = b""
        while b"\r\n\r\n" not in data:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("closed during the handshake")
            data += chunk
        head, self.pending = data.split(b"\r\n\r\n", 1)
        lines = head.decode("latin-1").split("\r\n")
        assert " 101 " in lines[0] + " ", lines[0]
        accept = base64.b64encode(hashlib.sha1((key + self.GUID).encode()).digest()).decode()
        assert any(line.lower() == f"sec-websocket-accept: {accept}".lower() for line in lines[1:])

    def _read(self, n: int) -> bytes:
        while len(self.pending) < n:
            chunk = self.sock.recv(max(65536, n - len(self.pending)))
            if not chunk:
                raise ConnectionError("closed")
            self.pending += chunk
        out, self.pending = self.pending[:n], self.pending[n:]
        return out

    def _frame(self, opcode: int, payload: bytes) -> None:
        mask = os.urandom(4)
        n = len(payload)
        head = bytes([0x80 | opcode])
        if n < 126:
            head += bytes([0x80 | n])
        elif n < 65536:
            head += bytes([0x80 | 126]) + n.to_bytes(2, "big")
        else:
            head += bytes([0x80 | 127]) + n.to_bytes(8, "big")
        body = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
        self.sock.sendall(head + mask + body)

    def send(self, text: str) -> None:
        self._frame(0x1, text.encode())

    def recv(self) -> str:
        parts: list[bytes] = []
        while True:
            b0, b1 = self._read(2)
            opcode, n = b0 & 0x0F, b1 & 0x7F
            if n == 126:
                n = int.from_bytes(self._read(2), "big")
            elif n == 127:
                n = int.from_bytes(self._read(8), "big")
            mask = self._read(4) if b1 & 0x80 else None
            payload = self._read(n)
            if mask:
                payload = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
            if opcode == 0x9:
                self._frame(0xA, payload)
                continue
            if opcode == 0x8:
                raise ConnectionError("the browser closed the connection")
            if opcode in (0x0, 0x1, 0x2):
                parts.append(payload)
                if b0 & 0x80:
                    return b"".join(parts).decode()

    def close(self) -> None:
        self.sock.close()


class Browser:
    """Headless Chromium with one page, driven over the DevTools protocol."""

    def __init__(self, profile: Path, width: int = 1400, height: int = 1000):
        exe = _chromium()
        if exe is None:
            pytest.skip("no Chromium found (install Debian's `chromium` package; .ci/run does)")
        profile.mkdir(parents=True, exist_ok=True)
        scratch = profile.parent / "tmp"  # Chromium's own temporary files stay under the test's folder
        scratch.mkdir(exist_ok=True)
        self.proc = subprocess.Popen(
            [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-extensions", "--disable-default-apps", "--mute-audio", f"--user-data-dir={profile}",
             "--remote-debugging-port=0", f"--window-size={width},{height}", "about:blank"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
            env={**os.environ, "TMPDIR": str(scratch)})
        self.events: list[dict[str, Any]] = []
        self._id = 0
        port_file = profile / "DevToolsActivePort"
        deadline = time.monotonic() + 30
        while not (port_file.exists() and port_file.read_text().count("\n") >= 1):
            if self.proc.poll() is not None or time.monotonic() > deadline:
                self.close()
                pytest.skip(f"Chromium ({exe}) did not start a DevTools endpoint")
            time.sleep(0.05)
        port = int(port_file.read_text().split("\n")[0])
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=10) as resp:  # localhost only
            targets = json.load(resp)
        page = next(t for t in targets if t["type"] == "page")
        self.ws = WebSocket(page["webSocketDebuggerUrl"])
        for domain in ("Page", "Runtime", "Log"):
            self.call(f"{domain}.enable")
        self.call("Emulation.setDeviceMetricsOverride", width=width, height=height, deviceScaleFactor=1,
                  mobile=False)

    def call(self, method: str, **params: Any) -> dict[str, Any]:
        self._id += 1
        self.ws.send(json.dumps({"id": self._id, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == self._id:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            if "method" in msg:
                self.events.append(msg)

    def wait_for(self, method: str, timeout: float = 30.0) -> dict[str, Any]:
        deadline = time.monotonic() + timeout
        seen = len([e for e in self.events if e["method"] == method])
        while time.monotonic() < deadline:
            found = [e for e in self.events if e["method"] == method]
            if len(found) > seen:
                return found[-1]
            msg = json.loads(self.ws.recv())
            if "method" in msg:
                self.events.append(msg)
        raise TimeoutError(method)

    def open(self, path: Path) -> None:
        self.events.clear()
        self.call("Page.navigate", url=path.resolve().as_uri())
        self.wait_for("Page.loadEventFired")

    def evaluate(self, expression: str) -> Any:
        result = self.call("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        if "exceptionDetails" in result:
            raise RuntimeError(result["exceptionDetails"])
        return result["result"].get("value")

    def click(self, x: float, y: float) -> None:
        self.call("Input.dispatchMouseEvent", type="mouseMoved", x=x, y=y)
        self.call("Input.dispatchMouseEvent", type="mousePressed", x=x, y=y, button="left", clickCount=1)
        self.call("Input.dispatchMouseEvent", type="mouseReleased", x=x, y=y, button="left", clickCount=1)

    def errors(self) -> list[str]:
        """Console errors, uncaught exceptions and browser log errors seen since the page was opened."""
        out = []
        for e in self.events:
            p = e.get("params", {})
            if e["method"] == "Runtime.exceptionThrown":
                out.append(json.dumps(p.get("exceptionDetails", {}))[:500])
            elif e["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert", "warning"):
                out.append(json.dumps(p.get("args", []))[:500])
            elif e["method"] == "Log.entryAdded" and p.get("entry", {}).get("level") in ("error", "warning"):
                out.append(p["entry"].get("text", "")[:500])
        return out

    def screenshot(self, path: Path) -> None:
        shot = self.call("Page.captureScreenshot", format="png", captureBeyondViewport=True)
        path.write_bytes(base64.b64decode(shot["data"]))

    def close(self) -> None:
        try:
            if getattr(self, "ws", None) is not None:
                try:
                    self.call("Browser.close")  # a clean exit removes its temporary files
                    self.proc.wait(timeout=10)
                except (OSError, RuntimeError, ConnectionError, subprocess.TimeoutExpired):
                    pass
                self.ws.close()
        finally:
            if self.proc.poll() is None:
                os.killpg(self.proc.pid, signal.SIGTERM)  # its own session: only what this test started
                try:
                    self.proc.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    os.killpg(self.proc.pid, signal.SIGKILL)
                    self.proc.wait(timeout=10)


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory):
    b = Browser(tmp_path_factory.mktemp("chromium") / "profile")
    try:
        yield b
    finally:
        b.close()


def _cell_detail(browser: Browser, job: str, day: date) -> dict[str, Any]:
    """Click the matrix cell of `job` on `day` as a user would and read the counts the page then shows."""
    box = browser.evaluate(f"weirReport.cellCenter({json.dumps(job)}, {json.dumps(day.isoformat())})")
    assert box is not None, (job, day)
    browser.click(box["x"], box["y"])
    tip = browser.evaluate("document.getElementById('tip').hidden ? '' : document.getElementById('tip').textContent")
    shown = browser.evaluate(
        "(function(){var c=document.querySelector('#detail .cnt'); if(!c){return null;} var o={};"
        "for (var i=0;i<c.attributes.length;i++){o[c.attributes[i].name]=c.attributes[i].value;}"
        "o.text=c.textContent; o.rows=document.querySelectorAll('#detail tbody tr').length; return o;})()")
    assert shown is not None
    shown["tip"] = tip
    return shown


def _number_in_cell(browser: Browser, job: str, day: date) -> str | None:
    """The text drawn in the matrix cell of `job` on `day` (found by where it is drawn on screen)."""
    return browser.evaluate(
        f"(function(){{var c=weirReport.cellCenter({json.dumps(job)}, {json.dumps(day.isoformat())});"
        "var found=null; document.querySelectorAll('#matrix .counts text').forEach(function(t){"
        "var b=t.getBoundingClientRect(); if (Math.abs((b.left+b.right)/2-c.x)<4 && Math.abs((b.top+b.bottom)/2-c.y)<8)"
        "{found=t.textContent;}}); return found;})()")


def test_browser_shows_the_ledgers_counts_per_day_without_script_errors(arranged: dict[str, Any],
                                                                         browser: Browser, tmp_path: Path):
    root = arranged["root"]
    browser.open(arranged["path"])
    assert browser.evaluate("document.documentElement.getAttribute('data-script-errors')") is None
    assert browser.evaluate("typeof weirReport") == "object"

    # 23 March: windows before 16:00 ran (one failed by arrangement), the rest never ran though files are there
    day = DAYS[1]
    ledger = _ledger_counts(root, "rides_4h", day)  # Python's sqlite3 over the ledger
    expected_missing = _windows_in_day(day) - sum(ledger.values())  # zoneinfo day length
    assert ledger.get("failed") == 1 and expected_missing > 0  # the arrangement holds
    shown = _cell_detail(browser, "rides_4h", day)
    assert int(shown["data-done"]) == ledger.get("done", 0)
    assert int(shown["data-failed"]) == ledger["failed"]
    assert int(shown["data-missing"]) == expected_missing
    assert shown["rows"] == _windows_in_day(day)
    assert f"failed {ledger['failed']}" in shown["tip"] and f"missing {expected_missing}" in shown["tip"]
    # the number drawn inside the cell is how many of its windows are not done
    assert _number_in_cell(browser, "rides_4h", day) == str(ledger["failed"] + expected_missing)

    # 22 March: every window ran and is done (sqlite3 count == zoneinfo count)
    ledger = _ledger_counts(root, "rides_4h", DAYS[0])
    shown = _cell_detail(browser, "rides_4h", DAYS[0])
    assert ledger == {"done": _windows_in_day(DAYS[0])}
    assert int(shown["data-done"]) == ledger["done"] and int(shown["data-failed"]) == 0
    assert _number_in_cell(browser, "rides_4h", DAYS[0]) is None  # nothing to count: all done
    # each listed window's last run: the figures of the run its ledger row points at (sqlite3)
    lo, hi = _utc_bounds(DAYS[0])
    runs = {r["window_id"]: r for r in ledger_rows(
        root, "SELECT w.window_id, r.seconds, r.rows_written, r.fingerprint, r.finished_at FROM weir_windows w "
              "JOIN weir_runs r ON r.id = w.run_id WHERE w.job = 'rides_4h' AND w.window_key >= ? "
              "AND w.window_key < ?", (lo, hi))}
    listed = browser.evaluate("Array.from(document.querySelectorAll('#detail tbody tr')).map(function(r){"
                              "return Array.from(r.cells).map(function(c){return c.textContent;});})")
    assert sorted(row[0] for row in listed) == sorted(runs)
    for window_id, state, finished, duration, rows, fingerprint, _reason in listed:
        run = runs[window_id]
        assert state.endswith("done")
        assert finished.startswith(f"{run['finished_at'][:10]} {run['finished_at'][11:16]}Z")
        assert float(duration.removesuffix(" s")) == pytest.approx(run["seconds"], abs=0.006)
        assert int(rows.replace(",", "")) == run["rows_written"]
        assert fingerprint == run["fingerprint"][:6]

    # 25 March: no input files were written, nothing ran: every window waits
    shown = _cell_detail(browser, "rides_4h", DAYS[3])
    assert _ledger_counts(root, "rides_4h", DAYS[3]) == {}
    assert int(shown["data-waiting"]) == _windows_in_day(DAYS[3])

    # the consumer: 22 March ran (sqlite3), 23 March waits for its producer's failed and missing windows
    assert _ledger_counts(root, CONSUMER, DAYS[0]) == {"done": 1}
    assert int(_cell_detail(browser, CONSUMER, DAYS[0])["data-done"]) == 1
    assert int(_cell_detail(browser, CONSUMER, DAYS[1])["data-waiting"]) == 1

    # the failed window's error shows as text, with the fare's markup characters intact and no element made
    _cell_detail(browser, "rides_4h", DAYS[1])
    detail_text = browser.evaluate("document.getElementById('detail').textContent")
    assert BAD_FARE in detail_text
    assert browser.evaluate("document.querySelectorAll('#detail b, #detail i').length") == 0

    browser.screenshot(tmp_path / "report.png")
    assert (tmp_path / "report.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)
    assert browser.errors() == []


def test_window_figures_survive_the_trip_through_the_page_encoding(arranged: dict[str, Any], browser: Browser):
    import polars as pl

    from runner.report import vlq

    values = [0, 1, -1, 15, 16, -16, 31, 32, 123, 1023, 1024, -99999, 86_400, 3_600 * 24 * 366, 2**40 + 5, None,
              7, None, -(2**33)]
    browser.open(arranged["path"])
    # the page's own decoder, run by Chromium's JavaScript engine, gives back what Python encoded
    decoded = browser.evaluate(f"weirReport.vlq({json.dumps(vlq(pl.Series(values, dtype=pl.Int64)))})")
    assert decoded == values
    assert browser.errors() == []


def test_numbers_are_encoded_as_base64_vlq():
    import polars as pl

    from runner.report import vlq

    # Base64 VLQ as in the source map format (revision 3), values as commonly quoted for it (from memory):
    # 0 -> "A", 1 -> "C", -1 -> "D", 15 -> "e", 16 -> "gB", 123 -> "2H"
    assert vlq(pl.Series([0, 1, -1, 15, 16, 123], dtype=pl.Int64)) == "ACDegB2H"
    assert vlq(pl.Series([None], dtype=pl.Int64)) == "B"


def test_browser_keyboard_moves_the_selection_between_days(arranged: dict[str, Any], browser: Browser):
    browser.open(arranged["path"])
    _cell_detail(browser, "rides_4h", DAYS[1])
    browser.call("Input.dispatchKeyEvent", type="keyDown", key="ArrowLeft", code="ArrowLeft",
                 windowsVirtualKeyCode=37)
    browser.call("Input.dispatchKeyEvent", type="keyUp", key="ArrowLeft", code="ArrowLeft",
                 windowsVirtualKeyCode=37)
    shown = browser.evaluate("document.querySelector('#detail .cnt').getAttribute('data-day')")
    assert shown == DAYS[0].isoformat()
    assert browser.errors() == []
