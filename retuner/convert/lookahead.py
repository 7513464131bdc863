"""Lookahead adaptive tuning for files: plan every note's pitch over the whole piece.

Live adaptive tuning (:mod:`retuner.adaptive.solver`) must decide at each note-on
knowing only what sounds now. A file is known in advance, so here the pitches
of all notes over the whole piece are chosen together:

* **Segments.** The piece is cut at every note-on time. In each segment a note
  that sounds has one pitch (its deviation from 12-EDO, ``x[n, s]``); a held
  note may only change pitch at a segment boundary, i.e. when other notes start.
* **Cost**, in the units of the measures (:mod:`retuner.measure.metrics`), which are sums of
  absolute values and a maximum, so the plan is a linear programme:

  - every pair of notes sounding together in a segment:
    ``w_class * overlap_seconds * |x_j - x_i - t_ij|`` with ``t_ij`` the just interval of the
    pair (the adaptive settings' interval table and weights, as live; an ambiguous class takes
    the candidate nearest to what a first, rough solution implies, then the programme is
    solved again), divided by the window's pair time: the mean impurity, so a chord is tuned
    knowing every note that starts with it *and* every note that will sound with it, each pair
    counted for as long as it actually sounds;
  - motion of a held note from one segment to the next, ``|x[n, s+1] - x[n, s]|``, priced at
    ``motion_value`` per cent per note (relative to the mean impurity), and ``EXCESS_VALUE``
    times more for what exceeds the settings' limit per event (``max_motion`` under the
    "limited" policy, 0 under "fixed-held");
  - drift: the largest ``|mean_n x[n] - r|`` over every stretch in which the set of sounding
    notes is constant (``r`` the reference: 12-EDO at the profile's reference pitch, or the
    profile), priced at ``drift_value``, and never above the adaptive settings' ``max_drift``.
    So re-centring is planned: a common shift of every note of a chord costs no impurity, a
    shift of held notes costs motion, and the programme puts each where it is cheapest over
    the window, knowing what comes.

  The programme is solved exactly (to 0.001 of the objective) by a log-barrier interior-point
  method (:func:`l1_solve`; numpy only). Pieces are solved in windows of ``WINDOW`` segments
  that overlap by ``WINDOW - COMMIT``: the first ``COMMIT`` segments of each window are kept,
  the next window starts from them, and the drift already reached is its floor (the maximum
  over the piece counts once), so a long file costs time linear in its length.
* **Rendering.** The same engine as live plays the plan: adaptive mode with a
  solver that answers from the plan (chord window 0, so every note sounds at its
  own tick). Each note gets a channel of its own; its bend is then moved back
  from its note-on to the moment its channel fell silent (last note-off plus the
  release time, and after the channel's previous bend), so no bend is ever sent
  at a note-on and no note starts with a slide. Held notes re-centre by small
  planned bends at other notes' onsets.

* **Checked against live playing.** ``choose()`` renders the file through the live engine
  too and measures both outputs with :mod:`retuner.measure.metrics` (from the written bytes). If the
  first plan does not beat live clearly (impurity no worse, motion and drift lower by at
  least ``TARGET_MARGIN`` wherever live has any), the price of the weakest measure is changed
  and the piece planned again, and convex mixtures of the plans are tried: every measure is a
  convex function of the planned pitches, so a mixture is no worse than the same mixture of
  its plans' measures (e.g. on the comma pump one plan re-centres by moving held notes,
  another by tempering, and a 70/30 mixture beats live on all three measures where neither
  does alone). The plan or mixture with the widest margin over live is kept; if none beats
  live (it happens where the player's wheel sets the drift), the report's
  ``lookahead_check`` says ``better_than_live: false`` with both sets of figures.

**Parts.** The plan tunes the parts of an arrangement (one voice or instrument per input
channel) together as one harmony: every pair of notes sounding together is priced, whichever
parts they belong to, as the live engine does for the parts of a file. Planned ``apart``
(``--parts-apart``), only the pairs within one part are priced and the drift is each part's
own: each part is tuned against itself. Cost: about 5 s per plan for a
100 000-event file (the generated arrangement of ``files.convert_speed_bench``) on one core of
the development machine, at most ``MAX_PLANS`` plans plus mixtures; that file (which no plan
beats live on: the player's wheel sets its drift) converts in about 40 s with ``--lookahead``,
against 3 s without.
"""

