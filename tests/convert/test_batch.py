"""`retuner convert DIR -o OUTDIR`: every .mid below DIR, in worker processes; a bad file is
reported in one line and skipped; exit status 1 if any failed; never a partial output file."""

from __future__ import annotations

import subprocess
import sys

import mido

from data import midigen


def test_batch_with_one_broken_file(tmp_path):
    src = tmp_path / "in"
    (src / "sub").mkdir(parents=True)
    midigen.four_part_piece(src / "a.mid", type_=1)
    midigen.four_part_piece(src / "sub" / "b.mid", type_=0)
    midigen.arrangement(src / "sub" / "c.MID")
    good = (src / "a.mid").read_bytes()
    (src / "broken.mid").write_bytes(midigen.malformed("truncated", good))
    (src / "notes.txt").write_text("not a MIDI file and not named .mid")
    out = tmp_path / "out"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", out,
                        "--profile", "werckmeister-3", "--jobs", "2"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 1
    errors = [ln for ln in r.stderr.splitlines() if ln.startswith("retuner:")]
    assert len(errors) == 1 and "broken.mid" in errors[0]
    written = sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.is_file())
    assert written == ["a.mid", "sub/b.mid", "sub/c.MID"]
    # each output is a complete file with all its notes
    for rel, src_file in (("a.mid", src / "a.mid"), ("sub/b.mid", src / "sub" / "b.mid")):
        n_in = sum(1 for tr in mido.MidiFile(src_file).tracks for m in tr if m.type == "note_on" and m.velocity)
        n_out = sum(1 for tr in mido.MidiFile(out / rel).tracks for m in tr if m.type == "note_on" and m.velocity)
        assert n_in == n_out
    assert "converted 3 of 4 files" in r.stdout


def test_batch_all_good_exit_0_plain_progress_lines_without_a_terminal(tmp_path):
    src = tmp_path / "in"
    src.mkdir()
    for i in range(3):
        midigen.four_part_piece(src / f"p{i}.mid")
    out = tmp_path / "out"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", out, "--jobs", "3"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    lines = r.stderr.splitlines()
    assert len(lines) == 3 and all(ln.startswith("[") for ln in lines)
    assert "\r" not in r.stderr and "\x1b" not in r.stderr
    assert sorted(p.name for p in out.iterdir()) == ["p0.mid", "p1.mid", "p2.mid"]


def test_batch_empty_folder_is_an_error(tmp_path):
    (tmp_path / "in").mkdir()
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", tmp_path / "in", "-o", tmp_path / "out"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1


def test_progress_bar_on_a_terminal():
    from retuner.convert.batch import _Progress

    class Tty:
        def __init__(self):
            self.text = ""

        def isatty(self):
            return True

        def write(self, s):
            self.text += s

        def flush(self):
            pass

    out = Tty()
    p = _Progress(3, out)
    p.update("a.mid", None)
    p.update("b.mid", "b.mid: truncated")
    p.update("c.mid", None)
    assert "\r\x1b[K[##########" in out.text and "3/3" in out.text and out.text.endswith("\n")
    assert "retuner: b.mid: truncated\n" in out.text
    assert p.failed == 1
