"""The HTML report in a real headless browser (Debian's chromium).

The browser is driven over the Chrome DevTools Protocol on a WebSocket, written here
with the standard library only (RFC 6455 framing: client frames masked, 7/16/64-bit
lengths; DevTools protocol: numbered JSON commands, events without an id). Checks: the
page loads with no console error, no uncaught exception and no request other than the
file itself; every chart is laid out with a non-zero size and non-empty lines or bars;
the safety note is shown; a full-page screenshot is taken (kept in
``$SAPWOOD_SCREENSHOT_DIR`` when set) and is a real, non-blank PNG (PNG spec: signature,
IHDR width/height). A page with a forbidden fetch must produce console errors, so the
error check is shown to work.

Skipped, with the reason, when no chromium binary is found (``$SAPWOOD_CHROMIUM``, then
``chromium``, ``chromium-browser`` on PATH); CI installs Debian's ``chromium``.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import socket
import struct
import subprocess
import time
import urllib.request
import zlib
from pathlib import Path

import pytest
from tests.operator_runs import shared_run

from stream.views.report import load_report_data, write_report

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]
EVENTS = [{"record": 10250, "time": "2025-01-01T00:00:00Z", "kind": "alarm", "node": 0,
           "path": []},
          {"record": 13000, "time": "2025-01-01T00:01:00Z", "kind": "swap", "node": 0,
           "path": [{"feature": "age", "op": "<=", "value": 40.9}]}]


def _chromium() -> str | None:
    for candidate in (os.environ.get("SAPWOOD_CHROMIUM"), "chromium", "chromium-browser"):
        if candidate and shutil.which(candidate):
            return shutil.which(candidate)
    return None


# --------------------------------------------------------------------------- WebSocket


class WebSocket:
    """Just enough of RFC 6455 for the DevTools protocol: text frames, no extensions."""

    def __init__(self, url: str, timeout: float = 30.0) -> None:
        assert url.startswith("ws://")
        host_port, _, path = url[len("ws://"):].partition("/")
        host, _, port = host_port.partition(":")
        self.sock = socket.create_connection((host, int(port)), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET /{path} HTTP/1.1\r\nHost: {host_port}\r\n"
                           "Upgrade: websocket\r\nConnection: Upgrade\r\n"
                           f"Sec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n")
                          .encode())
        response = b""
        while b"\r\n\r\n" not in response:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("the browser closed the connection during the handshake")
            response += chunk
        head, _, self.buffer = response.partition(b"\r\n\r\n")
        status = head.split(b"\r\n", 1)[0]
        if b" 101 " not in status:
            raise ConnectionError(f"handshake refused: {status!r}")

    def send(self, text: str) -> None:
        payload = text.encode()
        header = bytes([0x81])  # FIN, text
        n = len(payload)
        if n < 126:
            header += bytes([0x80 | n])
        elif n < 1 << 16:
            header += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            header += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        masked = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
        self.sock.sendall(header + mask + masked)

    def _read(self, n: int) -> bytes:
        while len(self.buffer) < n:
            chunk = self.sock.recv(max(65536, n - len(self.buffer)))
            if not chunk:
                raise ConnectionError("the browser closed the connection")
            self.buffer += chunk
        data, self.buffer = self.buffer[:n], self.buffer[n:]
        return data

    def receive(self) -> str:
        parts = []
        while True:
            first, second = self._read(2)
            opcode, n = first & 0x0F, second & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._read(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._read(8))[0]
            mask = self._read(4) if second & 0x80 else None
            payload = self._read(n)
            if mask:
                payload = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
            if opcode == 0x8:
                raise ConnectionError("the browser closed the WebSocket")
            if opcode in (0x9, 0xA):  # ping / pong: not used by DevTools
                continue
            parts.append(payload)
            if first & 0x80:
                return b"".join(parts).decode()

    def close(self) -> None:
        self.sock.close()


class DevTools:
    """Numbered commands; events are kept in ``events`` in arrival order."""

    def __init__(self, url: str) -> None:
        self.ws = WebSocket(url)
        self.next_id = 0
        self.events: list[dict] = []

    def call(self, method: str, **params) -> dict:
        self.next_id += 1
        self.ws.send(json.dumps({"id": self.next_id, "method": method, "params": params}))
        while True:
            message = json.loads(self.ws.receive())
            if message.get("id") == self.next_id:
                if "error" in message:
                    raise RuntimeError(f"{method}: {message['error']}")
                return message.get("result", {})
            if "method" in message:
                self.events.append(message)

    def wait_for(self, method: str, timeout: float = 30.0) -> dict:
        deadline = time.monotonic() + timeout
        seen = len(self.events)
        for event in self.events[:seen]:
            if event["method"] == method:
                return event
        while time.monotonic() < deadline:
            message = json.loads(self.ws.receive())
            if "method" in message:
                self.events.append(message)
                if message["method"] == method:
                    return message
        raise TimeoutError(f"no {method} within {timeout} s")

    def settle(self, seconds: float = 0.5) -> None:
        """Collect events that arrive within ``seconds`` (late console messages)."""
        self.ws.sock.settimeout(seconds)
        try:
            while True:
                message = json.loads(self.ws.receive())
                if "method" in message:
                    self.events.append(message)
        except TimeoutError:  # socket.timeout is TimeoutError since Python 3.10
            pass
        finally:
            self.ws.sock.settimeout(30.0)

    def errors(self) -> list[str]:
        found = []
        for event in self.events:
            method, params = event["method"], event.get("params", {})
            if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
                found.append("console: " + " ".join(str(a.get("value", a.get("description")))
                                                    for a in params.get("args", [])))
            elif method == "Runtime.exceptionThrown":
                found.append("exception: " + json.dumps(params.get("exceptionDetails", {}))[:300])
            elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
                found.append("log: " + params["entry"].get("text", ""))
        return found

    def requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events
                if e["method"] == "Network.requestWillBeSent"]


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    binary = _chromium()
    if binary is None:
        pytest.skip("no chromium binary found (set SAPWOOD_CHROMIUM or install Debian's "
                    "chromium, as .ci/run does)")
    profile = tmp_path_factory.mktemp("chromium-profile")
    process = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={profile}",
                                "--remote-debugging-port=0", "--window-size=1200,900",
                                "about:blank"],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        port_file = profile / "DevToolsActivePort"
        deadline = time.monotonic() + 60
        while not (port_file.exists() and port_file.read_text().count("\n") >= 1):
            if process.poll() is not None or time.monotonic() > deadline:
                pytest.fail(f"chromium did not start (exit code {process.poll()})")
            time.sleep(0.1)
        port = int(port_file.read_text().splitlines()[0])
        yield port
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


def _open_page(port: int) -> DevTools:
    request = urllib.request.Request(f"http://127.0.0.1:{port}/json/new?about:blank",
                                     method="PUT")
    with urllib.request.urlopen(request, timeout=30) as response:
        target = json.load(response)
    tools = DevTools(target["webSocketDebuggerUrl"])
    for domain in ("Runtime", "Log", "Network", "Page"):
        tools.call(f"{domain}.enable")
    return tools


def _load(port: int, path: Path) -> DevTools:
    tools = _open_page(port)
    tools.call("Page.navigate", url=path.resolve().as_uri())
    tools.wait_for("Page.loadEventFired")
    tools.settle()
    return tools


@pytest.fixture(scope="module")
def report_file(tmp_path_factory) -> Path:
    run = shared_run("majority")
    directory = tmp_path_factory.mktemp("report")
    events = directory / "events.jsonl"
    events.write_text("".join(json.dumps(e) + "\n" for e in EVENTS))
    path = directory / "report.html"
    write_report(str(path), load_report_data(str(run.snapshots), str(run.metrics),
                                             str(events)), "2025-01-02T00:00:00Z")
    return path


# --------------------------------------------------------------------------- tests

_LAYOUT = """JSON.stringify({
  title: document.title,
  safety: document.getElementById('safety').getBoundingClientRect().height,
  ruleRows: document.querySelectorAll('table.rules tr').length,
  charts: Array.from(document.querySelectorAll('svg.chart')).map(s => {
    const box = s.getBoundingClientRect();
    return {id: s.id, width: box.width, height: box.height,
            lines: Array.from(s.querySelectorAll('polyline')).map(p => p.getTotalLength()),
            bars: Array.from(s.querySelectorAll('rect[data-series]'))
                       .map(r => r.getBoundingClientRect().height),
            markers: s.querySelectorAll('line.marker').length};
  })})"""


def _png_facts(data: bytes) -> tuple[int, int, int]:
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", data[16:24])
    chunks, k = [], 8
    while k < len(data):
        length = struct.unpack(">I", data[k:k + 4])[0]
        if data[k + 4:k + 8] == b"IDAT":
            chunks.append(data[k + 8:k + 8 + length])
        k += 12 + length
    pixels = zlib.decompress(b"".join(chunks))
    return width, height, len(set(pixels))


def test_report_loads_clean_with_charts_drawn(browser, report_file, tmp_path):
    tools = _load(browser, report_file)
    try:
        assert tools.errors() == []
        assert set(tools.requests()) <= {report_file.resolve().as_uri()}
        layout = json.loads(tools.call("Runtime.evaluate", expression=_LAYOUT,
                                       returnByValue=True)["result"]["value"])
        assert layout["title"] == "sapwood report: approved"
        assert layout["safety"] > 0 and layout["ruleRows"] > 1
        charts = {c["id"]: c for c in layout["charts"]}
        # the class of concern's recall and precision: the run chose the rarer class
        assert set(charts) == {"accuracy-chart", "concern-chart", "kappa-chart", "tree-chart",
                               "churn-chart"}
        for chart in charts.values():
            assert chart["width"] > 300 and chart["height"] > 100, chart
        for name in ("accuracy-chart", "concern-chart", "kappa-chart", "tree-chart"):
            assert charts[name]["lines"] and min(charts[name]["lines"]) > 10
            assert charts[name]["markers"] == len(EVENTS)
        assert charts["churn-chart"]["bars"] and min(charts["churn-chart"]["bars"]) > 0

        size = tools.call("Page.getLayoutMetrics")["cssContentSize"]
        shot = tools.call("Page.captureScreenshot", format="png", captureBeyondViewport=True,
                          clip={"x": 0, "y": 0, "width": size["width"],
                                "height": size["height"], "scale": 1})
        png = base64.b64decode(shot["data"])
    finally:
        tools.ws.close()
    (tmp_path / "report.png").write_bytes(png)
    keep = os.environ.get("SAPWOOD_SCREENSHOT_DIR")
    if keep:
        Path(keep).mkdir(parents=True, exist_ok=True)
        (Path(keep) / "report.png").write_bytes(png)
    width, height, distinct = _png_facts(png)
    assert width >= 1000 and height >= 1500  # the whole page, not just the window
    assert distinct > 50  # charts, text and colours, not a blank page


def test_a_forbidden_fetch_is_reported(browser, report_file, tmp_path):
    """The same page with an image from the network and an inline script: the page's
    policy blocks both and the browser reports them, so the clean result above means
    something."""
    tainted = tmp_path / "tainted.html"
    tainted.write_text(report_file.read_text().replace(
        "<main>", '<main><img src="http://127.0.0.1:9/x.png" alt="">'
                  "<script>console.error('inline script ran')</script>", 1))
    tools = _load(browser, tainted)
    try:
        errors = tools.errors()
    finally:
        tools.ws.close()
    assert errors, "the browser reported nothing for a blocked fetch and script"
    assert not any("inline script ran" in e for e in errors)  # the script never ran
