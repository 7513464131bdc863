"""The channel pool: choosing a channel for each note, sharing, ringing, stealing.

A synth can bend only a whole channel, so each sounding note is placed on an
output channel of the **pool** whose bend gives the note its exact pitch.

Words (see the README): a channel is **busy** while a note sounds on it (a
note held by the sustain or sostenuto pedal still sounds); it is **ringing**
for ``release_time`` seconds after its last note stopped sounding (the synth's
release tail is still audible), and **idle** after that. Re-bending a ringing
channel is a **ringing retune** (the tail audibly slides); taking a busy channel
away from its notes is a **steal**.

Channel choice for a note that needs tuning bend ``b`` on output key ``k``
(:meth:`Pool.choose`), first rule that applies:

1. **share** (only when sharing is allowed: static tunings in the bend pool):
   a busy channel already at bend ``b`` whose notes come from the same input
   channel (the player's wheel of one input channel bends only its own notes)
   and that has no key-down note on key ``k``
   (a note-off must stop exactly one note, so one key is never held twice on one
   channel); the first such channel in pool order;
2. **same bend**: a free (ringing or idle) channel already at bend ``b``: no
   bend message needed; the one used most recently (this keeps the pool
   compact: a 12-note tuning stays on at most 12 channels, the rest stay spare);
3. **idle**: an idle channel, the one silent longest; its bend is changed;
4. **ringing retune**: a ringing channel, the one silent longest (its tail is
   the quietest); counted as a ringing retune. This never happens while an idle
   channel exists (rule 3 comes first);
5. **steal**, when every channel is busy. Policy: *longest-released first* — among
   channels whose notes have all been released by the player (sounding only
   because a pedal holds them), the one whose last release is oldest; *then
   oldest held* — otherwise the channel whose most recent note-on is oldest.
   The engine sends a note-off for each stolen note first; if a pedal would keep
   a stolen note sounding, it lifts that pedal on this channel alone and presses
   it again (bend pool), or sends all-sound-off to that member channel alone
   (MPE, where the pedals live on the manager channel); then the bend, then the
   new note-on. Every stolen note is counted.
"""

from __future__ import annotations

import math
from typing import Iterable, Optional

NEG_INF = -math.inf

SHARE = "share"
SAME_BEND = "same_bend"
IDLE = "idle"
RINGING = "ringing"
STEAL = "steal"


class Note:
    """One note the engine has accepted from the input."""

    __slots__ = ("in_ch", "in_key", "out_ch", "out_key", "velocity", "bend", "cents",
                 "down", "sost", "alive", "pending", "t_on", "t_off", "dom", "stale")

    def __init__(self, in_ch: int, in_key: int, velocity: int, t_on: float, dom: int):
        self.in_ch = in_ch
        self.in_key = in_key
        self.out_ch = -1
        self.out_key = in_key
        self.velocity = velocity
        self.bend = 8192          # tuning bend of its channel (without the player's wheel)
        self.cents = 0.0          # pitch asked for, cents above key 0 of 12-EDO
        self.down = True          # the player still holds the key
        self.sost = False         # latched by the sostenuto pedal
        self.alive = True         # sounds (or will sound, when pending) on the synth
        self.pending = False      # waiting in the adaptive chord window
        self.t_on = t_on
        self.t_off = NEG_INF      # when the player released it
        self.dom = dom            # pedal domain (0 in pool/MPE modes, input channel in MTS)
        self.stale = False        # outlived a release of its key (its own note-off may be lost)

    def __repr__(self) -> str:  # pragma: no cover - debugging aid
        return (f"Note(in={self.in_ch}/{self.in_key} out={self.out_ch}/{self.out_key} "
                f"bend={self.bend} down={self.down} alive={self.alive})")


