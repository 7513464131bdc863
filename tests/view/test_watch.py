"""retuner watch: the view as a pure function of its state, and the state folded from events.

Sources: 12-EDO at A4 = 440 Hz (ISO 16), so key k sounds at 440 * 2**((k-69)/12) Hz: C4 = 261.626 Hz,
E4 = 329.628 Hz, G4 = 391.995 Hz, C3 = 130.813 Hz. The beat rate of two tones near the ratio p:q
(upper:lower) is |q*f2 - p*f1|, the difference of the nearly coinciding partials (common practice).
Just ratios: 5/4 = 386.314 c, 3/2 = 701.955 c, 6/5 = 315.641 c (handbook values, shared README).
(The same view rendered from a real daemon in a captured terminal: test_control_daemon.py.)
"""

from __future__ import annotations

import math

import pytest

from retuner.view.watch import WatchState, drift, interval_rows, render


def edo_hz(k: int) -> float:
    return 440.0 * 2 ** ((k - 69) / 12)


def state_with(notes: dict[int, float], **info) -> WatchState:
    s = WatchState()
    s.snapshot({"profile": info.get("profile", "edo12"),
                "concert_pitch_hz": None, "transpose_semitones": 0, "transpose_cents": 0.0, "adaptive": False,
                "counters": {"notes": 7, "steals": 1, "ringing_retunes": 2},
                "notes": [{"key": k, "cents": c, "channel": i + 1} for i, (k, c) in enumerate(notes.items())]})
    return s


def squash(lines):
    return [" ".join(l.split()) for l in lines]


def test_held_major_triad_in_12_edo_by_hand():
    s = state_with({60: 6000.0, 64: 6400.0, 67: 6700.0})
    lines = squash(render(s))
    # the hand calculation: C4-E4 near 5:4 -> |4*329.628 - 5*261.626| = |1318.512 - 1308.130| = 10.38 Hz
    assert "C4-E4 major third 400.00 5/4 +13.69 10.38" in lines
    assert "C4-G4 fifth 700.00 3/2 -1.96 0.89" in lines          # |2*391.995 - 3*261.626| = 0.89
    assert "E4-G4 minor third 300.00 6/5 -15.64 17.79" in lines        # |5*391.995 - 6*329.628| = 17.79
    assert "C4 60 +0.00 261.63" in lines and "E4 64 +0.00 329.63" in lines and "G4 67 +0.00 392.00" in lines
    assert "SOUNDING 3" in lines and "INTERVALS 3" in lines
    head = " ".join(lines[:2])
    assert "PROFILE edo12" in head and "DRIFT +0.00 c" in head
    assert "NOTES 7" in head and "STEALS 1" in head and "RINGING RETUNES 2" in head


def test_pure_triad_does_not_beat_and_compound_intervals_use_their_ratio():
    third = 1200 * math.log2(5 / 4)
    fifth = 1200 * math.log2(3 / 2)
    s = state_with({48: 4800.0, 64: 4800.0 + 1200 + third, 67: 4800.0 + 1200 + fifth})
    rows = {(r.low, r.high): r for r in interval_rows(list(s.notes.values()))}
    # C3-E4 is a major tenth, 5/2: pure, no beats
    r = rows[(48, 64)]
    assert (r.ratio.numerator, r.ratio.denominator) == (5, 2) and r.name == "major tenth"
    assert r.deviation == pytest.approx(0.0, abs=1e-9) and r.beats == pytest.approx(0.0, abs=1e-9)
    # E4-G4 of a pure 4:5:6 is 6:5, pure
    assert rows[(64, 67)].beats == pytest.approx(0.0, abs=1e-9)
    # a 12-EDO tenth C3-E4 beats at |2*f(E4) - 5*f(C3)| (hand formula with 130.813 and 329.628 Hz)
    s2 = state_with({48: 4800.0, 64: 6400.0})
    r2 = interval_rows(list(s2.notes.values()))[0]
    assert r2.beats == pytest.approx(abs(2 * edo_hz(64) - 5 * edo_hz(48)), abs=1e-6)
    assert r2.beats == pytest.approx(abs(2 * 329.628 - 5 * 130.813), abs=0.01)


def test_drift_is_the_mean_deviation_of_sounding_notes():
    s = state_with({60: 6011.73, 64: 6401.955, 67: 6707.82})
    assert drift(list(s.notes.values())) == pytest.approx((11.73 + 1.955 + 7.82) / 3, abs=1e-9)
    lines = squash(render(s))
    assert f"DRIFT +{(11.73 + 1.955 + 7.82) / 3:.2f} c" in " ".join(lines[:2])
    assert "C4 60 +11.73 " in " ".join(lines) + " "
    assert drift([]) is None
    assert "DRIFT -- c" in " ".join(squash(render(WatchState())))


