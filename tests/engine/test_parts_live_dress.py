"""Live, pool mode: each input channel (part) keeps its own instrument while the parts are tuned
together as one harmony.

A keyboard split of our own: the left hand on input channel 2 plays strings (GM program 48,
volume 80, pan 30), the right hand on input channel 1 a piano (GM program 0, volume 110); the
chords (I vi IV V I in C, original voicing) spread over both hands. Each part plays at a
velocity of its own, so a note in the output tells its part.

Checks, decoded from the output alone as a GM synth would (tests/synthmodel.py: the program a
note starts with is the last program change on its channel, with the bank selected before it;
volume and pan are the channel's last CC7 and CC10, MIDI 1.0 / GM2):
* every note starts with its own part's bank and program, and while it sounds its channel
  carries its own part's volume, pan and expression, also after a part changes its volume;
* the harmony is just: impurity (retuner.measure.metrics, time-weighted distance of consonant
  pairs from the just ratios) at most 1 c, where 12-EDO's thirds are 14 to 16 c off;
* with one input channel the pool stays that part's instrument, and the messages per note-on
  are those of the same performance without any program or controller: nothing is added.
"""

from __future__ import annotations

import mido

from daemonrig import Rig
from retuner.adaptive.solver import AdaptiveConfig
from retuner.engine.core import Engine, EngineConfig
from retuner.measure import metrics
from retuner.pitch.tuning import Tuning
from synthmodel import SynthModel

PIANO, STRINGS = 0, 1                                # input channels 1 and 2
DRESS = {PIANO: [("program_change", 0), (7, 110)],
         STRINGS: [(0, 1), (32, 0), ("program_change", 48), (7, 80), (10, 30)]}
PROGRAM = {PIANO: (0, 0, 0), STRINGS: (1, 0, 48)}   # (bank MSB, bank LSB, program)
VOLUME = {PIANO: 110, STRINGS: 80}
PAN = {PIANO: 64, STRINGS: 30}                      # 64: GM2 default (centre)
VELOCITY = {PIANO: 91, STRINGS: 62}
# (left hand: strings, right hand: piano) per chord
CHORDS = [((48, 55), (64, 67, 72)), ((45, 52), (64, 69, 72)), ((41, 48), (65, 69, 72)),
          ((43, 50), (62, 67, 71)), ((48, 55), (64, 67, 72))]
BEAT = 1.0


def dress_messages(part):
    out = []
    for what, value in DRESS[part]:
        if what == "program_change":
            out.append(mido.Message("program_change", channel=part, program=value))
        else:
            out.append(mido.Message("control_change", channel=part, control=what, value=value))
    return out


def performance():
    """(seconds, message): both parts dress, then the chords, the strings getting softer at
    chord 3 (volume 60), each chord held until the next."""
    ev = [(0.0, m) for p in (PIANO, STRINGS) for m in dress_messages(p)]
    for i, (left, right) in enumerate(CHORDS):
        t = 0.5 + BEAT * i
        if i == 3:
            ev.append((t - 0.1, mido.Message("control_change", channel=STRINGS, control=7, value=60)))
        for part, keys in ((STRINGS, left), (PIANO, right)):
            for k in keys:
                ev.append((t, mido.Message("note_on", channel=part, note=k, velocity=VELOCITY[part])))
            for k in keys:
                ev.append((t + BEAT - 0.01, mido.Message("note_off", channel=part, note=k)))
    ev.sort(key=lambda e: e[0])
    return ev


def check_dress(synth, volume):
    """Every sounding note wears its own part's dress (the part told by the velocity)."""
    part_of = {v: p for p, v in VELOCITY.items()}
    for c, v in synth.sounding():
        p = part_of[v.velocity]
        assert v.program == PROGRAM[p], (c, v.key, v.program)
        assert synth.controller(c, 7) == volume[p], (c, v.key, synth.controller(c, 7))
        assert synth.controller(c, 10) == PAN[p], (c, v.key)
        assert synth.controller(c, 11) == 127, (c, v.key)


def play(engine, events):
    synth = SynthModel()
    stream = [(0.0, m) for m in engine.start(0.0)]
    synth.feed([m for _, m in stream])
    volume = dict(VOLUME)
    notes = 0
    for t, msg in events:
        for d in [engine.next_deadline()]:
            if d is not None and d <= t:
                out = engine.tick(d)
                synth.feed(out)
                stream += [(d, m) for m in out]
        out = engine.feed(t, msg)
        synth.feed(out)
        stream += [(t, m) for m in out]
        if msg.type == "control_change" and msg.control == 7:
            volume[msg.channel] = msg.value
        notes += msg.type == "note_on"
        check_dress(synth, volume)
    out = engine.tick(events[-1][0] + 1.0)
    synth.feed(out)
    assert not synth.problems, synth.problems
    return synth, stream + [(events[-1][0] + 1.0, m) for m in out], notes


def test_engine_keeps_each_parts_instrument_and_tunes_them_as_one_harmony():
    e = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    synth, stream, notes = play(e, performance())
    assert e.stats["notes"] == notes == 25
    assert e.stats["steals"] == 0
    rep = metrics.report(stream)
    assert rep["notes"] == notes
    assert rep["impurity_cents"] <= 1.0
    # only the strings' channels were dressed again, each once (the piano kept its own)
    assert 0 < e.stats["redressings"] <= 15


def test_one_input_channel_adds_nothing():
    """One part: its program and controllers reach every pool channel (the pool is its
    instrument) and the note-ons cost what they cost without any of them."""
    ev = [(t, m) for t, m in performance() if m.channel == PIANO]
    bare = [(t, m) for t, m in ev if m.type in ("note_on", "note_off")]
    dressed = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    plain = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    for eng, evs in ((dressed, ev), (plain, bare)):
        eng.start(0.0)
        for t, m in evs:
            out = eng.feed(t, m)
            if m.type == "program_change":
                assert sorted(x.channel for x in out) == list(EngineConfig().pool)
        eng.tick(100.0)
    assert dressed.stats["note_on_messages"] == plain.stats["note_on_messages"]
    assert dressed.stats.get("redressings", 0) == 0


def test_daemon_split_keyboard_keeps_two_instruments():
    """The same split keyboard through the daemon (ports in memory, tests/daemonrig.py)."""
    rig = Rig("profile: edo12\nengine:\n  adaptive: true\n")
    try:
        synth = SynthModel()
        stream = []
        volume = dict(VOLUME)
        now = 0.0
        seen = 0

        def take():
            nonlocal seen
            new = rig.sent()[seen:]
            seen += len(new)
            synth.feed(new)
            stream.extend((now, m) for m in new)

        take()
        for t, msg in performance():
            if t > now:
                rig.wait(t - now)
                now = t
                take()
                check_dress(synth, volume)
            rig.play(msg)
            take()
            if msg.type == "control_change" and msg.control == 7:
                volume[msg.channel] = msg.value
            check_dress(synth, volume)
        rig.wait(1.0)
        now += 1.0
        take()
        assert not synth.problems, synth.problems
        assert synth.count() == 0
        rep = metrics.report(stream)
        assert rep["notes"] == 25
        assert rep["impurity_cents"] <= 1.0
    finally:
        rig.close()
