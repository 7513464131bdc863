"""retuner's ALSA ports seen through PipeWire's ALSA sequencer bridge, gathered inside the virtual
machine of tests/alsavm.py and printed as one JSON object for tests/live/test_pipewire_alsa_bridge.py.

Run as ``python tests/pwbridgeprobe.py`` from the checkout, on a machine with ``/dev/snd/seq`` and
PipeWire installed. Like tests/alsaprobe.py it observes and records, and judges nothing.

What it does: starts a PipeWire server of its own, with no session manager, from the system's
``pipewire.conf`` plus one drop-in (``pipewire.conf.d``) that makes the bridge node, the SPA factory
``api.alsa.seq.bridge`` (the alsa plugin of libspa-0.2-modules, which libpipewire-0.3-0 depends on) named
``Midi-Bridge`` as WirePlumber names it; then ``retuner run --virtual --backend alsa``. Steps:
- ``server``: PipeWire's version, whether the bridge node came up (``pw-cli ls Node``);
- ``ports``: retuner's ALSA ports as PipeWire shows them: ``pw-cli ls Port`` (every property),
  ``pw-link -o``/``-i`` (PipeWire's names of ports that send/receive), ``jack_lsp`` through
  ``pw-jack`` (JACK's names), and ``aconnect -l`` (the ALSA side);
- ``notes``: a JACK client (python-rtmidi's JACK API on PipeWire's libjack, preloaded, in a process
  of its own) whose ports ``pw-link`` links to the bridge's ports for ``retuner:in`` and
  ``retuner:out``; it plays E4 and C4 one after the other after a pause longer than the daemon's
  set-up refresh, and records what comes back.
"""

from __future__ import annotations

import glob
import json
import os
import shutil
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
sys.path.insert(0, HERE)

from alsalisting import pw_objects  # noqa: E402
from alsaprobe import PROFILE, REFRESH_PAUSE, Daemon, step, tool  # noqa: E402
from retuner.bench.jacklive import stop_child  # noqa: E402

BRIDGE = "Midi-Bridge"
DROP_IN = """context.objects = [
    { factory = spa-node-factory
        args = { factory.name = api.alsa.seq.bridge node.name = %s api.alsa.disable-longname = true }
    }
]
""" % BRIDGE
WAIT = 60.0                  # seconds, for things to show up under emulation

# The JACK client, in a process of its own (PipeWire's libjack preloaded; python-rtmidi's wheel brings
# its own libjack otherwise): ports pwbkeys:play and pwbkeys-rec:record (tests/jack.py's TestClient).
# Prints "ready"; on "play" plays and releases E4 then C4 (each released once its note-on came back),
# then prints one JSON object: what it played and what it received, as hex.
PLAYER = r"""
import json, sys, time
sys.path.insert(0, sys.argv[1])
import mido
from jack import TestClient
c = TestClient("pwbkeys")
print("ready", flush=True)
sys.stdin.readline()
played = []
def ons(k):
    return lambda got: any(r.msg.type == "note_on" and r.msg.note == k and r.msg.velocity for r in got)
def offs(got):
    return sum(1 for r in got if r.msg.type == "note_off" or (r.msg.type == "note_on" and not r.msg.velocity)) >= 2
error = None
try:
    for k in (64, 60):
        for m in (mido.Message("note_on", note=k, velocity=100), mido.Message("note_off", note=k)):
            played.append(m.hex())
            c.send(m)
            c.wait_for(ons(k), timeout=20) if m.type == "note_on" else None
    c.wait_for(offs, timeout=20)
except AssertionError as exc:
    error = str(exc)
time.sleep(0.3)
print(json.dumps({"played": played, "received": [[r.t, r.msg.hex()] for r in c.messages()], "error": error}),
      flush=True)
c.close()
"""


def pipewire_libjack():
    found = sorted(glob.glob("/usr/lib/*/pipewire-0.3/jack/libjack.so.0"))
    return found[0] if found else None


def run(*argv, env, timeout=60):
    if shutil.which(argv[0]) is None:
        return {"returncode": None, "stdout": "", "stderr": f"{argv[0]} is not installed"}
    r = subprocess.run(list(argv), capture_output=True, text=True, timeout=timeout, env=env)
    return {"returncode": r.returncode, "stdout": r.stdout, "stderr": r.stderr}


def wait_until(fn, timeout=WAIT):
    end = time.monotonic() + timeout
    while True:
        value = fn()
        if value or time.monotonic() > end:
            return value
        time.sleep(0.2)


class PipeWire:
    def __init__(self, env, work):
        self.log_path = os.path.join(work, "pipewire.log")
        self._log = open(self.log_path, "wb")
        self.proc = subprocess.Popen(["pipewire"], env=env, stdout=self._log, stderr=subprocess.STDOUT)

    def log(self):
        with open(self.log_path, errors="replace") as fh:
            return fh.read()

    def stop(self):
        stop_child(self.proc, 20)             # SIGTERM, then SIGKILL after 20 s
        self._log.close()


