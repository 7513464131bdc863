"""The measures of a conversion, read fast, against a plain reference computation.

The report reads its output files as bytes (retuner.smf.messages.wire_stream, decoded by
retuner.measure.metrics.decode_wire, no mido message per event) and takes impurity, drift,
motion and the worst pitch error with array arithmetic. Here the same figures are computed
the plain way, message by message on mido messages and moment by moment in Python (the way
the definitions in retuner.measure.metrics read: the code the fast path replaced), on random
files converted in every output mode and on random output streams (wheel, bend ranges, MPE
configuration, MIDI Tuning Standard changes, system resets, all notes off). The notes must be
the same to the last bit; the sums may differ in their order only (1e-9 relative).

Sources for the reference's rules: MIDI 1.0 (pitch bend 14 bits, centre 8192; RPN 0 pitch
bend sensitivity, data entry MSB semitones and LSB cents; reset all controllers CC121, all
notes off CC123, all sound off CC120), MPE specification 2018 (RPN 6 on channel 1 or 16:
members at 48 semitones), MIDI Tuning Standard (real-time changes retune sounding notes).
"""

from __future__ import annotations

import math
import random

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.bench.performance import file_bytes
from retuner.convert.conversion import ConvertOptions, convert_song
from retuner.engine.core import EngineConfig
from retuner.measure import metrics, report
from retuner.midi.mts import is_mts, parse_sysex, single_note_tuning_change
from retuner.midi.resets import SYSEX_RESETS
from retuner.profiles.profile import load_profile
from retuner.smf.messages import iter_output_stream, wire_stream
from retuner.smf.reader import parse_smf

EPS = metrics.TIME_EPS


# ---------------------------------------------------------------------------- the reference
class _Chan:
    def __init__(self):
        self.bend, self.range, self.rpn, self.tprog, self.tbank, self.pending = 0, 2.0, None, None, 0, None


def ref_decode(stream, *, bend_scale=1.0, exclude_channels=(), expression=None):
    """Message by message on mido messages, every sounding note looked at on every change."""
    chans = [_Chan() for _ in range(16)]
    tables, last = {}, [None]
    sounding, base, done = {}, {}, []
    bends, used, t_last = 0, set(), 0.0
    expr = [0.0] * 16
    xs, xi = list(expression or ()), 0
    mgr = {}            # MPE member channel -> its zone's manager (MPE specification 2018)

    def table(ch):
        c = chans[ch]
        if c.tprog is not None:
            return tables.get((c.tbank, c.tprog))
        return tables.get(last[0]) if last[0] is not None else None

    def own(ch):
        c = chans[ch]
        step = c.range * 100.0 * bend_scale / 8192.0
        w = expr[ch]
        return c.bend * step - (round(w / step) * step if w and step else 0.0)

    def bend(ch):
        # a manager-channel bend applies to every note of its zone (MPE specification 2018)
        return own(ch) + (own(mgr[ch]) if ch in mgr else 0.0)

    def of(ch):
        """The channels whose notes a change on ``ch`` moves: itself and, if a manager, its zone."""
        return lambda c2, k: c2 == ch or mgr.get(c2) == ch

    def restep(t, pred):
        for (ch, key), nt in sounding.items():
            if pred(ch, key):
                p = base[id(nt)] + bend(ch)
                if abs(p - nt.steps[-1][1]) > 1e-9:
                    metrics._step(nt, t, p)

    def end(k, t):
        nt = sounding.pop(k)
        nt.end = t
        # a change at the note-off's very instant is not heard on this note
        nt.steps[:] = [nt.steps[0]] + [st for st in nt.steps[1:] if st[0] < t - EPS]
        done.append(nt)

    for t, msg in stream:
        t_last = max(t_last, t)
        while xi < len(xs) and xs[xi][0] <= t + EPS:
            tx, xch, cents = xs[xi]
            xi += 1
            if expr[xch] != cents:
                expr[xch] = cents
                restep(tx, of(xch))
        if msg.type == "reset" or (msg.type == "sysex" and bytes(msg.data) in SYSEX_RESETS.values()):
            for k in list(sounding):
                end(k, t)
            chans[:] = [_Chan() for _ in range(16)]
            mgr.clear()
            last[0] = None
            continue
        if msg.type == "sysex":
            if not is_mts(msg):
                continue
            m = parse_sysex(msg)
            pk = (m.bank or 0, m.program)
            tab = tables.setdefault(pk, [100.0 * k for k in range(128)])
            for key, c in m.changes:
                if c is not None:
                    tab[key] = c
            last[0] = pk
            if m.realtime:
                for (ch, key), nt in sounding.items():
                    if table(ch) is tab:
                        base[id(nt)] = tab[key]
                restep(t, lambda ch, key: table(ch) is tab)
            continue
        if not hasattr(msg, "channel") or msg.channel in exclude_channels:
            continue
        ch, c = msg.channel, chans[msg.channel]
        if msg.type == "note_on" and msg.velocity > 0:
            if (ch, msg.note) in sounding:
                end((ch, msg.note), t)
            tab = table(ch)
            b0 = tab[msg.note] if tab is not None else 100.0 * msg.note
            nt = metrics.NoteTrack(msg.note, ch, t, steps=[(t, b0 + bend(ch))])
            base[id(nt)] = b0
            sounding[(ch, msg.note)] = nt
            used.add(ch + 1)
        elif msg.type in ("note_on", "note_off"):
            if (ch, msg.note) in sounding:
                end((ch, msg.note), t)
        elif msg.type == "pitchwheel":
            bends += 1
            c.bend = msg.pitch
            restep(t, of(ch))
        elif msg.type == "control_change":
            cc, v = msg.control, msg.value
            if cc == 101:
                c.rpn = (v, c.rpn[1] if c.rpn else 127)
            elif cc == 100:
                c.rpn = (c.rpn[0] if c.rpn else 127, v)
            elif cc in (98, 99):
                c.rpn = None
            elif cc == 6 and c.rpn == (0, 0):
                c.range = float(v)
                restep(t, of(ch))
            elif cc == 6 and c.rpn == (0, 6) and ch in (0, 15):
                for m in [m for m, g in mgr.items() if g == ch]:
                    del mgr[m]
                for m in (range(1, 1 + v) if ch == 0 else range(15 - v, 15)):
                    chans[m].range = 48.0
                    mgr[m] = ch
                c.range = 2.0
                restep(t, lambda c2, k: True)
            elif cc == 6 and c.rpn == (0, 3):
                c.tprog = v
                if c.pending is not None:
                    c.tbank = c.pending
            elif cc == 6 and c.rpn == (0, 4):
                c.pending = v
            elif cc == 38 and c.rpn == (0, 0):
                c.range = math.floor(c.range) + v / 100.0
                restep(t, of(ch))
            elif cc == 121:
                c.bend, c.rpn = 0, None
                restep(t, of(ch))
            elif cc in (120, 123):
                for k in [k for k in sounding if k[0] == ch]:
                    end(k, t)
    for nt in sounding.values():
        nt.end = max(t_last, nt.start)
        done.append(nt)
    done.sort(key=lambda n: (n.start, n.key, n.channel))
    return done, bends, sorted(used)


