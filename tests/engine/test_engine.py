"""Bend-pool engine rules, one test per rule.

The output is checked with ``SynthModel`` (tests/synthmodel.py): a small model of what a
General MIDI synth does with the messages, written from the MIDI 1.0 Detailed Specification
(pitch bend, RPN 0, note-off, the pedals, all-notes-off, all-sound-off, and
reset-all-controllers as recommended by the MMA's RP-015), independently of the engine.
"""

from __future__ import annotations

import logging

import mido
import pytest

from retuner.midi import encode as E
from retuner.engine.core import Engine, EngineConfig
from retuner.errors import RetunerError
from retuner.profiles.profile import load_profile
from retuner.pitch.tuning import Tuning

from keyboard import CC, OFF, ON, WHEEL
from synthmodel import SynthModel


def run(engine, events, synth=None, tag_fn=None):
    """Feed (t, msg) events; return (synth, list of outputs per event)."""
    synth = synth or SynthModel()
    outs = []
    for t, m in events:
        out = engine.feed(t, m)
        synth.feed(out, tag_fn(m) if tag_fn else m)
        outs.append(out)
    return synth, outs


def started(tuning=None, **kw):
    e = Engine(tuning or load_profile("meantone-quarter"), EngineConfig(**kw))
    s = SynthModel()
    s.feed(e.start(0.0))
    return e, s


def half_step(range_cents=200.0):
    return range_cents / 16384.0


def distinct_tuning():
    """Every key a different deviation (0.7 cent apart): no two keys share a bend."""
    return Tuning.from_cents("distinct", [100.0 * k + ((k * 7) % 60) - 30 for k in range(128)])


# ---------------------------------------------------------------------------
# configuration
# ---------------------------------------------------------------------------
def test_config_lists_compare_equal_to_tuples():
    # a reloaded config (lists from YAML) must not look like a change
    assert EngineConfig(pool=[0, 1, 2], passthrough=[9]) == EngineConfig(pool=(0, 1, 2), passthrough=(9,))
    e, s = started(pool=(0, 1, 2))
    e.feed(0.0, ON(60))
    assert e.reconfigure(EngineConfig(pool=[0, 1, 2]), 0.1) == []
    assert len(e.sounding()) == 1


def test_config_defaults():
    cfg = EngineConfig()
    assert cfg.pool == tuple(c for c in range(16) if c != 9)   # all but channel 10 (0-based 9)
    assert cfg.passthrough == (9,)
    assert cfg.bend_range == 2.0 and cfg.wheel_range == 2.0 and cfg.release_time == 2.0
    assert cfg.mode == "pool" and cfg.adaptive is None


@pytest.mark.parametrize("kw,field", [
    ({"mode": "quad"}, "mode"), ({"pool": ()}, "pool"), ({"pool": (0, 16)}, "pool"),
    ({"pool": (0, 9)}, "pool"), ({"bend_range": 0}, "bend_range"), ({"bend_scale": 0}, "bend_scale"),
    ({"release_time": -1}, "release_time"), ({"mpe_zone": "middle"}, "mpe_zone"),
    ({"mpe_members": 16}, "mpe_members"), ({"mts_device": 128}, "mts_device"),
])
def test_config_errors_are_values(kw, field):
    with pytest.raises(RetunerError) as ei:
        Engine(Tuning.equal12(), EngineConfig(**kw))
    assert ei.value.field == field


# ---------------------------------------------------------------------------
# start, range announcement
# ---------------------------------------------------------------------------
def test_start_announces_range_on_every_pool_channel():
    e = Engine(Tuning.equal12(), EngineConfig())
    out = e.start(0.0)
    rpn_chans = sorted({m.channel for m in out if m.type == "control_change"})
    assert rpn_chans == [c for c in range(16) if c != 9]
    ch0 = [m for m in out if m.type == "control_change" and m.channel == 0]
    # RPN 0, MIDI 1.0 Detailed Specification: CC101/100 = 0/0, CC6 = semitones, CC38 = cents, then null 127/127
    assert [(m.control, m.value) for m in ch0] == [(101, 0), (100, 0), (6, 2), (38, 0), (101, 127), (100, 127)]


