"""retuner's ALSA backend (alsa-midi on the ALSA sequencer: one client) on a real sequencer, in a small
virtual machine with Debian's kernel and its sequencer modules (tests/alsavm.py): this machine's own
kernel may have none. tests/alsaprobe.py runs inside and records what happened; the checks are here.

Values compared with come from outside retuner: the ALSA names python-rtmidi and alsa-utils'
``aconnect`` print, the port names README.md states, the sequencer's "Midi Through" client that the
kernel's snd-seq-dummy module makes, quarter-comma meantone from its published definition
(tests/temperaments.py), and MIDI 1.0 decoding (tests/jack.py ``Decoder``: 14-bit pitch bend centred
at 8192, RPN 0 pitch bend sensitivity, default range 2 semitones; a note-on with velocity 0 and All
Notes Off end notes). A missing qemu, kernel or busybox fails the tests: nothing is skipped.
"""

from __future__ import annotations

import json
import os
import re

import mido
import pytest

import alsavm
from alsalisting import aconnect_clients, readme_test_command
from jack import Decoder
from temperaments import MEANTONE, assert_bent_to_meantone, half_step

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
THROUGH = "Midi Through"        # the client snd-seq-dummy makes (Linux sound/core/seq/seq_dummy.c)


@pytest.fixture(scope="module")
def seen():
    """The probe's report, from one boot of the machine for the whole module."""
    return alsavm.probe_report("alsaprobe.py", REPO)


def part(seen, name):
    return alsavm.part(seen, name)


def readme_alsa_names() -> list[str]:
    text = open(os.path.join(REPO, "README.md"), encoding="utf-8").read()
    m = re.search(r"On both, retuner is one client with two ports, `([^`]+)` and `([^`]+)`", text)
    assert m, "README.md no longer states the ALSA port names where this test looks for them"
    return [m.group(1), m.group(2)]


def decoded(received) -> tuple[Decoder, list]:
    d = Decoder()
    msgs = []
    for t, data in received:
        msg = mido.Message.from_bytes(data)
        msgs.append(msg)
        d.feed(t, msg)
    return d, msgs


def without_numbers(name: str) -> str:
    # python-rtmidi's ALSA names end in " client:port"
    return re.sub(r"\s+\d+:\d+$", "", name)


# ------------------------------------------------------------------ the helper itself
def test_a_missing_qemu_or_kernel_is_an_error_not_a_skip(tmp_path):
    with pytest.raises(alsavm.VMError, match="apt-get install"):
        alsavm.qemu(path=str(tmp_path))
    with pytest.raises(alsavm.VMError, match="apt-get install"):
        alsavm.kernel(boot=str(tmp_path), modules=str(tmp_path))


def test_an_unknown_accelerator_is_an_error(monkeypatch):
    monkeypatch.setenv(alsavm.ACCEL_VARIABLE, "fast")
    with pytest.raises(alsavm.VMError, match="use kvm or tcg"):
        alsavm.run(["true"])


def test_modules_come_after_their_dependencies(tmp_path):
    # a made-up modules.dep in the kernel's own layout ("path: dependency ..."), out of order
    top = tmp_path / "9.9"
    top.mkdir()
    (top / "modules.dep").write_text("kernel/a/snd-seq-dummy.ko: kernel/a/snd-seq.ko kernel/a/snd.ko\n"
                                     "kernel/a/snd-seq.ko: kernel/a/snd.ko kernel/a/snd-timer.ko\n"
                                     "kernel/a/snd-timer.ko: kernel/a/snd.ko\n"
                                     "kernel/a/snd.ko:\n")
    (top / "modules.builtin").write_text("kernel/a/soundcore.ko\n")
    names = [p.name for p in alsavm.load_order("9.9", ["snd-seq-dummy", "soundcore"], modules=str(tmp_path))]
    assert names == ["snd.ko", "snd-timer.ko", "snd-seq.ko", "snd-seq-dummy.ko"]


# ------------------------------------------------------------------ inside the machine
def test_auto_picks_alsa_when_the_sequencer_is_there(seen):
    listing = part(seen, "listing")
    assert listing["seq_device"], "no /dev/snd/seq inside the machine"
    assert listing["choose_auto"] == "alsa"
    r = listing["ports_json"]
    assert r["returncode"] == 0, r["stderr"]
    shown = json.loads(r["stdout"])
    assert shown["backend"] == "alsa"
    through = [n for n in listing["rtmidi"]["readable"] if n.startswith(THROUGH)]
    assert through, listing["rtmidi"]
    # retuner lists the sequencer's ports as python-rtmidi names them
    assert shown["sources"] == listing["rtmidi"]["readable"]
    assert shown["destinations"] == listing["rtmidi"]["writable"]
    assert shown["own_in"] == shown["own_out"] == []


