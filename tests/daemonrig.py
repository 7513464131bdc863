"""The daemon in-process: ports in memory (retuner.live.memory), a clock the test moves, and one
turn of the main loop at a time (``Daemon.step(wait=False)``), so a test is fast and needs no waiting.
The real JACK tests (test_daemon_jack.py) stay the end-to-end proof."""

from __future__ import annotations

import logging
import os
import shutil
import signal
import tempfile
from typing import Optional

import mido

from jack import Decoder, Received
from retuner.cli import build_parser
from retuner.commands import run as run_cmd
from retuner.live.daemon import Daemon
from retuner.live.memory import MemoryBackend

KEYS = "Stage Piano:MIDI Out"       # a keyboard's port (we read from it)
SYNTH = "Sound Module:MIDI In"      # a synth's port (we write to it)


class Clock:
    """Seconds, moved by the test."""

    def __init__(self, t: float = 1000.0):
        self.t = t

    def __call__(self) -> float:
        return self.t

    def advance(self, dt: float) -> None:
        self.t += dt


class LogLines(logging.Handler):
    def __init__(self):
        super().__init__(logging.DEBUG)
        self.lines: list[str] = []

    def emit(self, record):
        self.lines.append(record.getMessage())

    def count(self, part: str) -> int:
        return sum(part in line for line in self.lines)


class Rig:
    """A daemon between a keyboard and a synth in memory; ``config`` is the YAML of its config file."""

    def __init__(self, config: str = "", *, control: bool = False, named: bool = True,
                 inputs=(KEYS,), outputs=(SYNTH,), overrides: Optional[dict] = None,
                 runtime: Optional[str] = None, start: bool = True, capacity: Optional[int] = None,
                 input_name: str = KEYS, output_name: str = SYNTH):
        self.input_name, self.output_name = input_name, output_name
        self.dir = tempfile.mkdtemp(prefix="rtd")
        # the folder every daemon of the user shares (lock files): private to this test unless given
        self.runtime = runtime or os.path.join(self.dir, "xdg")
        self._saved_runtime = os.environ.get("XDG_RUNTIME_DIR")
        os.environ["XDG_RUNTIME_DIR"] = self.runtime
        self.config_path = os.path.join(self.dir, "config.yaml")
        self.socket_path = os.path.join(self.dir, "run", "control.sock")
        self.write_config(config)
        self.named = named
        self.control = control
        self.overrides = dict(overrides or {})
        self.backend = MemoryBackend(inputs, outputs)
        self.clock = Clock()
        self.log = LogLines()
        logging.getLogger("retuner").addHandler(self.log)
        logging.getLogger("retuner").setLevel(logging.INFO)
        kw = {} if capacity is None else {"input_capacity": capacity}
        self.daemon = Daemon(self.settings(), reload_settings=lambda: self.settings(reload=True),
                             backend=self.backend, clock=self.clock, **kw)
        self.stopped = False
        if start:
            self.daemon.start()

    def write_config(self, text: str) -> None:
        with open(self.config_path, "w") as fh:
            fh.write(text)

    def settings(self, reload: bool = False):
        """Read as ``retuner run`` reads them (its options over the config file)."""
        argv = ["run", "--config", self.config_path, "--status-interval", "0",
                "--control-socket", self.socket_path]
        argv += ["--input", self.input_name, "--output", self.output_name] if self.named else ["--virtual"]
        if not self.control:
            argv.append("--no-control-socket")
        s = run_cmd.settings_loader(build_parser().parse_args(argv))(reload=reload)
        for k, v in self.overrides.items():
            setattr(s, k, v)
        return s

    # ------------------------------------------------------------------ driving
    def pump(self) -> bool:
        """Handle everything queued and whatever is due by the clock; True once the daemon stopped."""
        while not self.stopped:
            if self.daemon.step(wait=False):
                self.stopped = True
                break
            if self.daemon.q.empty():
                break
        return self.stopped

    def play(self, *msgs: mido.Message, port: Optional[str] = None) -> None:
        self.backend.play(port or self.in_port, *msgs)
        self.pump()

    def send(self, *msgs: mido.Message) -> None:
        """Into the daemon's input, without letting the daemon run (a burst waiting for it)."""
        self.backend.play(self.in_port, *msgs)

    def signal(self, signum: int) -> bool:
        self.daemon.post_signal(signum)
        return self.pump()

    def wait(self, seconds: float) -> None:
        self.clock.advance(seconds)
        self.pump()

    # ------------------------------------------------------------------ reading
    @property
    def out_port(self) -> str:
        return SYNTH if self.named else self.daemon._client("out") + ":out"

    @property
    def in_port(self) -> str:
        return KEYS if self.named else self.daemon._client("in") + ":in"

    def sent(self) -> list[mido.Message]:
        return self.backend.received(self.out_port)

    def decode(self, default_range: float = 2.0) -> Decoder:
        d = Decoder(default_range=default_range)
        for i, m in enumerate(self.sent()):
            d.feed(float(i), m)
        return d

    def close(self) -> None:
        if not self.stopped:
            self.signal(signal.SIGTERM)
        self.daemon.shutdown()
        logging.getLogger("retuner").removeHandler(self.log)
        if self._saved_runtime is None:
            os.environ.pop("XDG_RUNTIME_DIR", None)
        else:
            os.environ["XDG_RUNTIME_DIR"] = self._saved_runtime
        shutil.rmtree(self.dir, ignore_errors=True)


def note_on(key: int, channel: int = 0, velocity: int = 90) -> mido.Message:
    return mido.Message("note_on", note=key, velocity=velocity, channel=channel)


def note_off(key: int, channel: int = 0) -> mido.Message:
    return mido.Message("note_off", note=key, channel=channel)


def cc(control: int, value: int, channel: int = 0) -> mido.Message:
    return mido.Message("control_change", control=control, value=value, channel=channel)


__all__ = ["Rig", "Clock", "KEYS", "SYNTH", "note_on", "note_off", "cc", "Received"]