def test_bend_range_change_is_announced_and_notes_keep_pitch():
    tu = load_profile("meantone-quarter")
    e, s = started(tu)
    s.feed(e.feed(0.0, ON(61)))
    c, v = s.sounding()[0]
    before = s.pitch(c, v)
    out = e.reconfigure(e.config.replace(bend_range=12.0), 0.1)
    s.feed(out)
    assert {m.channel for m in out if m.type == "control_change" and m.control == 6 and m.value == 12} \
        == set(e.config.pool)
    assert all(r == 1200.0 for ch, r in enumerate(s.range) if ch in e.config.pool)
    assert abs(s.pitch(c, v) - before) <= half_step(1200.0) + half_step(200.0)
    assert abs(s.pitch(c, v) - tu.cents[61]) <= half_step(1200.0)


# ---------------------------------------------------------------------------
# pitches
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("profile", ["meantone-quarter", "werckmeister-3", "just-5limit", "edo19", "edo31"])
def test_every_key_decodes_to_its_profile_pitch(profile):
    tu = load_profile(profile)
    e, s = started(tu)
    for k in tu.mapped_keys():
        s.feed(e.feed(k * 0.01, ON(k)))
        (c, v), = s.last_on
        assert abs(s.pitch(c, v) - tu.cents[k]) <= half_step() + 1e-9, k
        s.feed(e.feed(k * 0.01 + 0.005, OFF(k)))
    assert not s.problems


def test_key_beyond_range_plays_from_nearest_key():
    cents = [100.0 * k for k in range(128)]
    cents[60] = 6350.0   # 3.5 semitones above key 60: beyond +-2 semitones
    cents[61] = 5780.0   # 3.2 semitones below key 61
    e, s = started(Tuning.from_cents("far", cents))
    s.feed(e.feed(0.0, ON(60)))
    (c, v), = s.last_on
    assert v.key == 64 and abs(s.pitch(c, v) - 6350.0) <= half_step()   # round(63.5) = 64
    s.feed(e.feed(0.1, ON(61)))
    (c2, v2), = s.last_on
    assert v2.key == 58 and abs(s.pitch(c2, v2) - 5780.0) <= half_step()
    s.feed(e.feed(0.2, OFF(60)) + e.feed(0.3, OFF(61)))
    assert s.count() == 0 and not s.problems


def test_unmapped_key_dropped_and_logged_once():
    cents = [100.0 * k for k in range(128)]
    cents[61] = None
    e, s = started(Tuning.from_cents("holes", cents))
    records = []

    class Keep(logging.Handler):
        def emit(self, record):
            records.append(record)

    logger = logging.getLogger("retuner.engine.core")
    h = Keep(level=logging.WARNING)
    logger.addHandler(h)     # directly: other tests may configure the 'retuner' logger
    old_level = logger.level
    logger.setLevel(logging.WARNING)
    try:
        for i in range(3):
            assert e.feed(i, ON(61)) == []
            assert e.feed(i + 0.5, OFF(61)) == []
    finally:
        logger.removeHandler(h)
        logger.setLevel(old_level)
    assert len([r for r in records if "unmapped" in r.getMessage()]) == 1
    assert e.stats["dropped_unmapped"] == 3


# ---------------------------------------------------------------------------
# channel choice: sharing, same bend, silent longest, ringing
# ---------------------------------------------------------------------------
def test_same_bend_shares_a_channel():
    e, s = started()
    o1 = e.feed(0.0, ON(60))
    o2 = e.feed(0.01, ON(72))   # same pitch class, same deviation in meantone
    assert o2 == [E.note_on(o1[-1].channel, 72, 100)]   # shared channel, no bend message


def test_twelve_note_profile_uses_at_most_twelve_channels():
    e, s = started(load_profile("meantone-quarter"))
    for k in range(21, 109):
        s.feed(e.feed(k * 0.001, ON(k)))
    assert len({c for c, _ in s.sounding()}) == 12
    assert e.stats["steals"] == 0 and not s.problems


def test_no_sharing_when_disabled():
    e, s = started(share_channels=False)
    o1 = e.feed(0.0, ON(60))
    o2 = e.feed(0.01, ON(72))
    assert o1[-1].channel != o2[-1].channel


def test_free_channel_at_right_bend_is_reused_without_bend():
    e, s = started(distinct_tuning())
    a = e.feed(0.0, ON(60))
    ch_a = a[-1].channel
    e.feed(0.1, OFF(60))
    b = e.feed(0.2, ON(61))
    assert b[-1].channel != ch_a   # a different bend goes to an idle channel, not the ringing one
    e.feed(0.3, OFF(61))
    again = e.feed(5.0, ON(60))
    assert again == [E.note_on(ch_a, 60, 100)]   # bent already: no bend message


