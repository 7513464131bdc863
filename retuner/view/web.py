"""The classroom view: what the daemon plays, as a web page for a projector (``retuner watch --web``).

A small read-only web server follows the daemon's control-socket event stream (the same
subscription as the terminal view, through :class:`retuner.view.watch.Feed`, which
subscribes again whenever the daemon stops and starts) and serves:

* ``/`` with ``/view.js`` and ``/view.css``: one small page shipped in the package
  (``retuner/view/page/``), no CDN, no external fonts, so it works in an offline classroom;
* ``/events``: the state as server-sent events, one JSON frame per change, at most
  :data:`MAX_FPS` a second, and a repeat every :data:`HEARTBEAT` seconds when nothing
  changes, so the page knows the view server itself is alive;
* ``/state``: the same frame once (for scripts and tests).

Why server-sent events from the standard library's ``http.server``: the stream goes one
way (daemon to page), which is exactly what SSE is; browsers reconnect an ``EventSource``
by themselves when the view server restarts; a frame is a few hundred bytes, so 30 frames a
second to a handful of browsers is a trivial load for ``ThreadingHTTPServer`` (one thread
per open page, each waiting on the feed's condition variable, never on the daemon). A
WebSocket would add a handshake and framing we would have to write or depend on, for a
return channel the page must not have (it is read-only: no control commands). No new
dependency is needed.

The server answers GET and HEAD only; it binds to 127.0.0.1 unless told otherwise (the
command prints a warning line when it is told otherwise), and there it answers only requests
addressed to a loopback name, so a web page elsewhere cannot read it by pointing a name at
127.0.0.1. Nothing from the page reaches the
daemon: the feed's only request on the control socket is ``subscribe``.

The page draws each frame into elements it keeps (text changes, no rebuilding), so nothing
flickers; the beat pulses run on the browser's animation clock (``requestAnimationFrame``),
independently of the frame rate. A pulse is a small dot, whatever its rate, so the page
never flashes a large area.
"""

from __future__ import annotations

import json
import socket
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from typing import Optional

from retuner.pitch.tuning import note_name
from retuner.view.watch import Feed, WatchState, drift, interval_rows

MAX_FPS = 30.0          # frames a second at most, per page
HEARTBEAT = 1.0         # seconds between frames when nothing changes
PAGE_FILES = {"/": ("index.html", "text/html; charset=utf-8"),
              "/index.html": ("index.html", "text/html; charset=utf-8"),
              "/view.js": ("view.js", "text/javascript; charset=utf-8"),
              "/view.css": ("view.css", "text/css; charset=utf-8")}
LOOPBACK = ("127.0.0.1", "::1", "localhost")


def frame(state: WatchState, waiting: bool = False) -> dict:
    """What the page shows, from the view's state (plain JSON types, units in the field names:
    a note's ``offset_cents`` is from its 12-EDO pitch); ``waiting``: no daemon has answered
    yet (as against one that stopped)."""
    notes = sorted(state.notes.values(), key=lambda n: (n.get("cents") or 0.0, n["key"]))
    # a daemon that stops releases every note: nothing sounds while it is away
    sounding = [n for n in notes if n.get("cents") is not None] if state.connected else []
    info = state.info
    return {
        "connected": state.connected,
        "daemon": "live" if state.connected else "waiting" if waiting else "stopped",
        "message": state.message,
        "profile": info.get("profile"),
        "concert_pitch_hz": info.get("concert_pitch_hz"),
        "transpose_semitones": info.get("transpose_semitones") or 0,
        "transpose_cents": info.get("transpose_cents") or 0.0,
        "adaptive": bool(info.get("adaptive")),
        "drift_cents": drift(sounding),
        "notes": [{"key": n["key"], "name": note_name(n["key"]),
                   "offset_cents": n["cents"] - 100.0 * n["key"],
                   "hz": n.get("hz")} for n in sounding],
        "intervals": [{"low": r.low, "high": r.high, "pair": f"{note_name(r.low)}-{note_name(r.high)}",
                       "interval": r.name, "ratio": f"{r.ratio.numerator}/{r.ratio.denominator}",
                       "size_cents": r.size, "deviation_cents": r.deviation, "beat_rate_hz": r.beats,
                       "consonant": r.consonant} for r in interval_rows(sounding)],
        "counters": {k: state.counters.get(k, 0) for k in ("notes", "steals", "ringing_retunes")},
    }


