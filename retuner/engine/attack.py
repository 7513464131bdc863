"""Adaptive mode without added latency: a note sounds at once, its chord settles within
its attack.

A pitch change within the first few tens of milliseconds of a note is masked by the note's
attack (common practice of psychoacoustics; no number here is from a source). So every
note-on leaves as soon as it arrives, tuned with what sounds already, and while the notes of
a chord arrive one by one (a hand spreads a chord over tens of milliseconds), the notes still
within their attack are solved again with each newcomer, as if the chord had arrived at one
instant. Notes past their attack (the previous chord's held notes) follow the solver's
re-centring policy as in the chord window, but move once per chord: their moves wait for
the new chord's attack to end (or happen at once when several notes of a chord start at one
instant, as block chords in a file do: nothing can be heard between them).

The solver is rewound to its state before the chord's first note each time the chord is
solved again (``mark``/``rewind``, optional on a solver), so its memory, centre and trend
count the chord once. Nothing waits: note-offs and pedal changes go out when they come.

``attack_time`` (seconds, default 0.04): how long a note may still be retuned. 40 ms covers
the spread of a chord played by hand (up to 25 ms in the project's humanised material) with
a margin, and stays within the tens of milliseconds an attack masks.

Voice leading (the first guess): in legato playing each voice moves by a small step and its
old note ends a few milliseconds after the new one starts (common practice). So a new note
that arrives while a note of the previous chord is still held within ``VOICE_STEP``
semitones of it is taken for that note's voice moving on: the held note is about to end, and
the solves within the new note's attack leave it out of the context (it keeps its pitch,
the solver does not see it), so the first guess is already the tuning the chord gets once
that note has ended. Each new note takes one such note, the nearest first; a note the
player let go of within the attack time counts too (its voice has already moved, and the
new note then takes no held note in its place: the held notes near it belong to voices
that stay); a new note as near to two held notes takes neither. A note sounding on only by
the sustain pedal is never left out: its key is up, so no voice leading says when the pedal
will end it.
"""

from __future__ import annotations

from collections import deque
from typing import Optional, Sequence

from retuner.engine.allocator import Note


#: cents: a note whose pitch within its attack ends further than this from the pitch it left
#: with counts as corrected (the first guess missed)
CORRECTED = 0.5

#: semitones: a new note at most this far from a held note of the previous chord is taken for
#: the next note of that note's voice (a step: a semitone or a whole tone)
VOICE_STEP = 2


