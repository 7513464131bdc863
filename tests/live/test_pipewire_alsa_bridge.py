"""retuner's ALSA ports (alsa-midi, one client) through PipeWire's ALSA sequencer bridge, with a real
PipeWire server and a real sequencer, in the small virtual machine of tests/alsavm.py.
tests/pwbridgeprobe.py runs inside and records what happened; the checks are here.

Values compared with come from outside retuner: the ALSA side as alsa-utils' ``aconnect`` prints it
(client number, ports 0 ``in`` and 1 ``out``), the names README.md states for PipeWire's side,
quarter-comma meantone from its published definition (tests/temperaments.py), and MIDI 1.0 decoding
(tests/jack.py ``Decoder``: 14-bit pitch bend centred at 8192, RPN 0 pitch bend sensitivity, default
range 2 semitones). A missing qemu, kernel, busybox or PipeWire fails the tests: nothing is skipped.
"""

from __future__ import annotations

import os
import re

import mido
import pytest

import alsavm
from alsalisting import REPO, aconnect_clients, aconnect_numbers, readme_test_command
from jack import Received, decode
from temperaments import assert_bent_to_meantone


@pytest.fixture(scope="module")
def seen():
    """The probe's report, from one boot of the machine for the whole module."""
    return alsavm.probe_report("pwbridgeprobe.py", REPO)


def part(seen, name):
    return alsavm.part(seen, name, f"; PipeWire's log:\n{seen.get('pipewire_log')}")


def readme_bridge_names() -> list[str]:
    """The names README.md says PipeWire shows for retuner:in and retuner:out."""
    text = open(os.path.join(REPO, "README.md"), encoding="utf-8").read()
    m = re.search(r"shows the ports as `([^`]+)` and\s+`([^`]+)`, with the aliases `([^`]+)` and `([^`]+)`", text)
    assert m, "README.md no longer states the bridge's names where this test looks for them"
    return list(m.groups())


def retuner_ports(seen) -> dict[str, dict]:
    """PipeWire's ports (pw-cli ls Port) whose alias is one of retuner's ALSA ports, by alias."""
    return {p["port.alias"]: p for p in part(seen, "ports")["pw_cli_ports"]
            if p.get("port.alias", "").startswith("retuner:")}


def test_the_bridge_node_runs_on_debians_pipewire(seen):
    server = part(seen, "server")
    assert server["pipewire_exited"] is None, seen["pipewire_log"]
    assert server["spa_alsa"], "PipeWire's alsa plugin is missing (libspa-0.2-modules)"
    assert len(server["bridge_node"]) == 1, server["nodes"]["stdout"] + seen["pipewire_log"]


def test_retuners_alsa_ports_show_up_in_pipewires_graph_as_readme_names_them(seen):
    ports = part(seen, "ports")
    assert ports["ready_after"] is not None, "the daemon never said READY=1:\n" + seen["daemon_log"]
    # the ALSA side (alsa-utils): client retuner, ports 0 in and 1 out
    assert aconnect_clients(ports["aconnect_l"]).get("retuner") == ["in", "out"], ports["aconnect_l"]
    client = aconnect_numbers(ports["aconnect_l"])["retuner"]
    in_full, out_full, in_alias, out_alias = readme_bridge_names()
    found = retuner_ports(seen)
    # README.md gives the names PipeWire 0.3.65 shows: another version may name them otherwise
    version = part(seen, "server")["version"].strip().replace("\n", "; ")
    assert sorted(found) == sorted([in_alias, out_alias]), (version, ports["pw_cli_ports"])
    p_in, p_out = found[in_alias], found[out_alias]
    # PipeWire sends into retuner's ALSA port 0 and takes from its port 1, on the bridge node
    assert p_in["port.direction"] == "in" and p_out["port.direction"] == "out"
    assert p_in["object.path"].endswith(f":client_{client}:playback_0"), p_in
    assert p_out["object.path"].endswith(f":client_{client}:capture_1"), p_out
    bridge_id = part(seen, "server")["bridge_node"][0]["id"]
    assert p_in["node.id"] == p_out["node.id"] == bridge_id
    # the full names README.md gives: in pw-link's lists of input and output ports, and to JACK programs
    inputs = ports["pw_link_i"]["stdout"].splitlines()
    outputs = ports["pw_link_o"]["stdout"].splitlines()
    assert in_full in inputs and in_full not in outputs, (version, inputs)
    assert out_full in outputs and out_full not in inputs, (version, outputs)
    jack_names = [n for n in ports["jack_lsp"]["stdout"].splitlines() if not n.startswith("\t")]
    assert ports["jack_lsp"]["returncode"] == 0, ports["jack_lsp"]["stderr"]
    assert in_full in jack_names and out_full in jack_names, jack_names


def test_a_note_from_a_jack_client_through_the_bridge_comes_back_in_quarter_comma_meantone(seen):
    run = part(seen, "notes")
    assert run["player_ready"] == "ready", run.get("player_stderr")
    in_full, out_full, _, _ = readme_bridge_names()
    assert run["link_in"]["returncode"] == 0, run["link_in"]
    assert run["link_out"]["returncode"] == 0, run["link_out"]
    # pw-link -l: our JACK client's port feeds retuner:in, retuner:out feeds our recorder
    links = run["links"]["stdout"]
    assert f"pwbkeys:play\n  |-> {in_full}" in links, links
    assert f"pwbkeys-rec:record\n  |<- {out_full}" in links, links
    # the ALSA side: PipeWire's own sequencer client now sends to retuner's port 0 and hears its port 1
    text = run["aconnect_l"]
    numbers = aconnect_numbers(text)
    retuner_block = text.split(f"client {numbers['retuner']}:")[1].split("\nclient ")[0]
    pipewire_clients = [n for name, n in numbers.items() if name.startswith("PipeWire")]
    assert any(f"Connected From: {n}:" in retuner_block.split("'out")[0] for n in pipewire_clients), text
    assert any(f"Connecting To: {n}:" in retuner_block.split("'out")[1] for n in pipewire_clients), text
    player = run["player"]
    assert player is not None and player["error"] is None, (player, run.get("player_stderr"),
                                                            seen["daemon_log"])
    received = [Received(t, mido.Message.from_hex(h)) for t, h in player["received"]]
    msgs = [r.msg for r in received]
    d = decode(received)
    played = [mido.Message.from_hex(h) for h in player["played"]]
    keys = [m.note for m in played if m.type == "note_on"]
    assert sorted(keys) == [60, 64], msgs
    assert_bent_to_meantone(d, msgs, keys)        # the set-up came again before the first note after the pause
    assert not d.stuck(), [(n.key, n.channel) for n in d.stuck()]
    assert seen["daemon_returncode"] == 0, seen["daemon_log"]


def test_readme_test_command_installs_what_the_bridge_test_needs():
    # pipewire (with pipewire-bin's pw-cli and pw-link, and libspa-0.2-modules' alsa plugin, which
    # libpipewire-0.3-0 depends on), pipewire-jack (pw-jack, PipeWire's libjack), jackd2 (jack_lsp)
    words = readme_test_command()
    assert "--no-install-recommends" in words
    missing = [p for p in alsavm.PACKAGES.split() + ["alsa-utils", "pipewire", "pipewire-jack", "jackd2"]
               if p not in words]
    assert not missing, missing
