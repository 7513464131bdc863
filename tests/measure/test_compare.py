"""`retuner compare`: per tuning impurity, motion, drift and beat rates of the piece's most
frequent consonant pairs. Beat rate of an interval near p:q (upper:lower): |q*f2 - p*f1|
(the p-th partial of the lower tone against the q-th of the upper one; common practice)."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pretty_midi

from data import midigen


def test_compare_json_beat_rates_by_hand(tmp_path):
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src)
    r = subprocess.run([sys.executable, "-m", "retuner", "compare", src, "--profiles",
                        "edo12,meantone-quarter,werckmeister-3", "--json", "--adaptive", "--top", "10"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    rows = [(t["profile"], t["adaptive"], t["lookahead"]) for t in d["results"]]
    assert rows == [("edo12", False, False), ("meantone-quarter", False, False), ("werckmeister-3", False, False),
                    ("edo12", True, False), ("edo12", True, True)]      # adaptive plays the first profile
    assert len(d["intervals"]) == 10
    edo = d["results"][0]
    assert edo["motion_cents_per_note"] == 0 and edo["drift_max_cents"] == 0
    # 12-EDO beat rates by hand, frequencies from pretty_midi
    for iv, rate in zip(d["intervals"], edo["beat_rates_hz"]):
        p, q = map(int, iv["ratio"].split("/"))
        f1 = pretty_midi.note_number_to_hz(iv["low"])
        f2 = pretty_midi.note_number_to_hz(iv["high"])
        assert math.gcd(p, q) == 1
        assert abs(rate - abs(q * f2 - p * f1)) < 0.01
    # quarter-comma meantone has pure major thirds: a 5/4 pair does not beat (within a bend step)
    mt = d["results"][1]
    thirds = [rate for iv, rate in zip(d["intervals"], mt["beat_rates_hz"]) if iv["ratio"] in ("5/4", "5/2")]
    assert thirds, "the piece's most frequent pairs include a major third"
    assert all(rate < 0.01 for rate in thirds)
    # 12-EDO impurity of a triad-based piece: several cents (about 8 c on our chorales)
    assert 4 < edo["impurity_cents"] < 12
    assert d["results"][4]["impurity_cents"] < edo["impurity_cents"]


def test_compare_text_and_bad_profile(tmp_path):
    src = tmp_path / "hymn.mid"
    midigen.four_part_piece(src)
    r = subprocess.run([sys.executable, "-m", "retuner", "compare", src, "--profiles", "edo12,vallotti"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert "vallotti" in r.stdout and "impurity" in r.stdout
    assert r.stdout.splitlines()[1].split()[0] == "profile"      # the vocabulary's word for one tuning
    r = subprocess.run([sys.executable, "-m", "retuner", "compare", src, "--profiles", "edo12,no-such-tuning"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
