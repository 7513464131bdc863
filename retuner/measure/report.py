"""Reports of a conversion: JSON, a text summary, and a plot.

Every measure is computed from the OUTPUT files' bytes (decoded as a synth
would hear them, by :mod:`retuner.measure.metrics`), not from the engine's state; the
counters that only the engine knows (steals, ringing retunes) come from its
``stats``. Fields:

* ``notes``: notes decoded from the output; ``channels_used``: 1-based output
  channels that played notes (percussion excluded);
* ``steals``, ``ringing_retunes``: engine counters (``steals``: the notes cut short because
  their channel was taken for a new note); ``steals_explained`` (only when ``steals`` is not
  0): one line saying how many notes were cut short, why, and what would avoid it with the
  settings used; ``bends_sent``: pitch bend
  messages in the output; ``range_widenings``: how often the output bend range
  was widened so that the player's wheel plus the tuning fits; ``wheel_clamps``:
  bends still cut short at the end of the range (both said in the summary when
  not 0);
* ``worst_pitch_error_cents``: static profiles only: the largest distance of
  any note's decoded pitch from the profile pitch of its key plus the player's wheel;

The player's wheel is expression, not error: it is decoded from the INPUT file (each
part's wheel at its own bend range) and taken off the pitch of the notes on the channels
that carry that part alone (:func:`expression`; in MPE mode the manager channel of a
zone that holds one part carries its wheel, in a zone shared by several parts each
note's member does), so worst error, motion, drift and the plot count what the tuning does.
* ``impurity_cents``, ``motion_cents_per_note``, ``drift_max_cents``,
  ``drift_final_cents``, ``drift_rms_cents``: as defined in :mod:`retuner.measure.metrics`.

The plot (``--plot``; matplotlib is an optional extra: ``pip install
'retuner[plot]'``) shows each note as a line at its deviation from 12-EDO over
the time it sounds, coloured by part, and the drift (mean deviation of the
sounding notes) as a black step line.
"""

from __future__ import annotations

import bisect
import json
import math
from typing import Optional

from retuner.engine.outputs import MODES
from retuner.engine.outputs.base import explain_steals
from retuner.pitch.intervals import CONSONANT_RATIOS, interval_name
from retuner.errors import RetunerError
from retuner.measure import metrics
from retuner.outfile import write_atomic
from retuner.pitch.tuning import beat_rate, cents_to_hz, note_name
from retuner.smf.messages import wire_stream

#: seconds a moment must last to count in the drift maximum; changes within this time of a
#: note's start are within its attack (see retuner.measure.metrics.report)
SETTLE = 0.05

MEASURES = ("notes", "channels_used", "steals", "ringing_retunes", "bends_sent",
            "worst_pitch_error_cents", "impurity_cents", "motion_cents_per_note",
            "drift_max_cents", "drift_final_cents", "drift_rms_cents")


def require_matplotlib():
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise RetunerError("--plot needs matplotlib, which is not installed "
                           "(pip install 'retuner[plot]')", field="--plot")


def expression(res, opts, o) -> Optional[list]:
    """The player's wheel as it reaches output file ``o``'s channels, decoded from the INPUT
    file (see :func:`retuner.measure.metrics.input_wheel`): each part's wheel goes to the
    channels that carry that part alone (in MTS mode, its own channel; in MPE mode, its zone's
    manager when the zone held that part alone, else its members). None when the input
    cannot be read again."""
    config = opts.config
    mode = MODES[config.mode]
    if not res.input:
        return None
    if mode.keeps_input_channels:
        channels_of = {p: [p] for p in o.parts}
    else:
        sent_on = o.wheel_channels or o.channels
        count: dict[int, int] = {}
        for chans in sent_on.values():
            for c in chans:
                count[c] = count.get(c, 0) + 1
        channels_of = {p: [c for c in chans if count[c] == 1] for p, chans in sent_on.items()}
        shared = sorted(c for c, n in count.items() if n > 1)
    try:
        with open(res.input, "rb") as f:
            data = f.read()
        # each part's wheel once, then onto the channels that carry that part alone
        parts_wheel = metrics.input_wheel_wire(wire_stream(data, res.input), config.wheel_range,
                                               {p: [p] for p in channels_of})
        own = [(t, c, cents) for t, p, cents in parts_wheel for c in channels_of[p]]
        if mode.keeps_input_channels or not shared:
            return own
        # a channel shared by several parts (merged parts) carries the wheel of the part whose
        # note it plays at the time: each output note is traced to its part by its key and start
        onsets = [(t, raw[0] & 0x0F, raw[1]) for t, raw in wire_stream(data, res.input)
                  if raw[0] & 0xF0 == 0x90 and len(raw) > 2 and raw[2] and (raw[0] & 0x0F) in sent_on]
        return sorted(own + _wheel_by_note(o, parts_wheel, onsets, set(shared)), key=lambda e: e[0])
    except (OSError, RetunerError):
        return None


