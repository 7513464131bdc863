"""MIDI files of our own for the file-conversion tests, generated at test time (no binaries in git).

Everything here is written for this project: a four-part hymn-style piece, an arrangement
with piano, strings, bass and drums, a tempo-change file, a piece whose parts need more
channels than one port has, and malformed variants. Files are written with mido (a
general-purpose library, independent of retuner's own reader and writer); the drum track
is written as raw bytes with running status so "byte for byte" is a real check.
"""

from __future__ import annotations

import mido

TPB = 480


def _abs_to_track(events, name=None):
    """[(tick, message)] with absolute ticks -> a MidiTrack with delta times."""
    tr = mido.MidiTrack()
    if name:
        tr.append(mido.MetaMessage("track_name", name=name, time=0))
    last = 0
    for tick, m in sorted(events, key=lambda e: e[0]):  # stable: order at a tick kept
        tr.append(m.copy(time=tick - last))
        last = tick
    return tr


def _notes(channel, seq, velocity=80):
    """seq: [(start_tick, length_ticks, key)] -> [(tick, msg)] with note-offs as note_off."""
    ev = []
    for start, length, key in seq:
        ev.append((start, mido.Message("note_on", channel=channel, note=key, velocity=velocity)))
        ev.append((start + length, mido.Message("note_off", channel=channel, note=key, velocity=64)))
    # note-offs before note-ons at one tick (a repeated key ends before it starts again)
    ev.sort(key=lambda e: (e[0], 0 if e[1].type == "note_off" else 1))
    return ev


# A four-part piece of our own in C major (soprano, alto, tenor, bass), 3/4 time, with a
# pickup, passing notes, a suspension and a perfect cadence. (start beat, beats, key)
SOPRANO = [(0, 1, 67), (1, 2, 72), (3, 1, 71), (4, 1, 69), (5, 1, 67), (6, 2, 69), (8, 1, 71),
           (9, 2, 72), (11, 1, 74), (12, 1, 76), (13, 1, 74), (14, 1, 72), (15, 2, 71), (17, 1, 67),
           (18, 1, 69), (19, 1, 71), (20, 1, 72), (21, 2, 74), (23, 1, 71), (24, 3, 72)]
ALTO = [(0, 1, 64), (1, 2, 64), (3, 1, 67), (4, 1, 65), (5, 1, 64), (6, 2, 65), (8, 1, 67),
        (9, 2, 67), (11, 1, 67), (12, 1, 67), (13, 1, 65), (14, 1, 64), (15, 2, 62), (17, 1, 64),
        (18, 1, 65), (19, 1, 65), (20, 1, 64), (21, 1, 65), (22, 1, 65), (23, 1, 62), (24, 3, 64)]
TENOR = [(0, 1, 60), (1, 2, 55), (3, 1, 62), (4, 1, 60), (5, 1, 59), (6, 2, 60), (8, 1, 62),
         (9, 2, 64), (11, 1, 59), (12, 1, 60), (13, 1, 59), (14, 1, 57), (15, 2, 55), (17, 1, 59),
         (18, 1, 60), (19, 1, 62), (20, 1, 60), (21, 2, 57), (23, 1, 55), (24, 3, 55)]
BASS = [(0, 1, 48), (1, 2, 48), (3, 1, 43), (4, 1, 53), (5, 1, 52), (6, 2, 53), (8, 1, 50),
        (9, 2, 48), (11, 1, 55), (12, 1, 48), (13, 1, 50), (14, 1, 45), (15, 2, 43), (17, 1, 52),
        (18, 1, 53), (19, 1, 50), (20, 1, 52), (21, 2, 53), (23, 1, 43), (24, 3, 36)]
VOICES = [SOPRANO, ALTO, TENOR, BASS]


def _beats_to_ticks(voice, legato_gap=0):
    return [(b * TPB, n * TPB - legato_gap, k) for b, n, k in voice]


