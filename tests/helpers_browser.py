"""Headless Chromium driven over the Chrome DevTools Protocol, for the report's tests and scripts.

The protocol is JSON-RPC over a WebSocket (RFC 6455); the small client below
uses the standard library only. A test that cannot find Chromium skips,
saying why (CI installs Debian's `chromium`, and runs with WEIR_NO_SKIPS=1).
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
from pathlib import Path
from typing import Any

import pytest


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


def clipped_labels(browser: Browser) -> list[str]:
    """Texts the open page cuts, measured by Chromium with every <details> open: SVG text outside its
    drawing, axis labels outside their row, elements that hide overflowing text, and a page wider than
    the window. An empty list when nothing is cut."""
    return browser.evaluate("""(function(){
      document.querySelectorAll('details').forEach(function(d){ d.open = true; });
      window.dispatchEvent(new Event('resize'));
      var bad = [];
      document.querySelectorAll('svg text').forEach(function(t){
        var s = t.ownerSVGElement.getBoundingClientRect(), r = t.getBoundingClientRect();
        if (r.width === 0) { return; }
        if (r.left < s.left - 0.5 || r.right > s.right + 0.5 || r.top < s.top - 0.5 || r.bottom > s.bottom + 0.5) {
          bad.push('svg text ' + t.textContent);
        }
      });
      document.querySelectorAll('.axis-labels .al').forEach(function(l){
        if (l.classList.contains('hidden')) { return; }
        var c = l.parentElement.getBoundingClientRect(), r = l.getBoundingClientRect();
        if (r.left < c.left - 0.5 || r.right > c.right + 0.5) { bad.push('axis label ' + l.textContent); }
      });
      document.querySelectorAll('body *').forEach(function(e){
        var cs = getComputedStyle(e);
        if ((cs.overflowX === 'hidden' || cs.textOverflow === 'ellipsis') && e.scrollWidth > e.clientWidth + 1) {
          bad.push('cut ' + e.tagName + ' ' + e.textContent.slice(0, 40));
        }
      });
      document.querySelectorAll('main section, li.problem, table.overview').forEach(function(e){
        if (e.scrollWidth > e.clientWidth + 1) { bad.push('wider than its box: ' + e.tagName + '#' + e.id); }
      });
      if (document.documentElement.scrollWidth > window.innerWidth) {
        bad.push('page wider than the window: ' + document.documentElement.scrollWidth);
      }
      return bad;
    })()""")
