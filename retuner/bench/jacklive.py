"""``retuner bench --jack``: the daemon's idle cost and its note-on latency under a JACK server.

For each daemon (this checkout, and with ``--against REPO`` another checkout run by
``--against-python``) and each of static and adaptive (default attack mode) play:

* ``idle_cpu_percent``: CPU time of the idle daemon over ``idle`` seconds, in percent of one core:
  the sum over its threads of their time on a CPU in nanoseconds (/proc/PID/task/TID/schedstat,
  first field: the kernel's scheduler statistics documentation), as a thread that runs for
  microseconds a period is seldom caught by the clock ticks of /proc/PID/stat (which serve where
  schedstat is missing); with ``turns`` above 1 the checkouts take turns, each play measured
  ``turns`` times, and the figure is the median (``idle_cpu_turns`` has each);
* ``period``: where the checkout's JACK backend does each period's work, ``C`` (its compiled
  part is there) or ``Python``;
* ``floor``: the idle CPU, measured in the same turns, of a JACK client that does nothing each
  period (this checkout's compiled period with no port in its reach, in a process that only
  sleeps), connected as the daemon is, between the meter's two clients: what JACK costs such a
  client on this machine now, the floor under the daemons' figures;
* note-on latency from a measuring client of our own (JACK-Client): its process callback writes a
  note-on at the start of a period and finds the retuned note-on on its input some periods later.
  ``latency_periods`` counts those periods (JACK time, exact); ``latency_ms`` is the same span in
  milliseconds of JACK time (frames / sample rate); ``wall_ms`` is the wall-clock time from the
  period the note-on left to the process callback that found it come back.

When no JACK server answers, one is started with its dummy driver (``jackd --no-realtime -n NAME
-d dummy -r 48000 -p 128``, NAME from ``JACK_DEFAULT_SERVER`` or a private one) and stopped after.
Figures, not goals: they depend on the machine and its load.
"""

from __future__ import annotations

import glob
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from typing import Optional, Sequence

from retuner.errors import Unavailable
from retuner.live import jackmidi


def _cpu_seconds(pid: int) -> float:
    """CPU time of a process so far: its threads' schedstat, else its clock ticks."""
    try:
        total = 0
        for tid in os.listdir(f"/proc/{pid}/task"):
            try:
                with open(f"/proc/{pid}/task/{tid}/schedstat") as fh:
                    total += int(fh.read().split()[0])
            except FileNotFoundError:                 # a thread that ended meanwhile
                continue
        return total / 1e9
    except (OSError, ValueError, IndexError):
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")   # utime, stime (proc(5))


def _idle_percent(pid: int, idle: float) -> float:
    """CPU of a process left alone for ``idle`` seconds, after 2 s to settle after its start-up, in
    percent of one core."""
    time.sleep(2.0)
    c0, t0 = _cpu_seconds(pid), time.monotonic()
    time.sleep(idle)
    c1, t1 = _cpu_seconds(pid), time.monotonic()
    return round(100.0 * (c1 - c0) / (t1 - t0), 3)


def period_word(repo: str) -> str:
    """``C`` when the checkout's JACK backend has its compiled part, else ``Python``."""
    return "C" if glob.glob(os.path.join(repo, "retuner", "live", "_jackcycle*.so")) else "Python"



def stop_child(proc: subprocess.Popen, grace: float) -> None:
    """SIGTERM ``proc`` and wait up to ``grace`` seconds, then SIGKILL it (a child that is still
    running; one that has ended is left as it is)."""
    if proc.poll() is not None:
        return
    proc.terminate()
    try:
        proc.wait(grace)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)

