"""retuner fit: the best-fit 12-note tuning for a piece.

Checks against things outside fit.py: seconds from the MIDI file's tempo map as
the Standard MIDI File spec defines them (set_tempo = microseconds per quarter
note), pair overlaps counted by brute force, just interval sizes in cents
(5/4 = 386.314 c, 3/2 = 701.955 c, 6/5 = 315.641 c: handbook values, see
shared README), the least-squares optimum from numpy.linalg.lstsq on equations
written out here, and the least-absolute-deviation optimum by enumerating the
vertices of the problem (an L1 regression with full column rank has an optimal
solution that fits as many equations exactly as it has unknowns; standard
linear-programming result, e.g. Barrodale and Roberts 1973).
"""

from __future__ import annotations

import itertools
import math
import os
import subprocess
import sys
from fractions import Fraction

import mido
import numpy as np
import pytest

from retuner.measure import fit
from retuner.errors import RetunerError
from retuner.profiles.profile import list_profiles, load_profile
from retuner.pitch.tuning import ratio_to_cents

JUST = {0: Fraction(1), 3: Fraction(6, 5), 4: Fraction(5, 4), 5: Fraction(4, 3), 7: Fraction(3, 2),
        8: Fraction(8, 5), 9: Fraction(5, 3)}   # the consonances of the impurity (metrics' definition)


def write_piece(path, chords, *, tempo=500000, tempo2=None, drums=False, tpb=480):
    """chords: list of (beats, keys). Two tracks: tempo map, then notes (type 1)."""
    mf = mido.MidiFile(type=1, ticks_per_beat=tpb)
    meta = mido.MidiTrack()
    meta.append(mido.MetaMessage("set_tempo", tempo=tempo, time=0))
    if tempo2:
        # tempo changes after the first 4 beats
        meta.append(mido.MetaMessage("set_tempo", tempo=tempo2, time=4 * tpb))
    mf.tracks.append(meta)
    tr = mido.MidiTrack()
    for beats, keys in chords:
        for k in keys:
            tr.append(mido.Message("note_on", note=k, velocity=80, time=0))
        if drums:
            tr.append(mido.Message("note_on", channel=9, note=36, velocity=100, time=0))
        first = True
        for k in keys:
            tr.append(mido.Message("note_off", note=k, velocity=0, time=int(beats * tpb) if first else 0))
            first = False
        if drums:
            tr.append(mido.Message("note_off", channel=9, note=36, velocity=0, time=0))
    mf.tracks.append(tr)
    mf.save(path)


# A chorale-like piece of our own: I IV V I vi ii V7 I in C, then to G, with a suspension
CHORALE = [
    (2, (48, 64, 67, 72)), (1, (53, 65, 69, 72)), (1, (55, 62, 67, 71)), (2, (48, 64, 67, 72)),
    (1, (57, 64, 69, 72)), (1, (50, 65, 69, 74)), (1, (55, 62, 65, 71)), (2, (48, 64, 67, 72)),
    (1, (52, 64, 67, 71)), (1, (50, 62, 66, 69)), (1, (55, 62, 67, 71)), (1, (48, 60, 64, 69)),
    (1, (50, 62, 66, 72)), (2, (43, 62, 67, 71)),
]


def brute_weights(path):
    """Consonant pair overlaps by brute force over every pair of notes (seconds, own tempo arithmetic)."""
    mf = mido.MidiFile(path)
    tpb = mf.ticks_per_beat
    # tempo map from track 0 (SMF spec: microseconds per quarter note)
    tempos = [(0, 500000)]
    tick = 0
    for m in mf.tracks[0]:
        tick += m.time
        if m.type == "set_tempo":
            tempos.append((tick, m.tempo))

    def secs(t):
        s = 0.0
        for i, (t0, us) in enumerate(tempos):
            t1 = tempos[i + 1][0] if i + 1 < len(tempos) else None
            if t1 is None or t <= t1:
                return s + (t - t0) * us / 1e6 / tpb
            s += (t1 - t0) * us / 1e6 / tpb
        return s
    notes = []
    open_ = {}
    for tr in mf.tracks[1:]:
        tick = 0
        for m in tr:
            tick += m.time
            if m.type == "note_on" and m.velocity > 0 and m.channel != 9:
                open_[(m.channel, m.note)] = tick
            elif m.type in ("note_on", "note_off") and m.channel != 9:
                s = open_.pop((m.channel, m.note))
                notes.append((secs(s), secs(tick), m.note))
    out = {}
    for (s1, e1, k1), (s2, e2, k2) in itertools.combinations(notes, 2):
        ov = min(e1, e2) - max(s1, s2)
        lo, hi = min(k1, k2), max(k1, k2)
        if ov > 0 and (hi - lo) % 12 in JUST:
            out[(lo, hi)] = out.get((lo, hi), 0.0) + ov
    return out