from __future__ import annotations

import bisect
import dataclasses
import itertools
import math
from typing import Callable, Optional

import numpy as np

from retuner.engine.notes import NoteTracker
from retuner.engine.outputs import MODES
from retuner.errors import RetunerError
from retuner.measure import metrics

WINDOW = 32     # segments solved together
COMMIT = 24     # segments kept from each window
#: prices of the first plan: a cent of motion per note against a cent of mean impurity, and a
#: cent of the window's largest drift against a cent of mean impurity
MOTION_VALUE = 1.0
DRIFT_VALUE = 0.1
#: plans choose() makes at most (mixtures of them not counted)
MAX_PLANS = 5
#: price of each cent a held note's step exceeds the adaptive settings' limit per event,
#: in units of the motion price
EXCESS_VALUE = 20.0
#: factor by which the barrier parameter grows between centring rounds (see l1_solve)
BARRIER_STEP = 50.0
#: duality gap bound of a window's solution (in the units of the window's objective, about cents),
#: and of the first, rough solution that only picks the targets of ambiguous interval classes
SOLVE_TOL = 1e-3
ROUGH_TOL = 0.5
#: duality gap bound the barrier method starts from, and how closely it centres before the
#: last round (Newton decrement): rough centring costs few steps and loses nothing at the end
START_GAP = 2.0
CENTRING_TOL = 0.1


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
    """Notes of the file with their sounding times: presses, releases and pedals (sustain,
    sostenuto) by the engine's own rule (:mod:`retuner.engine.notes`), per channel. ``merged``:
    (tick, track, kind, raw bytes) of every event; channel messages are those whose status
    byte is below 0xF0 (MIDI 1.0)."""
    notes: list[_Note] = []
    tracker = NoteTracker(sostenuto=True)
    for (tick, ti, kind, raw), t in zip(merged, secs):
        st = raw[0]
        if st >= 0xF0:
            continue
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
            tracker.note_on(ch, key, n)
        elif hi == 0x80 or hi == 0x90:
            for n, now in tracker.note_off(ch, raw[1]):
                n.off = t
                if now:
                    n.end = t
        elif hi == 0xB0:
            for n in tracker.control(ch, raw[1], raw[2]):
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
        self._parts_of_key: dict[int, list[int]] = {}
        for (p, k) in sorted(self._by_part_key):
            self._parts_of_key.setdefault(k, []).append(p)
        self._seg_of = {t: i for i, t in enumerate(onsets)}

    # -- queries --------------------------------------------------------------
    def pitch(self, part: int, key: int, t: float, seg: int) -> Optional[float]:
        """Planned pitch (cents above key 0 of 12-EDO) of the note of ``part``/``key`` sounding at ``t``."""
        n = self._sounding(part, key, t)
        if n is None or not n.s0 <= seg <= n.s1:
            return None
        return 100.0 * key + float(self.values[n.var0 + seg - n.s0])

    def _sounding(self, part: int, key: int, t: float) -> Optional[_Note]:
        lst = self._by_part_key.get((part, key))
        if not lst:
            return None
        i = bisect.bisect_right(self._ons[(part, key)], t) - 1
        while i >= 0:
            n = lst[i]
            if n.on <= t and (n.end > t or n.on == t):
                return n
            i -= 1
        return None

    def pitch_held(self, part: int, key: int, cents: float, t: float, seg: int) -> Optional[float]:
        """Planned pitch at ``t`` of a held note of ``key`` now at ``cents``, whose part is not
        known: of the notes of that key sounding at ``t`` in any part, the one whose planned
        pitch in the segment before ``seg`` or in ``seg`` (several notes may start at one
        moment, each moving the held notes) is nearest ``cents`` (``part`` first among equals)."""
        best = None
        for p in self._parts_of_key.get(key, ()):
            n = self._sounding(p, key, t)
            if n is None or not n.s0 <= seg <= n.s1:
                continue
            now = 100.0 * key + float(self.values[n.var0 + seg - n.s0])
            before = 100.0 * key + float(self.values[n.var0 + max(seg - 1, n.s0) - n.s0])
            rank = (min(abs(before - cents), abs(now - cents)), p != part)
            if best is None or rank < best[0]:
                best = (rank, now)
        return None if best is None else best[1]

    def segment(self, t: float) -> int:
        """The segment sounding at ``t``."""
        seg = self._seg_of.get(t)
        if seg is None:
            seg = max(bisect.bisect_right(self.onsets, t) - 1, 0)
        return seg

    # -- how the engine plays it ----------------------------------------------
    def engine_config(self, config):
        """The settings an engine plays this plan with: adaptive mode with chord window 0 (every
        note sounds at its own tick and is solved as it starts) and no attack settling (the plan
        already knows each chord whole), no channel sharing."""
        acfg = dataclasses.replace(config.adaptive, chord_window=0.0, attack_time=0.0)
        return config.replace(adaptive=acfg, share_channels=False)

    def solver_factory(self, config) -> Callable:
        """What to hand the engine as its solver (``Engine(..., solver=...)``): it answers from
        the plan. One engine may serve several parts (parts tuned together, merged, or notes
        kept on their input channels): a held note is looked up in any part."""
        return lambda _acfg, _tuning: _PlannedSolver(self)

    def after_drive(self, song, tracks, group) -> None:
        """Move each note's bend back to when its channel fell silent (in place)."""
        if not group.engines:
            return
        e0 = next(iter(group.engines.values()))
        if not e0.output.per_note_bend:
            return
        move_bends_early(song, tracks, self.release_time)


