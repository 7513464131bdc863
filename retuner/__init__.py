"""retuner: give every MIDI note the exact pitch of a tuning, live or in files."""

__version__ = "0.1.0"
