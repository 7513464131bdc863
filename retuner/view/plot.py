"""A picture of a tuning, for a class: ``retuner show ID --plot FILE.png`` and ``compare --plot``.

One column per tuning (two or more side by side when asked, each row on one scale so the
columns compare at a glance), up to three panels in it:

1. **Degrees**: how far each degree's key sounds from its 12-EDO pitch (reference pitch
   applied), one bar per degree. For a tuning that is not a 12-note octave tuning each
   degree is measured against the nearest 12-EDO step above the root instead.
2. **Fifths** (12-note tunings): the twelve fifths in circle-of-fifths order (C-G, G-D, ...,
   F-C) as deviations from a pure 3/2, each labelled with its beat rate.
3. **Major thirds** (12-note tunings): the twelve major thirds from the same lower notes, as
   deviations from a pure 5/4, with beat rates.

Beat rates are taken with the lower note in the chosen octave (scientific pitch notation,
4 = the octave of middle C). Two tones near the just ratio p:q (upper:lower) beat at
``|q*f_high - p*f_low|`` Hz: the p-th partial of the lower tone and the q-th of the upper
nearly coincide (a fifth 3:2: 3*f_low against 2*f_high).

Black and white is enough to read it: bars are black outlines; a wide interval (or a degree
above 12-EDO) is hatched ``///``, a narrow one (or below) ``...``; a pure one is a ring on
the zero line; every bar carries its number; the 12-EDO size of the interval is a dashed
line. No meaning rests on colour.

:func:`pictures` computes what is drawn (no matplotlib needed); :func:`draw` builds the
figure from it (each panel's axes carries a ``gid`` such as ``"fifths:edo12"``, each bar the
value it shows, each beat label the gid ``"beats"``), :func:`save` writes a PNG all or
nothing. matplotlib is an optional extra, imported only when a figure is drawn.
"""

from __future__ import annotations

import io
import textwrap
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Optional

from retuner.errors import RetunerError
from retuner.outfile import write_atomic
from retuner.pitch.tuning import KEY_NAMES, Tuning, beat_rate, ratio_to_cents

#: the circle of fifths from C, as pitch classes (C G D A E B F# C# G# Eb Bb F)
CIRCLE = tuple((7 * i) % 12 for i in range(12))
PURE = 0.005            # cents: closer to just than this is drawn as pure
EDO_FIFTH = 700.0 - ratio_to_cents(Fraction(3, 2))     # -1.955 c
EDO_THIRD = 400.0 - ratio_to_cents(Fraction(5, 4))     # +13.686 c


@dataclass
class Bar:
    label: str
    cents: float                    # the bar's height
    beats: Optional[float] = None   # Hz, for intervals


@dataclass
class Picture:
    """What is drawn for one tuning."""

    id: str
    description: str
    octave: int
    degrees: list[Bar]
    degrees_note: str
    fifths: list[Bar] = field(default_factory=list)    # empty for tunings that are not 12-note
    thirds: list[Bar] = field(default_factory=list)


def _interval_bars(t: Tuning, octave: int, steps: int, just: Fraction) -> list[Bar]:
    bars = []
    base = 12 * (octave + 1)
    for pc in CIRCLE:
        lo, hi = base + pc, base + pc + steps
        if hi >= len(t.cents) or t.cents[lo] is None or t.cents[hi] is None:
            continue
        dev = t.cents[hi] - t.cents[lo] - ratio_to_cents(just)
        beats = beat_rate(t.hz(lo), t.hz(hi), just.numerator, just.denominator)
        bars.append(Bar(f"{KEY_NAMES[pc]}-{KEY_NAMES[hi % 12]}", dev, beats))
    return bars


def picture(t: Tuning, octave: int = 4) -> Picture:
    """The numbers drawn for tuning ``t``, beat rates with the lower note in ``octave``."""
    if not 0 <= octave <= 8:
        raise RetunerError(f"must be 0 to 8, got {octave}", field="--octave")
    if t.is_twelve:
        base = 12 * (octave + 1)
        degrees = [Bar(KEY_NAMES[pc], t.cents[base + pc] - 100.0 * (base + pc))
                   for pc in range(12) if t.cents[base + pc] is not None]
        return Picture(t.id, t.description, octave, degrees, "each key against its 12-EDO pitch",
                       _interval_bars(t, octave, 7, Fraction(3, 2)),
                       _interval_bars(t, octave, 4, Fraction(5, 4)))
    degrees = [Bar(d.name or str(i), d.cents - 100.0 * round(d.cents / 100.0)) for i, d in enumerate(t.degrees)]
    return Picture(t.id, t.description, octave, degrees,
                   "each degree against the nearest 12-EDO step above the root")


def pictures(tunings: list[Tuning], octave: int = 4) -> list[Picture]:
    return [picture(t, octave) for t in tunings]


def require_matplotlib() -> None:
    """One line and exit status 2 when the optional extra is missing."""
    try:
        import matplotlib  # noqa: F401  (lazy: an optional extra, only --plot needs it)
    except ImportError:
        raise RetunerError("needs matplotlib, which is not installed: pip install 'retuner[plot]' "
                           "(in a clone: pip install '.[plot]')", field="--plot") from None


def _signed(y: float) -> str:
    return "0.0" if abs(y) < 0.05 else f"{y:+.1f}"