def server(env, pw):
    out = {"version": run("pipewire", "--version", env=env)["stdout"],
           "spa_alsa": sorted(glob.glob("/usr/lib/*/spa-0.2/alsa/libspa-alsa.so"))}

    def bridge_node():
        if pw.proc.poll() is not None:
            return "exited"
        r = run("pw-cli", "ls", "Node", env=env)
        nodes = pw_objects(r["stdout"])
        return [n for n in nodes if n.get("node.name") == BRIDGE]

    found = wait_until(bridge_node)
    out["bridge_node"] = found if found != "exited" else []
    out["pipewire_exited"] = pw.proc.poll()
    out["nodes"] = run("pw-cli", "ls", "Node", env=env)
    return out


def ports(env, d):
    out = {"ready_after": d.ready_after}
    if d.ready_after is None:
        return out

    def shown():
        r = run("pw-cli", "ls", "Port", env=env)
        seen = [p for p in pw_objects(r["stdout"]) if p.get("port.alias", "").startswith("retuner:")]
        return seen if len(seen) >= 2 else None

    wait_until(shown)
    out["pw_cli_ports"] = pw_objects(run("pw-cli", "ls", "Port", env=env)["stdout"])
    out["pw_link_o"] = run("pw-link", "-o", env=env)
    out["pw_link_i"] = run("pw-link", "-i", env=env)
    out["jack_lsp"] = run("pw-jack", "jack_lsp", "-t", env=env)
    out["aconnect_l"] = tool("aconnect", "-l")
    return out


def notes(env, d, seen):
    out = {}
    by_alias = {p.get("port.alias"): p for p in seen["ports"]["pw_cli_ports"]}
    bridge_in, bridge_out = by_alias["retuner:in"], by_alias["retuner:out"]
    preload = dict(env, LD_PRELOAD=pipewire_libjack() or "")
    player = subprocess.Popen([sys.executable, "-c", PLAYER, HERE], env=preload, stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        out["player_ready"] = player.stdout.readline().strip()
        if out["player_ready"] != "ready":
            out["player_stderr"] = player.stderr.read()
            return out
        # PipeWire's names of the bridge's ports: "node.name:port.name"
        out["link_in"] = run("pw-link", "pwbkeys:play", f"{BRIDGE}:{bridge_in['port.name']}", env=env)
        out["link_out"] = run("pw-link", f"{BRIDGE}:{bridge_out['port.name']}", "pwbkeys-rec:record", env=env)
        out["links"] = run("pw-link", "-l", env=env)
        out["aconnect_l"] = tool("aconnect", "-l")
        # the set-up went out when the daemon started, before the links; the daemon sends it again
        # before the first note after a pause
        time.sleep(max(0.0, REFRESH_PAUSE - (time.monotonic() - d.started - d.ready_after)))
        player.stdin.write("play\n")
        player.stdin.flush()
        stdout, stderr = player.communicate(timeout=120)
        out["player"] = json.loads(stdout.strip().splitlines()[-1]) if stdout.strip() else None
        out["player_stderr"] = stderr[-4000:]
        out["player_returncode"] = player.returncode
    finally:
        if player.poll() is None:
            player.kill()
            player.wait(10)
    return out


def main():
    work = "/tmp/pwbridgeprobe"
    os.makedirs(work, exist_ok=True)
    env = {k: v for k, v in os.environ.items()
           if not k.startswith(("JACK_", "NOTIFY_", "JOURNAL_", "PIPEWIRE_", "LD_PRELOAD"))}
    env["XDG_CONFIG_HOME"] = os.path.join(work, "config")     # no user config; PipeWire's drop-in
    env["XDG_RUNTIME_DIR"] = os.path.join(work, "run")
    env["JACK_NO_START_SERVER"] = "1"
    os.makedirs(env["XDG_RUNTIME_DIR"], mode=0o700, exist_ok=True)
    drop_in = os.path.join(env["XDG_CONFIG_HOME"], "pipewire", "pipewire.conf.d")
    os.makedirs(drop_in, exist_ok=True)
    with open(os.path.join(drop_in, "seq-bridge.conf"), "w") as fh:
        fh.write(DROP_IN)
    report = {"drop_in": DROP_IN}
    pw = PipeWire(env, work)
    d = None
    try:
        step(report, "server", lambda: server(env, pw))
        d = Daemon(["--virtual", "--backend", "alsa", "--profile", PROFILE, "--no-control-socket", "-v"],
                   env, os.path.join(work, "daemon.log"))
        step(report, "ports", lambda: ports(env, d))
        if "ports" in report and report["ports"].get("pw_cli_ports"):
            step(report, "notes", lambda: notes(env, d, report))
        report["daemon_returncode"] = d.stop()
        report["daemon_log"] = d.log()[-6000:]
    finally:
        if d is not None:
            d.stop()
        pw.stop()
        report["pipewire_log"] = pw.log()[-6000:]
    json.dump(report, sys.stdout)


if __name__ == "__main__":
    main()
