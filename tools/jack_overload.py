"""Panic and SIGTERM under a MIDI flood, measured through a real JACK server (dummy driver).

    python tools/jack_overload.py [--rate 10000] [--seconds 3] [--repo PATH]

Starts a private JACK server (``jackd --no-realtime -n NAME -d dummy -r 48000 -p 128``), a daemon
(``retuner run --backend jack --virtual``) from ``--repo`` (default: this checkout; give an older
checkout to compare), a sender that plays note-on/note-off pairs into the daemon at ``--rate``
messages a second and a receiver on its output. While the flood runs it times ``ctl panic`` (reply
received, 10 times), reads ``ctl status`` (dropped input), and then times SIGTERM to exit. Prints
one JSON object. Figures, not a test: they depend on the machine and its load.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid

import rtmidi

HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(HERE, "tests"))
sys.path.insert(0, HERE)

from jack import JackServer  # noqa: E402  (tests/jack.py: the server helper the tests use)
from retuner.control.client import ControlClient, NoDaemon  # noqa: E402


def rss_kb(pid: int) -> int:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rate", type=float, default=10000.0)
    ap.add_argument("--seconds", type=float, default=3.0)
    ap.add_argument("--repo", default=HERE)
    ap.add_argument("--held", type=int, default=0, metavar="N",
                    help="keep N notes held under the flood (the pool busy, every note-on a steal)")
    ap.add_argument("daemon_args", nargs="*", help="more options for 'retuner run' (after --), e.g. --adaptive")
    a = ap.parse_args()
    name = f"ovl-{uuid.uuid4().hex[:6]}"
    server = JackServer(name)
    server.start()
    os.environ.update(JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1")
    tmp = tempfile.mkdtemp(prefix="ovl")
    sock = os.path.join(tmp, "c.sock")
    client = f"rt{uuid.uuid4().hex[:4]}"
    env = dict(server.env, XDG_RUNTIME_DIR=tmp, PYTHONPATH=a.repo)
    log = open(os.path.join(tmp, "daemon.log"), "wb")
    proc = subprocess.Popen([sys.executable, "-m", "retuner", "run", "--backend", "jack", "--virtual",
                             "--client-name", client, "--control-socket", sock, "--status-interval", "0",
                             "--profile", "edo12", *a.daemon_args], stdout=log, stderr=subprocess.STDOUT, env=env, cwd=a.repo)
    out = {"rate": a.rate, "repo": a.repo}
    try:
        in_port = server.wait_port(lambda p: p.startswith(client) and p.endswith(":in"), 20)
        out_port = server.wait_port(lambda p: p.startswith(client) and p.endswith(":out"), 20)
        end = time.monotonic() + 20
        while not os.path.exists(sock):
            assert time.monotonic() < end, "no control socket"
            time.sleep(0.05)
        sender = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, f"{name}-send")
        sender.open_virtual_port("play")
        receiver = rtmidi.MidiIn(rtmidi.API_UNIX_JACK, f"{name}-rec", 65536)
        receiver.open_virtual_port("rec")
        received = [0]
        stop_rec = threading.Event()

        def drain():
            while not stop_rec.is_set():
                if receiver.get_message() is None:
                    time.sleep(0.001)
                else:
                    received[0] += 1
        threading.Thread(target=drain, daemon=True).start()
        server.connect(f"{name}-send:play", in_port)
        server.connect(out_port, f"{name}-rec:rec")
        out["rss_start_kb"] = rss_kb(proc.pid)
        stop = threading.Event()
        sent = [0]

        for k in range(a.held):
            sender.send_message([0x90 | (k % 8), 30 + k % 60, 80])
        def flood():
            t0 = time.perf_counter()
            i = 0
            while not stop.is_set():
                due = int((time.perf_counter() - t0) * a.rate) - sent[0]
                for _ in range(max(0, due)):
                    ch, key = i % 8, 91 + (i // 16) % 30
                    on = i % 2 == 0
                    sender.send_message([(0x90 if on else 0x80) | ch, key, 90 if on else 0])
                    i += 1
                    sent[0] += 1
                time.sleep(0.0005)
        flood_t0 = time.perf_counter()
        th = threading.Thread(target=flood, daemon=True)
        th.start()
        time.sleep(a.seconds)
        panic = []
        for _ in range(10):
            t0 = time.perf_counter()
            try:
                with ControlClient(sock, timeout=60) as c:
                    r = c.request("panic")
                panic.append(time.perf_counter() - t0 if r.get("ok") else float("nan"))
            except (NoDaemon, OSError) as exc:
                panic.append(float("nan"))
                out["panic_error"] = repr(exc)
            time.sleep(0.2)
        out["panic_ms"] = {"median": round(1000 * statistics.median(panic), 2),
                           "max": round(1000 * max(panic), 2), "all": [round(1000 * x, 2) for x in panic]}
        try:
            with ControlClient(sock, timeout=60) as c:
                st = c.request("status")
            out["input_dropped"] = st.get("input_dropped")
            out["notes"] = st.get("stats", {}).get("notes")
        except (NoDaemon, OSError) as exc:
            out["status_error"] = repr(exc)
        out["rss_flood_kb"] = rss_kb(proc.pid)
        out["sent"] = sent[0]
        out["sent_rate"] = round(sent[0] / (time.perf_counter() - flood_t0))
        t0 = time.perf_counter()
        proc.send_signal(signal.SIGTERM)
        try:
            rc = proc.wait(120)
        except subprocess.TimeoutExpired:
            rc = None
        out["sigterm_s"] = round(time.perf_counter() - t0, 3)
        out["exit_status"] = rc
        stop.set()
        stop_rec.set()
        out["received"] = received[0]
        out["overload_lines"] = sum("input overload" in l for l in open(os.path.join(tmp, "daemon.log"),
                                                                          errors="replace"))
    finally:
        if proc.poll() is None:
            proc.kill()
        server.stop()
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
