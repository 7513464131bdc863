"""What retuner does on a real ALSA sequencer, gathered inside the virtual machine of tests/alsavm.py
and printed as one JSON object for the tests on the host (tests/live/test_alsa_vm.py) to check.

Run as ``python tests/alsaprobe.py`` from the checkout, on a machine with ``/dev/snd/seq``. It
observes and records; it judges nothing (the checks, and the values they compare with, are on the
host side). Every step records its own error, so one failure does not hide what the others saw.

Steps:
- ``listing``: retuner's backend choice (``choose_backend("auto")``), ``retuner ports --json``, and
  python-rtmidi's own lists of the sequencer's ports, with no daemon running;
- ``virtual``: ``retuner run --virtual --backend alsa --profile meantone-quarter`` up (readiness
  through a notify socket, sd_notify(3)), the port lists (python-rtmidi, ``aconnect -l``,
  ``aconnect -i``, ``aconnect -o`` when alsa-utils is there, ``retuner ports --json``) while it
  runs; then a client of ours, connected to its ``in`` and ``out`` ports through the sequencer,
  plays notes after a pause longer than the daemon's set-up refresh (so the set-up is sent again
  to the newly connected client before the first note), holds one, and stops the daemon with
  SIGTERM: everything received, in order, as bytes;
- ``named``: our own ports first (a keyboard ``probe-keys`` and a synth ``probe-synth``), then
  ``retuner run --input probe-keys --output probe-synth``: retuner connects to them by name; a note
  played and what came back. Then the keyboard goes away with a key held and comes back as a new
  client, and a note is played again; then the synth goes away and comes back, and a note is played
  again: what the synth received before and after its return.
"""

from __future__ import annotations

import faulthandler
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
import traceback

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
sys.path.insert(0, HERE)

import rtmidi  # noqa: E402

from jack import NotifySocket  # noqa: E402
from retuner.bench.jacklive import stop_child  # noqa: E402

PROFILE = "meantone-quarter"
READY_TIMEOUT = 120.0        # seconds: the machine may be emulated (TCG), ten times slower than the host
HANG_AFTER = 600.0           # seconds: the whole probe took 25 to 70 s under emulation
DEAF_WAIT = 60.0             # seconds: a send that has not returned by then waits for ever
REFRESH_PAUSE = 2.5          # seconds: longer than the daemon's set-up refresh (max(setup_refresh 1 s, release 2 s))


def retuner(*args, env, timeout=120.0):
    r = subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True,
                       timeout=timeout, env=env, cwd=REPO)
    return {"returncode": r.returncode, "stdout": r.stdout, "stderr": r.stderr}


def tool(*argv):
    if shutil.which(argv[0]) is None:
        return None
    r = subprocess.run(list(argv), capture_output=True, text=True, timeout=30)
    return r.stdout + r.stderr


def rtmidi_lists():
    # fresh clients of our own, as any other program would list the sequencer's ports
    mi = rtmidi.MidiIn(rtmidi.API_LINUX_ALSA, "probe-list")
    mo = rtmidi.MidiOut(rtmidi.API_LINUX_ALSA, "probe-list")
    try:
        return {"readable": mi.get_ports(), "writable": mo.get_ports()}
    finally:
        mi.delete()
        mo.delete()


class Recorder:
    """An ALSA input of ours; records every message's bytes with the time it came."""

    def __init__(self, client: str):
        self.midi = rtmidi.MidiIn(rtmidi.API_LINUX_ALSA, client)
        self.midi.ignore_types(sysex=False, timing=False, active_sense=True)
        self.got: list[tuple[float, list[int]]] = []
        self._lock = threading.Lock()
        self.midi.set_callback(self._on)

    def _on(self, event, data=None):
        with self._lock:
            self.got.append((time.monotonic(), list(event[0])))

    def messages(self):
        with self._lock:
            return list(self.got)

    def wait(self, predicate, timeout=20.0):
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if predicate(self.messages()):
                return True
            time.sleep(0.01)
        return False

    def close(self):
        self.midi.cancel_callback()
        self.midi.close_port()
        self.midi.delete()


