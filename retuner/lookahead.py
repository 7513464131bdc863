"""Lookahead adaptive tuning for files: plan every note's pitch over the whole piece.

Live adaptive tuning (:mod:`retuner.adaptive`) must decide at each note-on
knowing only what sounds now. A file is known in advance, so here the pitches
of all notes over the whole piece are chosen together:

* **Segments.** The piece is cut at every note-on time. In each segment a note
  that sounds has one pitch (its deviation from 12-EDO, ``x[n, s]``); a held
  note may only change pitch at a segment boundary, i.e. when other notes start.
* **Cost** (a quadratic, solved exactly as one sparse least-squares problem):

  - every pair of notes sounding together in a segment:
    ``w_class * overlap_seconds * (x_j - x_i - t_ij)**2`` with ``t_ij`` the just
    interval of the pair (the adaptive settings' interval table and weights, as
    live; an ambiguous class takes the candidate nearest to what the first
    solution implies, then the system is solved again), so a chord is tuned
    knowing every note that starts with it *and* every note that will sound
    with it, each pair counted for as long as it actually sounds;
  - motion of a held note from one segment to the next:
    ``motion_weight * (x[n, s+1] - x[n, s])**2``;
  - the centre: ``centre_weight * segment_seconds * (mean_n x[n, s] - r)**2``
    (``r`` the reference: 12-EDO at the profile's reference pitch, or the
    profile). Segments whose centre still exceeds ``0.8 * max_drift`` get their
    centre weight raised and the problem is solved again (at most 6 times): the
    drift is planned over the piece, not corrected after it happened.

  Pieces are solved in windows of ``WINDOW`` segments that overlap by
  ``WINDOW - COMMIT``: the first ``COMMIT`` segments of each window are kept, the
  next window starts from them (so a long file costs time linear in its length).
* **Rendering.** The same engine as live plays the plan: adaptive mode with a
  solver that answers from the plan (chord window 0, so every note sounds at its
  own tick). Each note gets a channel of its own; its bend is then moved back
  from its note-on to the moment its channel fell silent (last note-off plus the
  release time, and after the channel's previous bend), so no bend is ever sent
  at a note-on and no note starts with a slide. Held notes re-centre by small
  planned bends at other notes' onsets.

* **Checked against live playing.** The one free trade-off of the plan, the
  price of motion against impurity, is set by ``motion_value``. ``choose()``
  renders the file through the live engine too and measures both outputs with
  :mod:`retuner.metrics` (from the written bytes); the first of
  motion values tried (bisected from ``MOTION_VALUE``) whose plan is no worse
  than live on impurity, motion and drift is kept. If none is (it happens on arrangements, where live playing
  tunes each part on its own and so can keep every part centred while the plan,
  tuning the parts together, trades a little drift for much less impurity), the
  best plan is kept and the report's ``lookahead_check`` says ``beats_live:
  false`` with both sets of figures. On the project's progressions the first
  plan already beats live playing (lower motion and drift, impurity no worse).

Unlike the live engine, which tunes each part on its own when a file is split
into parts, the plan sees all parts of an arrangement together. Cost: a dense
solve per window and reweighting round (about 15 s for a 100 000-event file on
a laptop-class CPU, per plan; at most ``MAX_PLANS`` plans).
"""

from __future__ import annotations

import bisect
import math
from typing import Optional

import numpy as np

from .errors import RetunerError

WINDOW = 48     # segments solved together
COMMIT = 32     # segments kept from each window
DRIFT_ROUNDS = 6
IRLS_ROUNDS = 12
IRLS_TOL = 0.01    # cents: stop reweighting when no pitch moves more
IRLS_EPS = 0.02
MOTION_VALUE = 1.3
#: the centre term's weight relative to the adaptive settings' centre_weight: the plan keeps the
#: centre mainly through its drift limit, planned over the piece
CENTRE_VALUE = 0.01
DRIFT_AIM = 1.0
#: shortest stretch of time a centre term is weighted with (seconds)
MIN_STRETCH = 0.05
#: range in which choose() bisects the motion value, and how many plans it makes at most
MOTION_LOW, MOTION_HIGH = 0.5, 3.0
MAX_PLANS = 6


class _Note:
    __slots__ = ("id", "part", "key", "on", "end", "off", "s0", "s1", "var0")

    def __init__(self, id_, part, key, on):
        self.id = id_
        self.part = part
        self.key = key
        self.on = on
        self.end = math.inf     # stops sounding (note-off, or the pedal's release after it)
        self.off = math.inf     # note-off (key up)
        self.s0 = 0
        self.s1 = -1
        self.var0 = -1