def _wheel_by_note(o, parts_wheel: list, onsets: list, shared: set) -> list:
    """Wheel events for output channels that several parts share: at each output note-on on
    such a channel, the wheel of the part that played that key last (at or before that
    moment); at each wheel move of a part, every shared channel now playing that part's note."""
    by_key: dict[int, list] = {}
    for t, p, k in onsets:
        by_key.setdefault(k, []).append((t, p))
    starts = {k: [t for t, _ in v] for k, v in by_key.items()}
    events = [(t, 1, p, cents) for t, p, cents in parts_wheel]
    for t, raw in wire_stream(o.data, o.path):
        if raw[0] & 0xF0 == 0x90 and len(raw) > 2 and raw[2] and (raw[0] & 0x0F) in shared:
            k = raw[1]
            i = bisect.bisect_right(starts.get(k, ()), t + 1e-6) - 1
            if i >= 0:
                events.append((t, 0, raw[0] & 0x0F, by_key[k][i][1]))
    events.sort(key=lambda e: (e[0], e[1]))
    wheel: dict[int, float] = {}            # part -> cents
    playing: dict[int, int] = {}            # shared output channel -> part
    out = []
    for t, kind, a, b in events:
        if kind:                            # part a's wheel is now b cents
            wheel[a] = b
            out += [(t, c, b) for c, p in playing.items() if p == a]
        else:                               # a note of part b starts on channel a
            playing[a] = b
            out.append((t, a, wheel.get(b, 0.0)))
    return out


def _decode(o, config):
    # the file's bytes as a synth receives them: no mido message per event
    return metrics.decode_wire(wire_stream(o.data, o.path), bend_scale=config.bend_scale,
                               exclude_channels=tuple(config.passthrough), expression=o.wheel)


def decode_outputs(res, opts) -> list:
    """Every output file of a conversion, decoded as a synth hears it, the player's wheel
    taken off (the measures and the plot show what the tuning does)."""
    out = []
    for o in res.outputs:
        if o.wheel is None:
            o.wheel = expression(res, opts, o)
        out.append(_decode(o, opts.config))
    return out


#: the per-file fields counted by the engine (not measured from the file)
ENGINE_COUNTERS = ("steals", "ringing_retunes", "attack_retunes", "attack_retune_cents_mean",
                   "attack_retune_cents_max", "attack_corrected_notes", "redressings", "range_widenings",
                   "wheel_clamps")


def _measures(dec, tuning, stats: dict) -> dict:
    imp, _, dr = metrics.moment_figures(dec.notes, SETTLE)   # impurity and drift: one walk
    rep = {
        "notes": len(dec.notes),
        "channels_used": list(dec.channels_used),
        "steals": int(stats.get("steals", 0)),
        "ringing_retunes": int(stats.get("ringing_retunes", 0)),
        # adaptive mode without a chord window: notes retuned within their attack
        "attack_retunes": int(stats.get("attack_retunes", 0)),
        "attack_retune_cents_mean": round(float(stats.get("attack_retune_cents_total", 0.0))
                                          / max(1, int(stats.get("attack_retunes", 0))), 4),
        "attack_retune_cents_max": round(float(stats.get("attack_retune_cents_max", 0.0)), 4),
        # ... and the first guesses that missed: notes corrected by more than 0.5 c in their attack
        "attack_corrected_notes": int(stats.get("attack_corrected_notes", 0)),
        # parts sharing output channels: a channel dressed again for another part's instrument
        "redressings": int(stats.get("redressings", 0)),
        "bends_sent": int(dec.bends_sent),
        # the player's wheel: output range widened to fit it, bends still cut short
        "range_widenings": int(stats.get("range_widenings", 0)),
        "wheel_clamps": int(stats.get("wheel_clamps", 0)),
        "worst_pitch_error_cents": None,
        "impurity_cents": round(imp, 4),
        "motion_cents_per_note": round(metrics.motion(dec.notes), 4),
        "late_motion_cents_per_note": round(metrics.motion(dec.notes, SETTLE), 4),
        "drift_max_cents": round(dr["max"], 4),
        "drift_final_cents": round(dr["final"], 4),
        "drift_rms_cents": round(dr["rms"], 4),
    }
    if tuning is not None:
        worst = metrics.worst_target_error(dec.notes, tuning)
        rep["worst_pitch_error_cents"] = round(worst, 4)
    return rep


