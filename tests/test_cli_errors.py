"""Mistakes a user can make on the command line: one line, exit status 2, nothing changed."""

import subprocess
import sys

import mido


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "retuner", *map(str, args)], capture_output=True, text=True)


def one_line(r):
    lines = r.stderr.strip().splitlines()
    assert r.returncode == 2, r.stderr
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    return lines[0]


def test_usage_mistake_is_one_line():
    line = one_line(run_cli("run", "--mode", "surround"))
    assert line.startswith("retuner run: argument --mode: invalid choice: 'surround'")
    line = one_line(run_cli("convert"))
    assert "required" in line and "retuner convert --help" in line


def test_convert_never_overwrites_its_input(tmp_path):
    src = tmp_path / "piece.mid"
    mid = mido.MidiFile()
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    tr += [mido.Message("note_on", note=64, velocity=70, time=0), mido.Message("note_off", note=64, time=480)]
    mid.save(src)
    before = src.read_bytes()
    line = one_line(run_cli("convert", src, "-o", src, "--profile", "meantone-quarter"))
    assert "overwrite the input" in line
    assert src.read_bytes() == before
    folder = tmp_path / "songs"
    folder.mkdir()
    (folder / "a.mid").write_bytes(before)
    line = one_line(run_cli("convert", folder, "-o", folder))
    assert "must differ from the input folder" in line


def test_missing_profiles_dir_is_named(tmp_path):
    line = one_line(run_cli("profiles", "--profile-dir", tmp_path / "nope"))
    assert line == f"retuner: {tmp_path / 'nope'}: --profile-dir: not a folder"


def test_virtual_and_named_ports_do_not_mix():
    line = one_line(run_cli("run", "--virtual", "--input", "Digital Piano"))
    assert line.startswith("retuner: --virtual: makes our own ports")  # named once, not twice