def extract_notes(merged, secs, passthrough, tuning) -> list[_Note]:
    """Notes of the file with their sounding times (sustain pedal honoured; FIFO note-off matching
    per channel and key, as the engine does)."""
    from .files import CHANNEL
    notes: list[_Note] = []
    fifo: dict[tuple[int, int], list] = {}
    pedal: dict[int, bool] = {}
    pedalled: dict[int, list] = {}
    for (tick, ti, kind, raw), t in zip(merged, secs):
        if kind != CHANNEL:
            continue
        st = raw[0]
        ch = st & 0x0F
        if ch in passthrough:
            continue
        hi = st & 0xF0
        if hi == 0x90 and raw[2] > 0:
            key = raw[1]
            if tuning.cents[key] is None:
                continue
            n = _Note(len(notes), ch, key, t)
            notes.append(n)
            fifo.setdefault((ch, key), []).append(n)
        elif hi == 0x80 or hi == 0x90:
            q = fifo.get((ch, raw[1]))
            if q:
                n = q.pop(0)
                n.off = t
                if pedal.get(ch):
                    pedalled.setdefault(ch, []).append(n)
                else:
                    n.end = t
        elif hi == 0xB0:
            cc, v = raw[1], raw[2]
            if cc == 64:
                down = v >= 64
                if pedal.get(ch) and not down:
                    for n in pedalled.pop(ch, []):
                        n.end = t
                pedal[ch] = down
            elif cc in (120, 123, 124, 125, 126, 127):
                for (c, k), q in list(fifo.items()):
                    if c == ch:
                        for n in q:
                            n.end = n.off = t
                        del fifo[(c, k)]
                for n in pedalled.pop(ch, []):
                    n.end = t
    end = secs[-1] if secs else 0.0
    for n in notes:
        if n.end == math.inf:
            n.end = max(end, n.on)
        n.off = min(n.off, n.end)
    return notes


class Plan:
    """Pitches of every note in every segment, and the hooks that make the engine play them."""

    def __init__(self, notes: list[_Note], onsets: list[float], values: np.ndarray, release_time: float):
        self.notes = notes
        self.onsets = onsets
        self.values = values            # deviation per variable
        self.release_time = release_time
        self._by_part_key: dict[tuple[int, int], list[_Note]] = {}
        for n in notes:
            self._by_part_key.setdefault((n.part, n.key), []).append(n)
        self._ons = {k: [n.on for n in v] for k, v in self._by_part_key.items()}
        self._seg_of = {t: i for i, t in enumerate(onsets)}

    # -- queries --------------------------------------------------------------
    def pitch(self, part: int, key: int, t: float, seg: int) -> Optional[float]:
        """Planned pitch (cents above key 0 of 12-EDO) of the note of ``part``/``key`` sounding at ``t``."""
        lst = self._by_part_key.get((part, key))
        if not lst:
            return None
        i = bisect.bisect_right(self._ons[(part, key)], t) - 1
        while i >= 0:
            n = lst[i]
            if n.on <= t and (n.end > t or n.on == t):
                if n.s0 <= seg <= n.s1:
                    return 100.0 * key + float(self.values[n.var0 + seg - n.s0])
                return None
            i -= 1
        return None

    def pitch_any(self, key: int, t: float, seg: int) -> Optional[float]:
        for (part, k) in self._by_part_key:
            if k == key:
                p = self.pitch(part, key, t, seg)
                if p is not None:
                    return p
        return None

    # -- engine hooks ---------------------------------------------------------
    def engine(self, tuning, config):
        """An engine that plays this plan (adaptive mode, chord window 0, a planned solver)."""
        from .engine import Engine

        acfg = config.adaptive
        cfg = config.replace(adaptive=acfg, share_channels=False)
        plan = self

        class PlannedEngine(Engine):
            def _make_solver(self, _acfg):
                super()._make_solver(_acfg)     # the engine's own bookkeeping
                self._solver = _PlannedSolver(plan, self)
                self._window = 0.0

        e = PlannedEngine(tuning, cfg)
        e._la_part = None
        e._la_t = 0.0
        e._la_seg = 0
        return e

    def before_feed(self, engine, ch: int, tick: int, t: float, msg) -> None:
        engine._la_part = ch
        engine._la_t = t
        seg = self._seg_of.get(t)
        if seg is None:
            seg = max(bisect.bisect_right(self.onsets, t) - 1, 0)
        engine._la_seg = seg

    def after_drive(self, song, tracks, group) -> None:
        """Move each note's bend back to when its channel fell silent (in place)."""
        if not group.engines:
            return
        e0 = next(iter(group.engines.values()))
        if e0.mode == "mts":
            return
        move_bends_early(song, tracks, self.release_time)