def test_choice_prefers_channel_silent_longest():
    e, s = started(distinct_tuning(), pool=(0, 1, 2), release_time=0.5)
    for i, k in enumerate((60, 61, 62)):
        e.feed(i * 0.1, ON(k))
    e.feed(1.0, OFF(61))   # channel of 61 silent since 1.0
    e.feed(1.1, OFF(60))   # channel of 60 silent since 1.1
    e.feed(1.2, OFF(62))
    out = e.feed(5.0, ON(70))
    assert out[-1].channel == 1   # 61 was on channel 1 (pool order), silent longest


def test_ringing_retune_only_when_no_idle_channel():
    e, s = started(distinct_tuning(), pool=(0, 1, 2), release_time=2.0)
    e.feed(0.0, ON(60))
    e.feed(0.5, OFF(60))          # channel 0 rings until 2.5
    e.feed(0.6, ON(61))           # channel 1
    out = e.feed(1.0, ON(62))     # channel 2 is idle: used, no ringing retune
    assert out[-1].channel == 2 and e.stats["ringing_retunes"] == 0
    out = e.feed(1.5, ON(63))     # only channel 0 is free, and it rings: ringing retune
    assert out[-1].channel == 0 and e.stats["ringing_retunes"] == 1
    e.feed(1.6, OFF(63))
    e.feed(4.0, ON(64))           # channel 0 silent for 2.4 s > release time: not ringing
    assert e.stats["ringing_retunes"] == 1


def test_sustained_notes_count_as_sounding_until_pedal_lifts():
    e, s = started(distinct_tuning(), pool=(0, 1), release_time=1.0)
    e.feed(0.0, CC(64, 127))
    e.feed(0.1, ON(60))
    e.feed(0.2, OFF(60))          # sustained: channel 0 still busy
    out = e.feed(5.0, ON(61))
    assert out[-1].channel == 1   # not channel 0, although 60 was released long ago
    e.feed(5.1, OFF(61))
    e.feed(5.2, CC(64, 0))        # both channels start ringing now
    e.feed(5.5, ON(62))
    assert e.stats["ringing_retunes"] == 1   # nothing idle within 1 s of the pedal lifting


# ---------------------------------------------------------------------------
# stealing
# ---------------------------------------------------------------------------
def test_steal_oldest_held_with_note_off_first():
    e, s = started(distinct_tuning(), pool=(0, 1))
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.1, ON(61)))
    out = e.feed(0.2, ON(62))
    s.feed(out)
    assert out[0] == E.note_off(0, 60, 0)       # the oldest held note, released first
    assert out[-1].type == "note_on" and out[-1].channel == 0
    assert [m.type for m in out] == ["note_off", "pitchwheel", "note_on"]
    assert e.stats["steals"] == 1
    # the stolen note's own note-off later sends nothing
    assert e.feed(0.3, OFF(60)) == []
    s.feed(e.feed(0.4, OFF(61)) + e.feed(0.5, OFF(62)))
    assert s.count() == 0 and not s.problems


def test_steal_prefers_longest_released():
    e, s = started(distinct_tuning(), pool=(0, 1))
    s.feed(e.feed(0.0, ON(60)))                 # channel 0, held
    s.feed(e.feed(0.05, CC(64, 127)))
    s.feed(e.feed(0.1, ON(61)) + e.feed(0.2, OFF(61)))  # channel 1, released, pedal holds it
    out = e.feed(0.3, ON(62))
    s.feed(out)
    assert out[-1].channel == 1                 # the released note goes, not the older held one
    # the pedalled note is let go by lifting the pedal on that channel alone, then pressing it again
    assert [(m.type, getattr(m, "control", None), getattr(m, "value", None)) for m in out[:2]] == \
        [("control_change", 64, 0), ("control_change", 64, 127)]
    assert all(c != 1 or v.key == 62 for c, v in s.sounding())
    assert not s.problems


