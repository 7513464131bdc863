"""The live daemon: the engine between real MIDI ports.

Threads
-------
The engine is single-threaded and is only ever touched by the thread that runs
:meth:`Daemon.run` (the *engine thread*). Everything else talks to it through
two queues:

* MIDI input: the backend's input callback stamps each parsed message with the
  daemon's clock and puts it in a bounded queue of its own (retuner.live.inputqueue:
  when full, note-ons are dropped first, never a note-off or a pedal-up; drops are
  counted in the status line and ``ctl status`` and logged at most once a second),
  and puts a ``("midi",)`` token in the event queue when it was empty;
* events (a :class:`queue.SimpleQueue`, whose ``put`` is safe even from a signal
  handler): the backend's port watcher (only when a port is named; it lists the
  ports every ``port_poll`` seconds) puts ``("ports", inputs,
  outputs)``; signal handlers put ``("signal", signum)``; the control socket
  (retuner.control.server) wakes the loop with ``("wake",)``.

No thread polls: the backend's reader thread (JACK: woken by the compiled period through an
eventfd, or the Python period itself on JACK's thread; ALSA: waiting on the sequencer's descriptor)
calls the input callback, which wakes the engine thread through the event queue.

Each turn of the loop (:meth:`Daemon.step`) handles every waiting event first, then
the control commands (a panic), then at most :attr:`Daemon.MIDI_BATCH` MIDI
messages, coming back at once when more wait: signals and commands never wait
behind MIDI. The loop waits on the event queue with a timeout: the earliest of the
engine's ``next_deadline()``, the watchdog ping and the status line. Output is sent
the moment the engine returns it.

The ports come from a backend (retuner.live.backend: alsa-midi over ALSA, JACK-Client over
JACK, or ports in memory for tests) and time from a clock, both handed in; :meth:`Daemon.step`
is one turn of the loop, so a test can drive the daemon in-process.

Hotplug
-------
A side with a port name (``--input``/``--output``) is connected to the first
port that matches (see retuner.live.ports). When that port disappears the daemon
keeps running and logs it once; notes held from a lost input are released
(``engine.input_lost``, and the passthrough notes); notes sounding on a lost output
are forgotten (``engine.output_lost``). While there is no output the engine still
follows the input (pedals, wheel) and nothing is sent. Whenever an output is opened
(start-up, return) it is silenced first (retuner.live.silence: pedals up and All Notes
Off on every channel), then the engine's set-up is sent (``engine.start``: bend range,
and the pedals the input still holds).

Panic
-----
:meth:`Daemon.panic` (control socket, SIGTERM/SIGINT) silences the output whatever we
believe sounds: pedals up on every channel, a note-off for each note we know of
(passthrough included), All Notes Off on every channel, All Sound Off where the config
allows it (``panic_all_sound_off``).

MIDI system gone
----------------
When the MIDI system itself goes away (a JACK server stops: the backend's ``on_server_lost``),
the daemon exits with status 1: a service manager starts it again, and its start-up waits for a
server.

Signals
-------
SIGHUP reloads the config file and the profiles (a bad one is logged and the old
settings stay); SIGTERM and SIGINT panic and exit with status 0.

Control socket
--------------
When ``control.enabled`` (default) the daemon starts retuner.control's server
(``EngineControl`` + ``ControlServer``); the engine thread applies its commands
(``serve_pending``) and publishes events (``observe``) on every wake-up.
"""

from __future__ import annotations

import logging
import os
import queue
import signal
import sys
import threading
import time
from typing import Callable, Optional

from retuner.control.commands import EngineControl, EngineHost
from retuner.control.server import ControlServer
from retuner.engine.core import Engine
from retuner.errors import RetunerError
from retuner.live.journal import stream_is_journal
from retuner.live import ports as _ports
from retuner.live.backend import InputHandle, OutputHandle, PortBackend
from retuner.live.claim import Claim
from retuner.live.config import Settings, engine_config
from retuner.live.inputqueue import InputQueue
from retuner.live.notify import Notifier
from retuner.live.session import Session
from retuner.live.silence import PassthroughNotes, all_notes_off, pedals_up
from retuner.measure.metrics import StreamWindow, report
from retuner.profiles.profile import load_profile

log = logging.getLogger("retuner")