class _PlannedSolver:
    """Answers the engine's ``solve(held, new)`` from the plan."""

    def __init__(self, plan: Plan, engine):
        self.plan = plan
        self.engine = engine

    def reset(self) -> None:
        pass

    def release(self, keys) -> None:
        pass

    def solve(self, held, new):
        e = self.engine
        part, t, seg = e._la_part, e._la_t, e._la_seg
        plan = self.plan
        out_h = []
        for k, c in held:
            p = plan.pitch(part, k, t, seg)
            if p is None and e.mode == "mts":  # one engine serves every part: any part's note
                p = plan.pitch_any(k, t, seg)
            out_h.append(c if p is None else p)
        out_n = []
        for k in new:
            p = plan.pitch(part, k, t, seg)
            out_n.append(100.0 * k if p is None else p)
        return out_h, out_n


def move_bends_early(song, tracks, release_time: float) -> int:
    """For every pitch bend sent right before a note-on on its channel (same tick), move it back
    to the tick its channel fell silent: the last note-off there (or pedal release) plus the
    release time, and never before the channel's previous bend or a reset-all-controllers
    (which resets the bend). Returns the number moved."""
    tm = song.tempo_map
    allev = []
    for ti, (evs, _end) in enumerate(tracks):
        for i, (tick, raw) in enumerate(evs):
            if raw[0] < 0xF0:
                allev.append((tick, ti, i))
    allev.sort()
    sounding = [0] * 16
    pedal = [False] * 16
    held_by_pedal = [0] * 16
    silent_from = [0] * 16          # tick from which the channel is silent (release included)
    last_bend = [0] * 16
    moves = []
    rel = release_time
    for tick, ti, i in allev:
        evs = tracks[ti][0]
        raw = evs[i][1]
        st = raw[0]
        hi, c = st & 0xF0, st & 0x0F
        if hi == 0xE0:
            nxt = evs[i + 1][1] if i + 1 < len(evs) else None
            is_note_bend = (nxt is not None and evs[i + 1][0] == tick and nxt[0] == (0x90 | c)
                            and nxt[2] > 0 and sounding[c] == 0 and held_by_pedal[c] == 0)
            if is_note_bend:
                target = max(silent_from[c], last_bend[c])
                if target < tick:
                    moves.append((ti, i, target))
                    last_bend[c] = target
                    continue
            last_bend[c] = tick
        elif hi == 0x90 and raw[2] > 0:
            sounding[c] += 1
        elif hi == 0x80 or hi == 0x90:
            if sounding[c] > 0:
                sounding[c] -= 1
                if pedal[c]:
                    held_by_pedal[c] += 1
                elif sounding[c] == 0:
                    silent_from[c] = int(math.ceil(tm.tick(tm.seconds(tick) + rel)))
        elif hi == 0xB0 and raw[1] == 64:
            down = raw[2] >= 64
            if pedal[c] and not down and held_by_pedal[c]:
                held_by_pedal[c] = 0
                if sounding[c] == 0:
                    silent_from[c] = int(math.ceil(tm.tick(tm.seconds(tick) + rel)))
            pedal[c] = down
        elif hi == 0xB0 and raw[1] == 121:
            # reset all controllers resets the bend (MIDI 1.0): a bend must not move before it
            last_bend[c] = max(last_bend[c], tick + 1)
        elif hi == 0xB0 and raw[1] in (120, 123):
            sounding[c] = 0
            held_by_pedal[c] = 0
            silent_from[c] = int(math.ceil(tm.tick(tm.seconds(tick) + rel)))
    if not moves:
        return 0
    by_track: dict[int, dict[int, int]] = {}
    for ti, i, target in moves:
        by_track.setdefault(ti, {})[i] = target
    for ti, mv in by_track.items():
        evs, end = tracks[ti]
        new = [((mv[i], raw) if i in mv else (tick, raw)) for i, (tick, raw) in enumerate(evs)]
        new.sort(key=lambda e: e[0])  # stable: a moved bend lands after what is already at its tick
        evs[:] = new
    return len(moves)