# ---------------------------------------------------------------------------
# note-offs follow their note-on
# ---------------------------------------------------------------------------
def test_repeated_presses_fifo_on_one_input_channel():
    e, s = started()
    s.feed(e.feed(0.0, ON(60)))
    s.feed(e.feed(0.1, ON(60)))     # pressed again without release (e.g. two keyboards merged)
    chans = [c for c, _ in s.sounding()]
    assert len(chans) == 2 and chans[0] != chans[1]   # never the same key twice on a channel
    out = e.feed(0.2, OFF(60))
    assert out == [E.note_off(chans[0], 60, 0)]       # first in, first out
    s.feed(out)
    s.feed(e.feed(0.3, OFF(60)))
    assert s.count() == 0 and not s.problems


@pytest.mark.parametrize("mode", ["pool", "mpe", "mts"])
def test_one_lost_note_off_costs_at_most_one_note(mode):
    """A note-off lost on the way (a full input queue, a loose cable): the key's next
    releases must not each end the press before, which would keep one note of that key
    sounding for good. The press that outlived a release of its key ends at the key's
    following release; from then on presses and releases pair up again."""
    e, s = started(mode=mode)
    s.feed(e.feed(0.0, ON(60)))
    # its note-off is lost; the player presses and releases the key again, three times
    for i in range(3):
        t = 1.0 + i
        s.feed(e.feed(t, ON(60)))
        s.feed(e.feed(t + 0.5, OFF(60)))
        assert s.count() <= 1, f"release {i + 1}: {s.count()} notes of a released key sound"
        if i >= 1:
            assert s.count() == 0, f"release {i + 1}: a note still sounds after the second release"
    assert e.sounding() == [] and not s.problems


def test_same_key_from_two_input_channels():
    e, s = started()
    s.feed(e.feed(0.0, ON(64, ch=0)) + e.feed(0.0, ON(64, ch=1)))
    s.feed(e.feed(0.1, OFF(64, ch=1)))
    assert s.count() == 1 and not s.problems
    s.feed(e.feed(0.2, OFF(64, ch=0)))
    assert s.count() == 0


def test_repeated_press_under_sustain_pedal():
    e, s = started()
    s.feed(e.feed(0.0, CC(64, 127)))
    for i in range(4):
        s.feed(e.feed(0.1 + i * 0.1, ON(60)) + e.feed(0.15 + i * 0.1, OFF(60)))
    assert s.count() == 4 and not s.problems   # all ring on under the pedal
    s.feed(e.feed(1.0, CC(64, 0)))
    assert s.count() == 0


def test_note_on_velocity_zero_is_a_note_off():
    e, s = started()
    s.feed(e.feed(0.0, ON(60)))
    s.feed(e.feed(0.1, ON(60, v=0)))
    assert s.count() == 0 and not s.problems


# ---------------------------------------------------------------------------
# pedals
# ---------------------------------------------------------------------------
def test_sustain_goes_to_every_pool_channel():
    e, s = started()
    out = e.feed(0.0, CC(64, 100))
    assert sorted(m.channel for m in out) == list(e.config.pool)
    assert all(m.control == 64 and m.value == 100 for m in out)


def test_sostenuto_keeps_only_notes_held_when_pressed():
    e, s = started(distinct_tuning(), pool=(0, 1, 2), release_time=0.0)
    s.feed(e.feed(0.0, ON(60)))
    s.feed(e.feed(0.1, CC(66, 127)))
    s.feed(e.feed(0.2, ON(61)))
    s.feed(e.feed(0.3, OFF(60)) + e.feed(0.3, OFF(61)))
    assert [v.key for _, v in s.sounding()] == [60]
    # the latched note's channel stays busy: a new note does not take it
    out = e.feed(0.4, ON(62))
    assert out[-1].channel != s.sounding()[0][0]
    s.feed(out)
    s.feed(e.feed(0.5, CC(66, 0)) + e.feed(0.6, OFF(62)))
    assert s.count() == 0 and not s.problems


# ---------------------------------------------------------------------------
# wheel, pressure, controllers, program change
# ---------------------------------------------------------------------------
def test_wheel_added_to_tuning_bend():
    tu = load_profile("meantone-quarter")
    e, s = started(tu)
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.0, ON(64)))
    s.feed(e.feed(0.1, WHEEL(4096)))   # half the wheel range: +100 cents at the default 2 semitones
    for c, v in s.sounding():
        assert abs(s.pitch(c, v) - (tu.cents[v.key] + 100.0)) <= 2 * half_step()
    s.feed(e.feed(0.2, WHEEL(0)))
    for c, v in s.sounding():
        assert abs(s.pitch(c, v) - tu.cents[v.key]) <= half_step()