def port_index(rt, prefix: str) -> int:
    for i, name in enumerate(rt.get_ports()):
        if name.startswith(prefix):
            return i
    raise LookupError(f"no port {prefix!r} in {rt.get_ports()}")


def note_on_count(msgs, key=None):
    return sum(1 for _, b in msgs if len(b) == 3 and b[0] & 0xF0 == 0x90 and b[2] > 0
               and (key is None or b[1] == key))


class Daemon:
    def __init__(self, args, env, log_path):
        self.notify = NotifySocket(log_path + ".notify")
        env = dict(env, NOTIFY_SOCKET=self.notify.path)
        self.log_path = log_path
        self._log = open(log_path, "wb")
        self.started = time.monotonic()
        self.proc = subprocess.Popen([sys.executable, "-m", "retuner", "run", *args], stdout=self._log,
                                     stderr=subprocess.STDOUT, env=env, cwd=REPO)
        self.ready_after = None
        end = time.monotonic() + READY_TIMEOUT
        while time.monotonic() < end and self.proc.poll() is None:
            if "READY=1" in self.notify.lines():
                self.ready_after = time.monotonic() - self.started
                break
            time.sleep(0.02)

    def log(self):
        with open(self.log_path, errors="replace") as fh:
            return fh.read()

    def stop(self):
        stop_child(self.proc, 30)             # SIGTERM, then SIGKILL after 30 s
        self._log.close()
        self.notify.close()
        return self.proc.returncode


def step(report, name, fn):
    try:
        report[name] = fn()
    except Exception:  # noqa: BLE001 - recorded for the host to show
        report.setdefault("errors", {})[name] = traceback.format_exc()


def listing(env):
    from retuner.live import ports
    return {"seq_device": os.path.exists("/dev/snd/seq"),
            "choose_auto": ports.choose_backend("auto"),
            "ports_json": retuner("ports", "--json", env=env),
            "rtmidi": rtmidi_lists()}


def virtual(env, work):
    out = {}
    d = Daemon(["--virtual", "--backend", "alsa", "--profile", PROFILE, "--no-control-socket", "-v"],
               env, os.path.join(work, "virtual.log"))
    try:
        out["ready_after"] = d.ready_after
        if d.ready_after is None:
            out["log"] = d.log()
            return out
        out["rtmidi"] = rtmidi_lists()
        out["aconnect_l"] = tool("aconnect", "-l")
        out["aconnect_i"] = tool("aconnect", "-i")
        out["aconnect_o"] = tool("aconnect", "-o")
        out["ports_json"] = retuner("ports", "--json", env=env)
        # a keyboard and a synth of our own, connected as README.md says: by client name and port number
        keys = rtmidi.MidiOut(rtmidi.API_LINUX_ALSA, "probe-play")
        keys.open_virtual_port("play")
        rec = Recorder("probe-record")
        rec.midi.open_virtual_port("record")
        out["aconnect_in"] = subprocess.run(["aconnect", "probe-play", "retuner:0"], capture_output=True,
                                            text=True, timeout=30).returncode
        out["aconnect_out"] = subprocess.run(["aconnect", "retuner:1", "probe-record"], capture_output=True,
                                             text=True, timeout=30).returncode
        # the set-up went out when the daemon started, before we were connected; before the first
        # note after a pause, a daemon with its own out port sends it again
        time.sleep(max(0.0, REFRESH_PAUSE - (time.monotonic() - d.started - d.ready_after)))
        played = []
        for key in (64, 60):                  # E4, C4: played and released one after the other
            played.append([0x90, key, 100])
            keys.send_message([0x90, key, 100])
            rec.wait(lambda m, k=key: note_on_count(m, k) >= 1)
            played.append([0x80, key, 0])
            keys.send_message([0x80, key, 0])
        held = 69                             # A4, held while the daemon stops
        played.append([0x90, held, 100])
        keys.send_message([0x90, held, 100])
        out["held_arrived"] = rec.wait(lambda m: note_on_count(m, held) >= 1)
        out["before_stop"] = len(rec.messages())
        out["returncode"] = d.stop()
        time.sleep(0.5)                       # what the sequencer still delivers
        out["played"] = played
        out["received"] = rec.messages()
        out["log"] = d.log()
        rec.close()
        keys.delete()
    finally:
        d.stop()
        out.setdefault("log", d.log())
    return out