class _PlannedSolver:
    """Answers the engine's ``solve(held, new, t=..., part=...)`` from the plan."""

    def __init__(self, plan: Plan):
        self.plan = plan

    def reset(self) -> None:
        pass

    def release(self, keys) -> None:
        pass

    def solve(self, held, new, *, t: float, part: int):
        plan = self.plan
        seg = plan.segment(t)
        out_h = []
        for k, c in held:
            # ``part`` is the new notes' part; a held note may be another part's (one engine
            # for several parts): of the notes of its key sounding now, the one it is
            p = plan.pitch_held(part, k, c, t, seg)
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
              drift_value: float = DRIFT_VALUE, apart: bool = False) -> Plan:
    """Plan every note's pitch (see the module docstring). ``apart``: each part (input
    channel) on its own -- only pairs within a part priced, each part's own drift."""
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
    if acfg.centre == "profile":
        ref = [tuning.deviation(k) if tuning.deviation(k) is not None else 0.0 for k in range(128)]
    else:
        off = tuning.deviation(69)
        ref = [off if off is not None else 0.0] * 128
    values = np.zeros(nvar)
    cands, wcls = _interval_tables(acfg)
    seg_end = onsets[1:] + [max((n.end for n in notes), default=0.0)]
    s = 0
    state: dict = {}
    while s < S:
        e = min(S, s + WINDOW)
        keep = S if e == S else s + COMMIT
        _solve_window(s, e, keep, seg_notes, onsets, seg_end, values, cands, wcls, ref, acfg,
                      motion_value, drift_value, state, apart)
        s = keep
    return Plan(notes, onsets, values, config.release_time)


