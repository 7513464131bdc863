"""The player's wheel is expression, not tuning error, in the measures of a conversion.

A strings part holds a chord while the player makes a wheel gesture (a swell up and down).
The wheel's share is computed from the INPUT as MIDI 1.0 defines it (14-bit bend centred on
8192, scaled by the part's own pitch bend sensitivity, RPN 0, 2 semitones until set), and
the measures must count only what the tuning does: the worst pitch error against tuning
plus wheel about 0, no motion, and the drift of the same chord played without the gesture.
Quarter-comma meantone (fifth 5^(1/4); J. Murray Barbour, Tuning and Temperament, 1951)
keeps the chord off 12-EDO, so the drift is not trivially 0.
"""

from __future__ import annotations

import mido
import pytest

from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import EngineConfig
from retuner.measure import report
from retuner.profiles.profile import load_profile
from synth import note_events, write_midi


def strings_file(path, gesture: bool, own_range=None, peak=3000):
    ev = [(0.0, mido.Message("program_change", channel=0, program=48))]
    if own_range is not None:     # the part's own pitch bend sensitivity (RPN 0)
        ev += [(0.0, mido.Message("control_change", channel=0, control=c, value=v))
               for c, v in ((101, 0), (100, 0), (6, own_range), (38, 0))]
    ev += note_events([(0.1, 4.0, 0, k, 80) for k in (48, 60, 64, 67)])
    if gesture:
        steps = 40
        for i in range(steps + 1):
            x = i / steps
            w = int(round(peak * (4 * x * (1 - x)))) if x < 0.7 else int(round(-0.5 * peak * (1 - x) / 0.3))
            ev.append((0.5 + 3.0 * x, mido.Message("pitchwheel", channel=0, pitch=w)))
        ev.append((3.6, mido.Message("pitchwheel", channel=0, pitch=0)))
    return write_midi(path, ev)


def measures(tmp_path, name, **kw):
    src = strings_file(tmp_path / f"{name}.mid", **kw)
    opts = ConvertOptions(tuning=load_profile("meantone-quarter"), config=EngineConfig(), want_report=True)
    res = convert_file(src, tmp_path / f"{name}-out.mid", opts)
    return report.build_report(res, opts)


@pytest.mark.parametrize("own_range,peak", [(None, 3000), (12, 4096)], ids=["range-2", "own-range-12"])
def test_a_wheel_gesture_is_not_tuning_error(tmp_path, own_range, peak):
    still = measures(tmp_path, "still", gesture=False, own_range=own_range)
    moved = measures(tmp_path, "moved", gesture=True, own_range=own_range, peak=peak)
    # the gesture reached the output: many bends
    assert moved["bends_sent"] > still["bends_sent"] + 30
    # within one bend step of the output range (the wheel's range plus under a semitone for
    # the tuning): half a step for the tuning's bend, half for the wheel's share
    step = ((own_range or 2) + 1) * 100.0 / 8192
    assert moved["worst_pitch_error_cents"] <= step
    assert moved["motion_cents_per_note"] <= 0.1
    assert moved["drift_max_cents"] == pytest.approx(still["drift_max_cents"], abs=0.05)
    assert moved["drift_rms_cents"] == pytest.approx(still["drift_rms_cents"], abs=0.05)
    assert still["drift_max_cents"] > 3.0        # meantone: the chord is off 12-EDO
