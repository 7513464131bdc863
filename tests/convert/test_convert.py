"""`retuner convert` on files of our own: pitches, ticks, meta events, percussion, parts.

Outputs are decoded here independently of retuner (mido reads the file; a small decoder
below applies the MIDI 1.0 rules), and targets are computed independently:
12-EDO from pretty_midi.note_number_to_hz, quarter-comma meantone from its published
definition (every fifth narrowed by 1/4 syntonic comma, chain Eb..G#: J. Murray Barbour,
Tuning and Temperament, 1951, ch. 3), reference A4 = 440 Hz (ISO 16).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import mido
import pretty_midi
import pytest

from data import midigen

# MIDI 1.0 Detailed Specification: RPN 0 = pitch bend sensitivity (CC101 = 0, CC100 = 0,
# data entry MSB CC6 = semitones, LSB CC38 = cents); 14-bit bend, centre 8192.
CC_RPN_MSB, CC_RPN_LSB, CC_DATA_MSB, CC_DATA_LSB = 101, 100, 6, 38


def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "retuner", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=120)


# -- independent targets --------------------------------------------------------------------
def edo12_cents(key):
    """Cents above key 0 of 12-EDO at A4 = 440 Hz, from pretty_midi's Hz."""
    hz = pretty_midi.note_number_to_hz(key)
    return 1200 * math.log2(hz / (440.0 * 2 ** (-69 / 12)))


def meantone_quarter_cents(key):
    """Quarter-comma meantone: fifth = 3/2 * (81/80) ** (-1/4) (Barbour 1951); chain Eb..G#
    (positions -3..8 from C); A4 = 440 Hz."""
    fifth = 1200 * math.log2(1.5) - 0.25 * 1200 * math.log2(81 / 80)
    pos = {0: 0, 7: 1, 2: 2, 9: 3, 4: 4, 11: 5, 6: 6, 1: 7, 8: 8, 5: -1, 10: -2, 3: -3}

    def above_c(pc):
        return (pos[pc] * fifth) % 1200.0

    octave, pc = divmod(key, 12)
    return 1200 * octave + above_c(pc) + (6900 - (1200 * 5 + above_c(9)))


