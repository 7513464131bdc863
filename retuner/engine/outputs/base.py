"""What an output mode decides: the protocol between the engine and its output.

The engine (:mod:`retuner.engine.core`) keeps what the player does (press queues,
pedals, wheel, the input's RPN selection), the chord window and the adaptive
solver. Everything that depends on *how* pitches reach the synth belongs to the
output mode: the set-up messages, which input channels form one pedal and
controller domain, where a note sounds and how it is retuned, where controllers,
the wheel, pressure and program changes go, steals, what panic sends per channel,
the pitch a note sounds at, reconfiguration, and (for file conversion) the
channels a part needs.

A mode is a subclass of :class:`OutputMode` with a settings class of its own
(built from the user-facing :class:`~retuner.engine.config.EngineConfig` fields)
and one entry in the table :data:`retuner.engine.outputs.MODES`; the command
line's ``--mode`` choices, config validation and file conversion read that
table. Messages are appended to the ``out`` list the engine passes in; the
counters in ``stats`` (``note_ons_out``, ``bends_sent``, ``steals``,
``ringing_retunes``) are the mode's to keep.
"""

from __future__ import annotations

import abc
from typing import Any, ClassVar, Optional, Sequence

import mido

from retuner.midi import encode as E
from retuner.engine.allocator import Note, NoteTable
from retuner.errors import RetunerError


def effective_range(semitones: float, whole_semitones: bool) -> float:
    """The bend range in cents as the synth will get it (RPN 0: semitones and cents,
    or whole semitones only for synths that ignore the cents part)."""
    if whole_semitones:
        return float(round(semitones)) * 100.0
    semis, cents = E.split_range(semitones * 100.0)
    return semis * 100.0 + cents


def config_error(msg: str, field: str) -> RetunerError:
    return RetunerError(msg, field=field)


