"""Shared test helper: render MIDI with a real synth (FluidSynth) and measure pitch.

FluidSynth and the TimGM6mb soundfont are real parts: when either is missing the test
FAILS (pytest.fail), it never skips.

What FluidSynth 2.3 does to pitch (measured here, see /work/shared/README.md):
each key's sample is a few cents off nominal, so measure a retuned note against the
same key, program, velocity and read window rendered untuned; pitch is truncated to
whole cents (a correct file reads 0..1 cent flat); a pitch bend sounds at 127/128 of its
MIDI size and CC38 (cents part of RPN 0) is ignored; MTS single note tuning changes are
honoured only on channels that selected the tuning program with RPN 3, device 0 or 7F.

Pitch measurement: a Hann window over ``dur_s`` seconds from ``start_s``, an FFT
zero-padded to at least 16x the window, the highest peak within ``search_cents`` of the
expected frequency, refined by parabolic interpolation of the log magnitude of that peak
and its two neighbours (for a Gaussian-like main lobe this is close to exact).
"""

from __future__ import annotations

import math
import os
import shutil
import subprocess
import wave
from functools import lru_cache
from pathlib import Path
from typing import Iterable, Optional, Sequence

import mido
import numpy as np
import pytest

SOUNDFONT = "/usr/share/sounds/sf2/TimGM6mb.sf2"
SAMPLE_RATE = 48000


def require_fluidsynth(soundfont: str = SOUNDFONT) -> str:
    """Path of the fluidsynth binary; fails the test when it or the soundfont is missing."""
    exe = shutil.which("fluidsynth")
    if exe is None:
        pytest.fail("fluidsynth is not installed (apt-get install fluidsynth): this real-synth "
                    "test cannot run", pytrace=False)
    if not os.path.isfile(soundfont):
        pytest.fail(f"soundfont {soundfont} is missing (apt-get install timgm6mb-soundfont)",
                    pytrace=False)
    return exe


def render(midi_path, wav_path, soundfont: str = SOUNDFONT, *, rate: int = SAMPLE_RATE,
           timeout: float = 60.0) -> Path:
    """Render a MIDI file to WAV: chorus and reverb off, gain 1, ``rate`` Hz."""
    exe = require_fluidsynth(soundfont)
    wav_path = Path(wav_path)
    if wav_path.exists():
        wav_path.unlink()
    cmd = [exe, "-ni", "-g", "1", "-C", "0", "-R", "0", "-r", str(rate), "-F", str(wav_path),
           str(soundfont), str(midi_path)]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    if proc.returncode != 0 or not wav_path.is_file() or wav_path.stat().st_size <= 44:
        pytest.fail(f"fluidsynth failed (exit {proc.returncode}): {proc.stderr.strip()[-500:]}",
                    pytrace=False)
    return wav_path


@lru_cache(maxsize=16)
def _read_wav_cached(path: str, mtime_ns: int, size: int) -> tuple[int, np.ndarray]:
    with wave.open(path, "rb") as w:
        rate = w.getframerate()
        channels = w.getnchannels()
        width = w.getsampwidth()
        raw = w.readframes(w.getnframes())
    if width == 2:
        data = np.frombuffer(raw, dtype="<i2").astype(np.float64) / 32768.0
    elif width == 4:
        data = np.frombuffer(raw, dtype="<i4").astype(np.float64) / 2147483648.0
    elif width == 3:
        b = np.frombuffer(raw, dtype=np.uint8).reshape(-1, 3).astype(np.int32)
        v = b[:, 0] | (b[:, 1] << 8) | (b[:, 2] << 16)
        v = np.where(v >= 1 << 23, v - (1 << 24), v)
        data = v.astype(np.float64) / float(1 << 23)
    else:
        raise ValueError(f"unsupported WAV sample width {width}")
    mono = data.reshape(-1, channels).mean(axis=1)
    mono.setflags(write=False)
    return rate, mono


def read_wav(path) -> tuple[int, np.ndarray]:
    """(sample rate, mono signal as float64 in -1..1)."""
    st = os.stat(path)
    return _read_wav_cached(str(path), st.st_mtime_ns, st.st_size)


