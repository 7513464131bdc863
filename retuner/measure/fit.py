"""The best-fit fixed 12-note tuning for a piece.

The piece's **sounding consonant intervals** are every pair of simultaneously
sounding notes whose interval, reduced by octaves, is a unison/octave, minor or
major third, fourth, fifth, minor or major sixth (by key distance); each pair's
just target is 1/1 (2/1), 6/5, 5/4, 4/3, 3/2, 8/5, 5/3 respectively, raised by
the pair's whole octaves, and its weight is the time (seconds) the two notes
sound together. **Impurity** is the weighted mean of |interval - target| in
cents (the definition :mod:`retuner.measure.metrics` uses, so a fit and a report compare).

A 12-note tuning with pure octaves is given by one offset x[pc] (cents from
12-EDO) per pitch class. A pair of keys a < b, d = b - a semitones, sounds
100*d + x[b%12] - x[a%12] cents, so its deviation from just is linear in x:

    dev = x[b%12] - x[a%12] - (target - 100*d)

:func:`fit_tuning` minimises the impurity, sum(weight * |dev|) (by iteratively
reweighted least squares), or with ``norm="squares"`` sum(weight * dev**2)
(plain weighted least squares), optionally subject to

* ``max_deviation``: |x[pc]| <= L for every pitch class, with the tuning placed
  so that A sounds at the reference pitch (x[A] = 0: A4 = 440 Hz, ISO 16, the
  pitch a 12-EDO instrument shares);
* ``max_wolf``: every one of the 12 fifths (pc -> pc+7) within W cents of a pure
  3/2, so no wolf fifth worse than W remains. Twelve fifths must close seven
  octaves, so at least one is at least 23.46/12 = 1.955 cents (a twelfth of the
  Pythagorean comma) from pure: W below that is refused.

With limits the problem is a small convex quadratic programme, solved exactly
by a primal active-set method (Nocedal and Wright, *Numerical Optimization*,
2nd ed., algorithm 16.3). Pitch classes the piece never sounds against another
keep their 12-EDO pitch.

``per_key=True`` gives every key its own pitch (for keyboards whose keys of one
pitch class may differ): the keys the piece plays are the unknowns, octaves
become equations like the other intervals (target 2/1), keys it never plays
keep the pitch-class fit, and the limits apply to every played key and every
fifth between keys k and k+7. The profile is then written as a scale of 128
degrees on key 0 whose period lies beyond key 127.
"""

from __future__ import annotations

import json
import math
import os
import re
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path
from typing import Iterable, Optional, Sequence

import numpy as np

from retuner.errors import RetunerError
from retuner.outfile import write_atomic  # noqa: F401  (fit.write_atomic is used by the command)
from retuner.engine.notes import NoteTracker
from retuner.pitch.intervals import CONSONANT_RATIOS
from retuner.profiles.dump import dump_profile
from retuner.profiles.profile import load_profile
from retuner.pitch.tuning import NUM_KEYS, KEY_NAMES, ratio_to_cents, rounded
from retuner.smf.reader import CHANNEL, event_seconds, merged_events, read_smf

#: interval class (semitones mod 12) -> just ratio (the consonances the impurity counts)
JUST_TARGETS: dict[int, Fraction] = dict(CONSONANT_RATIOS)
JUST_CENTS: dict[int, float] = {k: ratio_to_cents(v) for k, v in JUST_TARGETS.items()}
PURE_FIFTH_CENTS = ratio_to_cents(Fraction(3, 2))
MIN_WOLF = (12 * PURE_FIFTH_CENTS - 8400.0) / 12.0     # 1.955 c: a twelfth of the Pythagorean comma
DRUM_CHANNEL = 9          # mido 0-based; channel 10 for a user (General MIDI percussion)
A_PC = 9

COMPARE_PROFILES = ("edo12", "meantone-quarter", "werckmeister-3", "kirnberger-3", "vallotti", "young-2")


@dataclass(frozen=True)
class Note:
    start: float
    end: float
    key: int
    channel: int   # 0-based