@pytest.fixture
def chorale(tmp_path):
    p = tmp_path / "chorale.mid"
    write_piece(p, CHORALE, tempo=500000, tempo2=750000, drums=True)
    return p


def twelve_note_builtins():
    out = []
    for info in list_profiles():
        t = load_profile(info.id)
        if t.is_twelve:
            out.append(t)
    return out


def test_pair_weights_follow_the_tempo_map(chorale):
    w = fit.pair_weights(fit.read_notes(chorale))
    want = brute_weights(chorale)
    assert set(w) == set(want)
    for k in want:
        assert w[k] == pytest.approx(want[k], abs=1e-9)
    # first chord, 2 beats at 120 bpm (500000 us per quarter) = 1.0 s; C3-G4 is one of its pairs.
    # The tempo change to 750000 us at beat 4 makes later beats 0.75 s.
    assert want[(48, 67)] == pytest.approx(1.0 + 1.5 + 1.5, abs=1e-9)   # three C-E-G-C chords of 2 beats


def test_impurity_by_hand():
    # C4-E4-G4 held 1 s in 12-EDO: |400-386.314| + |700-701.955| + |300-315.641|, averaged
    w = {(60, 64): 1.0, (60, 67): 1.0, (64, 67): 1.0}
    edo = [100.0 * k for k in range(128)]
    assert fit.impurity(w, edo) == pytest.approx((13.686 + 1.955 + 15.641) / 3, abs=1e-3)
    # the octave C4-C5 counts (target 2/1) and is pure in 12-EDO
    w[(60, 72)] = 1.0
    assert fit.impurity(w, edo) == pytest.approx((13.686 + 1.955 + 15.641) / 4, abs=1e-3)


def test_fit_is_no_worse_than_any_builtin_12_note_profile(chorale):
    w = fit.pair_weights(fit.read_notes(chorale))
    res = fit.fit_tuning(w)
    builtins = twelve_note_builtins()
    assert {t.id for t in builtins} >= {"edo12", "meantone-quarter", "werckmeister-3", "kirnberger-3",
                                         "vallotti", "young-2", "just-5limit", "pythagorean"}
    for t in builtins:
        assert res.impurity <= fit.impurity(w, t.cents) + 1e-9, t.id
    # 12-EDO is far worse on a triadic piece (thirds 14-16 c off)
    assert res.impurity < fit.impurity(w, load_profile("edo12").cents) - 3.0