def test_run_virtual_opens_the_ports_readme_names(seen):
    run = part(seen, "virtual")
    assert run["ready_after"] is not None, "the daemon never said READY=1:\n" + run["log"][-3000:]
    in_name, out_name = readme_alsa_names()            # retuner:in, retuner:out
    (in_client, in_port), (out_client, out_port) = in_name.split(":"), out_name.split(":")
    assert in_client == out_client                     # one client, as README.md says
    # alsa-utils: every client and port (numbered 0 and 1, as README.md's aconnect lines use them);
    # -i readable ones (sources), -o writable ones (destinations)
    every = aconnect_clients(run["aconnect_l"])
    assert every.get(in_client) == [in_port, out_port], run["aconnect_l"]
    assert aconnect_clients(run["aconnect_i"]).get(out_client) == [out_port], run["aconnect_i"]
    assert aconnect_clients(run["aconnect_o"]).get(in_client) == [in_port], run["aconnect_o"]
    # README.md's aconnect lines connected a keyboard and a synth (exit status 0)
    assert run["aconnect_in"] == 0 and run["aconnect_out"] == 0
    # python-rtmidi: "client:port N:M"
    readable = [without_numbers(n) for n in run["rtmidi"]["readable"]]
    writable = [without_numbers(n) for n in run["rtmidi"]["writable"]]
    assert out_name in readable and in_name in writable
    # retuner ports sorts them as the daemon's own
    shown = json.loads(run["ports_json"]["stdout"])
    assert [without_numbers(n) for n in shown["own_in"]] == [in_name]
    assert [without_numbers(n) for n in shown["own_out"]] == [out_name]
    assert not any(n.startswith("retuner") for n in shown["sources"] + shown["destinations"])


def test_notes_through_the_alsa_ports_are_bent_to_quarter_comma_meantone(seen):
    run = part(seen, "virtual")
    assert run["received"], "nothing came out of retuner:out:\n" + run["log"][-3000:]
    d, msgs = decoded(run["received"])
    played = [m[1] for m in run["played"] if m[0] == 0x90]
    assert_bent_to_meantone(d, msgs, played)      # the set-up came again before the first note after the pause


def test_stopping_the_daemon_releases_the_held_note_through_alsa(seen):
    run = part(seen, "virtual")
    assert run["held_arrived"], run["log"][-3000:]
    assert run["returncode"] == 0, run["log"][-3000:]
    d, _ = decoded(run["received"])
    assert not d.stuck(), [(n.key, n.channel) for n in d.stuck()]
    assert len(run["received"]) > run["before_stop"]


def test_run_connects_to_named_alsa_ports(seen):
    run = part(seen, "named")
    assert run["ready_after"] is not None, "the daemon never said READY=1:\n" + run["log"][-3000:]
    assert run["setup_arrived"], run["log"][-3000:]
    every = aconnect_clients(run["aconnect_l"])
    assert every.get("retuner") == ["in", "out"], run["aconnect_l"]
    # aconnect -l: our keyboard's port sends to retuner's port 0 (in), our synth's port hears its port 1
    text = run["aconnect_l"]
    numbers = {name: num for num, name in re.findall(r"client (\d+): '([^']*)'", text)}
    keys_block = text.split(f"client {numbers['probe-keys']}:")[1].split("client ")[0]
    synth_block = text.split(f"client {numbers['probe-synth']}:")[1].split("client ")[0]
    assert f"Connecting To: {numbers['retuner']}:0" in keys_block, text
    assert f"Connected From: {numbers['retuner']}:1" in synth_block, text
    d, msgs = decoded(run["received"])
    assert [n.key for n in d.notes] == [64, 67, 62], msgs
    for n in d.notes:
        assert d.range.get(n.channel) == 2.0
        assert abs(n.cents - MEANTONE[n.key]) <= half_step(2), (n.key, n.cents, MEANTONE[n.key])
    assert not d.stuck()