class OutputMode(abc.ABC):
    """One way of making the synth sound the pitches (see the module docstring).

    The abstract methods are what every mode must decide; the others have the
    behaviour most modes want.

    ``inputs`` is the engine's :class:`~retuner.engine.inputs.InputState`: a mode
    reads the pedals and the wheel of a domain from it, never writes it.
    """

    #: the name in ``EngineConfig.mode``, ``--mode`` and the config file
    name: ClassVar[str] = ""
    #: one line for ``--help``
    summary: ClassVar[str] = ""
    #: a note's pitch is the bend of an output channel it has to itself (or shares with
    #: notes of the same bend); False: the synth's key table is tuned instead
    per_note_bend: ClassVar[bool] = True
    #: notes sound on their own input channel: each input channel is a pedal and controller
    #: domain of its own, channel mode messages pass as they are, and a file's parts never
    #: need output channels of their own
    keeps_input_channels: ClassVar[bool] = False
    #: the input's data entry for the RPNs the engine manages (RPN 0 sets the assumed wheel
    #: range) is taken by the engine instead of reaching the synth
    takes_input_rpn: ClassVar[bool] = True
    #: a file's parts each get a zone of their own (two per output file)
    zone_per_part: ClassVar[bool] = False
    #: the EngineConfig field that ``--bend-range`` sets in this mode
    bend_range_field: ClassVar[str] = "bend_range"
    #: a changed bend range (and the other light settings) is applied to sounding notes;
    #: False: any change of settings releases everything and starts again
    reconfigures_lightly: ClassVar[bool] = True

    # ---------------------------------------------------------------- the table's side
    @classmethod
    def check(cls, config: Any) -> None:
        """Raise a RetunerError (with the config field) for settings this mode cannot use."""

    @classmethod
    @abc.abstractmethod
    def part_channels(cls, config: Any) -> list[int]:
        """The output channels a file part converted with ``config`` may use."""

    @classmethod
    def channels_of_part(cls, config: Any, part: int) -> list[int]:
        """The output channels the notes of input channel ``part`` use with ``config`` (its
        share when the parts of a file are tuned together, else :meth:`part_channels`)."""
        return list(dict(config.parts).get(part, ())) or cls.part_channels(config)

    @classmethod
    def without_passthrough(cls, config: Any) -> Any:
        """``config`` for a file with no events on the passthrough channels (the same
        object when nothing changes)."""
        return config

    # ---------------------------------------------------------------- the engine's side
    def __init__(self, config: Any, inputs: Any, stats: dict):
        self.inputs = inputs
        self.stats = stats
        self.table: NoteTable = NoteTable(())
        self.range_cents = 0.0

    def domain(self, ch: int) -> int:
        """The pedal and controller domain of input channel ``ch``."""
        return ch if self.keeps_input_channels else 0

    @abc.abstractmethod
    def place(self, cents: float, key: int) -> tuple[int, int]:
        """Output key and tuning bend for a pitch asked for by ``key``."""

    @abc.abstractmethod
    def setup(self, t: float, tuning: Any) -> list[mido.Message]:
        """The set-up messages (bend ranges, zone configuration, tuning selection and key table)."""

    @abc.abstractmethod
    def zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        """A domain-wide message (pedal, controller, pressure, program change) where it goes."""

    @abc.abstractmethod
    def channel_mode(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        """A channel mode message (all-notes-off and the like) on every channel of ``dom``."""

    @abc.abstractmethod
    def all_channels(self) -> list[int]:
        """Every output channel the mode uses (panic reaches each)."""

    @abc.abstractmethod
    def sound(self, t: float, note: Note, out: list) -> None:
        """Sound ``note`` at its planned pitch (``note.out_key``, ``note.bend``, ``note.cents``)."""

    @abc.abstractmethod
    def sound_solved(self, t: float, held: Sequence[Note], held_cents: Sequence[float],
                     new: Sequence[Note], new_cents: Sequence[float], out: list) -> None:
        """Adaptive mode: move the held notes to ``held_cents`` (where possible), then sound
        the new notes at ``new_cents``."""

    def movable(self, note: Note) -> bool:
        """Whether a sounding note can be retuned alone (adaptive mode moves it)."""
        return True

    @abc.abstractmethod
    def note_off(self, note: Note, msg: mido.Message) -> mido.Message:
        """The player's note-off ``msg`` for ``note``, as the synth must get it."""

    @abc.abstractmethod
    def poly_pressure(self, msg: mido.Message, note: Optional[Note]) -> list[mido.Message]:
        """Polyphonic pressure ``msg``; ``note`` is the sounding press of its key (or None)."""

    @abc.abstractmethod
    def wheel(self, t: float, dom: int, msg: mido.Message, out: list) -> None:
        """The player's wheel of ``dom`` moved (already stored in ``inputs.wheel``)."""

    def wheel_changed(self) -> None:
        """The wheel or its assumed range changed outside :meth:`wheel`: take note, send nothing."""

    def controllers_reset(self, t: float, out: list) -> None:
        """Reset-all-controllers reached the output: the wheel is centred."""

    def wheel_channels(self, channels: Sequence[int]) -> list[int]:
        """The output channels a part's wheel is sent on, given the ``channels`` its notes use
        (for the measures, which take the wheel off as the output carries it)."""
        return list(channels)

    def retuned(self, tuning: Any, sounding: Sequence[Note]) -> list[mido.Message]:
        """A new tuning is in force; ``sounding`` keep their pitch."""
        return []

    def reconfigure(self, config: Any, old: Any, t: float, out: list) -> None:
        """Apply the light settings of ``config`` to what sounds (only called when
        :attr:`reconfigures_lightly`; otherwise the engine releases everything and
        builds the mode again)."""
        raise NotImplementedError(f"the {self.name} mode is set up again on any change of settings")

    def released(self) -> None:
        """Panic sent all-notes-off and a centred bend on every channel of :meth:`all_channels`."""

    def output_lost(self) -> None:
        """The output went away: forget what was sent."""

    def why_steals(self, config: Any, shares_port: bool = False) -> str:
        """Why notes were cut short by steals with ``config`` (the settings in force) and what
        would avoid it, for the one line that explains a steal count above 0 (see
        :func:`explain_steals`). ``shares_port``: the file converter gave this engine's
        channels a share of a port that other parts use too."""
        return "more notes sounded at once than the output could hold; to avoid it: fewer notes at once"

    @abc.abstractmethod
    def sounding_cents(self, note: Note) -> float:
        """The pitch ``note`` sounds at, cents above key 0 of 12-EDO (the player's wheel not included)."""


def explain_steals(count: int, why: str) -> str:
    """The one line that counts the notes cut short by steals and says why (``why``: an output
    mode's :meth:`OutputMode.why_steals`); empty when ``count`` is 0."""
    if not count:
        return ""
    return f"{count} note{'s' if count != 1 else ''} cut short by steals: {why}"
