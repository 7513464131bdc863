"""Adaptive just intonation: a weighted least-squares solver with re-centring.

Method
------
This is the least-squares method published by Stange, Wick and Hinrichsen,
"Playing music in just intonation: a dynamically adaptive tuning scheme",
*Computer Music Journal* (2018): at each event the pitches of all sounding
notes minimise a quadratic cost made of

* one term per pair of sounding notes, ``w_ij (x_j - x_i - t_ij)**2``, where
  ``t_ij`` is the just interval of the pair's interval class (octave-reduced,
  plus the pair's whole octaves), from a 5-limit table by default
  (16/15, 9/8, 6/5, 5/4, 4/3, 45/32, 3/2, 8/5, 5/3, 9/5, 15/8) or a 7-limit one
  (minor seventh 7/4, tritone 7/5);
* a term ``lambda (x_h - c_h)**2`` for every note that already sounds (held
  note ``h`` at current pitch ``c_h``): moving sounding notes costs;
* a term pulling the tuning centre back to a reference (12-EDO at the
  profile's reference pitch by default, or the loaded profile's own pitches).
  The profile's reference pitch is read off its key 69 (A4): a profile tuned
  with a different reference key is taken at the pitch its A4 has.

The system is small (at most 16 notes) and dense; it is solved with numpy.
All pitches inside are deviations in cents from each key's own 12-EDO pitch.

What we do differently (and why)
--------------------------------
The published scheme trades purity, motion and drift through the weights of
one quadratic cost, so it either slides held notes a lot, stays impure, or
drifts (see the figures in ``retuner bench --adaptive``). We keep its cost
for *tuning a chord* and change how drift is shed:

1. **The centre term acts on the gauge only.** The pull to the reference is a
   rank-one term on the *mean* deviation of the sounding notes,
   ``mu * (mean_i (x_i - r_i) - aim)**2``, not a pull of each note to its
   tempered pitch. A chord whose targets are consistent (a major triad 4:5:6,
   a minor triad 10:12:15) comes out exactly pure *and*, struck from silence,
   exactly centred on the reference; a per-note pull would bend it.
2. **Pure first, re-centre only when needed.** Each event is first solved
   with the sounding notes held where they are (new notes pure against them).
   Only if that leaves the centre outside a window around the aim is the cost
   solved again with the centre term.
3. **Held notes move together.** When held notes must move ("limited"), they
   move as one rigid block by a single shift ``u`` (cost
   ``motion_weight * n_held * u**2``), so intervals among held notes stay as
   pure as they were and every cent of motion buys a cent of re-centring.
   The shift is limited to ``max_motion`` per event; the new notes take the
   rest (a little impurity against the held notes).
4. **Re-centre where it is cheap.** The window grows by ``window_per_held``
   for every held note beyond the first, so events where several notes would
   have to move are left alone (within the drift limit), and the solver
   re-centres at events with a single held note.
5. **Anticipation.** An exponential average of how far the pure chain moves
   the centre per event (the comma pump sinks about 5.4 cents per chord) sets
   the aim on the other side of the reference (``anticipate``, at most
   ``aim_limit``), so the costly events find room to drift.
6. **A hard drift limit.** If the centre would still be beyond ``max_drift``,
   the whole chord shifts within the held notes' remaining allowance, then
   the new notes alone take the rest.
7. **Ambiguous interval classes chosen by context.** Some classes have more
   than one just candidate (minor seventh 9/5 or 16/9, and 7/4 in the 7-limit
   table; major second 9/8 or 10/9; tritone 45/32 or 64/45; minor third 6/5 or
   7/6 in the 7-limit table). After a solve with each class's first
   candidate, every ambiguous pair takes the candidate nearest to what the
   rest of the chord implies, and the system is solved again (at most twice).
   In a ii7 chord D-F-A-C this gives D-C = 9/5; with the 7-limit table a
   dominant seventh can settle on 4:5:6:7.
8. **Re-centre steady drift only** ("limited"). Two running averages (rate ``steadiness_rate``)
   follow the pure chain's step per event and the step's size; their ratio, the
   *steadiness* (0..1), is 1 when the chain keeps drifting one way (the comma pump
   sinks a comma every round) and falls when it wanders back and forth (most
   chorales: a chord that drifts up is soon followed by one that drifts down).
   Below 0.9 the window is widened to the drift edge (``max_drift`` less its
   margin): wandering drift is left to come back by itself instead of being pulled
   in and pushed out again; and held notes may move by at most ``max_motion``
   times the steadiness to the power 1.5 per event, the new notes taking the rest.
   Measured on the project's chorales this removes about 40 % of the motion at
   slightly lower impurity, and leaves the comma pump as it was (its steadiness
   stays 1 where it re-centres); see ``retuner bench --adaptive``.
9. **Silence.** With "+reset" the solver forgets the centre, its trend and the
   last notes when nothing sounds: the next chord is pure and centred (exactly,
   unless it was heard only inside a larger chord: item 10). Without it, the next
   chord is first tuned pure and centred, then moved as one block towards
   pure intervals with the notes that sounded last (``memory_weight``), as
   far as the drift limit allows: a detached passage keeps its melodic
   intervals near pure and its chords exactly pure.

10. **The shape of a chord heard before.** The solver remembers, for the last ``CHORDS``
   chords it tuned (by their set of pitch classes), how far each pitch class sat from the
   chord's centre. A chord solved with nothing held (struck from silence, or with every held
   note left out as about to end: see :mod:`retuner.engine.attack`) is pure and centred so
   that its notes sit where they sat around the centre of the last chord heard that holds
   all its pitch classes (the reference itself for a chord never heard). While a chord played
   by hand arrives note by note, its first notes then already sit where the whole chord puts
   them, instead of at the centre of the partial chord; a chord heard before ends exactly
   centred, and one heard only inside a larger chord sits as it sat there (within
   ``max_drift``). "+reset" forgets the centre and the trend, not these shapes.

The policy "free" is the published form (every held note its own motion
cost, centre pulled to the reference at every event), kept for comparison.

Costs of the policies: "fixed-held" never slides a sounding note, but drift
can only be shed through impurity of new notes against held ones, so a long
chain of held common tones (the comma pump) becomes impure at the drift
limit; "limited" sheds drift by small rigid slides of held notes (motion,
at most ``max_motion`` cents per event) and keeps impurity low; "+reset" costs
nothing in legato playing but re-centres detached playing abruptly (melodic
intervals across a silence are not kept pure).

The defaults were chosen on the project's own progressions (comma pump and
four chorales in :mod:`retuner.bench.progressions`), so they fit that material best.

The default chord window is 0.02 s: notes arriving within 20 ms of the first
note of a chord are solved together, so every note of a chord is delayed by up
to 20 ms (about the spread of a pianist's chord; below what most players notice
as latency). 0 disables gathering (lowest latency, chords struck with a spread
may first be tuned against a partial chord and then move).

**Only 12-note profiles.** The interval table is per 12-EDO interval class (the
difference of two keys in semitones), so adaptive mode tunes profiles of 12 notes
to a 1200 c period only. Asked for with another profile (``run``, ``convert``, an
engine built with one) it is refused with one line naming the profile; a running
engine switched to such a profile (program change, reload, control socket) never
refuses: adaptive mode rests while that profile is in force (its notes sound at
the profile's own pitches; one warning in the log) and resumes with the next
12-note profile. Using a 19-note profile's pitches as the starting point would
still leave every pair judged by the wrong interval class, so it is not offered.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field, fields
from fractions import Fraction
from typing import Any, Mapping, Optional, Sequence

import numpy as np

from retuner.errors import RetunerError
from retuner.pitch.intervals import candidates
from retuner.pitch.tuning import Tuning

#: interval class names accepted in YAML (semitones above the lower note, mod 12)
CLASS_NAMES = {
    "unison": 0, "octave": 0, "P1": 0, "P8": 0,
    "m2": 1, "M2": 2, "m3": 3, "M3": 4, "P4": 5, "tritone": 6, "TT": 6,
    "P5": 7, "m6": 8, "M6": 9, "m7": 10, "M7": 11,
}

# Just ratios for each interval class, from the one table; the first candidate is the default,
# the others are chosen by context. The 7-limit table adds 7/4, 7/5, 7/6 and 10/7.
LIMIT5: dict[int, tuple[str, ...]] = {c: tuple(f"{j.ratio.numerator}/{j.ratio.denominator}" for j in js)
                                      for c, js in candidates(5).items()}
LIMIT7: dict[int, tuple[str, ...]] = {c: tuple(f"{j.ratio.numerator}/{j.ratio.denominator}" for j in js)
                                      for c, js in candidates(7).items()}

# Weights per interval class: consonances count fully, dissonances less.
DEFAULT_WEIGHTS: dict[int, float] = {
    0: 1.0, 1: 0.1, 2: 0.2, 3: 1.0, 4: 1.0, 5: 1.0, 6: 0.1,
    7: 1.0, 8: 1.0, 9: 1.0, 10: 0.3, 11: 0.1,
}

POLICIES = ("fixed-held", "limited", "free")
REFERENCES = ("edo12", "profile")
MAX_NOTES = 16
#: how many chords (sets of pitch classes) the solver remembers the shape of
CHORDS = 64
#: steadiness (0..1) from which the pure chain's drift counts as steady: re-centred within the window
STEADY = 0.9

log = logging.getLogger(__name__)


def _ratio_cents(value: Any, *, file: Optional[str], field_name: str) -> float:
    """A ratio string ("7/4") or a number of cents -> cents."""
    if isinstance(value, bool):
        raise RetunerError(f"expected a ratio like 5/4 or a number of cents, got {value!r}", file=file, field=field_name)
    if isinstance(value, (int, float)):
        c = float(value)
    elif isinstance(value, str):
        try:
            r = Fraction(value.strip())
        except (ValueError, ZeroDivisionError):
            raise RetunerError(f"expected a ratio like 5/4, got {value!r}", file=file, field=field_name) from None
        if r <= 0:
            raise RetunerError(f"a ratio must be greater than 0, got {value!r}", file=file, field=field_name)
        c = 1200.0 * math.log2(r)
    else:
        raise RetunerError(f"expected a ratio like 5/4 or a number of cents, got {value!r}", file=file, field=field_name)
    if not (0.0 <= c < 1200.0) or not math.isfinite(c):
        raise RetunerError(f"an interval class's ratio must lie within one octave (0 to 1200 cents), got {value!r}",
                           file=file, field=field_name)
    return c


def _class_key(k: Any, *, file: Optional[str], field_name: str) -> int:
    if isinstance(k, bool):
        raise RetunerError(f"unknown interval class {k!r}", file=file, field=field_name)
    if isinstance(k, int) and 0 <= k <= 11:
        return k
    if isinstance(k, str):
        if k.strip().isdigit() and 0 <= int(k) <= 11:
            return int(k)
        if k in CLASS_NAMES:
            return CLASS_NAMES[k]
    raise RetunerError(f"unknown interval class {k!r} (use 0..11 semitones or one of "
                       f"{', '.join(sorted(CLASS_NAMES))})", file=file, field=field_name)


@dataclass
class AdaptiveConfig:
    """Every setting of adaptive mode.

    chord_window: seconds; above 0, notes starting within this time of a chord's
        first note are solved together, and every note of the chord waits up to this
        long (latency cost; note-offs and pedals wait as long). Default 0: no window,
        notes sound at once (see ``attack_time``).
    attack_time: seconds; without a chord window, notes still within this time of
        their start are solved again with each new note of their chord (the change is
        masked by their attack); see :mod:`retuner.engine.attack`. Default 0.04 s.
    policy: how sounding notes may move: "fixed-held" (never: the centre
        recovers through new notes only; costs impurity on long chains of held
        notes), "limited" (at most ``max_motion`` cents per event, spread over
        events; costs a little motion), "free" (plain least squares, motion
        only restrained by ``motion_weight``). Add "+reset" (or use "reset"
        alone, meaning "limited+reset") to forget the centre whenever nothing
        sounds.
    max_drift: cents; the centre never strays further from the reference.
    max_motion: cents a held note may move per event ("limited").
    limit: "5" (5-limit table, default) or "7" (7-limit table).
    intervals: overrides of the interval table: class -> ratio (or list of
        candidate ratios, first is the default); class is 0..11 or a name
        like "m7"; ratios as "7/4" or cents.
    weights: overrides of the per-class pair weights.
    centre: what the centre is pulled to: "edo12" (12-EDO at the profile's reference
        pitch) or "profile" (the loaded profile's own pitches).
    motion_weight: lambda, cost of moving a held note (per cent squared,
        relative to a pair weight of 1).
    centre_weight: mu, cost of the centre's distance from the reference.
    memory_weight: 0..1, how far the first chord after a silence (without
        "reset") moves towards pure intervals with the notes that sounded
        last (1 = all the way, within the drift limit; 0 = no memory).
    window: cents; while the centre of a chord tuned pure against the held
        notes lies within this distance of the aim, nothing is re-centred
        (no motion, no impurity spent on drift); beyond it the solver
        re-centres to the window's edge.
    window_per_held: cents added to the window for every held note beyond
        the first: re-centring where several notes would have to move is
        left for cheaper events (still within the drift limit).
    anticipate, trend_rate, aim_limit: the aim is
        ``clamp(-anticipate * trend, -aim_limit, aim_limit)`` where trend is
        an exponential average (rate ``trend_rate``) of how far the pure
        chain moves the centre per event; 0 anticipation aims at the
        reference itself.
    drift_margin: cents kept between the window and ``max_drift``.
    steadiness_rate: 0..1, rate of the running averages that tell whether the pure
        chain's drift keeps one direction (steady, as in the comma pump) or wanders
        back and forth (as in most chorales); only steady drift is re-centred within
        the window and paid for fully with held-note motion ("limited" policy only).
        0 judges every drift steady (the behaviour before this setting).
    """

    chord_window: float = 0.0
    attack_time: float = 0.04
    policy: str = "limited+reset"
    max_drift: float = 4.8
    max_motion: float = 6.0
    limit: str = "5"
    intervals: dict = field(default_factory=dict)
    weights: dict = field(default_factory=dict)
    centre: str = "edo12"
    motion_weight: float = 2.0
    centre_weight: float = 16.0
    memory_weight: float = 1.0
    window: float = 2.0
    window_per_held: float = 10.0
    anticipate: float = 2.0
    trend_rate: float = 0.05
    aim_limit: float = 4.0
    drift_margin: float = 0.5
    steadiness_rate: float = 0.1

    # -- derived ----------------------------------------------------------
    @property
    def held_mode(self) -> str:
        parts = [p for p in self.policy.split("+") if p]
        for p in parts:
            if p in POLICIES:
                return p
        return "limited"

    @property
    def reset_on_silence(self) -> bool:
        return "reset" in self.policy.split("+")

    def table(self) -> dict[int, tuple[float, ...]]:
        """Interval class -> candidate targets in cents (first = default)."""
        base = LIMIT7 if str(self.limit) == "7" else LIMIT5
        out = {c: tuple(1200.0 * math.log2(Fraction(r)) for r in rs) for c, rs in base.items()}
        for k, v in (self.intervals or {}).items():
            c = _class_key(k, file=None, field_name="adaptive.intervals")
            vs = v if isinstance(v, (list, tuple)) else [v]
            out[c] = tuple(_ratio_cents(x, file=None, field_name=f"adaptive.intervals.{k}") for x in vs)
        return out

    def septimal(self) -> dict[int, Optional[int]]:
        """Interval class -> index of its first candidate whose ratio involves the prime 7."""
        base = LIMIT7 if str(self.limit) == "7" else LIMIT5
        raw: dict[int, tuple] = {c: tuple(rs) for c, rs in base.items()}
        for k, v in (self.intervals or {}).items():
            raw[_class_key(k, file=None, field_name="adaptive.intervals")] = \
                tuple(v) if isinstance(v, (list, tuple)) else (v,)
        out: dict[int, Optional[int]] = {}
        for c, rs in raw.items():
            out[c] = None
            for i, r in enumerate(rs):
                if isinstance(r, str):
                    f = Fraction(r.strip())
                    if f.numerator % 7 == 0 or f.denominator % 7 == 0:
                        out[c] = i
                        break
        return out

    def weight_table(self) -> dict[int, float]:
        out = dict(DEFAULT_WEIGHTS)
        for k, v in (self.weights or {}).items():
            out[_class_key(k, file=None, field_name="adaptive.weights")] = float(v)
        return out

    def validate(self, file: Optional[str] = None) -> "AdaptiveConfig":
        def num(name: str, lo: float, hi: float) -> None:
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise RetunerError(f"expected a number, got {v!r}", file=file, field=f"adaptive.{name}")
            if not (lo <= v <= hi):
                raise RetunerError(f"must be between {lo:g} and {hi:g}, got {v!r}", file=file, field=f"adaptive.{name}")
            setattr(self, name, float(v))

        num("chord_window", 0.0, 0.25)
        num("attack_time", 0.0, 0.2)
        num("max_drift", 0.0, 1200.0)
        num("max_motion", 0.0, 1200.0)
        num("motion_weight", 0.0, 1e6)
        num("centre_weight", 0.0, 1e6)
        num("memory_weight", 0.0, 1.0)
        num("window", 0.0, 1200.0)
        num("window_per_held", 0.0, 1200.0)
        num("anticipate", 0.0, 100.0)
        num("trend_rate", 0.0, 1.0)
        num("aim_limit", 0.0, 1200.0)
        num("drift_margin", 0.0, 1200.0)
        num("steadiness_rate", 0.0, 1.0)
        if not isinstance(self.policy, str):
            raise RetunerError(f"expected a policy name, got {self.policy!r}", file=file, field="adaptive.policy")
        parts = [p.strip() for p in self.policy.split("+")]
        if not parts or any(p not in POLICIES + ("reset",) for p in parts) \
                or sum(p in POLICIES for p in parts) > 1 or len(set(parts)) != len(parts):
            raise RetunerError(f"unknown policy {self.policy!r} (use fixed-held, limited or free, "
                               f"optionally with +reset, or reset)", file=file, field="adaptive.policy")
        if parts == ["reset"]:
            parts = ["limited", "reset"]
        self.policy = "+".join(parts)
        if str(self.limit) not in ("5", "7"):
            raise RetunerError(f"must be 5 or 7, got {self.limit!r}", file=file, field="adaptive.limit")
        self.limit = str(self.limit)
        if self.centre not in REFERENCES:
            raise RetunerError(f"must be edo12 or profile, got {self.centre!r}", file=file, field="adaptive.centre")
        if not isinstance(self.intervals, Mapping):
            raise RetunerError("expected a mapping of interval class to ratio", file=file, field="adaptive.intervals")
        for k, v in self.intervals.items():
            _class_key(k, file=file, field_name="adaptive.intervals")
            vs = v if isinstance(v, (list, tuple)) else [v]
            if not vs:
                raise RetunerError("needs at least one ratio", file=file, field=f"adaptive.intervals.{k}")
            for x in vs:
                _ratio_cents(x, file=file, field_name=f"adaptive.intervals.{k}")
        if not isinstance(self.weights, Mapping):
            raise RetunerError("expected a mapping of interval class to weight", file=file, field="adaptive.weights")
        for k, v in self.weights.items():
            _class_key(k, file=file, field_name="adaptive.weights")
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not (0 <= v < 1e6):
                raise RetunerError(f"a weight must be a number >= 0, got {v!r}", file=file, field=f"adaptive.weights.{k}")
        return self

    @classmethod
    def from_dict(cls, d: Optional[Mapping[str, Any]], file: Optional[str] = None) -> "AdaptiveConfig":
        """Build from a YAML mapping; a bad value raises RetunerError naming its field."""
        if d is None:
            d = {}
        if not isinstance(d, Mapping):
            raise RetunerError("expected a mapping of adaptive settings", file=file, field="adaptive")
        names = {f.name for f in fields(cls)}
        kw = {}
        for k, v in d.items():
            key = str(k).replace("-", "_")
            if key not in names:
                raise RetunerError(f"unknown setting {k!r} (known: {', '.join(sorted(names))})",
                                   file=file, field=f"adaptive.{k}")
            kw[key] = v
        return cls(**kw).validate(file)


class AdaptiveSolver:
    """Tunes each event's sounding notes (see the module docstring for the method).

    ``solve(held, new)``: ``held`` are (key, current cents above key 0 of
    12-EDO) of notes that keep sounding, ``new`` the keys starting now. Returns
    (cents for held notes, cents for new notes), same order. The moment ``t`` and
    the ``part`` (input channel) the engine also gives are not needed here: live
    tuning knows only what sounds now, whoever plays it.

    After each solve, ``held_cause`` says why held notes moved (for measurement):
    "" (they did not), "recentre" (the centre left the window), "drift-limit" (the
    centre would have passed ``max_drift``), both joined by "+", or "free" (the
    published form moves them at every event).
    """

    def __init__(self, config: Optional[AdaptiveConfig] = None, reference: Optional[Tuning] = None):
        self.config = (config if config is not None else AdaptiveConfig()).validate()
        self.reference = reference or Tuning.equal12()
        self._build_tables()
        self.reset()

    # -- set-up -------------------------------------------------------------
    def _build_tables(self) -> None:
        cfg = self.config
        self._mode = cfg.held_mode
        self._reset = cfg.reset_on_silence
        table = cfg.table()
        weights = cfg.weight_table()
        ncand = max(len(v) for v in table.values())
        # index by semitone difference d = k_j - k_i in -127..127 (offset 127)
        diffs = np.arange(-127, 128)
        cls = np.mod(diffs, 12)
        octs = np.floor_divide(diffs, 12)
        # targets as deviation from the 12-EDO interval, for each candidate;
        # for negative d the pair is seen from above: t(-d) = -t(d)
        cand = np.full((255, ncand), np.nan)
        absd = np.abs(diffs)
        for idx, d in enumerate(diffs):
            c, o = divmod(int(absd[idx]), 12)
            vals = table[o]
            for m, v in enumerate(vals):
                dev = v - 100.0 * o  # deviation of the just interval from 12-EDO
                cand[idx, m] = dev if d >= 0 else -dev
        self._cand = np.where(np.isnan(cand), 1e9, cand)
        self._ncand = ncand
        # the septimal start: each class's first candidate with the prime 7 (if any)
        sep = cfg.septimal()
        self._has7 = np.array([sep[abs(int(d)) % 12] is not None for d in diffs])
        self._tau7 = np.array([cand[i, sep[abs(int(d)) % 12]] if sep[abs(int(d)) % 12] is not None
                               else cand[i, 0] for i, d in enumerate(diffs)])
        self._use7 = bool(self._has7.any())
        self._tau0 = cand[:, 0].copy()
        self._ambig = ~np.isnan(cand[:, 1]) if ncand > 1 else np.zeros(255, bool)
        self._w = np.array([weights[int(abs(d)) % 12] for d in diffs], dtype=float)
        del cls, octs
        # reference deviation per key (cents from the key's 12-EDO pitch)
        ref = self.reference
        if self.config.centre == "profile":
            r = [ref.deviation(k) for k in range(128)]
            fill = 0.0
            mapped = [x for x in r if x is not None]
            if mapped:
                fill = float(np.mean(mapped))
            self._ref = np.array([fill if x is None else x for x in r], dtype=float)
        else:
            # 12-EDO at the profile's reference pitch: the offset of A4 (key 69)
            off = ref.deviation(69)
            if off is None:
                mapped = [x for x in (ref.deviation(k) for k in range(128)) if x is not None]
                off = float(np.mean(mapped)) if mapped else 0.0
            self._ref = np.full(128, float(off))

    def reset(self) -> None:
        """Forget everything (centre and memory)."""
        self._last: dict[int, float] = {}   # key -> deviation, notes we placed that sounded last
        self._ghosts: dict[int, float] = {}
        self._drift = 0.0
        self._trend = 0.0
        # running averages of the pure chain's step per event and of its size (steadiness)
        self._step_mean = 0.0
        self._step_size = 0.0
        self._sounding = False
        # the shapes of the latest chords: pitch classes -> each one's deviation from the
        # chord's centre (cents), oldest first
        self._chords: dict[frozenset, dict[int, float]] = {}
        self.held_cause = ""
        self._pair_cache = None
        self._triu: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def mark(self) -> None:
        """Remember the state before the first note of a chord that may be solved again
        (attack mode: its notes within their attack are solved again with each newcomer)."""
        self._mark = (dict(self._last), dict(self._ghosts), self._drift, self._trend,
                      self._step_mean, self._step_size, dict(self._chords))

    def rewind(self) -> None:
        """Back to the state of the last :meth:`mark`: the chord is solved again as a whole,
        so its memory, centre and trend count it once, as if it had arrived at one instant."""
        m = getattr(self, "_mark", None)
        if m is not None:
            self._last, self._ghosts = dict(m[0]), dict(m[1])
            self._drift, self._trend = m[2], m[3]
            self._step_mean, self._step_size = m[4], m[5]
            self._chords = dict(m[6])

    @property
    def steadiness(self) -> float:
        """0..1: how steadily the pure chain has drifted one way over the recent events
        (1 also before any evidence; see ``AdaptiveConfig.steadiness_rate``)."""
        size = self._step_size
        return min(1.0, abs(self._step_mean) / size) if size > 1e-9 else 1.0

    @property
    def drift(self) -> float:
        """Centre (mean deviation) of the last solution minus the reference's, in cents."""
        return self._drift

    def reference_cents(self, key: int) -> float:
        """The reference pitch of a key (cents above key 0 of 12-EDO)."""
        return 100.0 * key + float(self._ref[key])

    # -- the system -----------------------------------------------------------
    def _lsq(self, tau: np.ndarray, W: np.ndarray, how: str, cur: np.ndarray, nh: int, ng: int,
             lam: float, mu: float, target: float, ref: np.ndarray) -> np.ndarray:
        """Minimise the cost for one parametrisation of the held notes.

        Notes are ordered held (nh), ghosts (ng), new. ``how``: "fixed" (held
        notes stay at ``cur``), "rigid" (held notes move together by one
        shift u, cost ``lam * nh * u**2``) or "free" (each held note moves,
        cost ``lam * (x_h - c_h)**2``: the published form). Ghosts never move.
        The centre term is ``mu * (mean over sounding notes of (x - ref) - target)**2``.
        """
        n = W.shape[0]
        # pair part of the normal equations: A x = b with A the weighted Laplacian
        # (cached while tau and W stay the same objects)
        pc = self._pair_cache
        if pc is not None and pc[0] is tau and pc[1] is W:
            A, b = pc[2], pc[3]
        else:
            A = -W
            A.flat[::n + 1] = W.sum(axis=1)
            b = -(W * tau).sum(axis=1)   # tau is antisymmetric, W symmetric
            self._pair_cache = (tau, W, A, b)
        # centre (rank one, over sounding notes only)
        m = n - ng
        if mu > 0 and m > 0:
            c = mu / (m * m)
            if ng:
                sm = np.ones(n)
                sm[nh:nh + ng] = 0.0
                A = A + c * np.outer(sm, sm)
                b = b + c * sm * (float(ref @ sm) + m * target)
            else:
                A = A + c
                b = b + c * (float(ref.sum()) + m * target)
        f = nh + ng
        nn = n - f
        if nn == 0 and how != "free":
            return cur.copy()
        if how == "fixed" or (how == "rigid" and nh == 0):
            r = b[f:] - A[f:, :f] @ cur[:f] if f else b[f:]
            x = cur.copy()
            Mf = A[f:, f:].copy()
            Mf.flat[::nn + 1] += 1e-9
            x[f:] = np.linalg.solve(Mf, r)
            return x
        if how == "rigid":
            # unknowns: the new notes and one common shift u of the held notes
            M = np.empty((nn + 1, nn + 1))
            M[:nn, :nn] = A[f:, f:]
            col = A[f:, :nh].sum(axis=1)
            M[:nn, nn] = col
            M[nn, :nn] = col
            M[nn, nn] = A[:nh, :nh].sum() + lam * nh + 1e-9
            resid = b - A[:, :f] @ cur[:f]
            r = np.empty(nn + 1)
            r[:nn] = resid[f:]
            r[nn] = resid[:nh].sum()
            z = np.linalg.solve(M, r)
            x = cur.copy()
            x[:nh] += z[nn]
            x[f:] = z[:nn]
            return x
        # free: every held note is an unknown with its own motion cost
        A = A.copy()
        A.flat[:nh * (n + 1):n + 1] += lam
        b = b.copy()
        b[:nh] += lam * cur[:nh]
        x = cur.copy()
        if ng:
            idx = np.r_[0:nh, f:n]
            gi = slice(nh, f)
            r = b[idx] - A[idx, gi] @ cur[gi]
            x[idx] = np.linalg.solve(A[np.ix_(idx, idx)] + 1e-9 * np.eye(len(idx)), r)
        else:
            x[:] = np.linalg.solve(A + 1e-9 * np.eye(n), b)
        return x

    def _first(self, tau, W, mode, cur, nh, ng, lam, mu, ref, shape=0.0):
        if mode == "free":
            return self._lsq(tau, W, "free", cur, nh, ng, lam, mu, 0.0, ref)
        # pure against the notes that sound; from silence, centred on the reference, or as the
        # chord heard before that holds these notes sat around its centre (``shape``)
        return self._lsq(tau, W, "fixed", cur, nh, ng, lam, mu if nh + ng == 0 else 0.0, shape, ref)

    def _shape(self, keys: Sequence[int]) -> float:
        """Where the notes ``keys`` sat, on average, around the centre of the last chord heard
        that holds all their pitch classes (cents; 0 for a chord never heard)."""
        pcs = frozenset(k % 12 for k in keys)
        for have, devs in reversed(self._chords.items()):
            if pcs <= have:
                return sum(devs[k % 12] for k in keys) / len(keys)
        return 0.0

    def _targets(self, keys: np.ndarray):
        D = keys[None, :] - keys[:, None] + 127
        return D, self._tau0[D].copy(), self._w[D].copy()

    # -- public ---------------------------------------------------------------
    def solve(self, held: Sequence[tuple[int, float]], new: Sequence[int], *, t: Optional[float] = None,
              part: Optional[int] = None) -> tuple[list[float], list[float]]:
        """Pitches (cents above key 0 of 12-EDO) for the held notes and the new ones.

        Never raises on a numerical failure: held notes then keep their pitch and
        new notes take their reference pitch.
        """
        new = [int(k) for k in new]
        self.held_cause = ""
        try:
            h, n = self._solve(held, new)
        except (np.linalg.LinAlgError, ValueError, FloatingPointError):
            h, n = None, None
        if h is None or not all(map(math.isfinite, h)) or not all(map(math.isfinite, n)):
            log.warning("adaptive solver failed on held=%r new=%r; using reference pitches", held, new)
            return [float(c) for _, c in held], [self.reference_cents(k) for k in new]
        # _solve tunes each distinct new key once (a unison needs no second unknown):
        # every copy of a key struck twice gets that key's pitch, in the caller's order
        by_key = dict(zip(dict.fromkeys(new), n))
        return h, [by_key[k] for k in new]

    def _solve(self, held: Sequence[tuple[int, float]], new: Sequence[int]) -> tuple[list[float], list[float]]:
        cfg = self.config
        held_in = [(int(k), float(c)) for k, c in held]
        new = list(dict.fromkeys(int(k) for k in new))
        # a held key that is also struck anew is not solved twice: it keeps its pitch
        solve_idx = [i for i, (k, _) in enumerate(held_in) if k not in new]
        held = [held_in[i] for i in solve_idx]
        if not new and not held:
            if not held_in:
                self._note_silence()
            return [c for _, c in held_in], []
        # beyond MAX_NOTES: the oldest held notes stay where they are (not solved);
        # new notes beyond MAX_NOTES are tuned in a second solve against the first ones
        skip: list[tuple[int, float]] = []
        overflow: list[int] = []
        if len(new) > MAX_NOTES:
            new, overflow = new[:MAX_NOTES], new[MAX_NOTES:]
        if len(held) + len(new) > MAX_NOTES:
            extra = len(held) + len(new) - MAX_NOTES
            skip, held = held[:extra], held[extra:]
            solve_idx = solve_idx[extra:]
        if not held and not skip:
            self._note_silence()
        hk = [k for k, _ in held]
        ghosts: list[tuple[int, float]] = []
        memory: list[tuple[int, float]] = []
        if not held and not skip and self._ghosts and not self._reset and cfg.memory_weight > 0:
            memory = [(k, d) for k, d in self._ghosts.items() if k not in new]
        gk: list[int] = []   # ghosts do not enter the system: see "memory" below
        keys = np.array(hk + gk + new, dtype=int)
        nh, ng, nn = len(hk), len(gk), len(new)
        n = nh + ng + nn
        cur = np.zeros(n)
        cur[:nh] = [c - 100.0 * k for k, c in held]
        cur[nh:nh + ng] = [d for _, d in ghosts]
        ref = self._ref[keys]
        D, tau, W = self._targets(keys)
        if ng:
            gi = slice(nh, nh + ng)
            W[:, gi] *= cfg.memory_weight
            W[gi, :] *= cfg.memory_weight
            W[gi, gi] = 0.0
        W.flat[::n + 1] = 0.0
        mode = self._mode
        lam, mu, band = cfg.motion_weight, cfg.centre_weight, cfg.aim_limit

        # notes left unsolved (beyond MAX_NOTES) still count in the centre
        skip_dev = sum(c - 100.0 * k - float(self._ref[k]) for k, c in skip)
        ref_sum = float(ref.sum()) - (float(ref[nh:nh + ng].sum()) if ng else 0.0) - skip_dev
        m_sound = n - ng + len(skip)

        if ng:
            def centre_of(x: np.ndarray) -> float:
                return (float(x.sum()) - float(x[nh:nh + ng].sum()) - ref_sum) / m_sound
        else:
            def centre_of(x: np.ndarray) -> float:
                return (float(x.sum()) - ref_sum) / m_sound

        max_motion = cfg.max_motion   # held-note motion allowed at this event (limited)
        causes: list[str] = []        # why held notes move at this event (see held_cause)
        shape = self._shape(new) if nh + ng == 0 and not skip else 0.0
        x = self._first(tau, W, mode, cur, nh, ng, lam, mu, ref, shape)
        # context choice among ambiguous candidates (at most two more passes)
        amb = self._ambig[D]   # the diagonal (unison) has one candidate only
        if amb.any() and (mode == "free" or amb[:, nh + ng:].any()):
            tri = self._triu.get(n)
            if tri is None:
                tri = self._triu[n] = np.triu_indices(n, 1)
            sel = amb[tri]
            if mode != "free":
                # pairs of two held notes are constant unless held notes move one by one
                sel &= tri[1] >= nh + ng
            iu, ju = tri[0][sel], tri[1][sel]
            cand_u = self._cand[D[iu, ju]]          # (pairs, candidates)
            rows = np.arange(len(iu))

            def refine(x, tau):
                if not len(iu):
                    return x, tau
                for _ in range(2):
                    diff = x[ju] - x[iu]
                    choice = np.argmin(np.abs(cand_u - diff[:, None]), axis=1)
                    vals = cand_u[rows, choice]
                    if float(np.abs(vals - tau[iu, ju]).max()) < 1e-9:
                        break
                    tau = tau.copy()
                    tau[iu, ju] = vals
                    tau[ju, iu] = -vals
                    x = self._first(tau, W, mode, cur, nh, ng, lam, mu, ref, shape)
                return x, tau
            x, tau = refine(x, tau)
            septimal = amb & self._has7[D]
            if self._use7 and septimal.any():
                # further starts from the septimal candidates of the pairs of one note that
                # lies a minor seventh above another (the seventh of a 4:5:6:7 chord); the
                # cheapest consistent choice wins
                def cost(x, t):
                    return float((W * (x[None, :] - x[:, None] - t) ** 2).sum())
                best = cost(x, tau)
                # a seventh j over a root i (j - i = 10 mod 12) whose major third is present
                pcs = set(int(k) % 12 for k in keys)
                sevenths = [j for j in range(n)
                            if (int(keys[j]) - 10) % 12 in pcs and (int(keys[j]) - 6) % 12 in pcs][:2]
                for j in sevenths:
                    mask = np.zeros((n, n), bool)
                    mask[j, :] = True
                    mask[:, j] = True
                    mask &= septimal
                    if not mask.any():
                        continue
                    tau7 = np.where(mask, self._tau7[D], tau)
                    x7, tau7 = refine(self._first(tau7, W, mode, cur, nh, ng, lam, mu, ref, shape), tau7)
                    c7 = cost(x7, tau7)
                    if c7 < best - 1e-9:
                        x, tau, best = x7, tau7, c7
        if mode != "free" and nh + ng > 0:
            c0 = centre_of(x)
            # the pure chain's drift per event (exponential average): re-centre past the
            # reference against it, so events where moving is dear can drift for free
            if nh:
                step = c0 - self._drift
                self._trend += cfg.trend_rate * (step - self._trend)
                r = cfg.steadiness_rate
                self._step_mean += r * (step - self._step_mean)
                self._step_size += r * (abs(step) - self._step_size)
            aim = max(-band, min(band, -cfg.anticipate * self._trend))
            half = cfg.window + cfg.window_per_held * max(0, nh - 1)
            edge = max(0.0, cfg.max_drift - cfg.drift_margin)
            # (the steadiness rule is about held-note motion: "limited" only)
            steady = self.steadiness if mode == "limited" else 1.0
            if steady < STEADY:
                # drift that wanders comes back by itself: re-centre only at the drift edge
                half = max(half, edge + abs(aim))
            # held notes buy re-centring with motion in proportion to how steady the drift is
            max_motion = cfg.max_motion * steady ** 1.5
            lo, hi = max(-edge, aim - half), min(edge, aim + half)
            if not (lo <= c0 <= hi):
                # re-centre towards the window: held notes move together (limited)
                # or not at all (fixed-held), the new notes take the rest
                how = "rigid" if (mode == "limited" and nh) else "fixed"
                tgt = lo if c0 < lo else hi
                causes.append("recentre")
                x = self._lsq(tau, W, how, cur, nh, ng, lam, mu, tgt, ref)
                if how == "rigid":
                    u = float(x[0] - cur[0])
                    if abs(u) > max_motion + 1e-12:
                        cur2 = cur.copy()
                        cur2[:nh] += math.copysign(max_motion, u)
                        x = self._lsq(tau, W, "fixed", cur2, nh, ng, lam, mu, tgt, ref)
        elif mode == "free" and nh and cfg.max_motion < 1200:
            dx = x[:nh] - cur[:nh]
            if np.any(np.abs(dx) > cfg.max_motion + 1e-12):
                cur2 = cur.copy()
                cur2[:nh] = cur[:nh] + np.clip(dx, -cfg.max_motion, cfg.max_motion)
                x = self._lsq(tau, W, "fixed", cur2, nh, ng, lam, mu, 0.0, ref)
        if memory and nn:
            # after a silence: the new chord, pure and centred, moves as one block towards
            # pure intervals with the notes that sounded last (weighted by class), as far
            # as the drift limit (less its margin) allows
            mk = np.array([k for k, _ in memory])
            md = np.array([d for _, d in memory])
            kn = keys[nh:]
            Dm = kn[None, :] - mk[:, None] + 127          # (memory, new)
            wm = self._w[Dm]
            resid = self._tau0[Dm] - (x[None, nh:] - md[:, None])
            c = centre_of(x)
            shift = cfg.memory_weight * float((wm * resid).sum()) / (float(wm.sum()) + 1e-12)
            edge = max(0.0, cfg.max_drift - cfg.drift_margin)
            shift = max(-edge - c, min(edge - c, shift))   # the centre stays inside the margin
            x[nh:] += shift
        # hard drift limit
        centre = centre_of(x)
        if abs(centre) > cfg.max_drift + 1e-9 and nn:
            excess = centre - math.copysign(cfg.max_drift, centre)
            moved = float(np.max(np.abs(x[:nh] - cur[:nh]))) if nh else 0.0
            if nh == 0:
                allow = abs(excess)
            elif mode == "fixed-held":
                allow = 0.0
            else:
                allow = max(0.0, max_motion - moved)
            u = math.copysign(min(abs(excess), allow), excess)
            if nh and u:
                causes.append("drift-limit")
            x[:nh] -= u
            x[nh + ng:] -= u
            c1 = centre_of(x)   # (notes beyond MAX_NOTES did not move)
            rest = c1 - math.copysign(cfg.max_drift, c1) if abs(c1) > cfg.max_drift else 0.0
            if abs(rest) > 1e-12:
                x[nh + ng:] -= rest * m_sound / nn
            centre = centre_of(x)
        self._drift = centre
        if not skip:
            # the chord's shape: each pitch class's deviation from its centre
            dev = (x - ref).tolist()
            if ng:
                del dev[nh:nh + ng]
            shape_of = {k % 12: d - centre for k, d in zip(hk + new, dev)}
            pcs = frozenset(shape_of)
            chords = self._chords
            chords.pop(pcs, None)
            chords[pcs] = shape_of
            if len(chords) > CHORDS:
                del chords[next(iter(chords))]
        if mode == "free":
            causes = ["free"]
        self.held_cause = "+".join(causes) if nh and np.any(np.abs(x[:nh] - cur[:nh]) > 1e-9) else ""
        out_held = [float(100.0 * k + d) for k, d in zip(hk, x[:nh])]
        out_new = [float(100.0 * k + d) for k, d in zip(new, x[nh + ng:])]
        self._last = {int(k): float(d) for k, d in zip(hk, x[:nh])}
        self._last.update({int(k): float(d) for k, d in zip(new, x[nh + ng:])})
        self._ghosts = {}
        if overflow:
            h2 = list(zip(new, out_new))
            _, o2 = self._solve(h2, overflow)
            out_new += o2
        result = [c for _, c in held_in]
        for i, c in zip(solve_idx, out_held):
            result[i] = c
        return result, out_new

    def _note_silence(self) -> None:
        """Nothing sounds: keep the last notes as ghosts (unless resetting)."""
        if self._last:
            self._ghosts = dict(self._last)
            self._last = {}
        if self.config.reset_on_silence:
            self._ghosts = {}
            self._drift = 0.0
            self._trend = 0.0

    def release(self, keys: Sequence[int]) -> None:
        """Optional: tell the solver notes have ended (keeps memory for silences)."""
        for k in keys:
            d = self._last.pop(int(k), None)
            if d is not None:
                self._ghosts[int(k)] = d
        if not self._last:
            self._note_silence()
