"""Profile files: loading, user folders, and one clear line for every malformed profile."""

import json
import math
import os
import pathlib
import re
import subprocess
import sys
import textwrap
from fractions import Fraction

import pytest
import yaml
from hypothesis import given, settings, strategies as st

from retuner.errors import RetunerError
from retuner.profiles.profile import builtin_dir, dump_profile, list_profiles, load_profile, parse_profile

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
scale: {degrees: [1/1, 9/8, 5/4], period: 2/1}
"""

# (profile text, expected line, expected field fragment)
BAD = [
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 9/8, 5/4\n", None, None),            # bad YAML
    ("- a\n- b\n", 1, None),                                                               # not a mapping
    ("id: x\ndescription: d\ncolour: red\nequal: {steps: 12}\n", 3, "colour"),             # unknown field
    ("description: d\nequal: {steps: 12}\n", 1, "id"),                                    # missing id
    ("id: x\nequal: {steps: 12}\n", 1, "description"),                                    # missing description
    ("id: Bad_Id\ndescription: d\nequal: {steps: 12}\n", 1, "id"),                        # bad id
    ("id: x\ndescription: d\n", 1, "equal/scale/temperament"),                              # no form
    ("id: x\ndescription: d\nequal: {steps: 12}\nscale: {degrees: [1/1, 3/2]}\n", 1, "equal/scale/temperament"),
    ("id: x\ndescription: d\nequal: {steps: 0}\n", 3, "equal.steps"),                     # zero steps
    ("id: x\ndescription: d\nequal: {steps: twelve}\n", 3, "equal.steps"),                # wrong type
    ("id: x\ndescription: d\nequal: {steps: 12, period: 1/1}\n", 3, "equal.period"),      # period <= 1/1
    ("id: x\ndescription: d\nequal: {steps: 12, period: 1/2}\n", 3, "equal.period"),      # period < 1/1
    ("id: x\ndescription: d\nequal: {steps: 12, period: 2}\n", 3, "equal.period"),        # bare number
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 0/4, 5/4]}\n", 3, "scale.degrees[1]"),     # ratio <= 0
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 5/4, 9/8]}\n", 3, "scale.degrees[2]"),     # not rising
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 5/4, 5/4]}\n", 3, "scale.degrees[2]"),     # repeated degree
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 5/4, 2/1]}\n", 3, "scale.degrees[2]"),     # degree at period
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 5/4, 3/0]}\n", 3, "scale.degrees[2]"),     # zero denominator
    ("id: x\ndescription: d\nscale: {degrees: []}\n", 3, "scale.degrees"),                     # empty
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 5/4, hello]}\n", 3, "scale.degrees[2]"),   # not a ratio
    ("id: x\ndescription: d\nscale: {degrees: [1/1, 386.314]}\n", 3, "scale.degrees[1]"),      # bare cents
    ("id: x\ndescription: d\nscale: {degrees: [9/8, 5/4]}\n", 3, "scale.degrees[0]"),          # root left out
    ("id: x\ndescription: d\ntemperament: {start: Eb, fifths: -1/4 wolfish}\n", 3, "temperament.fifths"),  # unknown comma
    ("id: x\ndescription: d\ntemperament: {start: Eb, fifths: [pure, pure]}\n", 3, "temperament.fifths"),  # 2 fifths
    ("id: x\ndescription: d\ntemperament: {start: H, fifths: pure}\n", 3, "temperament.start"),             # bad note
    ("id: x\ndescription: d\ntemperament: {start: Eb, fifths: 696.578}\n", 3, "temperament.fifths"),       # bare
    ("id: x\ndescription: d\ntemperament: {start: Eb, fifths: -1/0 syntonic}\n", 3, "temperament.fifths"),
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {within: 0 to 128}\n", 4, "layout.within"),     # key > 127
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {runs: {300: 0}}\n", 4, "layout.runs.300"),    # key > 127
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {runs: {C4 to B4: 0 to 12}}\n", 4,
     "layout.runs.C4 to B4"),                                                                        # lengths differ
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {runs: {C4: x}}\n", 4, "layout.runs.C4"),      # bad degree
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {runs: {60 to 62: 0, 62: 5}}\n", 4,
     "layout.runs.62"),                                                                               # key twice
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {runs: {60: 0, 73: 1}, repeat: 12}\n", 4,
     "layout.repeat"),                                                                                # copies overlap
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {runs: {60: 0}, colour: 3}\n", 4, "layout.colour"),
    ("id: x\ndescription: d\nequal: {steps: 12}\nlayout: {within: 0 to 60}\n", 4, "layout"),            # A4 silent
    ("id: x\ndescription: d\nequal: {steps: 12}\nconcert_pitch: key -1 = 440 Hz\n", 4, "concert_pitch"),
    ("id: x\ndescription: d\nequal: {steps: 12}\nconcert_pitch: A4 = 0 Hz\n", 4, "concert_pitch"),      # 0 Hz
    ("id: x\ndescription: d\nequal: {steps: 12}\nconcert_pitch: A4 = 440\n", 4, "concert_pitch"),       # no unit
    ("id: x\ndescription: d\nid: y\nequal: {steps: 12}\n", 3, "id"),                                    # duplicate field
    ("id: x\ndescription: [a, b]\nequal: {steps: 12}\n", 2, "description"),                             # wrong type
    ("id: x\ndescription: d\nequal: [12]\n", 3, "equal"),                                               # wrong type
    ("id: x\ndescription: d\nequal: {steps: 12}\nnames: [a, b]\n", 4, "names"),                         # wrong count
    ("id: x\ndescription: d\nequal: {steps: 1, period: 100000 cents}\n", 3, "equal"),                  # keys too far
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
        assert msg.count(f"{field}:") == 1, msg        # the place is named once


def test_at_least_twenty_malformed_cases():
    # at least 20 distinct malformed profiles, each of which fails
    assert len({text for text, _, _ in BAD}) >= 20
    for text, _, _ in BAD:
        with pytest.raises(RetunerError):
            parse_profile(text, "bad.yaml")


def test_bare_numbers_show_both_ways_to_write_them():
    for value, ways in (("700", ("700/1", "700 cents")), ("386.314", ("386.314 cents", "5/4")),
                        ("-100", ("-100 cents",))):
        with pytest.raises(RetunerError) as info:
            parse_profile(f"id: x\ndescription: d\nscale: {{degrees: [1/1, {value}]}}\n", "b.yaml")
        msg = str(info.value)
        assert msg.startswith("b.yaml:3: scale.degrees[1]: a bare number"), msg
        assert all(w in msg for w in ways), msg
        assert "ratio must be greater" not in msg


def test_downward_cents_are_not_called_a_ratio():
    # -100 cents is a downward interval in cents: the message speaks of cents, not of a ratio
    with pytest.raises(RetunerError) as info:
        parse_profile("id: x\ndescription: d\nequal: {steps: 12, period: -100 cents}\n", "b.yaml")
    msg = str(info.value)
    assert msg.startswith("b.yaml:3: equal.period:") and "-100.000 cents" in msg and "ratio" not in msg
    with pytest.raises(RetunerError) as info:
        parse_profile("id: x\ndescription: d\nscale: {degrees: [1/1, -3/2]}\n", "b.yaml")
    assert "a ratio must be greater than 0" in str(info.value) and "-100 cents" in str(info.value)


def test_errors_point_at_the_degree_and_its_line():
    # a block list: the bad value's own line, and the index that `show` gives the degree
    text = textwrap.dedent("""\
        id: x
        description: d
        scale:
          degrees:
            - 1/1
            - 9/8
            - 5/4
            - 9/8
            - 3/2
        """)
    with pytest.raises(RetunerError) as info:
        parse_profile(text, "b.yaml")
    assert str(info.value).startswith("b.yaml:8: scale.degrees[3]: degrees must rise"), str(info.value)
    with pytest.raises(RetunerError) as info:
        parse_profile(text.replace("- 3/2", "- three halves"), "b.yaml")
    assert str(info.value).startswith("b.yaml:8: scale.degrees[3]:"), str(info.value)
    bad_fifth = textwrap.dedent("""\
        id: x
        description: d
        temperament:
          start: Eb
          fifths:
            - pure
            - pure
            - -1/4 syntonic
            - -1/4 wolfish
            - pure
            - pure
            - pure
            - pure
            - pure
            - pure
            - pure
        """)
    with pytest.raises(RetunerError) as info:
        parse_profile(bad_fifth, "b.yaml")
    assert str(info.value).startswith("b.yaml:9: temperament.fifths[3]: unknown comma"), str(info.value)
    # and a good profile numbers its degrees the same way: degree 3 of this scale is 4/3
    good = parse_profile(text.replace("- 9/8\n    - 3/2", "- 4/3\n    - 3/2"), "g.yaml")
    assert good.degrees[3].interval.as_fraction == Fraction(4, 3)


def test_non_utf8_profile_gives_line_and_byte(tmp_path):
    p = tmp_path / "latin1.yaml"
    before = b"id: x\ndescription: caf"
    p.write_bytes(before + b"\xe9 au lait\nequal: {steps: 12}\n")       # Latin-1 e-acute, not UTF-8
    with pytest.raises(RetunerError) as info:
        load_profile(str(p))
    msg = str(info.value)
    assert msg.startswith(f"{p}:2: not UTF-8 text") and f"byte offset {len(before)}" in msg, msg


def test_deep_nesting_is_one_line_not_a_traceback(tmp_path):
    deep = "id: x\ndescription: d\nequal: " + "[" * 5000 + "]" * 5000 + "\n"
    with pytest.raises(RetunerError) as info:
        parse_profile(deep, "deep.yaml")
    msg = str(info.value)
    assert msg.startswith("deep.yaml:3: nested more than") and "\n" not in msg, msg
    p = tmp_path / "deep.yaml"
    p.write_text(deep)
    r = run_cli("show", str(p))
    assert r.returncode == 2 and "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_ratio_with_a_huge_prime_is_refused():
    # 2**61 - 1 is prime (a Mersenne prime, common knowledge): factoring it by trial division would
    # take hours; the profile is refused at once, naming the limit
    text = "id: x\ndescription: d\nscale: {degrees: [1/1, 2305843009213693951/2305843009213693950]}\n"
    with pytest.raises(RetunerError) as info:
        parse_profile(text, "big.yaml")
    assert str(info.value).startswith("big.yaml:3: scale.degrees[1]: a ratio may have no prime factor above")
    with pytest.raises(RetunerError) as info:
        parse_profile(text.replace("2305843009213693951/", "1" + "0" * 40 + "/"), "big.yaml")
    assert "at most 30 digits" in str(info.value)
    # the largest allowed prime still works, exactly
    t = parse_profile("id: x\ndescription: d\nscale: {degrees: [1/1, 9973/8192]}\n", "ok.yaml")
    assert t.degrees[1].interval.as_fraction == Fraction(9973, 8192)


OLD_FORM = [
    # (old lines, the first old field and its line)
    ("equal: {steps: 12}\nkeymap: {size: 12, degrees: [0, null, 1, null, 2, 3, null, 4, null, 5, null, 6]}\n", 4,
     "keymap"),
    ("equal: {steps: 12}\nroot: 62\nkeys: [21, 108]\n", 4, "root"),
    ("equal: {steps: 19}\nreference: {key: 62, hz: 293.66}\n", 4, "reference"),
    ("scale: {degrees: [9/8, 5/4, 4/3, 3/2, 5/3, 15/8]}\nkeys: [36, 96]\nkeymap: {size: 12, degrees: "
     "[0, null, 1, null, 2, 3, null, 4, null, 5, null, 6]}\nroot: 120\n", 4, "keys"),
]


def old_form_pitches(text):
    """What the first form meant, worked out here from its rules: key k plays degree
    keymap[(k - root) % size] of period (k - root) // size; keys outside [lo, hi] are silent;
    the reference key sounds at the reference Hz."""
    doc = yaml.safe_load(text)
    form = doc.get("equal") or doc.get("scale")
    if "steps" in form:
        n = form["steps"]
        degs = [1200.0 * i / n for i in range(n)]
    else:
        degs = [0.0] + [1200.0 * math.log2(Fraction(r)) for r in form["degrees"]]
        n = len(degs)
    root = doc.get("root", 60)
    km = doc.get("keymap", {"size": n, "degrees": list(range(n))})
    lo, hi = doc.get("keys", [0, 127])
    ref = doc.get("reference", {})
    rel = []
    for k in range(128):
        rep, idx = divmod(k - root, km["size"])
        d = km["degrees"][idx]
        if not lo <= k <= hi or d is None:
            rel.append(None)
            continue
        rep2, d2 = divmod(d, n)
        rel.append(1200.0 * (rep + rep2) + degs[d2])
    key, hz = ref.get("key", 69), ref.get("hz", 440.0)
    shift = 1200.0 * math.log2(hz / (440.0 * 2 ** (-69 / 12))) - rel[key]
    return [None if c is None else c + shift for c in rel]


@pytest.mark.parametrize("old,line,field", OLD_FORM)
def test_old_form_gets_one_line_that_writes_the_new_form(old, line, field):
    text = "id: x\ndescription: d\n" + old
    with pytest.raises(RetunerError) as info:
        parse_profile(text, "old.yaml")
    msg = str(info.value)
    assert msg.startswith(f"old.yaml:{line}: {field}: this is retuner's first profile form"), msg
    assert "\n" not in msg
    # the line's advice, followed to the letter, plays what the old profile meant
    advice = msg.split("write instead: ", 1)[1].split(" and ")
    if "scale:" in old:
        assert advice.pop() == "scale.degrees beginning with the root, 1/1"
    kept = [ln for ln in old.splitlines() if ln.split(":")[0] not in ("root", "keymap", "keys", "reference")]
    kept = [ln.replace("degrees: [", "degrees: [1/1, ") for ln in kept]
    new = parse_profile("id: x\ndescription: d\n" + "\n".join(kept + advice) + "\n", "new.yaml")
    want = old_form_pitches(text)
    assert [c is None for c in new.cents] == [c is None for c in want]
    for got, exp in zip(new.cents, want):
        if exp is not None:
            assert got == pytest.approx(exp, abs=1e-6)


def test_layout_runs_white_keys_only():
    text = textwrap.dedent("""\
        id: white-keys
        description: a 7-note just scale on the white keys
        scale: {degrees: [1/1, 9/8, 5/4, 4/3, 3/2, 5/3, 15/8]}
        concert_pitch: A4 = 440 Hz
        layout:
          runs: {C4: 0, D4: 1, E4 to F4: 2 to 3, G4: 4, A4: 5, B4: 6}
          repeat: 12
        """)
    t = parse_profile(text, "w.yaml")
    assert t.cents[61] is None and t.cents[66] is None
    assert t.hz(69) == pytest.approx(440.0)
    # 5/4 above C: 386.314 c (handbook value); the octave 1200 c
    assert t.cents[64] - t.cents[60] == pytest.approx(386.3137, abs=1e-3)
    assert t.cents[72] - t.cents[60] == pytest.approx(1200.0)
    assert t.cents[21] - t.cents[60] == pytest.approx(-4 * 1200 + 1200 * math.log2(5 / 3))   # A0, four octaves below A4


def test_layout_partial_keyboard_and_degrees_past_the_period():
    t = parse_profile("id: x\ndescription: d\nequal: {steps: 12, period: 2/1}\n"
                      "layout: {runs: {60: 0, 61: 13}, repeat: 2, within: 48 to 72}\n")
    # key 61 plays degree 13: one octave and one step above the root
    assert t.cents[61] - t.cents[60] == pytest.approx(1300.0)
    assert t.cents[62] - t.cents[60] == pytest.approx(1200.0)      # the next copy, one period up
    assert t.cents[47] is None and t.cents[73] is None and t.cents[48] is not None


def test_dump_profile_reads_back_the_same_pitches():
    for pid in ("just-5limit", "werckmeister-3", "bohlen-pierce"):
        t = load_profile(pid)
        text = dump_profile(id=t.id, description=t.description, source=t.source,
                            scale=[d.interval for d in t.degrees], period=t.period,
                            names=[d.name for d in t.degrees])
        back = parse_profile(text, "dumped.yaml")
        assert back.cents == pytest.approx(t.cents, abs=1e-5)
    for pid, kw in (("edo19", {"equal": (19, Fraction(2))}),
                    ("meantone-quarter", {"temperament": ("Eb", "-1/4 syntonic")}),
                    ("kirnberger-3", {"temperament": ("Eb", ["pure"] * 3 + ["-1/4 syntonic"] * 4
                                                      + ["pure", "pure", "-1 schisma", "pure"])})):
        back = parse_profile(dump_profile(id=pid, description="d", **kw), "dumped.yaml")
        assert back.cents == pytest.approx(load_profile(pid).cents, abs=1e-9)
    text = dump_profile(id="k", description="d", scale=[0.0, 386.3137], period=Fraction(2),
                        runs=[(60, 60, 0), (64, 64, 1)], repeat=12, within=(21, 108),
                        concert_pitch=(60, 261.6))
    t = parse_profile(text, "k.yaml")
    assert t.hz(60) == pytest.approx(261.6) and t.cents[62] is None and t.cents[109] is None
    assert t.cents[64] - t.cents[60] == pytest.approx(386.3137)


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
                                     "concert_pitch: A4 = 415 Hz\n")
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
    r = run_cli("profiles", "--profile-dir", str(extra), env=env)
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
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env["XDG_CONFIG_HOME"] = str(tmp_path / "cfg")
    code = ("import json, retuner, retuner.profiles.profile as p; "
            "print(json.dumps([retuner.__file__, sorted(i.id for i in p.list_profiles())]))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path, env=env)
    assert r.returncode == 0, r.stderr
    where, ids = json.loads(r.stdout)
    assert not where.startswith(str(tmp_path))
    assert set(ids) >= BUILTIN_IDS


def readme_profile_blocks():
    """The YAML blocks of the README's profile section, as a user would copy them."""
    text = (next(p for p in pathlib.Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())
            / "README.md").read_text()
    start = text.index("## Profiles")
    end = text.index("\n## ", start + 1)
    return re.findall(r"```yaml\n(.*?)```", text[start:end], re.S)