def test_wheel_range_scaling_and_widening():
    tu = load_profile("meantone-quarter")
    e, s = started(tu, wheel_range=12.0)
    s.feed(e.feed(0.0, ON(64)))            # E: about -13.7 cents
    s.feed(e.feed(0.1, WHEEL(8191)))       # +12 semitones asked: beyond +-2, the range widens
    (c, v), = s.sounding()
    assert s.range[c] >= 1200.0 + 13.7     # announced with RPN 0 (the synth model reads it)
    assert abs(s.pitch(c, v) - (tu.cents[64] + 8191 / 8192 * 1200)) <= 2 * half_step(s.range[c])
    assert e.stats["wheel_clamps"] == 0 and e.stats["range_widenings"] == 1
    s.feed(e.feed(0.2, WHEEL(683)))        # 683/8192*1200 = 100.05 cents
    assert abs(s.pitch(c, v) - (tu.cents[64] + 683 / 8192 * 1200)) <= 2 * half_step(s.range[c])
    s.feed(e.feed(0.3, ON(60)))            # a later note is placed at the wider range
    for c, v in s.sounding():
        assert abs(s.pitch(c, v) - (tu.cents[v.key] + 683 / 8192 * 1200)) <= 2 * half_step(s.range[c])


def test_wheel_not_sent_to_idle_channels_and_not_twice():
    e, s = started(pool=(0, 1, 2), release_time=1.0)
    e.feed(0.0, ON(60))
    out = e.feed(0.1, WHEEL(1000))
    assert [m.channel for m in out] == [0]
    assert e.feed(0.2, WHEEL(1000)) == []   # no redundant bends


def test_input_rpn0_sets_wheel_range_and_is_not_forwarded():
    e, s = started()
    out = []
    for m in (CC(101, 0), CC(100, 0), CC(6, 12), CC(38, 0)):
        out += e.feed(0.0, m)
    assert not any(m.control in (6, 38) for m in out)
    assert e.inputs.range_of(0) == 1200.0


def test_pressure_cc_program_to_every_pool_channel():
    e, s = started()
    pool = sorted(e.config.pool)
    for m in (mido.Message("aftertouch", channel=0, value=50), CC(1, 70),
              mido.Message("program_change", channel=0, program=19)):
        out = e.feed(0.0, m)
        assert sorted(x.channel for x in out) == pool
        assert all(x.bytes()[1:] == m.bytes()[1:] for x in out)


def test_poly_pressure_to_the_notes_channel():
    cents = [100.0 * k for k in range(128)]
    cents[60] = 6350.0
    e, s = started(Tuning.from_cents("far", cents))
    on = e.feed(0.0, ON(60))
    out = e.feed(0.1, mido.Message("polytouch", channel=0, note=60, value=33))
    assert out == [E.msg("polytouch", channel=on[-1].channel, note=64, value=33)]


def test_all_notes_off_forwarded_and_honoured():
    e, s = started()
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.0, ON(62)))
    out = e.feed(0.1, CC(123, 0))
    s.feed(out)
    assert sorted(m.channel for m in out) == sorted(e.config.pool)
    assert s.count() == 0
    assert e.feed(0.2, OFF(60)) == []     # nothing left to release
    s.feed(e.feed(0.3, ON(60)) + e.feed(0.4, OFF(60)))
    assert s.count() == 0 and not s.problems


def test_all_notes_off_keeps_pedalled_notes_until_pedal_lifts():
    e, s = started()
    s.feed(e.feed(0.0, CC(64, 127)) + e.feed(0.0, ON(60)))
    s.feed(e.feed(0.1, CC(123, 0)))
    assert s.count() == 1 and len(e.sounding()) == 1
    s.feed(e.feed(0.2, CC(64, 0)))
    assert s.count() == 0 and e.sounding() == []


def test_all_sound_off_frees_channels_at_once():
    e, s = started(distinct_tuning(), pool=(0, 1), release_time=5.0)
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.0, ON(61)))
    s.feed(e.feed(0.1, CC(120, 0)))
    assert s.count() == 0 and e.sounding() == []
    e.feed(0.2, ON(62))
    assert e.stats["ringing_retunes"] == 0   # silenced channels do not ring


