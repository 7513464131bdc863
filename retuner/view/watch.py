"""A live view of a running daemon, for a terminal (and a projector).

The view is built from the control socket's subscription (see
:mod:`retuner.control.server`): the daemon only queues events, so a slow terminal
never touches the engine's timing (the server drops the oldest events of a
subscriber that falls behind, and counts them).

:class:`WatchState` folds the events into a snapshot; :func:`render` turns a
snapshot into lines of text (a pure function, tested directly); :func:`run_curses`
draws it with the standard library's curses (bold on the terminal's own
colours, so contrast is the user's chosen one and no meaning rests on colour),
at 25 frames a second. Everything is plain text, so it works over SSH.

What is shown: the loaded tuning, reference, transpose, adaptive mode; the
current drift (mean deviation of the sounding notes from 12-EDO, as the metrics
define it); the counters; every sounding note (name, key, cents from 12-EDO,
Hz), and every pair of sounding notes: its size in cents, the nearest just
ratio of its interval class (octaves added), the deviation from it and the
beat rate |q*f2 - p*f1| of the nearly coinciding partials (f2/f1 near p/q).

The state of the connection (LIVE or DISCONNECTED) and a panic comes first, at the start of the
first line, so it survives the narrowest (80 columns) and shortest (24 rows) terminal; a
panic banner stays until a note plays again. :class:`Feed` can follow the daemon across
restarts (``reconnect=True``, as the classroom page does); the terminal view stops at the
first disconnection and says so.
"""

from __future__ import annotations

import socket
import threading
import time
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Optional

from retuner.control.client import ControlClient, NoDaemon
from retuner.pitch.intervals import USUAL, interval_name
from retuner.pitch.tuning import beat_rate, cents_to_hz, note_name, ratio_to_cents

#: interval class -> just ratio: the consonances of the impurity metric (so the view and the
#: figures agree) and the usual 5-limit choices for the rest (common practice).
INTERVALS: dict[int, Fraction] = {c: j.ratio for c, j in USUAL.items()}
CONSONANT = {0, 3, 4, 5, 7, 8, 9}


@dataclass
class IntervalRow:
    low: int
    high: int
    name: str              # in words (retuner.pitch.intervals.interval_name)
    size: float            # cents
    ratio: Fraction        # just ratio, octaves included (upper:lower)
    deviation: float       # cents from the just ratio
    beats: float           # Hz
    consonant: bool


def interval_rows(notes: list[dict]) -> list[IntervalRow]:
    """Every pair of sounding notes, low to high (notes: dicts with key and cents)."""
    ns = sorted((n for n in notes if n.get("cents") is not None), key=lambda n: (n["cents"], n["key"]))
    rows = []
    for i in range(len(ns)):
        for j in range(i + 1, len(ns)):
            a, b = ns[i], ns[j]
            lo, hi = (a, b) if a["key"] <= b["key"] else (b, a)
            d = hi["key"] - lo["key"]
            octaves = d // 12
            ratio = INTERVALS[d % 12] * 2 ** octaves
            size = hi["cents"] - lo["cents"]
            dev = size - ratio_to_cents(ratio)
            f1, f2 = cents_to_hz(lo["cents"]), cents_to_hz(hi["cents"])
            beats = beat_rate(f1, f2, ratio.numerator, ratio.denominator)
            rows.append(IntervalRow(lo["key"], hi["key"], interval_name(d), size, ratio, dev, beats, d % 12 in CONSONANT))
    rows.sort(key=lambda r: (r.low, r.high))
    return rows


def drift(notes: list[dict]) -> Optional[float]:
    """Mean deviation of the sounding notes from 12-EDO (cents), None when nothing sounds."""
    devs = [n["cents"] - 100.0 * n["key"] for n in notes if n.get("cents") is not None]
    return sum(devs) / len(devs) if devs else None


# what plays, as the control socket names it
INFO_FIELDS = ("profile", "concert_pitch_hz", "transpose_semitones", "transpose_cents", "adaptive")