def _solve_window(s0, s1, keep, seg_notes, onsets, seg_end, values, cands, wcls, ref, acfg,
                  motion_value, drift_value, state, apart=False) -> None:
    """Solve segments [s0, s1); write the variables of segments [s0, keep). ``apart``: pairs
    of notes of different parts cost nothing, and each part's notes make drift rows of their own.

    ``state["drift"]``: the largest drift of the segments already written (the floor of this
    window's drift bound: the maximum over the piece counts once), updated here."""
    loc: dict[tuple[int, int], int] = {}
    order = []
    for s in range(s0, s1):
        for n in seg_notes[s]:
            loc[(n.id, s)] = len(order)
            order.append((n, s))
    N = len(order)
    if N == 0:
        return
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
                if apart and na.part != nb.part:
                    continue
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
    tau = np.array([c[0] for c in pc], dtype=float)
    # motion: consecutive segments of one note; the first may be fixed (written before s0)
    mi, mj, fixed_v = [], [], []
    for (n, s), j in zip(order, range(N)):
        if s > n.s0:
            if s == s0:
                mi.append(-1)
                fixed_v.append(values[n.var0 + s - 1 - n.s0])
            else:
                mi.append(loc[(n.id, s - 1)])
                fixed_v.append(0.0)
            mj.append(j)
    # centre: one row per stretch in which the set of sounding notes is constant (the drift is
    # measured over every such stretch: a segment in which some notes end early has several);
    # both the notes sounding (pedal included) and the notes whose key is down (a decoder that
    # ignores the pedal hears the latter)
    rows, rref, rseg = [], [], []
    for s in range(s0, s1):
        ns = seg_notes[s]
        if not ns:
            continue
        ts, te = onsets[s], seg_end[s]
        cuts = sorted({ts, te} | {n.end for n in ns if ts < n.end < te} | {n.off for n in ns if ts < n.off < te})
        seen = set()
        for a in cuts[:-1]:
            subs = (tuple(n for n in ns if n.end > a), tuple(n for n in ns if n.off > a))
            if apart:
                subs = tuple(tuple(n for n in sub if n.part == p) for sub in subs
                             for p in sorted({n.part for n in sub}))
            for sub in subs:
                if not sub or sub in seen:
                    continue
                seen.add(sub)
                rows.append([loc[(n.id, s)] for n in sub])
                rref.append(sum(ref[n.key] for n in sub) / len(sub))
                rseg.append(s)
    r = np.array(rref, dtype=float)
    # the window's objective in the units of the measures: mean impurity of its pairs, plus
    # motion_value * motion per note, plus drift_value * its largest drift
    pair_time = float(sum(pw))
    nnotes = max(len({n.id for n, _ in order}), 1)
    scale = 1.0 / pair_time if pair_time > 0 else 1.0
    mcost = motion_value * scale * max(pair_time / nnotes, 1e-3)
    # a held note's step beyond the settings' limit per event (policy "limited": max_motion;
    # "fixed-held": none at all; "free": no limit) costs EXCESS_VALUE times more: the hinge
    # max(0, |u| - M) is (|u - M| + |u + M|) / 2 - M, two more absolute values
    mode = acfg.held_mode
    lim = 0.0 if mode == "fixed-held" else (float(acfg.max_motion) if mode == "limited" else None)
    fixed = np.array(fixed_v, dtype=float)
    ti_l, tj_l = pi + mi, pj + mj
    tc_l = [np.array(pw, dtype=float) * scale, np.full(len(mj), mcost)]
    tb_extra = []
    if lim is not None and mj:
        ti_l = ti_l + mi + mi
        tj_l = tj_l + mj + mj
        tc_l.append(np.full(2 * len(mj), EXCESS_VALUE * mcost / 2.0))
        tb_extra = [fixed + lim, fixed - lim]
    ti = np.array(ti_l, dtype=int)
    tj = np.array(tj_l, dtype=int)
    tc = np.concatenate(tc_l)
    floor = float(state.get("drift", 0.0))

    # the user's drift limit holds (a little room above the drift already reached, so the
    # barrier has an interior); the plan starts from the reference itself, which meets it
    cap = max(float(acfg.max_drift), floor + 1e-3)
    x0 = np.array([ref[n.key] for n, _ in order], dtype=float)

    def solve(tau_, tol):
        tb = np.concatenate([tau_, fixed] + tb_extra)
        return l1_solve(N, ti, tj, tb, tc, rows, r, drift_value, floor, cap=cap, tol=tol, x0=x0)

    amb = [k for k, c in enumerate(pc) if len(c) > 1]
    # (with ambiguous classes the first solution only picks their candidates: less precision)
    x, _ = solve(tau, ROUGH_TOL if amb else SOLVE_TOL)
    # ambiguous classes: take the candidate nearest to what the solution implies, solve again
    if amb:
        diff = x[pj] - x[pi]
        for k in amb:
            tau[k] = min(pc[k], key=lambda v: abs(v - diff[k]))
        x, _ = solve(tau, SOLVE_TOL)
    for (n, s), v in zip(order, x):
        if s < keep:
            values[n.var0 + s - n.s0] = v
    if len(rows):
        dev = [abs(float(np.mean(x[idx])) - rr) for idx, rr, s in zip(rows, rref, rseg) if s < keep]
        if dev:
            state["drift"] = max(floor, max(dev))