def test_reset_all_controllers_resends_tuning_bends():
    tu = load_profile("meantone-quarter")
    e, s = started(tu)
    s.feed(e.feed(0.0, CC(64, 127)) + e.feed(0.0, ON(61)) + e.feed(0.05, WHEEL(2000)))
    s.feed(e.feed(0.1, CC(121, 0)))
    (c, v), = s.sounding()
    assert abs(s.pitch(c, v) - tu.cents[61]) <= half_step()   # wheel reset, tuning kept
    s.feed(e.feed(0.2, OFF(61)))
    assert s.count() == 0 and not s.problems                   # pedal was reset too


def test_system_messages_pass_through():
    e, s = started()
    # (a GM System Off: not a reset, so nothing follows it; resets are in test_resets.py)
    for m in (mido.Message("sysex", data=[0x7E, 0x7F, 0x09, 0x02]), mido.Message("clock"),
              mido.Message("start"), mido.Message("songpos", pos=5)):
        assert e.feed(0.0, m) == [m]


def test_passthrough_channel_untouched():
    e, s = started()
    for m in (ON(36, ch=9), WHEEL(300, ch=9), CC(7, 90, ch=9), OFF(36, ch=9)):
        assert e.feed(0.0, m) == [m]


@pytest.mark.parametrize("mode", ["pool", "mpe", "mts"])
def test_passthrough_notes_are_released_by_panic_and_input_loss(mode):
    """Drums on a passthrough channel are the player's notes too: panic and a lost
    input end them with a note-off each (MIDI 1.0: 0x8n key), nothing stays stuck."""
    for end in ("release_all", "input_lost"):
        e, s = started(mode=mode)
        e.feed(0.0, ON(36, ch=9))
        e.feed(0.0, ON(42, ch=9))
        e.feed(0.1, OFF(42, ch=9))           # this one the player released
        out = getattr(e, end)(0.5)
        offs = [m.bytes() for m in out if m.type == "note_off" and m.channel == 9]
        assert offs == [[0x89, 36, 0]], (end, offs)
        assert [m for m in getattr(e, end)(0.6) if m.type == "note_off" and m.channel == 9] == []


def test_note_off_of_a_former_passthrough_note_reaches_the_synth():
    """A layout change that takes channel 10 into the pool leaves its drum notes
    sounding; the player's note-off for them still reaches the synth, on the channel
    and key the note-on went to."""
    e, s = started()
    assert e.feed(0.0, ON(36, ch=9)) == [ON(36, ch=9)]
    cfg = e.config.replace(passthrough=(), pool=tuple(range(16)))
    out = e.reconfigure(cfg, 0.1)
    assert not any(m.type == "note_off" and m.channel == 9 for m in out)
    off = e.feed(0.2, OFF(36, ch=9))
    assert [m.bytes() for m in off] == [[0x89, 36, 0]]
    # the channel is retuned now: its next note goes through the pool like any other
    s2 = e.feed(0.3, ON(36, ch=9))
    assert any(m.type == "note_on" and m.note == 36 for m in s2)
    assert e.feed(0.4, OFF(36, ch=9))[-1].type == "note_off"


# ---------------------------------------------------------------------------
# economy, synth correction
# ---------------------------------------------------------------------------
def test_no_redundant_bends():
    e, s = started()
    first = e.feed(0.0, ON(61))
    e.feed(0.1, OFF(61))
    assert e.feed(0.2, ON(61)) == [E.note_on(first[-1].channel, 61, 100)]
    # the bench's messages-per-note-on counts exactly what note-ons caused
    assert e.stats["note_on_messages"] == len(first) + 1 and e.stats["notes"] == 2