class _Server:
    """A JACK server already running, or one started here with the dummy driver."""

    def __init__(self, rate: int = 48000, period: int = 128):
        self.proc: Optional[subprocess.Popen] = None
        os.environ["JACK_NO_START_SERVER"] = "1"
        if jackmidi.server_running():
            return
        jackd = shutil.which("jackd")
        if jackd is None:
            raise Unavailable("no JACK server running and jackd is not installed (apt-get install jackd2)",
                              field="--jack")
        name = os.environ.get("JACK_DEFAULT_SERVER") or f"retuner-bench-{os.getpid()}"
        os.environ["JACK_DEFAULT_SERVER"] = name
        self.log = tempfile.TemporaryFile()
        self.proc = subprocess.Popen([jackd, "--no-realtime", "-n", name, "-d", "dummy", "-r", str(rate),
                                      "-p", str(period)], stdout=self.log, stderr=subprocess.STDOUT,
                                     start_new_session=True)
        end = time.monotonic() + 20
        while not jackmidi.server_running():
            if self.proc.poll() is not None or time.monotonic() > end:
                self.stop()
                raise Unavailable(f"jackd -n {name} did not start", field="--jack")
            time.sleep(0.1)

    def stop(self) -> None:
        if self.proc is not None:
            stop_child(self.proc, 5)
        self.proc = None


class _Meter:
    """Two JACK clients of our own, a keyboard (``NAME:play``) that plays a note-on at the start of a
    period and a synth (``NAME-rec:record``) that waits for it to return. Two clients, as keyboard and
    synth are in use: JACK runs them before and after the daemon in each period (one client both
    before and after it would be a loop, whose order JACK does not promise)."""

    def __init__(self, name: str):
        self.client = jackmidi.open_client(name)
        self.rec = jackmidi.open_client(f"{name}-rec")
        self.out = self.client.midi_outports.register("play")
        self.inp = self.rec.midi_inports.register("record")
        self._pending: Optional[bytes] = None
        self._sent: Optional[tuple] = None        # (frame, wall) of the period it left in
        self._key = 0
        self.got = threading.Event()
        self.result: Optional[tuple] = None
        self.client.set_process_callback(self._play)
        self.rec.set_process_callback(self._record)
        self.client.activate()
        self.rec.activate()

    def _play(self, frames: int) -> None:
        self.out.clear_buffer()
        if self._pending is not None:
            self.out.write_midi_event(0, self._pending)
            self._pending = None
            self._sent = (self.client.last_frame_time, time.monotonic())

    def _record(self, frames: int) -> None:
        start = self.rec.last_frame_time
        for offset, buf in self.inp.incoming_midi_events():
            data = bytes(buf)
            if (self._sent is not None and not self.got.is_set() and len(data) == 3
                    and data[0] & 0xF0 == 0x90 and data[1] == self._key and data[2]):
                frame, wall = self._sent
                self.result = (start + offset - frame, start - frame, time.monotonic() - wall)
                self.got.set()

    def note(self, key: int, timeout: float = 5.0) -> Optional[tuple]:
        """(frames, frames to the period it came back in, wall seconds), or None if it never came."""
        self.got.clear()
        self._sent = None
        self._key = key
        self._pending = bytes([0x90, key, 80])
        ok = self.got.wait(timeout)
        off = bytes([0x80, key, 0])
        time.sleep(0.005)
        self._pending = off
        return self.result if ok else None

    def close(self) -> None:
        for c in (self.client, self.rec):
            c.deactivate()
            c.close()


# a JACK client that JACK wakes every period and that does nothing then, with an in and an out port
# in the daemon's place in the graph (between the meter's two clients): the compiled period with no
# port in its reach (this checkout's), in a Python process of its own that only sleeps
_FLOOR = """
import signal, sys, time
from retuner.live import jackcycle, jackmidi
signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))   # stopped: leave the server as a client should
jack = jackmidi.jack_module()
client = jackmidi.open_client(sys.argv[1])
jackcycle.choose(jack, "native").install(client)
client.midi_inports.register("in")
client.midi_outports.register("out")
client.activate()
print("ready", flush=True)
try:
    time.sleep(3600)
finally:
    client.deactivate()
    client.close()
"""