@dataclass
class WatchState:
    """What the view shows, folded from the subscription's events."""

    notes: dict[tuple[int, int], dict] = field(default_factory=dict)   # (channel, key) -> note
    info: dict = field(default_factory=dict)          # profile, concert pitch, transpose, adaptive
    counters: dict = field(default_factory=dict)
    connected: bool = True
    events: int = 0
    message: str = ""            # a banner (panic) shown until the next note plays

    def snapshot(self, reply: dict) -> None:
        """Start from the subscribe reply (a status plus the sounding notes)."""
        self.notes = {(n.get("channel", 0), n["key"]): dict(n) for n in reply.get("notes") or []}
        self.info = {k: reply.get(k) for k in INFO_FIELDS}
        self.counters = dict(reply.get("counters") or {})

    def apply(self, ev: dict) -> None:
        self.events += 1
        kind = ev.get("event")
        k = (ev.get("channel", 0), ev.get("key"))
        if kind == "note_on" or kind == "pitch":
            if kind == "note_on":
                self.message = ""             # playing again: the panic is over
            n = self.notes.setdefault(k, {"key": ev["key"], "channel": ev.get("channel", 0)})
            n["cents"] = ev.get("cents")
            n["hz"] = ev.get("hz")
        elif kind == "note_off":
            self.notes.pop(k, None)
        elif kind == "profile":
            for f in INFO_FIELDS:
                if f in ev:
                    self.info[f] = ev[f]
        elif kind == "adaptive":
            self.info["adaptive"] = ev.get("on")
        elif kind == "counters":
            c = {k2: v for k2, v in ev.items() if k2 not in ("event", "time_s", "profile")}
            self.counters.update(c)
            if ev.get("profile"):
                self.info["profile"] = ev["profile"]
        elif kind == "panic":
            self.message = "PANIC: all notes released"


# A 5-row block font for note names, so the sounding notes read from the back of a room.
_FONT = {
    "A": [" ## ", "#  #", "####", "#  #", "#  #"], "B": ["### ", "#  #", "### ", "#  #", "### "],
    "C": [" ###", "#   ", "#   ", "#   ", " ###"], "D": ["### ", "#  #", "#  #", "#  #", "### "],
    "E": ["####", "#   ", "### ", "#   ", "####"], "F": ["####", "#   ", "### ", "#   ", "#   "],
    "G": [" ###", "#   ", "# ##", "#  #", " ###"], "#": [" # #", "####", " # #", "####", " # #"],
    "b": ["#   ", "#   ", "### ", "#  #", "### "], "-": ["    ", "    ", "####", "    ", "    "],
    "0": [" ## ", "#  #", "#  #", "#  #", " ## "], "1": ["  # ", " ## ", "  # ", "  # ", " ###"],
    "2": ["### ", "   #", " ## ", "#   ", "####"], "3": ["### ", "   #", " ## ", "   #", "### "],
    "4": ["#  #", "#  #", "####", "   #", "   #"], "5": ["####", "#   ", "### ", "   #", "### "],
    "6": [" ## ", "#   ", "### ", "#  #", " ## "], "7": ["####", "   #", "  # ", " #  ", " #  "],
    "8": [" ## ", "#  #", " ## ", "#  #", " ## "], "9": [" ## ", "#  #", " ###", "   #", " ## "],
    " ": ["    ", "    ", "    ", "    ", "    "],
}


def big_text(text: str) -> list[str]:
    """``text`` in 5-row block letters (characters without a glyph are left out)."""
    glyphs = [_FONT[ch] for ch in text if ch in _FONT]
    return [" ".join(g[row] for g in glyphs).rstrip() for row in range(5)]


def _fmt_signed(v: Optional[float], digits: int = 2) -> str:
    return "   --" if v is None else f"{v:+.{digits}f}"


