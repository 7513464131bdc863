"""Models of what a synth does with the messages it hears, written from the standards, not from
retuner's code.

:class:`SynthModel`: a General MIDI synth, written from the MIDI 1.0 Detailed Specification
(pitch bend 14-bit centred on 8192 and scaled by the RPN 0 pitch bend sensitivity; note-off
releases the note of that key on that channel; sustain (CC64) holds released notes until
lifted; sostenuto (CC66) holds the notes that were down when it was pressed; all-notes-off
(CC123) acts like a note-off for every note, all-sound-off (CC120) silences at once;
reset-all-controllers (CC121) centres the bend and lifts the pedals, as recommended by the
MMA's RP-015 (from memory)). It decodes each sounding note's pitch as key*100 +
bend/8192*range cents, independently of the engine. It also keeps each channel's instrument
as a GM synth does: the program (with the bank selected by CC0/CC32 before it: a bank select
takes effect at the next program change, GM2) each note starts with, and the channel's
controllers (volume 7, default 100; pan 10, default 64; expression 11, default 127; the rest
default 0: GM2 defaults, from memory; RP-015 resets modulation to 0 and expression to 127).
A GM System On (F0 7E <device> 09 01 F7, General MIDI System Level 1; GM2 System On ends
09 03, General MIDI 2; bytes from memory) puts the synth back at its power-up state: every
note silenced, bend range 2 semitones, wheel centred, pedals up, RPN null, programs 0,
controllers at their defaults, no MPE zone. A set-up sent before it is lost.

MPE (MPE specification, The MIDI Association, 2018): given ``mpe_manager``, every other channel
is a member of that manager's zone. With ``zones=True`` the model learns the zones from the MPE
Configuration Message instead, as an MPE synth does: RPN 6 on channel 1 with data entry N makes
a lower zone (manager 1, members 2..N+1), on channel 16 an upper zone (manager 16, members
15..16-N), N = 0 turns the zone off, a zone configured later takes the channels it overlaps from
the other, and the message sets the members' pitch bend range to 48 semitones and the manager's
to 2 (from memory). A member's note then sounds with its zone manager's program (messages on the
manager channel apply to the whole zone), the manager's bend and pedals.

:class:`MtsSynth`: a synth's key table under the MIDI Tuning Standard.
"""

from __future__ import annotations

import mido

from mtsdecode import parse_single_note


CONTROLLER_DEFAULTS = {7: 100, 10: 64, 11: 127}


class Voice:
    __slots__ = ("key", "down", "sost", "tag", "velocity", "program")

    def __init__(self, key, tag=None, velocity=0, program=(0, 0, 0)):
        self.key, self.down, self.sost, self.tag = key, True, False, tag
        self.velocity = velocity
        self.program = program        # (bank MSB, bank LSB, program) it started with