# -- an independent decoder -------------------------------------------------------------------
def decode(path, exclude=(9,)):
    """Notes of a file as a synth hears them: (on_tick, off_tick, channel, key, cents) sorted,
    plus the bend range per channel (from RPN 0; 2 semitones if never set, MIDI 1.0 default)."""
    mf = mido.MidiFile(path)
    ev = []
    for ti, tr in enumerate(mf.tracks):
        tick = 0
        for i, m in enumerate(tr):
            tick += m.time
            ev.append((tick, ti, i, m))
    ev.sort(key=lambda e: (e[0], e[1], e[2]))
    rng = [200.0] * 16
    rpn = [None] * 16
    bend = [0] * 16
    sounding = {}
    notes = []
    for tick, _, _, m in ev:
        if m.is_meta or not hasattr(m, "channel") or m.channel in exclude:
            continue
        c = m.channel
        if m.type == "control_change":
            if m.control == CC_RPN_MSB:
                rpn[c] = (m.value, rpn[c][1] if rpn[c] else 127)
            elif m.control == CC_RPN_LSB:
                rpn[c] = (rpn[c][0] if rpn[c] else 127, m.value)
            elif m.control == CC_DATA_MSB and rpn[c] == (0, 0):
                rng[c] = 100.0 * m.value
            elif m.control == CC_DATA_LSB and rpn[c] == (0, 0):
                rng[c] = 100.0 * (rng[c] // 100) + m.value
        elif m.type == "pitchwheel":
            bend[c] = m.pitch
        elif m.type == "note_on" and m.velocity > 0:
            assert (c, m.note) not in sounding, "a key struck twice on one channel"
            sounding[(c, m.note)] = [tick, None, c, m.note, 100.0 * m.note + bend[c] / 8192.0 * rng[c]]
        elif m.type in ("note_on", "note_off"):
            n = sounding.pop((c, m.note))
            n[1] = tick
            notes.append(tuple(n))
    assert not sounding, f"notes never released: {sounding}"
    return sorted(notes), rng


def input_notes(path, exclude=(9,)):
    """(on_tick, off_tick, channel, key) of the input file (FIFO note-off matching)."""
    mf = mido.MidiFile(path)
    ev = []
    for ti, tr in enumerate(mf.tracks):
        tick = 0
        for i, m in enumerate(tr):
            tick += m.time
            ev.append((tick, ti, i, m))
    ev.sort(key=lambda e: (e[0], e[1], e[2]))
    open_ = {}
    out = []
    for tick, _, _, m in ev:
        if m.is_meta or not hasattr(m, "channel") or m.channel in exclude:
            continue
        if m.type == "note_on" and m.velocity > 0:
            open_.setdefault((m.channel, m.note), []).append(tick)
        elif m.type in ("note_on", "note_off"):
            on = open_[(m.channel, m.note)].pop(0)
            out.append((on, tick, m.channel, m.note))
    return sorted(out)


def meta_events(path):
    """Per track: (absolute tick, type, bytes) of every meta event except end of track."""
    mf = mido.MidiFile(path)
    out = []
    for tr in mf.tracks:
        tick = 0
        lst = []
        for m in tr:
            tick += m.time
            if m.is_meta and m.type != "end_of_track":
                lst.append((tick, m.type, bytes(m.bytes())))
        out.append(lst)
    return out


HALF_STEP_2 = 200.0 / 16384  # half a bend step at +-2 semitones, in cents (0.0122 c)


def match_notes(inp, out, target, tol=HALF_STEP_2 + 1e-9):
    """Every input note has an output note with the same key, the same on and off tick,
    at its target pitch. Returns the worst error."""
    assert len(inp) == len(out)
    pool = {}
    for n in out:
        pool.setdefault((n[0], n[1], n[3]), []).append(n)
    worst = 0.0
    for on, off, ch, key in inp:
        cands = pool.get((on, off, key))
        assert cands, f"no output note for key {key} at ticks {on}-{off}"
        n = cands.pop()
        err = abs(n[4] - target(key))
        worst = max(worst, err)
        assert err <= tol, f"key {key} at tick {on}: {n[4]:.4f} c, target {target(key):.4f} c"
    return worst


# -- tests ------------------------------------------------------------------------------------
def test_targets_are_what_the_sources_say():
    # pretty_midi: key 69 = 440 Hz (ISO 16); 12-EDO key k = 100 k cents above key 0
    assert edo12_cents(69) == pytest.approx(6900.0, abs=1e-9)
    assert edo12_cents(60) == pytest.approx(6000.0, abs=1e-9)
    # quarter-comma meantone: pure major third C-E (5/4 = 386.314 c, handbook value) and
    # the fifth 696.578 c (Barbour 1951, from memory)
    assert meantone_quarter_cents(64) - meantone_quarter_cents(60) == pytest.approx(386.3137, abs=1e-3)
    assert meantone_quarter_cents(67) - meantone_quarter_cents(60) == pytest.approx(696.5784, abs=1e-3)
    assert meantone_quarter_cents(69) == pytest.approx(6900.0, abs=1e-9)


@pytest.mark.parametrize("profile,target", [("edo12", edo12_cents), ("meantone-quarter", meantone_quarter_cents)])
@pytest.mark.parametrize("type_", [0, 1])
def test_round_trip_same_notes_same_ticks_exact_pitches(tmp_path, profile, target, type_):
    src = tmp_path / "piece.mid"
    midigen.four_part_piece(src, type_=type_)
    dst = tmp_path / "out.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", profile, "-q")
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""
    out, rng = decode(dst)
    inp = input_notes(src)
    assert len(inp) == sum(len(v) for v in midigen.VOICES)
    # the bend range announced with RPN 0 is +-2 semitones on every channel used
    assert {rng[n[2]] for n in out} == {200.0}
    worst = match_notes(inp, out, target)
    assert worst <= HALF_STEP_2
    mo = mido.MidiFile(dst)
    assert mo.type == type_ and mo.ticks_per_beat == midigen.TPB
    assert len(mo.tracks) == len(mido.MidiFile(src).tracks)
    # meta events (tempo, time signature, markers, lyrics, track names) kept in place
    assert meta_events(dst) == meta_events(src)