def build_report(res, opts, decoded: Optional[list] = None) -> dict:
    """The report of a conversion result (all output files)."""
    config = opts.config
    static = config.adaptive is None
    files_rep = []
    decs = decoded if decoded is not None else decode_outputs(res, opts)
    files_of_harmony: dict = {}
    for o in res.outputs:
        files_of_harmony[o.harmony] = files_of_harmony.get(o.harmony, 0) + 1
    for o, dec in zip(res.outputs, decs):
        r = {"file": o.path, "parts": [p + 1 for p in o.parts],
             "part_channels": {str(p + 1): [c + 1 for c in chans] for p, chans in o.channels.items()}}
        r.update(_measures(dec, opts.tuning if static else None, o.stats))
        if o.harmony >= 0 and files_of_harmony[o.harmony] > 1:
            # one engine played this file and others: its counters are the whole conversion's
            # (at the top of the report), not this file's
            for k in ENGINE_COUNTERS:
                r[k] = None
        if o.steals_why and r["steals"]:
            r["steals_explained"] = explain_steals(r["steals"], o.steals_why)
        files_rep.append(r)
    top = {"input": res.input, "profile": opts.tuning.id, "mode": config.mode,
           "adaptive": not static, "lookahead": bool(opts.lookahead),
           "split": bool(res.split), "outputs": [o.path for o in res.outputs]}
    parts = sorted({p for o in res.outputs for p in o.parts})
    if not static and len(parts) > 1:
        # adaptive mode (live, as the daemon, or planned): the parts of a file as one harmony,
        # or each part alone
        together = not getattr(opts, "parts_apart", False) and res.one_harmony
        top["parts_tuned"] = "together" if together else "apart"
        if together and getattr(opts, "merge_parts", False):
            top["parts_share_channels"] = True      # one pool, each channel dressed for its note's part
    if getattr(opts, "live", False) and getattr(res, "note_ons", None) is not None:
        # played as live: how much later each note-on left than it came (engine clock)
        outs = [(n.start, n.key) for dec in decs for n in dec.notes]
        lat = metrics.added_latency(res.note_ons, outs)
        top["live"] = True
        top["added_latency_ms"] = {"notes": len(lat),
                                   "p50": round(1000 * metrics.percentile(lat, 50), 3),
                                   "p99": round(1000 * metrics.percentile(lat, 99), 3),
                                   "max": round(1000 * lat[-1], 3) if lat else 0.0}
    if getattr(res, "lookahead", None):
        top["lookahead_check"] = res.lookahead   # the plan against live playing of the same file
    if len(files_rep) == 1:
        top.update({k: v for k, v in files_rep[0].items() if k != "file"})
    else:
        top["notes"] = sum(f["notes"] for f in files_rep)
        # the engines' counters from the engines (an engine playing several files counts once)
        for k in ("steals", "ringing_retunes", "attack_retunes", "attack_corrected_notes",
                  "redressings", "range_widenings", "wheel_clamps"):
            top[k] = sum(int(o.stats.get(k, 0)) for o in res.outputs)
        top["bends_sent"] = sum(f["bends_sent"] for f in files_rep)
        top["attack_retune_cents_max"] = round(max(float(o.stats.get("attack_retune_cents_max", 0.0))
                                                   for o in res.outputs), 4)
        said = [(int(o.stats.get("steals", 0)), o.steals_why) for o in res.outputs
                if o.steals_why and o.stats.get("steals")]
        if said:
            # one line for the whole conversion: every file's steals, the reason of the file
            # that stole most
            top["steals_explained"] = explain_steals(top["steals"], max(said)[1])
        for k in ("worst_pitch_error_cents", "drift_max_cents"):
            vals = [f[k] for f in files_rep if f[k] is not None]
            top[k] = max(vals) if vals else None
        # the files are one arrangement played together (on a port each): the pairs of every
        # file sounding together count, whichever file holds their notes
        imp, _, _ = metrics.moment_figures([n for dec in decs for n in dec.notes], SETTLE)
        top["impurity_cents"] = round(imp, 4)
        top["files"] = files_rep
    return top