def conductor(tempo_changes=((0, 500000),), end=None):
    ev = [(0, mido.MetaMessage("time_signature", numerator=3, denominator=4)),
          (0, mido.MetaMessage("key_signature", key="C")),
          (0, mido.MetaMessage("marker", text="Verse")),
          (12 * TPB, mido.MetaMessage("marker", text="Second line"))]
    for tick, tempo in tempo_changes:
        ev.append((tick, mido.MetaMessage("set_tempo", tempo=tempo)))
    return _abs_to_track(ev, "Conductor")


def four_part_piece(path, *, type_=1, channels=(0, 1, 2, 3)):
    """The four-part piece: type 1 (conductor + one track per voice, one channel per voice)
    or type 0 (everything in one track); a tempo change before the second line; lyrics."""
    tempos = ((0, 600000), (12 * TPB, 750000))
    voice_ev = []
    for v, ch in zip(VOICES, channels):
        ev = [(0, mido.Message("program_change", channel=ch, program=0))]
        ev += _notes(ch, _beats_to_ticks(v, legato_gap=TPB // 16))
        voice_ev.append(ev)
    # lyrics on the soprano
    voice_ev[0] += [(0, mido.MetaMessage("lyrics", text="Praise")), (TPB, mido.MetaMessage("lyrics", text="the"))]
    if type_ == 1:
        mf = mido.MidiFile(type=1, ticks_per_beat=TPB)
        mf.tracks.append(conductor(tempos))
        for i, ev in enumerate(voice_ev):
            mf.tracks.append(_abs_to_track(ev, ["Soprano", "Alto", "Tenor", "Bass"][i]))
    else:
        mf = mido.MidiFile(type=0, ticks_per_beat=TPB)
        allev = [(t, m) for t, m in
                 [(0, mido.MetaMessage("time_signature", numerator=3, denominator=4))]
                 + [(t, mido.MetaMessage("set_tempo", tempo=tp)) for t, tp in tempos]]
        for ev in voice_ev:
            allev += ev
        mf.tracks.append(_abs_to_track(allev))
    mf.save(path)
    return mf


def _varlen(n):
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append((n & 0x7F) | 0x80)
        n >>= 7
    return bytes(reversed(out))


def drum_track_bytes():
    """A drum track (channel 10) as raw MTrk bytes with running status (kick, snare, hats),
    and the list of (absolute tick, full message bytes) it holds."""
    body = bytearray()
    events = []
    last = 0
    body += b"\x00\xFF\x03\x05Drums"
    first = True
    for bar in range(9):
        for beat in range(3):
            tick = (bar * 3 + beat) * TPB
            key = 36 if beat == 0 else 38 if beat == 1 else 42
            body += _varlen(tick - last)
            if first:
                body += bytes((0x99, key, 100))
                first = False
            else:
                body += bytes((key, 100))  # running status 0x99
            events.append((tick, bytes((0x99, key, 100))))
            body += _varlen(TPB // 4) + bytes((key, 0))  # note-on velocity 0 = note-off, running status
            events.append((tick + TPB // 4, bytes((0x99, key, 0))))
            last = tick + TPB // 4
    body += b"\x00\xFF\x2F\x00"
    return b"MTrk" + len(body).to_bytes(4, "big") + bytes(body), events


def arrangement(path):
    """Piano (channel 1, chords with the sustain pedal), strings (channel 2: program change,
    volume, the player's wheel), bass (channel 3) and drums (channel 10, raw bytes)."""
    mf = mido.MidiFile(type=1, ticks_per_beat=TPB)
    mf.tracks.append(conductor(((0, 500000), (15 * TPB, 400000))))
    # piano: the alto/tenor/soprano as chords on channel 1, pedal down per bar
    piano = [(0, mido.Message("program_change", channel=0, program=0))]
    for v in (SOPRANO, ALTO, TENOR):
        piano += _notes(0, _beats_to_ticks(v, legato_gap=TPB // 8), velocity=70)
    for bar in range(9):
        piano.append((bar * 3 * TPB + 10, mido.Message("control_change", channel=0, control=64, value=127)))
        piano.append((bar * 3 * TPB + 3 * TPB - 20, mido.Message("control_change", channel=0, control=64, value=0)))
    strings = [(0, mido.Message("program_change", channel=1, program=48)),
               (0, mido.Message("control_change", channel=1, control=7, value=90))]
    strings += _notes(1, [(b * TPB, n * TPB, k + 12) for b, n, k in SOPRANO[::2]], velocity=60)
    bass = [(0, mido.Message("program_change", channel=2, program=32))]
    bass += _notes(2, _beats_to_ticks(BASS, legato_gap=TPB // 8), velocity=90)
    mf.tracks.append(_abs_to_track(piano, "Piano"))
    mf.tracks.append(_abs_to_track(strings, "Strings"))
    mf.tracks.append(_abs_to_track(bass, "Bass"))
    mf.save(path)
    # append the raw drum track
    data = bytearray(open(path, "rb").read())
    drum_chunk, drum_events = drum_track_bytes()
    ntrks = int.from_bytes(data[10:12], "big") + 1
    data[10:12] = ntrks.to_bytes(2, "big")
    data += drum_chunk
    with open(path, "wb") as fh:
        fh.write(bytes(data))
    return drum_events


def wide_arrangement(path, parts=3, voices=8):
    """``parts`` parts of ``voices``-note chords each, all sounding together: in a 12-note
    tuning each part needs ``voices`` channels at once, so 3 x 8 > 15 channels of one port."""
    mf = mido.MidiFile(type=1, ticks_per_beat=TPB)
    mf.tracks.append(conductor())
    chord = [48, 52, 55, 58, 60, 62, 65, 69, 71, 74, 77]
    for p in range(parts):
        seq = []
        for bar in range(4):
            base = bar * 2
            keys = [chord[(i + base + p) % len(chord)] + 12 * (p % 2) for i in range(voices)]
            seq += [(bar * 2 * TPB, 2 * TPB - 30, k) for k in sorted(set(keys))]
        ev = [(0, mido.Message("program_change", channel=p, program=p * 8))] + _notes(p, seq)
        mf.tracks.append(_abs_to_track(ev, f"Part {p + 1}"))
    mf.save(path)


def tempo_pairs(path, tempos):
    """One channel, pairs of notes: C4 (held one beat), then after a one-beat rest D4 (a different
    bend in meantone). Each pair is played at the tempo given for it (a Set Tempo before it)."""
    ev = []
    tempo_ev = []
    for i, tempo in enumerate(tempos):
        start = i * 8 * TPB
        tempo_ev.append((start, mido.MetaMessage("set_tempo", tempo=tempo)))
        ev += _notes(0, [(start, TPB, 60), (start + 2 * TPB, TPB, 62)])
    mf = mido.MidiFile(type=1, ticks_per_beat=TPB)
    mf.tracks.append(_abs_to_track(tempo_ev, "Conductor"))
    mf.tracks.append(_abs_to_track(ev, "Melody"))
    mf.save(path)


# -- malformed files ----------------------------------------------------------------
def malformed(kind: str, good: bytes) -> bytes:
    """A broken variant of the type 0 file ``good`` (header 14 bytes, then one MTrk)."""
    if kind == "truncated":
        return good[: len(good) * 2 // 3]
    if kind == "bad-header":
        return b"MThd" + (6).to_bytes(4, "big") + (7).to_bytes(2, "big") + good[10:]
    if kind == "zero-ticks":
        return good[:12] + b"\x00\x00" + good[14:]
    if kind == "not-midi":
        return b"RIFF....WAVEfmt this is not a MIDI file at all" * 3
    if kind == "bad-running-status":
        # a track that starts with a data byte: no status byte to run on
        body = b"\x00\x3C\x40" + b"\x00\xFF\x2F\x00"
        return good[:14] + b"MTrk" + len(body).to_bytes(4, "big") + body
    if kind == "enormous-sysex":
        # a system exclusive event announcing 200 MB inside a 12-byte track
        body = b"\x00\xF0" + _varlen(200_000_000) + b"\x7E\x7F\x09\x01\xF7" + b"\x00\xFF\x2F\x00"
        return good[:14] + b"MTrk" + len(body).to_bytes(4, "big") + body
    raise KeyError(kind)


MALFORMED = ("truncated", "bad-header", "zero-ticks", "not-midi", "bad-running-status", "enormous-sysex")