# syslog priorities (RFC 5424) for journald's "<N>" line prefix (SyslogLevelPrefix=yes, the default)
_PRIORITY = {logging.DEBUG: 7, logging.INFO: 6, logging.WARNING: 4, logging.ERROR: 3, logging.CRITICAL: 2}


class _JournalFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        prio = _PRIORITY.get(record.levelno, 6)
        return f"<{prio}>{super().format(record)}"


def setup_logging(level: str = "info", verbose: int = 0, environ=None) -> None:
    """Log to stderr; journald-friendly (no time stamps, priority prefix) under $JOURNAL_STREAM."""
    env = os.environ if environ is None else environ
    handler = logging.StreamHandler(sys.stderr)
    if stream_is_journal(sys.stderr, env):
        handler.setFormatter(_JournalFormatter("%(message)s"))
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%H:%M:%S"))
    root = logging.getLogger("retuner")
    for h in list(root.handlers):
        root.removeHandler(h)
    root.addHandler(handler)
    root.propagate = False
    set_level(level, verbose)


def set_level(level: str, verbose: int = 0) -> None:
    lv = logging.DEBUG if verbose else getattr(logging, level.upper(), logging.INFO)
    logging.getLogger("retuner").setLevel(lv)


class Profiles:
    """The tunings a configuration needs, loaded up front (no disk reads while switching)."""

    def __init__(self, settings: Settings):
        dirs = settings.profile_dirs

        def load(name: str, fld: str):
            try:
                return load_profile(name, dirs)
            except RetunerError as exc:
                if exc.file is None or exc.file == name:      # not an error inside a profile file
                    exc.field = fld
                    if settings.source:
                        exc.file = settings.source
                        exc.line = settings.lines.get(fld.split("[")[0].split(".")[0])
                raise

        self.main = load(settings.profile, "profile")
        self.listed = [load(n, f"profiles[{i}]") for i, n in enumerate(settings.profiles)]
        self.ab = None
        if settings.switch.ab:
            self.ab = (load(settings.switch.ab[0], "switch.ab"), load(settings.switch.ab[1], "switch.ab"))


