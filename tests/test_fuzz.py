"""Property-based fuzzing of the two user-facing parsers: scene files and processor specs.

The property (common practice for input validation): whatever the input, the outcome is
either a valid object (a Scene, a Processor) or the project's own InputError
(SceneError / SpecError) whose message names a key path or value and says what is
allowed; never another exception. Hypothesis runs derandomised with a bounded number of
examples, so the run is deterministic and quick.
"""
from __future__ import annotations

import copy
import math

import pytest
import yaml
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from adapt.errors import InputError, SpecError
from adapt.processors import Processor, parse_spec, registry
from adapt.scene.model import Scene
from adapt.scenefile import parse_scene, scene_to_mapping

FUZZ = settings(max_examples=400, deadline=None, derandomize=True, database=None,
                phases=[Phase.explicit, Phase.generate, Phase.shrink],
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
FEW = settings(FUZZ, max_examples=150)

# --------------------------------------------------------------------------- values
scalars = (st.none() | st.booleans()
           | st.integers(min_value=-(10 ** 30), max_value=10 ** 30)
           | st.integers()
           | st.sampled_from([10 ** 400, -(10 ** 400), 2 ** 63, 2 ** 64 + 1])
           | st.floats(allow_nan=True, allow_infinity=True)
           | st.text(max_size=30)
           | st.sampled_from(["none", "null", "", " ", "auto", "true", "1e3", "-0", "nan",
                              "inf", "desired", "interferer", "line", "tone", "chirp",
                              "smi", "x" * 300, "1" * 500]))
keys = st.text(max_size=12) | st.integers(-3, 3) | st.sampled_from(
    ["kind", "method", "name", "azimuth", "power_db", "on", "period", "label", "step"])
values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(keys, inner, max_size=4),
    max_leaves=12)


def _base_mapping() -> dict:
    """A valid scene exercising every optional section (own invented scenario)."""
    return {
        "name": "fuzz base",
        "array": {"layout": "line", "elements": 6, "spacing": 0.5,
                  "errors": {"gain_db_rms": 0.5, "phase_deg_rms": 2.0, "position_rms": 0.01}},
        "sources": [
            {"name": "wanted", "role": "desired", "azimuth": 0.0, "elevation": 0.0,
             "power_db": 0.0, "waveform": {"kind": "chirp", "start": -0.1, "stop": 0.2,
                                           "period": 64}},
            {"name": "pulser", "role": "interferer", "azimuth": 30.0, "power_db": 30.0,
             "waveform": {"kind": "tone", "frequency": 0.05},
             "pulsing": {"start": 4, "stop": 200, "period": 20, "on": 5},
             "motion": {"azimuth_rate": 0.01, "elevation_rate": 0.001}},
        ],
        "look": {"azimuth": 0.0, "elevation": 0.0},
        "training": "signal",
        "receiver": {"bits": 12, "full_scale_db": 40.0},
        "snapshots": 128,
        "trials": 4,
        "seed": 3,
        "processors": ["conventional", {"method": "smi", "loading_db": 10}, "lms step=0.0001"],
    }


def _paths(node, prefix=()):
    """Every key path (tuple of keys/indices) in a nested mapping, inner nodes included."""
    out = []
    if isinstance(node, dict):
        for k, v in node.items():
            out.append(prefix + (k,))
            out += _paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out.append(prefix + (i,))
            out += _paths(v, prefix + (i,))
    return out


ARRAYS = {"line": _base_mapping()["array"],
          "grid": {"layout": "grid", "rows": 2, "columns": 3, "spacing": 0.5, "row_spacing": 0.6},
          "ring": {"layout": "ring", "elements": 5, "radius": 0.6},
          "custom": {"layout": "custom", "positions": [[0, 0, 0], [0.5, 0, 0], [0, 0.5, 0]]}}


def _base(layout: str = "line") -> dict:
    m = _base_mapping()
    m["array"] = copy.deepcopy(ARRAYS[layout])
    return m


BASE = _base()
#: (layout, key path) for every field of the base scene, array fields in every layout
PATHS = [("line", p) for p in _paths(BASE)] + [
    (layout, ("array",) + p) for layout in ("grid", "ring", "custom")
    for p in _paths(ARRAYS[layout])]


def _text(path) -> str:
    out = ""
    for k in path:
        out += f"[{k}]" if isinstance(k, int) else (f".{k}" if out else str(k))
    return out


def _put(mapping, path, value):
    node = mapping
    for k in path[:-1]:
        node = node[k]
    node[path[-1]] = value


def _check_error(exc: InputError, kind=InputError, need_path=True):
    """The message names where (a key path, or at least the offending value) and what
    is allowed (or, for structural problems, what is missing)."""
    assert isinstance(exc, kind), type(exc)
    text = str(exc)
    assert text and "\n" not in text and len(text) < 2000, text
    if need_path:
        assert exc.path or exc.value is not InputError._NOVALUE, text
    if exc.allowed is None:
        # structural problems say what is missing or repeated; YAML syntax errors cannot
        # list what is allowed and name the position instead
        assert ("missing" in exc.message or "twice" in exc.message
                or (exc.message.startswith("YAML") and " line " in exc.message)
                or "tab character" in exc.message), text


# --------------------------------------------------------------------------- scenes
def test_base_scene_is_valid():
    # sanity: the fuzzed positions start from a scene that loads, in every array layout
    for layout in ARRAYS:
        assert isinstance(parse_scene(_base(layout)), Scene)


