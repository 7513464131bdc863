"""Headless Chromium driven over its DevTools protocol, with the standard library only.

Chromium is a real part: when it is missing the tests that need it FAIL (never skip).
It is started as ``chromium --headless --no-sandbox --disable-gpu ... --remote-debugging-port=0``
with a fresh profile folder; the port it picked is read from ``DevToolsActivePort`` in that
folder, the page's WebSocket address from ``/json/list``. The WebSocket client below follows
RFC 6455 (handshake with Sec-WebSocket-Key and the GUID of section 1.3, client frames masked,
payload lengths 7/16/64 bits, continuation frames) far enough for DevTools' JSON messages.
A DevTools command is ``{"id": N, "method": ..., "params": ...}``; its answer carries the
same id; events (no id) are skipped.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import shutil
import socket
import struct
import subprocess
import time
import urllib.request
from typing import Any

from retuner.bench.jacklive import stop_child

GUID = "258EAFA5-E914-47DA-95CA-C5AB0DC85B11"     # RFC 6455, section 1.3


def find_chromium() -> str:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    raise AssertionError("chromium is not installed (apt-get install -y --no-install-recommends chromium): "
                         "the classroom view test needs it")


class WebSocket:
    def __init__(self, url: str, timeout: float = 30.0):
        assert url.startswith("ws://")
        hostport, _, path = url[5:].partition("/")
        host, _, port = hostport.partition(":")
        self.sock = socket.create_connection((host, int(port)), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET /{path} HTTP/1.1\r\nHost: {hostport}\r\nUpgrade: websocket\r\n"
                           f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\n"
                           "Sec-WebSocket-Version: 13\r\n\r\n").encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(4096)
            assert chunk, "DevTools closed the WebSocket handshake"
            head += chunk
        head, _, self.buf = head.partition(b"\r\n\r\n")
        lines = head.decode("latin-1").split("\r\n")
        assert " 101 " in lines[0], lines[0]
        accept = base64.b64encode(hashlib.sha1((key + GUID).encode()).digest()).decode()
        assert any(l.lower() == f"sec-websocket-accept: {accept}".lower() for l in lines[1:]), lines

    def _recv(self, n: int) -> bytes:
        while len(self.buf) < n:
            chunk = self.sock.recv(max(65536, n - len(self.buf)))
            assert chunk, "DevTools closed the WebSocket"
            self.buf += chunk
        out, self.buf = self.buf[:n], self.buf[n:]
        return out

    def send(self, text: str) -> None:
        data = text.encode()
        head = bytes([0x81])                      # FIN + text frame
        n = len(data)
        if n < 126:
            head += bytes([0x80 | n])
        elif n < 65536:
            head += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            head += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        self.sock.sendall(head + mask + bytes(b ^ mask[i % 4] for i, b in enumerate(data)))

    def recv(self) -> str:
        parts = []
        while True:
            b0, b1 = self._recv(2)
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._recv(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._recv(8))[0]
            mask = self._recv(4) if b1 & 0x80 else None
            data = self._recv(n)
            if mask:
                data = bytes(b ^ mask[i % 4] for i, b in enumerate(data))
            op = b0 & 0x0F
            if op == 0x8:
                raise AssertionError("DevTools closed the WebSocket")
            if op in (0x9, 0xA):                  # ping / pong: not used by DevTools here
                continue
            parts.append(data)
            if b0 & 0x80:
                return b"".join(parts).decode()

    def close(self) -> None:
        self.sock.close()


class Browser:
    """One headless Chromium with one page, driven over DevTools."""

    def __init__(self, profile_dir: str, width: int = 1280, height: int = 720, log_path: str | None = None):
        exe = find_chromium()
        os.makedirs(profile_dir, exist_ok=True)
        self.log = open(log_path or os.path.join(profile_dir, "chromium.log"), "wb")
        self.proc = subprocess.Popen(
            [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--hide-scrollbars", f"--user-data-dir={profile_dir}", "--remote-debugging-port=0",
             f"--window-size={width},{height}", "about:blank"],
            stdout=self.log, stderr=subprocess.STDOUT, start_new_session=True)
        port_file = os.path.join(profile_dir, "DevToolsActivePort")
        end = time.monotonic() + 30
        port = None
        while port is None:
            if self.proc.poll() is not None:
                raise AssertionError(f"chromium exited with {self.proc.returncode}")
            try:
                with open(port_file) as fh:
                    first = fh.readline().strip()
                port = int(first) if first else None
            except (FileNotFoundError, ValueError):
                pass
            if port is None:
                assert time.monotonic() < end, "chromium did not open its DevTools port within 30 s"
                time.sleep(0.05)
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=10) as r:
            targets = json.load(r)
        page = next(t for t in targets if t.get("type") == "page")
        self.ws = WebSocket(page["webSocketDebuggerUrl"])
        self._id = 0
        self.call("Runtime.enable")
        self.call("Page.enable")
        self.size(width, height)

    def call(self, method: str, **params) -> dict:
        self._id += 1
        self.ws.send(json.dumps({"id": self._id, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == self._id:
                if "error" in msg:
                    raise AssertionError(f"{method}: {msg['error']}")
                return msg.get("result", {})

    def size(self, width: int, height: int) -> None:
        self.call("Emulation.setDeviceMetricsOverride", width=width, height=height, deviceScaleFactor=1,
                  mobile=False)

    def open(self, url: str) -> None:
        self.call("Page.navigate", url=url)

    def evaluate(self, expression: str) -> Any:
        r = self.call("Runtime.evaluate", expression=expression, returnByValue=True)
        if "exceptionDetails" in r:
            raise AssertionError(f"{expression}: {r['exceptionDetails']}")
        return r["result"].get("value")

    def wait_for(self, expression: str, timeout: float = 20.0) -> Any:
        """Resolve when ``expression`` is truthy in the page (checked by the page itself on each
        of its timer turns, so the test waits on the page's own update, not on a clock)."""
        js = ("new Promise((resolve) => { const end = Date.now() + %d;"
              " (function check() { let v; try { v = (%s); } catch (e) { v = undefined; }"
              " if (v || Date.now() > end) resolve(!!v); else setTimeout(check, 20); })(); })"
              % (int(timeout * 1000), expression))
        r = self.call("Runtime.evaluate", expression=js, returnByValue=True, awaitPromise=True)
        v = r.get("result", {}).get("value")
        if not v:
            text = self.evaluate("document.body ? document.body.innerText : ''")
            raise AssertionError(f"timed out after {timeout} s waiting for {expression}; page shows:\n{text}")
        return v

    def screenshot(self, path: str) -> None:
        data = self.call("Page.captureScreenshot", format="png")["data"]
        with open(path, "wb") as fh:
            fh.write(base64.b64decode(data))

    def close(self) -> None:
        try:
            self.ws.close()
        finally:
            stop_child(self.proc, 10)         # SIGTERM, then SIGKILL after 10 s
            self.log.close()