# ---------------------------------------------------------------------------
# The plan
# ---------------------------------------------------------------------------
def _interval_tables(acfg):
    """Per semitone difference d (index d+127): candidate target deviations from 12-EDO, weight."""
    table = acfg.table()
    weights = acfg.weight_table()
    cands = []
    w = np.zeros(255)
    for idx in range(255):
        d = idx - 127
        o = abs(d) % 12
        vals = [v - 100.0 * o for v in table[o]]
        cands.append([v if d >= 0 else -v for v in vals])
        w[idx] = weights[o]
    return cands, w


def plan_song(song, merged, secs, tuning, config, motion_value: float = MOTION_VALUE,
              drift_aim: float = DRIFT_AIM) -> Plan:
    acfg = config.adaptive
    if acfg is None:
        raise RetunerError("--lookahead works with --adaptive", field="lookahead")
    pas = frozenset(config.passthrough)
    notes = extract_notes(merged, secs, pas, tuning)
    onsets = sorted({n.on for n in notes})
    seg_of = {t: i for i, t in enumerate(onsets)}
    S = len(onsets)
    nvar = 0
    seg_notes: list[list[_Note]] = [[] for _ in range(S)]
    for n in sorted(notes, key=lambda n: (n.on, n.id)):
        n.s0 = seg_of[n.on]
        s1 = bisect.bisect_left(onsets, n.end) - 1
        n.s1 = max(s1, n.s0)
        n.var0 = nvar
        nvar += n.s1 - n.s0 + 1
        for s in range(n.s0, n.s1 + 1):
            seg_notes[s].append(n)
    # reference deviation of each key
    if acfg.reference == "profile":
        ref = [tuning.deviation(k) if tuning.deviation(k) is not None else 0.0 for k in range(128)]
    else:
        off = tuning.deviation(69)
        ref = [off if off is not None else 0.0] * 128
    values = np.zeros(nvar)
    cands, wcls = _interval_tables(acfg)
    seg_end = onsets[1:] + [max((n.end for n in notes), default=0.0)]
    s = 0
    while s < S:
        e = min(S, s + WINDOW)
        keep = S if e == S else s + COMMIT
        _solve_window(s, e, keep, seg_notes, onsets, seg_end, values, cands, wcls, ref, acfg,
                      motion_value, drift_aim)
        s = keep
    return Plan(notes, onsets, values, config.release_time)