def test_four_part_piece_in_meantone_note_by_note_with_original_timing(tmp_path):
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=1)
    dst = tmp_path / "hymn-mt.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "--report", tmp_path / "r.json")
    assert r.returncode == 0, r.stderr
    inp = input_notes(src)
    out, _ = decode(dst)
    match_notes(inp, out, meantone_quarter_cents)
    # timing in seconds too: the output's own tempo map gives each note the input's time
    pm_in = pretty_midi.PrettyMIDI(str(src))
    pm_out = pretty_midi.PrettyMIDI(str(dst))
    t_in = sorted((round(n.start, 9), round(n.end, 9), n.pitch) for i in pm_in.instruments for n in i.notes)
    t_out = sorted((round(n.start, 9), round(n.end, 9), n.pitch) for i in pm_out.instruments for n in i.notes)
    assert t_in == t_out
    rep = json.loads((tmp_path / "r.json").read_text())
    assert rep["notes"] == len(inp)
    assert rep["worst_pitch_error_cents"] <= HALF_STEP_2
    assert rep["steals"] == 0
    # the summary on stdout names the measures
    assert "impurity" in r.stdout and "steals" in r.stdout


def test_arrangement_drums_byte_for_byte_parts_on_their_own_channels(tmp_path):
    src = tmp_path / "band.mid"
    drum_events = midigen.arrangement(src)
    dst = tmp_path / "band-out.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "-q")
    assert r.returncode == 0, r.stderr
    raw = dst.read_bytes()
    # drums: every event at its tick with the same bytes (mido decodes running status)
    mo = mido.MidiFile(dst)
    drums_out = []
    for tr in mo.tracks:
        tick = 0
        for m in tr:
            tick += m.time
            if not m.is_meta and getattr(m, "channel", None) == 9:
                drums_out.append((tick, bytes(m.bytes())))
    assert drums_out == drum_events
    # every other note decodes to its target, tick-exact, with the sustain pedal in play
    inp = input_notes(src)
    out, _ = decode(dst)
    match_notes(inp, out, meantone_quarter_cents)
    assert meta_events(dst) == meta_events(src)
    # each part on its own output channels: no channel carries notes of two parts, and
    # each part's program change reaches every channel that plays its notes
    part_of_track = {1: 0, 2: 1, 3: 2}
    prog = {0: 0, 1: 48, 2: 32}
    chans_of = {}
    programs = {}
    for ti, tr in enumerate(mo.tracks):
        for m in tr:
            if m.type == "note_on" and m.velocity and m.channel != 9:
                chans_of.setdefault(part_of_track[ti], set()).add(m.channel)
            if m.type == "program_change":
                programs.setdefault(m.channel, set()).add(m.program)
    parts = list(chans_of.values())
    for a in range(len(parts)):
        for b in range(a + 1, len(parts)):
            assert not parts[a] & parts[b]
    for p, chans in chans_of.items():
        assert 9 not in chans
        for c in chans:
            assert programs.get(c) == {prog[p]}
    # the strings' volume controller reaches the strings' channels only
    vol = {m.channel for tr in mo.tracks for m in tr if m.type == "control_change" and m.control == 7}
    assert vol and vol <= chans_of[1]
    assert raw[:4] == b"MThd"


def test_split_output_when_parts_need_more_channels_than_a_port(tmp_path):
    src = tmp_path / "wide.mid"
    midigen.wide_arrangement(src)
    dst = tmp_path / "wide-out.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "-q")
    assert r.returncode == 0, r.stderr
    assert not dst.exists()
    outs = sorted(tmp_path.glob("wide-out-part*.mid"))
    assert [p.name for p in outs][:2] == ["wide-out-part1.mid", "wide-out-part2.mid"]
    # said in one line
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "wide-out-part1.mid" in lines[0]
    inp = input_notes(src)
    total = 0
    for p in outs:
        mo = mido.MidiFile(p)
        assert mo.tracks[0].name == "Conductor"
        out, _ = decode(p)
        chans = {n[2] for n in out}
        assert 9 not in chans and len(chans) <= 15
        parts_here = {ti for ti, tr in enumerate(mo.tracks) for m in tr if m.type == "note_on"}
        mine = [n for n in inp if n[2] + 1 in parts_here]
        match_notes(mine, out, meantone_quarter_cents)
        total += len(out)
    assert total == len(inp)