def test_bend_scale_correction():
    tu = load_profile("meantone-quarter")
    e, s = started(tu, bend_scale=127 / 128)
    out = e.feed(0.0, ON(61))
    bend = next(m for m in out if m.type == "pitchwheel").pitch
    played = bend / 8192 * 200.0 * 127 / 128        # what the synth plays at 127/128 of the size
    assert abs(61 * 100 + played - tu.cents[61]) <= half_step()
    assert bend != E.bend_value(tu.cents[61] - 6100, 200.0) - 8192
    assert abs(e.sounding()[0]["cents"] - tu.cents[61]) <= half_step()


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_bend_scale_applies_to_the_players_wheel_too(mode):
    """With a synth that plays bends at 127/128 of their size, a wheel moved a semitone up
    must still sound a semitone up: the engine scales the wheel's share too. Decoded as the
    synth plays it: key + bend/8192 * range * 127/128 (MIDI 1.0 bend, scaled)."""
    tu = load_profile("meantone-quarter")
    e, s = started(tu, bend_scale=127 / 128, mode=mode)
    out = e.feed(0.0, ON(61))
    out += e.feed(0.1, WHEEL(4096))         # half way up: +1 semitone at the default wheel range 2
    last = {}
    for m in out:
        if m.type == "pitchwheel":
            last[m.channel] = m.pitch
    rng = e.bend_range_cents
    if mode == "pool":
        note_ch = next(m.channel for m in out if m.type == "note_on")
        played = last[note_ch] / 8192 * rng * 127 / 128
    else:  # MPE: the note's member bend plus the manager's (zone-wide) bend, each at its range
        note_ch = next(m.channel for m in out if m.type == "note_on")
        played = last.get(note_ch, 0) / 8192 * rng * 127 / 128 + last.get(0, 0) / 8192 * 200.0 * 127 / 128
    want = tu.cents[61] + 100.0 - 6100
    assert abs(played - want) <= 2 * (rng / 16384 + 200.0 / 16384)


def test_whole_semitone_range():
    e = Engine(Tuning.equal12(), EngineConfig(bend_range=2.4, whole_semitone_range=True))
    out = e.start(0.0)
    assert not any(m.type == "control_change" and m.control == 38 for m in out)
    assert e.bend_range_cents == 200.0


# ---------------------------------------------------------------------------
# switching, endings
# ---------------------------------------------------------------------------
def test_set_tuning_keeps_sounding_notes_and_tunes_new_ones():
    a, b = load_profile("meantone-quarter"), load_profile("werckmeister-3")
    e, s = started(a)
    s.feed(e.feed(0.0, ON(64)))
    (c, v), = s.sounding()
    s.feed(e.set_tuning(b, 0.1))
    assert abs(s.pitch(c, v) - a.cents[64]) <= half_step()
    s.feed(e.feed(0.2, ON(68)))
    (c2, v2), = s.last_on
    assert abs(s.pitch(c2, v2) - b.cents[68]) <= half_step()
    assert abs(s.pitch(c, v) - a.cents[64]) <= half_step()


def test_release_all():
    e, s = started()
    s.feed(e.feed(0.0, CC(64, 127)) + e.feed(0.0, ON(60)) + e.feed(0.0, ON(61)) + e.feed(0.1, OFF(61)))
    out = e.release_all(0.2)
    s.feed(out)
    assert s.count() == 0 and not s.problems
    assert [m.type for m in out[:1]] == ["note_off"]
    for c in e.config.pool:
        mine = [m for m in out if m.channel == c and m.type != "note_off"]
        assert [(m.type, getattr(m, "control", None)) for m in mine][-2:] == \
            [("control_change", 123), ("pitchwheel", None)]
        assert s.bend[c] == 0
    assert e.sounding() == []


def test_input_lost_releases_held_notes_pedal_and_wheel():
    tu = load_profile("meantone-quarter")
    e, s = started(tu)
    out = e.feed(0.0, CC(64, 127)) + e.feed(0.0, ON(60))
    c = out[-1].channel
    s.feed(out + e.feed(0.0, WHEEL(3000)))
    s.feed(e.input_lost(0.1))
    assert s.count() == 0 and not s.problems
    assert not any(s.sustain)
    assert s.bend[c] == E.bend_value(tu.deviation(60), 200.0) - 8192   # wheel centred again


def test_output_lost_then_start_again():
    e, s = started(distinct_tuning(), pool=(0, 1))
    e.feed(0.0, ON(60))
    e.feed(0.01, ON(62))
    e.feed(0.02, OFF(62))        # channel 1 rings
    e.output_lost(0.1)
    assert e.sounding() == []
    s2 = SynthModel()
    s2.feed(e.start(0.2))
    assert e.feed(0.3, OFF(60)) == []        # the note went with the device
    s2.feed(e.feed(0.4, ON(61)) + e.feed(0.41, ON(63)) + e.feed(0.5, OFF(61)) + e.feed(0.5, OFF(63)))
    assert s2.count() == 0 and not s2.problems
    assert e.stats["ringing_retunes"] == 0      # nothing rings on the new device


