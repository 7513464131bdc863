"""A producer's arrangement, converted whole: every feature a real file mixes, in one file.

The piece is our own: an eight-chord chorale in G major sung by four voices (soprano, alto,
tenor, bass, one channel each), doubled by a piano that rolls its chords and pedals legato (the
sustain pedal lifted and pressed again just after each chord change), an electric bass on a
channel of its own that sets its pitch bend range to 12 semitones with RPN 0 and bends a held
note up 6 semitones and back, and drums on channel 10. A GM System On at tick 0, a program and a
volume per part, two tempos, markers and lyrics. Each part plays at a velocity of its own, so
a note of the output tells its part.

Sources of the checks:
* GM System On F0 7E 7F 09 01 F7: General MIDI System Level 1 specification (MMA, 1991; bytes
  from memory): after it a synth is at its power-up state (bend range 2 semitones, wheel
  centred, pedals up, programs 0), so a set-up written before it would be lost;
* RPN 0 pitch bend sensitivity (CC101 = 0, CC100 = 0, data entry CC6 semitones, CC38 cents) and
  the 14-bit pitch bend centred on 8192 spanning the range: MIDI 1.0 Detailed Specification;
* MPE specification (The MIDI Association, 2018): the MPE Configuration Message (RPN 6 on a
  manager channel, data entry = member count; manager 1 for the lower zone, 16 for the upper),
  a manager channel's bend and pedals act on every note of its zone;
* temperaments: tests/temperaments.py, computed from their published definitions;
* just ratios of the consonant intervals (6/5, 5/4, 4/3, 3/2, 8/5, 5/3, octaves): handbook
  values, as retuner.measure counts impurity; 12-EDO's thirds and sixths lie 14 to 16 c from
  them (common practice);
* the decoded pitch of every note is what tests/synthmodel.SynthModel (a GM synth written from
  the MIDI 1.0 and MPE specifications) hears, not retuner's own decoder;
* FluidSynth (a real GM synth) renders the converted files, measured against the same keys
  rendered untuned (tests/synth.py).

Two rules of retuner's own that the tolerances follow: the tuning's bend and the player's wheel
are each sent in whole bend steps (retuner.engine.outputs.bend), so while a wheel is off centre
a note may be half a step off for each; and in MPE a file's parts get a zone each (two zones a
port, so six parts make three files, each file the whole piece with its own parts' notes).
"""

from __future__ import annotations

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.config import EngineConfig
from retuner.measure import metrics, report
from retuner.pitch.tuning import Tuning
from retuner.profiles.profile import load_profile
from synth import cents, key_hz, measure_pitch, render
from synthmodel import SynthModel
from temperaments import MEANTONE, half_step

TPB = 480
BEAT = TPB
CHORD = 2 * BEAT                       # a chord every half note
GM_SYSTEM_ON = [0x7E, 0x7F, 0x09, 0x01]  # between F0 and F7 (General MIDI 1, from memory)

# parts: input channel (0-based), GM program, volume (CC7), velocity telling the part
SOPRANO, ALTO, TENOR, BASS_VOICE, PIANO, BASS, DRUMS = 0, 1, 2, 3, 4, 5, 9
PROGRAM = {SOPRANO: 52, ALTO: 53, TENOR: 68, BASS_VOICE: 70, PIANO: 0, BASS: 33, DRUMS: 0}
VOLUME = {SOPRANO: 100, ALTO: 92, TENOR: 88, BASS_VOICE: 96, PIANO: 84, BASS: 110, DRUMS: 90}
VELOCITY = {SOPRANO: 81, ALTO: 82, TENOR: 83, BASS_VOICE: 84, PIANO: 71, BASS: 91}
PART_OF_VELOCITY = {v: p for p, v in VELOCITY.items()}

# (soprano, alto, tenor, bass) per chord: G  Em  C  D  Am  D  D  G  (our own)
SATB = [(71, 67, 62, 43), (71, 67, 64, 40), (72, 67, 64, 48), (74, 66, 62, 50),
        (72, 69, 64, 45), (69, 66, 62, 50), (66, 62, 57, 50), (67, 62, 59, 43)]