def test_tempo_map_drives_the_engine_clock(tmp_path):
    """With one pool channel and a 1 s release time, the second note of a pair (D4 after C4,
    different bends in meantone) re-bends a ringing channel when the one-beat rest is shorter than
    1 s (tempo 120: 0.5 s) but not when it is longer (tempo 30: 2 s). Same ticks, other tempo."""
    counts = {}
    for name, tempos in (("fast", (500000, 500000)), ("mixed", (500000, 2000000)), ("slow", (2000000, 2000000))):
        src = tmp_path / f"{name}.mid"
        midigen.tempo_pairs(src, tempos)
        dst = tmp_path / f"{name}-out.mid"
        rep = tmp_path / f"{name}.json"
        r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "--pool", "1",
                    "--release-time", "1", "--report", rep, "-q")
        assert r.returncode == 0, r.stderr
        counts[name] = json.loads(rep.read_text())["ringing_retunes"]
        match_notes(input_notes(src), decode(dst)[0], meantone_quarter_cents)
    # each pair starts after a long rest (8 beats), so only the D4 of a pair can ring-retune
    assert counts == {"fast": 2, "mixed": 1, "slow": 0}


@pytest.mark.parametrize("kind", midigen.MALFORMED)
def test_malformed_file_one_line_exit_2_no_output(tmp_path, kind):
    good = tmp_path / "good.mid"
    midigen.four_part_piece(good, type_=0)
    bad = tmp_path / f"{kind}.mid"
    bad.write_bytes(midigen.malformed(kind, good.read_bytes()))
    outdir = tmp_path / "out"
    outdir.mkdir()
    dst = outdir / "x.mid"
    r = run_cli("convert", bad, "-o", dst, "--profile", "edo12")
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert f"{kind}.mid" in lines[0]
    assert "Traceback" not in r.stderr
    assert list(outdir.iterdir()) == []  # nothing written, no temporary file left


def test_failed_conversion_leaves_an_existing_output_untouched(tmp_path):
    good = tmp_path / "good.mid"
    midigen.four_part_piece(good, type_=0)
    bad = tmp_path / "bad.mid"
    bad.write_bytes(midigen.malformed("truncated", good.read_bytes()))
    dst = tmp_path / "out.mid"
    dst.write_bytes(b"previous contents")
    r = run_cli("convert", bad, "-o", dst)
    assert r.returncode == 2
    assert dst.read_bytes() == b"previous contents"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.mid", "good.mid", "out.mid"]


def test_mts_mode_notes_stay_on_their_channels_and_decode(tmp_path):
    """MIDI Tuning Standard single note tuning change (MIDI 1.0 specification, MTS section):
    F0 7F dev 08 02 prog n [key xx yy zz]... F7, frequency = semitone xx + (yy*128+zz)/16384."""
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=1)
    dst = tmp_path / "mts.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "--mode", "mts", "-q")
    assert r.returncode == 0, r.stderr
    mo = mido.MidiFile(dst)
    table = {}
    ev = []
    for tr in mo.tracks:
        tick = 0
        for m in tr:
            tick += m.time
            ev.append((tick, m))
    ev.sort(key=lambda e: e[0])
    notes = []
    for tick, m in ev:
        if m.type == "sysex" and list(m.data[:1]) == [0x7F] and list(m.data[2:4]) == [8, 2]:
            n = m.data[5]
            for i in range(n):
                key, xx, yy, zz = m.data[6 + 4 * i: 10 + 4 * i]
                table[key] = 100.0 * xx + 100.0 * (yy * 128 + zz) / 16384
        elif m.type == "note_on" and m.velocity:
            notes.append((tick, m.channel, m.note, table[m.note]))
    inp = [(on, ch, key) for on, off, ch, key in input_notes(src)]
    assert sorted((t, c, k) for t, c, k, _ in notes) == sorted(inp)
    for _, _, key, cents in notes:
        # half a frequency-data step: 100/16384/2 cent (MTS)
        assert abs(cents - meantone_quarter_cents(key)) <= 100 / 32768 + 1e-9


def test_plot_is_a_valid_png(tmp_path):
    import matplotlib.image
    src = tmp_path / "band.mid"
    midigen.arrangement(src)
    png = tmp_path / "plot.png"
    r = run_cli("convert", src, "-o", tmp_path / "o.mid", "--profile", "edo12", "--adaptive",
                "--plot", png, "-q")
    assert r.returncode == 0, r.stderr
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948)
    img = matplotlib.image.imread(str(png))
    assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
    # not a blank picture: several distinct colours (the parts and the drift line)
    flat = {tuple(px) for px in img.reshape(-1, img.shape[2])[::97].tolist()}
    assert len(flat) > 5