def test_deterministic():
    import random
    rng = random.Random(5)
    ev = []
    t = 0.0
    held = []
    for _ in range(500):
        t += rng.random() * 0.05
        if held and rng.random() < 0.45:
            ev.append((t, OFF(held.pop(rng.randrange(len(held))))))
        else:
            k = rng.randrange(40, 90)
            held.append(k)
            ev.append((t, ON(k)))
    outs = []
    for _ in range(2):
        e = Engine(load_profile("werckmeister-3"), EngineConfig(pool=(0, 1, 2, 3, 4)))
        o = [m.bytes() for m in e.start(0.0)]
        for tt, m in ev:
            o += [x.bytes() for x in e.feed(tt, m)]
        outs.append(o)
    assert outs[0] == outs[1]


def test_human_timing_spread_chord_with_pedal_and_wheel():
    """A chord arriving over 40 ms, pedal changes and wheel moves while it sounds."""
    tu = load_profile("meantone-quarter")
    e, s = started(tu)
    ev = [(0.000, ON(48)), (0.013, ON(55)), (0.027, ON(64)), (0.041, ON(72)),
          (0.050, CC(64, 127)), (0.200, WHEEL(1500)), (0.230, WHEEL(3100)), (0.300, OFF(48)),
          (0.310, OFF(55)), (0.330, WHEEL(0)), (0.400, ON(50)), (0.412, ON(57)), (0.431, ON(65)),
          (0.500, CC(64, 0)), (0.520, CC(64, 127)), (0.800, WHEEL(-4000)), (0.900, WHEEL(0))]
    for t, m in ev:
        s.feed(e.feed(t, m))
        if e.inputs.wheel.get(0, 0) == 0:
            for c, v in s.sounding():
                assert abs(s.pitch(c, v) - tu.cents[v.key]) <= half_step(), (t, m)
    for t, m in [(1.0, OFF(64)), (1.0, OFF(72)), (1.1, OFF(50)), (1.1, OFF(57)), (1.2, OFF(65)), (1.3, CC(64, 0))]:
        s.feed(e.feed(t, m))
    assert s.count() == 0 and not s.problems
    assert e.stats["ringing_retunes"] == 0 and e.stats["steals"] == 0


def test_reconfigure_new_pool_releases_and_starts_again():
    e, s = started()
    s.feed(e.feed(0.0, ON(60)))
    out = e.reconfigure(e.config.replace(pool=(0, 1, 2)), 0.1)
    s.feed(out)
    assert s.count() == 0 and not s.problems
    assert {m.channel for m in out if m.type == "control_change" and m.control == 6} >= {0, 1, 2}
    assert e.feed(0.2, OFF(60)) == []
    assert e.feed(0.3, ON(62))[-1].channel in (0, 1, 2)
    assert e.reconfigure(e.config.replace(), 0.4) == []     # nothing changed: nothing sent


def test_system_reset_passes_and_setup_is_sent_again():
    tu = load_profile("meantone-quarter")
    e, s = started(tu, bend_range=12.0)
    e.feed(0.0, ON(61))
    out = e.feed(0.1, mido.Message("reset"))
    assert out[0] == mido.Message("reset")
    assert e.sounding() == []
    s2 = SynthModel()          # the synth after its reset
    s2.feed(out[1:])
    assert all(s2.range[c] == 1200.0 for c in e.config.pool)   # announced again
    assert e.feed(0.2, OFF(61)) == []
    s2.feed(e.feed(0.3, ON(61)))
    (c, v), = s2.last_on
    assert abs(s2.pitch(c, v) - tu.cents[61]) <= half_step(1200.0)


def test_mode_messages_become_all_notes_off():
    # MIDI 1.0 Detailed Specification: CC124-127 (omni off/on, mono, poly) also turn all notes off
    e, s = started()
    s.feed(e.feed(0.0, ON(60)))
    out = e.feed(0.1, CC(126, 1))        # mono on: must not reach the pool channels
    s.feed(out)
    assert {(m.control, m.value) for m in out} == {(123, 0)}
    assert s.count() == 0 and e.sounding() == []


def test_steal_keeps_note_off_pairing_for_repeated_presses():
    """Two presses of one key (merged inputs), the second steals the first: the first
    note-off belongs to the first press (first in, first out) and sends nothing; the
    second note sounds until the second note-off."""
    e, s = started(distinct_tuning(), pool=(0,))
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.1, ON(60)))
    assert e.stats["steals"] == 1 and s.count() == 1
    assert e.feed(0.2, OFF(60)) == []
    assert s.count() == 1
    s.feed(e.feed(0.3, OFF(60)))
    assert s.count() == 0 and not s.problems
