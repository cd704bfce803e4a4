"""Open generated reports in headless Chromium and watch what the page does.

Chromium is driven through its DevTools protocol (``--remote-debugging-port`` and one
WebSocket, spoken here with the standard library only): the test records console messages,
uncaught exceptions, JavaScript dialogs and every network request while the page loads, then
reads the DOM and saves a screenshot to ``reports/screenshots/`` (an artifact, gitignored).

Skipped with a reason when ``/usr/bin/chromium`` is absent; ``.ci/install_browser.sh``
installs it for CI.
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import shutil
import socket
import struct
import subprocess
import time
import urllib.request
from pathlib import Path

import pytest

from allolaw.report import rendering
from report_results import CURVED, HOSTILE_IMAGE, HOSTILE_SPECIES, build_results

CHROMIUM = Path("/usr/bin/chromium")
SCREENSHOTS = Path(__file__).resolve().parents[1] / "reports" / "screenshots"

pytestmark = pytest.mark.skipif(
    not CHROMIUM.exists(),
    reason="/usr/bin/chromium not installed (bash .ci/install_browser.sh installs it)",
)


def test_reports_load_offline_without_errors_requests_or_script(tmp_path):
    config = build_results(tmp_path)
    page = rendering.render_dataset_report(config, "demo")
    index = rendering.render_index(config, logs_dir=tmp_path / "logs")
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    with _Browser(tmp_path / "profile") as browser:
        result = browser.visit(page.as_uri(), SCREENSHOTS / "demo.png")
        index_result = browser.visit(index.as_uri(), SCREENSHOTS / "index.png")

    for res in (result, index_result):
        assert res["console"] == []
        assert res["exceptions"] == []
        assert res["dialogs"] == []  # an alert() from a hostile name would open one
        # the only request is the page itself (no fonts, images, scripts or CDN)
        assert res["requests"] == [res["url"]]
        assert res["dom"]["scripts"] == 0
        assert res["png_bytes"] > 10_000
    dom = result["dom"]
    for section in ("answer", "data", "models", "checks", "pictures", "hypotheses",
                    "methods", "reproducibility", "cautions", f"failed-{CURVED}"):
        assert section in dom["ids"], section
    # the hostile species name is shown as text (escaped), never parsed as markup
    assert HOSTILE_SPECIES in dom["text"]
    assert HOSTILE_IMAGE in dom["text"]
    assert dom["images"] == 0
    assert dom["svgs"] >= 4
    assert dom["xss"] is False
    assert index_result["dom"]["ids"].count("table-index") == 1


def test_browser_probe_sees_a_script_dialog_a_console_error_and_a_request(tmp_path):
    # The harness itself must be able to fail: a page that does each forbidden thing.
    bad = tmp_path / "bad.html"
    bad.write_text(
        "<!DOCTYPE html><html><body><p id='answer'>x</p>"
        "<script>console.error('boom'); alert(1); window.__allolaw_xss = 1;</script>"
        "<img src='http://127.0.0.1:9/none.png'></body></html>",
        encoding="utf-8",
    )
    with _Browser(tmp_path / "profile") as browser:
        res = browser.visit(bad.as_uri(), tmp_path / "bad.png")
    assert res["dialogs"]
    assert res["console"]
    assert any(u.startswith("http://127.0.0.1:9/") for u in res["requests"])
    assert res["dom"]["scripts"] == 1
    assert res["dom"]["xss"] is True


_PROBE = """(() => ({
  ids: Array.from(document.querySelectorAll('[id]')).map(e => e.id),
  scripts: document.querySelectorAll('script').length,
  svgs: document.querySelectorAll('svg').length,
  images: document.querySelectorAll('img').length,
  text: document.body.textContent,
  xss: typeof window.__allolaw_xss !== 'undefined',
  height: document.documentElement.scrollHeight,
}))()"""

class _Browser:
    """One headless Chromium with a fresh profile, driven over the DevTools protocol."""

    def __init__(self, profile: Path) -> None:
        self.profile = profile
        self.proc: subprocess.Popen | None = None
        self.ws: _WebSocket | None = None
        self._id = 0

    def __enter__(self) -> _Browser:
        port = _free_port()
        self.proc = subprocess.Popen(
            [
                str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu",
                "--disable-quic", "--no-first-run", "--disable-background-networking",
                "--disable-component-update", "--disable-sync", "--hide-scrollbars",
                f"--user-data-dir={self.profile}", f"--remote-debugging-port={port}",
                "--window-size=1100,1400", "about:blank",
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        target = self._page_target(port)
        self.ws = _WebSocket(target["webSocketDebuggerUrl"])
        for domain in ("Page", "Runtime", "Network", "Log"):
            self.call(f"{domain}.enable")
        return self

    def __exit__(self, *exc: object) -> None:
        if self.ws is not None:
            self.ws.close()
        if self.proc is not None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
        shutil.rmtree(self.profile, ignore_errors=True)

    def visit(self, url: str, screenshot: Path) -> dict:
        events: list[dict] = []
        self.call("Page.navigate", {"url": url}, events=events)
        self._wait_for(events, "Page.loadEventFired", timeout=30)
        time.sleep(0.5)  # let any late console message or request arrive
        probe = self.call("Runtime.evaluate", {"expression": _PROBE, "returnByValue": True},
                          events=events)
        dom = probe["result"]["value"]
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": 1100, "height": 1400, "deviceScaleFactor": 1, "mobile": False})
        shot = self.call("Page.captureScreenshot", {"format": "png"}, events=events)
        png = base64.b64decode(shot["data"])
        screenshot.write_bytes(png)
        full = self.call("Page.captureScreenshot", {
            "format": "png", "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": 1100, "height": min(int(dom["height"]), 16000),
                     "scale": 1},
        }, events=events)
        screenshot.with_name(screenshot.stem + "_full.png").write_bytes(
            base64.b64decode(full["data"]))
        return {
            "url": url,
            "dom": dom,
            "png_bytes": len(png),
            "console": [e["params"] for e in events
                        if e.get("method") in ("Runtime.consoleAPICalled", "Log.entryAdded")],
            "exceptions": [e["params"] for e in events
                           if e.get("method") == "Runtime.exceptionThrown"],
            "dialogs": [e["params"] for e in events
                        if e.get("method") == "Page.javascriptDialogOpening"],
            "requests": [e["params"]["request"]["url"] for e in events
                         if e.get("method") == "Network.requestWillBeSent"],
        }

    def call(self, method: str, params: dict | None = None, *,
             events: list[dict] | None = None) -> dict:
        assert self.ws is not None
        self._id += 1
        self.ws.send(json.dumps({"id": self._id, "method": method, "params": params or {}}))
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == self._id:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            if events is not None:
                events.append(msg)
        raise TimeoutError(method)

    def _wait_for(self, events: list[dict], method: str, *, timeout: float) -> None:
        assert self.ws is not None
        deadline = time.monotonic() + timeout
        while not any(e.get("method") == method for e in events):
            if time.monotonic() > deadline:
                raise TimeoutError(method)
            msg = json.loads(self.ws.recv())
            events.append(msg)
            if msg.get("method") == "Page.javascriptDialogOpening":
                # a dialog blocks loading: record it, dismiss it, go on
                self._id += 1
                self.ws.send(json.dumps({"id": self._id, "method": "Page.handleJavaScriptDialog",
                                         "params": {"accept": True}}))

    def _page_target(self, port: int) -> dict:
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            with contextlib.suppress(OSError, ValueError):
                # no proxy: an HTTP(S)_PROXY in the environment must not catch localhost
                opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))
                with opener.open(f"http://127.0.0.1:{port}/json/list", timeout=2) as resp:
                    targets = json.load(resp)
                pages = [t for t in targets if t.get("type") == "page"]
                if pages:
                    return pages[0]
            time.sleep(0.2)
        pytest.fail("chromium did not open its DevTools port within 30 s")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _WebSocket:
    """The client side of RFC 6455 for text frames: enough for the DevTools protocol."""

    def __init__(self, url: str) -> None:
        rest = url.removeprefix("ws://")
        hostport, _, path = rest.partition("/")
        host, _, port = hostport.partition(":")
        self.sock = socket.create_connection((host, int(port)), timeout=30)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall(
            (f"GET /{path} HTTP/1.1\r\nHost: {hostport}\r\nUpgrade: websocket\r\n"
             f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\n"
             "Sec-WebSocket-Version: 13\r\n\r\n").encode()
        )
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(1)
            if not chunk:
                raise ConnectionError("websocket handshake closed")
            head += chunk
        if b" 101 " not in head.split(b"\r\n", 1)[0]:
            raise ConnectionError(head.decode(errors="replace"))

    def send(self, text: str) -> None:
        data = text.encode()
        header = bytearray([0x81])  # FIN + text frame
        n = len(data)
        if n < 126:
            header.append(0x80 | n)
        elif n < 1 << 16:
            header += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            header += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        header += mask
        self.sock.sendall(bytes(header) + bytes(b ^ mask[i % 4] for i, b in enumerate(data)))

    def recv(self) -> str:
        parts = []
        while True:
            b0, b1 = self._read(2)
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._read(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._read(8))[0]
            payload = self._read(n)
            opcode = b0 & 0x0F
            if opcode == 0x8:
                raise ConnectionError("websocket closed by chromium")
            if opcode in (0x9, 0xA):  # ping / pong: not used by DevTools, skip
                continue
            parts.append(payload)
            if b0 & 0x80:
                return b"".join(parts).decode()

    def close(self) -> None:
        with contextlib.suppress(OSError):
            self.sock.close()

    def _read(self, n: int) -> bytes:
        buf = bytearray()
        while len(buf) < n:
            chunk = self.sock.recv(n - len(buf))
            if not chunk:
                raise ConnectionError("websocket closed")
            buf += chunk
        return bytes(buf)