def test_events_fold_into_the_view():
    s = state_with({})
    s.apply({"event": "note_on", "key": 69, "channel": 3, "cents": 6900.0, "hz": 440.0})
    pure = 1200 * math.log2(3 / 2)
    s.apply({"event": "note_on", "key": 76, "channel": 4, "cents": 6900.0 + pure, "hz": None})
    lines = squash(render(s))
    assert "A4 69 +0.00 440.00" in lines
    assert "A4-E5 fifth 701.96 3/2 +0.00 0.00" in lines
    s.apply({"event": "pitch", "key": 76, "channel": 4, "cents": 7600.0})
    # 12-EDO E5 = 659.255 Hz: |2*659.255 - 3*440| = 1.49 Hz
    assert "A4-E5 fifth 700.00 3/2 -1.96 1.49" in squash(render(s))
    s.apply({"event": "note_off", "key": 69, "channel": 3})
    lines = squash(render(s))
    assert "SOUNDING 1" in lines and "INTERVALS 0" in lines
    s.apply({"event": "profile", "profile": "vallotti", "concert_pitch_hz": 442.0,
             "transpose_semitones": 2, "transpose_cents": 0.0, "adaptive": False})
    s.apply({"event": "counters", "notes": 99, "steals": 3, "ringing_retunes": 0, "events_dropped": 5})
    s.apply({"event": "adaptive", "on": True})
    head = " ".join(squash(render(s))[:2])
    assert "PROFILE vallotti" in head and "A4 442 Hz" in head and "TRANSPOSE +2 st" in head
    assert "ADAPTIVE ON" in head and "NOTES 99" in head and "DROPPED EVENTS 5" in head
    s.connected = False
    assert "DISCONNECTED" in " ".join(render(s))


def test_view_fits_the_window():
    s = state_with({k: 100.0 * k for k in range(48, 72)})     # 24 notes, 276 intervals
    lines = render(s, width=60, height=30)
    assert len(lines) == 30 and all(len(l) <= 60 for l in lines)
    assert "more lines" in lines[-1]


def test_block_letters_for_the_room_only_when_they_fit():
    s = state_with({60: 6000.0, 64: 6400.0, 67: 6700.0})
    big = render(s, width=120, height=40, big=True)
    small = render(s, width=120, height=40)
    assert big[6:] == small and big[5] == ""
    # five rows of block letters spelling the three names: each glyph is 4 columns, '#' on ' '
    assert all(set(row) <= {"#", " "} for row in big[:5])
    assert "####" in big[2]                 # the bar of the E and of the 4s
    # too narrow or too short: the plain view only
    assert render(s, width=30, height=40, big=True) == render(s, width=30, height=40)
    assert render(s, width=120, height=len(small) + 3, big=True) == render(s, width=120, height=len(small) + 3)


def test_interval_names_are_words():
    # an octave above a simple interval adds 7 to its number (common practice: any harmony
    # handbook's table of compound intervals): octave, major tenth, minor tenth, twelfth, major
    # thirteenth; two octaves are a double octave (a fifteenth)
    from retuner.pitch.intervals import interval_name
    assert [interval_name(s) for s in (0, 4, 3, 7, 12, 16, 15, 19, 21, 24)] == [
        "unison", "major third", "minor third", "fifth", "octave", "major tenth", "minor tenth", "twelfth",
        "major thirteenth", "double octave"]
    assert interval_name(28) == "major third + 2 octaves" and interval_name(28, compact=True) == "major third +2 oct"
    assert interval_name(18) == "tritone + 1 octave"


def test_intervals_in_words_fit_80_columns():
    # a bass note two octaves below a seventh chord: the widest names of an ordinary chord
    s = state_with({36: 3600.0, 60: 6000.0, 64: 6400.0, 67: 6700.0, 70: 7000.0})
    wide = squash(render(s, width=200, height=40))
    assert "C2-E4 major third + 2 octaves 2800.00 5/1 +13.69 2.60" in wide     # |1*329.628 - 5*65.406| = 2.60
    assert "C4-Bb4 minor seventh 1000.00 9/5 -17.60 23.81 dissonant" in wide   # |5*466.164 - 9*261.626| = 23.81
    lines = render(s, width=80, height=40)
    assert all(len(l) <= 80 for l in lines)
    # on 80 columns the names stay words (two octaves and more in the compact form) and every
    # column, "dissonant" included, is still there, nothing cut
    assert "C2-Bb4 minor seventh +2 oct 3400.00 36/5 -17.60 23.81 dissonant" in squash(lines)
    assert "C4-E4 major third 400.00 5/4 +13.69 10.38" in squash(lines)
    assert not any(a in " ".join(lines).split() for a in ("M3", "P5", "m3", "m7"))
    head = lines[0]
    assert "PROFILE edo12" in head and "ADAPTIVE OFF" in " ".join(head.split())


def test_connection_and_panic_survive_an_80x24_terminal():
    # a chord of 12 notes makes far more than 24 lines; the state must still be on screen
    s = state_with({k: 100.0 * k for k in range(60, 72)})
    lines = render(s, width=80, height=24)
    assert len(lines) == 24 and all(len(l) <= 80 for l in lines)
    assert lines[0].startswith("LIVE") and "DISCONNECTED" not in " ".join(lines)
    s.connected = False
    lines = render(s, width=80, height=24)
    assert lines[0].startswith("** DISCONNECTED")
    s.connected = True
    s.apply({"event": "panic"})
    lines = render(s, width=80, height=24)
    assert "PANIC" in lines[0]
    # counters and note-offs do not end the panic banner; a new note does
    s.apply({"event": "counters", "notes": 3})
    s.apply({"event": "note_off", "key": 60, "channel": 1})
    assert "PANIC" in render(s, width=80, height=24)[0]
    s.apply({"event": "note_on", "key": 62, "channel": 5, "cents": 6200.0, "hz": None})
    assert "PANIC" not in " ".join(render(s, width=80, height=24))