def test_readme_profile_examples_load_as_written():
    blocks = readme_profile_blocks()
    seen = set()
    for block in blocks:
        t = parse_profile(block, "README.md")
        seen |= {k for k in ("equal:", "scale:", "temperament:", "layout:", "concert_pitch:")
                 if f"\n{k}" in "\n" + block}
        assert t.description
    # one complete example per definition form, and the layout and concert pitch shown in use
    assert seen == {"equal:", "scale:", "temperament:", "layout:", "concert_pitch:"}
    werck = next(parse_profile(b, "README.md") for b in blocks if "temperament:" in b)
    assert werck.hz(69) == pytest.approx(415.0)
    # the example's fifths are Werckmeister III's: the same pitches as the built-in, moved to A4 = 415 Hz
    ref = load_profile("werckmeister-3")
    shift = werck.cents[69] - ref.cents[69]
    assert werck.cents == pytest.approx(tuple(c + shift for c in ref.cents), abs=1e-9)
    piano31 = next(parse_profile(b, "README.md") for b in blocks if "steps: 31" in b)
    assert piano31.cents[20] is None and piano31.cents[109] is None
    assert piano31.cents[61] - piano31.cents[60] == pytest.approx(1200 / 31)


TOKENS = ["0", "-1", "700", "3/2", "0/0", "-3/2", "1/0", "2/1", "386.314 cents", "-100 cents", "1e999 cents",
          "pure", "-1/4 syntonic", "-1/0 schisma", "C4", "G9", "H2", "60 to 61", "61 to 60", "0 to 1000",
          "A4 = 440 Hz", "key 200 = 1 Hz", "A4 = 1e9 Hz", "~", "[]", "{}", "[1/1]", "[1/1, 3/2]", "'x'", "true",
          "{60: 0}", "{C4 to B4: 0 to 11}", "{60: 0, 61: 1}", "[0, 1]", "9999999999999999999999/3"]
