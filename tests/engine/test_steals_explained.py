"""Notes cut short by steals are counted and explained, with the advice that would avoid them.

When more notes sound at once than the output has channels for (in MPE: member channels, one
note each), a channel is taken from a sounding note for the new one, and that note is cut
short. The count must equal the notes actually cut in the output, decoded as a synth plays it
(tests/synthmodel.py: MIDI 1.0 note-off, sustain and all-sound-off; MPE specification, The
MIDI Association, 2018: the pedals of the manager channel act on every member). A note is
cut when the synth stops sounding it before the input let it go: its release, or the lift of
the sustain pedal that held it.

The pieces are written here for this test (overlapping held notes, a pedalled passage).
"""

from __future__ import annotations

import json
import subprocess
import sys

import mido

from daemonrig import Rig, cc, note_off, note_on
from retuner.commands.ctl import _fmt_status
from synthmodel import SynthModel

TPB = 480


def write_song(path, parts):
    """parts: {channel: [(on_tick, off_tick, key), ...]} and optional pedals
    {channel: [(down_tick, up_tick), ...]} under the key 'pedal'. One track, ticks absolute."""
    ev = []
    for ch, notes in parts.items():
        if ch == "pedal":
            continue
        for on, off, key in notes:
            ev.append((on, 1, mido.Message("note_on", channel=ch, note=key, velocity=80)))
            ev.append((off, 0, mido.Message("note_off", channel=ch, note=key, velocity=0)))
    for ch, spans in parts.get("pedal", {}).items():
        for down, up in spans:
            ev.append((down, 2, mido.Message("control_change", channel=ch, control=64, value=127)))
            ev.append((up, 0, mido.Message("control_change", channel=ch, control=64, value=0)))
    ev.sort(key=lambda e: (e[0], e[1]))
    track = mido.MidiTrack()
    last = 0
    for t, _, m in ev:
        track.append(m.copy(time=t - last))
        last = t
    mf = mido.MidiFile(ticks_per_beat=TPB)
    mf.tracks.append(track)
    mf.save(str(path))


def input_ends(parts):
    """(channel, on_tick, key) -> the tick the input lets the note go: its release, or the
    lift of the sustain pedal down at its release (MIDI 1.0: sustain holds released notes)."""
    pedals = parts.get("pedal", {})
    out = {}
    for ch, notes in parts.items():
        if ch == "pedal":
            continue
        for on, off, key in notes:
            end = off
            for down, up in pedals.get(ch, ()):
                if down <= off < up:
                    end = up
            out[(ch, on, key)] = end
    return out


def output_notes(path, managers):
    """[(on_tick, key, end_tick)] of every note in the output, as SynthModel plays it (the
    end: when its voice stops sounding). ``managers``: the MPE manager channels in the file."""
    mf = mido.MidiFile(str(path))
    synths = {m: SynthModel(mpe_manager=m) for m in managers}
    # a zone's synth hears its manager and its members only (lower: 1..8, upper: 9..16)
    def zone_of(ch):
        if len(managers) == 1:
            return managers[0]
        return 0 if ch <= 7 else 15
    started = {}
    ended = []
    tick = 0
    for msg in mido.merge_tracks(mf.tracks):
        tick += msg.time
        if msg.is_meta or not hasattr(msg, "channel"):
            continue
        s = synths[zone_of(msg.channel)]
        s.one(msg.copy(time=0))
        for c, v in s.sounding():
            if id(v) not in started:
                started[id(v)] = (tick, v.key, v)
        alive = {id(v) for sy in synths.values() for _, v in sy.sounding()}
        for vid in [vid for vid in started if vid not in alive]:
            on, key, _ = started.pop(vid)
            ended.append((on, key, tick))
    for on, key, _ in started.values():
        ended.append((on, key, None))
    for s in synths.values():
        assert not s.problems, s.problems
    return ended


def cut_notes(parts, path, managers):
    """How many notes the synth stopped before the input let them go."""
    ends = {}
    for (ch, on, key), end in input_ends(parts).items():
        ends.setdefault((on, key), []).append(end)
    cut = 0
    heard = output_notes(path, managers)
    assert len(heard) == sum(len(v) for v in ends.values())     # every note sounded
    for on, key, end in heard:
        want = ends[(on, key)].pop(0)
        assert end is not None, f"key {key} from tick {on} never ends"
        if end < want:
            cut += 1
    return cut


