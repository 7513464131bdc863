"""Adaptive just intonation: a weighted least-squares solver with re-centring.

Method
------
This is the least-squares method published by Stange, Wick and Hinrichsen,
"Playing music in just intonation: a dynamically adaptive tuning scheme",
*Computer Music Journal* 42(3), 2018: at each event the pitches of all sounding
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

The system is small (at most 16 notes) and dense; it is solved with numpy.
All pitches inside are deviations in cents from each key's own 12-EDO pitch.

What we do differently (and why)
--------------------------------
1. **The centre term acts on the gauge only.** The pull to the reference is a
   rank-one term on the *mean* deviation of the sounding notes,
   ``mu * (mean_i (x_i - r_i))**2``, not a pull of each note to its tempered
   pitch. A chord whose targets are consistent (a major triad 4:5:6, a minor
   triad 10:12:15) therefore comes out exactly pure *and* exactly centred on the
   reference; a per-note pull would bend it towards 12-EDO.
2. **Re-centring through new notes, spread over events.** With held notes
   frozen ("fixed-held") the common-mode freedom is spent on the new notes
   only: they land slightly off pure against held notes, which moves the
   centre back. With "limited", a held note moves by at most ``max_motion``
   cents per event, so a re-centring is spread over several events instead of
   one audible slide; the new notes are then re-solved against the clipped held
   pitches so the chord stays as pure as the limit allows.
3. **A hard drift limit.** If the solution's centre is further than
   ``max_drift`` from the reference, the whole chord is first shifted as far as
   the held notes' motion allowance permits (intervals stay pure), then the rest
   is taken by the new notes alone.
4. **Ambiguous interval classes chosen by context.** Some classes have more
   than one just candidate (minor seventh 9/5 or 16/9, and 7/4 in the 7-limit
   table; major second 9/8 or 10/9; tritone 45/32 or 64/45; minor third 6/5 or
   7/6 in the 7-limit table). After a first solve with each class's first
   candidate, every ambiguous pair takes the candidate nearest to what the rest
   of the chord implies, and the system is solved again (at most twice). In a
   ii7 chord D-F-A-C this gives D-C = 9/5; in a V7 chord with the 7-limit
   table it lets D-F become 7/6 so the chord is 4:5:6:7.
5. **Silence.** With the "reset" policy the solver forgets everything when
   nothing sounds: the next chord is pure and exactly centred. Without it, the
   notes that sounded last are kept as fixed "ghost" partners (weight
   ``memory_weight``) for the first chord after a silence, so a detached
   passage keeps its melodic intervals pure while the centre term and drift
   limit keep it near the reference.

Costs of the policies (see ``AdaptiveConfig``): "fixed-held" never slides a
sounding note, but drift can only be shed through impurity of new notes against
held ones, so a long chain of held common tones (the comma pump) either drifts
or becomes impure; "limited" sheds drift by small slides of held notes (motion)
and keeps impurity low; "reset" costs nothing in legato but recentres detached
playing abruptly (melodic intervals across a silence are not kept pure).

The default chord window is 0.02 s: notes arriving within 20 ms of the first
note of a chord are solved together, so every note of a chord is delayed by up
to 20 ms (about the spread of a pianist's chord; below what most players notice
as latency). 0 disables gathering (lowest latency, chords struck with a spread
may first be tuned against a partial chord and then move).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from fractions import Fraction
from typing import Any, Mapping, Optional, Sequence

import numpy as np

from .errors import RetunerError
from .tuning import Tuning

#: interval class names accepted in YAML (semitones above the lower note, mod 12)
CLASS_NAMES = {
    "unison": 0, "octave": 0, "P1": 0, "P8": 0,
    "m2": 1, "M2": 2, "m3": 3, "M3": 4, "P4": 5, "tritone": 6, "TT": 6,
    "P5": 7, "m6": 8, "M6": 9, "m7": 10, "M7": 11,
}

# Just ratios for each interval class; the first candidate is the default, the
# others are chosen by context (common practice of 5-limit just intonation).
LIMIT5: dict[int, tuple[str, ...]] = {
    0: ("1/1",), 1: ("16/15",), 2: ("9/8", "10/9"), 3: ("6/5",), 4: ("5/4",),
    5: ("4/3",), 6: ("45/32", "64/45"), 7: ("3/2",), 8: ("8/5",), 9: ("5/3",),
    10: ("9/5", "16/9"), 11: ("15/8",),
}
# 7-limit: harmonic seventh 7/4, septimal tritone 7/5 and septimal minor third
# 7/6 (the intervals of a 4:5:6:7 dominant seventh chord) are added.
LIMIT7: dict[int, tuple[str, ...]] = dict(LIMIT5)
LIMIT7.update({3: ("6/5", "7/6"), 6: ("7/5", "45/32", "64/45", "10/7"), 10: ("7/4", "9/5", "16/9")})

# Weights per interval class: consonances count fully, dissonances less.
DEFAULT_WEIGHTS: dict[int, float] = {
    0: 1.0, 1: 0.1, 2: 0.2, 3: 1.0, 4: 1.0, 5: 1.0, 6: 0.1,
    7: 1.0, 8: 1.0, 9: 1.0, 10: 0.3, 11: 0.1,
}

POLICIES = ("fixed-held", "limited", "free")
REFERENCES = ("edo12", "profile")
MAX_NOTES = 16


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

    chord_window: seconds; notes starting within this time of a chord's first
        note are solved together. Every note of the chord waits up to this long
        (latency cost). Default 0.02 s.
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
    reference: "edo12" (12-EDO at the profile's reference pitch) or "profile".
    motion_weight: lambda, cost of moving a held note (per cent squared,
        relative to a pair weight of 1).
    centre_weight: mu, cost of the centre's distance from the reference.
    memory_weight: weight of the previous chord's notes after a silence
        (without "reset"); 0 disables memory.
    """

    chord_window: float = 0.02
    policy: str = "limited+reset"
    max_drift: float = 5.0
    max_motion: float = 1.5
    limit: str = "5"
    intervals: dict = field(default_factory=dict)
    weights: dict = field(default_factory=dict)
    reference: str = "edo12"
    motion_weight: float = 2.0
    centre_weight: float = 1.0
    memory_weight: float = 0.5

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
        num("max_drift", 0.0, 1200.0)
        num("max_motion", 0.0, 1200.0)
        num("motion_weight", 0.0, 1e6)
        num("centre_weight", 0.0, 1e6)
        num("memory_weight", 0.0, 1e6)
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
        if self.reference not in REFERENCES:
            raise RetunerError(f"must be edo12 or profile, got {self.reference!r}", file=file, field="adaptive.reference")
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
    (cents for held notes, cents for new notes), same order.
    """

    def __init__(self, config: Optional[AdaptiveConfig] = None, reference: Optional[Tuning] = None):
        self.config = (config if config is not None else AdaptiveConfig()).validate()
        self.reference = reference or Tuning.equal12()
        self._build_tables()
        self.reset()

    # -- set-up -------------------------------------------------------------
    def _build_tables(self) -> None:
        cfg = self.config
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
        self._cand = cand
        self._tau0 = cand[:, 0].copy()
        self._ambig = ~np.isnan(cand[:, 1]) if ncand > 1 else np.zeros(255, bool)
        self._w = np.array([weights[int(abs(d)) % 12] for d in diffs], dtype=float)
        del cls, octs
        # reference deviation per key (cents from the key's 12-EDO pitch)
        ref = self.reference
        if self.config.reference == "profile":
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
        self._sounding = False

    @property
    def drift(self) -> float:
        """Centre (mean deviation) of the last solution minus the reference's, in cents."""
        return self._drift

    def reference_cents(self, key: int) -> float:
        """The reference pitch of a key (cents above key 0 of 12-EDO)."""
        return 100.0 * key + float(self._ref[key])

    # -- the system -----------------------------------------------------------
    def _system(self, keys: np.ndarray, tau: np.ndarray, W: np.ndarray):
        """Pair part of the normal equations: (L, b)."""
        L = -W
        np.fill_diagonal(L, 0.0)
        L[np.diag_indices_from(L)] = W.sum(axis=1) - np.diag(W)
        b = -(W * tau).sum(axis=1)
        return L, b

    def _targets(self, keys: np.ndarray):
        D = keys[None, :] - keys[:, None] + 127
        return D, self._tau0[D].copy(), self._w[D].copy()

    # -- public ---------------------------------------------------------------
    def solve(self, held: Sequence[tuple[int, float]], new: Sequence[int]) -> tuple[list[float], list[float]]:
        cfg = self.config
        held = list(held)
        new = list(new)
        if not new and not held:
            self._note_silence()
            return [], []
        # drop notes beyond the size we solve densely: keep the newest
        if len(held) + len(new) > MAX_NOTES:
            extra = len(held) + len(new) - MAX_NOTES
            kept_held = held[extra:] if extra <= len(held) else []
            result_held_skip = held[:len(held) - len(kept_held)]
        else:
            kept_held, result_held_skip = held, []
        if not held:
            self._note_silence()
        hk = [k for k, _ in kept_held]
        hdev = [c - 100.0 * k for k, c in kept_held]
        ghosts = []
        if not kept_held and self._ghosts and not cfg.reset_on_silence and cfg.memory_weight > 0:
            ghosts = [(k, d) for k, d in self._ghosts.items() if k not in new][: MAX_NOTES - len(new)]
        gk = [k for k, _ in ghosts]
        keys = np.array(hk + gk + list(new), dtype=int)
        nh, ng, nn = len(hk), len(gk), len(new)
        n = nh + ng + nn
        cur = np.zeros(n)
        cur[:nh] = hdev
        cur[nh:nh + ng] = [d for _, d in ghosts]
        ref = self._ref[keys]
        mode = cfg.held_mode
        lam = np.zeros(n)
        fixed = np.zeros(n, bool)
        fixed[nh:nh + ng] = True
        if mode == "fixed-held":
            fixed[:nh] = True
        else:
            lam[:nh] = cfg.motion_weight
        D, tau, W = self._targets(keys)
        if ng:
            # ghosts: weak partners, no pairs among themselves, not counted in the centre
            gi = slice(nh, nh + ng)
            W[:, gi] *= cfg.memory_weight
            W[gi, :] *= cfg.memory_weight
            W[gi, gi] = 0.0
        np.fill_diagonal(W, 0.0)
        # centre over sounding notes only (ghosts excluded): implement by solving with
        # mu on the mean of sounding notes; ghosts have ref = their value (no pull)
        x = self._solve_centre(keys, fixed, cur, tau, W, lam, ref, nh, ng)
        # context choice among ambiguous candidates (at most two passes)
        amb = self._ambig[D]
        np.fill_diagonal(amb, False)
        if amb.any():
            for _ in range(2):
                diff = x[None, :] - x[:, None]
                cand = self._cand[D]  # (n, n, C)
                err = np.abs(cand - diff[:, :, None])
                err = np.where(np.isnan(err), np.inf, err)
                choice = np.argmin(err, axis=2)
                new_tau = np.take_along_axis(cand, choice[:, :, None], axis=2)[:, :, 0]
                new_tau = np.where(amb, new_tau, tau)
                if np.allclose(new_tau, tau):
                    break
                tau = new_tau
                x = self._solve_centre(keys, fixed, cur, tau, W, lam, ref, nh, ng)
        # limited: clip held motion, then re-solve the new notes against it
        if mode == "limited" and nh:
            dx = x[:nh] - cur[:nh]
            lim = cfg.max_motion
            if np.any(np.abs(dx) > lim + 1e-12):
                fx = fixed.copy()
                fx[:nh] = True
                cur2 = cur.copy()
                cur2[:nh] = cur[:nh] + np.clip(dx, -lim, lim)
                x = self._solve_centre(keys, fx, cur2, tau, W, np.zeros(n), ref, nh, ng)
        # hard drift limit
        sound = np.ones(n, bool)
        sound[nh:nh + ng] = False
        centre = float(np.mean(x[sound] - ref[sound]))
        if cfg.max_drift >= 0 and abs(centre) > cfg.max_drift + 1e-9:
            excess = centre - math.copysign(cfg.max_drift, centre)
            # whole-chord shift within the held notes' allowance
            if nh == 0 or mode == "free":
                allow = abs(excess)
            elif mode == "limited":
                moved = np.abs(x[:nh] - cur[:nh])
                allow = max(0.0, float(np.min(cfg.max_motion - moved)))
            else:
                allow = 0.0
            u = math.copysign(min(abs(excess), allow), excess)
            x[:nh] -= u
            x[nh + ng:] -= u
            rest = excess - u
            if abs(rest) > 1e-12 and nn:
                x[nh + ng:] -= rest * (nh + nn) / nn
            centre = float(np.mean(x[sound] - ref[sound]))
        self._drift = centre
        # remember
        out_held = [float(100.0 * k + d) for k, d in zip(hk, x[:nh])]
        out_new = [float(100.0 * k + d) for k, d in zip(new, x[nh + ng:])]
        self._last = {int(k): float(d) for k, d in zip(hk, x[:nh])}
        self._last.update({int(k): float(d) for k, d in zip(new, x[nh + ng:])})
        self._ghosts = {}
        self._sounding = True
        if result_held_skip:
            out_held = [float(c) for _, c in result_held_skip] + out_held
        return out_held, out_new

    def _solve_centre(self, keys, fixed, cur, tau, W, lam, ref, nh, ng):
        # centre over sounding notes only (ghosts excluded): a rank-one term on a mask
        n = len(keys)
        A, b = self._system(keys, tau, W)
        A = A + np.diag(lam)
        b = b + lam * cur
        s = np.ones(n)
        s[nh:nh + ng] = 0.0
        m = s.sum()
        c = self.config.centre_weight / (m * m)
        A = A + c * np.outer(s, s)
        b = b + c * s * float((ref * s).sum())
        free = ~fixed
        x = cur.copy()
        Aff = A[np.ix_(free, free)] + 1e-9 * np.eye(int(free.sum()))
        bf = b[free] - A[np.ix_(free, fixed)] @ cur[fixed]
        x[free] = np.linalg.solve(Aff, bf)
        return x

    def _note_silence(self) -> None:
        """Nothing sounds: keep the last notes as ghosts (unless resetting)."""
        if self._last:
            self._ghosts = dict(self._last)
            self._last = {}
        if self.config.reset_on_silence:
            self._ghosts = {}
            self._drift = 0.0

    def release(self, keys: Sequence[int]) -> None:
        """Optional: tell the solver notes have ended (keeps memory for silences)."""
        for k in keys:
            d = self._last.pop(int(k), None)
            if d is not None:
                self._ghosts[int(k)] = d
        if not self._last:
            self._note_silence()
