"""Property tests over random performances (hypothesis), checked with the synth model.

Properties (what the engine promises):
* every output message is valid MIDI (its bytes re-parse to the same message);
* every output note-on is released on its channel once the input releases it
  (or after all-notes-off / all-sound-off), pedals included: when the player
  has let go of everything, nothing sounds;
* a key is never held twice on one channel (so each note-off is unambiguous);
* every sounding note decodes (key + bend/8192 * range) to within half a bend
  step of its profile pitch whenever the player's wheel is centred;
* with a 12-note profile and fewer notes sounding than pool channels there is no
  ringing retune and no steal.
"""

from __future__ import annotations

import random

import mido
from hypothesis import given, settings, strategies as st

from retuner.adaptive.solver import AdaptiveConfig
from retuner.engine.core import Engine, EngineConfig
from retuner.profiles.profile import load_profile
from retuner.pitch.tuning import Tuning

from synthmodel import MtsSynth, SynthModel

PROFILES = {name: load_profile(name) for name in
            ("meantone-quarter", "werckmeister-3", "just-5limit", "edo19", "edo31", "bohlen-pierce")}
_holes = [100.0 * k + (k % 5) * 3.0 for k in range(128)]
for _k in range(0, 128, 7):
    _holes[_k] = None
PROFILES["holes"] = Tuning.from_cents("holes", _holes)

# one event: (op selector, a, b, time step in ms)
EVENT = st.tuples(st.integers(0, 99), st.integers(0, 127), st.integers(0, 127), st.integers(0, 60))


def perform(events, *, in_channels=(0, 1), wheel=True, pedals=True, panic=True, rng_keys=(36, 96),
            double_press=True, panic_scope="all"):
    """Turn raw tuples into a performance the player could play; returns (t, msg) list."""
    out = []
    held: list[tuple[int, int]] = []
    t = 0.0
    for sel, a, b, dt in events:
        t += dt / 1000.0
        ch = in_channels[a % len(in_channels)]
        if sel < 45:
            k = rng_keys[0] + b % (rng_keys[1] - rng_keys[0])
            if not double_press and (ch, k) in held:
                continue
            held.append((ch, k))
            out.append((t, mido.Message("note_on", channel=ch, note=k, velocity=1 + a % 127)))
        elif sel < 85:
            if held:
                ch, k = held.pop(b % len(held))
                if a % 3 == 0:
                    out.append((t, mido.Message("note_on", channel=ch, note=k, velocity=0)))
                else:
                    out.append((t, mido.Message("note_off", channel=ch, note=k, velocity=a)))
        elif sel < 90 and pedals:
            out.append((t, mido.Message("control_change", channel=ch, control=64 if b % 3 else 66,
                                        value=127 if a % 2 else 0)))
        elif sel < 94 and wheel:
            out.append((t, mido.Message("pitchwheel", channel=ch, pitch=0 if a % 3 == 0 else (b * 129) - 8192)))
        elif sel < 96:
            out.append((t, mido.Message("polytouch", channel=ch, note=b, value=a)))
        elif sel < 97:
            out.append((t, mido.Message("control_change", channel=ch, control=1, value=a)))
        elif sel < 98:
            out.append((t, mido.Message("program_change", channel=ch, program=a)))
        elif panic:
            cc = (123, 120, 121)[a % 3]
            out.append((t, mido.Message("control_change", channel=ch, control=cc, value=0)))
            if cc != 121:
                # the player's keyboard sends no note-offs for what it cleared. In the pool
                # (and MPE) the whole pool is one instrument: everything counts as released;
                # in MTS mode notes stay on their channels: only that channel's
                held = [] if panic_scope == "all" else [(c, k) for c, k in held if c != ch]
    return out, held, t