def measure_pitch(wav, start_s: float, dur_s: float = 1.5, expected_hz: Optional[float] = None,
                  search_cents: float = 80.0, pad: int = 16) -> float:
    """The frequency (Hz) of the strongest spectral peak in a window of the recording.

    With ``expected_hz`` only peaks within ``search_cents`` of it are considered (so a
    strong upper partial is not mistaken for the fundamental); without, the strongest
    peak above 20 Hz.
    """
    rate, x = read_wav(wav)
    a = int(round(start_s * rate))
    n = int(round(dur_s * rate))
    if a < 0 or a + n > len(x):
        raise ValueError(f"window {start_s}..{start_s + dur_s} s is outside the recording "
                         f"({len(x) / rate:.2f} s)")
    seg = x[a:a + n]
    if not np.any(seg):
        raise AssertionError(f"silence at {start_s}..{start_s + dur_s} s")
    seg = (seg - seg.mean()) * np.hanning(n)
    nfft = 1 << int(math.ceil(math.log2(n * pad)))
    mag = np.abs(np.fft.rfft(seg, nfft))
    bin_hz = rate / nfft
    if expected_hz is not None:
        lo = expected_hz * 2.0 ** (-search_cents / 1200.0)
        hi = expected_hz * 2.0 ** (search_cents / 1200.0)
    else:
        lo, hi = 20.0, rate / 2.0
    i0 = max(1, int(math.floor(lo / bin_hz)))
    i1 = min(len(mag) - 2, int(math.ceil(hi / bin_hz)))
    if i1 <= i0:
        raise ValueError("empty search band")
    i = i0 + int(np.argmax(mag[i0:i1 + 1]))
    if i in (i0, i1) and expected_hz is not None:
        raise AssertionError(f"no spectral peak within {search_cents} cents of {expected_hz:.2f} Hz "
                             f"(strongest at the band edge, {i * bin_hz:.2f} Hz)")
    l, c, r = np.log(mag[i - 1:i + 2] + 1e-300)
    denom = l - 2 * c + r
    delta = 0.5 * (l - r) / denom if denom != 0 else 0.0
    return (i + delta) * bin_hz


def cents(f_probe: float, f_reference: float) -> float:
    """Interval between two frequencies in cents."""
    return 1200.0 * math.log2(f_probe / f_reference)


def key_hz(key: float) -> float:
    """12-EDO frequency of a (possibly fractional) key, A4 = key 69 = 440 Hz (ISO 16)."""
    return 440.0 * 2.0 ** ((key - 69) / 12.0)


def write_midi(path, events: Iterable[tuple[float, mido.Message]], *, ticks_per_beat: int = 960,
               tempo: int = 500000) -> Path:
    """A type-0 MIDI file with ``events`` = (seconds, message), at a fixed tempo."""
    track = mido.MidiTrack()
    track.append(mido.MetaMessage("set_tempo", tempo=tempo, time=0))
    last = 0
    for t, msg in sorted(events, key=lambda e: e[0]):
        tick = int(round(mido.second2tick(t, ticks_per_beat, tempo)))
        track.append(msg.copy(time=tick - last))
        last = tick
    track.append(mido.MetaMessage("end_of_track", time=int(mido.second2tick(1.0, ticks_per_beat, tempo))))
    mf = mido.MidiFile(type=0, ticks_per_beat=ticks_per_beat)
    mf.tracks.append(track)
    mf.save(str(path))
    return Path(path)


def note_events(notes: Sequence[tuple[float, float, int, int, int]]) -> list[tuple[float, mido.Message]]:
    """(on_s, off_s, channel, key, velocity) -> timed note_on/note_off messages."""
    out = []
    for on, off, ch, key, vel in notes:
        out.append((on, mido.Message("note_on", channel=ch, note=key, velocity=vel)))
        out.append((off, mido.Message("note_off", channel=ch, note=key, velocity=0)))
    return out


def file_note_times(path) -> list[dict]:
    """Notes of a MIDI file with their times in seconds (tempo map honoured by mido):
    dicts key, channel, velocity, on, off."""
    mf = mido.MidiFile(str(path))
    t = 0.0
    open_: dict[tuple[int, int], list[dict]] = {}
    notes = []
    for msg in mf:
        t += msg.time
        if msg.type == "note_on" and msg.velocity > 0:
            d = {"key": msg.note, "channel": msg.channel, "velocity": msg.velocity, "on": t, "off": None}
            open_.setdefault((msg.channel, msg.note), []).append(d)
            notes.append(d)
        elif msg.type in ("note_off", "note_on"):
            stack = open_.get((msg.channel, msg.note))
            if stack:
                stack.pop(0)["off"] = t
    return notes