def _floor(repo: str, idle: float) -> dict:
    """The idle CPU of a client that JACK wakes every period and that does nothing, connected as the
    daemon is (a keyboard before it, a synth after it: JACK's clients wake the ones they feed):
    what being such a JACK client costs on this machine now, the floor under any daemon's figure."""
    env = dict(os.environ, PYTHONPATH=repo)
    name = f"rbfloor{uuid.uuid4().hex[:6]}"
    proc = subprocess.Popen([sys.executable, "-c", _FLOOR, name], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    meter = None
    try:
        line = proc.stdout.readline() if proc.stdout is not None else ""
        if line.strip() != "ready":
            return {"error": "the floor client did not start: " + (line + proc.stdout.read(500))[-500:]}
        meter = _Meter(f"{name}-meter")
        meter.client.connect(meter.out, f"{name}:in")
        meter.client.connect(f"{name}:out", meter.inp)
        return {"idle_cpu_percent": _idle_percent(proc.pid, idle)}
    finally:
        if meter is not None:
            meter.close()
        stop_child(proc, 5)


def _one(python: str, repo: str, adaptive: bool, idle: float, notes: int, rate: int, period: int,
         extra: Sequence[str] = ()) -> dict:
    """The daemon of ``repo`` (``extra``: more of its options) measured: idle CPU, note-on latency."""
    name = f"rb{uuid.uuid4().hex[:6]}"
    tmp = tempfile.mkdtemp(prefix="rbj")
    env = dict(os.environ, XDG_RUNTIME_DIR=tmp, XDG_CONFIG_HOME=tmp, PYTHONPATH=repo)
    args = [python, "-m", "retuner", "run", "--backend", "jack", "--virtual", "--client-name", name,
            "--no-control-socket", "--status-interval", "0", "--profile", "edo12"]
    if adaptive:
        args.append("--adaptive")
    args += list(extra)
    log = open(os.path.join(tmp, "daemon.log"), "wb")
    proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT, env=env, cwd=repo)
    meter = None
    fig: dict = {}
    try:
        meter = _Meter(f"{name}-meter")
        end = time.monotonic() + 30
        ins = outs = []
        while time.monotonic() < end:
            ins = [p.name for p in meter.client.get_ports(f"^{name}(-in|-out)?:", is_midi=True, is_input=True)]
            outs = [p.name for p in meter.client.get_ports(f"^{name}(-in|-out)?:", is_midi=True, is_output=True)]
            if ins and outs:
                break
            if proc.poll() is not None:
                break
            time.sleep(0.05)
        if not (ins and outs):
            log.flush()
            return {"error": "the daemon opened no ports: "
                    + open(os.path.join(tmp, "daemon.log"), errors="replace").read()[-500:]}
        meter.client.connect(meter.out, ins[0])
        meter.client.connect(outs[0], meter.inp)
        fig["ports"] = ins + outs
        fig["idle_cpu_percent"] = _idle_percent(proc.pid, idle)
        frames, periods, wall = [], [], []
        for i in range(notes):
            r = meter.note(48 + i % 36)
            if r is not None:
                frames.append(r[0])
                periods.append(r[1] / period)
                wall.append(r[2])
            time.sleep(0.05)
        fig["notes"] = notes
        fig["notes_back"] = len(frames)
        if frames:
            ms = sorted(1000.0 * f / rate for f in frames)
            fig["latency_ms"] = {"median": round(statistics.median(ms), 2), "max": round(ms[-1], 2)}
            fig["latency_periods"] = {"median": statistics.median(periods), "max": max(periods)}
            fig["wall_ms"] = {"median": round(1000 * statistics.median(wall), 2),
                              "max": round(1000 * max(wall), 2)}
    finally:
        if meter is not None:
            meter.close()
        stop_child(proc, 15)
        log.close()
        shutil.rmtree(tmp, ignore_errors=True)
    return fig