def check_stream(engine, tuning, perf, held, t_end, synth=None, target=None):
    s = synth or SynthModel(mpe_manager=engine.output.manager if engine.config.mode == "mpe" else None)
    s.feed(engine.start(0.0))
    step = engine.bend_range_cents / 16384.0
    for t, m in perf:
        s.feed(engine.feed(t, m))
        d = engine.next_deadline()
        if d is not None and d <= t:
            s.feed(engine.tick(t))
        assert not s.problems, s.problems
        if not any(engine.inputs.wheel.values()):
            # one step of the range in force (a wheel beyond it widens the range)
            step = engine.bend_range_cents / 16384.0
            for c, v in s.sounding():
                # decoded from the output alone: key*100 + bend/8192*range
                p = s.pitch(c, v)
                # which key did the player press? the engine keeps the pitch it gave the note
                tgt = (target or _target_of)(engine, c, v, tuning)
                assert abs(p - tgt) <= step + 1e-9, (t, m, c, v.key, p, tgt)
    # the player lets go of everything
    t = t_end + 0.1
    for ch, k in held:
        s.feed(engine.feed(t, mido.Message("note_off", channel=ch, note=k)))
    for ch in range(16):
        s.feed(engine.feed(t, mido.Message("control_change", channel=ch, control=64, value=0)))
        s.feed(engine.feed(t, mido.Message("control_change", channel=ch, control=66, value=0)))
    s.feed(engine.tick(t + 10))
    assert not s.problems, s.problems
    assert s.count() == 0, [(c, v.key) for c, v in s.sounding()]
    assert engine.sounding() == []
    return s


def _target_of(engine, c, v, tuning):
    """Profile pitch of the input key whose note sounds as voice v on channel c."""
    for n in engine.pool.notes[c]:
        if n.out_key == v.key:
            return tuning.cents[n.in_key]
    raise AssertionError(f"synth sounds key {v.key} on channel {c}, the engine knows no such note")


@settings(max_examples=40, deadline=None)
@given(events=st.lists(EVENT, min_size=50, max_size=400),
       profile=st.sampled_from(sorted(PROFILES)),
       pool_size=st.sampled_from([1, 3, 6, 15]),
       release=st.sampled_from([0.0, 0.5, 2.0]))
def test_random_streams_pool(events, profile, pool_size, release):
    tu = PROFILES[profile]
    pool = tuple(c for c in range(16) if c != 9)[:pool_size]
    e = Engine(tu, EngineConfig(pool=pool, release_time=release))
    perf, held, t_end = perform(events)
    check_stream(e, tu, perf, held, t_end)


@settings(max_examples=25, deadline=None)
@given(events=st.lists(EVENT, min_size=50, max_size=400),
       profile=st.sampled_from(["meantone-quarter", "edo19", "holes"]),
       members=st.sampled_from([2, 5, 15]), zone=st.sampled_from(["lower", "upper"]))
def test_random_streams_mpe(events, profile, members, zone):
    tu = PROFILES[profile]
    e = Engine(tu, EngineConfig(mode="mpe", mpe_members=members, mpe_zone=zone))
    perf, held, t_end = perform(events)
    check_stream(e, tu, perf, held, t_end)


@settings(max_examples=30, deadline=None)
@given(events=st.lists(EVENT, min_size=100, max_size=400),
       profile=st.sampled_from(["meantone-quarter", "werckmeister-3", "just-5limit", "kirnberger-3"]))
def test_twelve_note_profile_never_rings_or_steals_below_pool_size(events, profile):
    tu = load_profile(profile)
    e = Engine(tu, EngineConfig())
    perf, held, t_end = perform(events, in_channels=(0,), panic=False, double_press=False)
    s = SynthModel()
    s.feed(e.start(0.0))
    pool_size = len(e.config.pool)
    for t, m in perf:
        before = e.stats["ringing_retunes"], e.stats["steals"]
        sounding_before = len(e.sounding())
        s.feed(e.feed(t, m))
        if sounding_before < pool_size:
            assert (e.stats["ringing_retunes"], e.stats["steals"]) == before


def test_long_random_performance_thousands_of_events():
    """A 6000-event performance (seeded), two input channels, small pool: steals happen."""
    rng = random.Random(1234)
    events = [(rng.randrange(100), rng.randrange(128), rng.randrange(128), rng.randrange(40))
              for _ in range(6000)]
    tu = PROFILES["werckmeister-3"]
    e = Engine(tu, EngineConfig(pool=(0, 1, 2, 3, 4, 5), release_time=1.0))
    perf, held, t_end = perform(events)
    assert len(perf) > 5000
    check_stream(e, tu, perf, held, t_end)
    assert e.stats["steals"] > 0 and e.stats["notes"] > 2000


