"""Hostile scene files: each is refused quickly, in bounded memory, with one clear line.

Covers Python-object YAML tags, deep nesting, alias bombs ("billion laughs": 9 levels of
9 aliases, 9^9 = 387,420,489 leaves if expanded), recursive aliases, huge numbers, very
long lines, binary garbage, a file just over ``scenefile.MAX_FILE_BYTES``, a directory
and a missing file. Every case goes through the command line (``adapt check``: exit 2,
one ``adapt: error:`` line, no traceback) while tracemalloc records the peak Python
memory. Refusal is bounded by construction (depth, value-count and size budgets that
are checked while the YAML is composed, before anything expands); there is no wall-time
assertion here (speed figures belong in benchmarks/), measured times are under 1.5 s.
"""
from __future__ import annotations

import random
import tracemalloc
from pathlib import Path

import pytest
from conftest import SCENES

from adapt import scenefile
from adapt.errors import InputError, SceneError
from adapt.scenefile import MAX_FILE_BYTES, MAX_YAML_DEPTH, MAX_YAML_NODES, parse_scene

#: a hang guard, not a speed test (an expanded alias bomb runs for hours): far above the
#: 1.5 s worst case measured on an idle 2-core machine, so a loaded CI machine passes
PEAK_LIMIT = 100 * 2 ** 20    # bytes of Python allocations (tracemalloc peak)

BASE = (SCENES / "single_jammer.yaml").read_text(encoding="utf-8")


def _bomb(levels: int = 9, width: int = 9) -> str:
    """A flow list whose last item expands to width**levels leaves."""
    parts = ["&b0 [" + ", ".join(["lol"] * width) + "]"]
    for i in range(1, levels):
        parts.append(f"&b{i} [" + ", ".join([f"*b{i - 1}"] * width) + "]")
    return "[" + ", ".join(parts) + "]"


def _bomb_document(levels: int = 9, width: int = 9) -> str:
    text = "lol0: &l0 [" + ", ".join(["lol"] * width) + "]\n"
    for i in range(1, levels):
        text += f"lol{i}: &l{i} [" + ", ".join([f"*l{i - 1}"] * width) + "]\n"
    return text


def _replace(old: str, new: str) -> str:
    assert old in BASE
    return BASE.replace(old, new)


SIDE_EFFECT = "adapt-hostile-marker"

