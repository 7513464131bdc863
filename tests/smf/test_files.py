"""retuner.smf: the Standard MIDI File reader and writer, the tempo map, messages.

Sources: "Standard MIDI Files 1.0" (MIDI Manufacturers Association, 1988/1996): header and
track chunks, variable-length quantities (its table of examples), running status, meta events
(FF type length data), system exclusive (F0 length data, F7 escapes), SMPTE division; tempo
maps cross-checked with pretty_midi (a general-purpose library)."""

from __future__ import annotations

import mido
import pretty_midi
import pytest
from hypothesis import given, settings, strategies as st

from data import midigen
from retuner.convert import conversion
from retuner.smf import messages
from retuner.smf import reader
from retuner.smf import writer
from retuner.errors import RetunerError

# SMF 1.0, "Variable Length Quantities": number -> bytes (the specification's own examples)
VLQ_EXAMPLES = [(0x00, "00"), (0x40, "40"), (0x7F, "7F"), (0x80, "81 00"), (0x2000, "C0 00"),
                (0x3FFF, "FF 7F"), (0x4000, "81 80 00"), (0x100000, "C0 80 00"),
                (0x1FFFFF, "FF FF 7F"), (0x200000, "81 80 80 00"), (0x8000000, "C0 80 80 00"),
                (0xFFFFFFF, "FF FF FF 7F")]


@pytest.mark.parametrize("n,hexbytes", VLQ_EXAMPLES)
def test_variable_length_quantities_as_the_specification_lists_them(n, hexbytes):
    b = bytes.fromhex(hexbytes)
    assert writer.varlen(n) == b
    assert reader.read_varlen(b, 0, len(b), str) == (n, len(b))


def _smf(fmt, div, *tracks, ntrks=None):
    out = b"MThd" + (6).to_bytes(4, "big") + fmt.to_bytes(2, "big") + \
        (len(tracks) if ntrks is None else ntrks).to_bytes(2, "big") + div.to_bytes(2, "big")
    for body in tracks:
        out += b"MTrk" + len(body).to_bytes(4, "big") + body
    return out


def test_running_status_sysex_escapes_and_alien_chunks():
    body = (b"\x00\x90\x3C\x40"          # note on C4
            b"\x10\x40\x40"              # running status: note on E4
            b"\x00\xF0\x05\x7E\x7F\x09\x01\xF7"   # GM system on (sysex, F0 form)
            b"\x00\xF7\x02\xF3\x01"      # escape: song select as raw bytes
            b"\x20\x3C\x00"              # running status is cancelled by sysex: a data byte now is bad
            )
    with pytest.raises(RetunerError) as ei:
        reader.parse_smf(_smf(0, 96, body + b"\x00\xFF\x2F\x00"), "rs.mid")
    assert "running status" in str(ei.value) and "rs.mid" in str(ei.value) and "track 1" in str(ei.value)
    good = body[:-3] + b"\x20\x80\x3C\x00\x00\x40\x00\x00\xFF\x2F\x00"
    data = _smf(0, 96, good)
    alien = b"XFIH" + (3).to_bytes(4, "big") + b"abc"
    data = data[:14] + alien + data[14:]
    song = reader.parse_smf(data, "ok.mid")
    ev = song.tracks[0].events
    (start, end), = reader._header(data, "ok.mid").spans     # running status, sysex, escapes
    assert reader._count_events(data, start, end, 10**9) == len(ev) == 6
    assert [(t, k, r.hex()) for t, k, r in ev] == [
        (0, reader.CHANNEL, "903c40"), (16, reader.CHANNEL, "904040"),
        (16, reader.SYSEX, "f0057e7f0901f7"), (16, reader.SYSEX, "f702f301"),
        (48, reader.CHANNEL, "803c00"), (48, reader.CHANNEL, "804000")]


def test_sysex_and_meta_pass_through_conversion_byte_for_byte(tmp_path):
    body = (b"\x00\xFF\x03\x04Lead"
            b"\x00\xF0\x05\x7E\x7F\x09\x01\xF7"
            b"\x00\xFF\x05\x03la!"                # lyric
            b"\x00\x90\x3C\x40\x60\x80\x3C\x00"
            b"\x00\xFF\x06\x03End"                 # marker
            b"\x00\xFF\x2F\x00")
    src = tmp_path / "s.mid"
    src.write_bytes(_smf(0, 96, body))
    res = conversion.convert_file(src, tmp_path / "o.mid", conversion.ConvertOptions(
        __import__("retuner.pitch.tuning", fromlist=["Tuning"]).Tuning.equal12()))
    out = reader.parse_smf((tmp_path / "o.mid").read_bytes())
    kept = [(t, r) for t, k, r in out.tracks[0].events if k != reader.CHANNEL]
    assert kept == [(0, b"\xFF\x03\x04Lead"), (0, b"\xF0\x05\x7E\x7F\x09\x01\xF7"),
                    (0, b"\xFF\x05\x03la!"), (96, b"\xFF\x06\x03End")]
    assert out.tracks[0].end_tick == 96
    assert res.outputs[0].stats["notes"] == 1


