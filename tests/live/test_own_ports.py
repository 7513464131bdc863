"""retuner's own ports: named alike on both MIDI systems, as the README names them, and told apart
from the sources and destinations a user connects in ``retuner ports``.

The names are checked against what the JACK server itself lists (``jack_lsp``, from jackd2)."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import uuid
from pathlib import Path

from retuner.live import ports
from retuner.live.alsaseq import AlsaSeqBackend
from retuner.live.jackmidi import JackBackend
from retuner.live.ports import RtMidiBackend

README = (next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file()) / "README.md").read_text()


def test_client_names_one_client_on_both_one_per_side_through_python_rtmidi():
    # alsa-midi and JACK-Client: one client with both ports; python-rtmidi (the ALSA fallback) opens a
    # client per port
    alsa, jack, fallback = AlsaSeqBackend(), JackBackend(), RtMidiBackend("alsa")   # none opens anything yet
    for side in ("in", "out"):
        assert alsa.client_name("retuner", side) == jack.client_name("retuner", side) == "retuner"
        assert fallback.client_name("retuner", side) == f"retuner-{side}"
    assert ports.make_backend("alsa").__class__ is AlsaSeqBackend      # alsa-midi loads here


def test_the_readme_names_the_ports_as_they_are():
    named = set(re.findall(r"`(retuner[-\w]*:\w+)`", README))
    assert {"retuner:in", "retuner:out"} == named, named


def test_ports_tells_our_own_ports_from_what_a_user_connects(jack_server, jack_client, tmp_path):
    # a daemon's own ports, opened as the daemon opens them (its backend names the clients)
    name = f"own{uuid.uuid4().hex[:6]}"
    backend = JackBackend()
    inp = backend.open_input(backend.client_name(name, "in"), "in", connect_to=None, callback=lambda m: None)
    out = backend.open_output(backend.client_name(name, "out"), "out", connect_to=None)
    env = dict(jack_server.env, XDG_CONFIG_HOME=str(tmp_path), XDG_RUNTIME_DIR=str(tmp_path))
    try:
        ours_in = jack_server.wait_port(f"{name}:in")
        ours_out = jack_server.wait_port(f"{name}:out")
        assert {ours_in, ours_out} <= set(jack_server.lsp())
        r = subprocess.run([sys.executable, "-m", "retuner", "ports", "--client-name", name, "--json"],
                           env=env, capture_output=True, text=True, timeout=30)
        assert r.returncode == 0, r.stderr
        listed = json.loads(r.stdout)
        assert listed["own_in"] == [ours_in] and listed["own_out"] == [ours_out]
        assert jack_client.out_full in listed["sources"] and ours_out not in listed["sources"]
        assert jack_client.in_full in listed["destinations"] and ours_in not in listed["destinations"]
        text = subprocess.run([sys.executable, "-m", "retuner", "ports", "--client-name", name],
                              env=env, capture_output=True, text=True, timeout=30).stdout
        own = text.split("retuner's own ports", 1)[1]
        assert f"{ours_in}  <- connect a source" in own and f"{ours_out}  -> connect it to a destination" in own
    finally:
        inp.close()
        out.close()
        backend.close()