def page_file(name: str) -> bytes:
    return resources.files("retuner.view").joinpath("page", name).read_bytes()


class _Handler(BaseHTTPRequestHandler):
    server: "ClassroomServer"
    protocol_version = "HTTP/1.1"

    def log_message(self, fmt, *args) -> None:     # quiet: the terminal shows the address only
        pass

    def _send(self, code: int, body: bytes, ctype: str, head: bool = False) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.send_header("X-Content-Type-Options", "nosniff")
        self.end_headers()
        if not head:
            self.wfile.write(body)

    def do_HEAD(self) -> None:
        self.do_GET(head=True)

    def do_GET(self, head: bool = False) -> None:
        path = self.path.split("?", 1)[0]
        if not self.server.host_allowed(self.headers.get("Host", "")):
            # a page elsewhere on the web cannot read this one through a name it points at us
            self._send(403, b"forbidden\n", "text/plain; charset=utf-8", head)
        elif path in PAGE_FILES:
            name, ctype = PAGE_FILES[path]
            self._send(200, page_file(name), ctype, head)
        elif path == "/state":
            self._send(200, json.dumps(self.server.frame()).encode(), "application/json", head)
        elif path == "/events" and not head:
            self._events()
        else:
            self._send(404, b"not found\n", "text/plain; charset=utf-8", head)

    def _events(self) -> None:
        self.send_response(200)
        self.send_header("Content-Type", "text/event-stream")
        self.send_header("Cache-Control", "no-store")
        self.send_header("Connection", "close")
        self.end_headers()
        self.close_connection = True
        feed = self.server.feed
        period = 1.0 / MAX_FPS
        last = -1
        try:
            self.wfile.write(b"retry: 1000\n\n")
            while not self.server.stopping.is_set():
                with feed.lock:
                    feed.lock.wait_for(lambda: feed.version != last or self.server.stopping.is_set(),
                                       timeout=HEARTBEAT)
                    last = feed.version
                    data = json.dumps(frame(feed.state, not feed.attached))
                t0 = time.monotonic()
                self.wfile.write(f"data: {data}\n\n".encode())
                self.wfile.flush()
                # at most MAX_FPS frames a second: changes in between are folded into the next frame
                rest = period - (time.monotonic() - t0)
                if rest > 0:
                    self.server.stopping.wait(rest)
        except (BrokenPipeError, ConnectionResetError, OSError):
            pass


class ClassroomServer(ThreadingHTTPServer):
    """The read-only web server of the classroom view (serve_forever on a thread of its own)."""

    daemon_threads = True

    def __init__(self, feed: Feed, address: str = "127.0.0.1", port: int = 0):
        self.feed = feed
        self.stopping = threading.Event()
        if ":" in address:
            self.address_family = socket.AF_INET6
        super().__init__((address, port), _Handler)
        self.thread: Optional[threading.Thread] = None

    def host_allowed(self, host: str) -> bool:
        """On a loopback address only loopback names are answered (against DNS rebinding)."""
        if self.server_address[0] not in LOOPBACK:
            return True
        name = host.rsplit(":", 1)[0] if not host.endswith("]") else host
        return name.strip("[]") in LOOPBACK

    def frame(self) -> dict:
        with self.feed.lock:
            return frame(self.feed.state, not self.feed.attached)

    @property
    def url(self) -> str:
        host, port = self.server_address[:2]
        host = f"[{host}]" if ":" in host else host
        return f"http://{host}:{port}/"

    def start(self) -> "ClassroomServer":
        self.thread = threading.Thread(target=self.serve_forever, name="retuner-classroom", daemon=True)
        self.thread.start()
        return self

    def stop(self) -> None:
        self.stopping.set()
        with self.feed.lock:
            self.feed.lock.notify_all()
        self.shutdown()
        self.server_close()