def ref_figures(notes, settle):
    """Impurity, drift, motion moment by moment and note by note (the definitions)."""
    tot = wsum = mx = final = sq = tt = 0.0
    for t0, t1, snd in metrics.segments(notes):
        dt = t1 - t0
        ps = [p for _, p in snd]
        for a in range(len(ps)):
            for b in range(a + 1, len(ps)):
                dev = metrics.pair_deviation(ps[a], ps[b])
                if dev is not None:
                    tot += dt * abs(dev)
                    wsum += dt
        d = sum(p - 100.0 * k for k, p in snd) / len(snd)
        if dt >= settle:
            mx = max(mx, abs(d))
        final = d
        sq += dt * d * d
        tt += dt
    motion = sum(abs(b[1] - a[1]) for n in notes for a, b in zip(n.steps, n.steps[1:]))
    late = sum(abs(b[1] - a[1]) for n in notes for a, b in zip(n.steps, n.steps[1:])
               if b[0] > n.start + settle + EPS)
    per = max(1, len(notes))
    return {"impurity": tot / wsum if wsum else 0.0, "pair_time": wsum, "max": mx, "final": final,
            "rms": math.sqrt(sq / tt) if tt else 0.0, "motion": motion / per, "late": late / per}


def ref_worst(notes, tuning):
    worst = 0.0
    for n in notes:
        tgt = tuning.cents[n.key]
        for _, c in n.steps:
            err = abs(c - tgt) if tgt is not None else math.inf
            if err > 50.0:
                err = min(abs(c - x) for x in tuning.cents if x is not None)
            worst = max(worst, err)
    return worst


def fast_figures(notes, settle):
    imp, pair_time, dr = metrics.moment_figures(notes, settle)
    return {"impurity": imp, "pair_time": pair_time, "max": dr["max"], "final": dr["final"],
            "rms": dr["rms"], "motion": metrics.motion(notes), "late": metrics.motion(notes, settle)}


def same_notes(fast, ref):
    assert len(fast) == len(ref)
    for a, b in zip(fast, ref):
        assert (a.key, a.channel, a.start, a.end, a.steps) == (b.key, b.channel, b.start, b.end, b.steps)


def close(fast: dict, ref: dict):
    for k in ref:
        assert fast[k] == pytest.approx(ref[k], rel=1e-9, abs=1e-9), k