class NoteTable:
    """The notes sounding on each output channel (0-based channel numbers), and when
    each channel last started and last stopped sounding."""

    def __init__(self, channels: Iterable[int]):
        self.channels = list(channels)
        self.notes: dict[int, list[Note]] = {c: [] for c in self.channels}
        self.last_off: dict[int, float] = {c: NEG_INF for c in self.channels}
        self.last_on: dict[int, float] = {c: NEG_INF for c in self.channels}

    # -- queries -------------------------------------------------------------
    def busy(self) -> list[int]:
        return [c for c in self.channels if self.notes[c]]

    def sounding_count(self) -> int:
        return sum(len(v) for v in self.notes.values())

    def sounding(self) -> list[Note]:
        out: list[Note] = []
        for c in self.channels:
            out.extend(self.notes[c])
        return out

    # -- updates -------------------------------------------------------------
    def add(self, c: int, note: Note, t: float) -> None:
        self.notes[c].append(note)
        self.last_on[c] = t

    def remove(self, note: Note, t: float) -> None:
        """The note stopped sounding at ``t``."""
        ns = self.notes.get(note.out_ch)
        if ns is None:
            return
        try:
            ns.remove(note)
        except ValueError:
            return
        if not ns:
            self.last_off[note.out_ch] = t

    def clear(self, t: Optional[float] = None) -> list[Note]:
        """Forget every note; channels become ringing from ``t`` (or idle if None)."""
        out: list[Note] = []
        for c in self.channels:
            if self.notes[c]:
                out.extend(self.notes[c])
                self.notes[c] = []
                self.last_off[c] = NEG_INF if t is None else t
        return out


class Pool(NoteTable):
    """The output channels of the pool: their notes, bends and ringing."""

    def __init__(self, channels: Iterable[int], release_time: float):
        super().__init__(channels)
        self.release_time = float(release_time)
        self.bend: dict[int, int] = {c: 8192 for c in self.channels}

    def is_ringing(self, c: int, t: float) -> bool:
        return not self.notes[c] and t - self.last_off[c] < self.release_time

    # -- choice --------------------------------------------------------------
    def choose(self, bend: int, out_key: int, t: float, share: bool, in_ch: Optional[int] = None,
               channels: Optional[Iterable[int]] = None) -> tuple[int, str]:
        """The channel for a new note from input channel ``in_ch`` (None: shares with
        notes of any input channel; see the module docstring for the rules), among
        ``channels`` (default: the whole pool)."""
        notes = self.notes
        cbend = self.bend
        last_off = self.last_off
        same: Optional[int] = None
        same_off = -math.inf
        idle: Optional[int] = None
        idle_off = math.inf
        ring: Optional[int] = None
        ring_off = math.inf
        release = self.release_time
        chans = self.channels if channels is None else channels
        for c in chans:
            ns = notes[c]
            if ns:
                if share and cbend[c] == bend and (in_ch is None or ns[0].in_ch == in_ch):
                    for n in ns:
                        if n.down and n.out_key == out_key:
                            break
                    else:
                        return c, SHARE
                continue
            lo = last_off[c]
            if cbend[c] == bend:
                if lo > same_off or same is None:
                    same, same_off = c, lo
            elif t - lo >= release:
                if lo < idle_off or idle is None:
                    idle, idle_off = c, lo
            else:
                if lo < ring_off or ring is None:
                    ring, ring_off = c, lo
        if same is not None:
            return same, SAME_BEND
        if idle is not None:
            return idle, IDLE
        if ring is not None:
            return ring, RINGING
        return self.victim(chans), STEAL

    def victim(self, channels: Optional[Iterable[int]] = None) -> int:
        """The channel to steal (among ``channels``): longest-released first, then oldest held."""
        best_rel: Optional[int] = None
        best_rel_t = math.inf
        best_held: Optional[int] = None
        best_held_t = math.inf
        for c in (self.channels if channels is None else channels):
            ns = self.notes[c]
            if not ns:
                continue
            if all(not n.down for n in ns):
                rel = max(n.t_off for n in ns)
                if rel < best_rel_t or best_rel is None:
                    best_rel, best_rel_t = c, rel
            else:
                on = self.last_on[c]
                if on < best_held_t or best_held is None:
                    best_held, best_held_t = c, on
        if best_rel is not None:
            return best_rel
        assert best_held is not None, "steal from an empty pool"
        return best_held