def test_report_json_fields(tmp_path):
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src)
    rep = tmp_path / "r.json"
    r = run_cli("convert", src, "-o", tmp_path / "o.mid", "--adaptive", "--report", rep)
    assert r.returncode == 0, r.stderr
    d = json.loads(rep.read_text())
    for k in ("notes", "channels_used", "steals", "ringing_retunes", "bends_sent",
              "worst_pitch_error_cents", "impurity_cents", "motion_cents_per_note",
              "drift_max_cents", "drift_final_cents", "drift_rms_cents"):
        assert k in d
    assert d["notes"] == len(input_notes(src))
    assert d["adaptive"] is True and d["worst_pitch_error_cents"] is None
    assert all(1 <= c <= 16 and c != 10 for c in d["channels_used"])


def test_mpe_two_parts_per_file_one_zone_each(tmp_path):
    """MPE specification (The MIDI Association, 2018): MPE Configuration Message = RPN 6 on the
    manager channel (1 for the lower zone, 16 for the upper), data entry MSB = member count;
    member pitch bend range 48 semitones by default, set here with RPN 0 on each member."""
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=1)
    dst = tmp_path / "mpe.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "--mode", "mpe", "-q")
    assert r.returncode == 0, r.stderr
    outs = [tmp_path / "mpe-part1.mid", tmp_path / "mpe-part2.mid"]
    assert all(p.exists() for p in outs) and not dst.exists()
    inp = input_notes(src)
    for i, p in enumerate(outs):
        mo = mido.MidiFile(p)
        cc = [(m.channel, m.control, m.value) for tr in mo.tracks for m in tr if m.type == "control_change"]
        # lower zone: members 2..8 (7); upper zone: members 15..11 (5), stopping short of the
        # drums on channel 10, which pass through and must not be taken for member notes
        for manager, members in ((0, 7), (15, 5)):
            k = cc.index((manager, CC_RPN_LSB, 6))
            assert cc[k - 1] == (manager, CC_RPN_MSB, 0) and cc[k + 1] == (manager, CC_DATA_MSB, members)
        out, rng = decode(p)
        members_lower = {n[2] for n in out if n[2] < 8}
        members_upper = {n[2] for n in out if n[2] >= 8}
        assert members_lower and members_upper and 0 not in members_lower and 15 not in members_upper
        assert members_lower <= set(range(1, 8)) and members_upper <= set(range(10, 15))
        assert {rng[n[2]] for n in out} == {4800.0}
        mine = [n for n in inp if n[2] in (2 * i, 2 * i + 1)]
        # half a bend step at +-48 semitones: 4800/16384 c
        match_notes(mine, out, meantone_quarter_cents, tol=4800 / 16384 + 1e-9)


