"""Profile files: loading, user folders, and one clear line for every malformed profile."""

import json
import subprocess
import sys
import textwrap

import pytest

from retuner.errors import RetunerError
from retuner.profiles.profile import builtin_dir, list_profiles, load_profile, parse_profile

BUILTIN_IDS = {"edo12", "pythagorean", "just-5limit", "just-7limit", "meantone-quarter", "meantone-sixth",
               "werckmeister-3", "kirnberger-3", "vallotti", "young-2", "edo19", "edo31", "edo53",
               "bohlen-pierce"}


def run_cli(*args, env=None):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True, env=env)


def test_builtin_ids_exact_and_described():
    infos = list_profiles()
    assert {p.id for p in infos} >= BUILTIN_IDS
    for p in infos:
        assert p.path.stem == p.id, "file name and id agree"
        assert p.description and "\n" not in p.description
        assert p.source, f"{p.id} names its published source"


GOOD = """\
id: test-scale
description: a test
scale: {degrees: [9/8, 5/4], period: 2/1}
"""

# (profile text, expected line, expected field fragment)
BAD = [
    ("id: x\ndescription: d\nscale: {degrees: [9/8, 5/4\n", None, None),                 # bad YAML
    ("- a\n- b\n", 1, None),                                                               # not a mapping
    ("id: x\ndescription: d\ncolour: red\nequal: {steps: 12}\n", 3, "colour"),             # unknown field
    ("description: d\nequal: {steps: 12}\n", 1, "id"),                                    # missing id
    ("id: x\nequal: {steps: 12}\n", 1, "description"),                                    # missing description
    ("id: Bad_Id\ndescription: d\nequal: {steps: 12}\n", 1, "id"),                        # bad id
    ("id: x\ndescription: d\n", 1, "equal/scale/temperament"),                              # no kind
    ("id: x\ndescription: d\nequal: {steps: 12}\nscale: {degrees: [3/2]}\n", 1, "equal/scale/temperament"),
    ("id: x\ndescription: d\nequal: {steps: 0}\n", 3, "equal.steps"),                     # zero steps
    ("id: x\ndescription: d\nequal: {steps: twelve}\n", 3, "equal.steps"),                # wrong type
    ("id: x\ndescription: d\nequal: {steps: 12, period: 1/1}\n", 3, "equal.period"),      # period <= 1/1
    ("id: x\ndescription: d\nequal: {steps: 12, period: 1/2}\n", 3, "equal.period"),      # period < 1/1
    ("id: x\ndescription: d\nscale: {degrees: [0/4, 5/4]}\n", 3, "scale.degrees[0]"),     # ratio <= 0
    ("id: x\ndescription: d\nscale: {degrees: [5/4, 9/8]}\n", 3, "scale.degrees[1]"),     # not increasing
    ("id: x\ndescription: d\nscale: {degrees: [5/4, 5/4]}\n", 3, "scale.degrees[1]"),     # repeated degree
    ("id: x\ndescription: d\nscale: {degrees: [5/4, 2/1]}\n", 3, "scale.degrees[1]"),     # degree at period
    ("id: x\ndescription: d\nscale: {degrees: [5/4, 3/0]}\n", 3, "scale.degrees[1]"),     # zero denominator
    ("id: x\ndescription: d\nscale: {degrees: []}\n", 3, "scale.degrees"),                # empty
    ("id: x\ndescription: d\nscale: {degrees: [5/4, hello]}\n", 3, "scale.degrees[1]"),   # not a ratio
    ("id: x\ndescription: d\ntemperament: {start: Eb, fifths: -1/4 wolfish}\n", 3, "temperament.fifths"),  # unknown comma
    ("id: x\ndescription: d\ntemperament: {start: Eb, fifths: [pure, pure]}\n", 3, "temperament.fifths"),  # 2 fifths
    ("id: x\ndescription: d\ntemperament: {start: H, fifths: pure}\n", 3, "temperament.start"),             # bad note
    ("id: x\ndescription: d\nequal: {steps: 12}\nkeys: [0, 128]\n", 4, "keys[1]"),                      # key outside 0-127
    ("id: x\ndescription: d\nequal: {steps: 12}\nroot: 300\n", 4, "root"),                              # root outside 0-127
    ("id: x\ndescription: d\nequal: {steps: 12}\nreference: {key: -1}\n", 4, "reference.key"),          # ref outside
    ("id: x\ndescription: d\nequal: {steps: 12}\nreference: {hz: 0}\n", 4, "reference.hz"),             # ref hz
    ("id: x\ndescription: d\nequal: {steps: 12}\nreference: {key: 69, hz: 440, pitch: 3}\n", 4, "reference.pitch"),
    ("id: x\ndescription: d\nequal: {steps: 12}\nkeymap: {size: 3, degrees: [0, 1]}\n", 4, "keymap.degrees"),
    ("id: x\ndescription: d\nequal: {steps: 12}\nkeymap: {degrees: [0, x]}\n", 4, "keymap.degrees[1]"),
    ("id: x\ndescription: d\nequal: {steps: 12}\nkeys: [0, 60]\n", 4, "reference.key"),                 # A4 unmapped
    ("id: x\ndescription: d\nid: y\nequal: {steps: 12}\n", 3, "id"),                                    # duplicate field
    ("id: x\ndescription: [a, b]\nequal: {steps: 12}\n", 2, "description"),                             # wrong type
    ("id: x\ndescription: d\nequal: [12]\n", 3, "equal"),                                               # wrong type
    ("id: x\ndescription: d\nequal: {steps: 12}\nnames: [a, b]\n", 4, "names"),                         # wrong count
]