def independent_lstsq(w):
    """min sum w*(x_hi - x_lo - (J - 100 d))**2 written out here; returns x (12, A = 0)."""
    rows, rhs = [], []
    for (a, b), wt in w.items():
        if a % 12 == b % 12:
            continue
        d = b - a
        J = ratio_to_cents(JUST[d % 12] * 2 ** (d // 12))
        r = np.zeros(12)
        r[b % 12] += 1
        r[a % 12] -= 1
        rows.append(math.sqrt(wt) * r)
        rhs.append(math.sqrt(wt) * (J - 100 * d))
    A = np.array(rows)
    A = np.delete(A, 9, axis=1)                  # A4 at the reference: x_A = 0
    x = np.linalg.lstsq(A, np.array(rhs), rcond=None)[0]
    return np.insert(x, 9, 0.0)


def test_squares_fit_equals_an_independent_least_squares_solution(chorale):
    w = fit.pair_weights(fit.read_notes(chorale))
    res = fit.fit_tuning(w, norm="squares")
    x = independent_lstsq(w)
    used = res.used
    for a in used:
        for b in used:
            assert (res.offsets[b] - res.offsets[a]) == pytest.approx(x[b] - x[a], abs=1e-6)
    cents = [100.0 * k + x[k % 12] for k in range(128)]
    assert fit.squared_error(w, res.cents()) == pytest.approx(fit.squared_error(w, cents), rel=1e-9)


# six pitch classes; D-F-A against G-D forces a syntonic comma somewhere (no tuning makes all pure)
SMALL = [(2, (60, 64, 67)), (1, (60, 65, 69)), (1, (62, 65, 69)), (1, (55, 62, 67)), (2, (60, 64, 67)),
         (1, (57, 60, 64))]


def l1_by_vertices(w):
    """Least weighted |deviation| over x (pitch classes used, x_A-free gauge) by vertex enumeration."""
    eqs = {}
    for (a, b), wt in w.items():
        if a % 12 == b % 12:
            continue
        d = b - a
        J = ratio_to_cents(JUST[d % 12] * 2 ** (d // 12))
        key = (a % 12, b % 12, round(J - 100 * d, 9))
        eqs[key] = eqs.get(key, 0.0) + wt
    pcs = sorted({p for (pa, pb, _) in eqs for p in (pa, pb)})
    free = pcs[1:]                                 # gauge: first class fixed at 0
    rows, rhs, ws = [], [], []
    for (pa, pb, r), wt in eqs.items():
        v = np.zeros(len(free))
        if pb in free:
            v[free.index(pb)] += 1
        if pa in free:
            v[free.index(pa)] -= 1
        rows.append(v)
        rhs.append(r)
        ws.append(wt)
    R, rhs, ws = np.array(rows), np.array(rhs), np.array(ws)
    best = math.inf
    for combo in itertools.combinations(range(len(rows)), len(free)):
        M = R[list(combo)]
        if abs(np.linalg.det(M)) < 1e-9:
            continue
        y = np.linalg.solve(M, rhs[list(combo)])
        best = min(best, float(np.sum(ws * np.abs(R @ y - rhs))))
    same = sum(wt for (a, b), wt in w.items() if a % 12 == b % 12)
    return best / (sum(ws) + same)


def test_abs_fit_equals_the_least_impurity_by_vertex_enumeration(tmp_path):
    p = tmp_path / "small.mid"
    write_piece(p, SMALL)
    w = fit.pair_weights(fit.read_notes(p))
    res = fit.fit_tuning(w)
    best = l1_by_vertices(w)
    assert best > 1.0                       # a comma has to go somewhere
    assert res.impurity == pytest.approx(best, abs=1e-7)
    # and least squares is a different (worse by this measure) answer on this piece
    sq = fit.fit_tuning(w, norm="squares")
    assert sq.impurity >= res.impurity - 1e-9


def test_limits_hold_and_bind(chorale):
    w = fit.pair_weights(fit.read_notes(chorale))
    free = fit.fit_tuning(w, norm="squares")
    assert max(abs(v) for v in free.offsets) > 5.0      # so the limit below binds
    for norm in ("squares", "abs"):
        res = fit.fit_tuning(w, max_deviation=5.0, norm=norm)
        assert max(abs(v) for v in res.offsets) <= 5.0 + 1e-6
        assert res.offsets[9] == 0.0
        assert res.active and all(a.startswith("deviation") for a in res.active)
        res = fit.fit_tuning(w, max_wolf=4.0, norm=norm)
        pure = ratio_to_cents(Fraction(3, 2))
        fifths = [700 + res.offsets[(pc + 7) % 12] - res.offsets[pc] - pure for pc in range(12)]
        assert max(abs(f) for f in fifths) <= 4.0 + 1e-6
        # the twelve fifths still close seven octaves: their deviations sum to minus a Pythagorean comma
        assert sum(fifths) == pytest.approx(-ratio_to_cents(Fraction(3 ** 12, 2 ** 19)), abs=1e-6)
    with pytest.raises(RetunerError, match="at least 1.955"):
        fit.fit_tuning(w, max_wolf=1.9)
    with pytest.raises(RetunerError):
        fit.fit_tuning(w, max_deviation=-1)


def test_box_limited_squares_fit_is_the_constrained_optimum(tmp_path):
    """Against an independent solution: enumerate which classes sit at a bound (KKT, convex problem)."""
    p = tmp_path / "small.mid"
    write_piece(p, SMALL)
    w = fit.pair_weights(fit.read_notes(p))
    L = 4.0
    res = fit.fit_tuning(w, max_deviation=L, norm="squares")
    x_free = independent_lstsq(w)
    used = [pc for pc in range(12) if pc != 9 and any(pc in (a % 12, b % 12) for a, b in w)]
    assert max(abs(x_free[pc]) for pc in used) > L
    best = math.inf
    for states in itertools.product((-1, 0, 1), repeat=len(used)):
        fixed = {pc: s * L for pc, s in zip(used, states) if s}
        open_ = [pc for pc, s in zip(used, states) if not s]
        rows, rhs = [], []
        for (a, b), wt in w.items():
            if a % 12 == b % 12:
                continue
            d = b - a
            J = ratio_to_cents(JUST[d % 12] * 2 ** (d // 12))
            r = np.zeros(len(open_))
            const = 0.0
            for pc, sgn in ((b % 12, 1), (a % 12, -1)):
                if pc in open_:
                    r[open_.index(pc)] += sgn
                else:
                    const += sgn * fixed.get(pc, 0.0)
            rows.append(math.sqrt(wt) * r)
            rhs.append(math.sqrt(wt) * (J - 100 * d - const))
        y = np.linalg.lstsq(np.array(rows), np.array(rhs), rcond=None)[0] if open_ else np.zeros(0)
        if open_ and np.max(np.abs(y)) > L + 1e-9:
            continue
        x = np.zeros(12)
        for pc, v in fixed.items():
            x[pc] = v
        for pc, v in zip(open_, y):
            x[pc] = v
        best = min(best, fit.squared_error(w, [100.0 * k + x[k % 12] for k in range(128)]))
    assert fit.squared_error(w, res.cents()) == pytest.approx(best, rel=1e-7)


def test_written_profile_loads_and_plays_the_fit(chorale, tmp_path):
    w = fit.pair_weights(fit.read_notes(chorale))
    res = fit.fit_tuning(w)
    out = tmp_path / "my-piece.yaml"
    fit.write_atomic(out, fit.profile_yaml(res, profile_id="my-piece", source_name=str(chorale)))
    t = load_profile(str(out))
    assert t.id == "my-piece" and t.is_twelve
    assert t.cents[69] == pytest.approx(6900.0, abs=1e-9)          # A4 = 440 Hz (ISO 16)
    for k in range(128):
        assert t.cents[k] == pytest.approx(res.cents()[k], abs=1e-5)
    assert fit.impurity(w, t.cents) == pytest.approx(res.impurity, abs=1e-5)
    t442 = fit.profile_yaml(res, profile_id="x", source_name="x.mid", reference_hz=442.0)
    out.write_text(t442)
    assert load_profile(str(out)).hz(69) == pytest.approx(442.0, abs=1e-9)


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True, timeout=60)


def test_cli_writes_profile_and_compares(chorale, tmp_path):
    out = tmp_path / "my-piece.yaml"
    r = run_cli("fit", str(chorale), "-o", str(out))
    assert r.returncode == 0, r.stderr
    t = load_profile(str(out))
    w = fit.pair_weights(fit.read_notes(chorale))
    table = {}
    for line in r.stdout.splitlines():
        parts = line.split()
        if len(parts) >= 2:
            try:
                table[parts[0]] = float(parts[-1])
            except ValueError:
                pass
    for pid in ("edo12", "meantone-quarter", "werckmeister-3", "kirnberger-3", "vallotti", "young-2"):
        assert table[pid] == pytest.approx(fit.impurity(w, load_profile(pid).cents), abs=5e-4)
        assert table["my-piece"] <= table[pid]
    assert table["my-piece"] == pytest.approx(fit.impurity(w, t.cents), abs=5e-4)
    # the profile is accepted by convert/run's loader under its id when its folder is searched
    assert load_profile("my-piece", [str(tmp_path)]).id == "my-piece"


def test_cli_bad_midi_exits_2_without_output(tmp_path):
    out = tmp_path / "x.yaml"
    cases = {
        "garbage.mid": b"this is not a midi file",
        "truncated.mid": None,
        "zero-tpb.mid": b"MThd\x00\x00\x00\x06\x00\x00\x00\x01\x00\x00MTrk\x00\x00\x00\x04\x00\xff\x2f\x00",
    }
    good = tmp_path / "good.mid"
    write_piece(good, SMALL)
    for name, data in cases.items():
        p = tmp_path / name
        p.write_bytes(data if data is not None else good.read_bytes()[:40])
        r = run_cli("fit", str(p), "-o", str(out))
        assert r.returncode == 2, (name, r.stdout, r.stderr)
        assert len(r.stderr.strip().splitlines()) == 1 and name in r.stderr
        assert not out.exists()
    r = run_cli("fit", str(tmp_path / "missing.mid"), "-o", str(out))
    assert r.returncode == 2 and "no such file" in r.stderr
    r = run_cli("fit", str(good), "-o", str(out), "--max-wolf", "1")
    assert r.returncode == 2 and not out.exists()
    assert [f for f in os.listdir(tmp_path) if f.endswith(".tmp")] == []


def test_per_key_fit(chorale, tmp_path):
    w = fit.pair_weights(fit.read_notes(chorale))
    pc = fit.fit_tuning(w)
    pk = fit.fit_tuning(w, per_key=True)
    # more freedom (a key need not share its octave's pitch): never worse, and better on this piece,
    # whose D appears both as the fifth of G and as the root of D minor
    assert pk.impurity <= pc.impurity + 1e-9
    assert pk.impurity < pc.impurity - 0.1
    # least squares per key against numpy.linalg.lstsq on the written-out equations (octaves included)
    sq = fit.fit_tuning(w, per_key=True, norm="squares")
    keys = sorted({k for p in w for k in p})
    rows, rhs = [], []
    for (a, b), wt in w.items():
        if a == b:
            continue
        d = b - a
        J = ratio_to_cents(JUST[d % 12] * 2 ** (d // 12))
        r = np.zeros(len(keys))
        r[keys.index(b)] += 1
        r[keys.index(a)] -= 1
        rows.append(math.sqrt(wt) * r)
        rhs.append(math.sqrt(wt) * (J - 100 * d))
    y = np.linalg.lstsq(np.array(rows), np.array(rhs), rcond=None)[0]
    cents = [None] * 128
    for k, v in zip(keys, y):
        cents[k] = 100.0 * k + v
    assert fit.squared_error(w, sq.cents()) == pytest.approx(fit.squared_error(w, cents), rel=1e-6, abs=1e-6)
    for a in keys:
        for b in keys:
            assert sq.cents()[b] - sq.cents()[a] == pytest.approx(cents[b] - cents[a], abs=1e-4)
    # the profile plays every key where the fit put it
    out = tmp_path / "pk.yaml"
    fit.write_atomic(out, fit.profile_yaml(pk, profile_id="pk", source_name="chorale.mid"))
    t = load_profile(str(out))
    for k in range(128):
        assert t.cents[k] == pytest.approx(pk.cents()[k], abs=1e-5)
    assert fit.impurity(w, t.cents) == pytest.approx(pk.impurity, abs=1e-5)
    # limits hold for every key and every fifth k -> k+7
    lim = fit.fit_tuning(w, per_key=True, max_deviation=6.0, max_wolf=3.0)
    assert max(abs(v) for v in lim.key_offsets) <= 6.0 + 1e-6
    pure = ratio_to_cents(Fraction(3, 2))
    assert max(abs(700 + lim.key_offsets[k + 7] - lim.key_offsets[k] - pure) for k in range(121)) <= 3.0 + 1e-6


def test_impurity_agrees_with_the_metrics_module(chorale):
    """fit's pair-weight impurity against retuner.measure.metrics' own sweep over sounding notes."""
    from retuner.measure.metrics import NoteTrack, impurity as metrics_impurity
    notes = fit.read_notes(chorale)
    w = fit.pair_weights(notes)
    for pid in ("edo12", "meantone-quarter", "werckmeister-3", "just-5limit"):
        t = load_profile(pid)
        tracks = [NoteTrack(key=n.key, channel=n.channel, start=n.start, end=n.end,
                            steps=[(n.start, t.cents[n.key])]) for n in notes]
        value, seconds = metrics_impurity(tracks)
        assert seconds == pytest.approx(sum(w.values()), abs=1e-9)
        assert fit.impurity(w, t.cents) == pytest.approx(value, abs=1e-9), pid