def _solve_window(s0, s1, keep, seg_notes, onsets, seg_end, values, cands, wcls, ref, acfg,
                  motion_value, drift_aim) -> None:
    """Solve segments [s0, s1); write the variables of segments [s0, keep)."""
    # local variable numbering
    loc: dict[tuple[int, int], int] = {}
    order = []
    for s in range(s0, s1):
        for n in seg_notes[s]:
            loc[(n.id, s)] = len(order)
            order.append((n, s))
    N = len(order)
    if N == 0:
        return
    lam = float(acfg.motion_weight)
    mu0 = CENTRE_VALUE * float(acfg.centre_weight)
    limit = float(acfg.max_drift)
    # pairs: (i, j, weight, candidate list)
    pi, pj, pw, pc = [], [], [], []
    for s in range(s0, s1):
        ns = seg_notes[s]
        if len(ns) < 2:
            continue
        ts, te = onsets[s], seg_end[s]
        for a in range(len(ns)):
            na = ns[a]
            for b in range(a + 1, len(ns)):
                nb = ns[b]
                ov = min(na.end, nb.end, te) - ts
                if ov <= 0:
                    continue
                d = nb.key - na.key
                w = wcls[d + 127] * ov
                if w <= 0:
                    continue
                pi.append(loc[(na.id, s)])
                pj.append(loc[(nb.id, s)])
                pw.append(w)
                pc.append(cands[d + 127])
    pi = np.array(pi, dtype=int)
    pj = np.array(pj, dtype=int)
    pw = np.array(pw, dtype=float)
    tau = np.array([c[0] for c in pc], dtype=float)
    # motion: (i, j) consecutive segments of one note; the first may be fixed (before s0)
    mi, mj = [], []
    fixed_terms = []   # (j, fixed value)
    for (n, s), j in zip(order, range(N)):
        if s > n.s0:
            if s == s0:
                fixed_terms.append((j, values[n.var0 + s - 1 - n.s0]))
            else:
                mi.append(loc[(n.id, s - 1)])
                mj.append(j)
    mi = np.array(mi, dtype=int)
    mj = np.array(mj, dtype=int)
    # centre: per segment the variables and the weight
    # (the drift is measured over every stretch in which the set of sounding notes is constant,
    # so a segment in which some notes end early gets one centre term per such stretch)
    seg_vars = []
    for s in range(s0, s1):
        ns = seg_notes[s]
        if not ns:
            continue
        ts, te = onsets[s], seg_end[s]
        cuts = sorted({ts, te} | {n.end for n in ns if ts < n.end < te} | {n.off for n in ns if ts < n.off < te})
        for a, b in zip(cuts, cuts[1:]):
            # notes sounding (pedal included), and notes whose key is down: a decoder that
            # ignores the pedal hears the latter; the centre is kept for both views
            for sub in {tuple(n for n in ns if n.end > a), tuple(n for n in ns if n.off > a)}:
                if not sub:
                    continue
                idx = [loc[(n.id, s)] for n in sub]
                r = sum(ref[n.key] for n in sub) / len(sub)
                seg_vars.append((idx, max(b - a, MIN_STRETCH), r))
    mu = np.full(len(seg_vars), mu0)
    # the centre terms as flat index arrays (one np.add.at per solve)
    t_k = np.array([len(v[0]) for v in seg_vars], dtype=float)
    t_dur = np.array([v[1] for v in seg_vars], dtype=float)
    t_r = np.array([v[2] for v in seg_vars], dtype=float)
    g_idx = np.array([i for v in seg_vars for i in v[0]], dtype=int)
    g_term = np.repeat(np.arange(len(seg_vars)), [len(v[0]) for v in seg_vars])
    h_rows = np.array([i for v in seg_vars for i in v[0] for _ in v[0]], dtype=int)
    h_cols = np.array([j for v in seg_vars for _ in v[0] for j in v[0]], dtype=int)
    h_term = np.repeat(np.arange(len(seg_vars)), [len(v[0]) ** 2 for v in seg_vars])
    # L1 weights (impurity and motion are measured as sums of absolute values):
    # iteratively reweighted least squares, starting from the plain quadratic solution
    pair_time = float(pw.sum()) if len(pw) else 0.0
    nnotes = max(len({n.id for n, _ in order}), 1)
    lam1 = motion_value * max(pair_time / nnotes, 1e-3)
    fixed_j = np.array([j for j, _ in fixed_terms], dtype=int)
    fixed_v = np.array([v for _, v in fixed_terms], dtype=float)

    def solve(tau_, pwe, me, fe):
        H = np.zeros((N, N))
        g = np.zeros(N)
        if len(pi):
            np.add.at(H, (pi, pi), pwe)
            np.add.at(H, (pj, pj), pwe)
            np.add.at(H, (pi, pj), -pwe)
            np.add.at(H, (pj, pi), -pwe)
            np.add.at(g, pj, pwe * tau_)
            np.add.at(g, pi, -pwe * tau_)
        if len(mi):
            np.add.at(H, (mi, mi), me)
            np.add.at(H, (mj, mj), me)
            np.add.at(H, (mi, mj), -me)
            np.add.at(H, (mj, mi), -me)
        if len(fixed_j):
            np.add.at(H, (fixed_j, fixed_j), fe)
            np.add.at(g, fixed_j, fe * fixed_v)
        if len(seg_vars):
            c = mu * t_dur / (t_k * t_k)
            np.add.at(H, (h_rows, h_cols), c[h_term])
            np.add.at(g, g_idx, (c * t_k * t_r)[g_term])
        H.flat[::N + 1] += 1e-9
        return np.linalg.solve(H, g)

    me = np.full(len(mi), lam)
    fe = np.full(len(fixed_j), lam)
    x = solve(tau, pw, me, fe)
    # ambiguous classes: take the candidate nearest to what the solution implies
    if len(pc):
        amb = [k for k, c in enumerate(pc) if len(c) > 1]
        if amb:
            diff = x[pj] - x[pi]
            for k in amb:
                c = pc[k]
                tau[k] = min(c, key=lambda v: abs(v - diff[k]))
            x = solve(tau, pw, me, fe)
    for it in range(IRLS_ROUNDS):
        pwe = pw / np.maximum(np.abs(x[pj] - x[pi] - tau), IRLS_EPS) if len(pi) else pw
        me = lam1 / np.maximum(np.abs(x[mj] - x[mi]), IRLS_EPS) if len(mi) else me
        fe = lam1 / np.maximum(np.abs(x[fixed_j] - fixed_v), IRLS_EPS) if len(fixed_j) else fe
        # planned drift: raise the centre weight where the centre strays
        if len(seg_vars):
            centre = np.bincount(g_term, weights=x[g_idx], minlength=len(seg_vars)) / t_k
            mu[np.abs(centre - t_r) > drift_aim * limit] *= 2.0
        x_new = solve(tau, pwe, me, fe)
        done = float(np.max(np.abs(x_new - x))) < IRLS_TOL
        x = x_new
        if done:
            break
    for (n, s), v in zip(order, x):
        if s < keep:
            values[n.var0 + s - n.s0] = v


