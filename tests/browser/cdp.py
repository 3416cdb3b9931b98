"""A small client of Chromium's DevTools protocol over a stdlib WebSocket (RFC 6455), enough to
open a page, collect its console errors and network requests, evaluate JavaScript and take a
screenshot. No third-party packages: the tests need only Debian's ``chromium``.
"""

from __future__ import annotations

import base64
import http.client
import json
import os
import re
import shutil
import socket
import struct
import subprocess
import threading
import time
from pathlib import Path
from typing import Any
from urllib.parse import urlparse

CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome")
# Headless, no sandbox (containers run as root), no GPU, and every background fetch switched off:
# the browser must not reach the network on its own while a test runs.
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--no-default-browser-check", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--disable-extensions",
         "--disable-default-apps", "--disable-dev-shm-usage", "--mute-audio", "--hide-scrollbars",
         "--metrics-recording-only", "--disable-breakpad", "--remote-debugging-port=0",
         "--remote-debugging-address=127.0.0.1")


def find_chromium() -> str | None:
    for name in CHROMIUM_NAMES:
        path = shutil.which(name)
        if path:
            return path
    return None


def install_chromium(timeout: float = 900) -> tuple[str | None, str]:
    """Install Debian's chromium when it is missing and we may (root, apt-get present).
    Returns (path or None, what happened)."""
    found = find_chromium()
    if found:
        return found, "already installed"
    if shutil.which("apt-get") is None:
        return None, "apt-get is not available on this machine"
    if hasattr(os, "geteuid") and os.geteuid() != 0:
        return None, "installing chromium needs root (apt-get)"
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    log = []
    for cmd in (["apt-get", "install", "-y", "-qq", "--no-install-recommends", "chromium"],
                ["apt-get", "update", "-qq"],
                ["apt-get", "install", "-y", "-qq", "--no-install-recommends", "chromium"]):
        try:
            proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env)
        except (OSError, subprocess.TimeoutExpired) as exc:
            return None, f"{' '.join(cmd)} failed: {exc}"
        log.append(f"{' '.join(cmd)} -> {proc.returncode}: {proc.stderr.strip()[-300:]}")
        found = find_chromium()
        if found:
            return found, "installed with apt-get"
    return None, " | ".join(log)


class WebSocket:
    """A client WebSocket over a plain TCP socket (text frames; ping, close handled)."""

    def __init__(self, url: str, timeout: float = 30) -> None:
        u = urlparse(url)
        self.sock = socket.create_connection((u.hostname, u.port or 80), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET {u.path} HTTP/1.1\r\nHost: {u.hostname}:{u.port}\r\n"
                           "Upgrade: websocket\r\nConnection: Upgrade\r\n"
                           f"Sec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n")
                          .encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(1)
            if not chunk:
                raise ConnectionError("the browser closed the connection during the handshake")
            head += chunk
        if not head.startswith(b"HTTP/1.1 101"):
            raise ConnectionError(f"WebSocket handshake refused: {head[:200]!r}")

    def _exact(self, n: int) -> bytes:
        buf = bytearray()
        while len(buf) < n:
            chunk = self.sock.recv(n - len(buf))
            if not chunk:
                raise ConnectionError("the browser closed the connection")
            buf += chunk
        return bytes(buf)

    def _send_frame(self, opcode: int, payload: bytes) -> None:
        mask = os.urandom(4)
        n = len(payload)
        if n < 126:
            head = struct.pack("!BB", 0x80 | opcode, 0x80 | n)
        elif n < 1 << 16:
            head = struct.pack("!BBH", 0x80 | opcode, 0x80 | 126, n)
        else:
            head = struct.pack("!BBQ", 0x80 | opcode, 0x80 | 127, n)
        masked = bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
        self.sock.sendall(head + mask + masked)

    def send(self, text: str) -> None:
        self._send_frame(0x1, text.encode())

    def recv(self) -> str:
        parts: list[bytes] = []
        while True:
            b0, b1 = self._exact(2)
            opcode, n = b0 & 0x0F, b1 & 0x7F
            if n == 126:
                (n,) = struct.unpack("!H", self._exact(2))
            elif n == 127:
                (n,) = struct.unpack("!Q", self._exact(8))
            mask = self._exact(4) if b1 & 0x80 else b""
            data = self._exact(n)
            if mask:
                data = bytes(b ^ mask[i % 4] for i, b in enumerate(data))
            if opcode == 0x9:          # ping
                self._send_frame(0xA, data)
                continue
            if opcode == 0x8:          # close
                raise ConnectionError("the browser closed the WebSocket")
            if opcode in (0x0, 0x1, 0x2):
                parts.append(data)
                if b0 & 0x80:
                    return b"".join(parts).decode()

    def close(self) -> None:
        try:
            self._send_frame(0x8, b"")
        except OSError:
            pass
        self.sock.close()