def render(state: WatchState, width: int = 100, height: int = 40, big: bool = False) -> list[str]:
    """The view as lines of at most ``width`` characters (a pure function of the state).

    With ``big``, the sounding notes' names come first in block letters when they fit.
    """
    notes = sorted(state.notes.values(), key=lambda n: (n.get("cents") or 0.0, n["key"]))
    info = state.info
    ref = info.get("concert_pitch_hz")
    lines: list[str] = []
    state_word = "LIVE" if state.connected else "** DISCONNECTED: the daemon stopped **"
    if state.message:
        state_word += f"  ** {state.message} **"
    # what matters most first: a long profile name on 80 columns cuts the transpose, not the rest
    lines.append(f"{state_word}   PROFILE {info.get('profile') or '?'}"
                 + f"   ADAPTIVE {'ON' if info.get('adaptive') else 'OFF'}"
                 + f"   A4 {'as profile' if ref is None else f'{ref:g} Hz'}"
                 + f"   TRANSPOSE {info.get('transpose_semitones') or 0:+d} st {info.get('transpose_cents') or 0.0:+.1f} c")
    d = drift(notes)
    c = state.counters
    lines.append(f"DRIFT {_fmt_signed(d)} c    NOTES {c.get('notes', 0)}    STEALS {c.get('steals', 0)}"
                 f"    RINGING RETUNES {c.get('ringing_retunes', 0)}    DROPPED EVENTS {c.get('events_dropped', 0)}")
    lines.append("")
    lines.append(f"SOUNDING {len(notes)}")
    lines.append(f"{'NOTE':<6}{'KEY':>5}{'FROM 12-EDO c':>18}{'HZ':>12}")
    for n in notes:
        c_ = n.get("cents")
        dev = None if c_ is None else c_ - 100.0 * n["key"]
        hz = n.get("hz") if n.get("hz") is not None else (None if c_ is None else cents_to_hz(c_))
        lines.append(f"{note_name(n['key']):<6}{n['key']:>5}{_fmt_signed(dev):>18}"
                     f"{'--' if hz is None else f'{hz:.2f}':>12}")
    lines.append("")
    rows = interval_rows(notes)
    lines.append(f"INTERVALS {len(rows)}")
    lines += interval_table(rows, width)
    if big and notes:
        banner = big_text("  ".join(note_name(n["key"]) for n in notes))
        if max(len(b) for b in banner) <= width and len(lines) + 6 <= height:
            lines = banner + [""] + lines
    if len(lines) > height:
        hidden = len(lines) - (height - 1)
        lines = lines[: height - 1] + [f"... {hidden} more lines (enlarge the window)"]
    return [ln[:width] for ln in lines]


def interval_table(rows: list[IntervalRow], width: int) -> list[str]:
    """The intervals' header and rows, their names in words. The name column is as wide as the
    longest name; when that makes a row wider than ``width``, intervals of two octaves and more
    are named in the compact form ("major third +2 oct") so every column, the word
    "dissonant" included, still fits an 80-column terminal."""
    def table(compact: bool) -> list[str]:
        names = [interval_name(r.high - r.low, compact) for r in rows]
        pairs = [f"{note_name(r.low)}-{note_name(r.high)}" for r in rows]
        wp = max([8] + [len(p) + 1 for p in pairs])
        wn = max([17] + [len(n) + 1 for n in names])
        out = [f"{'PAIR':<{wp}}{'INTERVAL':<{wn}}{'SIZE c':>8}{'JUST':>7}{'FROM JUST c':>12}{'BEAT RATE Hz':>13}"]
        for r, pair, name in zip(rows, pairs, names):
            ratio = f"{r.ratio.numerator}/{r.ratio.denominator}"
            out.append(f"{pair:<{wp}}{name:<{wn}}{r.size:>8.2f}{ratio:>7}{r.deviation:>+12.2f}"
                       f"{r.beats:>13.2f}" + ("" if r.consonant else "  dissonant"))
        return out
    lines = table(False)
    if max(len(ln) for ln in lines) > width:
        lines = table(True)
    return lines


# ---------------------------------------------------------------------------
# Live loop

