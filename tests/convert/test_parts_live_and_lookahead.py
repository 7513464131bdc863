"""Parts tuned together as one harmony in ``convert --live``, ``convert --lookahead`` and the daemon.

The data: a four-part chorale of our own in F major (a woodwind quartet, one voice per channel,
each with its own program: GM programs flute 73, oboe 68, clarinet 71, bassoon 70), every chord's
notes spread over the four parts, the alto holding a note across two chords; for ``--live`` some
chords are rolled by hand (0..25 ms). Each part plays at a velocity of its own, so a note in the
output tells its part.

Checks:
* impurity of the whole harmony, measured from the written output (``retuner.measure.metrics``
  through the report): together at most 1 c; apart (each part alone is a melody, so it stays
  near 12-EDO, whose thirds and sixths are 14 to 16 c from just) clearly higher;
* independently, each chord's consonant pairs decoded from the output as a synth would
  (tests/jack.Decoder, MIDI 1.0) against the just ratios 1/1, 6/5, 5/4, 4/3, 3/2, 8/5, 5/3
  (their cents, 1200 log2 r, common practice);
* every note sounds on a channel whose program (the last program change on that channel, as a
  GM synth keeps it: MIDI 1.0) is its own part's;
* with ``--lookahead``, every note-on at its input tick (read back with mido);
* the summary and the report say how the parts were tuned.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import mido
import pytest

from daemonrig import Rig, note_on
from jack import Decoder
from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import EngineConfig
from retuner.measure import report
from retuner.pitch.tuning import Tuning
from synth import note_events, write_midi

PROGRAMS = {0: 73, 1: 68, 2: 71, 3: 70}            # soprano, alto, tenor, bass
VELOCITY = {0: 81, 1: 82, 2: 83, 3: 84}            # a part's notes are told by their velocity
# (soprano, alto, tenor, bass) per chord, in F major: I IV V vi ii V I IV V I
CHORDS = [(69, 65, 60, 41), (70, 65, 62, 46), (67, 64, 60, 48), (69, 65, 62, 50), (67, 62, 58, 43),
          (67, 64, 60, 48), (65, 60, 57, 41), (65, 62, 58, 46), (64, 60, 55, 48), (65, 60, 57, 41)]
TIED = {(0, 1)}                                    # (chord, part): the alto's F4 sounds on into chord 2
BEAT = 0.8                                         # seconds a chord
# rolled by hand: every other chord, bass first, the soprano 25 ms later (the others in a block)
ROLL = {0: 0.025, 1: 0.017, 2: 0.008, 3: 0.0}
JUST = {0: 1 / 1, 3: 6 / 5, 4: 5 / 4, 5: 4 / 3, 7: 3 / 2, 8: 8 / 5, 9: 5 / 3}


def chorale(path, rolled: bool):
    ev = [(0.0, mido.Message("program_change", channel=p, program=prog)) for p, prog in PROGRAMS.items()]
    notes = []
    for i, chord in enumerate(CHORDS):
        for p, k in enumerate(chord):
            if (i - 1, p) in TIED and chord[p] == CHORDS[i - 1][p]:
                continue                            # still sounding from the chord before
            on = 0.2 + BEAT * i + (ROLL[p] if rolled and i % 2 else 0.0)
            off = 0.2 + BEAT * (i + (2 if (i, p) in TIED else 1)) - 0.02
            notes.append((on, off, p, k, VELOCITY[p]))
    write_midi(path, ev + note_events(notes))
    return len(notes)


def convert(src, out, **kw):
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()), **kw)
    res = convert_file(src, out, opts)
    return report.build_report(res, opts)


def cli(*args):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True, timeout=300)


def notes_played(path):
    """Every note of the output as a synth hears it: (part, decoded note), the part told by the
    note's velocity; and every note-on's program (the last program change on its channel)."""
    dec = Decoder()
    part_of = {v: p for p, v in VELOCITY.items()}
    prog: dict[int, int] = {}
    progs = []
    t = 0.0
    for m in mido.MidiFile(str(path)):
        t += m.time
        if m.type == "program_change":
            prog[m.channel] = m.program
        elif m.type == "note_on" and m.velocity:
            progs.append((part_of[m.velocity], prog.get(m.channel)))
        dec.feed(t, m)
    return [(part_of[n.velocity], n) for n in dec.notes], progs


def worst_pair_error(path) -> float:
    """The largest distance (cents) from just of a consonant pair of notes of one chord, each at
    the pitch it sounded at last; notes held on into the next chord are left out (they may move
    there, as they should)."""
    played, _ = notes_played(path)
    worst = 0.0
    for i in range(len(CHORDS)):
        start, end = 0.2 + BEAT * i, 0.2 + BEAT * (i + 1)
        chord = [n for _, n in played if start - 1e-6 <= n.t_on < end and n.t_off is not None and n.t_off <= end]
        for a in chord:
            for b in chord:
                d = b.key - a.key
                if d <= 0 or d % 12 not in JUST:
                    continue
                just = 1200.0 * math.log2(JUST[d % 12]) + 1200.0 * (d // 12)
                worst = max(worst, abs((b.settled - a.settled) - just))
    return worst


def check_programs(path, n_notes):
    _, progs = notes_played(path)
    assert len(progs) == n_notes
    for part, prog in progs:
        assert prog == PROGRAMS[part], (part, prog)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("parts")
    n_block = chorale(d / "block.mid", rolled=False)
    n_rolled = chorale(d / "rolled.mid", rolled=True)
    assert n_block == n_rolled == 4 * len(CHORDS) - len(TIED)
    return d, n_block


def test_live_tunes_the_parts_together_each_on_its_own_instrument(files):
    d, n = files
    src, out, rep = d / "rolled.mid", d / "live.mid", d / "live.json"
    r = cli("convert", str(src), "-o", str(out), "--adaptive", "--live", "--report", str(rep))
    assert r.returncode == 0, r.stderr
    assert "parts tuned together as one harmony" in r.stdout
    together = json.loads(rep.read_text())
    assert together["parts_tuned"] == "together" and together["live"]
    assert together["notes"] == n and together["steals"] == 0
    assert together["impurity_cents"] <= 1.0
    assert together["added_latency_ms"]["max"] == 0.0          # attack mode: no note waits
    assert together["attack_retunes"] > 0                      # the rolled chords settle in their attack
    assert worst_pair_error(out) <= 1.5
    check_programs(out, n)

    apart = convert(src, d / "live-apart.mid", live=True, parts_apart=True)
    assert apart["parts_tuned"] == "apart"
    assert "parts tuned apart" in report.text_summary(apart)
    assert apart["impurity_cents"] > 5.0
    assert together["impurity_cents"] < apart["impurity_cents"] - 4.0
    assert worst_pair_error(d / "live-apart.mid") > 10.0
    check_programs(d / "live-apart.mid", n)


def test_live_with_a_chord_window_tunes_the_parts_together(files):
    d, n = files
    out = d / "window.mid"
    acfg = AdaptiveConfig(chord_window=0.03)
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=acfg), live=True)
    rep = report.build_report(convert_file(d / "rolled.mid", out, opts), opts)
    assert rep["parts_tuned"] == "together"
    assert rep["impurity_cents"] <= 1.0
    assert worst_pair_error(out) <= 1.0      # each chord solved whole before it sounds
    check_programs(out, n)


def note_on_ticks(path):
    out = []
    for tr in mido.MidiFile(str(path)).tracks:
        t = 0
        for m in tr:
            t += m.time
            if m.type == "note_on" and m.velocity:
                out.append((t, m.note, m.velocity))
    return sorted(out)


def test_lookahead_plans_the_parts_together_each_on_its_own_instrument(files):
    d, n = files
    src, out, rep = d / "block.mid", d / "plan.mid", d / "plan.json"
    r = cli("convert", str(src), "-o", str(out), "--adaptive", "--lookahead", "--report", str(rep))
    assert r.returncode == 0, r.stderr
    assert "parts tuned together as one harmony" in r.stdout
    together = json.loads(rep.read_text())
    assert together["parts_tuned"] == "together" and together["lookahead"]
    assert together["notes"] == n and together["steals"] == 0
    assert together["impurity_cents"] <= 1.0
    assert worst_pair_error(out) <= 1.5
    check_programs(out, n)
    assert note_on_ticks(out) == note_on_ticks(src)

    apart = convert(src, d / "plan-apart.mid", lookahead=True, parts_apart=True)
    assert apart["parts_tuned"] == "apart"
    assert "parts tuned apart" in report.text_summary(apart)
    assert apart["impurity_cents"] > 5.0
    assert together["impurity_cents"] < apart["impurity_cents"] - 4.0
    check_programs(d / "plan-apart.mid", n)
    assert note_on_ticks(d / "plan-apart.mid") == note_on_ticks(src)


def test_daemon_tunes_its_input_channels_together():
    """A keyboard split (left hand on channel 2, right hand on channel 1) and a second keyboard
    (channel 3) are one harmony: an F major chord spread over the three channels, rolled by hand,
    then a held bass with a chord above it from another channel, tuned just against each other."""
    rig = Rig("profile: edo12\nengine:\n  adaptive: true\n")
    try:
        rig.play(note_on(41, channel=1))
        rig.wait(0.010)
        rig.play(note_on(69, channel=0))
        rig.wait(0.015)
        rig.play(note_on(72, channel=2))
        rig.wait(0.5)                          # past every note's attack
        notes = {n.key: n for n in rig.decode().stuck()}
        assert sorted(notes) == [41, 69, 72]
        # F2-A4: 5/4 two octaves up; A4-C5: 6/5; F2-C5: 3/2 two octaves up (12-EDO: 13.7, 15.6, 2.0 c off)
        for lo, hi, ratio, octaves in ((41, 69, 5 / 4, 2), (69, 72, 6 / 5, 0), (41, 72, 3 / 2, 2)):
            just = 1200.0 * math.log2(ratio) + 1200.0 * octaves
            assert abs(notes[hi].settled - notes[lo].settled - just) <= 1.0, (lo, hi)
    finally:
        rig.close()