@FUZZ
@given(where=st.sampled_from(PATHS), value=values)
def test_scene_any_value_in_any_field(where, value):
    layout, path = where
    m = _base(layout)
    _put(m, path, value)
    try:
        scene = parse_scene(m, file="fuzz.yaml")
    except InputError as exc:
        _check_error(exc)
        assert exc.file == "fuzz.yaml"
        return
    assert isinstance(scene, Scene)
    # a scene that loads re-loads from its own resolved mapping (scenefile docstring)
    again = parse_scene(scene_to_mapping(scene))
    assert scene_to_mapping(again) == scene_to_mapping(scene)


@FUZZ
@given(missing=st.sampled_from(PATHS), extra_key=st.text(min_size=1, max_size=10),
       extra=values)
def test_scene_missing_or_extra_key(missing, extra_key, extra):
    layout, missing = missing
    m = _base(layout)
    node = m
    try:
        for k in missing[:-1]:
            node = node[k]
        if isinstance(node, dict):
            del node[missing[-1]]
            node[extra_key] = extra
        else:
            node.insert(missing[-1], extra)
    except (KeyError, IndexError):
        return
    try:
        assert isinstance(parse_scene(m), Scene)
    except InputError as exc:
        _check_error(exc)


@FUZZ
@given(text=st.text(max_size=200))
def test_scene_arbitrary_text(text):
    try:
        assert isinstance(parse_scene(text), Scene)
    except InputError as exc:
        _check_error(exc, need_path=False)


YAMLISH = st.text(alphabet=list("[]{}:-,&*!|>'\"#%@`?~ \n\t.0123456789eE+abcdlnst_"),
                  max_size=120)


@FUZZ
@given(text=YAMLISH)
def test_scene_yaml_punctuation(text):
    # text made mostly of YAML syntax reaches the scanner, composer and anchors
    try:
        parse_scene(text)
    except InputError as exc:
        _check_error(exc, need_path=False)


@FEW
@given(where=st.sampled_from(PATHS), value=values)
def test_scene_fuzzed_value_through_yaml_text(where, value):
    # the same mutations written out as YAML text and read back through the loader
    layout, path = where
    m = _base(layout)
    _put(m, path, value)
    try:
        text = yaml.safe_dump(m, allow_unicode=True)
    except (yaml.YAMLError, ValueError, OverflowError):
        return
    try:
        assert isinstance(parse_scene(text), Scene)
    except InputError as exc:
        _check_error(exc, need_path=False)


# --------------------------------------------------------------------------- specs
METHOD_PARAMS = [(m, p) for m, cls in registry().items() for p in cls.parameters] + \
    [(m, "label") for m in registry()]
WORDS = (st.text(max_size=20) | st.sampled_from(
    ["none", "auto", "0", "-1", "1e-9", "1e400", "nan", "inf", "-inf", "true", "2", "0.5",
     "1,2", "20,35.5", "3", "9" * 30, "'a b'", "=", "==", "x=y"]))


def _assert_processor(proc):
    assert isinstance(proc, Processor)
    # a valid processor's spec() rebuilds it (processors/base.py: spec "rebuilds this
    # processor")
    again = parse_spec(proc.spec())
    assert again.method == proc.method and again.params == proc.params
    assert again.label == proc.label


@FUZZ
@given(text=st.text(max_size=80))
def test_spec_arbitrary_text(text):
    try:
        proc = parse_spec(text, "processors[0]")
    except InputError as exc:
        _check_error(exc, SpecError, need_path=False)
        return
    _assert_processor(proc)


@FUZZ
@given(mp=st.sampled_from(METHOD_PARAMS), word=WORDS, extra=st.lists(WORDS, max_size=2))
def test_spec_every_parameter_as_text(mp, word, extra):
    method, param = mp
    import shlex
    spec = " ".join([method, shlex.quote(f"{param}={word}")] + [shlex.quote(e) for e in extra])
    try:
        proc = parse_spec(spec, "processors[1]")
    except InputError as exc:
        _check_error(exc, SpecError)
        return
    _assert_processor(proc)


@FUZZ
@given(mp=st.sampled_from(METHOD_PARAMS), value=values, key=keys, other=values)
def test_spec_every_parameter_as_mapping(mp, value, key, other):
    method, param = mp
    spec = {"method": method, param: value}
    if key != "method":
        spec[key] = other
    try:
        proc = parse_spec(spec, "processors[2]")
    except InputError as exc:
        _check_error(exc, SpecError)
        assert exc.path and exc.path.startswith("processors[2]"), str(exc)
        return
    _assert_processor(proc)


@FUZZ
@given(spec=values)
def test_spec_any_value(spec):
    try:
        proc = parse_spec(spec, "processors[3]")
    except InputError as exc:
        _check_error(exc, SpecError)
        return
    _assert_processor(proc)


def test_spec_errors_name_parameter_and_range():
    # a hand-picked case per kind, so the generic property above cannot pass vacuously
    with pytest.raises(SpecError) as info:
        parse_spec("smi loading_db=1e400", "processors[0]")
    assert "processors[0].loading_db" in str(info.value) and "finite" in str(info.value)
    assert "[-60, 100]" in str(info.value)
    with pytest.raises(SpecError) as info:
        parse_spec({"method": "nlms", "step": [1, 2]}, "processors[4]")
    assert "processors[4].step" in str(info.value) and "(0, 2)" in str(info.value)
    assert not math.isnan(parse_spec("nlms step=1.5").params["step"])