def test_plot_without_matplotlib_is_one_clear_line(tmp_path):
    """matplotlib is an optional extra: without it --plot fails before any work, in one line."""
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src)
    code = (
        "import sys, importlib.abc\n"
        "class Block(importlib.abc.MetaPathFinder):\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name == 'matplotlib' or name.startswith('matplotlib.'):\n"
        "            raise ImportError('No module named ' + repr(name))\n"
        "        return None\n"
        "sys.meta_path.insert(0, Block())\n"
        "from retuner.cli import main\n"
        "sys.exit(main(sys.argv[1:]))\n")
    out = tmp_path / "o.mid"
    r = subprocess.run([sys.executable, "-c", code, "convert", str(src), "-o", str(out), "--plot",
                        str(tmp_path / "p.png")], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "matplotlib" in lines[0] and "retuner[plot]" in lines[0]
    assert not out.exists() and not (tmp_path / "p.png").exists()


def test_merge_parts_one_engine_as_the_daemon(tmp_path):
    src = tmp_path / "band.mid"
    drum_events = midigen.arrangement(src)
    dst = tmp_path / "merged.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "--merge-parts", "-q")
    assert r.returncode == 0, r.stderr
    match_notes(input_notes(src), decode(dst)[0], meantone_quarter_cents)
    # one pool, as live: each note sounds on a channel dressed with its own part's program and
    # volume (as a GM synth keeps them: the last program change and CC7 on the channel, MIDI
    # 1.0; volume 100 until set, GM2 default). midigen: piano velocity 70 program 0, strings
    # velocity 60 program 48 volume 90, bass velocity 90 program 32
    dress = {70: (0, 100), 60: (48, 90), 90: (32, 100)}
    prog, vol = {}, {}
    n = 0
    for m in mido.MidiFile(dst):
        if m.type == "program_change":
            prog[m.channel] = m.program
        elif m.type == "control_change" and m.control == 7:
            vol[m.channel] = m.value
        elif m.type == "note_on" and m.velocity and m.channel != 9:
            assert (prog.get(m.channel), vol.get(m.channel, 100)) == dress[m.velocity], m
            n += 1
    assert n == len(input_notes(src))


# -- property: random arrangements ------------------------------------------------------------
from hypothesis import given, settings, strategies as st  # noqa: E402

_note = st.tuples(st.integers(0, 3), st.integers(0, 40), st.integers(1, 12), st.integers(36, 84))


@settings(max_examples=25, deadline=None)
@given(st.lists(_note, min_size=1, max_size=60), st.sampled_from(["edo12", "meantone-quarter", "werckmeister-3"]),
       st.booleans())
def test_random_arrangements_decode_note_by_note(tmp_path_factory, notes, profile, with_drums):
    """Random parts (channels 1-4, notes on a grid of 120 ticks) plus drums: every note comes out
    at its ticks on its key with its profile pitch (targets from the profile here, checked against
    the definitions above for edo12 and meantone-quarter), drums untouched, in one file or split."""
    from retuner.convert import conversion
    from retuner.engine.core import EngineConfig
    from retuner.profiles.profile import load_profile

    tmp = tmp_path_factory.mktemp("rand")
    mf = mido.MidiFile(type=1, ticks_per_beat=480)
    mf.tracks.append(midigen.conductor())
    seen = set()
    per_ch = {}
    for ch, start, length, key in notes:
        # one key sounds once per channel at a time (a second press would end the first)
        if any(k == key and c == ch and not (start * 120 >= e or (start + length) * 120 <= s)
               for (c, k, s, e) in seen):
            continue
        seen.add((ch, key, start * 120, (start + length) * 120))
        per_ch.setdefault(ch, []).append((start * 120, length * 120, key))
    for ch, seq in sorted(per_ch.items()):
        mf.tracks.append(midigen._abs_to_track(midigen._notes(ch, seq)))
    if with_drums:
        mf.tracks.append(midigen._abs_to_track(midigen._notes(9, [(i * 240, 100, 42) for i in range(20)])))
    src = tmp / "r.mid"
    mf.save(src)
    tuning = load_profile(profile)
    res = conversion.convert_file(src, tmp / "o.mid", conversion.ConvertOptions(tuning, EngineConfig()))
    inp = input_notes(src)
    drums_in = [n for n in input_notes(src, exclude=()) if n[2] == 9]
    total = 0
    for o in res.outputs:
        out, _ = decode(o.path)
        mine = [n for n in inp if n[2] in o.parts]
        target = {"edo12": edo12_cents, "meantone-quarter": meantone_quarter_cents}.get(
            profile, lambda k: tuning.cents[k])
        match_notes(mine, out, target)
        total += len(out)
        drums_out = [n for n in input_notes(o.path, exclude=()) if n[2] == 9]
        assert drums_out == drums_in
    assert total == len(inp)
    assert res.stats.get("steals", 0) == 0


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_channels_that_only_set_up_do_not_split_the_file(tmp_path, mode):
    """General MIDI files often set volume and program on all 16 channels and play on a few:
    channels without notes are no parts, so nothing is split and their controls are kept."""
    src = tmp_path / "gm.mid"
    mid = mido.MidiFile(ticks_per_beat=480)
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    for ch in range(16):
        tr.append(mido.Message("control_change", channel=ch, control=7, value=100, time=0))
        tr.append(mido.Message("program_change", channel=ch, program=0, time=0))
    for i, k in enumerate((60, 64, 67)):
        tr.append(mido.Message("note_on", channel=2, note=k, velocity=80, time=0 if i == 0 else 10))
    tr.append(mido.Message("note_off", channel=2, note=60, time=480))
    tr.append(mido.Message("note_off", channel=2, note=64, time=0))
    tr.append(mido.Message("note_off", channel=2, note=67, time=0))
    mid.save(src)
    dst = tmp_path / "out.mid"
    r = run_cli("convert", src, "-o", dst, "--profile", "meantone-quarter", "--mode", mode, "-q")
    assert r.returncode == 0, r.stderr
    assert dst.exists() and not list(tmp_path.glob("out-part*.mid"))
    out, _ = decode(dst)
    assert sorted(n[3] for n in out) == [60, 64, 67]      # (on, off, channel, key, cents)
    vols = [m for t in mido.MidiFile(dst).tracks for m in t if m.type == "control_change" and m.control == 7]
    assert vols, "the set-up controllers are kept"


@pytest.mark.parametrize("drums,members", [(False, 15), (True, 8)])
def test_mpe_zone_takes_every_channel_unless_drums_pass_through(tmp_path, drums, members):
    """MPE specification (The MIDI Association, 2018): the MPE Configuration Message (RPN 6 on
    the manager channel, data entry = member count). A file with drums on channel 10 keeps them
    outside the zone (members 2..9); a file without gets all 15 members."""
    src = tmp_path / "in.mid"
    mid = mido.MidiFile(ticks_per_beat=480)
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    if drums:
        tr.append(mido.Message("note_on", channel=9, note=36, velocity=90, time=0))
        tr.append(mido.Message("note_off", channel=9, note=36, time=10))
    tr.append(mido.Message("note_on", channel=0, note=60, velocity=80, time=0))
    tr.append(mido.Message("note_off", channel=0, note=60, time=480))
    mid.save(src)
    dst = tmp_path / "out.mid"
    r = run_cli("convert", src, "-o", dst, "--mode", "mpe", "-q")
    assert r.returncode == 0, r.stderr
    cc = [(m.channel, m.control, m.value) for t in mido.MidiFile(dst).tracks for m in t if m.type == "control_change"]
    k = cc.index((0, 100, 6))
    assert cc[k - 1] == (0, 101, 0) and cc[k + 1] == (0, 6, members)


def test_quiet_prints_nothing_and_computes_no_measures(tmp_path, monkeypatch, capsys):
    """-q: no output at all, and the measures are not computed (they cost more than the
    conversion on long files); without -q the same file gets its summary."""
    from retuner import cli
    from retuner.measure import report

    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=1)
    calls = []
    real = report._decode
    monkeypatch.setattr(report, "_decode", lambda o, c: calls.append(o.path) or real(o, c))
    assert cli.main(["convert", str(src), "-o", str(tmp_path / "q.mid"), "-q"]) == 0
    cap = capsys.readouterr()
    assert cap.out == "" and cap.err == "" and calls == []
    assert mido.MidiFile(tmp_path / "q.mid").tracks                # the file itself is written
    assert cli.main(["convert", str(src), "-o", str(tmp_path / "s.mid")]) == 0
    assert f"notes {sum(len(v) for v in midigen.VOICES)}," in capsys.readouterr().out and len(calls) == 1


