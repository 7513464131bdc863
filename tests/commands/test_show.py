"""`retuner profiles` and `retuner show` as a user sees them."""

import json
import math
import subprocess
import sys

import pretty_midi
import pytest


def run_cli(*args):
    r = subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    return r.stdout


def test_profiles_json_shape():
    data = json.loads(run_cli("profiles", "--json"))
    assert isinstance(data, list) and len(data) >= 14
    assert all({"id", "description"} <= set(p) for p in data)


def test_show_json_shape_and_werckmeister_definition():
    data = json.loads(run_cli("show", "werckmeister-3", "--json"))
    assert data["id"] == "werckmeister-3"
    keys = data["keys"]
    assert [k["key"] for k in keys] == list(range(128))
    # Werckmeister (1691): C-G, G-D, D-A, B-F# narrowed by 1/4 Pythagorean comma, the rest pure.
    p5 = 1200 * math.log2(1.5)
    q = 1200 * math.log2(3 ** 12 / 2 ** 19) / 4
    pcs = {0: 0.0}
    pcs[7] = p5 - q
    pcs[2] = (pcs[7] + p5 - q) % 1200
    pcs[9] = pcs[2] + p5 - q
    pcs[4] = (pcs[9] + p5) % 1200
    pcs[11] = pcs[4] + p5
    pcs[6] = (pcs[11] + p5 - q) % 1200
    pcs[1] = (pcs[6] + p5) % 1200
    pcs[8] = (pcs[1] + p5) % 1200
    pcs[5] = 1200 - p5            # F below C by a pure fifth
    pcs[10] = (pcs[5] - p5) % 1200
    pcs[3] = (pcs[10] - p5) % 1200
    shift = 6900 - (6000 + pcs[9])
    for k in keys:
        want = 1200 * (k["key"] // 12) + pcs[k["key"] % 12] + shift
        assert k["cents"] == pytest.approx(want, abs=0.001)
        # Hz agrees with cents through the 12-EDO reference of pretty_midi (key 0)
        assert k["hz"] == pytest.approx(pretty_midi.note_number_to_hz(0) * 2 ** (k["cents"] / 1200), rel=1e-9)


def test_show_table_for_projector():
    out = run_cli("show", "meantone-quarter")
    lines = out.splitlines()
    assert lines[0].startswith("meantone-quarter:")
    row_e = next(l for l in lines if l.split()[:2] == ["4", "E"])
    # quarter-comma meantone (Barbour 1951): fifth = 3/2 narrowed by 1/4 syntonic comma; E is four
    # fifths above C (386.314 c), A three (889.735 c); with A4 at 440 Hz, E4 sounds
    # 386.314 + (900 - 889.735) - 400 = -3.422 c from its 12-EDO pitch
    fifth = 1200 * math.log2(1.5) - 1200 * math.log2(81 / 80) / 4
    e, a = 4 * fifth - 2400, 3 * fifth - 1200
    assert f"{e:.3f}" in row_e and f"{e + (900 - a) - 400:+.3f}" in row_e and "5/4" in row_e
    # the C-E major third of quarter-comma meantone is pure: 0.00 beats
    ce = next(l for l in lines if l.startswith("C ") and "major third" in l)
    assert ce.split()[-1] == "0.00"
    # every key has its three intervals
    assert sum(l.split()[1:2] == ["fifth"] for l in lines) == 12


def test_show_beat_rate_of_edo12_major_third_by_hand():
    out = run_cli("show", "edo12", "--octave", "4")
    ce = next(l for l in out.splitlines() if l.startswith("C ") and "major third" in l)
    # by hand: |4*329.628 - 5*261.626| = 10.38 Hz
    assert ce.split()[-1] == "10.38"
    out3 = run_cli("show", "edo12", "--octave", "3")
    ce3 = next(l for l in out3.splitlines() if l.startswith("C ") and "major third" in l)
    assert ce3.split()[-1] == "5.19"  # one octave down, half the beat rate


def test_show_non_twelve():
    out = run_cli("show", "bohlen-pierce")
    assert "1901.955" in out and "fifth" not in out


def test_show_gives_each_key_its_offset_from_the_same_key_in_12edo_unfolded():
    # 19-EDO (common practice: 19 equal steps of the octave), A4 = key 69 = 440 Hz as the profile
    # says; key 60 plays the root, 9 steps below A4, so it sounds 6900 - 9 * 1200/19 cents above
    # key 0's 12-EDO pitch: that is 331.579 c above key 60's own 12-EDO pitch, not +31.6 folded
    out = run_cli("show", "edo19")
    row0 = next(l for l in out.splitlines() if l.split()[:2] == ["0", "0"])
    want = 6900 - 9 * 1200 / 19 - 6000
    assert f"{want:+.3f}" in row0.split()
    data = json.loads(run_cli("show", "edo19", "--json"))
    assert data["keys"][60]["offset_cents"] == pytest.approx(want, abs=1e-9)
    assert data["degrees"][0]["cents_from_root"] == 0.0


def test_show_gives_every_degree_a_ratio_nearest_ones_marked():
    # 12-EDO's E (400 c) and G# (800 c) have no exact ratio; the just major third 5/4 is
    # 386.314 c and the just minor sixth 8/5 813.686 c (handbook values), so they show
    # "~5/4 +13.7c" and "~8/5 -13.7c"
    out = run_cli("show", "edo12").splitlines()
    row_e = next(l for l in out if l.split()[:2] == ["4", "E"])
    row_gs = next(l for l in out if l.split()[:2] == ["8", "G#"])
    assert "~5/4 +13.7c" in row_e and "~8/5 -13.7c" in row_gs
    for name in ("edo12", "edo19", "bohlen-pierce", "werckmeister-3"):
        data = json.loads(run_cli("show", name, "--json"))
        assert all(d["ratio"] for d in data["degrees"]), name
    degrees = json.loads(run_cli("show", "edo12", "--json"))["degrees"]
    assert (degrees[0]["ratio"], degrees[0]["ratio_exact"]) == ("1/1", True)
    assert (degrees[4]["ratio"], degrees[4]["ratio_exact"]) == ("5/4", False)
