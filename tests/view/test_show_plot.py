"""`retuner show ID --plot`: the picture's data against tuning tables computed here from definitions.

Sources:
- 12-EDO at A4 = 440 Hz (ISO 16): key k sounds at 440 * 2**((k-69)/12) Hz.
- Quarter-comma meantone: every fifth is 5**(1/4) exactly (four fifths make a pure 5/1, two octaves
  and a pure major third), chain Eb..G# (Barbour, Tuning and Temperament, 1951, ch. 3).
- Werckmeister III: C-G, G-D, D-A and B-F# narrowed by 1/4 Pythagorean comma (3**12/2**19), the
  other fifths pure, chain Eb..G# (Barbour 1951, ch. 7).
- The built-in profiles put A4 at 440 Hz (their documented default reference).
- Beat rate of two tones near the just ratio p:q (upper:lower): the p-th partial of the lower tone
  and the q-th of the upper nearly coincide, so they beat at |q*f_high - p*f_low| (for a fifth 3:2,
  3*f_low against 2*f_high; for a major third 5:4, 5*f_low against 4*f_high).
- Handbook values: quarter-comma fifth 696.578 c (5.377 c narrow), its wolf 737.637 c (+35.682 c),
  its diminished fourth 427.373 c (128/125 above 5/4: +41.059 c); 12-EDO third +13.686 c.
"""

from __future__ import annotations

import math
import struct
import subprocess
import sys

import pytest

from retuner import cli
from retuner.profiles.profile import load_profile
from retuner.view import plot

CHAIN = [3, 10, 5, 0, 7, 2, 9, 4, 11, 6, 1, 8]           # Eb Bb F C G D A E B F# C# G#
NAMES = ["C", "C#", "D", "Eb", "E", "F", "F#", "G", "G#", "A", "Bb", "B"]
PYTH = 3 ** 12 / 2 ** 19


def edo(k: int) -> float:
    return 440.0 * 2 ** ((k - 69) / 12)


def from_chain(fifths: list[float]):
    """key -> Hz of a 12-note circle from its eleven fifths (ratios) along CHAIN, A4 = 440 Hz."""
    r = {CHAIN[0]: 1.0}
    for x, y, f in zip(CHAIN, CHAIN[1:], fifths):
        v = r[x] * f
        while v >= 2.0:
            v /= 2.0
        r[y] = v
    rel = {}
    for pc, v in r.items():               # ratio above the A at or below, within an octave
        w = v / r[9]
        while w < 1.0:
            w *= 2.0
        while w >= 2.0:
            w /= 2.0
        rel[pc] = w
    return lambda k: edo(k - (k - 69) % 12) * rel[k % 12]


def meantone_quarter():
    return from_chain([5 ** 0.25] * 11)


def werckmeister_3():
    narrow = {(0, 7), (7, 2), (2, 9), (11, 6)}
    return from_chain([1.5 / PYTH ** 0.25 if (x, y) in narrow else 1.5 for x, y in zip(CHAIN, CHAIN[1:])])


TABLES = {"edo12": lambda: edo, "meantone-quarter": meantone_quarter, "werckmeister-3": werckmeister_3}


def cents(a: float, b: float) -> float:
    return 1200.0 * math.log2(a / b)


def expected(hz, octave: int):
    base = 12 * (octave + 1)
    degrees = [(NAMES[pc], cents(hz(base + pc), edo(base + pc))) for pc in range(12)]
    circle = [(7 * i) % 12 for i in range(12)]
    fifths, thirds = [], []
    for pc in circle:
        lo = base + pc
        f1, f5, f3 = hz(lo), hz(lo + 7), hz(lo + 4)
        fifths.append((f"{NAMES[pc]}-{NAMES[(pc + 7) % 12]}", cents(f5 / f1, 1.5), abs(2 * f5 - 3 * f1)))
        thirds.append((f"{NAMES[pc]}-{NAMES[(pc + 4) % 12]}", cents(f3 / f1, 1.25), abs(4 * f3 - 5 * f1)))
    return degrees, fifths, thirds


def panel(fig, gid):
    axes = [a for a in fig.axes if a.get_gid() == gid]
    assert len(axes) == 1, [a.get_gid() for a in fig.axes]
    ax = axes[0]
    heights = [p.get_height() for p in ax.patches]
    labels = [t.get_text() for t in ax.get_xticklabels()]
    beats = [float(t.get_text()) for t in ax.texts if t.get_gid() == "beats"]
    return labels, heights, beats


