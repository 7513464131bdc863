"""Metrics from output streams, checked on hand-built streams against hand computations.

Sources:
* pitch bend: MIDI 1.0 Detailed Specification -- 14-bit value, centre 8192 (mido's
  ``pitch`` is value - 8192), RPN 0 = pitch bend sensitivity (CC101 0, CC100 0, data
  entry CC6 semitones, CC38 cents); default range 2 semitones (common practice);
* MPE specification (MIDI Association, 2018): MPE Configuration Message = RPN 6 on the
  manager channel, member channels then default to 48 semitones of bend range;
* MIDI Tuning Standard (MMA 1992): real-time single note tuning change
  F0 7F <dev> 08 02 <prog> <count> [<key> <xx> <yy> <zz>]... F7, frequency data
  xx = semitone, yy zz = 14-bit fraction of 100 cents (units of 100/16384 cent);
* just ratios in cents: 5/4 = 386.314 c, 3/2 = 701.955 c (handbook values); a 12-EDO
  major third is 400 - 386.314 = 13.686 c wide of just (common practice).
"""

from __future__ import annotations

import json
import math

import mido

from retuner.measure import metrics as M
from retuner.pitch.tuning import Tuning

JUST_M3 = 1200 * math.log2(5 / 4)  # 386.3137
JUST_P5 = 1200 * math.log2(3 / 2)  # 701.9550


def on(ch, key, vel=80):
    return mido.Message("note_on", channel=ch, note=key, velocity=vel)


def off(ch, key):
    return mido.Message("note_off", channel=ch, note=key, velocity=0)


def bend(ch, value):
    return mido.Message("pitchwheel", channel=ch, pitch=value)


def cc(ch, num, val):
    return mido.Message("control_change", channel=ch, control=num, value=val)


def rpn0(ch, semis, cents=0):
    return [cc(ch, 101, 0), cc(ch, 100, 0), cc(ch, 6, semis), cc(ch, 38, cents)]


def test_equal_tempered_major_third_impurity_is_13_686_cents():
    s = [(0.0, on(0, 60)), (0.0, on(1, 64)), (2.0, off(0, 60)), (2.0, off(1, 64))]
    imp, pair_time = M.impurity(M.decode(s).notes)
    assert abs(imp - (400.0 - 386.3137)) < 1e-3   # handbook: 13.686 c
    assert abs(pair_time - 2.0) < 1e-12


def test_bent_major_third_against_the_bend_formula():
    # -561/8192 of a 2-semitone range: -13.696289... cents (MIDI 1.0 bend arithmetic, by hand)
    s = [(0.0, bend(1, -561)), (0.0, on(0, 60)), (0.0, on(1, 64)), (1.0, off(0, 60)), (1.0, off(1, 64))]
    imp, _ = M.impurity(M.decode(s).notes)
    by_hand = abs((400.0 - 561 / 8192 * 200.0) - JUST_M3)
    assert abs(imp - by_hand) < 1e-9
    assert imp < 0.02


def test_impurity_is_weighted_by_time_and_ignores_dissonances():
    # C4 for 2 s; E4 during the first second, G4 during the second (12-EDO);
    # by hand: (1 s * 13.686 + 1 s * 1.955) / 2 s
    s = [(0.0, on(0, 60)), (0.0, on(1, 64)), (1.0, off(1, 64)), (1.0, on(2, 67)),
         (2.0, off(0, 60)), (2.0, off(2, 67))]
    imp, w = M.impurity(M.decode(s).notes)
    want = ((400 - JUST_M3) + (JUST_P5 - 700)) / 2
    assert abs(imp - want) < 1e-6 and abs(w - 2.0) < 1e-12
    # a major second only: no consonant pair at all
    s2 = [(0.0, on(0, 60)), (0.0, on(1, 62)), (1.0, off(0, 60)), (1.0, off(1, 62))]
    assert M.impurity(M.decode(s2).notes) == (0.0, 0.0)
    # octave and a twelfth in 12-EDO: octave exact (0), twelfth 1.955 c (1200+700 vs 1200+701.955)
    s3 = [(0.0, on(0, 48)), (0.0, on(1, 60)), (0.0, on(2, 67)), (3.0, off(0, 48)), (3.0, off(1, 60)), (3.0, off(2, 67))]
    imp3, _ = M.impurity(M.decode(s3).notes)
    assert abs(imp3 - (0 + (1900 - (1200 + JUST_P5)) * -1 + (700 - JUST_P5) * -1) / 3) < 1e-6


