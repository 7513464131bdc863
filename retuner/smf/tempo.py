"""The tempo map: ticks <-> seconds through every Set Tempo event.

"Standard MIDI Files 1.0": a Set Tempo meta event gives microseconds per quarter note, in
force from its tick until the next one; before the first, 500 000 (120 beats per minute).
With an SMPTE division a tick is a fixed fraction of a second and tempo events do not apply.
"""

from __future__ import annotations

import bisect
from typing import Iterable, Sequence

DEFAULT_TEMPO = 500000  # microseconds per quarter note (SMF 1.0: 120 bpm when none is given)


class TempoMap:
    """Ticks <-> seconds. ``division``: ticks per quarter note, or with ``smpte`` ticks per
    1000 seconds; ``changes``: (tick, microseconds per quarter note), each > 0."""

    def __init__(self, division: int, changes: Sequence[tuple[int, int]] = (), smpte: bool = False):
        self.division = division
        self.smpte = smpte
        ticks = [0]
        tempos = [DEFAULT_TEMPO]
        for tick, tempo in sorted(changes, key=lambda c: c[0]):
            if tick == ticks[-1]:
                tempos[-1] = tempo
            else:
                ticks.append(tick)
                tempos.append(tempo)
        secs = [0.0]
        for i in range(1, len(ticks)):
            secs.append(secs[-1] + (ticks[i] - ticks[i - 1]) * self._spt(tempos[i - 1]))
        self.ticks, self.tempos, self.secs = ticks, tempos, secs

    def _spt(self, tempo: int) -> float:
        """Seconds per tick."""
        if self.smpte:
            return 1000.0 / self.division
        return tempo * 1e-6 / self.division

    def seconds(self, tick: int) -> float:
        i = bisect.bisect_right(self.ticks, tick) - 1
        return self.secs[i] + (tick - self.ticks[i]) * self._spt(self.tempos[i])

    def seconds_of(self, ticks: Iterable[int]) -> list[float]:
        """Seconds of each tick of a non-decreasing sequence (walks the map once)."""
        mt, secs, tempos = self.ticks, self.secs, self.tempos
        out = []
        i = 0
        n = len(mt)
        spt = self._spt(tempos[0])
        for tick in ticks:
            while i + 1 < n and mt[i + 1] <= tick:
                i += 1
                spt = self._spt(tempos[i])
            out.append(secs[i] + (tick - mt[i]) * spt)
        return out

    def tick(self, seconds: float) -> float:
        """The (fractional) tick at ``seconds``."""
        i = bisect.bisect_right(self.secs, seconds) - 1
        if i < 0:
            i = 0
        return self.ticks[i] + (seconds - self.secs[i]) / self._spt(self.tempos[i])