def l1_solve(N, ti, tj, tb, tc, rows, r, drift_value, floor, cap=math.inf, tol=1e-3, x0=None):
    """Minimise ``sum_p tc_p |x[tj_p] - x[ti_p] - tb_p| + drift_value * D`` over x (N values)
    and D, subject to ``|mean(x[rows[k]]) - r_k| <= D`` for every k and ``floor <= D < cap``
    (``x0`` must satisfy the rows with a D below ``cap``); a term
    with ``ti_p < 0`` is ``|x[tj_p] - tb_p|``. A linear programme, solved by the log-barrier
    method (Boyd and Vandenberghe, *Convex Optimization*, 2004, section 11.3): the epigraph
    variable of each absolute value is eliminated in closed form (a smoothed absolute value),
    Newton steps on (x, D) with backtracking line search, the barrier parameter raised
    ``BARRIER_STEP``-fold until the duality gap bound (number of inequalities / parameter) is
    below ``tol``. Returns (x, D)."""
    ti = np.asarray(ti, dtype=int)
    tj = np.asarray(tj, dtype=int)
    has_i = ti >= 0
    tis = np.where(has_i, ti, 0)
    n_i, n_j = tis[has_i], tj[has_i]
    P = len(tc)
    K = len(rows)
    if not math.isfinite(cap) and drift_value <= 0:
        cap = floor + 1e6      # D unpriced and unbounded: any large bound will do
    capped = math.isfinite(cap)
    m = 2 * P + 2 * K + 1 + int(capped)
    # the centre rows as flat arrays: G x = bincount(g_term, x[g_idx] * g_val)
    g_len = np.array([len(v) for v in rows], dtype=int)
    g_idx = np.array([i for v in rows for i in v], dtype=int)
    g_term = np.repeat(np.arange(K), g_len)
    g_val = np.repeat(1.0 / np.maximum(g_len, 1), g_len)
    # the Hessian's nonzero entries: flat position, sign, and which weight each takes
    # (weights: the P terms' second derivatives, then the K rows' barrier curvatures)
    h_a = np.array([i for v in rows for i in v for _ in v], dtype=int)
    h_b = np.array([j for v in rows for _ in v for j in v], dtype=int)
    h_t = np.repeat(np.arange(K), g_len * g_len)
    hi = np.arange(P)[has_i]
    flat = np.concatenate([tj * (N + 1), n_i * (N + 1), n_i * N + n_j, n_j * N + n_i, h_a * N + h_b])
    sign = np.concatenate([np.ones(P + len(hi)), -np.ones(2 * len(hi)),
                           np.repeat(1.0 / np.maximum(g_len, 1) ** 2, g_len * g_len)])
    src = np.concatenate([np.arange(P), hi, hi, hi, P + h_t])
    uniq, inv = np.unique(flat, return_inverse=True)
    nu = len(uniq)
    x = np.zeros(N) if x0 is None else np.array(x0, dtype=float)

    def resid(x):
        return x[tj] - np.where(has_i, x[tis], 0.0) - tb

    def centre(x):
        return np.bincount(g_term, x[g_idx] * g_val, minlength=K) - r

    def value(x, D, tau):
        s = tau * tc
        q = np.sqrt(1.0 + (s * resid(x)) ** 2)
        f = float(np.sum(q - np.log1p(q))) + tau * drift_value * D - math.log(D - floor)
        if capped:
            f -= math.log(cap - D)
        if K:
            v = centre(x)
            f -= float(np.sum(np.log(D - v) + np.log(D + v)))
        return f

    v = centre(x) if K else np.zeros(0)
    D = max(float(np.max(np.abs(v))) if K else 0.0, floor)
    D += min(1.0, (cap - D) / 2.0)
    tau = m / START_GAP
    while True:
        for _ in range(60):
            s = tau * tc
            u = resid(x)
            q = np.sqrt(1.0 + (s * u) ** 2)
            d1 = s * s * u / (1.0 + q)          # derivative of the smoothed |u| (closed form)
            d2 = s * s / (q * (1.0 + q))        # and its second derivative
            gx = (np.bincount(tj, d1, minlength=N) - np.bincount(n_i, d1[has_i], minlength=N)).astype(float)
            gD = tau * drift_value - 1.0 / (D - floor)
            hDD = 1.0 / (D - floor) ** 2
            if capped:
                gD += 1.0 / (cap - D)
                hDD += 1.0 / (cap - D) ** 2
            if K:
                v = centre(x)
                a = 1.0 / (D - v)
                b = 1.0 / (D + v)
                gx += np.bincount(g_idx, (a - b)[g_term] * g_val, minlength=N)
                gD -= float(np.sum(a + b))
                a2, b2 = a * a, b * b
                hxD = np.bincount(g_idx, (b2 - a2)[g_term] * g_val, minlength=N)
                hDD += float(np.sum(a2 + b2))
                wts = np.concatenate([d2, a2 + b2])
            else:
                hxD = np.zeros(N)
                wts = d2
            Hn = np.zeros(N * N)
            Hn[uniq] = np.bincount(inv, wts[src] * sign, minlength=nu)
            Hf = np.empty((N + 1, N + 1))
            Hf[:N, :N] = Hn.reshape(N, N)
            Hf[:N, N] = hxD
            Hf[N, :N] = hxD
            Hf[N, N] = hDD
            Hf.flat[::N + 2] += 1e-12 * (1.0 + np.abs(np.diagonal(Hf)))
            g = np.append(gx, gD)
            try:
                dz = -np.linalg.solve(Hf, g)
            except np.linalg.LinAlgError:
                dz = -np.linalg.lstsq(Hf, g, rcond=None)[0]
            dec = -float(g @ dz)
            last = m / tau < tol
            if not dec > (1e-8 if last else CENTRING_TOL):
                break
            dx, dD = dz[:N], float(dz[N])
            step = 1.0          # largest step keeping D > |G x - r| and D > floor
            if dD < 0:
                step = min(step, 0.99 * (D - floor) / -dD)
            elif dD > 0 and capped:
                step = min(step, 0.99 * (cap - D) / dD)
            if K:
                dv = np.bincount(g_term, dx[g_idx] * g_val, minlength=K)
                for sg in (1.0, -1.0):
                    rate = dD - sg * dv
                    neg = rate < 0
                    if np.any(neg):
                        step = min(step, 0.99 * float(np.min((D - sg * v[neg]) / -rate[neg])))
            f0 = value(x, D, tau)
            while step > 1e-10 and value(x + step * dx, D + step * dD, tau) > f0 - 0.25 * step * dec:
                step *= 0.5
            x = x + step * dx
            D = D + step * dD
            if dec < (1e-6 if last else CENTRING_TOL):
                break
        if m / tau < tol:
            return x, D
        tau *= BARRIER_STEP