class Feed:
    """Reads the subscription on its own thread and keeps a :class:`WatchState`.

    Without ``reconnect`` the first subscription is made here (raising :class:`NoDaemon` or
    RuntimeError when it cannot be) and the feed ends when the daemon goes away. With
    ``reconnect`` it starts disconnected and subscribes again every ``retry`` seconds until a
    daemon answers, and again after each time the daemon stops. Nothing is read until
    :meth:`start`, so a view can show the subscription's snapshot first. ``lock`` is a
    Condition: ``version`` grows and waiters are woken at every change.
    """

    def __init__(self, socket_path=None, *, reconnect: bool = False, retry: float = 0.5):
        self.path = socket_path
        self.retry = retry
        self.lock = threading.Condition()
        self.version = 0
        self.attached = 0              # subscriptions made so far (0: still waiting for a daemon)
        self.state = WatchState(connected=False)
        self._client: Optional[ControlClient] = None
        self._closed = threading.Event()
        self._started = False
        if not reconnect:
            self._attach()
        self.thread = threading.Thread(target=self._run, args=(reconnect,), name="retuner-watch", daemon=True)

    def start(self) -> "Feed":
        """Start following the events (until then the state is the subscription's snapshot)."""
        if not self._started and not self._closed.is_set():
            self._started = True
            self.thread.start()
        return self

    def _attach(self) -> None:
        client = ControlClient(self.path, timeout=5.0)
        try:
            reply = client.request("subscribe")
        except (OSError, ValueError):
            client.close()
            raise
        if not reply.get("ok"):
            client.close()
            raise RuntimeError(reply.get("error") or "subscribe refused")
        client.sock.settimeout(None)
        state = WatchState()
        state.snapshot(reply)
        with self.lock:
            self._client = client
            self.state = state
            self.attached += 1
            self.version += 1
            self.lock.notify_all()

    def _run(self, reconnect: bool) -> None:
        while not self._closed.is_set():
            if self._client is None:
                try:
                    self._attach()
                except (NoDaemon, OSError, ValueError, RuntimeError):
                    self._closed.wait(self.retry)
                    continue
            try:
                while True:
                    ev = self._client.read()
                    if ev is None:
                        break
                    with self.lock:
                        self.state.apply(ev)
                        self.version += 1
                        self.lock.notify_all()
            except (OSError, ValueError):
                pass
            self._client.close()
            with self.lock:
                self._client = None
                self.state.connected = False
                self.version += 1
                self.lock.notify_all()
            if not reconnect:
                return

    def render(self, width: int, height: int, big: bool = False) -> list[str]:
        with self.lock:
            return render(self.state, width, height, big)

    def close(self) -> None:
        self._closed.set()
        with self.lock:
            client = self._client
        if client is not None:
            try:
                client.sock.shutdown(socket.SHUT_RDWR)     # wakes the reading thread
            except OSError:
                pass
        if self.thread.is_alive():
            self.thread.join(2.0)


def run_curses(feed: Feed, fps: float = 25.0, big: bool = True) -> None:
    import curses
    feed.start()

    def main(scr) -> None:
        curses.curs_set(0)
        scr.nodelay(True)
        try:
            curses.use_default_colors()
        except curses.error:
            pass
        period = 1.0 / fps
        while True:
            t0 = time.monotonic()
            h, w = scr.getmaxyx()
            lines = feed.render(max(20, w - 1), max(5, h), big=big)
            scr.erase()
            for y, ln in enumerate(lines[:h]):
                attr = curses.A_BOLD
                try:
                    scr.addstr(y, 0, ln[: max(0, w - 1)], attr)
                except curses.error:
                    pass
            scr.refresh()
            ch = scr.getch()
            if ch in (ord("q"), ord("Q"), 27):
                return
            time.sleep(max(0.0, period - (time.monotonic() - t0)))

    curses.wrapper(main)


def run_plain(feed: Feed, fps: float = 20.0, frames: int = 0, out=None) -> None:
    """Print a frame whenever something changed (at most ``fps`` a second), no escape codes."""
    import sys
    out = out or sys.stdout
    last = -1
    last_text = None
    shown = 0
    while True:
        with feed.lock:
            v = feed.version
            connected = feed.state.connected
        if v != last:
            last = v
            text = "\n".join(feed.render(200, 1000))
            if text != last_text:          # counters arrive often; print only what looks different
                last_text = text
                print(text, file=out)
                print("-" * 40, file=out, flush=True)
                shown += 1
                if frames and shown >= frames:
                    return
        feed.start()                       # after the first frame, which is the subscription's snapshot
        if not connected:
            return
        time.sleep(1.0 / fps)