def _given_pitch(engine, c, v, tuning):
    """The pitch the engine gave the note (adaptive: the solver's)."""
    for n in engine.pool.notes[c]:
        if n.out_key == v.key:
            return n.cents
    raise AssertionError(f"synth sounds key {v.key} on channel {c}, the engine knows no such note")


@settings(max_examples=15, deadline=None)
@given(events=st.lists(EVENT, min_size=50, max_size=300),
       mode=st.sampled_from(["pool", "mpe"]),
       pool_size=st.sampled_from([4, 15]),
       window=st.sampled_from([0.0, 0.02]))
def test_random_streams_adaptive(events, mode, pool_size, window):
    """Adaptive mode with the real solver: valid, nothing stuck, and every sounding note
    decodes to the pitch the solver gave it (within half a bend step)."""
    tu = PROFILES["meantone-quarter"]
    pool = tuple(c for c in range(16) if c != 9)[:pool_size]
    e = Engine(tu, EngineConfig(mode=mode, pool=pool, mpe_members=pool_size,
                                adaptive=AdaptiveConfig(chord_window=window)))
    perf, held, t_end = perform(events)
    check_stream(e, tu, perf, held, t_end, target=_given_pitch)


@settings(max_examples=25, deadline=None)
@given(events=st.lists(EVENT, min_size=50, max_size=300),
       profiles=st.lists(st.sampled_from(["meantone-quarter", "werckmeister-3", "edo19", "holes"]),
                         min_size=1, max_size=3))