class SynthModel:
    """What a synth does with a stream of messages (see the module docstring)."""

    def __init__(self, mpe_manager=None, zones=False):
        self.zones = zones
        self.mpe_manager = mpe_manager
        self.messages = 0
        self.problems: list[str] = []
        self.power_up()

    def power_up(self):
        """The state after power-up or a GM System On."""
        self.manager_of: list = [None] * 16     # zones=True: each channel's zone manager
        self.bend = [0] * 16                   # signed, as mido's 'pitch'
        self.range = [200.0] * 16              # cents; MIDI 1.0 default sensitivity: 2 semitones
        self.rpn = [(127, 127)] * 16
        self.sustain = [False] * 16
        self.sostenuto = [False] * 16
        self.voices: list[list[Voice]] = [[] for _ in range(16)]
        self.last_on: list[tuple[int, Voice]] = []   # voices started by the last feed
        self.program = [(0, 0, 0)] * 16        # (bank MSB, bank LSB, program) in force
        self.bank = [(0, 0)] * 16              # bank selected (for the next program change)
        self.controllers = [dict() for _ in range(16)]

    def controller(self, c, number):
        """Channel ``c``'s controller ``number`` as the synth has it."""
        return self.controllers[c].get(number, CONTROLLER_DEFAULTS.get(number, 0))

    def feed(self, msgs, tag=None):
        self.last_on = []
        for m in msgs:
            self.one(m, tag)

    def one(self, m, tag=None):
        self.messages += 1
        # every message must be valid MIDI: its bytes re-parse to the same message
        if mido.Message.from_bytes(m.bytes()) != m:
            self.problems.append(f"invalid {m}")
        if m.type == "sysex" and len(m.data) == 4 and m.data[0] == 0x7E and m.data[2:] in ((0x09, 0x01), (0x09, 0x03)):
            self.power_up()
            return
        if not hasattr(m, "channel"):
            return
        c = m.channel
        if m.type == "note_on" and m.velocity > 0:
            for v in self.voices[c]:
                if v.key == m.note and v.down:
                    self.problems.append(f"key {m.note} struck twice on channel {c}")
            mgr = self._manager(c)
            v = Voice(m.note, tag, m.velocity,
                      self.program[mgr] if self.zones and mgr is not None and mgr != c else self.program[c])
            self.voices[c].append(v)
            self.last_on.append((c, v))
        elif m.type in ("note_on", "note_off"):
            down = [v for v in self.voices[c] if v.key == m.note and v.down]
            if not down:
                self.problems.append(f"note-off for silent key {m.note} on channel {c}")
                return
            self._release(c, down[0])
        elif m.type == "pitchwheel":
            self.bend[c] = m.pitch
        elif m.type == "program_change":
            self.program[c] = self.bank[c] + (m.program,)
        elif m.type == "control_change":
            cc, val = m.control, m.value
            if cc == 0:
                self.bank[c] = (val, self.bank[c][1])
            elif cc == 32:
                self.bank[c] = (self.bank[c][0], val)
            if cc < 64 and cc not in (6, 38) or 70 <= cc < 96:
                self.controllers[c][cc] = val
            if cc == 101:
                self.rpn[c] = (val, self.rpn[c][1])
            elif cc == 100:
                self.rpn[c] = (self.rpn[c][0], val)
            elif cc == 6 and self.rpn[c] == (0, 6) and self.zones and c in (0, 15):
                self._configure_zone(c, val)
            elif cc == 6 and self.rpn[c] == (0, 0):
                self.range[c] = val * 100.0 + self.range[c] % 100
            elif cc == 38 and self.rpn[c] == (0, 0):
                self.range[c] = (self.range[c] // 100) * 100 + val
            elif cc == 64:
                self.sustain[c] = val >= 64
                self._pedal_changed()
            elif cc == 66:
                on = val >= 64
                if on and not self.sostenuto[c]:
                    chans = [ch for ch in range(16) if self._manager(ch) == c] if self._manager(c) == c else [c]
                    for ch in chans:
                        for v in self.voices[ch]:
                            if v.down:
                                v.sost = True
                self.sostenuto[c] = on
                self._pedal_changed()
            elif cc == 120:
                self.voices[c] = []
            elif cc in (123, 124, 125, 126, 127):
                for v in list(self.voices[c]):
                    if v.down:
                        self._release(c, v)
            elif cc == 121:
                self.controllers[c][1] = 0
                self.controllers[c][11] = 127
                self.bend[c] = 0
                self.sustain[c] = False
                self.sostenuto[c] = False
                self.voices[c] = [v for v in self.voices[c] if v.down]
                for v in self.voices[c]:
                    v.sost = False
                self.rpn[c] = (127, 127)

    def _manager(self, c):
        """The manager of channel ``c``'s zone (None: no zone)."""
        if self.mpe_manager is not None:
            return self.mpe_manager
        return self.manager_of[c] if self.zones else None

    def _configure_zone(self, manager, n):
        """The MPE Configuration Message on ``manager`` (0 or 15) with ``n`` members."""
        for ch in range(16):
            if self.manager_of[ch] == manager:
                self.manager_of[ch] = None
        if n:
            members = range(1, 1 + n) if manager == 0 else range(14, 14 - n, -1)
            for ch in members:
                self.manager_of[ch] = manager
                self.range[ch] = 4800.0
            self.manager_of[manager] = manager
            self.range[manager] = 200.0

    def _pedals(self, c):
        """(sustain, sostenuto) acting on channel c. MPE specification (The MIDI
        Association, 2018): pedals on the manager channel act on the whole zone."""
        m = self._manager(c)
        if m is not None and c != m:
            return self.sustain[c] or self.sustain[m], self.sostenuto[c] or self.sostenuto[m]
        return self.sustain[c], self.sostenuto[c]

    def _release(self, c, v):
        v.down = False
        sus, sost = self._pedals(c)
        if not (sus or (v.sost and sost)):
            self.voices[c].remove(v)

    def _pedal_changed(self):
        for c in range(16):
            sus, sost = self._pedals(c)
            self.voices[c] = [v for v in self.voices[c] if v.down or sus or (v.sost and sost)]
            if not sost:
                for v in self.voices[c]:
                    v.sost = False

    def pitch(self, c, v) -> float:
        p = v.key * 100.0 + self.bend[c] / 8192.0 * self.range[c]
        m = self._manager(c)
        if m is not None and (self.mpe_manager is not None or m != c):
            p += self.bend[m] / 8192.0 * self.range[m]
        return p

    def sounding(self):
        return [(c, v) for c in range(16) for v in self.voices[c]]

    def count(self):
        return sum(len(v) for v in self.voices)


class MtsSynth:
    """A synth's key table under the MIDI Tuning Standard, from single note tuning
    changes (layout per the MTS, see mtsdecode.parse_single_note), plus
    which keys sound on which channel."""

    def __init__(self):
        self.table = [100.0 * k for k in range(128)]   # 12-EDO until told otherwise
        self.sounding: dict[tuple[int, int], int] = {}
        self.problems: list[str] = []

    def feed(self, msgs, check=None):
        for m in msgs:
            if mido.Message.from_bytes(m.bytes()) != m:
                self.problems.append(f"invalid {m}")
            if m.type == "sysex":
                for k, c in parse_single_note(m)["keys"].items():
                    self.table[k] = c
            elif m.type == "note_on" and m.velocity:
                self.sounding[(m.channel, m.note)] = self.sounding.get((m.channel, m.note), 0) + 1
                if check:
                    check(m, self.table[m.note])
            elif m.type in ("note_on", "note_off"):
                n = self.sounding.get((m.channel, m.note), 0)
                if not n:
                    self.problems.append(f"note-off for silent {m}")
                elif n == 1:
                    del self.sounding[(m.channel, m.note)]
                else:
                    self.sounding[(m.channel, m.note)] = n - 1