def test_lookahead_reports_progress_while_it_works(tmp_path):
    """The lookahead takes many times the plain conversion: it says what it is doing."""
    from retuner.adaptive.solver import AdaptiveConfig
    from retuner.convert import conversion
    from retuner.engine.core import EngineConfig
    from retuner.pitch.tuning import Tuning

    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=0)
    said = []
    opts = conversion.ConvertOptions(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()), lookahead=True)
    conversion.convert_file(src, tmp_path / "out.mid", opts, said.append)
    assert said[:2] == ["lookahead: playing the file live", "lookahead: planning"]
    assert said[2] == "lookahead: 1 plan tried" and all("plans tried" in s for s in said[3:])


def test_output_larger_than_the_input_limits_is_still_measured(tmp_path, monkeypatch):
    """The limits bound an input file; the output of a file within them may hold more events
    (the sustain pedal goes to every channel of the pool) and must still be read back for the
    summary."""
    from retuner.bench.performance import piano_tracks, write_file
    from retuner.convert import conversion
    from retuner.engine.core import EngineConfig
    from retuner.measure import report
    from retuner.pitch.tuning import Tuning
    from retuner.smf import reader

    src = tmp_path / "piano.mid"
    n = write_file(str(src), piano_tracks(200))
    monkeypatch.setattr(reader, "LIMITS", reader.Limits(events=n + 1))
    opts = conversion.ConvertOptions(Tuning.equal12(), EngineConfig())
    res = conversion.convert_file(src, tmp_path / "out.mid", opts)
    data = (tmp_path / "out.mid").read_bytes()
    with pytest.raises(Exception):              # as an input it would be over the limit
        reader.parse_smf(data, "out.mid")
    summary = report.build_report(res, opts, report.decode_outputs(res, opts))
    on_in = sum(1 for evs, _ in piano_tracks(200) for _, raw in evs if raw[0] & 0xF0 == 0x90 and raw[2])
    assert summary["notes"] == on_in                # every note of the input, read from the output
