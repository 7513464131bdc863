"""Port listing, name matching and opening through a real JACK server (no mocks of ports)."""

from __future__ import annotations

import subprocess
import sys
import time

import mido
import pytest

from retuner.live import ports


def test_match_port_rules():
    names = ["Midi Through:Midi Through Port-0 14:0",
             "Digital Piano:Digital Piano MIDI 1 20:0",
             "retuner-in:in 130:0",
             "FLUID Synth (1234):Synth input port (1234:0) 128:0"]
    # 1. exact
    assert ports.match_port("Digital Piano:Digital Piano MIDI 1 20:0", names) == names[1]
    # 2. without ALSA's client:port numbers
    assert ports.match_port("Digital Piano:Digital Piano MIDI 1", names) == names[1]
    # 3. shell pattern, any case
    assert ports.match_port("fluid*", names) == names[3]
    assert ports.match_port("*piano*", names) == names[1]
    # 4. part of the name, any case
    assert ports.match_port("synth input", names) == names[3]
    assert ports.match_port("nothing here", names) is None
    # our own ports never match
    assert ports.match_port("retuner", names, exclude=["retuner-"]) is None
    assert ports.match_port("retuner", names) == names[2]


def test_backend_words():
    assert ports.backend_word("jack") == "jack"
    assert ports.backend_word("mido.backends.rtmidi/UNIX_JACK") == "jack"
    assert ports.backend_word("mido.backends.rtmidi/LINUX_ALSA") == "alsa"
    from retuner.errors import RetunerError
    with pytest.raises(RetunerError):
        ports.backend_word("coreaudio")


def test_open_list_and_carry_messages(jack_server, jack_client):
    got = []
    backend = ports.make_backend("jack", "rt-test")      # one JACK client, ports in and out
    inp = backend.open_input("rt-test", "in", connect_to=None, callback=got.append)
    out = backend.open_output("rt-test", "out", connect_to=None)
    try:
        listed_in, listed_out = ports.list_ports("jack")
        assert jack_client.out_full in listed_in          # we can read from the client's output
        assert "rt-test:in" in listed_out              # others can write to our input
        assert "rt-test:out" in listed_in
        jack_server.connect(jack_client.out_full, "rt-test:in")
        jack_server.connect("rt-test:out", jack_client.in_full)
        jack_client.send(mido.Message("note_on", note=60, velocity=99, channel=3))
        sysex = mido.Message("sysex", data=[0x7E, 0x7F, 0x09, 0x01])
        jack_client.send(sysex)
        end = time.monotonic() + 5
        while len(got) < 2 and time.monotonic() < end:
            time.sleep(0.01)
        assert got[0] == mido.Message("note_on", note=60, velocity=99, channel=3)
        assert got[1] == sysex
        out.send(mido.Message("pitchwheel", pitch=-8192, channel=15))
        rec = jack_client.wait_for(lambda r: len(r) >= 1)
        assert rec[0].msg == mido.Message("pitchwheel", pitch=-8192, channel=15)
    finally:
        inp.close()
        out.close()
        backend.close()


def test_open_by_name_connects(jack_server, jack_client):
    names = ports.list_ports("jack")[0]
    spec = jack_client.client_name + ":pl*"
    name = ports.match_port(spec, names)
    assert name == jack_client.out_full
    got = []
    backend = ports.make_backend("jack", "rt-named")
    inp = backend.open_input("rt-named", "in", connect_to=name, callback=got.append)
    try:
        assert "rt-named:in" in jack_server.connections(jack_client.out_full)
        jack_client.send(mido.Message("control_change", control=64, value=127))
        end = time.monotonic() + 5
        while not got and time.monotonic() < end:
            time.sleep(0.01)
        assert got == [mido.Message("control_change", control=64, value=127)]
    finally:
        inp.close()
        backend.close()


def test_ports_command_lists_both_directions(jack_server, jack_client):
    r = subprocess.run([sys.executable, "-m", "retuner", "ports", "--backend", "jack"],
                       env=jack_server.env, capture_output=True, text=True, timeout=20)
    assert r.returncode == 0, r.stderr
    text = r.stdout
    sources, rest = text.split("\ndestinations", 1)
    destinations = rest.split("\nretuner's own", 1)[0]
    assert jack_client.out_full in sources and jack_client.in_full not in sources
    assert jack_client.in_full in destinations and jack_client.out_full not in destinations


def test_no_midi_system_is_exit_1_not_2(tmp_path):
    # a JACK server that is not running: an environment problem a service manager may retry
    # (exit 1, Restart=on-failure), not a mistake in the config (exit 2, RestartPreventExitStatus=2)
    import os
    env = dict(os.environ, JACK_DEFAULT_SERVER=f"nobody-{os.getpid()}", JACK_NO_START_SERVER="1",
               XDG_CONFIG_HOME=str(tmp_path))
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--backend", "jack", "--virtual",
                        "--no-control-socket"], capture_output=True, text=True, timeout=30, env=env)
    assert r.returncode == 1, r.stderr
    last = r.stderr.strip().splitlines()[-1]
    assert last.startswith("retuner: backend: cannot open the jack MIDI system")