# ---------------------------------------------------------------------------
# Choosing the plan: checked against live playing of the same file
# ---------------------------------------------------------------------------
class Chosen:
    def __init__(self, outputs, summary):
        self.outputs = outputs
        self.summary = summary


def measure_outputs(outputs, config, stream) -> dict:
    """Impurity, motion per note and maximum drift of the output files, decoded from their bytes
    (the notes of all files of a split arrangement together). ``stream(data, path)`` reads a
    written file as (seconds, message) pairs."""
    notes = []
    for o in outputs:
        dec = metrics.decode(stream(o.data, o.path), bend_scale=config.bend_scale,
                             exclude_channels=tuple(config.passthrough))
        notes.extend(dec.notes)
    imp, _ = metrics.impurity(notes)
    return {"impurity_cents": imp, "motion_cents_per_note": metrics.motion(notes),
            "drift_max_cents": metrics.drift(notes)["max"]}


_KEYS = ("impurity_cents", "motion_cents_per_note", "drift_max_cents")
#: a measure counts as "live moves at all" above this (cents); below, no worse is all one can ask
_ROOM = 0.01
_EPS = 1e-3     # cents: below a bend step
#: choose() stops searching once a plan beats live by this relative margin on every measure
TARGET_MARGIN = 0.1


def _beats(m: dict, live: dict, eps: float = _EPS) -> bool:
    """No worse than live on impurity, motion and drift (``eps`` cents: below a bend step)."""
    return all(m[k] <= live[k] + eps for k in _KEYS)