def write_report(path: str, rep: dict) -> None:
    write_atomic(path, (json.dumps(rep, indent=2) + "\n").encode())


def text_summary(rep: dict) -> str:
    lines = []
    outs = ", ".join(rep["outputs"])
    kind = "adaptive" + (" with lookahead" if rep.get("lookahead") else "") if rep.get("adaptive") else "static"
    lines.append(f"{rep['input']} -> {outs}  ({rep['profile']}, {rep['mode']}, {kind})")
    ch = rep.get("channels_used")
    if ch is not None:
        lines.append(f"  notes {rep['notes']}, channels used {len(ch)} ({','.join(map(str, ch))}), "
                     f"steals {rep['steals']}, ringing retunes {rep['ringing_retunes']}, "
                     f"bends sent {rep['bends_sent']}")
    else:
        lines.append(f"  notes {rep['notes']}, steals {rep['steals']}, ringing retunes "
                     f"{rep['ringing_retunes']}, bends sent {rep['bends_sent']}")
    if rep.get("parts_tuned") == "together":
        lines.append("  parts tuned together as one harmony, " + (
            "sharing the output channels (each dressed for the part whose note it plays)"
            if rep.get("parts_share_channels") else "each on its own channels"))
    elif rep.get("parts_tuned") == "apart":
        lines.append("  parts tuned apart, each against itself")
    if rep.get("added_latency_ms"):
        a = rep["added_latency_ms"]
        lines.append(f"  played as live: added latency per note-on p50 {a['p50']:.1f} ms, p99 {a['p99']:.1f} ms, "
                     f"max {a['max']:.1f} ms ({a['notes']} notes)")
    if rep.get("steals_explained"):
        lines.append(f"  {rep['steals_explained']}")
    if rep.get("range_widenings"):
        lines.append(f"  the output bend range was widened {rep['range_widenings']} time(s) so that the "
                     f"player's wheel plus the tuning fits")
    if rep.get("wheel_clamps"):
        lines.append(f"  {rep['wheel_clamps']} bend(s) cut short: the player's wheel plus the tuning went "
                     f"beyond the widest output bend range")
    if rep.get("attack_retunes"):
        lines.append(f"  {rep['attack_retunes']} retunes of notes within their attack"
                     + (f", mean {rep['attack_retune_cents_mean']:.2f} c" if "attack_retune_cents_mean" in rep else "")
                     + f", largest {rep['attack_retune_cents_max']:.2f} c"
                     + (f"; {rep['attack_corrected_notes']} of {rep['notes']} notes corrected by more than 0.5 c"
                        if "attack_corrected_notes" in rep else ""))
    if rep.get("redressings"):
        lines.append(f"  {rep['redressings']} time(s) a channel was dressed again for another part's instrument "
                     f"(program and controllers sent before its note)")
    if rep.get("worst_pitch_error_cents") is not None:
        lines.append(f"  worst pitch error {rep['worst_pitch_error_cents']:.4f} c")
    if "impurity_cents" in rep and "files" in rep:
        lines.append(f"  impurity {rep['impurity_cents']:.3f} c across the files (played together)")
    elif "impurity_cents" in rep:
        late = (f" ({rep['late_motion_cents_per_note']:.3f} after the attack)"
                if rep.get("late_motion_cents_per_note") is not None else "")
        lines.append(f"  impurity {rep['impurity_cents']:.3f} c, motion {rep['motion_cents_per_note']:.3f} c/note{late}, "
                     f"drift max {rep['drift_max_cents']:.2f} c, final {rep['drift_final_cents']:.2f} c, "
                     f"rms {rep['drift_rms_cents']:.2f} c")
    for f in rep.get("files", []):
        lines.append(f"  {f['file']}: parts {','.join(map(str, f['parts']))}: notes {f['notes']}, "
                     f"impurity {f['impurity_cents']:.3f} c, motion {f['motion_cents_per_note']:.3f} c/note, "
                     f"drift max {f['drift_max_cents']:.2f} c")
    return "\n".join(lines)