# the piano's rolled chords (lowest first) and the electric bass's roots, one per chord
PIANO_CHORDS = [(55, 59, 62, 67), (52, 55, 59, 64), (48, 52, 55, 60), (50, 54, 57, 62),
                (45, 48, 52, 57), (50, 54, 57, 62), (50, 54, 57, 60), (43, 47, 50, 55)]
BASS_ROOTS = [31, 28, 36, 38, 33, 38, 38, 31]
ROLL_TICKS = 12                        # between the notes of a rolled chord (about 12 ms)
WHEEL_CHORD = 2                        # the bass bends its C2 up 6 semitones and back
WHEEL_RANGE = 12                       # semitones, set by the bass itself with RPN 0
# the wheel gesture: (tick within the chord, 14-bit value - 8192); 4096 = +6 semitones at 12
WHEEL_GESTURE = [(60 + 20 * i, 4096 * i // 8) for i in range(9)] + \
                [(420 + 20 * i, 4096 - 4096 * i // 8) for i in range(9)]
TEMPOS = [(0, 500000), (4 * CHORD, 600000)]          # 120 bpm, then 100 bpm from chord 5
END = len(SATB) * CHORD


def _track(events, name):
    """[(absolute tick, message)] -> a track with delta times (order at a tick kept)."""
    tr = mido.MidiTrack([mido.MetaMessage("track_name", name=name, time=0)])
    last = 0
    for tick, m in sorted(events, key=lambda e: e[0]):
        tr.append(m.copy(time=tick - last))
        last = tick
    return tr


def _dress(ch):
    return [(0, mido.Message("program_change", channel=ch, program=PROGRAM[ch])),
            (0, mido.Message("control_change", channel=ch, control=7, value=VOLUME[ch]))]


def _note(ch, on, off, key, velocity):
    return [(on, mido.Message("note_on", channel=ch, note=key, velocity=velocity)),
            (off, mido.Message("note_off", channel=ch, note=key, velocity=64))]


def arrangement(path):
    """Write the arrangement (type 1: a conductor track, then one track per part)."""
    mf = mido.MidiFile(type=1, ticks_per_beat=TPB)
    conductor = [(0, mido.Message("sysex", data=GM_SYSTEM_ON)),
                 (0, mido.MetaMessage("time_signature", numerator=4, denominator=4)),
                 (0, mido.MetaMessage("key_signature", key="G")),
                 (0, mido.MetaMessage("marker", text="Verse")),
                 (4 * CHORD, mido.MetaMessage("marker", text="Cadence"))]
    conductor += [(tick, mido.MetaMessage("set_tempo", tempo=tempo)) for tick, tempo in TEMPOS]
    conductor.append((END + BEAT, mido.MetaMessage("end_of_track")))
    mf.tracks.append(_track(conductor[:-1], "Conductor"))
    names = {SOPRANO: "Soprano", ALTO: "Alto", TENOR: "Tenor", BASS_VOICE: "Bass voice"}
    words = ["Morn", "ing", "light", "on", "the", "hill", "a", "gain"]
    for v, ch in enumerate((SOPRANO, ALTO, TENOR, BASS_VOICE)):
        ev = _dress(ch)
        for i, chord in enumerate(SATB):
            ev += _note(ch, i * CHORD, (i + 1) * CHORD - 30, chord[v], VELOCITY[ch])
        if ch == SOPRANO:
            ev += [(i * CHORD, mido.MetaMessage("lyrics", text=w)) for i, w in enumerate(words)]
        mf.tracks.append(_track(ev, names[ch]))
    # piano: each chord rolled upwards; keys up before the next chord, the pedal holding them
    # until just after the change (legato pedalling: up 20 ticks after, down again at 60)
    ev = _dress(PIANO)
    for i, chord in enumerate(PIANO_CHORDS):
        start = i * CHORD
        for j, k in enumerate(chord):
            ev += _note(PIANO, start + j * ROLL_TICKS, start + CHORD - 120, k, VELOCITY[PIANO])
        if i:
            ev.append((start + 20, mido.Message("control_change", channel=PIANO, control=64, value=0)))
        ev.append((start + 60, mido.Message("control_change", channel=PIANO, control=64, value=127)))
    ev.append((END, mido.Message("control_change", channel=PIANO, control=64, value=0)))
    mf.tracks.append(_track(ev, "Piano"))
    # electric bass: its own bend range (RPN 0 = 12 semitones, then RPN null), one wheel gesture
    ev = _dress(BASS) + [(0, mido.Message("control_change", channel=BASS, control=c, value=v))
                         for c, v in ((101, 0), (100, 0), (6, WHEEL_RANGE), (38, 0), (101, 127), (100, 127))]
    for i, k in enumerate(BASS_ROOTS):
        ev += _note(BASS, i * CHORD, (i + 1) * CHORD - 40, k, VELOCITY[BASS])
    start = WHEEL_CHORD * CHORD
    ev += [(start + dt, mido.Message("pitchwheel", channel=BASS, pitch=w)) for dt, w in WHEEL_GESTURE]
    mf.tracks.append(_track(ev, "Electric bass"))
    # drums (channel 10): kick on 1 and 3, snare on 2 and 4, closed hi-hat on every eighth
    ev = _dress(DRUMS)
    for beat in range(END // BEAT):
        t = beat * BEAT
        ev += _note(DRUMS, t, t + 60, 36 if beat % 2 == 0 else 38, 100)
        ev += _note(DRUMS, t, t + 40, 42, 70)
        ev += _note(DRUMS, t + BEAT // 2, t + BEAT // 2 + 40, 42, 60)
    mf.tracks.append(_track(ev, "Drums"))
    mf.save(str(path))


def solo_excerpt(path, programs=True):
    """The arrangement's opening (GM System On, tempos, every part's program and volume, the
    bass's RPN 0) with single notes, one at a time, for a real synth to be measured on: the
    piano on keys where quarter-comma meantone departs most from 12-EDO, then the bass holding
    a note bent +6 semitones by its wheel. Returns [(key, read from s, read to s)] per note.
    ``programs=False``: without the program changes (every part on GM program 0)."""
    mf = mido.MidiFile(type=1, ticks_per_beat=TPB)
    conductor = [(0, mido.Message("sysex", data=GM_SYSTEM_ON))]
    conductor += [(tick, mido.MetaMessage("set_tempo", tempo=tempo)) for tick, tempo in TEMPOS]
    mf.tracks.append(_track(conductor, "Conductor"))
    def dress(ch):
        return [e for e in _dress(ch) if programs or e[1].type != "program_change"]

    piano = dress(PIANO)
    reads = []
    for i, k in enumerate((60, 64, 68, 63, 66)):
        on = BEAT + i * 2 * BEAT
        piano += _note(PIANO, on, on + 2 * BEAT - 120, k, VELOCITY[PIANO])
        reads.append((k, on + 60, on + 2 * BEAT - 180))
    mf.tracks.append(_track(piano, "Piano"))
    bass = dress(BASS) + [(0, mido.Message("control_change", channel=BASS, control=c, value=v))
                           for c, v in ((101, 0), (100, 0), (6, WHEEL_RANGE), (38, 0), (101, 127), (100, 127))]
    on = BEAT + 11 * BEAT
    bass += _note(BASS, on, on + 4 * BEAT, 40, VELOCITY[BASS])
    bass += [(on + 20 + 10 * i, mido.Message("pitchwheel", channel=BASS, pitch=4096 * i // 8)) for i in range(9)]
    bass.append((on + 4 * BEAT + 10, mido.Message("pitchwheel", channel=BASS, pitch=0)))
    reads.append((40, on + 2 * BEAT // 3, on + 4 * BEAT - 60))
    mf.tracks.append(_track(bass, "Electric bass"))
    mf.save(str(path))
    seconds = mido.MidiFile(str(path))
    return [(k, _seconds(seconds, a), _seconds(seconds, b)) for k, a, b in reads]


def _seconds(mf, tick):
    """Seconds at ``tick`` under the file's tempo map (SMF: Set Tempo in microseconds a beat)."""
    tempos = sorted((t, m.tempo) for tr in mf.tracks for t, m in _absolute(tr) if m.type == "set_tempo")
    s, last_tick, tempo = 0.0, 0, 500000
    for t, tp in tempos:
        if t >= tick:
            break
        s += (t - last_tick) * tempo / 1e6 / mf.ticks_per_beat
        last_tick, tempo = t, tp
    return s + (tick - last_tick) * tempo / 1e6 / mf.ticks_per_beat


# -- reading files back --------------------------------------------------------------------------
def _absolute(track):
    tick = 0
    for m in track:
        tick += m.time
        yield tick, m


def timeline(path):
    """Every message of a file as a player sends it (tracks merged, order at a tick kept),
    grouped by tick: [(tick, [message, ...])]."""
    groups: list[tuple[int, list]] = []
    for tick, m in _absolute(mido.merge_tracks(mido.MidiFile(str(path)).tracks)):
        if m.is_meta:
            continue
        if not groups or groups[-1][0] != tick:
            groups.append((tick, []))
        groups[-1][1].append(m.copy(time=0))
    return groups


def channel_events(path, channel):
    """(tick, bytes) of every event on one channel, in file order per track, tracks merged."""
    return sorted((t, bytes(m.bytes())) for tr in mido.MidiFile(str(path)).tracks
                  for t, m in _absolute(tr) if not m.is_meta and getattr(m, "channel", None) == channel)


def meta_events(path, types=("set_tempo", "marker", "lyrics")):
    return sorted((t, m.type, bytes(m.bytes())) for tr in mido.MidiFile(str(path)).tracks
                  for t, m in _absolute(tr) if m.is_meta and m.type in types)


def one_file_only(src, outs):
    """Drums byte for byte, each event at its tick, and the markers and lyrics, in the first output
    file only (part files played together on their ports sound each drum once); the tempo map in
    every file, each of which plays on its own."""
    for i, out in enumerate(outs):
        first = i == 0
        assert channel_events(out, DRUMS) == (channel_events(src, DRUMS) if first else [])
        assert meta_events(out, ("marker", "lyrics")) == (meta_events(src, ("marker", "lyrics")) if first else [])
        assert meta_events(out, ("set_tempo",)) == meta_events(src, ("set_tempo",))


def note_ons(paths):
    """(tick, key, velocity) of every note-on of the files but the drums'."""
    return sorted((t, m.note, m.velocity) for p in paths for tr in mido.MidiFile(str(p)).tracks
                  for t, m in _absolute(tr) if m.type == "note_on" and m.velocity and m.channel != DRUMS)


def mpe_zones(path):
    """manager channel -> its member channels, from the MPE Configuration Messages in the file
    (MPE specification 2018: RPN 6 on channel 1 (lower zone: members 2 up) or 16 (upper zone:
    members 15 down), data entry MSB = member count)."""
    rpn, zones = {}, {}
    for _, msgs in timeline(path):
        for m in msgs:
            if m.type != "control_change":
                continue
            if m.control in (101, 100):
                rpn[(m.channel, m.control)] = m.value
            elif m.control == 6 and (rpn.get((m.channel, 101)), rpn.get((m.channel, 100))) == (0, 6):
                n = m.value
                if m.channel == 0:
                    zones[0] = set(range(1, 1 + n))
                elif m.channel == 15:
                    zones[15] = set(range(15 - n, 15))
    return zones


class Listener:
    """An output file heard by GM synths (tests/synthmodel.py): one for the whole port in pool
    mode, one per MPE zone (each reads only its own zone's notes), and what the player did, from
    the input file heard by a GM synth of its own (the bass's wheel at its own RPN 0 range)."""

    def __init__(self, src, out, mpe):
        zones = mpe_zones(out) if mpe else {}
        assert bool(zones) == mpe
        self.synths = [(SynthModel(mpe_manager=m), members, m) for m, members in zones.items()] or \
                      [(SynthModel(), set(range(16)) - {DRUMS}, None)]
        self.player = SynthModel()
        self.input = dict(timeline(src))
        self.output = dict(timeline(out))

    def ticks(self):
        """Walk both files tick by tick; yields each tick once every message at it was heard."""
        for tick in sorted(set(self.input) | set(self.output)):
            self.player.feed(self.input.get(tick, []))
            self.on = []
            for s, members, manager in self.synths:
                s.feed(self.output.get(tick, []))
                self.on += [(s, c, v, manager) for c, v in s.last_on if c in members]
            yield tick

    def wheel(self, part):
        """The player's wheel on ``part`` in cents (MIDI 1.0: 14-bit value over 8192 x its range)."""
        return self.player.bend[part] / 8192.0 * self.player.range[part]

    def sounding(self):
        """(synth, channel, voice, part, manager) of every note sounding in a zone's own channels."""
        for s, members, manager in self.synths:
            for c, v in s.sounding():
                if c in members:
                    yield s, c, v, PART_OF_VELOCITY[v.velocity], manager

    def problems(self):
        return [p for s, _, _ in self.synths for p in s.problems]


def sounds_with_its_parts_dress(listener):
    """Every note-on of the tick: the program and volume in force where it sounds are its part's
    (pool: the channel's own, as a GM synth keeps them, MIDI 1.0; MPE: the zone's, set on its
    manager channel, MPE specification 2018, from memory). Returns the notes checked."""
    n = 0
    for s, c, v, manager in listener.on:
        part = PART_OF_VELOCITY[v.velocity]
        where = c if manager is None else manager
        program = v.program[2] if manager is None else s.program[manager][2]
        assert (program, s.controller(where, 7)) == (PROGRAM[part], VOLUME[part]), (c, v.key, part)
        n += 1
    return n


# -- the conversions --------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def piece(tmp_path_factory):
    d = tmp_path_factory.mktemp("arrangement")
    src = d / "arrangement.mid"
    arrangement(src)
    return d, src


def convert(piece, name, tuning, **config):
    d, src = piece
    opts = ConvertOptions(tuning=tuning, config=EngineConfig(**config))
    res = convert_file(src, d / f"{name}.mid", opts)
    return res, opts, [o.path for o in res.outputs]


def test_the_arrangement_holds_what_a_producer_writes(piece):
    # the file as written (read back with mido), so the checks below are not vacuous
    _, src = piece
    mf = mido.MidiFile(str(src))
    first = mido.merge_tracks(mf.tracks)
    sysex = [m for m in first if m.type == "sysex"]
    assert [m.bytes() for m in sysex] == [[0xF0, 0x7E, 0x7F, 0x09, 0x01, 0xF7]]   # GM System On
    assert len({m.tempo for m in first if m.type == "set_tempo"}) == 2
    assert sum(m.type == "lyrics" for m in first) == len(SATB)
    player = SynthModel()
    max_wheel = 0.0
    for _, msgs in timeline(src):
        player.feed(msgs)
        if any(v.key == BASS_ROOTS[WHEEL_CHORD] for c, v in player.sounding() if c == BASS):
            max_wheel = max(max_wheel, player.bend[BASS] / 8192 * player.range[BASS])
    assert player.range[BASS] == 1200.0 and max_wheel == 600.0        # RPN 0 = 12, +6 semitones
    assert len(channel_events(src, DRUMS)) > 50


@pytest.mark.parametrize("mode,bend_range", [("pool", 2.0), ("pool", 12.0), ("mpe", 2.0)],
                         ids=["pool", "pool-bend-range-12", "mpe"])
def test_a_temperament_sounds_at_its_pitch_plus_the_players_wheel(piece, mode, bend_range):
    """Quarter-comma meantone, every note at every moment it sounds (pedalled notes too, the bass
    while its wheel moves) within half a bend step at the range the synth has for its channel
    (while the wheel is off centre, half a step for the tuning's share and half for the wheel's;
    MPE: plus half a manager step where the manager's bend is off centre)."""
    _, _, outs = convert(piece, f"meantone-{mode}-{bend_range:g}", load_profile("meantone-quarter"),
                              mode=mode, bend_range=bend_range)
    _, src = piece
    assert len(outs) == (1 if mode == "pool" else 3)             # MPE: two zones a port
    checked = bent = dressed = 0
    for out in outs:
        ear = Listener(src, out, mpe=(mode == "mpe"))
        for _ in ear.ticks():
            dressed += sounds_with_its_parts_dress(ear)
            for s, c, v, part, manager in ear.sounding():
                want = MEANTONE[v.key] + ear.wheel(part)
                # the tuning's bend and the wheel's are each in whole bend steps (the wheel's share
                # is then exactly the player's, retuner.engine.outputs.bend): half a step each
                tol = half_step(s.range[c] / 100) * (2 if ear.wheel(part) else 1)
                if manager is not None and s.bend[manager]:
                    tol += half_step(s.range[manager] / 100)
                assert abs(s.pitch(c, v) - want) <= tol + 1e-9, (out, c, v.key, part, s.pitch(c, v), want)
                checked += 1
                bent += part == BASS and ear.wheel(part) == 600.0
        assert not ear.problems(), ear.problems()
    assert dressed == 8 * 4 + 8 * 4 + 8
    assert checked > 500 and bent > 0
    one_file_only(src, outs)
    assert note_ons(outs) == note_ons([src])


def harmony(res, opts):
    """(impurity, largest drift) in cents of all the output files sounding together, decoded as
    a synth hears them with the player's wheel taken off (retuner.measure)."""
    notes = [n for dec in report.decode_outputs(res, opts) for n in dec.notes]
    imp, _, drift = metrics.moment_figures(notes, report.SETTLE)
    return imp, drift["max"]


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_adaptive_tunes_the_parts_as_one_harmony(piece, mode):
    res, opts, _ = convert(piece, f"adaptive-{mode}-harmony", Tuning.equal12(), mode=mode,
                              adaptive=AdaptiveConfig())
    imp, drift = harmony(res, opts)
    # the same file untuned: 12-EDO's thirds and sixths, several cents from just
    res12, opts12, _ = convert(piece, f"edo12-{mode}", Tuning.equal12(), mode=mode)
    imp12, drift12 = harmony(res12, opts12)
    assert imp12 > 5.0 and drift12 == 0.0
    assert imp <= 1.0, imp
    assert drift <= 6.0, drift


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_adaptive_keeps_every_note_at_its_tick_on_its_parts_instrument(piece, mode):
    _, src = piece
    _, _, outs = convert(piece, f"adaptive-{mode}", Tuning.equal12(), mode=mode, adaptive=AdaptiveConfig())
    assert note_ons(outs) == note_ons([src])
    dressed = 0
    for out in outs:
        ear = Listener(src, out, mpe=(mode == "mpe"))
        for _ in ear.ticks():
            dressed += sounds_with_its_parts_dress(ear)
        assert not ear.problems(), ear.problems()
    one_file_only(src, outs)
    assert dressed == 8 * 4 + 8 * 4 + 8


@pytest.mark.parametrize("config", [dict(mode="mpe"), dict(bend_range=12.0)], ids=["mpe", "bend-range-12"])
def test_fluidsynth_plays_the_arrangement_in_tune(tmp_path, config):
    """FluidSynth renders the arrangement's opening with single notes (GM System On at tick 0,
    each part's program and volume, the bass's own RPN 0 and its wheel up 6 semitones), converted
    to quarter-comma meantone. Each note against the same note of the unconverted file (same key,
    program, velocity, wheel and read window): its meantone offset within 1.5 c (FluidSynth
    truncates pitch to whole cents and plays bends at 127/128 of their size: tests/synth.py)."""
    src = tmp_path / "excerpt.mid"
    reads = solo_excerpt(src)
    res = convert_file(src, tmp_path / "out.mid", ConvertOptions(tuning=load_profile("meantone-quarter"),
                                                                 config=EngineConfig(**config)))
    assert len(res.outputs) == 1
    ref = src
    if config.get("mode") == "mpe":
        # an MPE zone's program is set on its manager channel (MPE specification 2018); FluidSynth
        # is no MPE synth and plays the member channels with their own program, GM's default 0:
        # the untuned reference is played on program 0 too (another sample is a few cents off)
        ref = tmp_path / "excerpt-program-0.mid"
        assert solo_excerpt(ref, programs=False) == reads
    ref_wav = render(ref, tmp_path / "ref.wav")
    out_wav = render(res.outputs[0].path, tmp_path / "out.wav")
    for k, a, b in reads:
        want = MEANTONE[k] - 100.0 * k
        wheel = 600.0 if k == 40 else 0.0
        f_ref = measure_pitch(ref_wav, a, b - a, expected_hz=key_hz(k + wheel / 100))
        f_out = measure_pitch(out_wav, a, b - a, expected_hz=f_ref * 2 ** (want / 1200))
        assert abs(cents(f_out, f_ref) - want) <= 1.5, (k, cents(f_out, f_ref), want)
