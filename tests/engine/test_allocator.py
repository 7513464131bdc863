"""The channel pool's choice rules, directly (see retuner/allocator.py)."""

from retuner.engine.allocator import IDLE, RINGING, SAME_BEND, SHARE, STEAL, Note, Pool


def note(key, t, down=True):
    n = Note(0, key, 100, t, 0)
    n.out_key = key
    n.down = down
    if not down:
        n.t_off = t + 0.1
    return n


def place(pool, c, n, bend, t):
    pool.bend[c] = bend
    n.out_ch = c
    pool.add(c, n, t)


def test_share_same_bend_unless_same_key_held():
    p = Pool([0, 1, 2], release_time=2.0)
    place(p, 0, note(60, 0.0), 9000, 0.0)
    assert p.choose(9000, 72, 1.0, share=True) == (0, SHARE)
    assert p.choose(9000, 60, 1.0, share=True)[1] != SHARE   # key 60 already held there
    assert p.choose(9000, 72, 1.0, share=False)[1] != SHARE


def test_share_allowed_over_released_note_of_same_key():
    p = Pool([0, 1], release_time=2.0)
    place(p, 0, note(60, 0.0, down=False), 9000, 0.0)   # held only by a pedal
    assert p.choose(9000, 60, 1.0, share=True) == (0, SHARE)


def test_same_bend_then_idle_then_ringing():
    p = Pool([0, 1, 2], release_time=2.0)
    p.bend.update({0: 8000, 1: 8100, 2: 8200})
    p.last_off.update({0: 9.5, 1: 5.0, 2: 9.0})
    assert p.choose(8200, 60, 10.0, share=True) == (2, SAME_BEND)   # ringing but already right
    assert p.choose(7000, 60, 10.0, share=True) == (1, IDLE)        # silent 5 s: idle
    p.last_off[1] = 9.8
    assert p.choose(7000, 60, 10.0, share=True) == (2, RINGING)     # all ring: silent longest (9.0)


def test_same_bend_prefers_most_recently_used():
    p = Pool([0, 1, 2], release_time=2.0)
    p.bend.update({0: 8000, 1: 8000, 2: 8000})
    p.last_off.update({0: 3.0, 1: 1.0, 2: 2.0})
    assert p.choose(8000, 60, 10.0, share=True) == (0, SAME_BEND)


def test_idle_beats_ringing_with_right_bend_absent():
    p = Pool([0, 1], release_time=2.0)
    p.bend.update({0: 8000, 1: 8100})
    p.last_off.update({0: 9.9, 1: 7.9})
    assert p.choose(7000, 60, 10.0, share=True) == (1, IDLE)


def test_steal_longest_released_then_oldest_held():
    p = Pool([0, 1, 2], release_time=2.0)
    place(p, 0, note(60, 0.0), 8000, 0.0)                 # oldest held
    place(p, 1, note(61, 1.0, down=False), 8100, 1.0)     # released at 1.1 (pedal holds it)
    place(p, 2, note(62, 2.0, down=False), 8200, 2.0)     # released at 2.1
    assert p.choose(7000, 70, 3.0, share=True) == (1, STEAL)
    p.notes[1][0].down = True
    p.notes[2][0].down = True
    assert p.choose(7000, 70, 3.0, share=True) == (0, STEAL)


def test_remove_marks_channel_silent():
    p = Pool([0], release_time=2.0)
    n = note(60, 0.0)
    place(p, 0, n, 8000, 0.0)
    assert not p.is_ringing(0, 0.5)
    p.remove(n, 1.0)
    assert p.is_ringing(0, 2.9) and not p.is_ringing(0, 3.0)