def backend(fallback=False):
    """retuner's ALSA backend in this process (alsa-midi, one client; with ``fallback``
    python-rtmidi's, a client per port): MIDI both ways through its ports, a bulk tuning dump
    (408 bytes) among it, longer than one sequencer event holds."""
    from retuner.live.alsaseq import AlsaSeqBackend
    from retuner.live.ports import RtMidiBackend
    import mido
    dump = [0xF0, 0x7E, 0x7F, 0x08, 0x01, 0x00] + [i % 128 for i in range(401)] + [0xF7]
    played = [[0x90, 60, 100], [0xE0, 0x00, 0x50], dump, [0xB0, 64, 127], [0x80, 60, 0]]
    b = RtMidiBackend("alsa") if fallback else AlsaSeqBackend("probe-seq")
    got = []
    inp = b.open_input(b.client_name("probe-seq", "in"), "in", connect_to=None,
                       callback=lambda m: got.append(list(m.bytes())))
    out = b.open_output(b.client_name("probe-seq", "out"), "out", connect_to=None)
    keys = rtmidi.MidiOut(rtmidi.API_LINUX_ALSA, "probe-bkeys")
    keys.open_port(port_index(keys, f"{b.client_name('probe-seq', 'in')}:in"), "keys")
    rec = Recorder("probe-bsynth")
    rec.midi.open_port(port_index(rec.midi, f"{b.client_name('probe-seq', 'out')}:out"), "synth")
    try:
        time.sleep(0.2)
        for m in played:
            keys.send_message(m)
        end = time.monotonic() + 20
        while len(got) < len(played) and time.monotonic() < end:
            time.sleep(0.01)
        for m in played:
            out.send(mido.Message.from_bytes(m))
        rec.wait(lambda r: len(r) >= len(played))
        return {"played": played, "got": got, "sent_back": [b for _, b in rec.messages()],
                "names": {"in": [n for n in b.outputs() if n.startswith("probe-seq")],
                          "out": [n for n in b.inputs() if n.startswith("probe-seq")]},
                "aconnect_l": tool("aconnect", "-l")}
    finally:
        rec.close()
        keys.delete()
        inp.close()
        out.close()
        b.close()


def deaf():
    """retuner's ALSA backend (alsa-midi) sending to a client that never reads, as a synth that hung:
    once that client's input is full, each send must fail after a short wait instead of waiting
    for ever, the backend must still answer, and once the client reads again a message goes
    through. Counted: sends that went, sends that failed, whether the sending thread finished."""
    import alsa_midi
    import mido
    from retuner.live.alsaseq import AlsaSeqBackend
    synth = alsa_midi.SequencerClient("probe-deaf")
    synth_port = synth.create_port("synth", alsa_midi.WRITE_PORT)     # kept: a dropped Port object closes
    b = AlsaSeqBackend("probe-sender")
    names = b.outputs()
    target = [n for n in names if n.startswith("probe-deaf:")]
    if not target:
        raise LookupError(f"no probe-deaf port among {names}; the synth's own list: "
                          f"{[(p.client_name, p.name) for p in synth.list_ports(type=alsa_midi.PortType.ANY)]}")
    out = b.open_output("probe-sender", "out", connect_to=target[0])
    msg = mido.Message("control_change", control=1, value=5)
    counts = {"sent": 0, "failed": 0, "error": None}

    def flood():
        for _ in range(5000):
            try:
                out.send(msg)
                counts["sent"] += 1
            except Exception as exc:  # noqa: BLE001 - what the daemon would log
                counts["failed"] += 1
                counts["error"] = repr(exc)
                if counts["failed"] >= 3:
                    return

    sender = threading.Thread(target=flood, daemon=True)
    sender.start()
    sender.join(DEAF_WAIT)
    counts["finished"] = not sender.is_alive()
    listed = []
    looker = threading.Thread(target=lambda: listed.append(b.outputs()), daemon=True)
    looker.start()
    looker.join(DEAF_WAIT)
    counts["listing_answered"] = bool(listed)
    if not counts["finished"]:
        return counts                           # stuck: nothing more to learn, and no clean close
    # the synth reads again: what it holds, then a note sent now
    after = []
    end = time.monotonic() + 30
    sent_note = False
    while time.monotonic() < end and not any(b[0] == 0x90 for b in after):
        try:
            ev = synth.event_input(prefer_bytes=True, timeout=0.2)
        except alsa_midi.ALSAError:              # its input overran: events lost, reading goes on
            continue
        if ev is None and not sent_note:
            out.send(mido.Message("note_on", note=60, velocity=100))
            sent_note = True
        elif isinstance(ev, alsa_midi.MidiBytesEvent):
            after.append(list(ev.midi_bytes))
    counts["after"] = [m for m in after if m[0] == 0x90]
    out.close()
    b.close()
    synth_port.close()
    synth.close()
    return counts