def _gain(k: str, value: float, live: dict) -> float:
    """Relative improvement of one measure over live. Impurity need only be no worse (within
    ``_EPS``), and so need motion and drift where live has none to speak of: 1 when met, else
    the relative excess (negative). Elsewhere motion and drift must be strictly lower: the
    relative reduction."""
    lv = live[k]
    if k == "impurity_cents" or lv <= _ROOM:
        return 1.0 if value <= lv + _EPS else -(value - lv) / max(lv, _ROOM)
    return (lv - value) / lv


def _margin(m: dict, live: dict) -> float:
    """How clearly ``m`` beats live: the smallest :func:`_gain` over the three measures.
    Positive: beats live on all three."""
    return min(_gain(k, m[k], live) for k in _KEYS)


def _best_mixture(tried: list, live: dict, steps: int = 20):
    """Among convex mixtures of two or three plans tried, the one whose measures, interpolated,
    beat live by the largest margin: (margin, weights, indices). Every measure (mean absolute
    impurity, total absolute motion, largest absolute drift) is a convex function of the
    planned pitches, so the mixture's own measures are no worse than the interpolation (up to
    the output's bend step)."""
    best = None
    ms = [t[1] for t in tried]
    n = len(ms)
    grid = [i / steps for i in range(steps + 1)]
    for r in (1, 2, 3):
        for idx in itertools.combinations(range(n), r):
            if r == 1:
                weights = [(1.0,)]
            elif r == 2:
                weights = [(w, 1.0 - w) for w in grid[1:-1]]
            else:
                weights = [(a, b, 1.0 - a - b) for a in grid[1:] for b in grid[1:] if a + b < 1.0 - 1e-9]
            for w in weights:
                m = {k: sum(wi * ms[i][k] for wi, i in zip(w, idx)) for k in _KEYS}
                g = _margin(m, live)
                if best is None or g > best[0] + 1e-12:
                    best = (g, w, idx)
    return best