def drift_line(notes) -> tuple[list[float], list[float]]:
    """(times, drift) step points: the mean deviation from 12-EDO of the sounding notes, over
    the stretches in which the sounding set stays the same (NaN where nothing sounds)."""
    xs: list[float] = []
    ys: list[float] = []
    for t0, t1, snd in metrics.segments(notes):
        if xs and xs[-1] == t0:
            xs.pop()
            ys.pop()
        xs += [t0, t1]
        ys += [sum(c - 100.0 * k for k, c in snd) / len(snd), math.nan]
    return xs, ys


def plot(res, opts, path: str, decoded: Optional[list] = None) -> None:
    """Draw every note's deviation from 12-EDO over time, coloured by part, with the drift line."""
    require_matplotlib()
    import io

    import matplotlib
    matplotlib.use("Agg")
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    config = opts.config
    decs = decoded if decoded is not None else decode_outputs(res, opts)
    fig = Figure(figsize=(11, 5.5), dpi=100)
    ax = fig.add_subplot(1, 1, 1)
    cmap = matplotlib.colormaps["tab10"]
    parts_seen: dict[int, int] = {}
    all_notes = []
    for o, dec in zip(res.outputs, decs):
        part_of = {}
        for p, chans in o.channels.items():
            for c in chans:
                part_of.setdefault(c, p)
        for n in dec.notes:
            p = part_of.get(n.channel, n.channel) if not MODES[config.mode].keeps_input_channels else n.channel
            col_i = parts_seen.setdefault(p, len(parts_seen))
            colour = cmap(col_i % 10)
            end = n.end if n.end is not None else n.start
            pts = n.steps + [(end, n.steps[-1][1])]
            xs, ys = [], []
            for (t0, c0), (t1, _) in zip(pts, pts[1:]):
                xs += [t0, t1]
                ys += [c0 - 100.0 * n.key] * 2
            # parts drawn thinner one after another, so a note doubled in another part
            # (octaves tuned alike) stays visible under it
            ax.plot(xs, ys, color=colour, linewidth=max(1.2, 5.0 - 1.3 * col_i), solid_capstyle="butt",
                    zorder=2 + col_i)
            all_notes.append(n)
    dx, dy = drift_line(all_notes)
    ax.step(dx, dy, where="post", color="black", linewidth=1.2, zorder=50)
    ax.axhline(0.0, color="0.6", linewidth=0.8)
    handles = [Line2D([], [], color=cmap(i % 10), linewidth=max(1.2, 5.0 - 1.3 * i),
                      label=f"part {p + 1} (channel {p + 1})")
               for p, i in sorted(parts_seen.items(), key=lambda kv: kv[1])]
    handles.append(Line2D([], [], color="black", linewidth=1.2, label="drift (mean of sounding notes)"))
    ax.legend(handles=handles, loc="upper right", fontsize=8)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("deviation from 12-EDO (cents)")
    ax.set_title(f"{res.input}: {opts.tuning.id}" + (" adaptive" if config.adaptive is not None else "")
                 + (" + lookahead" if opts.lookahead else ""))
    ax.grid(True, alpha=0.3)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    write_atomic(path, buf.getvalue())


# ---------------------------------------------------------------------------
# Comparing tunings on one piece
# ---------------------------------------------------------------------------
#: consonances whose beat rates are shown (interval class -> just ratio upper:lower), the
#: impurity set of retuner.measure.metrics (common practice of 5-limit just intonation)
BEAT_RATIOS = {c: (r.numerator, r.denominator) for c, r in CONSONANT_RATIOS.items()}   # octaves: 2**n:1 below