def test_motion_counts_bends_while_sounding_only():
    # bend before the note: not motion. While sounding: +4096 (= +100 c at range 2), back to 0.
    s = [(0.0, bend(0, 2048)), (0.0, on(0, 60)), (0.5, bend(0, 4096)), (1.0, bend(0, 0)),
         (0.0, on(1, 64)), (2.0, off(0, 60)), (2.0, off(1, 64)), (3.0, bend(0, 1000))]
    s.sort(key=lambda e: e[0])
    dec = M.decode(s)
    assert len(dec.notes) == 2
    # note on ch0: 50 -> 100 -> 0 cents: |50| + |100| = 150 c; the other note 0; per note 75
    assert abs(M.motion(dec.notes) - 75.0) < 1e-9
    assert dec.bends_sent == 4
    assert dec.channels_used == [1, 2]


def test_rpn0_range_is_read_from_the_stream():
    s = rpn0(3, 12, 0) + [bend(3, 4096), on(3, 60)]
    s = [(0.0, m) for m in s] + [(1.0, off(3, 60))]
    n = M.decode(s).notes[0]
    assert abs(n.steps[0][1] - (6000 + 600)) < 1e-9   # half of 12 semitones up
    # CC38 adds cents to the range: 1 semitone 50 cents, full bend 8191/8192 * 150 c
    s = [(0.0, m) for m in rpn0(2, 1, 50) + [bend(2, 8191), on(2, 60)]] + [(1.0, off(2, 60))]
    n = M.decode(s).notes[0]
    assert abs(n.steps[0][1] - (6000 + 8191 / 8192 * 150)) < 1e-9
    # the bend_scale models a synth that plays bends 127/128 of their size
    s = [(0.0, bend(0, 8191)), (0.0, on(0, 60)), (1.0, off(0, 60))]
    n = M.decode(s, bend_scale=127 / 128).notes[0]
    assert abs(n.steps[0][1] - (6000 + 8191 / 8192 * 200 * 127 / 128)) < 1e-9


def test_mpe_configuration_sets_member_range_48():
    cfg = [cc(0, 101, 0), cc(0, 100, 6), cc(0, 6, 15)]   # lower zone, 15 members
    s = [(0.0, m) for m in cfg] + [(0.0, bend(1, 4096)), (0.0, on(1, 60)), (0.0, bend(0, 4096)),
                                   (0.0, on(0, 72)), (1.0, off(1, 60)), (1.0, off(0, 72))]
    notes = {n.key: n for n in M.decode(s).notes}
    # member: 48 semitones range, plus the manager's bend (MPE specification 2018: a
    # manager-channel bend applies to every note of the zone), at the manager's 2 semitones
    assert abs(notes[60].steps[0][1] - (6000 + 2400 + 100)) < 1e-9
    assert abs(notes[72].steps[0][1] - (7200 + 100)) < 1e-9    # manager: 2 semitones


def test_mpe_manager_bend_moves_its_zone_only():
    # two zones (MPE specification 2018): lower, manager 1 with members 2..8; upper, manager 16
    # with members 15..9. A manager's bend moves the notes of its own zone, not the other's.
    cfg = [cc(0, 101, 0), cc(0, 100, 6), cc(0, 6, 7), cc(15, 101, 0), cc(15, 100, 6), cc(15, 6, 7)]
    s = [(0.0, m) for m in cfg] + [(0.0, on(1, 60)), (0.0, on(14, 64)), (0.5, bend(15, -8192)),
                                   (1.0, off(1, 60)), (1.0, off(14, 64))]
    notes = {n.key: n for n in M.decode(s).notes}
    assert notes[60].steps == [(0.0, 6000.0)]
    assert notes[64].steps == [(0.0, 6400.0), (0.5, 6200.0)]       # -2 semitones at range 2
    # the player's wheel given for the upper manager is taken off its zone's notes
    dec = M.decode(s, expression=[(0.5, 15, -200.0)])
    notes = {n.key: n for n in dec.notes}
    assert notes[64].steps == [(0.0, 6400.0)] and notes[60].steps == [(0.0, 6000.0)]