CASES = {
    # --- tags that would build or run Python objects under an unsafe loader
    "python-apply": (f"!!python/object/apply:os.system ['touch {SIDE_EFFECT}']\n", "refused"),
    "python-apply-in-field": (_replace("name: single jammer",
                                       f"name: !!python/object/apply:os.system ['touch {SIDE_EFFECT}']"),
                              "refused"),
    "python-name": (_replace("seed: 7", "seed: !!python/name:os.system"), "refused"),
    "python-new": (_replace("trials: 50", "trials: !!python/object/new:collections.OrderedDict []"),
                   "refused"),
    "python-module": ("!!python/module:os\n", "refused"),
    "local-tag": (_replace("seed: 7", "seed: !secret 7"), "refused"),
    "binary-tag": (_replace("name: single jammer", "name: !!binary aGVsbG8="), "expected non-empty text"),
    # --- nesting
    "deep-flow-list": ("[" * 10_000, "nested more than"),
    "deep-flow-map": ("{a: " * 10_000, "nested more than"),
    "deep-closed-lists": ("[" * 5_000 + "]" * 5_000, "nested more than"),
    "deep-block-maps": ("".join(" " * i + "k:\n" for i in range(300)), "nested more than"),
    "deep-block-lists": ("".join(" " * (2 * i) + "-\n" for i in range(300)) + " " * 600 + "- 1\n",
                         "nested more than"),
    # --- aliases
    "alias-bomb": (_bomb_document(), "alias bomb"),
    "alias-bomb-in-name": (_replace("name: single jammer", "name: " + _bomb()), "alias bomb"),
    "alias-bomb-in-spec": (_replace("  - rls", "  - {method: rls, forgetting: " + _bomb() + "}"),
                           "alias bomb"),
    "alias-bomb-as-key": (BASE + "? " + _bomb() + "\n: 1\n", "alias bomb"),
    "recursive-alias": (_replace("name: single jammer", "name: &r [1, *r]"), "recursive"),
    "undefined-alias": (_replace("seed: 7", "seed: *nowhere"), "undefined alias"),
    # --- numbers
    "float-overflow": (_replace("power_db: 30", "power_db: 1e400"), "finite"),
    "int-10-400": (_replace("seed: 7", "seed: 1" + "0" * 400), "out of range"),
    "int-10-5000": (_replace("seed: 7", "seed: 1" + "0" * 5000), "too long"),
    "nan": (_replace("azimuth: 22", "azimuth: .nan"), "finite"),
    "minus-inf": (_replace("power_db: 30", "power_db: -.inf"), "finite"),
    "huge-elements": (_replace("elements: 8", "elements: 1" + "0" * 30), "out of range"),
    # --- text
    "long-name-300kB": (_replace("name: single jammer", "name: " + "x" * 300_000),
                        "text of 1 to 200"),
    "many-keys": ("".join(f"k{i}: {i}\n" for i in range(MAX_YAML_NODES // 2 + 10)),
                  "values in one document"),
    "nul-bytes": (b"\x00" * 1000, "special characters"),
    "nul-in-name": (_replace("name: single jammer", "name: a\x00b").encode(), "special characters"),
    "invalid-utf8": (BASE.encode().replace(b"single jammer", b"single \xff\xfe jammer"), "not UTF-8"),
    "random-bytes": (random.Random(8).randbytes(100_000), "UTF-8"),
    "utf16": (BASE.encode("utf-16"), "not UTF-8"),
    "control-chars": ("\x1b[31mname: x\n", "special characters"),
    "empty": ("", "empty"),
    "only-comment": ("# nothing here\n", "empty"),
    "multi-document": (BASE + "---\n" + BASE, "single document"),
}


def _measure(call):
    """Run ``call`` under tracemalloc for the peak of Python allocations. Returns (the
    result, peak bytes). No wall-time assertion: refusals are bounded by construction
    (depth, node and size budgets), and speed figures belong in benchmarks/."""
    tracemalloc.start()
    try:
        result = call()
    finally:
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    return result, peak


def _one_error_line(code, out, err):
    assert code == 2, (code, out, err)
    assert "Traceback" not in err and "Traceback" not in out
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("adapt: error: ")
    assert len(lines[0]) < 1000
    return lines[0]


@pytest.mark.slow
@pytest.mark.parametrize("name", list(CASES))
def test_hostile_scene_refused_through_cli(name, tmp_path, run_cli, monkeypatch):
    content, words = CASES[name]
    path = tmp_path / f"{name}.yaml"
    (path.write_bytes if isinstance(content, bytes) else
     lambda c: path.write_text(c, encoding="utf-8"))(content)
    monkeypatch.chdir(tmp_path)
    (code, out, err), peak = _measure(lambda: run_cli(["check", path]))
    line = _one_error_line(code, out, err)
    assert words in line, line
    assert str(path) in line                      # the message names the file
    assert peak < PEAK_LIMIT, peak
    assert not (tmp_path / SIDE_EFFECT).exists()  # nothing was executed


def test_limits_are_what_the_messages_say():
    # the documented budgets: deepest valid nesting passes the depth check, one more fails
    ok = "[" * MAX_YAML_DEPTH + "]" * MAX_YAML_DEPTH
    with pytest.raises(SceneError, match="a scene must be a YAML mapping"):
        parse_scene(ok)
    with pytest.raises(SceneError, match=f"nested more than {MAX_YAML_DEPTH}"):
        parse_scene("[" * (MAX_YAML_DEPTH + 1) + "]" * (MAX_YAML_DEPTH + 1))
    # a small alias fan-out (9^4 = 6561 leaves) is fine as YAML; the scene then says why
    # the key is unknown, naming the key path
    with pytest.raises(SceneError, match="unknown key 'lol0'"):
        parse_scene(_bomb_document(levels=4))
    # 9^5 = 59,049 leaves: over MAX_YAML_NODES
    assert 9 ** 5 > MAX_YAML_NODES
    with pytest.raises(SceneError, match="alias bomb"):
        parse_scene(_bomb_document(levels=5))
    # anchors and aliases used normally still work
    text = _replace("  - {name: jammer, role: interferer, azimuth: 22, power_db: 30, waveform: gaussian}",
                    "  - {name: jammer, role: interferer, azimuth: 22, power_db: 30, "
                    "waveform: &wf {kind: tone, frequency: 0.1}}\n"
                    "  - {name: jammer-2, role: interferer, azimuth: -40, power_db: 20, waveform: *wf}")
    scene = parse_scene(text)
    assert scene.sources[1].waveform == scene.sources[2].waveform


def test_file_just_over_the_size_limit(tmp_path, run_cli):
    # a valid scene padded with comments to MAX_FILE_BYTES + 1 bytes: refused from its size
    path = tmp_path / "big.yaml"
    pad = MAX_FILE_BYTES + 1 - len(BASE.encode())
    path.write_bytes(BASE.encode() + b"#" * (pad - 1) + b"\n")
    assert path.stat().st_size == MAX_FILE_BYTES + 1
    (code, out, err), peak = _measure(lambda: run_cli(["check", path]))
    line = _one_error_line(code, out, err)
    assert f"file is {MAX_FILE_BYTES + 1} bytes" in line and str(MAX_FILE_BYTES) in line
    assert peak < 10 * 2 ** 20     # never read into memory
    # exactly at the limit it is read and loads (comments are free)
    path.write_bytes(BASE.encode() + b"#" * (pad - 2) + b"\n")
    assert path.stat().st_size == MAX_FILE_BYTES
    code, out, err = run_cli(["check", path])
    assert code == 0, err


def test_ten_megabyte_line(tmp_path, run_cli):
    path = tmp_path / "line.yaml"
    path.write_text("name: " + "x" * 10_000_000 + "\n", encoding="utf-8")
    (code, out, err), peak = _measure(lambda: run_cli(["check", path]))
    assert "bytes; a scene file is at most" in _one_error_line(code, out, err)
    assert peak < PEAK_LIMIT
    # the same text handed to the Python API is refused by length, without parsing
    with pytest.raises(SceneError, match="a scene is at most"):
        parse_scene("name: " + "x" * 10_000_000)


_CHILD = """
import sys
from adapt.cli.main import main
code = main(sys.argv[2:])
with open("/proc/self/status") as fh:         # this process's own peak (VmHWM, kB)
    peak = next(line.split()[1] for line in fh if line.startswith("VmHWM:"))
open(sys.argv[1], "w").write(peak)
sys.exit(code)
"""


@pytest.mark.slow
def test_long_line_just_under_the_limit(tmp_path):
    # a real process: peak resident memory of the whole CLI (VmHWM, which
    # unlike wait4's ru_maxrss does not inherit the forking parent's size), for a scene
    # whose name is a line of almost MAX_FILE_BYTES characters
    import subprocess
    import sys
    path = tmp_path / "long.yaml"
    text = _replace("name: single jammer", "name: " + "x" * (MAX_FILE_BYTES - len(BASE)))
    path.write_text(text, encoding="utf-8")
    assert path.stat().st_size <= MAX_FILE_BYTES
    proc = subprocess.run([sys.executable, "-c", _CHILD, str(tmp_path / "peak"), "check",
                           str(path)], capture_output=True, text=True, timeout=300)
    line = _one_error_line(proc.returncode, proc.stdout, proc.stderr)
    assert "name: expected non-empty text" in line and "text of 1 to 200" in line
    peak = int((tmp_path / "peak").read_text()) * 1024
    assert peak < 400 * 2 ** 20, peak                    # whole process, numpy included


def test_directory_and_missing_file(tmp_path, run_cli):
    line = _one_error_line(*run_cli(["check", tmp_path]))
    assert "is a directory" in line and str(tmp_path) in line
    line = _one_error_line(*run_cli(["check", tmp_path / "nowhere.yaml"]))
    assert "no such scene file" in line
    line = _one_error_line(*run_cli(["compare", tmp_path / "nowhere.yaml", "--no-progress",
                                     "--out", tmp_path / "runs"]))
    assert "no such scene file" in line
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())


def test_unreadable_file_is_an_input_error(tmp_path, monkeypatch):
    # a read error (permissions, I/O) is reported as the file's problem, not a traceback;
    # tests run as root, where permission bits are not enforced: inject the error instead
    path = tmp_path / "scene.yaml"
    path.write_text(BASE, encoding="utf-8")

    def fail(self):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(Path, "read_bytes", fail)
    with pytest.raises(SceneError, match="cannot read the file: Permission denied"):
        scenefile.load_scene(path)


def test_hostile_scene_through_compare_and_record(tmp_path, run_cli):
    path = tmp_path / "bomb.yaml"
    path.write_text(CASES["alias-bomb-in-spec"][0], encoding="utf-8")
    for argv in (["compare", path, "--no-progress", "--out", tmp_path / "runs"],
                 ["size", path, "--no-progress", "--out", tmp_path / "runs"],
                 ["record", path, "--processor", "smi", "--out", tmp_path / "ref"]):
        (code, out, err), peak = _measure(lambda: run_cli(argv))
        assert "alias bomb" in _one_error_line(code, out, err)
        assert peak < PEAK_LIMIT
    assert not (tmp_path / "ref").exists()


# --------------------------------------------------------------------------- Python API
def _shared_bomb(levels=9, width=9):
    """The alias bomb as Python objects: lists sharing references (9^9 leaves)."""
    node = ["lol"] * width
    for _ in range(levels - 1):
        node = [node] * width
    return node


def _deep(depth):
    node = []
    for _ in range(depth):
        node = [node]
    return node


def _recursive():
    a = [1]
    a.append(a)
    return a


@pytest.mark.parametrize("make", [_shared_bomb, lambda: _deep(100_000), _recursive,
                                  lambda: 10 ** 5000, lambda: {"k" * 10_000: 1}],
                         ids=["shared-bomb", "deep-100000", "recursive", "int-5000-digits",
                              "long-key"])
@pytest.mark.parametrize("field", ["name", "seed", "array", "sources", "processors",
                                   "spec-param", "spec"])
def test_hostile_python_values(make, field):
    # parse_scene on a mapping: the same refusals without YAML; the error message's
    # value is abbreviated (errors._show), so printing it costs microseconds
    m = scenefile.read_yaml(BASE)
    value = make()
    if field == "spec-param":
        m["processors"] = [{"method": "smi", "loading_db": value}]
    elif field == "spec":
        m["processors"] = [value]
    else:
        m[field] = value
    (exc, peak) = _measure(lambda: _raises(lambda: parse_scene(m)))
    assert isinstance(exc, InputError)
    text = str(exc)
    assert len(text) < 1000 and "\n" not in text
    assert peak < PEAK_LIMIT


def _raises(call):
    try:
        call()
    except InputError as exc:
        return exc
    raise AssertionError("no InputError")


def test_messages_stay_on_one_line():
    # keys and values holding line breaks or escapes are shown escaped
    m = scenefile.read_yaml(BASE)
    m["bad\nkey\x1b[2J"] = 1
    exc = _raises(lambda: parse_scene(m))
    assert "\n" not in str(exc) and "\x1b" not in str(exc)
    assert "bad\\nkey\\x1b[2J" in str(exc)
