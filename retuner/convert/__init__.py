"""MIDI files through the engine: :mod:`.arrange` (parts onto output channels),
:mod:`.conversion` (one file, on the file's own clock) and :mod:`.batch` (a folder, in worker
processes). Reading and writing the files themselves is :mod:`retuner.smf`."""