@pytest.mark.parametrize("octave", [4, 2])
@pytest.mark.parametrize("tid", ["edo12", "meantone-quarter", "werckmeister-3"])
def test_the_drawn_bars_and_beat_rates_match_the_definition(tid, octave):
    hz = TABLES[tid]()
    degrees, fifths, thirds = expected(hz, octave)
    fig = plot.draw(plot.pictures([load_profile(tid)], octave))
    labels, heights, beats = panel(fig, f"degrees:{tid}")
    assert labels == [d[0] for d in degrees] and beats == []
    assert heights == pytest.approx([d[1] for d in degrees], abs=1e-6)
    for gid, want in (("fifths", fifths), ("thirds", thirds)):
        labels, heights, beats = panel(fig, f"{gid}:{tid}")
        assert labels == [w[0] for w in want]
        assert heights == pytest.approx([w[1] for w in want], abs=1e-6)
        # the labels carry two decimals
        assert beats == pytest.approx([w[2] for w in want], abs=0.0051)


def test_handbook_values_show_in_the_picture():
    fig = plot.draw(plot.pictures([load_profile("meantone-quarter"), load_profile("edo12")], 4))
    _, fifths, _ = panel(fig, "fifths:meantone-quarter")
    _, thirds, third_beats = panel(fig, "thirds:meantone-quarter")
    # eleven fifths 5.377 c narrow and the wolf G#-Eb 35.682 c wide
    assert sorted(round(f, 3) for f in fifths) == [-5.377] * 11 + [35.682]
    # eight pure thirds (no beats) and four diminished fourths 41.059 c wide
    assert sorted(round(t, 3) for t in thirds) == [0.0] * 8 + [41.059] * 4
    assert sorted(third_beats)[:8] == [0.0] * 8
    _, edo_thirds, edo_beats = panel(fig, "thirds:edo12")
    assert [round(t, 3) for t in edo_thirds] == [13.686] * 12
    # C4-E4 in 12-EDO: |4 * 329.628 - 5 * 261.626| = 10.38 beats a second
    assert edo_beats[0] == pytest.approx(10.38, abs=0.006)
    # side by side on one scale per row, so the columns compare at a glance
    ylim = {a.get_gid(): a.get_ylim() for a in fig.axes}
    for row in ("degrees", "fifths", "thirds"):
        assert ylim[f"{row}:meantone-quarter"] == ylim[f"{row}:edo12"]
    # black and white: every bar outlined in black, no fill colour
    for ax in fig.axes:
        for p in ax.patches:
            assert p.get_facecolor()[:3] == (1.0, 1.0, 1.0) and p.get_edgecolor()[:3] == (0.0, 0.0, 0.0)
            assert (p.get_hatch() or "") == ("///" if p.get_height() > plot.PURE else
                                              "..." if p.get_height() < -plot.PURE else "")


def png_size(path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"          # PNG signature (ISO/IEC 15948)
    return struct.unpack(">II", data[16:24])


def test_show_plot_writes_one_column_and_beside_two(tmp_path, capsys):
    one, two = tmp_path / "one.png", tmp_path / "two.png"
    assert cli.main(["show", "werckmeister-3", "--plot", str(one)]) == 0
    assert cli.main(["show", "werckmeister-3", "--plot", str(two), "--beside", "edo19"]) == 0
    w1, h1 = png_size(one)
    w2, h2 = png_size(two)
    assert h1 == h2 and w2 == 2 * w1
    assert cli.main(["show", "edo12", "--beside", "edo19"]) == 2
    assert "--beside" in capsys.readouterr().err


def test_without_matplotlib_one_line_and_exit_2(tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "matplotlib", None)      # import matplotlib now fails
    out = tmp_path / "x.png"
    assert cli.main(["show", "edo12", "--plot", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--plot" in err[0] and "matplotlib" in err[0] and "pip install" in err[0]
    assert err[0].count("--plot") == 1
    assert not out.exists()


def test_compare_plot_draws_every_tuning(tmp_path):
    from data import midigen
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src)
    out = tmp_path / "cmp.png"
    r = subprocess.run([sys.executable, "-m", "retuner", "compare", str(src), "--profiles",
                        "edo12,meantone-quarter", "--plot", str(out)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    one = tmp_path / "one.png"
    assert cli.main(["show", "edo12", "--plot", str(one)]) == 0
    assert png_size(out) == (2 * png_size(one)[0], png_size(one)[1])


def test_plot_into_a_missing_folder_is_one_line(tmp_path, capsys):
    out = tmp_path / "no-such-folder" / "x.png"
    assert cli.main(["show", "edo12", "--plot", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(out) in err[0]
    assert not out.parent.exists()