def pair_times(notes) -> dict:
    """(low key, high key) -> [seconds sounding together, sum of beat rate * seconds] for the
    consonant pairs (a whole octave and more counts as an octave's multiple: compound 2:1 only
    for octaves; other compound intervals are reduced to their simple form for the ratio)."""
    acc: dict = {}
    for t0, t1, snd in metrics.segments(notes):
        dt = t1 - t0
        snd = sorted(snd, key=lambda kp: (kp[1], kp[0]))
        for a in range(len(snd)):
            for b in range(a + 1, len(snd)):
                (k1, c1), (k2, c2) = snd[a], snd[b]
                d = k2 - k1
                if d <= 0 or d % 12 not in BEAT_RATIOS or d > 24:
                    continue
                p, q = BEAT_RATIOS[d % 12]
                octs = d // 12
                if d % 12 == 0:
                    p, q = 2 ** octs, 1
                else:
                    p *= 2 ** octs
                g = math.gcd(p, q)
                p, q = p // g, q // g
                rate = beat_rate(cents_to_hz(c1), cents_to_hz(c2), p, q)
                e = acc.setdefault((k1, k2), [0.0, 0.0, (p, q)])
                e[0] += dt
                e[1] += rate * dt
    return acc


def compare(path: str, decoded: list, top: int = 5) -> dict:
    """Impurity, motion, drift and beat rates of the piece's ``top`` most frequent consonant key
    pairs, per run: ``decoded`` is [(profile id, adaptive, lookahead, notes as :func:`metrics.decode`
    gives them)], the first the reference (:mod:`retuner.convert.compare` converts the piece for each run)."""
    rows = []
    # the piece's most frequent consonant pairs (by time sounding together), from the first run
    base = pair_times(decoded[0][3])
    chosen = sorted(base.items(), key=lambda kv: (-kv[1][0], kv[0]))[:top]
    intervals = []
    for (k1, k2), (secs, _, (p, q)) in chosen:
        intervals.append({"low": k1, "high": k2, "pair": f"{note_name(k1)}-{note_name(k2)}",
                          "interval": interval_name(k2 - k1),
                          "ratio": f"{p}/{q}", "together_s": round(secs, 3)})
    for profile, adaptive, lookahead, notes in decoded:
        imp, _ = metrics.impurity(notes)
        dr = metrics.drift(notes)
        pt = pair_times(notes)
        beats = []
        for iv in intervals:
            e = pt.get((iv["low"], iv["high"]))
            beats.append(round(e[1] / e[0], 3) if e and e[0] > 0 else None)
        rows.append({"profile": profile, "adaptive": adaptive, "lookahead": lookahead,
                     "impurity_cents": round(imp, 3),
                     "motion_cents_per_note": round(metrics.motion(notes), 3),
                     "drift_max_cents": round(dr["max"], 3), "beat_rates_hz": beats})
    return {"input": path, "intervals": intervals, "results": rows}


def result_label(r: dict) -> str:
    """A row of compare as the text table names it: the profile, and how it was played."""
    return r["profile"] + (" adaptive" if r["adaptive"] else "") + (" + lookahead" if r["lookahead"] else "")


def compare_text(c: dict) -> str:
    heads = [f"{iv['pair']} {iv['ratio']}" for iv in c["intervals"]]
    w = max([len(result_label(r)) for r in c["results"]] + [7])
    lines = [f"{c['input']}: beat rates (Hz) of the most frequent consonant pairs, "
             f"time-weighted while they sound"]
    head = f"{'profile':<{w}}  {'impurity':>9}  {'motion':>9}  {'drift':>8}"
    for h in heads:
        head += f"  {h:>12}"
    lines.append(head)
    for r in c["results"]:
        line = (f"{result_label(r):<{w}}  {r['impurity_cents']:>7.2f} c  {r['motion_cents_per_note']:>7.2f} c"
                f"  {r['drift_max_cents']:>6.2f} c")
        for b in r["beat_rates_hz"]:
            line += f"  {('-' if b is None else f'{b:.2f}'):>12}"
        lines.append(line)
    lines.append("impurity: mean distance of consonant pairs from just; motion: cents per note; "
                 "drift: largest mean deviation from 12-EDO")
    return "\n".join(lines)