def _single_note_change(key, cents_abs, realtime=True):
    """MTS single note tuning change built by hand from the MMA layout."""
    semis = int(cents_abs // 100)
    frac = round((cents_abs - 100 * semis) / 100 * 16384)
    data = [0x7F if realtime else 0x7E, 0x7F, 0x08, 0x02 if realtime else 0x07]
    if not realtime:
        data.append(0)  # bank
    data += [0x00, 0x01, key, semis, frac >> 7, frac & 0x7F]
    return mido.Message("sysex", data=data), 100 * semis + frac * 100 / 16384


def test_mts_single_note_tuning_change():
    msg, pitch = _single_note_change(64, 6386.3137)
    s = [(0.0, msg), (0.0, on(0, 60)), (0.0, on(0, 64)), (1.0, off(0, 60)), (1.0, off(0, 64))]
    dec = M.decode(s)
    e = [n for n in dec.notes if n.key == 64][0]
    assert abs(e.steps[0][1] - pitch) < 1e-9
    imp, _ = M.impurity(dec.notes)
    assert abs(imp - abs(pitch - 6000 - JUST_M3)) < 1e-9
    assert dec.bends_sent == 0


def test_mts_realtime_retunes_sounding_notes_non_realtime_does_not():
    rt, p_rt = _single_note_change(64, 6390.0, realtime=True)
    nrt, p_nrt = _single_note_change(64, 6380.0, realtime=False)
    s = [(0.0, on(0, 64)), (0.5, rt), (1.0, nrt), (2.0, off(0, 64)), (3.0, on(0, 64)), (4.0, off(0, 64))]
    a, b = M.decode(s).notes
    assert [c for _, c in a.steps] == [6400.0, p_rt]       # real-time: the sounding note moves
    assert abs(b.steps[0][1] - p_nrt) < 1e-9                # non-real-time: only the next note


def test_mts_bulk_dump_built_by_hand():
    # bulk tuning dump: F0 7E dev 08 01 prog name(16) [xx yy zz]*128 checksum F7;
    # checksum = XOR of the bytes from 7E up to the last data byte, & 7F (MTS 1992)
    body = [0x7E, 0x7F, 0x08, 0x01, 0x00] + [ord(c) for c in "hand built      "]
    for k in range(128):
        body += [k, 0x40, 0x00] if k == 64 else [k, 0, 0]   # key 64: +50 cents ((0x40 << 7) = 8192 of 16384)
    cs = 0
    for b in body:
        cs ^= b
    msg = mido.Message("sysex", data=body + [cs & 0x7F])
    s = [(0.0, msg), (0.0, on(0, 64)), (1.0, off(0, 64))]
    (n,) = M.decode(s).notes
    assert abs(n.steps[0][1] - 6450.0) < 1e-9


def test_drift_max_final_rms_by_hand():
    # 1 s of two notes bent +10 c and one at +5 c, then 3 s of the +5 c note alone
    ten = round(10 / 200 * 8192)  # 410 -> 10.009765625 c
    c10 = ten / 8192 * 200
    five = round(5 / 200 * 8192)   # 205 -> 5.0048828125 c
    c5 = five / 8192 * 200
    s = [(0.0, bend(0, ten)), (0.0, bend(1, ten)), (0.0, bend(2, five)), (0.0, on(0, 60)), (0.0, on(1, 64)),
         (0.0, on(2, 67)), (1.0, off(0, 60)), (1.0, off(1, 64)), (4.0, off(2, 67))]
    d = M.drift(M.decode(s).notes)
    first = (c10 + c10 + c5) / 3
    assert abs(d["max"] - first) < 1e-9
    assert abs(d["final"] - c5) < 1e-9
    # time-weighted: 1 s at `first`, 3 s at c5 (an unweighted mean of the two moments would differ)
    assert abs(d["rms"] - math.sqrt((1 * first ** 2 + 3 * c5 ** 2) / 4)) < 1e-9
    assert abs(d["rms"] - math.sqrt((first ** 2 + c5 ** 2) / 2)) > 0.1
    # a 10 ms moment is left out of the settled maximum only
    s2 = [(0.0, bend(0, ten)), (0.0, on(0, 60)), (0.01, on(1, 64)), (0.01, bend(0, 0)), (1.0, off(0, 60)), (1.0, off(1, 64))]
    s2.sort(key=lambda e: e[0])
    notes = M.decode(s2).notes
    assert abs(M.drift(notes)["max"] - c10) < 1e-9
    assert M.drift(notes, settle=0.05)["max"] == 0.0


def test_report_is_json_and_has_worst_error():
    meantone_like = Tuning.from_cents("t", [100.0 * k - (10.0 if k == 64 else 0.0) for k in range(128)])
    s = [(0.0, on(0, 60)), (0.0, bend(1, -410)), (0.0, on(1, 64)), (1.0, off(0, 60)), (1.0, off(1, 64))]
    s.sort(key=lambda e: e[0])
    r = M.report(s, tuning=meantone_like)
    json.dumps(r)
    assert r["notes"] == 2 and r["bends_sent"] == 1 and r["channels_used"] == [1, 2]
    assert abs(r["worst_error_cents"] - abs(-410 / 8192 * 200 + 10.0)) < 1e-6
    for k in ("impurity_cents", "motion_cents_per_note", "drift_max_cents", "drift_final_cents",
              "drift_rms_cents", "drift_max_any_moment_cents", "late_motion_cents_per_note"):
        assert isinstance(r[k], float)


def test_restrike_and_all_notes_off_end_notes():
    s = [(0.0, on(0, 60)), (1.0, on(0, 60)), (2.0, cc(0, 123, 0)), (3.0, on(1, 62))]
    dec = M.decode(s, end_time=4.0)
    ends = sorted((n.start, n.end) for n in dec.notes)
    assert ends == [(0.0, 1.0), (1.0, 2.0), (3.0, 4.0)]


def test_excluded_channel_is_ignored():
    s = [(0.0, on(9, 36)), (0.0, on(0, 60)), (1.0, off(9, 36)), (1.0, off(0, 60))]
    assert len(M.decode(s, exclude_channels=(9,)).notes) == 1


def test_a_note_that_has_ended_no_longer_sounds():
    """A note of zero length (on and off at one instant: a grace note, a file's ghost note)
    and a note bent at the very instant it ends sound no more after that instant: the
    major third C4-E4 that follows is measured alone, at the 12-EDO 13.686 c (common
    practice: 400 - 386.314), and the sounding set never grows past what sounds."""
    s = [(0.0, on(0, 67)), (0.0, off(0, 67)),                       # zero length
         (0.5, on(1, 72)), (1.0, bend(1, 100)), (1.0, off(1, 72)),  # bent as it ends
         (2.0, on(2, 60)), (2.0, on(3, 64)), (3.0, off(2, 60)), (3.0, off(3, 64))]
    dec = M.decode(s)
    sizes = [len(snd) for _, _, snd in M.segments(dec.notes)]
    assert max(sizes) == 2, sizes
    imp, pair_time = M.impurity(dec.notes)
    assert abs(imp - (400.0 - JUST_M3)) < 1e-9 and abs(pair_time - 1.0) < 1e-9


def test_measures_walk_only_the_notes_that_sound():
    """A long stream of short notes, three at a time, with a zero-length note among each
    chord: the segments never hold more than the three notes that sound."""
    s = []
    for i in range(300):
        t = float(i)
        for k in (60, 64, 67):
            s.append((t, on(0, k + i % 5)))
        s += [(t + 0.1, on(1, 72)), (t + 0.1, off(1, 72))]
        for k in (60, 64, 67):
            s.append((t + 0.9, off(0, k + i % 5)))
    dec = M.decode(s)
    assert max(len(snd) for _, _, snd in M.segments(dec.notes)) == 3
