"""`retuner export`: tuning dumps written as the MIDI Tuning Standard lays them out.

Source: MIDI Tuning Standard (MMA, 1992), Complete MIDI 1.0 Detailed Specification,
section "MIDI Tuning": "Bulk Tuning Dump" (F0 7E dev 08 01 tt name[16] [xx yy zz]*128 cs F7,
cs = XOR of the bytes from 7E through the last frequency data byte, as a 7-bit data byte)
and "Frequency data format" (semitone + 14-bit fraction in units of 100/16384 cent).
The decoder below is written out here from that text, independently of retuner.midi.mts.
"""

from __future__ import annotations

import functools
import math
import operator
import os
import subprocess
import sys

import pytest

from retuner.profiles.profile import load_profile

HALF_UNIT = 100.0 / 16384 / 2  # 0.00305 cent


def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=60)


def decode_dump(raw: bytes):
    """Independent decoder of a bulk tuning dump: (device, program, name, cents[128] or None)."""
    assert raw[0] == 0xF0 and raw[-1] == 0xF7 and len(raw) == 408
    assert raw[1] == 0x7E and raw[3] == 0x08 and raw[4] == 0x01
    cs = functools.reduce(operator.xor, raw[1:406], 0) & 0x7F
    assert raw[406] == cs, "checksum"
    keys = []
    for k in range(128):
        xx, yy, zz = raw[22 + 3 * k:25 + 3 * k]
        keys.append(None if (xx, yy, zz) == (0x7F, 0x7F, 0x7F) else 100.0 * xx + ((yy << 7) | zz) * 100.0 / 16384)
    return raw[2], raw[5], raw[6:22].decode("ascii"), keys


@pytest.mark.parametrize("profile", ["werckmeister-3", "meantone-quarter", "edo31", "just-5limit"])
def test_bulk_round_trip(tmp_path, profile):
    out = tmp_path / "t.syx"
    r = run_cli("export", profile, "--format", "mts-bulk", "-o", str(out))
    assert r.returncode == 0, r.stderr
    device, program, name, keys = decode_dump(out.read_bytes())
    assert (device, program) == (0x7F, 0)
    assert name == profile[:16].ljust(16)
    tuning = load_profile(profile)
    for k in range(128):
        target = tuning.cents[k]
        if target is None:
            assert keys[k] is None
        elif 0.0 <= target <= 12799.98:
            assert abs(keys[k] - target) <= HALF_UNIT + 1e-9, (k, keys[k], target)


def test_werckmeister_middle_c_bytes(tmp_path):
    # Werckmeister III (A. Werckmeister, Musicalische Temperatur, 1691; as tabulated in
    # Barbour, Tuning and Temperament, 1951): C-G, G-D, D-A tempered by 1/4 Pythagorean comma.
    # With A4 = 440 Hz, C4 lies 900 - (3 * tempered fifth - 1200) cents below A4, i.e.
    # 11.730 c above 12-EDO C4: 6011.730 c -> 11.730 * 163.84 = 1921.8 -> 1922 = 15*128 + 2.
    pyth = 1200 * math.log2(3 ** 12 / 2 ** 19)
    fifth = 1200 * math.log2(1.5) - pyth / 4
    c4 = 6900 - 900 + (900 - (3 * fifth - 1200))
    assert c4 == pytest.approx(6011.730, abs=0.001)
    out = tmp_path / "w.syx"
    assert run_cli("export", "werckmeister-3", "-o", str(out)).returncode == 0
    raw = out.read_bytes()
    assert list(raw[22 + 3 * 60:25 + 3 * 60]) == [0x3C, 0x0F, 0x02]


def test_options_and_name(tmp_path):
    out = tmp_path / "o.syx"
    r = run_cli("export", "edo12", "-o", str(out), "--mts-device", "5", "--mts-program", "9", "--name", "Concert")
    assert r.returncode == 0, r.stderr
    device, program, name, keys = decode_dump(out.read_bytes())
    assert (device, program, name) == (5, 9, "Concert         ")
    assert keys == [100.0 * k for k in range(128)]


def test_single_format_round_trip(tmp_path):
    # MTS "Single Note Tuning Change (Real-Time)": F0 7F dev 08 02 tt ll [kk xx yy zz]*ll F7,
    # ll <= 127, so 128 keys take two messages.
    out = tmp_path / "s.syx"
    r = run_cli("export", "meantone-quarter", "--format", "mts-single", "-o", str(out))
    assert r.returncode == 0, r.stderr
    raw = out.read_bytes()
    tuning = load_profile("meantone-quarter")
    seen = {}
    pos = 0
    messages = 0
    while pos < len(raw):
        assert raw[pos:pos + 5] == bytes([0xF0, 0x7F, 0x7F, 0x08, 0x02])
        count = raw[pos + 6]
        for i in range(count):
            kk, xx, yy, zz = raw[pos + 7 + 4 * i:pos + 11 + 4 * i]
            seen[kk] = 100.0 * xx + ((yy << 7) | zz) * 100.0 / 16384
        pos += 7 + 4 * count
        assert raw[pos] == 0xF7
        pos += 1
        messages += 1
    assert messages == 2
    assert sorted(seen) == list(range(128))
    for k, c in seen.items():
        if 0.0 <= tuning.cents[k] <= 12799.98:
            assert abs(c - tuning.cents[k]) <= HALF_UNIT + 1e-9


def test_single_bank_form(tmp_path):
    out = tmp_path / "b.syx"
    r = run_cli("export", "edo12", "--format", "mts-single", "--mts-bank", "3", "--no-mts-realtime", "-o", str(out))
    assert r.returncode == 0, r.stderr
    # CA-020: non-real-time single note tuning change with bank select: 7E dev 08 07 bb tt ll
    assert out.read_bytes()[:8] == bytes([0xF0, 0x7E, 0x7F, 0x08, 0x07, 3, 0, 127])


def test_clamped_keys_reported_in_one_line(tmp_path):
    # Bohlen-Pierce: 13 equal steps of 3/1 (146.3 c) around A4 run off both ends of
    # 8.1758 Hz .. 13289.7 Hz, so some keys must be clamped and named.
    out = tmp_path / "bp.syx"
    r = run_cli("export", "bohlen-pierce", "-o", str(out))
    assert r.returncode == 0, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if "clamped" in ln]
    assert len(lines) == 1
    tuning = load_profile("bohlen-pierce")
    low = [k for k in range(128) if tuning.cents[k] is not None and tuning.cents[k] < -HALF_UNIT]
    assert low and f"0-{low[-1]}" in lines[0]
    _, _, _, keys = decode_dump(out.read_bytes())
    assert all(keys[k] == 0.0 for k in low)


def test_errors_are_one_line_and_leave_nothing(tmp_path):
    out = tmp_path / "x.syx"
    r = run_cli("export", "no-such-profile", "-o", str(out))
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
    assert not out.exists()
    r = run_cli("export", "edo12", "-o", str(tmp_path / "missing-dir" / "x.syx"))
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
    r = run_cli("export", "edo12", "--name", "caf\u00e9", "-o", str(out))
    assert r.returncode == 2 and "name" in r.stderr
    r = run_cli("export", "edo12", "--mts-bank", "1", "-o", str(out))
    assert r.returncode == 2
    assert not out.exists()
    assert os.listdir(tmp_path) == []  # no temporary file left behind


def test_existing_file_untouched_on_error(tmp_path):
    out = tmp_path / "keep.syx"
    out.write_bytes(b"old")
    r = run_cli("export", "no-such-profile", "-o", str(out))
    assert r.returncode == 2
    assert out.read_bytes() == b"old"