# ---------------------------------------------------------------------------
# Choosing the plan: checked against live playing of the same file
# ---------------------------------------------------------------------------
class Chosen:
    def __init__(self, outputs, summary):
        self.outputs = outputs
        self.summary = summary


def measure_outputs(outputs, config) -> dict:
    """Impurity, motion per note and maximum drift of the output files, decoded from their bytes
    (the notes of all files of a split arrangement together)."""
    from . import files, metrics
    notes = []
    for o in outputs:
        dec = metrics.decode(files.output_stream(o.data, o.path), bend_scale=config.bend_scale,
                             exclude_channels=tuple(config.passthrough))
        notes.extend(dec.notes)
    imp, _ = metrics.impurity(notes)
    return {"impurity_cents": imp, "motion_cents_per_note": metrics.motion(notes),
            "drift_max_cents": metrics.drift(notes)["max"]}


def _beats(m: dict, live: dict, eps: float = 1e-3) -> bool:
    """No worse than live on impurity, motion and drift (``eps`` cents: below a bend step)."""
    return all(m[k] <= live[k] + eps for k in ("impurity_cents", "motion_cents_per_note", "drift_max_cents"))


def choose(song, merged, secs, tuning, config, live_outputs, render) -> Chosen:
    """Plan the piece and check the plan against live playing (``live_outputs``: the same file
    through the live engine). The planner's one free trade-off, the price of motion against
    impurity (``motion_value``), starts at ``MOTION_VALUE`` and is bisected (at most
    ``MAX_PLANS`` plans): a plan worse than live on impurity lowers the price of motion, one
    worse on motion raises it; a plan worse on drift alone halves the drift it aims at. The first plan no worse than live on impurity, motion and drift
    (measured from the output files) is taken; if none is, the plan with the lowest
    ``motion + drift + 10 * impurity`` among those no worse on impurity (else among all), and the
    summary says so."""
    live = measure_outputs(live_outputs, config)
    tried = []
    best = None
    lo, hi = MOTION_LOW, MOTION_HIGH
    mv = MOTION_VALUE
    da = DRIFT_AIM
    for _ in range(MAX_PLANS):
        plan = plan_song(song, merged, secs, tuning, config, motion_value=mv, drift_aim=da)
        outs = render(plan)
        m = measure_outputs(outs, config)
        tried.append((mv, m, outs))
        if _beats(m, live):
            best = (mv, m, outs)
            break
        worse_imp = m["impurity_cents"] > live["impurity_cents"] + 1e-3
        worse_mot = m["motion_cents_per_note"] > live["motion_cents_per_note"] + 1e-3
        worse_drift = m["drift_max_cents"] > live["drift_max_cents"] + 1e-3
        if worse_drift and not worse_imp and not worse_mot:
            da /= 2.0       # plan the centre closer to the reference
        elif worse_imp and not worse_mot:
            hi, mv = mv, (lo + mv) / 2.0
        elif worse_mot and not worse_imp:
            lo, mv = mv, (mv + hi) / 2.0
        else:
            break
    beat = best is not None
    if best is None:
        ok = [t for t in tried if t[1]["impurity_cents"] <= live["impurity_cents"] + 1e-3]
        pool = ok or tried
        best = min(pool, key=lambda t: t[1]["motion_cents_per_note"] + t[1]["drift_max_cents"]
                   + 10.0 * t[1]["impurity_cents"])
    mv, m, outs = best
    summary = {"motion_value": round(mv, 4), "drift_aim": round(da, 4), "beats_live": beat, "plans_tried": len(tried),
               "live": {k: round(v, 4) for k, v in live.items()},
               "lookahead": {k: round(v, 4) for k, v in m.items()}}
    return Chosen(outs, summary)