def deaf_daemon(env, work):
    """``retuner run`` playing on a synth that never reads, flooded with notes, then SIGTERM: does
    it stop, and how (its exit status, the seconds from the signal to its exit)."""
    import alsa_midi
    synth = alsa_midi.SequencerClient("probe-hung")
    synth_port = synth.create_port("synth", alsa_midi.WRITE_PORT)     # kept: a dropped Port object closes
    keys = rtmidi.MidiOut(rtmidi.API_LINUX_ALSA, "probe-flood")
    keys.open_virtual_port("keys")
    d = Daemon(["--input", "probe-flood", "--output", "probe-hung", "--backend", "alsa",
                "--profile", PROFILE, "--no-control-socket"], env, os.path.join(work, "deaf.log"))
    out = {"ready_after": d.ready_after}
    try:
        if d.ready_after is None:
            return out
        for i in range(300):
            keys.send_message([0x90, 48 + i % 24, 100])
            keys.send_message([0x80, 48 + i % 24, 0])
        time.sleep(2.0)                       # the daemon meets the full input
        t = time.monotonic()
        d.proc.send_signal(signal.SIGTERM)
        try:
            out["returncode"] = d.proc.wait(DEAF_WAIT)
            out["stopped_after"] = time.monotonic() - t
        except subprocess.TimeoutExpired:
            out["returncode"] = None              # still running: it hangs
    finally:
        d.stop()
        out["log"] = d.log()[-3000:]
        keys.close_port()
        keys.delete()
        synth_port.close()
        synth.close()
    return out


def released(msgs, key) -> bool:
    """Whether, after the note-on for ``key`` came out, a note-off for it (or a note-on with velocity
    0, or All Notes Off) came too."""
    after = out_time(msgs, key)
    return any(t >= after and len(b) == 3
               and ((b[0] & 0xF0 in (0x80, 0x90) and b[1] == key and (b[0] & 0xF0 == 0x80 or b[2] == 0))
                    or (b[0] & 0xF0 == 0xB0 and b[1] == 123))
               for t, b in msgs)


def wait_log(d, text, count, timeout=30.0) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if d.log().count(text) >= count:
            return True
        time.sleep(0.05)
    return False


def open_keys():
    keys = rtmidi.MidiOut(rtmidi.API_LINUX_ALSA, "probe-keys")
    keys.open_virtual_port("keys")
    return keys


def close_keys(keys):
    keys.close_port()
    keys.delete()


def open_synth():
    rec = Recorder("probe-synth")
    rec.midi.open_virtual_port("synth")
    return rec