FIELDS = ["equal: {{steps: {0}, period: {1}}}", "scale: {{degrees: {2}, period: {1}}}",
          "temperament: {{start: {3}, fifths: {1}}}", "layout: {{runs: {4}, repeat: {0}, within: {1}}}",
          "concert_pitch: {1}", "names: {2}"]


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(FIELDS), st.lists(st.sampled_from(TOKENS), min_size=5, max_size=5)),
                min_size=1, max_size=4))
def test_any_profile_loads_or_gives_one_line(parts):
    """Whatever the values, a profile loads or is refused with one RetunerError line: never a traceback."""
    seen = set()
    lines = ["id: x", "description: d"]
    for field, toks in parts:
        name = field.split(":")[0]
        if name in seen:
            continue
        seen.add(name)
        lines.append(field.format(*toks))
    try:
        t = parse_profile("\n".join(lines) + "\n", "p.yaml")
    except RetunerError as exc:
        assert "\n" not in str(exc) and str(exc).startswith("p.yaml")
    else:
        assert len(t.cents) == 128


@pytest.mark.parametrize("text, kind", [
    ("id: x\ndescription: d\nequal: [12]\n", "a list"),
    ("id: x\ndescription: d\nequal: twelve\n", "text"),
    ("id: x\ndescription: d\nequal: 12\n", "a whole number"),
])
def test_a_value_of_the_wrong_kind_is_named_in_plain_words(text, kind):
    # the YAML reader's own classes (which remember lines) never reach the message
    with pytest.raises(RetunerError) as info:
        parse_profile(text, "bad.yaml")
    assert str(info.value).endswith(f"expected a mapping, got {kind}"), str(info.value)