@pytest.mark.parametrize("data,words", [
    (_smf(2, 96, b"\x00\xFF\x2F\x00"), "type 2"),
    (_smf(1, 96, b"\x00\xFF\x2F\x00", ntrks=2), "announces 2 tracks"),
    (_smf(0, 96, b"\x00\xFF\x2F\x00", b"\x00\xFF\x2F\x00"), "exactly one track"),
    (_smf(0, 96, b"\x00\x90\x3C"), "truncated"),
    (_smf(0, 96, b"\x00\x90\x3C\x80"), "out of range"),
    (_smf(0, 96, b"\x00\xF8\x00\xFF\x2F\x00"), "not allowed"),
    (_smf(0, 96, b"\x00\xFF\x51\x7F\x07"), "runs past"),
    (_smf(0, 96, b"\x81\x81\x81\x81\x00\x90\x3C\x40"), "variable-length"),
    (b"MThd\x00\x00\x00\x06\x00", "too short"),
    (b"", "too short"),
])
def test_malformed_bytes_name_the_place(data, words):
    with pytest.raises(RetunerError) as ei:
        reader.parse_smf(data, "x.mid")
    msg = str(ei.value)
    assert words in msg and msg.startswith("x.mid")
    assert "\n" not in msg


def test_tempo_map_agrees_with_pretty_midi(tmp_path):
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=1)
    song = reader.read_smf(src)
    pm = pretty_midi.PrettyMIDI(str(src))
    for tick in (0, 1, 479, 480, 12 * 480 - 1, 12 * 480, 12 * 480 + 1, 20000, 26 * 480):
        assert song.tempo_map.seconds(tick) == pytest.approx(pm.tick_to_time(tick), abs=1e-9)
        assert song.tempo_map.tick(song.tempo_map.seconds(tick)) == pytest.approx(tick, abs=1e-6)
    # the second line is slower: 750000 us per beat after tick 5760 (mido.tick2second agrees)
    assert song.tempo_map.seconds(12 * 480 + 480) - song.tempo_map.seconds(12 * 480) == \
        pytest.approx(mido.tick2second(480, 480, 750000))


def test_smpte_division_clock():
    # SMF 1.0: division with bit 15 set: -frames per second (two's complement) and ticks per frame
    div = ((256 - 25) << 8) | 40          # 25 fps, 40 ticks per frame = 1000 ticks per second
    song = reader.parse_smf(_smf(0, div, b"\x00\x90\x3C\x40\x87\x68\x80\x3C\x00\x00\xFF\x2F\x00"))
    assert song.smpte
    assert song.tempo_map.seconds(1000) == pytest.approx(1.0)
    assert song.tempo_map.seconds(1000) == song.tempo_map.seconds(1000)  # tempo events do not apply
    out = writer.serialize(0, song.header_division, [(list((t, r) for t, k, r in song.tracks[0].events), 1000)])
    assert out[12:14] == div.to_bytes(2, "big")


_channel_msg = st.one_of(
    st.tuples(st.sampled_from([0x80, 0x90, 0xA0, 0xB0, 0xE0]), st.integers(0, 15),
              st.integers(0, 127), st.integers(0, 127)).map(lambda x: bytes((x[0] | x[1], x[2], x[3]))),
    st.tuples(st.sampled_from([0xC0, 0xD0]), st.integers(0, 15), st.integers(0, 127)).map(
        lambda x: bytes((x[0] | x[1], x[2]))),
)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 5000), _channel_msg), max_size=60), st.integers(1, 0x7FFF))
def test_writer_and_reader_round_trip_and_agree_with_mido(evs, tpb):
    evs = sorted(evs, key=lambda e: e[0])
    data = writer.serialize(1, tpb, [([], 0), (evs, (evs[-1][0] if evs else 0) + 10)])
    song = reader.parse_smf(data)
    assert [(t, r) for t, k, r in song.tracks[1].events] == evs
    # the quick count that guards the event limit agrees with the reading
    for (start, end), tr in zip(reader._header(data, "x.mid").spans, song.tracks):
        assert reader._count_events(data, start, end, 10**9) == len(tr.events)
    mf = mido.MidiFile(file=__import__("io").BytesIO(data))
    assert mf.ticks_per_beat == tpb and len(mf.tracks) == 2
    tick = 0
    got = []
    for m in mf.tracks[1]:
        tick += m.time
        if not m.is_meta:
            got.append((tick, bytes(m.bytes())))
    assert got == evs
    # raw -> mido message -> raw is the identity
    for _, r in evs:
        m = messages.raw_to_message(r)
        assert bytes(m.bytes()) == r and messages.message_to_raw(m) == r


# -- what a general reader could not read back is refused, not copied ------------------------
# SMF 1.0: End of Track (FF 2F 00) is the last event of every track; Set Tempo is FF 51 03
# tttttt (microseconds per quarter note); time signature FF 58 04, key signature FF 59 02.
# mido (a general-purpose reader) is the outside check that such an output would be unreadable.