def read_notes(path: str | os.PathLike, *, passthrough: Iterable[int] = (DRUM_CHANNEL,)) -> list[Note]:
    """Notes of a MIDI file with start and end in seconds (tempo map applied).

    The file is read by the same strict reader as ``retuner convert`` (a bad file is one
    RetunerError line naming the file and the place). Percussion and other ``passthrough``
    channels (0-based) are left out. A note-on with velocity 0 is a note-off; repeated
    note-ons of one key on one channel stack and are released first-in, first-out; notes
    still held at the end end at the last event.
    """
    song = read_smf(path)
    merged = merged_events(song)
    secs = event_seconds(song, merged)
    skip = set(passthrough)
    t = 0.0
    held = NoteTracker()               # no pedals: a note lasts from its key's press to its release
    notes: list[Note] = []
    for (tick, ti, kind, raw), t in zip(merged, secs):
        if kind != CHANNEL:
            continue
        status, ch = raw[0] & 0xF0, raw[0] & 0x0F
        if status not in (0x80, 0x90) or ch in skip:
            continue
        key, vel = raw[1], raw[2]
        if status == 0x90 and vel > 0:
            held.note_on(ch, key, (t, key, ch))
        else:
            for pressed, _ in held.note_off(ch, key):
                if t > pressed[0]:
                    notes.append(Note(pressed[0], t, key, ch))
    for st, key, ch in held.remaining():
        if t > st:
            notes.append(Note(st, t, key, ch))
    notes.sort(key=lambda n: (n.start, n.key))
    return notes


def pair_weights(notes: Iterable[Note]) -> dict[tuple[int, int], float]:
    """Seconds each consonant key pair (low, high) sounds, summed over the piece.

    Every two notes sounding together count once for the time they overlap;
    two notes on the same key (on different channels) are a unison pair.
    """
    bounds: list[tuple[float, int, int]] = []     # (time, 0=off/1=on, note index)
    notes = list(notes)
    for i, n in enumerate(notes):
        bounds.append((n.start, 1, i))
        bounds.append((n.end, 0, i))
    bounds.sort()                                  # offs before ons at the same time
    sounding: dict[int, int] = {}                  # note index -> key
    out: dict[tuple[int, int], float] = {}
    last = None
    for t, kind, i in bounds:
        if last is not None and t > last and len(sounding) > 1:
            dt = t - last
            keys = sorted(sounding.values())
            for a in range(len(keys)):
                ka = keys[a]
                for b in range(a + 1, len(keys)):
                    kb = keys[b]
                    if (kb - ka) % 12 in JUST_CENTS:
                        p = (ka, kb)
                        out[p] = out.get(p, 0.0) + dt
        last = t
        if kind:
            sounding[i] = notes[i].key
        else:
            sounding.pop(i, None)
    return out


