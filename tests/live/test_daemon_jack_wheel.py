"""Through a real JACK server and retuner's real ports: a held major triad with the player's
wheel at full up keeps its intervals, in the pool mode and in MPE.

`retuner run` is a subprocess connected by name to a test client (tests/jack.py,
tests/jackdaemon.py); what reaches the client is decoded as a synth plays it by
tests/synthmodel.py (MIDI 1.0 Detailed Specification: 14-bit bend centred on 8192, scaled by
RPN 0 pitch bend sensitivity, 2 semitones until set; MPE specification, The MIDI Association,
2018: members default to 48 semitones, a member's note sounds at its own bend plus the
manager's).

Sources for the checks:
- just major third 5/4 = 386.3 c and fifth 3/2 = 702.0 c (handbook values; computed here from
  the ratios: 386.314 c, 701.955 c);
- the wheel at full up (14-bit 16383, signed +8191) bends by +range (common practice; exactly
  8191/8192 of the range by MIDI 1.0, 199.976 c at an input bend range of 2 semitones).

Tolerance: in the pool mode the output bend is the tuning's bend plus the wheel in whole bend
steps, each rounded to the nearest step, so a note is within one step (half for each) of
profile + wheel. In MPE with one keyboard the zone holds one part: its wheel is on the manager
channel, so a note is within half a member step (the tuning's bend) plus half a manager step
(the wheel's) of profile + wheel. An interval is within one member step in both (half for each
of its notes' tuning bends; the wheel's share is the same for every note of the part).
"""

from __future__ import annotations

import math
import random
import time

import mido
import pytest

from jackdaemon import Run, note_offs, note_ons
from retuner.profiles.profile import load_profile
from synthmodel import SynthModel

THIRD = 1200 * math.log2(5 / 4)        # 386.314 c
FIFTH = 1200 * math.log2(3 / 2)        # 701.955 c
FULL_UP = 8191 / 8192 * 200.0          # input range 2 semitones, wheel at 16383


def settle(client, quiet=0.4, timeout=8.0):
    """The messages received once nothing more has come for ``quiet`` seconds."""
    end = time.monotonic() + timeout
    n = -1
    while time.monotonic() < end:
        got = client.messages()
        if len(got) == n:
            return got
        n = len(got)
        time.sleep(quiet)
    return client.messages()


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_a_held_just_triad_under_the_full_wheel_keeps_its_intervals(mode, jack_server, jack_client, tmp_path, runs):
    run = Run(jack_server, tmp_path, ["--input", jack_client.out_full, "--output", jack_client.in_full,
                                      "--profile", "just-5limit", "--mode", mode],
              client=jack_client, wire_in=False, wire_out=False)
    runs.append(run)
    # the daemon connects to us by name and sends its set-up (RPN 0 on its channels)
    jack_client.wait_for(lambda r: any(x.msg.type == "control_change" and x.msg.control == 6 for x in r),
                         timeout=10)
    end = time.monotonic() + 10
    while run.in_port not in jack_server.connections(jack_client.out_full) and time.monotonic() < end:
        time.sleep(0.05)
    settle(jack_client)
    tuning = load_profile("just-5limit")
    rng = random.Random(5)
    send = jack_client.send
    # the input's own bend range: 2 semitones (RPN 0, MIDI 1.0), then RPN null
    for c, v in ((101, 0), (100, 0), (6, 2), (38, 0), (101, 127), (100, 127)):
        send(mido.Message("control_change", control=c, value=v))
    for k in (60, 64, 67):                      # C4 E4 G4, a human spread
        send(mido.Message("note_on", note=k, velocity=rng.randint(60, 100)))
        time.sleep(rng.uniform(0.005, 0.02))
    jack_client.wait_for(lambda r: len(note_ons(r)) >= 3)
    time.sleep(0.1)
    send(mido.Message("pitchwheel", pitch=8191))          # 14-bit 16383: full up
    recs = settle(jack_client)

    synth = SynthModel(mpe_manager=0 if mode == "mpe" else None)
    synth.feed([r.msg for r in recs])
    assert not synth.problems, synth.problems
    notes = {v.key: (c, v) for c, v in synth.sounding()}
    assert sorted(notes) == [60, 64, 67]
    pitch = {k: synth.pitch(c, v) for k, (c, v) in notes.items()}
    step = max(synth.range[c] for c, _ in notes.values()) / 8192   # one output bend step
    # a note: one step in the pool mode; half a member step and half a manager step in MPE
    tol = step / 2 + synth.range[0] / 16384 if mode == "mpe" else step
    for k in (60, 64, 67):
        assert pitch[k] - tuning.cents[k] == pytest.approx(FULL_UP, abs=tol), k
    assert pitch[64] - pitch[60] == pytest.approx(THIRD, abs=step)
    assert pitch[67] - pitch[60] == pytest.approx(FIFTH, abs=step)
    print(f"{mode}: C-E {pitch[64] - pitch[60]:.3f} c, C-G {pitch[67] - pitch[60]:.3f} c, wheel share "
          + ", ".join(f"{pitch[k] - tuning.cents[k]:.3f}" for k in (60, 64, 67)) + f" c, step {step:.4f} c")
    if mode == "mpe":
        # one keyboard, one part in the zone: the wheel on the manager channel, at its range of
        # 2 semitones (the input's own): the very value sent
        assert synth.bend[0] == 8191

    # let go: the wheel back to centre, the keys released, nothing left sounding
    send(mido.Message("pitchwheel", pitch=0))
    for k in (60, 64, 67):
        send(mido.Message("note_off", note=k, velocity=64))
    recs = jack_client.wait_for(lambda r: len(note_offs(r)) >= 3)
    synth = SynthModel(mpe_manager=0 if mode == "mpe" else None)
    synth.feed([r.msg for r in settle(jack_client)])
    assert synth.count() == 0