def test_a_keyboard_that_goes_away_has_its_held_note_released_and_is_found_again(seen):
    run = part(seen, "named")
    assert run["held_arrived"], run["log"][-3000:]
    assert run["held_released"], "the held note was not released when the keyboard went away:\n" + run["log"][-3000:]
    assert run["input_back"], "the keyboard's return was not noticed:\n" + run["log"][-3000:]
    d, msgs = decoded(run["received"])
    assert [n.key for n in d.notes] == [64, 67, 62], msgs
    held, again = d.notes[1], d.notes[2]
    assert held.t_off is not None and held.t_off < again.t_on
    assert abs(again.cents - MEANTONE[62]) <= half_step(d.range.get(again.channel, 2.0)), (again.cents, MEANTONE[62])
    assert not d.stuck()


def test_a_synth_that_comes_back_gets_the_setup_before_the_next_note(seen):
    run = part(seen, "named")
    assert run["output_gone"] and run["output_back"], run["log"][-3000:]
    assert run["returncode"] == 0, run["log"][-3000:]
    d, msgs = decoded(run["received_after_return"])
    assert [n.key for n in d.notes] == [64], msgs
    n = d.notes[0]
    assert d.range.get(n.channel) == 2.0, f"no bend range announced on channel {n.channel + 1} after the return"
    assert abs(n.cents - MEANTONE[64]) <= half_step(2), (n.cents, MEANTONE[64])
    assert not d.stuck()


def test_a_keyboard_unplugged_and_plugged_back_is_connected_again(seen):
    run = part(seen, "named")
    gone, back = run["aconnect_gone"], run["aconnect_back"]
    assert "probe-keys" not in aconnect_clients(gone), gone
    numbers = {name: num for num, name in re.findall(r"client (\d+): '([^']*)'", back)}
    keys_block = back.split(f"client {numbers['probe-keys']}:")[1].split("client ")[0]
    assert f"Connecting To: {numbers['retuner']}:0" in keys_block, back
    assert run["back_arrived"], run["log"][-3000:]


def test_the_backend_passes_midi_both_ways_whole(seen):
    """alsa-midi's one client in retuner's own process: notes, a wheel, a pedal and a bulk tuning
    dump of 408 bytes (MIDI Tuning Standard: F0 7E 7F 08 01, program, name, 128 keys, checksum, F7;
    here a dump's length with made-up contents) come in and go out byte for byte, the dump whole
    though the sequencer carries it in pieces."""
    run = part(seen, "backend")
    assert run["got"] == run["played"]
    assert run["sent_back"] == run["played"]
    assert [without_numbers(n) for n in run["names"]["in"]] == ["probe-seq:in"]
    assert [without_numbers(n) for n in run["names"]["out"]] == ["probe-seq:out"]
    assert aconnect_clients(run["aconnect_l"]).get("probe-seq") == ["in", "out"]


def test_where_alsa_midi_does_not_load_python_rtmidi_serves_alike_with_a_client_per_port(seen):
    run = part(seen, "fallback")
    assert run["got"] == run["played"]
    assert run["sent_back"] == run["played"]
    assert [without_numbers(n) for n in run["names"]["in"]] == ["probe-seq-in:in"]
    assert [without_numbers(n) for n in run["names"]["out"]] == ["probe-seq-out:out"]
    clients = aconnect_clients(run["aconnect_l"])
    assert clients.get("probe-seq-in") == ["in"] and clients.get("probe-seq-out") == ["out"]
def test_a_synth_that_stops_reading_does_not_hang_the_alsa_backend(seen):
    # a client whose input is full takes no more events (ALSA sequencer: events to it fail with
    # EAGAIN, the kernel keeps none for later); the send must give up, not wait for ever
    deaf = part(seen, "deaf")
    assert deaf["finished"], f"a send to a client that does not read never returned: {deaf}"
    assert deaf["listing_answered"], "the backend stopped answering while a send waited"
    assert deaf["sent"] > 0 and deaf["failed"] >= 1, deaf
    assert deaf["after"] and deaf["after"][0][:2] == [0x90, 60], deaf     # it reads again: notes go through


def test_the_daemon_stops_on_sigterm_while_its_synth_does_not_read(seen):
    run = part(seen, "deaf_daemon")
    assert run["ready_after"] is not None, "the daemon never said READY=1:\n" + run["log"]
    assert run["returncode"] is not None, "the daemon did not stop on SIGTERM:\n" + run["log"]
    assert run["returncode"] == 0, run["log"]


def test_readme_test_command_installs_what_the_machine_needs():
    words = readme_test_command()
    assert "--no-install-recommends" in words
    missing = [p for p in alsavm.PACKAGES.split() + ["alsa-utils"] if p not in words]
    assert not missing, missing