def test_random_streams_mts(events, profiles):
    """MTS mode, profile switches in the middle: every note-on meets its key tuned to
    the current profile's pitch (to half an MTS step, 0.0031 cent); with pedals,
    wheel and all-notes-off in the stream, nothing is left sounding at the end."""
    tunings = [PROFILES[p] for p in profiles]
    e = Engine(tunings[0], EngineConfig(mode="mts"))
    s = MtsSynth()
    voices = SynthModel()          # pedals, all-notes-off etc. per channel
    start = e.start(0.0)
    s.feed(start)
    voices.feed(start)
    perf, held, t_end = perform(events, panic_scope="channel")
    cur = [tunings[0]]

    def check(m, cents):
        assert abs(cents - cur[0].cents[m.note]) <= 100 / 16384 / 2 + 1e-9, (m, cents)

    switch_at = {len(perf) * (i + 1) // (len(tunings) + 1): tu for i, tu in enumerate(tunings[1:])}
    for i, (t, m) in enumerate(perf):
        if i in switch_at:
            cur[0] = switch_at[i]
            s.feed(e.set_tuning(cur[0], t))
        out = e.feed(t, m)
        s.feed(out, check)
        voices.feed(out)
        assert not voices.problems, voices.problems
    end = []
    for ch, k in held:
        end += e.feed(t_end + 1, mido.Message("note_off", channel=ch, note=k))
    for ch in range(16):
        end += e.feed(t_end + 1, mido.Message("control_change", channel=ch, control=64, value=0))
        end += e.feed(t_end + 1, mido.Message("control_change", channel=ch, control=66, value=0))
    voices.feed(end)
    assert voices.count() == 0 and not voices.problems
    assert e.sounding() == []


def _any_message(raw):
    """A channel or system message from raw bytes, or None when they do not parse."""
    status, d1, d2, ch = raw
    kind = (0x80, 0x90, 0xA0, 0xB0, 0xC0, 0xD0, 0xE0, 0xF8, 0xFA, 0xFC, 0xFF)[status % 11]
    b = [kind | ch] if kind < 0xF0 else [kind]
    if kind < 0xF0:
        b += [d1] if kind in (0xC0, 0xD0) else [d1, d2]
    try:
        return mido.Message.from_bytes(b)
    except ValueError:
        return None


RAW = st.tuples(st.integers(0, 10), st.integers(0, 127), st.integers(0, 127), st.integers(0, 15))


@settings(max_examples=40, deadline=None)
@given(raw=st.lists(RAW, min_size=20, max_size=300), mode=st.sampled_from(["pool", "mpe", "mts"]),
       profile=st.sampled_from(["meantone-quarter", "holes", "edo31"]))
def test_fuzz_any_messages_then_input_lost_leaves_nothing_sounding(raw, mode, profile):
    """Any MIDI the input may send (every channel message type, any controller, RPNs,
    mode messages, system reset): the engine never fails, every message it sends is
    valid, and after the input is lost nothing the engine played keeps sounding."""
    tu = PROFILES[profile]
    e = Engine(tu, EngineConfig(mode=mode, pool=(0, 1, 2, 3), mpe_members=4))
    s = SynthModel(mpe_manager=e.config.mpe_manager() if mode == "mpe" else None)
    s.feed(e.start(0.0))
    t = 0.0
    for r in raw:
        m = _any_message(r)
        if m is None:
            continue
        t += 0.01
        out = e.feed(t, m)
        if m.type == "reset":
            s = SynthModel(mpe_manager=s.mpe_manager)    # the synth was reset
            out = out[1:]
        s.feed([x for x in out if getattr(x, "channel", None) != 9])  # channel 10 is the player's own
    # (the note-offs for the player's own channel-10 notes are checked in test_engine)
    s.feed([x for x in e.input_lost(t + 0.1) if getattr(x, "channel", None) != 9])
    assert not s.problems, s.problems
    assert [(c, v.key) for c, v in s.sounding() if c != 9] == []


def _profile_pitch_of_input(engine, c, v, tuning):
    """Profile pitch of the key the player pressed for the note sounding as voice v."""
    for n in engine.pool.notes[c]:
        if n.out_key == v.key:
            # a 12-note tuning never needs another key: the note sounds from its own key
            assert n.out_key == n.in_key, (n.in_key, n.out_key)
            return tuning.cents[n.in_key]
    raise AssertionError(f"synth sounds key {v.key} on channel {c}, the engine knows no such note")


@settings(max_examples=40, deadline=None)
@given(events=st.lists(EVENT, min_size=30, max_size=200),
       mode=st.sampled_from(["pool", "mpe"]),
       window=st.sampled_from([0.0, 0.02, 0.05]),
       channels=st.sampled_from([(0,), (0, 1), (0, 1, 2, 3)]))
def test_adaptive_every_note_is_its_own_key_whatever_the_duplicates(events, mode, window, channels):
    """Re-presses, unisons on several channels and keys struck twice within one chord
    window: every output note sounds from the key its player pressed, within the
    adaptive range of that key's profile pitch (adaptive moves notes by tens of cents
    at most: a comma and the drift limit; a wrong key is 100 c or more away). The
    pitch is decoded from the output bytes, not taken from the engine's own notes."""
    tu = PROFILES["meantone-quarter"]
    e = Engine(tu, EngineConfig(mode=mode, mpe_members=15,
                                adaptive=AdaptiveConfig(chord_window=window)))
    perf, held, t_end = perform(events, in_channels=channels, wheel=False, rng_keys=(58, 65))

    def target(engine, c, v, tuning):
        return _profile_pitch_of_input(engine, c, v, tuning)

    s = SynthModel(mpe_manager=e.output.manager if e.config.mode == "mpe" else None)
    s.feed(e.start(0.0))
    for t, m in perf:
        s.feed(e.feed(t, m))
        d = e.next_deadline()
        if d is not None and d <= t:
            s.feed(e.tick(t))
        for c, v in s.sounding():
            p = s.pitch(c, v)
            tgt = target(e, c, v, tu)
            assert abs(p - tgt) < 60.0, (t, m, c, v.key, p, tgt)


def test_adaptive_doubled_key_in_one_chord_keeps_every_key():
    """C4 doubled (two channels) under E4 and G4 at one instant: the output is C4, C4,
    E4, G4, each near its own pitch."""
    tu = PROFILES["meantone-quarter"]
    for window in (0.0, 0.02):
        e = Engine(tu, EngineConfig(adaptive=AdaptiveConfig(chord_window=window)))
        s = SynthModel()
        s.feed(e.start(0.0))
        for ch, k in ((0, 60), (1, 60), (0, 64), (0, 67)):
            s.feed(e.feed(0.0, mido.Message("note_on", channel=ch, note=k, velocity=90)))
        s.feed(e.tick(1.0))
        keys = sorted(v.key for _, v in s.sounding())
        assert keys == [60, 60, 64, 67], keys
        for c, v in s.sounding():
            assert abs(s.pitch(c, v) - 100.0 * v.key) < 30.0