def target_cents(low: int, high: int) -> float:
    """Just size in cents of the consonant interval between keys low <= high."""
    d = high - low
    return JUST_CENTS[d % 12] + 1200.0 * (d // 12)


def impurity(weights: dict[tuple[int, int], float], cents: Sequence[Optional[float]]) -> float:
    """Time-weighted mean |deviation from just| (cents) of the consonant pairs, for key pitches ``cents``.

    Pairs with an unmapped key are left out. 0.0 when nothing consonant sounds.
    """
    total = 0.0
    acc = 0.0
    for (a, b), w in weights.items():
        ca, cb = cents[a], cents[b]
        if ca is None or cb is None:
            continue
        acc += w * abs((cb - ca) - target_cents(a, b))
        total += w
    return acc / total if total > 0 else 0.0


def _system(weights: dict[tuple[int, int], float]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows (12 columns, one per pitch class), right-hand sides and weights of the pair equations.

    Unison/octave pairs of one pitch class do not depend on x and are left out.
    """
    agg: dict[tuple[int, int, float], float] = {}
    for (a, b), w in weights.items():
        pa, pb = a % 12, b % 12
        if pa == pb or w <= 0:
            continue
        rhs = target_cents(a, b) - 100.0 * (b - a)
        k = (pa, pb, round(rhs, 9))
        agg[k] = agg.get(k, 0.0) + w
    rows = np.zeros((len(agg), 12))
    rhs = np.zeros(len(agg))
    ws = np.zeros(len(agg))
    for i, ((pa, pb, r), w) in enumerate(sorted(agg.items())):
        rows[i, pb] += 1.0
        rows[i, pa] -= 1.0
        rhs[i] = r
        ws[i] = w
    return rows, rhs, ws


@dataclass
class FitResult:
    offsets: list[float]                 # cents from 12-EDO per pitch class, A = 0
    impurity: float
    weights: dict[tuple[int, int], float] = field(repr=False)
    used: list[int] = field(default_factory=list)    # pitch classes in some consonant pair
    active: list[str] = field(default_factory=list)  # limits that bind
    key_offsets: Optional[list[float]] = None        # per-key fit: cents from 12-EDO of every key

    def degrees(self) -> list[float]:
        """Cents above C of the 12 degrees (degree 0 = 0.0)."""
        x = self.offsets
        return [100.0 * i + x[i] - x[0] for i in range(12)]

    def cents(self, reference_hz: float = 440.0) -> list[float]:
        """Pitch of every key (cents above key 0 of 12-EDO at A4 = 440 Hz) with A4 at ``reference_hz``."""
        shift = 1200.0 * math.log2(reference_hz / 440.0)
        if self.key_offsets is not None:
            return [100.0 * k + self.key_offsets[k] + shift for k in range(NUM_KEYS)]
        return [100.0 * k + self.offsets[k % 12] + shift for k in range(NUM_KEYS)]


def _solve_qp(H: np.ndarray, c: np.ndarray, G: np.ndarray, h: np.ndarray, x0: np.ndarray,
              max_iter: int = 1000) -> tuple[np.ndarray, list[int]]:
    """min 1/2 x'Hx + c'x subject to Gx <= h, from a feasible x0 (primal active set).

    H must be positive definite. Returns x and the indices of the active constraints.
    """
    x = x0.astype(float).copy()
    n = len(x)
    tol = 1e-9
    work = [i for i in range(len(h)) if abs(G[i] @ x - h[i]) <= 1e-9]
    # keep a linearly independent working set
    indep: list[int] = []
    for i in work:
        M = G[indep + [i]]
        if np.linalg.matrix_rank(M, tol=1e-9) == len(indep) + 1:
            indep.append(i)
    work = indep
    for _ in range(max_iter):
        g = H @ x + c
        m = len(work)
        K = np.zeros((n + m, n + m))
        K[:n, :n] = H
        if m:
            A = G[work]
            K[:n, n:] = A.T
            K[n:, :n] = A
        rhs = np.concatenate([-g, np.zeros(m)])
        sol = np.linalg.lstsq(K, rhs, rcond=None)[0]
        p = sol[:n]
        lam = sol[n:]
        if np.max(np.abs(p)) <= 1e-7:       # cents: far below anything audible
            if m == 0 or lam.min() >= -1e-9:
                return x, work
            work.pop(int(np.argmin(lam)))
            continue
        alpha = 1.0
        block = None
        for i in range(len(h)):
            if i in work:
                continue
            gp = G[i] @ p
            if gp > tol:
                a = (h[i] - G[i] @ x) / gp
                if a < alpha:
                    alpha = max(a, 0.0)
                    block = i
        x = x + alpha * p
        if block is not None:
            work.append(block)
    raise RetunerError("the constrained fit did not converge")


NORMS = ("abs", "squares")


def _weighted_solve(A: np.ndarray, b: np.ndarray, G: Optional[np.ndarray], h: Optional[np.ndarray],
                    x0: Optional[np.ndarray] = None) -> tuple[np.ndarray, list[int]]:
    """min ||A y - b||^2 (subject to G y <= h when given, starting from the feasible ``x0``)."""
    if G is None:
        return np.linalg.lstsq(A, b, rcond=None)[0], []   # minimum-norm: unused classes stay at 0
    n = A.shape[1]
    H = 2.0 * A.T @ A
    H += np.eye(n) * 1e-7 * max(1.0, np.trace(H) / n)     # unused classes: stay put
    return _solve_qp(H, -2.0 * A.T @ b, G, h, np.zeros(n) if x0 is None else x0)


def fit_tuning(weights: dict[tuple[int, int], float], *, max_deviation: Optional[float] = None,
               max_wolf: Optional[float] = None, norm: str = "abs", per_key: bool = False) -> FitResult:
    """The 12 pitch-class offsets that fit the piece best (see module doc).

    ``norm="squares"``: minimise the weighted sum of squared deviations (plain
    weighted least squares). ``norm="abs"`` (default): minimise the impurity
    itself, the weighted sum of absolute deviations, by iteratively reweighted
    least squares (each pair's weight divided by its current |deviation|,
    floored by a smoothing term that shrinks to 1e-9 cents), then, without
    limits, snapping to the exact vertex where the nearly pure intervals are pure.

    ``per_key``: every key its own pitch (for keyboards whose keys of one pitch
    class may differ, e.g. split keys): octaves become equations like the other
    intervals (target 2/1), and a vanishing pull (1e-9 of the piece's weight)
    towards the pitch-class fit settles what the piece leaves free (keys it
    never plays, and the overall level). Limits apply to every key and to
    every fifth between keys k and k+7.
    """
    if norm not in NORMS:
        raise RetunerError(f"norm must be one of {', '.join(NORMS)}", field="norm")
    if max_deviation is not None and not (max_deviation >= 0 and math.isfinite(max_deviation)):
        raise RetunerError("--max-deviation must be 0 or more cents", field="max_deviation")
    if max_wolf is not None and not (max_wolf >= MIN_WOLF - 1e-9 and math.isfinite(max_wolf)):
        raise RetunerError(f"--max-wolf must be at least {MIN_WOLF:.3f} cents: twelve fifths close seven "
                           "octaves only if they are a Pythagorean comma narrower in all", field="max_wolf")
    if per_key:
        base = fit_tuning(weights, max_deviation=max_deviation, max_wolf=max_wolf, norm=norm)
        return _fit_per_key(weights, base, max_deviation=max_deviation, max_wolf=max_wolf, norm=norm)
    rows, rhs, ws = _system(weights)
    used = sorted({int(pc) for r in rows for pc in np.nonzero(r)[0]})
    free = [pc for pc in range(12) if pc != A_PC]          # gauge: x[A] = 0
    col = {pc: i for i, pc in enumerate(free)}
    x = np.zeros(12)
    active: list[str] = []
    G = h = None
    names: list[str] = []
    if max_deviation is not None or max_wolf is not None:
        G_rows, h_rows = [], []
        if max_deviation is not None:
            for pc in free:
                for s in (1.0, -1.0):
                    g = np.zeros(len(free))
                    g[col[pc]] = s
                    G_rows.append(g)
                    h_rows.append(max_deviation)
                    names.append(f"deviation {KEY_NAMES[pc]}")
        if max_wolf is not None:
            base = 700.0 - PURE_FIFTH_CENTS                 # 12-EDO fifth minus pure fifth
            for pc in range(12):
                up = (pc + 7) % 12
                for s in (1.0, -1.0):
                    g = np.zeros(len(free))
                    if up in col:
                        g[col[up]] += s
                    if pc in col:
                        g[col[pc]] -= s
                    G_rows.append(g)
                    h_rows.append(max_wolf - s * base)
                    names.append(f"fifth {KEY_NAMES[pc]}-{KEY_NAMES[up]}")
        G, h = np.array(G_rows), np.array(h_rows)
    if len(rows):
        R = rows[:, free]
        sw = np.sqrt(ws)
        y, work = _weighted_solve(R * sw[:, None], rhs * sw, G, h)
        if norm == "abs":
            y, work = _irls(R, rhs, ws, G, h, y, work)
        x[free] = y
        active = sorted({names[i] for i in work})
    offsets = [float(v) for v in x]
    cents = [100.0 * k + offsets[k % 12] for k in range(NUM_KEYS)]
    return FitResult(offsets, impurity(weights, cents), weights, used, active)


def _fit_per_key(weights, base: FitResult, *, max_deviation, max_wolf, norm) -> FitResult:
    """Per-key fit: the keys the piece plays are the unknowns; the others keep the pitch-class fit."""
    prior = np.array([base.offsets[k % 12] for k in range(NUM_KEYS)])
    keys = sorted({k for pair in weights for k in pair})
    col = {k: i for i, k in enumerate(keys)}
    n = len(keys)
    agg: dict[tuple[int, int, float], float] = {}
    for (a, b), w in weights.items():
        if a == b or w <= 0:
            continue
        r = target_cents(a, b) - 100.0 * (b - a)
        k = (a, b, round(r, 9))
        agg[k] = agg.get(k, 0.0) + w
    R = np.zeros((len(agg), n))
    rhs = np.zeros(len(agg))
    ws = np.zeros(len(agg))
    for i, ((a, b, r), w) in enumerate(sorted(agg.items())):
        R[i, col[b]] += 1.0
        R[i, col[a]] -= 1.0
        rhs[i] = r
        ws[i] = w
    rho = math.sqrt(1e-9 * max(1.0, float(ws.sum())))
    fixed = (np.eye(n) * rho, prior[keys] * rho)
    G = h = None
    names: list[str] = []
    if max_deviation is not None or max_wolf is not None:
        G_rows, h_rows = [], []
        if max_deviation is not None:
            for k in keys:
                for s in (1.0, -1.0):
                    g = np.zeros(n)
                    g[col[k]] = s
                    G_rows.append(g)
                    h_rows.append(max_deviation)
                    names.append(f"deviation key {k}")
        if max_wolf is not None:
            off = 700.0 - PURE_FIFTH_CENTS
            for k in range(NUM_KEYS - 7):
                if k not in col and k + 7 not in col:
                    continue          # both keep the pitch-class fit, which meets the limit
                for s in (1.0, -1.0):
                    g = np.zeros(n)
                    const = 0.0
                    for kk, sign in ((k + 7, s), (k, -s)):
                        if kk in col:
                            g[col[kk]] += sign
                        else:
                            const += sign * prior[kk]
                    G_rows.append(g)
                    h_rows.append(max_wolf - s * off - const)
                    names.append(f"fifth keys {k}-{k + 7}")
        G, h = np.array(G_rows), np.array(h_rows)
    sw = np.sqrt(ws)
    A = np.vstack([R * sw[:, None], fixed[0]])
    b = np.concatenate([rhs * sw, fixed[1]])
    if G is None:
        y = np.linalg.lstsq(A, b, rcond=None)[0]
        work: list[int] = []
    else:
        # start from the pitch-class fit, which meets every limit
        y, work = _solve_qp(2.0 * A.T @ A, -2.0 * A.T @ b, G, h, prior[keys])
    if norm == "abs" and len(ws):
        y, work = _irls(R, rhs, ws, G, h, y, work, fixed=fixed, x0=prior[keys])
    key_offsets = [float(v) for v in prior]
    for k, v in zip(keys, y):
        key_offsets[k] = float(v)
    cents = [100.0 * k + key_offsets[k] for k in range(NUM_KEYS)]
    return FitResult(list(base.offsets), impurity(weights, cents), weights, keys,
                     sorted({names[i] for i in work}), key_offsets)


def _irls(R: np.ndarray, rhs: np.ndarray, ws: np.ndarray, G, h, y: np.ndarray, work: list[int],
          fixed: Optional[tuple[np.ndarray, np.ndarray]] = None, x0: Optional[np.ndarray] = None):
    """Minimise sum(ws * |R y - rhs|) (subject to G y <= h) from the least-squares start ``y``.

    ``fixed``: extra rows (already weighted) kept in every least-squares step as they are.
    """
    def obj(v):
        return float(np.sum(ws * np.abs(R @ v - rhs)))
    best, best_f, best_work = y, obj(y), work
    eps = 1.0
    for _ in range(400):
        r = np.abs(R @ y - rhs)
        wt = ws / np.maximum(r, eps)
        sw = np.sqrt(wt)
        A, b = R * sw[:, None], rhs * sw
        if fixed is not None:
            A, b = np.vstack([A, fixed[0]]), np.concatenate([b, fixed[1]])
        try:
            y_new, work = _weighted_solve(A, b, G, h, x0)
        except RetunerError:
            break             # the reweighted system got too ill-conditioned: keep the best so far
        f = obj(y_new)
        if f < best_f - 1e-15:
            best, best_f, best_work = y_new, f, work
        step = float(np.max(np.abs(y_new - y)))
        y = y_new
        if step < eps * 1e-2:
            if eps <= 1e-9:
                break
            eps *= 0.1
    if G is None and fixed is None:
        # snap: the optimum of an L1 fit makes as many equations exact as there are
        # unknowns (a vertex); solve those exactly and keep it if it is no worse
        r = np.abs(R @ best - rhs)
        order = np.argsort(r)
        chosen: list[int] = []
        rank = np.linalg.matrix_rank(R)
        for i in order:
            if r[i] > 1e-3:
                break
            if np.linalg.matrix_rank(R[chosen + [int(i)]], tol=1e-9) == len(chosen) + 1:
                chosen.append(int(i))
            if len(chosen) == rank:
                break
        if chosen:
            M = R[chosen]
            # exact on the chosen rows, nearest to the IRLS answer elsewhere
            cand = best + np.linalg.lstsq(M, rhs[chosen] - M @ best, rcond=None)[0]
            if obj(cand) <= best_f + 1e-12:
                best = cand
    return best, best_work


def squared_error(weights: dict[tuple[int, int], float], cents: Sequence[Optional[float]]) -> float:
    """Time-weighted sum of squared deviations from just (the least-squares objective)."""
    return sum(w * ((cents[b] - cents[a]) - target_cents(a, b)) ** 2
               for (a, b), w in weights.items() if cents[a] is not None and cents[b] is not None)


def profile_yaml(result: FitResult, *, profile_id: str, source_name: str,
                 reference_hz: float = 440.0) -> str:
    """The fitted tuning as profile YAML (scale of 12 degrees in cents above C, pure octaves)."""
    if result.key_offsets is not None:
        return _per_key_yaml(result, profile_id=profile_id, source_name=source_name, reference_hz=reference_hz)
    deg = result.degrees()
    for i in range(1, 12):
        if not deg[i] > deg[i - 1]:
            raise RetunerError("the fitted degrees are not increasing (two pitch classes crossed); "
                               "limit them with --max-deviation")
    lim = []
    if result.active:
        lim.append("binding limits: " + ", ".join(result.active))
    offs = ", ".join(f"{KEY_NAMES[i]} {rounded(result.offsets[i], 3):+.3f}" for i in range(12))
    description = (f"best-fit 12-note tuning for {Path(source_name).name} "
                   f"(impurity {result.impurity:.3f} cents)")
    source = ("retuner fit: time-weighted fit of the piece's consonant intervals to just ratios"
              + ("; " + "; ".join(lim) if lim else ""))
    return dump_profile(id=profile_id, description=description, source=source,
                        comments=[f"cents from 12-EDO per pitch class (A4 = {reference_hz:g} Hz): {offs}"],
                        scale=[0.0] + [float(d) for d in deg[1:]], period=Fraction(2),
                        concert_pitch=(69, float(reference_hz)))


def _per_key_yaml(result: FitResult, *, profile_id: str, source_name: str, reference_hz: float) -> str:
    """A per-key fit as a scale of 128 degrees rooted on key 0 whose period lies beyond key 127."""
    x = result.key_offsets
    assert x is not None
    rel = [100.0 * k + x[k] - x[0] for k in range(NUM_KEYS)]
    for k in range(1, NUM_KEYS):
        if not rel[k] > rel[k - 1]:
            raise RetunerError(f"the fitted keys {k - 1} and {k} are not in rising order; "
                               "limit them with --max-deviation")
    period = rel[-1] + 100.0
    ref_hz = reference_hz * 2.0 ** (x[69] / 1200.0)
    description = (f"best-fit per-key tuning for {Path(source_name).name} "
                   f"(impurity {result.impurity:.3f} cents)")
    source = "retuner fit --per-key: time-weighted fit of the piece's intervals, octaves included, to just ratios"
    if result.active:
        source += "; binding limits: " + ", ".join(result.active)
    return dump_profile(id=profile_id, description=description, source=source,
                        comments=["every key its own pitch: degree k is key k, in cents above key 0; "
                                  "the period lies past key 127"],
                        scale=[0.0] + rel[1:], period=period, runs=[(0, NUM_KEYS - 1, 0)],
                        concert_pitch=(69, ref_hz))


def profile_id_for(path: str | os.PathLike) -> str:
    stem = Path(path).name
    for ext in (".yaml", ".yml"):
        if stem.lower().endswith(ext):
            stem = stem[: -len(ext)]
    pid = re.sub(r"[^a-z0-9-]+", "-", stem.lower()).strip("-")
    return pid or "fitted"


def compare(weights: dict[tuple[int, int], float], profile_ids: Sequence[str] = COMPARE_PROFILES,
            dirs: Sequence = ()) -> list[tuple[str, float]]:
    """Impurity of each named profile on the piece (12-note profiles compared key by key)."""
    out = []
    for pid in profile_ids:
        t = load_profile(pid, dirs)
        out.append((pid, impurity(weights, t.cents)))
    return out