def jack_bench(*, idle: float = 10.0, notes: int = 50, against: Optional[str] = None,
               against_python: Optional[str] = None, turns: int = 1) -> dict:
    """Figures for this checkout (``new``) and, with ``against``, another one (``old``); with
    ``turns`` above 1 they take turns, every play measured ``turns`` times."""
    here = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    server = _Server()
    try:
        probe = jackmidi.open_client("retuner-bench-probe")
        rate, period = probe.samplerate, probe.blocksize
        probe.close()
        out: dict = {"server": os.environ.get("JACK_DEFAULT_SERVER", "default"), "sample_rate": rate,
                     "period_frames": period, "period_ms": round(1000.0 * period / rate, 3),
                     "idle_s": idle, "turns": turns}
        runs = [("new", sys.executable, here)]
        if against:
            runs.append(("old", against_python or sys.executable, os.path.abspath(against)))
        got: dict = {(label, play): [] for label, _, _ in runs for play in ("static", "adaptive")}
        floors: list = []
        for _ in range(turns):
            for label, python, repo in runs:
                for play in ("static", "adaptive"):
                    got[(label, play)].append(_one(python, repo, play == "adaptive", idle, notes, rate, period))
            if period_word(here) == "C":
                floors.append(_floor(here, idle))
        if floors:
            bad = [f for f in floors if "error" in f]
            out["floor"] = bad[0] if bad else _idle_turns(floors)
        for label, python, repo in runs:
            out[label] = {"repo": repo, "python": python, "period": period_word(repo)}
            for play in ("static", "adaptive"):
                out[label][play] = _merge(got[(label, play)])
        return out
    finally:
        server.stop()


def _idle_turns(figs: list) -> dict:
    """The median idle CPU of several turns, and each turn's."""
    turns = [f["idle_cpu_percent"] for f in figs]
    return {"idle_cpu_percent": round(statistics.median(turns), 3), "idle_cpu_turns": turns}


def _merge(figs: list) -> dict:
    """One play's turns as one figure: the median idle CPU (each turn's kept); of the latencies,
    the median of the turns' medians and the largest of their maxima."""
    bad = [f for f in figs if "error" in f]
    if bad:
        return bad[0]
    merged = dict(figs[0], **_idle_turns(figs))
    if len(figs) == 1:
        return merged
    merged["notes"] = sum(f["notes"] for f in figs)
    merged["notes_back"] = sum(f["notes_back"] for f in figs)
    for key in ("latency_ms", "latency_periods", "wall_ms"):
        have = [f[key] for f in figs if key in f]
        if have:
            merged[key] = {"median": round(statistics.median(h["median"] for h in have), 3),
                           "max": max(h["max"] for h in have)}
    return merged


def _idle_text(r: dict) -> str:
    turns = r.get("idle_cpu_turns", [])
    each = f" (turns: {' '.join(f'{t:g}' for t in turns)})" if len(turns) > 1 else ""
    return f"idle {r['idle_cpu_percent']:g} % of a core{each}"


def format_jack_bench(f: dict) -> str:
    lines = [f"JACK server {f['server']}: {f['sample_rate']} Hz, periods of {f['period_frames']} frames "
             f"({f['period_ms']} ms); idle measured over {f['idle_s']:g} s"]
    for label in ("old", "new"):
        if label not in f:
            continue
        for play in ("static", "adaptive"):
            r = f[label][play]
            if "error" in r:
                lines.append(f"{label} {play}: {r['error']}")
                continue
            lat = r.get("latency_ms")
            text = (f"note-on in->out median {lat['median']} ms = {r['latency_periods']['median']:g} periods "
                    f"(max {lat['max']} ms = {r['latency_periods']['max']:g}), wall clock median "
                    f"{r['wall_ms']['median']} ms" if lat else "no note-on came back")
            lines.append(f"{label} {play}: {_idle_text(r)}, periods in "
                         f"{f[label]['period']}; {text} ({r['notes_back']}/{r['notes']} notes); "
                         f"ports {', '.join(r['ports'])}")
    if "floor" in f:
        r = f["floor"]
        lines.append(f"floor: {_idle_text(r)}: a JACK client that does nothing each period, connected as "
                     f"the daemon is: what JACK costs such a client" if "error" not in r
                     else f"floor: {r['error']}")
    return "\n".join(lines)