def named(env, work):
    out = {}
    keys = open_keys()
    rec = open_synth()
    d = Daemon(["--input", "probe-keys", "--output", "probe-synth", "--backend", "alsa",
                "--profile", PROFILE, "--no-control-socket", "-v"], env, os.path.join(work, "named.log"))
    try:
        out["ready_after"] = d.ready_after
        if d.ready_after is None:
            return out
        out["setup_arrived"] = rec.wait(lambda m: len(m) > 0)
        out["aconnect_l"] = tool("aconnect", "-l")
        keys.send_message([0x90, 64, 100])
        rec.wait(lambda m: note_on_count(m, 64) >= 1)
        keys.send_message([0x80, 64, 0])
        rec.wait(lambda m: released(m, 64))
        # the keyboard goes away (unplugged) with a key held, and comes back under its name as a new
        # client: the held note is released, and retuner connects again
        keys.send_message([0x90, 67, 100])
        out["held_arrived"] = rec.wait(lambda m: note_on_count(m, 67) >= 1)
        close_keys(keys)
        keys = None
        out["held_released"] = rec.wait(lambda m: released(m, 67))
        time.sleep(2.0)                       # several of the daemon's looks (port_poll 0.5 s)
        out["aconnect_gone"] = tool("aconnect", "-l")
        keys = open_keys()
        end = time.monotonic() + 30
        while time.monotonic() < end and "Connecting To" not in \
                (tool("aconnect", "-l") or "").split("'probe-keys'")[1].split("client ")[0]:
            time.sleep(0.2)
        out["aconnect_back"] = tool("aconnect", "-l")
        out["input_back"] = wait_log(d, "input: connected to probe-keys", 2)
        keys.send_message([0x90, 62, 100])
        out["back_arrived"] = rec.wait(lambda m: note_on_count(m, 62) >= 1)
        keys.send_message([0x80, 62, 0])
        rec.wait(lambda m: released(m, 62))
        out["received"] = rec.messages()
        # the synth goes away and comes back: the set-up first, then the notes
        rec.close()
        rec = None
        out["output_gone"] = wait_log(d, "output probe-synth", 1)
        rec = open_synth()
        out["output_back"] = wait_log(d, "output: connected to probe-synth", 2)
        rec.wait(lambda m: len(m) > 0)
        keys.send_message([0x90, 64, 100])
        rec.wait(lambda m: note_on_count(m, 64) >= 1)
        keys.send_message([0x80, 64, 0])
        rec.wait(lambda m: released(m, 64))
        out["received_after_return"] = rec.messages()
        out["returncode"] = d.stop()
    finally:
        d.stop()
        out["log"] = d.log()
        if rec is not None:
            rec.close()
        if keys is not None:
            close_keys(keys)
    return out


def out_time(msgs, key) -> float:
    """When the note-on for ``key`` came out (infinity before it did)."""
    return next((t for t, b in msgs if len(b) == 3 and b[0] & 0xF0 == 0x90 and b[1] == key and b[2] > 0),
                float("inf"))


def main():
    # a step that hangs: every thread's stack on standard error (the host shows it), and out
    faulthandler.dump_traceback_later(HANG_AFTER, exit=True)
    work = "/tmp/alsaprobe"
    os.makedirs(work, exist_ok=True)
    env = {k: v for k, v in os.environ.items() if not k.startswith(("JACK_", "NOTIFY_", "JOURNAL_"))}
    env["XDG_CONFIG_HOME"] = os.path.join(work, "config")     # no user config, no user profiles
    env["XDG_RUNTIME_DIR"] = os.path.join(work, "run")
    os.makedirs(env["XDG_RUNTIME_DIR"], mode=0o700, exist_ok=True)
    report = {}
    step(report, "listing", lambda: listing(env))
    step(report, "virtual", lambda: virtual(env, work))
    step(report, "named", lambda: named(env, work))
    step(report, "backend", backend)
    step(report, "fallback", lambda: backend(fallback=True))
    step(report, "deaf", deaf)
    step(report, "deaf_daemon", lambda: deaf_daemon(env, work))
    json.dump(report, sys.stdout)


if __name__ == "__main__":
    main()