@pytest.mark.parametrize("text,line,field", BAD)
def test_malformed_profiles_give_one_line(text, line, field):
    with pytest.raises(RetunerError) as info:
        parse_profile(text, "bad.yaml")
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("bad.yaml")
    if line is not None:
        assert msg.startswith(f"bad.yaml:{line}:"), msg
    if field is not None:
        assert f" {field}: " in msg, msg


def test_at_least_twenty_malformed_cases():
    # issue 2 asks for at least 20 distinct malformed profiles, each of which fails
    assert len({text for text, _, _ in BAD}) >= 20
    for text, _, _ in BAD:
        with pytest.raises(RetunerError):
            parse_profile(text, "bad.yaml")


def test_keymap_degrees_beyond_scale_wrap_to_next_period():
    t = parse_profile("id: x\ndescription: d\nequal: {steps: 12}\nkeymap: {size: 2, degrees: [0, 13]}\n")
    # key root+1 plays degree 13 = one octave and one step up
    assert t.cents[61] - t.cents[60] == pytest.approx(1300.0)


def test_keymap_white_keys_only():
    text = textwrap.dedent("""\
        id: white-keys
        description: a 7-note just scale on the white keys
        scale: {degrees: [9/8, 5/4, 4/3, 3/2, 5/3, 15/8]}
        reference: {key: 69, hz: 440}
        keymap: {size: 12, degrees: [0, null, 1, null, 2, 3, null, 4, null, 5, null, 6]}
        """)
    t = parse_profile(text, "w.yaml")
    assert t.cents[61] is None and t.cents[66] is None
    assert t.hz(69) == pytest.approx(440.0)
    assert t.cents[64] - t.cents[60] == pytest.approx(386.3137, abs=1e-3)
    assert t.cents[72] - t.cents[60] == pytest.approx(1200.0)


def test_cli_bad_profile_exit_2_one_line(tmp_path):
    bad = tmp_path / "broken.yaml"
    bad.write_text("id: broken\ndescription: d\nequal: {steps: 0}\n")
    r = run_cli("show", str(bad))
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "broken.yaml:3: equal.steps:" in lines[0]
    assert "Traceback" not in r.stderr and r.stdout == ""


def test_cli_unknown_profile(tmp_path):
    r = run_cli("show", "no-such-tuning")
    assert r.returncode == 2 and "unknown profile 'no-such-tuning'" in r.stderr


def test_user_profiles_and_override(tmp_path, monkeypatch):
    user = tmp_path / "cfg" / "retuner" / "profiles"
    user.mkdir(parents=True)
    (user / "mine.yaml").write_text(GOOD.replace("test-scale", "mine"))
    (user / "edo12.yaml").write_text("id: edo12\ndescription: my own 12\nequal: {steps: 12}\n"
                                     "reference: {hz: 415}\n")
    env = {"XDG_CONFIG_HOME": str(tmp_path / "cfg"), "PATH": "/usr/bin:/bin"}
    r = run_cli("profiles", "--json", env=env)
    assert r.returncode == 0, r.stderr
    ids = {p["id"]: p for p in json.loads(r.stdout)}
    assert "mine" in ids and ids["edo12"]["description"] == "my own 12"
    assert "overrides the built-in" in r.stderr
    r = run_cli("show", "edo12", "--json", env=env)
    assert json.loads(r.stdout)["keys"][69]["hz"] == pytest.approx(415.0)
    # --profiles-dir
    extra = tmp_path / "extra"
    extra.mkdir()
    (extra / "other.yaml").write_text(GOOD.replace("test-scale", "other"))
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "nothing"))
    assert load_profile("other", [extra]).id == "other"
    # duplicate ids among user files: the first (by file name) is kept, the other reported
    (extra / "again.yaml").write_text(GOOD.replace("test-scale", "other").replace("a test", "the again one"))
    assert load_profile("other", [extra]).description == "the again one"      # again.yaml < other.yaml
    # a broken user profile is reported and left out; everything else keeps working
    (extra / "broken.yaml").write_text("id: Bad_Id\ndescription: d\nequal: {steps: 12}\n")
    r = run_cli("profiles", "--profiles-dir", str(extra), env=env)
    assert r.returncode == 0, r.stderr
    assert "broken.yaml:1: id:" in r.stderr and "left out" in r.stderr
    assert "duplicate id 'other'" in r.stderr
    assert "werckmeister-3" in r.stdout
    r = run_cli("show", str(extra / "broken.yaml"), env=env)
    assert r.returncode == 2 and "broken.yaml:1: id:" in r.stderr


def test_builtin_dir_has_all_files():
    assert {p.stem for p in builtin_dir().glob("*.yaml")} >= BUILTIN_IDS


def test_installed_package_finds_its_builtin_profiles(tmp_path):
    """Run from a folder outside the source tree, so the installed package is imported (as a
    user's `pip install .` runs it): the built-in profiles ship with it."""
    import os
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env["XDG_CONFIG_HOME"] = str(tmp_path / "cfg")
    code = ("import json, retuner, retuner.profiles.profile as p; "
            "print(json.dumps([retuner.__file__, sorted(i.id for i in p.list_profiles())]))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path, env=env)
    assert r.returncode == 0, r.stderr
    where, ids = json.loads(r.stdout)
    assert not where.startswith(str(tmp_path))
    assert set(ids) >= BUILTIN_IDS