def _convert_cli(tmp_path, data):
    import subprocess
    import sys
    src = tmp_path / "in.mid"
    src.write_bytes(data)
    dst = tmp_path / "out.mid"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", dst, "-q"],
                       capture_output=True, text=True, timeout=60)
    return r, dst


def test_notes_after_end_of_track_are_an_error_naming_track_and_tick(tmp_path):
    # a note at tick 96, End of Track, then a note 200 ticks later that a player would lose
    track = (b"\x00\x90\x3C\x40\x60\x80\x3C\x00" + b"\x00\xFF\x2F\x00"
             + b"\x81\x48\x90\x40\x40\x60\x80\x40\x00")
    r, dst = _convert_cli(tmp_path, _smf(1, 96, b"\x00\xFF\x2F\x00", track))
    assert r.returncode == 2 and not dst.exists()
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "in.mid" in lines[0], r.stderr
    assert "track 2" in lines[0] and "tick 296" in lines[0] and "End of Track" in lines[0]


@pytest.mark.parametrize("meta,words", [
    (b"\xFF\x51\x01\x07", "FF 51"),                 # Set Tempo of 1 byte: mido cannot read it
    (b"\xFF\x58\x03\x04\x02\x18", "FF 58"),         # time signature of 3 bytes
    (b"\xFF\x59\x01\x00", "FF 59"),                 # key signature of 1 byte
    (b"\xFF\x51\x03\x00\x00\x00", "Set Tempo of 0"),
])
def test_meta_events_a_reader_cannot_read_back_are_refused(tmp_path, meta, words):
    import io
    body = b"\x00\x90\x3C\x40\x60" + meta + b"\x00\x80\x3C\x00\x00\xFF\x2F\x00"
    data = _smf(0, 96, body)
    if not meta.startswith(b"\xFF\x51\x03"):
        with pytest.raises(Exception):             # the outside check: mido cannot read it
            mido.MidiFile(file=io.BytesIO(data))
    r, dst = _convert_cli(tmp_path, data)
    assert r.returncode == 2 and not dst.exists(), r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and words in lines[0] and "track 1, tick 96" in lines[0], r.stderr
    assert lines[0].startswith(f"retuner: {tmp_path / 'in.mid'}")


def test_limits_each_breach_is_one_line_naming_file_and_place(tmp_path, monkeypatch):
    """Tracks, events and size are bounded; a breach is refused before the work starts."""
    monkeypatch.setattr(reader, "LIMITS", reader.Limits(file_bytes=10_000, tracks=4, events=50))
    many_tracks = _smf(1, 96, *([b"\x00\xFF\x2F\x00"] * 5))
    with pytest.raises(RetunerError) as ei:
        reader.parse_smf(many_tracks, "t.mid")
    assert str(ei.value).startswith("t.mid: byte 10:") and "5 tracks" in str(ei.value)
    notes = b"".join(b"\x00\x90\x3C\x40\x10\x80\x3C\x00" for _ in range(30)) + b"\x00\xFF\x2F\x00"
    with pytest.raises(RetunerError) as ei:
        reader.parse_smf(_smf(0, 96, notes), "e.mid")
    assert str(ei.value).startswith("e.mid: track 1:") and "50 events" in str(ei.value)
    half = b"".join(b"\x00\x90\x3C\x40\x10\x80\x3C\x00" for _ in range(15)) + b"\x00\xFF\x2F\x00"
    with pytest.raises(RetunerError) as ei:        # 30 events, then 30 more: the second breaks it
        reader.parse_smf(_smf(1, 96, half, half), "e.mid")
    assert str(ei.value).startswith("e.mid: track 2:") and "50 events" in str(ei.value)
    assert len(reader.parse_smf(_smf(1, 96, half), "ok.mid").tracks[0].events) == 30
    with pytest.raises(RetunerError) as ei:
        reader.parse_smf(_smf(0, 96, notes * 400), "s.mid")
    assert "more than the limit" in str(ei.value) and str(ei.value).startswith("s.mid")
    # the default limits leave room for far more than a piece needs (a long piano piece
    # holds some 100 000 events: common practice, from memory)
    d = reader.Limits()
    assert d.events >= 1_000_000 and d.tracks >= 256 and d.file_bytes >= 8 * 1024 * 1024


def test_streamed_events_match_the_whole_file_and_pretty_midi(tmp_path):
    """stream_events (used to measure outputs without holding them) gives the same events,
    order and seconds as reading the whole file; seconds checked against pretty_midi."""
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src, type_=1)
    data = src.read_bytes()
    song = reader.parse_smf(data)
    merged = reader.merged_events(song)
    secs = reader.event_seconds(song, merged)
    streamed = list(reader.stream_events(data))
    assert [(tick, ti, k, r) for _, tick, ti, k, r in streamed] == merged
    assert [t for t, *_ in streamed] == pytest.approx(secs, abs=1e-12)
    pm = pretty_midi.PrettyMIDI(str(src))
    for t, tick, *_ in streamed[::7]:
        assert t == pytest.approx(pm.tick_to_time(tick), abs=1e-9)