class Daemon:
    MIDI_BATCH = 64        # input messages per turn of the loop, between signals and commands

    def __init__(self, settings: Settings, *,
                 reload_settings: Optional[Callable[[], Settings]] = None,
                 notifier: Optional[Notifier] = None,
                 backend: Optional[PortBackend] = None,
                 clock: Callable[[], float] = time.monotonic,
                 input_capacity: int = 2048):
        self.settings = settings
        self.clock = clock
        self.reload_settings = reload_settings
        self.notifier = notifier or Notifier()
        # signals, port changes, control wake-ups (and a "midi" token): served first, never
        # behind MIDI, which waits in its own bounded queue
        self.q: "queue.SimpleQueue[tuple]" = queue.SimpleQueue()
        self.midi = InputQueue(input_capacity)
        self._drops_logged = 0
        self._next_drop_log = float("-inf")
        self.profiles = Profiles(settings)
        self.engine = self._new_engine(settings, self.profiles.main)
        self.session = Session(self.engine, self.profiles.main)     # the tuning in force
        # a backend handed in (tests: retuner.live.memory) is kept across reloads; our own
        # one is made again when the port settings change. Made after the profiles: a
        # mistake in them is reported before a MIDI system that is not there
        self._own_backend = backend is None
        self.backend: PortBackend = backend or self._new_backend(settings)
        self.inp: Optional[InputHandle] = None
        self.outp: Optional[OutputHandle] = None
        self._watching = False
        self._lost_logged = {"input": False, "output": False}
        self._ab_last = 0
        self._last_out = float("-inf")
        # what was sent lately, for the status line's impurity, motion and drift (measured from
        # the output, as 'retuner convert --report' does)
        self.recent = StreamWindow()
        # notes and pedals on passthrough channels (the engine keeps no account of them)
        self.passthrough = PassthroughNotes()
        self._pass_channels = frozenset(self.engine.config.passthrough)
        self._figures: Optional[dict] = None
        self._figures_busy = False
        self._bad_input = 0
        self._errors = 0
        self.running = False
        self.exit_status = 0
        self.control = None         # retuner.control.commands.EngineControl
        self.control_server = None  # retuner.control.server.ControlServer
        self.claim: Optional[Claim] = None
        self.started_at = clock()
        self._next_wd: Optional[float] = None
        self._next_status: Optional[float] = None

    # ------------------------------------------------------------------ engine
    @staticmethod
    def _new_backend(settings: Settings) -> PortBackend:
        return _ports.make_backend(settings.backend, settings.client_name)

    @staticmethod
    def _new_engine(settings: Settings, tuning):
        return Engine(tuning, engine_config(settings))

    def emit(self, messages) -> None:
        """Send engine output now (dropped while there is no output port)."""
        if not messages:
            return
        outp = self.outp
        debug = log.isEnabledFor(logging.DEBUG)
        if outp is None:
            if debug:
                log.debug("no output: dropped %d messages", len(messages))
            return
        now = self.clock()
        recent = self.recent
        passing = self._pass_channels
        for m in messages:
            try:
                outp.send(m)
            except Exception as exc:  # the port may vanish under us
                self._errors += 1
                log.warning("sending %s failed: %s", m, exc)
                return
            recent.add(now, m)
            if passing and getattr(m, "channel", None) in passing:
                self.passthrough.sent(m)
            if debug:
                log.debug("out %s", m)
        self._last_out = now

    # ------------------------------------------------------------------ ports
    def _client(self, side: str) -> str:
        """Our client name for one side (the backend decides: see its ``client_name``)."""
        return self.backend.client_name(self.settings.client_name, side)

    def _own(self) -> list[str]:
        base = self.settings.client_name
        return [base + "-", base + ":"]

    def _side_spec(self, side: str) -> Optional[str]:
        """The port name/pattern for 'in'/'out', or None for a virtual port of our own."""
        if self.settings.virtual:
            return None
        return self.settings.input if side == "in" else self.settings.output

    def _on_midi(self, msg) -> None:                      # backend thread
        if self.midi.put(self.clock(), msg):
            self.q.put(("midi",))

    def _on_bad_bytes(self, exc: Exception, data: list) -> None:   # backend thread
        self.q.put(("bad", self.clock(), data, repr(exc)))

    def _on_ports(self, inputs: list[str], outputs: list[str]) -> None:   # watcher thread
        self.q.put(("ports", inputs, outputs))

    def _open_input(self, names: Optional[list[str]] = None) -> bool:
        spec = self._side_spec("in")
        word = self.backend.word
        if spec is None:
            self.inp = self.backend.open_input(self._client("in"), "in", connect_to=None,
                                               callback=self._on_midi, on_error=self._on_bad_bytes)
            log.info("input: our own port %s:in (%s)", self._client("in"), word)
            return True
        if names is None:
            names = self.backend.inputs()
        name = _ports.match_port(spec, names, exclude=self._own())
        if name is None:
            if not self._lost_logged["input"]:
                log.warning("input %r: no such port (yet); waiting for it%s", spec,
                            _ports.closest_hint(spec, names, exclude=self._own()))
                self._lost_logged["input"] = True
            return False
        self.inp = self.backend.open_input(self._client("in"), "in", connect_to=name,
                                           callback=self._on_midi, on_error=self._on_bad_bytes)
        self._lost_logged["input"] = False
        log.info("input: connected to %s (%s)", name, word)
        return True

    def _open_output(self, now: float, names: Optional[list[str]] = None) -> bool:
        spec = self._side_spec("out")
        word = self.backend.word
        if spec is None:
            self.outp = self.backend.open_output(self._client("out"), "out", connect_to=None)
            log.info("output: our own port %s:out (%s)", self._client("out"), word)
        else:
            if names is None:
                names = self.backend.outputs()
            name = _ports.match_port(spec, names, exclude=self._own())
            if name is None:
                if not self._lost_logged["output"]:
                    log.warning("output %r: no such port (yet); waiting for it%s", spec,
                                _ports.closest_hint(spec, names, exclude=self._own()))
                    self._lost_logged["output"] = True
                return False
            self.outp = self.backend.open_output(self._client("out"), "out", connect_to=name)
            self._lost_logged["output"] = False
            log.info("output: connected to %s (%s)", name, word)
        # whatever sounded on it before (a crash, an outage) is silenced first; the engine
        # forgets notes it played while the output was away but keeps the input's pedals,
        # which the set-up then sends again
        self.engine.output_lost(now)
        self.passthrough.forget()
        self.emit(pedals_up() + all_notes_off(sound_off=self.settings.panic_all_sound_off))
        self.emit(self.engine.start(now))
        return True

    def panic(self, now: float) -> int:
        """Silence the output whatever we believe sounds: pedals up on every channel, a
        note-off for every note we know of (passthrough included), All Notes Off on every
        channel (and All Sound Off where allowed). Returns how many notes we knew of."""
        known = len(self.engine.sounding()) + len(self.passthrough)
        waiting = self.midi.clear()       # played before the panic: it must not sound after it
        if waiting:
            log.info("panic: %d waiting input messages discarded", waiting)
        out = pedals_up()
        out += self.engine.release_all(now)
        out += self.passthrough.release()
        out += all_notes_off(sound_off=self.settings.panic_all_sound_off, already=out)
        self.emit(out)
        return known

    def _on_server_lost(self) -> None:                   # backend thread
        self.q.put(("lost",))

    def _open_ports(self, now: float) -> None:
        self.backend.on_server_lost = self._on_server_lost
        named = self._side_spec("in") is not None or self._side_spec("out") is not None
        self._open_output(now)
        self._open_input()
        if named and not self._watching:
            self.backend.watch(self.settings.port_poll, self._on_ports)
            self._watching = True

    def _close_ports(self) -> None:
        for p in (self.inp, self.outp):
            if p is not None:
                p.close()
        self.inp = self.outp = None
        self.backend.close()
        self._watching = False

    def _check_ports(self, now: float, inputs: list[str], outputs: list[str]) -> None:
        # output first: input is dropped while there is no output
        spec = self._side_spec("out")
        if spec is not None:
            if self.outp is not None and self.outp.connected_to not in outputs:
                log.warning("output %s is gone; notes sounding on it are forgotten; "
                            "waiting for it to return", self.outp.connected_to)
                self.outp.close()
                self.outp = None
                self.engine.output_lost(now)
                self.passthrough.forget()
                self._lost_logged["output"] = True
            elif self.outp is None:
                try:
                    self._open_output(now, outputs)
                except RetunerError as exc:
                    log.debug("reopening output: %s", exc)
                    self.outp = None
        spec = self._side_spec("in")
        if spec is not None:
            if self.inp is not None and self.inp.connected_to not in inputs:
                log.warning("input %s is gone; releasing its notes; waiting for it to return",
                            self.inp.connected_to)
                self.inp.close()
                self.inp = None
                self.emit(self.engine.input_lost(now) + self.passthrough.release())
                self._lost_logged["input"] = True
            elif self.inp is None:
                try:
                    self._open_input(inputs)
                except RetunerError as exc:
                    log.debug("reopening input: %s", exc)
                    self.inp = None

    # ------------------------------------------------------------------ switching
    def switch_to(self, tuning, now: float, why: str) -> None:
        self.emit(self.session.load(tuning, now, why))

    def _control_message(self, msg, now: float) -> bool:
        """Handle program change / the A/B CC on the control channel; True when consumed."""
        sw = self.settings.switch
        ch = getattr(msg, "channel", None)
        if ch is None:
            return False
        on_channel = sw.channel is not None and ch == sw.channel - 1
        if msg.type == "program_change" and on_channel:
            n = msg.program
            if n < len(self.profiles.listed):
                self.switch_to(self.profiles.listed[n], now, f"program change {n + 1}")
            else:
                log.warning("program change %d: the config lists %d profiles; ignored",
                            n + 1, len(self.profiles.listed))
            return True
        if (msg.type == "control_change" and sw.ab_cc is not None and msg.control == sw.ab_cc
                and self.profiles.ab is not None and (on_channel or sw.channel is None)):
            pressed = msg.value >= 64
            if pressed and self._ab_last < 64:
                a, b = self.profiles.ab
                base = self.session.base
                target = b if (base is a or base.id == a.id) else a
                self.switch_to(target, now, f"A/B switch CC{sw.ab_cc}")
            self._ab_last = msg.value
            return True
        return False

    # ------------------------------------------------------------------ events
    def _handle_midi(self, t: float, msg) -> None:
        if log.isEnabledFor(logging.DEBUG):
            log.debug("in  %s", msg)
        if self._control_message(msg, t):
            return
        # with no synth to play on nothing is sent, but the engine still follows the input
        # (pedals, wheel), so the synth gets the right state when it comes back
        if msg.type == "note_on" and msg.velocity and self._refresh_due(t):
            # a synth may have been connected to our own port since the setup was sent
            log.debug("sending the setup again before the first note after a pause")
            self.emit(self.engine.start(t))
        self.emit(self.engine.feed(t, msg))

    def _refresh_due(self, t: float) -> bool:
        every = self.settings.setup_refresh
        if not every or self._side_spec("out") is not None:
            return False
        quiet = max(every, self.engine.config.release_time)   # never re-bend a ringing channel
        return t - self._last_out >= quiet and not self.engine.sounding()

    def _reload(self, now: float) -> None:
        if self.reload_settings is None:
            log.info("SIGHUP: nothing to reload")
            return
        self.notifier.reloading()
        try:
            new = self.reload_settings()
            profiles = Profiles(new)
            new_engine_cfg = engine_config(new)
            if self.claim is not None:
                self.claim.move_ports(new)      # other ports: not if another daemon has them
        except RetunerError as exc:
            log.error("reload failed, keeping the running settings: %s", exc)
            self.notifier.ready(status=f"reload failed: {exc}")
            return
        except Exception as exc:  # noqa: BLE001 - never die on a reload
            log.exception("reload failed, keeping the running settings: %s", exc)
            self.notifier.ready(status="reload failed")
            return
        old = self.settings
        old_main = self.profiles.main
        ports_changed = any(getattr(old, k) != getattr(new, k)
                            for k in ("backend", "input", "output", "virtual", "client_name", "port_poll"))
        self.settings = new
        self.profiles = profiles
        set_level(new.log_level, getattr(self, "verbose", 0))
        if ports_changed:
            log.info("port settings changed: releasing every note and reopening the ports")
            self.panic(now)
            self._close_ports()
            if self._own_backend:
                self.backend = self._new_backend(new)
        new_pass = frozenset(new_engine_cfg.passthrough)
        if new_pass != self._pass_channels:
            # notes on a channel that stops passing through would never get their note-off
            self.emit(self.passthrough.release(self._pass_channels - new_pass))
            self._pass_channels = new_pass
        if new_engine_cfg != self.engine.config:
            # a new layout releases everything and starts again; lighter changes keep notes sounding
            self.emit(self.session.reconfigure(new_engine_cfg, now))
            log.info("engine settings changed")
        if ports_changed:
            try:
                self._open_ports(now)
            except RetunerError as exc:
                log.error("reopening ports: %s", exc)
        if old.control != new.control:
            log.warning("control socket settings take effect at the next start")
        if (profiles.main.id, profiles.main.cents) != (old_main.id, old_main.cents):
            self.switch_to(profiles.main, now, "reload")
        elif self.session.base.id != profiles.main.id:
            # the config's tuning is unchanged: a tuning switched to live (program change, A/B,
            # control socket) stays
            log.info("keeping the profile switched to live: %s", self.session.base.id)
        log.info("reloaded %s", new.source or "built-in defaults")
        self.notifier.ready(status=self._status_text())

    def _status_text(self) -> str:
        st = dict(getattr(self.engine, "stats", {}) or {})
        parts = [f"profile {self.session.base.id} ({self.engine.config.mode}"
                 f"{', adaptive' if self.engine.config.adaptive is not None else ''})",
                 f"{st.get('notes', 0)} notes",
                 f"{st.get('steals', 0)} steals",
                 f"{st.get('ringing_retunes', 0)} ringing retunes"]
        if st.get("attack_retunes"):
            parts.append(f"{st['attack_retunes']} retunes within the attack "
                         f"(mean {st.get('attack_retune_cents_total', 0.0) / st['attack_retunes']:.2f} c; "
                         f"{st.get('attack_corrected_notes', 0)} notes corrected by more than 0.5 c)")
        if st.get("redressings"):
            parts.append(f"{st['redressings']} channels dressed again for another part")
        try:
            parts.append(f"{len(self.engine.sounding())} sounding")
        except Exception:  # pragma: no cover
            pass
        if self._bad_input:
            parts.append(f"{self._bad_input} bad input")
        dropped = self.midi.total_dropped()
        if dropped:
            parts.append(f"{dropped} input messages dropped (overload)")
        if self._errors:
            parts.append(f"{self._errors} errors")
        return ", ".join(parts)

    def _status_line(self) -> None:
        """Log the status line, then a second one with impurity, motion and drift measured from
        the recent output (as 'retuner convert --report' measures a file). Decoding takes a
        while, so it runs in a thread of its own: the engine thread never waits for it."""
        log.info("status: %s", self._status_text())
        cut = self.engine.steals_explained()
        if cut:
            log.info("status: %s", cut)
        if self._figures_busy or not len(self.recent):
            return
        stream = self.recent.snapshot()
        cfg = self.engine.config
        kw = {"bend_scale": cfg.bend_scale, "bend_range": self.engine.bend_range_cents / 100.0,
              "exclude_channels": tuple(cfg.passthrough)}
        self._figures_busy = True

        def measure():
            try:
                fig = self._figures = report(stream, **kw)
                if fig.get("notes"):
                    log.info("status: last %d notes: impurity %.2f c, motion %.2f c/note, drift max %.2f c, "
                             "final %.2f c; motion after the attack %.2f c/note", fig["notes"],
                             fig["impurity_cents"], fig["motion_cents_per_note"], fig["drift_max_cents"],
                             fig["drift_final_cents"], fig["late_motion_cents_per_note"])
            except Exception:  # noqa: BLE001 - figures are a nicety; never disturb the daemon
                log.debug("measuring the recent output failed", exc_info=True)
            finally:
                self._figures_busy = False

        threading.Thread(target=measure, name="retuner-figures", daemon=True).start()

    def status(self) -> dict:
        """For the control socket's status command."""
        return {"uptime_s": self.clock() - self.started_at,
                "input": getattr(self.inp, "connected_to", None) if self.inp else None,
                "output": getattr(self.outp, "connected_to", None) if self.outp else None,
                "input_open": self.inp is not None, "output_open": self.outp is not None,
                "backend": self.backend.word, "config": self.settings.source,
                "bad_input": self._bad_input, "errors": self._errors,
                "input_dropped": self.midi.counts(), "input_waiting": len(self.midi)}

    # ------------------------------------------------------------------ control socket
    def _start_control(self) -> None:
        if not self.settings.control.enabled:
            return
        host = EngineHost(session=self.session, emit=self.emit, clock=self.clock,
                          profile_dirs=tuple(self.settings.profile_dirs), status_extra=self.status,
                          panic=self.panic)
        ctl = EngineControl(host)
        server = ControlServer(self.settings.control.path, ctl, on_command=lambda: self.q.put(("wake",)))
        ctl.server = server
        server.start()        # a RetunerError here stops the start: one line, exit status 2
        self.control, self.control_server = ctl, server

    # ------------------------------------------------------------------ main loop
    def post_signal(self, signum: int) -> None:
        """What a signal handler does (safe in one): queue the signal for the engine thread."""
        self.q.put(("signal", signum))

    def _install_signals(self) -> dict:
        old = {}
        for s in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            old[s] = signal.signal(s, lambda signum, frame: self.post_signal(signum))
        return old

    def run(self) -> int:
        old_handlers = self._install_signals()
        try:
            self.start()
            while not self.step():
                pass
            return self.exit_status
        finally:
            self.shutdown()
            for s, h in old_handlers.items():
                signal.signal(s, h)

    def start(self) -> None:
        """Open the ports and the control socket, tell the service manager we are ready."""
        # claim the ports and the socket before touching either: a second daemon on them refuses
        # here, before its start-up panic could cut the first one's notes
        self.claim = Claim(self.settings).take()
        self._start_control()
        now = self.clock()
        self._open_ports(now)
        self.running = True
        status = self._status_text()
        self.notifier.ready(status=status)
        log.info("retuner running: %s", status)
        wd_interval = self.notifier.watchdog_interval
        self._next_wd = now + wd_interval if wd_interval else None
        if wd_interval:
            self.notifier.watchdog()
        status_every = self.settings.status_interval
        self._next_status = now + status_every if status_every > 0 else None

    def shutdown(self) -> None:
        self.running = False
        self.notifier.stopping()
        if self.control_server is not None:
            try:
                self.control_server.close()
            except Exception:  # pragma: no cover
                pass
            self.control_server = None
        self._close_ports()
        if self.claim is not None:
            self.claim.release()
            self.claim = None

    def step(self, wait: bool = True) -> bool:
        """One turn of the main loop: wait for events (``wait``: at most until the next thing
        due), handle all that are queued, run the engine's timers, serve the control socket,
        ping the watchdog and log the status line when due. True when the daemon must stop."""
        q = self.q
        if wait:
            now = self.clock()
            wake = [x for x in (self.engine.next_deadline(), self._next_wd, self._next_status)
                    if x is not None]
            timeout = max(0.0, min(wake) - now) if wake else 1.0
            try:
                item = q.get(timeout=min(timeout, 1.0))
            except queue.Empty:
                item = None
        else:
            try:
                item = q.get_nowait()
            except queue.Empty:
                item = None
        while item is not None:
            if item[0] != "midi" and self._handle(item):
                return True
            try:
                item = q.get_nowait()
            except queue.Empty:
                item = None
        # control commands (a panic) before the MIDI waiting, then one batch of MIDI; more
        # waiting: come back at once, after whatever signal or command arrived meanwhile
        self._serve_control()
        batch = self.midi.take(self.MIDI_BATCH)
        for t, msg in batch:
            self._handle(("midi", t, msg))
        if len(self.midi):
            q.put(("midi",))
        now = self.clock()
        dl = self.engine.next_deadline()
        if dl is not None and dl <= now:
            try:
                self.emit(self.engine.tick(now))
            except Exception:  # noqa: BLE001
                self._errors += 1
                log.exception("engine tick failed")
        if self.control_server is not None:
            try:
                self.control.observe(now)
            except Exception:  # noqa: BLE001
                self._errors += 1
                log.exception("control socket")
        dropped = self.midi.total_dropped()
        if dropped != self._drops_logged and now >= self._next_drop_log:
            self._log_drops(now, dropped)
        if self._next_wd is not None and now >= self._next_wd:
            self.notifier.watchdog()
            self._next_wd = now + self.notifier.watchdog_interval
        if self._next_status is not None and now >= self._next_status:
            self._status_line()
            status_every = self.settings.status_interval   # a reload may change it
            self._next_status = now + status_every if status_every > 0 else None
        return False

    def _serve_control(self) -> None:
        if self.control_server is not None:
            try:
                self.control_server.serve_pending()
            except Exception:  # noqa: BLE001
                self._errors += 1
                log.exception("control socket")

    def _log_drops(self, now: float, dropped: int) -> None:
        """One summary line, at most once a second."""
        c = self.midi.counts()
        log.warning("input overload: %d messages dropped since the last report (%d note-ons and their "
                    "note-offs, %d others, %d releases); in all %d", dropped - self._drops_logged,
                    c["note_on"], c["other"], c["release"], dropped)
        self._drops_logged = dropped
        self._next_drop_log = now + 1.0

    def _handle(self, item: tuple) -> bool:
        """Handle one queued event; True when the daemon must stop."""
        kind = item[0]
        try:
            if kind == "midi":
                self._handle_midi(item[1], item[2])
            elif kind == "signal":
                signum = item[1]
                now = self.clock()
                if signum == signal.SIGHUP:
                    log.info("SIGHUP: reloading")
                    self._reload(now)
                    return False
                log.info("%s: releasing every note and stopping", signal.Signals(signum).name)
                self.panic(now)
                self.exit_status = 0
                return True
            elif kind == "lost":
                log.error("the %s server stopped: exiting with status 1 (a service manager starts "
                          "retuner again, and it waits for a server)", self.backend.word.upper())
                self.exit_status = 1
                return True
            elif kind == "ports":
                self._check_ports(self.clock(), item[1], item[2])
            elif kind == "bad":
                self._bad_input += 1
                if self._bad_input <= 10:
                    log.warning("ignored input bytes %s: %s", item[2], item[3])
            elif kind == "wake":
                pass
        except Exception as exc:  # noqa: BLE001 - a daemon never dies on bad input
            self._errors += 1
            log.exception("error handling %s: %s", item, exc)
        return False