def _span(bar_lists: list[list[Bar]], edo_line: Optional[float]) -> float:
    """Half the height a row of panels needs: the same scale for every tuning side by side."""
    return max([abs(b.cents) for bars in bar_lists for b in bars] + [abs(edo_line or 0.0), 5.0])


def _bars(ax, bars: list[Bar], edo_line: Optional[float], edo_label: str, span: float) -> None:
    xs = range(len(bars))
    ys = [b.cents for b in bars]
    hatches = ["///" if y > PURE else "..." if y < -PURE else "" for y in ys]
    rects = ax.bar(xs, ys, width=0.7, color="white", edgecolor="black", linewidth=1.0, zorder=3)
    for r, h, b in zip(rects, hatches, bars):
        r.set_hatch(h)
        r.set_gid(b.label)
    pure = [i for i, y in enumerate(ys) if abs(y) <= PURE]
    if pure:
        ax.plot(pure, [0.0] * len(pure), linestyle="none", marker="o", markersize=7,
                markerfacecolor="white", markeredgecolor="black", zorder=4, gid="pure")
    ax.axhline(0.0, color="black", linewidth=0.8, zorder=2)
    if edo_line is not None:
        ax.axhline(edo_line, color="black", linestyle="--", linewidth=0.8, zorder=2)
        ax.annotate(edo_label, xy=(1.0, edo_line), xycoords=("axes fraction", "data"),
                    xytext=(-2, 2), textcoords="offset points", ha="right", va="bottom", fontsize=7,
                    bbox=dict(facecolor="white", edgecolor="none", pad=0.5), zorder=6)
    # room above the bars for their numbers and the row of beat rates
    lo, hi = -1.3 * span, (1.8 if any(b.beats is not None for b in bars) else 1.3) * span
    ax.set_ylim(lo, hi)
    for i, b in enumerate(bars):
        y = b.cents
        ax.text(i, y + (0.03 if y >= 0 else -0.03) * (hi - lo), _signed(y), ha="center",
                va="bottom" if y >= 0 else "top", fontsize=7, zorder=5, gid="value")
        if b.beats is not None:
            ax.text(i, 0.97, f"{b.beats:.2f}", transform=ax.get_xaxis_transform(), ha="center",
                    va="top", fontsize=7, fontweight="bold", gid="beats")
    ax.set_xticks(list(xs))
    ax.set_xticklabels([b.label for b in bars], fontsize=8, rotation=0 if len(bars) <= 12 else 90)
    ax.set_xlim(-0.6, len(bars) - 0.4)
    ax.grid(True, axis="y", color="0.8", linewidth=0.5, zorder=0)


def draw(pics: list[Picture]):
    """A matplotlib Figure (Agg, no display) of the pictures side by side."""
    require_matplotlib()
    from matplotlib.figure import Figure   # lazy: optional extra

    cols = len(pics)
    rows = 3 if any(p.fifths for p in pics) else 1
    fig = Figure(figsize=(6.4 * cols, 3.0 * rows + 0.6), dpi=100, layout="constrained")
    grid = fig.subplots(rows, cols, squeeze=False)
    for c, p in enumerate(pics):
        ax = grid[0][c]
        ax.set_gid(f"degrees:{p.id}")
        _bars(ax, p.degrees, None, "", _span([q.degrees for q in pics], None))
        title = "\n".join(textwrap.wrap(f"{p.id}: {p.description}", 70)[:2])
        ax.set_title(f"{title}\n\ndegrees: cents from 12-EDO ({p.degrees_note})", fontsize=9)
        ax.set_ylabel("cents from 12-EDO", fontsize=8)
        if rows == 1:
            continue
        for r, (name, bars, edo, just) in enumerate((("fifths", p.fifths, EDO_FIFTH, "3/2"),
                                                     ("thirds", p.thirds, EDO_THIRD, "5/4")), start=1):
            ax = grid[r][c]
            ax.set_gid(f"{name}:{p.id}")
            if not bars:
                ax.set_axis_off()
                ax.text(0.5, 0.5, f"{p.id} is not a 12-note tuning:\nno circle of fifths",
                        transform=ax.transAxes, ha="center", va="center", fontsize=9)
                continue
            word = "fifths" if name == "fifths" else "major thirds"
            _bars(ax, bars, edo, f"12-EDO {edo:+.2f}", _span([getattr(q, name) for q in pics], edo))
            ax.set_title(f"{word} around the circle of fifths: cents from pure {just}\n"
                         f"top row: beats a second, lower note in octave {p.octave}", fontsize=9)
            ax.set_ylabel(f"cents from {just}", fontsize=8)
    fig.supxlabel("hatched /// : above (wide)    dotted ... : below (narrow)    ring: pure    "
                  "dashed line: the 12-EDO size", fontsize=8)
    return fig


def save(fig, path: str) -> None:
    """Write the figure as an 8-bit grey PNG (it has no colour to lose), all or nothing."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg   # lazy: optional extra
    from PIL import Image                                          # comes with matplotlib

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    buf = io.BytesIO()
    Image.frombuffer("RGBA", canvas.get_width_height(), canvas.buffer_rgba()).convert("L").save(
        buf, format="PNG", optimize=True)
    write_atomic(path, buf.getvalue())


def plot_tunings(tunings: list[Tuning], path: str, octave: int = 4) -> list[Picture]:
    """Draw ``tunings`` side by side into ``path``; returns what was drawn."""
    require_matplotlib()
    pics = pictures(tunings, octave)
    save(draw(pics), path)
    return pics
