"""Parts tuned together (adaptive mode) and a bass part's own wheel gesture (RPN 0 = 12, +6
semitones) after a GM System On: the report counts the wheel as expression, not as motion or
drift, because each part's wheel is subtracted on the channels of that part's own share."""

from __future__ import annotations

import json
import subprocess
import sys

import mido


def arrangement(path):
    mf = mido.MidiFile(ticks_per_beat=480)
    t0 = mido.MidiTrack()
    mf.tracks.append(t0)
    t0.append(mido.Message("sysex", data=[0x7E, 0x7F, 0x09, 0x01]))        # GM System On
    chords = [[60, 64, 67], [57, 60, 65], [55, 59, 62], [60, 64, 67]]
    for ch, idx in ((0, 2), (1, 1), (2, 0)):
        tr = mido.MidiTrack()
        mf.tracks.append(tr)
        tr.append(mido.Message("program_change", channel=ch, program=[0, 48, 73][ch]))
        for i, c in enumerate(chords):
            tr.append(mido.Message("note_on", channel=ch, note=c[idx], velocity=80, time=0 if i == 0 else 20))
            tr.append(mido.Message("note_off", channel=ch, note=c[idx], time=940))
    bass = mido.MidiTrack()
    mf.tracks.append(bass)
    bass += [mido.Message("control_change", channel=3, control=101, value=0),
             mido.Message("control_change", channel=3, control=100, value=0),
             mido.Message("control_change", channel=3, control=6, value=12),
             mido.Message("note_on", channel=3, note=36, velocity=90),
             mido.Message("pitchwheel", channel=3, pitch=4096, time=480),
             mido.Message("pitchwheel", channel=3, pitch=0, time=480),
             mido.Message("note_off", channel=3, note=36, time=960)]
    mf.save(path)


def test_a_parts_wheel_is_not_motion_or_drift_when_parts_are_tuned_together(tmp_path):
    src, rep = tmp_path / "arr.mid", tmp_path / "rep.json"
    arrangement(src)
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(tmp_path / "out.mid"),
                        "--adaptive", "--report", str(rep)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    d = json.loads(rep.read_text())
    assert d["parts_tuned"]
    # each part on its own share of the pool: no output channel listed for two parts
    shares = [set(v) for v in d["part_channels"].values()]
    assert sum(len(s) for s in shares) == len(set().union(*shares))
    # the +600 c gesture would read as tens of cents of motion and drift if counted as tuning
    assert d["late_motion_cents_per_note"] < 1.0
    assert d["drift_max_cents"] < 6.0
