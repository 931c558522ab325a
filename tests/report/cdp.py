"""A minimal client of the Chrome DevTools Protocol for the browser tests:
headless Chromium started with ``--remote-debugging-port=0``, one page
target, JSON commands over a WebSocket (RFC 6455) written with the standard
library alone (no test dependency beyond the project's own).

Protocol: https://chromedevtools.github.io/devtools-protocol/ (Runtime,
Page, Network domains). Events received while waiting for a command's reply
are kept in ``events`` (method, params), for the network check.
"""

from __future__ import annotations

import base64
import json
import os
import signal
import socket
import struct
import subprocess
import time
import urllib.request
from pathlib import Path

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-default-apps", "--disable-extensions", "--mute-audio"]


class CDPError(RuntimeError):
    pass


class _Socket:
    """Client end of a WebSocket: text frames out (masked), frames in."""

    def __init__(self, url: str, timeout: float):
        assert url.startswith("ws://")
        hostport, _, path = url[5:].partition("/")
        host, _, port = hostport.partition(":")
        self.sock = socket.create_connection((host, int(port)), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET /{path} HTTP/1.1\r\nHost: {hostport}\r\nUpgrade: websocket\r\n"
                           f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n")
                          .encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise CDPError("the browser closed the connection during the handshake")
            head += chunk
        status = head.split(b"\r\n", 1)[0]
        if b" 101 " not in status:
            raise CDPError(f"WebSocket handshake refused: {status!r}")
        self.buf = head.split(b"\r\n\r\n", 1)[1]

    def _read(self, n: int) -> bytes:
        while len(self.buf) < n:
            chunk = self.sock.recv(1 << 20)
            if not chunk:
                raise CDPError("the browser closed the connection")
            self.buf += chunk
        out, self.buf = self.buf[:n], self.buf[n:]
        return out

    def send(self, text: str) -> None:
        data = text.encode()
        head = bytes([0x81])
        n = len(data)
        if n < 126:
            head += bytes([0x80 | n])
        elif n < 1 << 16:
            head += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            head += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        self.sock.sendall(head + mask + bytes(b ^ mask[i % 4] for i, b in enumerate(data)))

    def recv(self) -> str:
        parts = []
        while True:
            b0, b1 = self._read(2)
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._read(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._read(8))[0]
            payload = self._read(n)  # the server does not mask
            opcode = b0 & 0x0F
            if opcode == 8:
                raise CDPError("the browser closed the WebSocket")
            if opcode in (9, 10):  # ping/pong: not used by DevTools
                continue
            parts.append(payload)
            if b0 & 0x80:
                return b"".join(parts).decode()

    def close(self):
        try:
            self.sock.close()
        except OSError:
            pass


class Browser:
    """Headless Chromium with one page, driven over DevTools."""

    def __init__(self, chromium: str, profile: Path, *, width: int = 1200, height: int = 1600,
                 timeout: float = 60.0):
        profile = Path(profile)
        profile.mkdir(parents=True, exist_ok=True)
        self.timeout = timeout
        port_file = profile / "DevToolsActivePort"
        port_file.unlink(missing_ok=True)  # a stale one from an earlier run names a closed port
        self.proc = subprocess.Popen([chromium, *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-port=0",
                                      f"--window-size={width},{height}", "about:blank"],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
        try:
            self._connect(profile, timeout)
        except BaseException:
            self.close()
            raise

    def _connect(self, profile: Path, timeout: float) -> None:
        port_file = profile / "DevToolsActivePort"
        end = time.monotonic() + timeout
        while not (port_file.exists() and port_file.read_text().count("\n") >= 1):
            if time.monotonic() > end or self.proc.poll() is not None:
                raise CDPError("Chromium did not open its DevTools port")
            time.sleep(0.05)
        port = int(port_file.read_text().splitlines()[0])
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=timeout) as r:
            targets = json.load(r)
        page = next(t for t in targets if t.get("type") == "page")
        self.ws = _Socket(page["webSocketDebuggerUrl"], timeout)
        self.next_id = 0
        self.events: list[tuple[str, dict]] = []

    def call(self, method: str, **params) -> dict:
        self.next_id += 1
        my = self.next_id
        self.ws.send(json.dumps({"id": my, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == my:
                if "error" in msg:
                    raise CDPError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            if "method" in msg:
                self.events.append((msg["method"], msg.get("params", {})))

    def evaluate(self, expression: str):
        """The value of a JavaScript expression (awaited; returned by value as JSON)."""
        r = self.call("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        if "exceptionDetails" in r:
            raise CDPError(f"page script failed: {r['exceptionDetails']}")
        return r["result"].get("value")

    def open(self, url: str) -> None:
        """Navigate and wait for the load event."""
        self.call("Page.enable")
        start = len(self.events)
        self.call("Page.navigate", url=url)
        end = time.monotonic() + self.timeout
        while not any(m == "Page.loadEventFired" for m, _ in self.events[start:]):
            if time.monotonic() > end:
                raise CDPError(f"{url} did not load")
            self.call("Runtime.evaluate", expression="1")  # collects the events that arrived

    def screenshot(self) -> bytes:
        return base64.b64decode(self.call("Page.captureScreenshot", format="png", captureBeyondViewport=True)["data"])

    def close(self) -> None:
        ws = getattr(self, "ws", None)
        if ws is not None:
            ws.close()
        # the browser and its helpers are in the session this client started (start_new_session)
        try:
            os.killpg(self.proc.pid, signal.SIGTERM)
        except ProcessLookupError:
            return
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait()
