"""``retuner run`` through a real JACK server, wired to a test client (tests/jack.py), with its
readiness read from a notify socket (sd_notify(3)) and what it sent counted as a synth would
(MIDI 1.0: a note-on with velocity 0 is a note-off). The ``runs`` fixture (conftest.py) stops
every run a test started."""

from __future__ import annotations

import uuid

from jack import Daemon, NotifySocket, TestClient


class Run:
    """One daemon with its notify socket, wired to a test client."""

    def __init__(self, jack_server, tmp_path, args, *, env_extra=None, wire_in=True, wire_out=True,
                 client: TestClient | None = None):
        self.server = jack_server
        self.client_name = f"retuner-t{uuid.uuid4().hex[:6]}"
        self.notify = NotifySocket(str(tmp_path / f"notify-{uuid.uuid4().hex[:6]}.sock"))
        env = dict(jack_server.env)
        env["NOTIFY_SOCKET"] = self.notify.path
        env["XDG_CONFIG_HOME"] = str(tmp_path / "xdg-config")     # no user config, no user profiles
        env.pop("JOURNAL_STREAM", None)
        env.update(env_extra or {})
        self.daemon = Daemon(["--backend", "jack", "--client-name", self.client_name,
                              "--no-control-socket", "-v", *args],
                             env, str(tmp_path / f"{self.client_name}.log"))
        try:
            self.notify.wait_for("READY=1", timeout=15)
        except AssertionError:
            self.daemon.stop()
            raise AssertionError("daemon never became ready:\n" + self.daemon.log()[-3000:])
        self.in_port = f"{self.client_name}:in"
        self.out_port = f"{self.client_name}:out"
        if client is not None:
            if wire_in:
                jack_server.connect(client.out_full, self.in_port)
            if wire_out:
                jack_server.connect(self.out_port, client.in_full)

    def stop(self):
        rc = self.daemon.stop()
        self.notify.close()
        return rc


def note_ons(recs):
    return [r for r in recs if r.msg.type == "note_on" and r.msg.velocity > 0]


def note_offs(recs):
    return [r for r in recs if r.msg.type == "note_off" or (r.msg.type == "note_on" and r.msg.velocity == 0)]
