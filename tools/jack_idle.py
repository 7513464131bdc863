"""Idle cost and note latency of the daemon under JACK (dummy driver), in one run.

    python tools/jack_idle.py [--repo PATH] [--idle 10] [--notes 100]

Starts a private JACK server (``jackd --no-realtime -n NAME -d dummy -r 48000 -p 128``) and a daemon
(``retuner run --backend jack --virtual``) from ``--repo`` (default: this checkout), lets it idle and
reads its CPU time from /proc/PID/stat (utime + stime, in clock ticks) over ``--idle`` seconds, then
plays ``--notes`` note-on/note-off pairs 50 ms apart and measures the time from sending a note-on
to receiving it back from the daemon (a test client's own clock; JACK delivers once per period, so
about one period of that is JACK's). Prints one JSON object. Figures, not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
import uuid

HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(HERE, "tests"))

import mido  # noqa: E402

from jack import JackServer, TestClient  # noqa: E402  (tests/jack.py)


def cpu_ticks(pid: int) -> int:
    with open(f"/proc/{pid}/stat") as fh:
        fields = fh.read().rsplit(")", 1)[1].split()
    return int(fields[11]) + int(fields[12])          # utime, stime (proc(5))


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repo", default=HERE)
    ap.add_argument("--idle", type=float, default=10.0)
    ap.add_argument("--notes", type=int, default=100)
    a = ap.parse_args()
    name = f"idle-{uuid.uuid4().hex[:6]}"
    server = JackServer(name)
    server.start()
    os.environ.update(JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1")
    tmp = tempfile.mkdtemp(prefix="idl")
    client_name = f"rt{uuid.uuid4().hex[:4]}"
    env = dict(server.env, XDG_RUNTIME_DIR=tmp, PYTHONPATH=a.repo)
    log = open(os.path.join(tmp, "daemon.log"), "wb")
    proc = subprocess.Popen([sys.executable, "-m", "retuner", "run", "--backend", "jack", "--virtual",
                             "--client-name", client_name, "--no-control-socket", "--status-interval", "0",
                             "--profile", "edo12"], stdout=log, stderr=subprocess.STDOUT, env=env, cwd=a.repo)
    out: dict = {"repo": a.repo}
    client = None
    try:
        in_port = server.wait_port(lambda p: p.startswith(client_name) and p.endswith(":in"), 20)
        out_port = server.wait_port(lambda p: p.startswith(client_name) and p.endswith(":out"), 20)
        client = TestClient(f"{name}-tc")
        server.connect(client.out_full, in_port)
        server.connect(out_port, client.in_full)
        time.sleep(2.0)                                   # settle after start-up
        hz = os.sysconf("SC_CLK_TCK")
        c0, t0 = cpu_ticks(proc.pid), time.monotonic()
        time.sleep(a.idle)
        c1, t1 = cpu_ticks(proc.pid), time.monotonic()
        out["idle_cpu_percent"] = round(100.0 * (c1 - c0) / hz / (t1 - t0), 2)
        lat = []
        for i in range(a.notes):
            key = 48 + i % 36
            client.clear()
            sent = client.send(mido.Message("note_on", note=key, velocity=80))
            got = client.wait_for(lambda r: any(x.msg.type == "note_on" and x.msg.velocity for x in r), 5)
            arrived = next(x.t for x in got if x.msg.type == "note_on" and x.msg.velocity)
            lat.append(arrived - sent)
            client.send(mido.Message("note_off", note=key))
            time.sleep(0.05)
        lat.sort()
        out["latency_ms"] = {"median": round(1000 * statistics.median(lat), 2),
                             "p90": round(1000 * lat[int(0.9 * (len(lat) - 1))], 2),
                             "max": round(1000 * lat[-1], 2), "n": len(lat)}
    finally:
        if client is not None:
            client.close()
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
        server.stop()
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
