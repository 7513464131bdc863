"""Profiles: one tuning per YAML file. Find, load, check, write.

A profile defines one period of a scale in one of three forms (equal, scale, temperament: see
forms.py), may place it on the keyboard (layout: see layout.py) and names which key sounds at
which frequency (concert_pitch, default A4 = 440 Hz)::

    id: meantone-quarter          # required: lower-case letters, digits, '-'
    description: one line         # required
    source: where the definition is published
    temperament: {start: Eb, fifths: -1/4 syntonic}
    concert_pitch: A4 = 440 Hz

Intervals carry their kind: ratios with a slash (``5/4``, ``2/1``), cents with the word
(``386.314 cents``); a bare number is refused (values.py). This module gathers the parts:
reading YAML with lines (document.py), the values, the forms, the layout, the store (store.py)
and writing (dump.py).
"""

from retuner.profiles.document import load_yaml
from retuner.profiles.dump import dump_profile
from retuner.profiles.parse import parse_profile
from retuner.profiles.store import ProfileInfo, builtin_dir, list_profiles, load_profile, user_profile_dirs

__all__ = ["load_yaml", "dump_profile", "parse_profile", "ProfileInfo", "builtin_dir", "list_profiles",
           "load_profile", "user_profile_dirs"]