def choose(song, merged, secs, tuning, config, live_outputs, render, stream, apart: bool = False) -> Chosen:
    """Plan the piece and check the plan against live playing (``live_outputs``: the same file
    through the live engine), measured from the output files (``render(plan)`` makes them,
    ``stream(data, path)`` reads one back as (seconds, message) pairs). ``apart``: the parts
    are planned each on its own (``--parts-apart``; see :func:`plan_song`).

    The plan's objective (see :func:`plan_song`) has two prices: of motion against impurity
    (``motion_value``) and of drift (``drift_value``). The first plan uses the defaults. Its
    margin over live is its smallest relative gain (impurity need only be no worse; motion and
    drift must be strictly lower wherever live has any). Below ``TARGET_MARGIN`` further plans
    are made (at most ``MAX_PLANS``), changing the price of the weakest measure: drift raises the
    drift price, motion raises the motion price, impurity lowers it; the search stops when that
    measure no longer improves. After each plan the convex mixtures of two or three plans tried
    are examined (every measure is convex in the planned pitches, so a mixture is no worse than
    the interpolation of its plans' measures, up to a bend step): the one with the widest
    interpolated margin, if that beats live, is rendered and measured too. The plan or mixture with the widest
    measured margin is kept; if even that does not beat live, the summary says so
    (``better_than_live: false``, with both sets of figures).

    What bounds its cost: at most ``MAX_PLANS`` plans and one mixture after each, every one a
    pass over the file that is linear in its length (measured: the whole command 7 to 14 times
    the plain conversion on files of 2 500 to 10 000 events). No clock is read, so the same
    file always gives the same plan."""
    live = measure_outputs(live_outputs, config, stream)
    tried = []          # (plan, measures, outputs, description)
    plans = []          # the plans proper (mixtures are made of these)
    mv, dv = MOTION_VALUE, DRIFT_VALUE

    def best_margin():
        return max(_margin(t[1], live) for t in tried)

    prev = None
    for _ in range(MAX_PLANS):
        plan = plan_song(song, merged, secs, tuning, config, motion_value=mv, drift_value=dv, apart=apart)
        outs = render(plan)
        m = measure_outputs(outs, config, stream)
        entry = (plan, m, outs, {"motion_value": round(mv, 4), "drift_value": round(dv, 4)})
        tried.append(entry)
        plans.append(entry)
        if best_margin() >= TARGET_MARGIN:
            break
        if len(plans) > 1:
            g, w, idx = _best_mixture(plans, live)
            # (rendered only when its interpolated measures beat live and the best so far)
            if len(idx) > 1 and g > max(best_margin(), 0.0):
                p0 = plans[idx[0]][0]
                vals = sum(wi * plans[i][0].values for wi, i in zip(w, idx))
                mix = Plan(p0.notes, p0.onsets, vals, p0.release_time)
                mouts = render(mix)
                mm = measure_outputs(mouts, config, stream)
                tried.append((mix, mm, mouts,
                              {"mixture": [dict(plans[i][3], weight=round(wi, 4)) for wi, i in zip(w, idx)]}))
                if best_margin() >= TARGET_MARGIN:
                    break
        weakest = min(_KEYS, key=lambda k: _gain(k, m[k], live))
        if prev is not None and prev[0] == weakest and m[weakest] >= prev[1] - _EPS:
            break       # raising its price no longer helps (e.g. drift from the player's wheel)
        prev = (weakest, m[weakest])
        if weakest == "drift_max_cents":
            dv *= 3.0
        elif weakest == "motion_cents_per_note":
            mv *= 2.0
        else:
            mv /= 2.0
    chosen = max(tried, key=lambda t: _margin(t[1], live))
    _plan, m, outs, desc = chosen
    summary = dict(desc)
    summary.update({"better_than_live": _margin(m, live) > 0, "plans_tried": len(tried),
                    "live": {k: round(v, 4) for k, v in live.items()},
                    "lookahead": {k: round(v, 4) for k, v in m.items()}})
    return Chosen(outs, summary)