# ---------------------------------------------------------------------------- random material
def random_tracks(rnd: random.Random, events: int):
    """A random type 1 file: a conductor track with tempo changes and three parts' tracks
    with chords, the wheel, bend ranges, pedals, reset all controllers and all notes off."""
    conductor = [(0, b"\xFF\x51\x03\x07\xA1\x20")]
    for i in range(rnd.randrange(4)):
        conductor.append((rnd.randrange(1, 40 * events), b"\xFF\x51\x03" + rnd.randrange(200000, 900000).to_bytes(3, "big")))
    conductor.sort(key=lambda e: e[0])
    tracks = [(conductor, 0)]
    for part in range(3):
        ch = (0, 1, 9)[part] if rnd.random() < 0.3 else part
        ev, tick, held = [], 0, []
        for _ in range(events // 3):
            tick += rnd.choice((0, 0, 5, 20, 60, 240))
            r = rnd.random()
            if r < 0.45 or not held:
                k = rnd.randrange(36, 90)
                ev.append((tick, bytes((0x90 | ch, k, rnd.randrange(1, 128)))))
                held.append(k)
            elif r < 0.8:
                k = held.pop(rnd.randrange(len(held)))
                ev.append((tick, bytes((0x80 | ch, k, 0)) if rnd.random() < 0.7 else bytes((0x90 | ch, k, 0))))
            elif r < 0.9:
                v = rnd.randrange(16384)
                ev.append((tick, bytes((0xE0 | ch, v & 0x7F, v >> 7))))
            elif r < 0.93:
                ev += [(tick, bytes((0xB0 | ch, 101, 0))), (tick, bytes((0xB0 | ch, 100, 0))),
                       (tick, bytes((0xB0 | ch, 6, rnd.randrange(1, 13))))]
            elif r < 0.97:
                ev.append((tick, bytes((0xB0 | ch, 64, rnd.choice((0, 127))))))
            elif r < 0.985:
                ev.append((tick, bytes((0xB0 | ch, 121, 0))))
            else:
                ev.append((tick, bytes((0xB0 | ch, 123, 0))))
                held.clear()
        tracks.append((ev, tick + 10))
    return tracks


MODES = {"pool": {}, "mpe": {"mode": "mpe"}, "mts": {"mode": "mts"},
         "adaptive": {"adaptive": AdaptiveConfig()}}


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("mode", sorted(MODES))
def test_a_random_conversion_measures_the_same_as_the_reference(seed, mode):
    data = file_bytes(random_tracks(random.Random(seed), 600))
    song = parse_smf(data, f"random-{seed}.mid")
    tuning = load_profile("meantone-quarter")
    opts = ConvertOptions(tuning, EngineConfig(**MODES[mode]))
    res = convert_song(song, "out.mid", opts)
    for o in res.outputs:
        config = opts.config
        # the player's wheel from the input, as the report reads it, against mido messages
        chans = {p: list(c) for p, c in o.channels.items()}
        fast_wheel = metrics.input_wheel_wire(wire_stream(data), config.wheel_range, chans)
        ref_wheel = metrics_input_wheel_reference(iter_output_stream(data), config.wheel_range, chans)
        assert fast_wheel == ref_wheel
        fast = metrics.decode_wire(wire_stream(o.data), bend_scale=config.bend_scale,
                                   exclude_channels=tuple(config.passthrough), expression=fast_wheel)
        ref, bends, used = ref_decode(iter_output_stream(o.data), bend_scale=config.bend_scale,
                                      exclude_channels=tuple(config.passthrough), expression=ref_wheel)
        same_notes(fast.notes, ref)
        assert (fast.bends_sent, fast.channels_used) == (bends, used)
        assert len(ref) > 50
        close(fast_figures(fast.notes, report.SETTLE), ref_figures(ref, report.SETTLE))
        if config.adaptive is None:
            assert metrics.worst_target_error(fast.notes, tuning) == ref_worst(ref, tuning)


def metrics_input_wheel_reference(stream, wheel_range, channels_of):
    """The player's wheel per input channel in cents (bend/8192 x that channel's own range),
    message by message on mido messages."""
    rng, rpn, wheel, out = {}, {}, {}, []

    def emit(t, ch):
        cents = wheel.get(ch, 0) / 8192.0 * rng.get(ch, wheel_range * 100.0)
        out.extend((t, oc, cents) for oc in channels_of.get(ch, ()))

    for t, msg in stream:
        if msg.type == "reset" or (msg.type == "sysex" and bytes(msg.data) in SYSEX_RESETS.values()):
            moved = [ch for ch, w in wheel.items() if w]
            rng.clear(), rpn.clear(), wheel.clear()
            for ch in moved:
                emit(t, ch)
        elif msg.type == "pitchwheel":
            wheel[msg.channel] = msg.pitch
            emit(t, msg.channel)
        elif msg.type == "control_change":
            ch, cc, v, sel = msg.channel, msg.control, msg.value, rpn.get(msg.channel)
            if cc == 101:
                rpn[ch] = (v, sel[1] if sel else 127)
            elif cc == 100:
                rpn[ch] = (sel[0] if sel else 127, v)
            elif cc in (98, 99):
                rpn[ch] = None
            elif cc in (6, 38) and sel == (0, 0):
                semis, cents = divmod(int(round(rng.get(ch, wheel_range * 100.0))), 100)
                semis, cents = (v, cents) if cc == 6 else (semis, min(v, 99))
                rng[ch] = semis * 100.0 + cents
                emit(t, ch)
            elif cc == 121:
                wheel[ch], rpn[ch] = 0, None
                emit(t, ch)
    out.sort(key=lambda e: e[0])
    return out


def random_output_stream(rnd: random.Random, n: int):
    """Messages as an output may hold them, at random: notes, bends, bend ranges, an MPE
    configuration, tuning program selection, real-time and non-real-time MTS changes, resets."""
    t, out = 0.0, []
    for _ in range(n):
        t += rnd.choice((0.0, 0.0, 1e-10, 0.01, 0.2))
        ch = rnd.randrange(16)
        r = rnd.random()
        if r < 0.35:
            msg = mido.Message("note_on", channel=ch, note=rnd.randrange(40, 80), velocity=rnd.randrange(128))
        elif r < 0.55:
            msg = mido.Message("note_off", channel=ch, note=rnd.randrange(40, 80))
        elif r < 0.7:
            msg = mido.Message("pitchwheel", channel=ch, pitch=rnd.randrange(-8192, 8192))
        elif r < 0.8:
            for m in (mido.Message("control_change", channel=ch, control=101, value=0),
                      mido.Message("control_change", channel=ch, control=100, value=rnd.choice((0, 3, 4, 6)))):
                out.append((t, m))
            msg = mido.Message("control_change", channel=ch, control=rnd.choice((6, 6, 38)), value=rnd.randrange(16))
        elif r < 0.9:
            keys = rnd.sample(range(40, 80), 3)
            (msg,) = single_note_tuning_change([(k, 100.0 * k + rnd.uniform(-40, 40)) for k in keys],
                                               program=rnd.randrange(3), realtime=rnd.random() < 0.7)
        elif r < 0.95:
            msg = mido.Message("control_change", channel=ch, control=rnd.choice((121, 123, 120, 64)), value=0)
        elif r < 0.97:
            msg = mido.Message("reset") if rnd.random() < 0.5 else \
                mido.Message("sysex", data=SYSEX_RESETS[rnd.choice(sorted(SYSEX_RESETS))])
        else:
            msg = mido.Message("program_change", channel=ch, program=rnd.randrange(128))
        out.append((t, msg))
    return out


@pytest.mark.parametrize("seed", range(12))
def test_a_random_output_stream_decodes_the_same_as_the_reference(seed):
    rnd = random.Random(100 + seed)
    stream = random_output_stream(rnd, 1500)
    wheel = sorted((rnd.uniform(0, 30), rnd.randrange(16), rnd.uniform(-200, 200)) for _ in range(40))
    fast = metrics.decode(stream, bend_scale=127 / 128 if seed % 2 else 1.0, exclude_channels=(9,),
                          expression=wheel)
    ref, bends, used = ref_decode(stream, bend_scale=127 / 128 if seed % 2 else 1.0, exclude_channels=(9,),
                                  expression=wheel)
    same_notes(fast.notes, ref)
    assert (fast.bends_sent, fast.channels_used) == (bends, used)
    assert any(len(n.steps) > 1 for n in ref)
    for settle in (0.0, 0.05):
        close(fast_figures(fast.notes, settle), ref_figures(ref, settle))


def test_moments_in_blocks_give_the_figures_of_one_block():
    """The moments walked in small blocks (as a long piece is) sum to the same figures."""
    stream = random_output_stream(random.Random(7), 3000)
    notes = metrics.decode(stream).notes
    whole = metrics.moment_figures(notes, 0.05)
    saved = metrics.MOMENTS_AT_ONCE
    try:
        metrics.MOMENTS_AT_ONCE = 7
        blocks = metrics.moment_figures(notes, 0.05)
    finally:
        metrics.MOMENTS_AT_ONCE = saved
    assert blocks[0] == pytest.approx(whole[0], rel=1e-9)
    assert blocks[1] == pytest.approx(whole[1], rel=1e-9)
    for k in ("max", "final", "rms"):
        assert blocks[2][k] == pytest.approx(whole[2][k], rel=1e-9, abs=1e-12)