class AttackSettle:
    """The bookkeeping of attack mode for one engine (pure state; time is an argument)."""

    def __init__(self, attack_time: float) -> None:
        self.attack = float(attack_time)
        # id(note) -> (note, pitch before the chord began); the note is kept so that an id
        # reused by a later note is never mistaken for it
        self.mark_cents: dict[int, tuple[Note, float]] = {}
        self.held_plan: list[tuple[Note, float]] = []  # held notes' moves, due at ``due``
        self.due: Optional[float] = None
        self.recent: deque[float] = deque(maxlen=1000)   # sizes of the latest retunes (cents)
        # each note's correction within its attack: how far its last retune there put it from
        # the pitch it left with (cents); the chord in its attack by id(note) -> [note, first,
        # correction], earlier notes' corrections in ``done``
        self.net: dict[int, list] = {}
        self.done: deque[float] = deque(maxlen=10000)
        self.cause = ""                                   # why the planned moves move
        # voice leading: id(new note) -> (new note, the note of its voice it is taken to
        # replace), for the notes of the chord in its attack; and the notes the player let
        # go of lately (their voices have moved already)
        self.claims: dict[int, tuple[Note, Note]] = {}
        self.let_go: deque[Note] = deque(maxlen=32)

    def fresh(self, sounding: Sequence[Note], t: float, movable) -> list[Note]:
        """The sounding notes still within their attack (held by the player and movable
        alone by the output)."""
        lim = self.attack
        return [n for n in sounding if n.down and t - n.t_on < lim and movable(n)]

    def released(self, note: Note) -> None:
        """The player let go of ``note`` (its key is up; it may sound on by the pedal)."""
        self.let_go.append(note)

    def ending(self, held: Sequence[Note], new: Sequence[Note], arrived: Sequence[Note],
               t: float) -> set[int]:
        """The held notes (by id) to leave out of the solve at ``t``: those the notes in
        their attack (``new``) are taken to replace. Each note just ``arrived`` takes the
        nearest note within ``VOICE_STEP`` semitones, one each, among the notes past their
        attack still held by their key and the notes let go of within the attack time (a
        note let go of wins a tie; a tie of two held notes takes neither: which voice moved
        is not known). Only a taken note still held by its key is left out."""
        claims = self.claims
        lim = self.attack
        if arrived:
            taken = {id(c[1]) for c in claims.values()}
            past = [n for n in held if n.down and t - n.t_on >= lim and id(n) not in taken]
            gone = [n for n in self.let_go
                    if n.t_off is not None and t - n.t_off <= lim and id(n) not in taken]
            for m in arrived:
                near = [(abs(o.in_key - m.in_key), o) for o in gone + past
                        if abs(o.in_key - m.in_key) <= VOICE_STEP and id(o) not in taken]
                if not near:
                    continue
                d = min(x for x, _ in near)
                near = [o for x, o in near if x == d]
                # a note let go of at that distance wins; two held ones are a guess too far
                o = near[0] if (len(near) == 1 or not near[0].down) else None
                if o is not None:
                    taken.add(id(o))
                    claims[id(m)] = (m, o)
        if not claims:
            return set()
        out = set()
        for n in new:
            c = claims.get(id(n))
            if c is not None and c[0] is n and c[1].alive and c[1].down:
                out.add(id(c[1]))
        return out

    def begin(self, solver, held: Sequence[Note]) -> list[tuple[int, float]]:
        """A chord's first note: remember the solver's state and the held notes' pitches."""
        mark = getattr(solver, "mark", None)
        if mark is not None:
            mark()
        # the notes of earlier chords are past their attack: their corrections are final
        self.done.extend(abs(v[2]) for v in self.net.values())
        self.net = {}
        self.claims = {}
        self.mark_cents = {id(n): (n, n.cents) for n in held}
        return [(n.in_key, n.cents) for n in held]

    def again(self, solver, held: Sequence[Note]) -> list[tuple[int, float]]:
        """A chord solved again: back to the state before its first note."""
        rewind = getattr(solver, "rewind", None)
        if rewind is not None:
            rewind()
        mc = self.mark_cents
        out = []
        for n in held:
            m = mc.get(id(n))
            out.append((n.in_key, m[1] if m is not None and m[0] is n else n.cents))
        return out

    def count(self, fresh: Sequence[Note], cents: Sequence[float], stats: dict,
              t: Optional[float] = None) -> None:
        """Count the retunes of notes within their attack (more than 0.01 c) in ``stats``:
        ``attack_retunes``, ``attack_retune_cents_total`` and ``attack_retune_cents_max``; and
        the notes whose correction within their attack (last pitch there less the pitch they
        left with) is more than ``CORRECTED`` cents: ``attack_corrected_notes``. A note retuned
        at the very instant it started (``t``: notes that start together, as the block chords
        of a file do) starts with that pitch: nobody can hear it change, so it is no retune."""
        for n, c in zip(fresh, cents):
            v = self.net.get(id(n))
            if v is None or v[0] is not n:
                v = self.net[id(n)] = [n, n.cents, 0.0]
            was = abs(v[2]) > CORRECTED
            if t is not None and n.t_on >= t:
                v[1], v[2] = float(c), 0.0
                stats["attack_corrected_notes"] -= was
                continue
            v[2] = float(c) - v[1]
            stats["attack_corrected_notes"] += (abs(v[2]) > CORRECTED) - was
            d = abs(float(c) - n.cents)
            if d > 0.01:
                stats["attack_retunes"] += 1
                stats["attack_retune_cents_total"] += d
                if d > stats["attack_retune_cents_max"]:
                    stats["attack_retune_cents_max"] = d
                self.recent.append(d)

    def corrections(self) -> list[float]:
        """The corrections (cents, unsigned) of the latest notes retuned within their attack."""
        return list(self.done) + [abs(v[2]) for v in self.net.values()]

    def plan(self, held: Sequence[Note], cents: Sequence[float], starts: Sequence[float],
             cause: str = "") -> None:
        """The held notes' moves, due when the chord's attack is over; ``cause`` says why
        they move (kept for measurement, see ``Engine.held_motion``)."""
        self.held_plan = [(n, float(c)) for n, c in zip(held, cents) if c != n.cents]
        self.cause = cause
        self.due = (min(starts) + self.attack) if self.held_plan else None

    def take_plan(self) -> list[tuple[Note, float]]:
        plan, self.held_plan, self.due = self.held_plan, [], None
        return [(n, c) for n, c in plan if n.alive and c != n.cents]

    def clear(self) -> None:
        self.held_plan, self.due, self.mark_cents = [], None, {}
        self.claims = {}
        self.let_go.clear()
        self.done.extend(abs(v[2]) for v in self.net.values())
        self.net = {}