def convert(tmp_path, parts, *args):
    src, out, rep = tmp_path / "in.mid", tmp_path / "out.mid", tmp_path / "rep.json"
    write_song(src, parts)
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(out),
                        "--report", str(rep), "--mode", "mpe", *args],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return out, json.loads(rep.read_text()), r.stdout


# a build-up: each beat one more note, all held to bar 3; then a second phrase of four-note
# chords that fit (nothing cut there)
BUILD = [(i * TPB, 8 * TPB, k) for i, k in enumerate([36, 48, 55, 60, 64, 67, 72])] + \
        [(9 * TPB + j * TPB, 9 * TPB + (j + 1) * TPB - 20, k)
         for j, chord in enumerate([(48, 55, 64, 72), (53, 57, 65, 72)]) for k in chord]


def test_steals_in_mpe_are_counted_as_the_synth_hears_the_cuts(tmp_path):
    parts = {0: BUILD}
    out, rep, text = convert(tmp_path, parts, "--profile", "meantone-quarter", "--mpe-members", "4")
    cut = cut_notes(parts, out, [0])
    assert cut == 3                  # 7 notes held at once on 4 members: 3 cut (from the piece)
    assert rep["steals"] == cut
    line = rep["steals_explained"]
    assert line.startswith(f"{cut} notes cut short by steals")
    assert "zone's 4 member channels" in line
    # the advice: the real option names of the command line
    assert "--mpe-members 15" in line and "--mode pool" in line
    assert "sustain pedal" in line
    assert f"  {line}" in text.splitlines()          # the summary says it in one line


def test_pedalled_notes_cut_short_are_counted_too(tmp_path):
    # a broken chord under the sustain pedal: each key released at once, the pedal holds them
    notes = [(i * TPB // 2, i * TPB // 2 + TPB // 4, k)
             for i, k in enumerate([36, 43, 48, 52, 55, 60, 64, 67, 72])]
    parts = {0: notes, "pedal": {0: [(0, 6 * TPB)]}}
    out, rep, text = convert(tmp_path, parts, "--profile", "werckmeister-3", "--mpe-members", "5")
    cut = cut_notes(parts, out, [0])
    assert cut == 4                  # 9 notes held by the pedal on 5 members
    assert rep["steals"] == cut
    assert rep["steals_explained"].startswith("4 notes cut short by steals")


def test_two_parts_share_a_port_and_the_advice_says_so(tmp_path):
    # two parts: each gets a zone of 7 members (lower and upper zone of one port); part 1
    # holds a nine-note cluster
    p1 = [(i * 60, 4 * TPB, k) for i, k in enumerate([48, 50, 52, 53, 55, 57, 59, 60, 62])]
    p2 = [(0, 4 * TPB, 43), (TPB, 4 * TPB, 47)]
    parts = {0: p1, 1: p2}
    out, rep, text = convert(tmp_path, parts, "--profile", "meantone-quarter", "--adaptive")
    cut = cut_notes(parts, out, [0, 15])
    assert cut == 2
    assert rep["steals"] == cut
    line = rep["steals_explained"]
    assert "--merge-parts" in line and "--mpe-members" not in line
    assert "--mode pool" not in line          # adaptive: the pool shares no channel either


def test_no_steal_no_line(tmp_path):
    parts = {0: BUILD}
    out, rep, text = convert(tmp_path, parts, "--profile", "meantone-quarter")   # 15 members
    assert cut_notes(parts, out, [0]) == 0
    assert rep["steals"] == 0 and "steals_explained" not in rep
    assert "cut short" not in text


def test_the_daemon_explains_steals_in_its_status_line_and_ctl_status():
    r = Rig("profile: meantone-quarter\nengine:\n  mode: mpe\n  mpe_members: 2\n", control=True)
    try:
        assert r.daemon.control.status().get("steals_explained") is None
        r.play(note_on(60), note_on(64))
        r.wait(0.05)
        r.play(note_on(67))             # a third note on two members: the first is cut
        r.wait(0.05)
        r.play(cc(64, 127), note_off(64), note_on(71))      # a pedalled note cut too
        r.wait(0.05)
        st = r.daemon.control.status()
        assert st["counters"]["steals"] == 2
        line = st["steals_explained"]
        assert line.startswith("2 notes cut short by steals") and "--mpe-members 15" in line
        row = [l for l in _fmt_status(st).splitlines() if l.startswith("notes cut short")]
        assert row and row[0].endswith(line)
        r.daemon._status_line()
        assert r.log.count("status: " + line) == 1
        r.play(note_off(60), note_off(67), note_off(71), cc(64, 0))
    finally:
        r.close()