class Page:
    """One tab: DevTools calls, with every event kept in ``events``."""

    def __init__(self, ws_url: str, timeout: float) -> None:
        self.ws = WebSocket(ws_url, timeout)
        self.timeout = timeout
        self.next_id = 0
        self.events: list[dict[str, Any]] = []

    def call(self, method: str, **params: Any) -> dict[str, Any]:
        self.next_id += 1
        my = self.next_id
        self.ws.send(json.dumps({"id": my, "method": method, "params": params}))
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == my:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return dict(msg.get("result", {}))
            if "method" in msg:
                self.events.append(msg)
        raise TimeoutError(f"{method}: no answer within {self.timeout} s")

    def wait_for(self, method: str) -> dict[str, Any]:
        for ev in self.events:
            if ev["method"] == method:
                return ev
        deadline = time.monotonic() + self.timeout
        while time.monotonic() < deadline:
            msg = json.loads(self.ws.recv())
            if "method" in msg:
                self.events.append(msg)
                if msg["method"] == method:
                    return msg
        raise TimeoutError(f"no {method} within {self.timeout} s")

    def evaluate(self, expression: str) -> Any:
        res = self.call("Runtime.evaluate", expression=expression, awaitPromise=True,
                        returnByValue=True)
        if "exceptionDetails" in res:
            raise RuntimeError(f"JavaScript failed: {res['exceptionDetails']}")
        return res["result"].get("value")

    def errors(self) -> list[str]:
        """Console errors, uncaught exceptions and error log entries seen so far."""
        out = []
        for ev in self.events:
            p = ev.get("params", {})
            if ev["method"] == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                out.append("console: " + " ".join(str(a.get("value", a.get("description", "")))
                                                  for a in p.get("args", [])))
            elif ev["method"] == "Runtime.exceptionThrown":
                out.append("exception: " + json.dumps(p.get("exceptionDetails", {}))[:500])
            elif ev["method"] == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                e = p["entry"]
                out.append(f"log ({e.get('source')}): {e.get('text')} {e.get('url', '')}")
        return out

    def requests(self) -> list[str]:
        return [ev["params"]["request"]["url"] for ev in self.events
                if ev["method"] == "Network.requestWillBeSent"]

    def screenshot(self, path: Path, width: int, height: int) -> None:
        self.call("Emulation.setDeviceMetricsOverride", width=width, height=height,
                  deviceScaleFactor=1, mobile=False)
        res = self.call("Page.captureScreenshot", format="png")
        path.write_bytes(base64.b64decode(res["data"]))


class Chromium:
    """A headless Chromium with the DevTools endpoint on a free local port."""

    def __init__(self, exe: str, profile_dir: Path, timeout: float = 60) -> None:
        self.timeout = timeout
        self.stderr: list[str] = []
        self.pages: list[Page] = []
        self.drain: threading.Thread | None = None
        self.proc = subprocess.Popen([exe, *FLAGS, f"--user-data-dir={profile_dir}",
                                      "about:blank"],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        found = threading.Event()
        self.endpoint = ""

        def drain() -> None:
            assert self.proc.stderr is not None
            for line in self.proc.stderr:
                self.stderr.append(line.rstrip())
                m = re.search(r"DevTools listening on (ws://\S+)", line)
                if m:
                    self.endpoint = m.group(1)
                    found.set()

        self.drain = threading.Thread(target=drain, daemon=True)
        self.drain.start()
        if not found.wait(timeout):
            self.close()
            raise RuntimeError("chromium did not start its DevTools endpoint:\n"
                               + "\n".join(self.stderr[-20:]))

    def new_page(self) -> Page:
        u = urlparse(self.endpoint)
        conn = http.client.HTTPConnection(u.hostname, u.port, timeout=self.timeout)
        conn.request("PUT", "/json/new?about:blank")
        target = json.loads(conn.getresponse().read())
        conn.close()
        page = Page(target["webSocketDebuggerUrl"], self.timeout)
        self.pages.append(page)
        return page

    def close(self) -> None:
        for page in self.pages:
            page.ws.close()
        self.pages.clear()
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        if self.drain is not None:
            self.drain.join(timeout=5)
        if self.proc.stderr is not None:
            self.proc.stderr.close()

    def __enter__(self) -> Chromium:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


IMAGES_JS = """
Promise.all(Array.from(document.images).map(img =>
  img.decode().then(() => ({alt: img.alt, width: img.naturalWidth, height: img.naturalHeight,
                            src: img.src.slice(0, 30)}),
                    err => ({alt: img.alt, width: -1, height: -1, src: img.src.slice(0, 30),
                             error: String(err)}))))
"""


def open_report(browser: Chromium, path: Path) -> Page:
    """Open ``path`` in a new tab with console, log and network events recorded; returns after
    the load event."""
    page = browser.new_page()
    for domain in ("Runtime", "Log", "Page", "Network"):
        page.call(f"{domain}.enable")
    page.call("Emulation.setDeviceMetricsOverride", width=1366, height=900, deviceScaleFactor=1,
              mobile=False)
    page.call("Page.navigate", url=path.resolve().as_uri())
    page.wait_for("Page.loadEventFired")
    return page
