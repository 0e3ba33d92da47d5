"""YAML 1.1 number forms and control characters in scene files (adapt/scenefile.py).

YAML 1.2 core schema (yaml.org/spec/1.2.2, section 10.3.2, tag resolution): integers are
decimal, ``0o`` octal or ``0x`` hexadecimal; ``1:30``, ``010`` with its leading zero,
``0b101`` and ``1_000`` are YAML 1.1 forms (yaml.org/type/int.html, float.html) that
the two versions read differently, so a scene refuses them where a number is expected.
"""
from __future__ import annotations

import pytest

from adapt.errors import SceneError
from adapt.scenefile import dump_scene, parse_scene, read_yaml

BASE = """
name: {name}
array: {{layout: line, elements: 4}}
sources:
  - {{name: s, role: desired, azimuth: 0, power_db: 0}}
  - {{name: j, role: interferer, azimuth: {azimuth}, power_db: 30}}
seed: {seed}
"""


def scene(name="plain", azimuth="20", seed="1"):
    return BASE.format(name=name, azimuth=azimuth, seed=seed)


@pytest.mark.parametrize("text, value", [
    ("0", 0), ("-7", -7), ("+5", 5), ("10", 10), ("0x1F", 31), ("0o17", 15),
    ("0.5", 0.5), (".5", 0.5), ("1.", 1.0), ("1e3", 1000.0), ("-2.5E-4", -2.5e-4),
])
def test_yaml12_numbers(text, value):
    got = read_yaml(f"a: {text}")["a"]
    assert got == value and type(got) is type(value)


@pytest.mark.parametrize("text, words", [
    ("1:30", "YAML 1.1 reads it as 90 (base 60)"),
    ("-1:30:00", "as -5400 (base 60)"),
    ("010", "reads it as 8 (octal), YAML 1.2 as 10"),
    ("0b11", "as 3 (binary)"),
    ("1_000", "as 1000"),
])
def test_yaml11_forms_refused_where_a_number_is_expected(text, words):
    with pytest.raises(SceneError) as err:
        parse_scene(scene(azimuth=text), file="s.yaml")
    msg = str(err.value)
    assert "sources[1].azimuth" in msg and "ambiguous" in msg and words in msg, msg


def test_octal_seed_refused_and_plain_seed_read():
    with pytest.raises(SceneError, match="seed: '010' is ambiguous"):
        parse_scene(scene(seed="010"))
    assert parse_scene(scene(seed="10")).seed == 10


def test_yaml11_forms_are_text_where_text_is_expected():
    sc = parse_scene(scene(name="1:30"))
    assert sc.name == "1:30" and type(sc.name) is str
    assert "name: '1:30'" in dump_scene(sc)


def test_long_digit_runs_are_quick():
    # the number patterns are linear: a 1 MB scalar resolves at once (hostile input)
    assert read_yaml("a: " + "1" * 1_000_000 + "x")["a"].endswith("x")


@pytest.mark.parametrize("name", [r'"\e]0;pwned\a\e[2J"', r'"label\e[2J\n"', r'"\ud800"',
                                  r'"tab\there"', r'"\x00"'])
def test_control_characters_after_escapes_refused(name, tmp_path, run_cli):
    path = tmp_path / "s.yaml"
    path.write_text(scene(name=name))
    code, out, err = run_cli(["check", path])
    assert code == 2 and "unprintable character" in err and "name" in err, err
    assert "\x1b" not in err and "Traceback" not in err


def test_control_characters_in_processor_labels_refused(tmp_path, run_cli):
    path = tmp_path / "s.yaml"
    path.write_text(scene() + 'processors: ["smi label=\\"x\\e[2J\\""]\n')
    code, out, err = run_cli(["check", path])
    assert code == 2 and "unprintable" in err and "processors[0]" in err, err
    path.write_text(scene() + "processors: [{method: smi, label: \"a\\e[2J\"}]\n")
    code, out, err = run_cli(["check", path])
    assert code == 2 and "unprintable" in err and "processors[0].label" in err, err


@pytest.mark.parametrize("array, key", [
    ("{layout: ring, elements: 2, radius: 1.0e-300}", "array.radius"),
    ("{layout: grid, rows: 2, columns: 2, spacing: 1.0e-300}", "array.spacing"),
    ("{layout: line, elements: 3, spacing: 1.0e-300}", "array.spacing"),
])
def test_vanishing_apertures_refused_not_divided_by(array, key, tmp_path, run_cli):
    path = tmp_path / "s.yaml"
    path.write_text(scene().replace("{layout: line, elements: 4}", array))
    code, out, err = run_cli(["check", path])
    assert code == 2 and key in err and "too small an array" in err, err
