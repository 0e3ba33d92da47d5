"""Scene files: validation messages with key paths, safe YAML, round trip, example scenes,
and the ``adapt check`` command."""
from __future__ import annotations

import copy
import math
import subprocess
import sys

import numpy as np
import pytest
import yaml
from conftest import ROOT, SCENES

from adapt import __version__
from adapt.errors import InputError, SceneError, SpecError
from adapt.scene import geometry
from adapt.scenefile import dump_scene, load_scene, parse_scene, scene_to_mapping
from adapt.studies.check import (
    angle_between_deg,
    beamwidth_deg,
    grating_lobe,
    main_lobe_contains,
    scene_warnings,
    summarise_scene,
)

BASE = {
    "name": "test scene",
    "array": {"layout": "line", "elements": 8, "spacing": 0.5},
    "sources": [
        {"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
        {"name": "jam", "role": "interferer", "azimuth": 30, "power_db": 30,
         "waveform": "gaussian"},
    ],
    "snapshots": 256,
    "trials": 4,
    "seed": 2,
    "processors": ["conventional"],
}


def mutate(**edits):
    """Copy of BASE with dotted-path edits; value ``DELETE`` removes the key."""
    data = copy.deepcopy(BASE)
    for dotted, value in edits.items():
        keys = [int(k) if k.isdigit() else k for k in dotted.split("__")]
        node = data
        for k in keys[:-1]:
            node = node[k]
        if value is DELETE:
            del node[keys[-1]]
        else:
            node[keys[-1]] = value
    return data


DELETE = object()

# (id, mapping, key path expected in the message, words expected in the message)
INVALID = [
    ("unknown-top-key", dict(BASE, snapshot=10), "snapshot", "did you mean 'snapshots'"),
    ("unknown-source-key", mutate(sources__1__power=3), "sources[1].power", "did you mean 'power_db'"),
    ("missing-array", mutate(array=DELETE), None, "required key 'array'"),
    ("missing-azimuth", mutate(sources__0__azimuth=DELETE), "sources[0]", "required key 'azimuth'"),
    ("bool-is-not-number", mutate(sources__1__power_db=True), "sources[1].power_db", "not true/false"),
    ("text-is-not-number", mutate(sources__1__power_db="30"), "sources[1].power_db", "expected a number"),
    ("nan-azimuth", mutate(sources__1__azimuth=float("nan")), "sources[1].azimuth", "finite"),
    ("inf-power", mutate(sources__1__power_db=float("inf")), "sources[1].power_db", "finite"),
    ("zero-snapshots", mutate(snapshots=0), "snapshots", "out of range"),
    ("zero-trials", mutate(trials=0), "trials", "out of range"),
    ("fractional-trials", mutate(trials=2.5), "trials", "whole number"),
    ("zero-elements", mutate(array__elements=0), "array.elements", "out of range"),
    ("zero-rows", mutate(array={"layout": "grid", "rows": 0, "columns": 4}), "array.rows", "out of range"),
    ("zero-columns", mutate(array={"layout": "grid", "rows": 2, "columns": 0}), "array.columns", "out of range"),
    ("grid-missing-rows", mutate(array={"layout": "grid", "columns": 4}), "array", "required key 'rows'"),
    ("bits-zero", mutate(receiver={"bits": 0}), "receiver.bits", "out of range"),
    ("bits-25", mutate(receiver={"bits": 25}), "receiver.bits", "out of range"),
    ("negative-seed", mutate(seed=-1), "seed", "out of range"),
    ("fractional-seed", mutate(seed=1.5), "seed", "whole number"),
    ("azimuth-181", mutate(sources__1__azimuth=181), "sources[1].azimuth", "[-180, 180]"),
    ("elevation-91", mutate(sources__1__elevation=91), "sources[1].elevation", "[-90, 90]"),
    ("look-azimuth", dict(BASE, look={"azimuth": -181}), "look.azimuth", "out of range"),
    ("look-unknown", dict(BASE, look={"azimuth": 0, "elev": 3}), "look.elev", "did you mean 'elevation'"),
    ("spacing-zero", mutate(array__spacing=0), "array.spacing", "out of range"),
    ("spacing-huge", mutate(array__spacing=11), "array.spacing", "out of range"),
    ("radius-zero", mutate(array={"layout": "ring", "elements": 8, "radius": 0}), "array.radius", "out of range"),
    ("radius-on-line", mutate(array__radius=1.0), "array.radius", "does not apply to a line"),
    ("gain-error-negative", mutate(array__errors={"gain_db_rms": -0.1}), "array.errors.gain_db_rms", "out of range"),
    ("phase-error-huge", mutate(array__errors={"phase_deg_rms": 46}), "array.errors.phase_deg_rms", "out of range"),
    ("position-error-huge", mutate(array__errors={"position_rms": 0.3}), "array.errors.position_rms", "out of range"),
    ("power-too-high", mutate(sources__1__power_db=151), "sources[1].power_db", "out of range"),
    ("power-too-low", mutate(sources__1__power_db=-101), "sources[1].power_db", "out of range"),
    ("tone-frequency", mutate(sources__1__waveform={"kind": "tone", "frequency": 0.6}),
     "sources[1].waveform.frequency", "[-0.5, 0.5]"),
    ("chirp-start", mutate(sources__1__waveform={"kind": "chirp", "start": -0.6}),
     "sources[1].waveform.start", "[-0.5, 0.5]"),
    ("chirp-stop", mutate(sources__1__waveform={"kind": "chirp", "stop": 0.51}),
     "sources[1].waveform.stop", "[-0.5, 0.5]"),
    ("chirp-period", mutate(sources__1__waveform={"kind": "chirp", "period": 1}),
     "sources[1].waveform.period", "out of range"),
    ("tone-with-period", mutate(sources__1__waveform={"kind": "tone", "period": 4}),
     "sources[1].waveform.period", "does not apply to a tone"),
    ("waveform-typo", mutate(sources__1__waveform="qspk"), "sources[1].waveform", "did you mean 'qpsk'"),
    ("waveform-list", mutate(sources__1__waveform=["tone"]), "sources[1].waveform", "waveform name"),
    ("pulsing-on-over-period", mutate(sources__1__pulsing={"period": 10, "on": 11}),
     "sources[1].pulsing.on", "longer than the period"),
    ("pulsing-period-zero", mutate(sources__1__pulsing={"period": 0, "on": 0}),
     "sources[1].pulsing.period", "out of range"),
    ("pulsing-stop-before-start", mutate(sources__1__pulsing={"start": 100, "stop": 100}),
     "sources[1].pulsing.stop", "after start"),
    ("pulsing-period-alone", mutate(sources__1__pulsing={"period": 10}),
     "sources[1].pulsing", "go together"),
    ("motion-rate", mutate(sources__1__motion={"azimuth_rate": 2}),
     "sources[1].motion.azimuth_rate", "out of range"),
    ("motion-leaves-sky", mutate(sources__1__elevation=80, sources__1__motion={"elevation_rate": 0.1}),
     "sources[1].motion.elevation_rate", "elevation"),
    ("no-desired", mutate(sources__0__role="interferer"), "sources", "exactly one"),
    ("two-desired", mutate(sources__1__role="desired"), "sources[1].role", "exactly one"),
    ("role-typo", mutate(sources__1__role="interferrer"), "sources[1].role", "did you mean 'interferer'"),
    ("duplicate-names", mutate(sources__1__name="wanted"), "sources[1].name", "already used"),
    ("empty-name", mutate(sources__1__name=""), "sources[1].name", "non-empty"),
    ("numeric-name", mutate(sources__1__name=5), "sources[1].name", "non-empty"),
    ("no-sources", mutate(sources=[]), "sources", "non-empty list"),
    ("sources-not-list", mutate(sources={"name": "x"}), "sources", "non-empty list"),
    ("source-not-mapping", mutate(sources__1="jam"), "sources[1]", "expected a mapping"),
    ("training-typo", dict(BASE, training="signals"), "training", "did you mean 'signal'"),
    ("layout-typo", mutate(array__layout="lines"), "array.layout", "did you mean 'line'"),
    ("custom-not-list", mutate(array={"layout": "custom", "positions": 3}), "array.positions", "list"),
    ("custom-two-numbers", mutate(array={"layout": "custom", "positions": [[0, 0, 0], [1, 0]]}),
     "array.positions[1]", "three numbers"),
    ("custom-duplicate-point", mutate(array={"layout": "custom",
                                             "positions": [[0, 0, 0], [0.5, 0, 0], [0, 0, 0]]}),
     "array.positions[2]", "coincides with point 0"),
    ("custom-text-coordinate", mutate(array={"layout": "custom", "positions": [[0, 0, "a"]]}),
     "array.positions[0][2]", "expected a number"),
    ("processors-not-list", dict(BASE, processors="conventional"), "processors", "list"),
    ("processor-unknown", dict(BASE, processors=["conventional", "conventionl"]),
     "processors[1].method", "did you mean 'conventional'"),
    ("processor-bad-parameter", dict(BASE, processors=["conventional taper=triangle"]),
     "processors[0].taper", "unknown choice"),
]


@pytest.mark.parametrize("data,path,words", [c[1:] for c in INVALID], ids=[c[0] for c in INVALID])
def test_invalid_mapping_names_path_and_fails_cli(data, path, words, write_file, run_cli):
    text = yaml.safe_dump(data, sort_keys=False)
    file = write_file("bad.yaml", text)
    with pytest.raises(InputError) as info:
        load_scene(file)
    message = str(info.value)
    assert message.startswith(file)
    assert words in message
    if path is not None:
        assert info.value.path == path or info.value.path.startswith(path), message
    expected = SpecError if path and path.startswith("processors[") else SceneError
    assert isinstance(info.value, expected)
    code, out, err = run_cli(["check", file])
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("adapt: error: ") and "Traceback" not in err
    assert words in err


# (id, raw file content, words expected)
BAD_FILES = [
    ("empty", "", "empty"),
    ("only-comments", "# nothing here\n", "empty"),
    ("list", "- 1\n- 2\n", "not a list"),
    ("scalar", "42\n", "not a single value"),
    ("tabs", "array:\n\tlayout: line\n", "tab character used for indentation on line 2"),
    ("duplicate-key", "trials: 3\ntrials: 4\n", "'trials' appears twice"),
    ("nested-duplicate", "array: {layout: line, layout: ring}\n", "'layout' appears twice"),
    ("python-tag", "name: !!python/object/apply:os.system ['echo hi']\n", "refused"),
    ("custom-tag", "name: !thing 3\n", "refused"),
    ("syntax", "array: [1, 2\nsources: 3\n", "YAML syntax error at line"),
    ("bad-indent", "array:\n  layout: line\n elements: 4\n", "YAML syntax error at line 3"),
    ("not-utf8", b"name: caf\xe9\n", "not UTF-8"),
]


@pytest.mark.parametrize("content,words", [c[1:] for c in BAD_FILES], ids=[c[0] for c in BAD_FILES])
def test_bad_files(content, words, write_file, run_cli):
    file = write_file("bad.yaml", content)
    with pytest.raises(SceneError) as info:
        load_scene(file)
    assert words in str(info.value)
    assert str(info.value).startswith(file)
    code, _, err = run_cli(["check", file])
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err


def test_python_tag_is_not_executed(write_file, tmp_path):
    marker = tmp_path / "ran"
    file = write_file("evil.yaml", f"name: !!python/object/apply:os.system ['touch {marker}']\n")
    with pytest.raises(SceneError):
        load_scene(file)
    assert not marker.exists()


def test_directory_and_missing_file(tmp_path, run_cli):
    with pytest.raises(SceneError, match="is a directory"):
        load_scene(tmp_path)
    with pytest.raises(SceneError, match="no such scene file"):
        load_scene(tmp_path / "absent.yaml")
    for target in (tmp_path, tmp_path / "absent.yaml"):
        code, _, err = run_cli(["check", target])
        assert code == 2 and err.count("\n") == 1 and "Traceback" not in err


def test_check_reports_every_file_and_fails_if_any_bad(write_file, run_cli):
    bad = write_file("bad.yaml", "trials: 3\n")
    code, out, err = run_cli(["check", SCENES / "single_jammer.yaml", bad,
                              SCENES / "ring.yaml"])
    assert code == 2
    assert "single jammer" in out and "ring all-round" in out
    assert "2 of 3 scene files valid" in out
    assert err.count("adapt: error:") == 1


def test_yaml_conveniences():
    # YAML 1.2 style: 1e3 is a number, 'on' stays a key (the pulsing key), yes is text
    text = yaml.safe_dump(BASE, sort_keys=False) + "receiver: {bits: 12, full_scale_db: 4e1}\n"
    text = text.replace("snapshots: 256", "snapshots: 2.56e2")
    scene = parse_scene(text)
    assert scene.snapshots == 256 and scene.receiver.full_scale_db == 40.0
    pulsed = mutate(sources__1__pulsing={"period": 8, "on": 2})
    text = yaml.safe_dump(pulsed, sort_keys=False).replace("'on'", "on")
    assert "on: 2" in text
    assert parse_scene(text).sources[1].pulsing.on == 2
    with pytest.raises(SceneError, match="expected a number"):
        parse_scene(yaml.safe_dump(BASE).replace("seed: 2", "seed: yes"))


def test_defaults_filled_in():
    data = {"array": {"elements": 4},
            "sources": [{"name": "s", "role": "desired", "azimuth": 12.5, "elevation": 3,
                         "power_db": 1}]}
    scene = parse_scene(data, file="dir/my_scene.yaml")
    assert scene.name == "my_scene"                      # the file stem
    assert scene.array.layout == "line" and scene.array.settings["spacing"] == 0.5
    assert (scene.look_azimuth, scene.look_elevation) == (12.5, 3.0)   # the desired source
    assert scene.training == "interference" and scene.receiver.bits is None
    assert (scene.snapshots, scene.trials, scene.seed) == (1024, 100, 0)
    assert scene.processors == ()
    assert scene.sources[0].waveform.kind == "gaussian"
    # ring default radius: neighbours half a wavelength apart (chord 2 r sin(pi/N))
    ring = parse_scene(dict(data, array={"layout": "ring", "elements": 10}))
    p = ring.array.positions
    assert np.linalg.norm(p[1] - p[0]) == pytest.approx(0.5, rel=1e-12)


RICH = {
    "name": "everything",
    "array": {"layout": "custom",
              "positions": [[0, 0, 0], [0.5, 0, 0], [0, 0.5, 0], [0.25, 0.1, 0.4]],
              "errors": {"gain_db_rms": 0.5, "phase_deg_rms": 3, "position_rms": 0.01}},
    "sources": [
        {"name": "w", "role": "desired", "azimuth": -10, "elevation": 5, "power_db": -3,
         "waveform": {"kind": "chirp", "start": -0.1, "stop": 0.2, "period": 64}},
        {"name": "p", "role": "interferer", "azimuth": 40, "power_db": 20,
         "waveform": {"kind": "tone", "frequency": 0.125},
         "pulsing": {"start": 5, "stop": 900, "period": 50, "on": 10}},
        {"name": "m", "role": "interferer", "azimuth": -60, "elevation": 10, "power_db": 25,
         "waveform": "bpsk", "motion": {"azimuth_rate": 0.01, "elevation_rate": -0.001}},
    ],
    "look": {"azimuth": -9, "elevation": 4},
    "training": "signal",
    "receiver": {"bits": 10, "full_scale_db": 30},
    "snapshots": 1000, "trials": 7, "seed": 123,
    "processors": ["conventional", {"method": "conventional", "label": "plain"}],
}


@pytest.mark.parametrize("source", ["rich", "grid", "ring", "examples"])
def test_round_trip(source):
    # the resolved mapping re-parses to an equal scene (same mapping, same positions)
    if source == "rich":
        scenes = [parse_scene(RICH)]
    elif source == "grid":
        scenes = [parse_scene(mutate(array={"layout": "grid", "rows": 3, "columns": 5,
                                            "spacing": 0.4, "row_spacing": 0.6}))]
    elif source == "ring":
        scenes = [parse_scene(mutate(array={"layout": "ring", "elements": 9, "radius": 1.3}))]
    else:
        scenes = [load_scene(p) for p in sorted(SCENES.glob("*.yaml"))]
    for scene in scenes:
        mapping = scene_to_mapping(scene)
        assert mapping == scene.resolved
        again = parse_scene(yaml.safe_load(dump_scene(scene)))     # through YAML text
        assert scene_to_mapping(again) == mapping
        np.testing.assert_array_equal(again.array.positions, scene.array.positions)
        assert again.sources == scene.sources and again.receiver == scene.receiver
        assert again.array.errors == scene.array.errors
        assert again.processors == scene.processors
        assert (again.look_azimuth, again.look_elevation, again.training, again.snapshots,
                again.trials, again.seed) == (scene.look_azimuth, scene.look_elevation,
                                              scene.training, scene.snapshots,
                                              scene.trials, scene.seed)


def test_every_example_scene_loads_and_checks(run_cli):
    files = sorted(SCENES.glob("*.yaml"))
    names = {p.stem for p in files}
    assert {"jammer_rich", "single_jammer", "nonstationary", "ring", "grid"} <= names
    for path in files:
        scene = load_scene(path)
        assert scene.processors, path
        code, out, err = run_cli(["check", path])
        assert code == 0, err
        assert scene.name in out and err == ""


def test_jammer_rich_is_as_described():
    scene = load_scene(SCENES / "jammer_rich.yaml")
    assert scene.elements == 16 and scene.array.settings["spacing"] == 0.5
    assert scene.desired.power_db == pytest.approx(-10, abs=1)
    jammers = scene.interferers
    assert len(jammers) >= 6
    assert all(30 <= j.power_db <= 50 for j in jammers)
    assert len({j.waveform.kind for j in jammers}) >= 3
    # one just outside the main lobe: first null at asin(1/(N d)) (antenna handbook)
    first_null = math.degrees(math.asin(1 / (16 * 0.5)))
    closest = min(abs(j.azimuth - scene.look_azimuth) for j in jammers)
    assert 1.0 < closest / first_null < 1.5
    assert scene_warnings(scene) == []


@pytest.mark.slow
def test_check_via_subprocess():
    proc = subprocess.run([sys.executable, "-m", "adapt", "check",
                           str(SCENES / "jammer_rich.yaml")],
                          capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert proc.returncode == 0, proc.stderr
    for words in ("jammer-rich uplink", "16 elements", "15 degrees of freedom",
                  "jam-shoulder", "warnings:"):
        assert words in proc.stdout


def test_version_and_help(run_cli):
    code, out, _ = run_cli(["--version"])
    assert code == 0 and __version__ in out
    code, out, _ = run_cli(["--help"])
    assert code == 0 and "check" in out
    code, out, _ = run_cli(["check", "--help"])
    assert code == 0 and "SCENE" in out


# ----------------------------------------------------------------------------- summary
def test_main_lobe_matches_first_null_of_uniform_line():
    # uniform line at broadside: nulls at sin(theta) = m / (N d) (antenna handbook), so
    # the main lobe is |sin theta| < 1/(N d)
    for n, d in ((16, 0.5), (8, 0.5), (10, 0.7)):
        pos = geometry.line_positions(n, d)
        null = math.degrees(math.asin(1 / (n * d)))
        for az in (0.3 * null, 0.97 * null, -0.97 * null):
            assert main_lobe_contains(pos, (0, 0), (az, 0))
        for az in (1.03 * null, -1.03 * null, 1.2 * null, 60.0):
            assert not main_lobe_contains(pos, (0, 0), (az, 0))
        # the cone of a line: same sin(az) cos(el) is the main beam itself
        assert main_lobe_contains(pos, (0, 0), (0, 70))


def test_beamwidth_any_look_azimuth():
    # a 12-element ring turned by one element step (30 degrees) is the same array, so the
    # beamwidth at look azimuth 30 equals that at 0 (symmetry); a uniform broadside line
    # has the handbook value 0.886 / (N d) radians for large N
    ring = geometry.ring_positions(12, 1.0)
    assert beamwidth_deg(ring, 30.0, 0.0) == pytest.approx(beamwidth_deg(ring, 0.0, 0.0), rel=1e-3)
    assert beamwidth_deg(ring, 150.0, 0.0) == pytest.approx(beamwidth_deg(ring, 0.0, 0.0), rel=1e-3)
    line = geometry.line_positions(64, 0.5)
    assert math.radians(beamwidth_deg(line, 0.0, 0.0)) == pytest.approx(0.886 / 32, rel=0.01)


def test_warnings():
    # grating lobe: one-wavelength spacing at broadside (antenna handbook rule d < 1)
    warns = scene_warnings(parse_scene(mutate(array__spacing=1.0)))
    assert any(w.startswith("grating lobe") for w in warns)
    assert not any(w.startswith("grating lobe") for w in scene_warnings(parse_scene(BASE)))
    # too many interferers: 4 elements (3 degrees of freedom), 3 interferers
    crowd = mutate(array__elements=4)
    crowd["sources"] += [{"name": f"j{i}", "role": "interferer", "azimuth": a, "power_db": 20}
                         for i, a in enumerate((-50, 60))]
    assert any(w.startswith("too many interferers: 3 interferers for 3 degrees")
               for w in scene_warnings(parse_scene(crowd)))
    assert not any(w.startswith("too many") for w in scene_warnings(parse_scene(BASE)))
    # interferers close to N: 7 elements, 5 interferers leave one spare degree of freedom
    # and two noise eigenvalues for loading=auto (Wax & Kailath 1985 needs some left)
    close = mutate(array__elements=7)
    close["sources"] += [{"name": f"j{i}", "role": "interferer", "azimuth": a, "power_db": 50}
                         for i, a in enumerate((-50, 60, -20, 45))]
    warns = scene_warnings(parse_scene(close))
    assert any(w.startswith("interferers close to the array size: 5 interferers on 7")
               and "loading=auto" in w for w in warns)
    assert not any(w.startswith("too many") for w in warns)
    assert not any("close to the array size" in w for w in scene_warnings(parse_scene(BASE)))
    # main lobe: 8-element half-wave line, first null at asin(1/4) = 14.48 degrees
    warns = scene_warnings(parse_scene(mutate(sources__1__azimuth=12)))
    assert any(w.startswith("interferer in the main lobe: 'jam' is 12 degrees") for w in warns)
    assert not any("main lobe" in w for w in scene_warnings(parse_scene(mutate(sources__1__azimuth=16))))
    # the warning quotes the first null on that side, asin(1/(N d)) = 14.48 degrees
    # (antenna handbook), the uniform response |sin(N x)/(N sin x)|^2, x = pi d sin(12),
    # and the cost of nulling, -10 log10(1 - B) (Van Trees 2002, one-interferer gain)
    x = math.pi * 0.5 * math.sin(math.radians(12))
    b = (math.sin(8 * x) / (8 * math.sin(x))) ** 2
    (line,) = [w for w in warns if "main lobe" in w]
    assert "(at 14.5 degrees on that side)" in line
    assert f"response there is {10 * math.log10(b):.1f} dB" in line
    assert f"about {-10 * math.log10(1 - b):.2g} dB" in line
    # a moving jammer that drifts into the main lobe during the run
    drift = mutate(sources__1__motion={"azimuth_rate": -0.1})          # 30 -> 4.5 degrees
    assert any("main lobe" in w and "at snapshot" in w for w in scene_warnings(parse_scene(drift)))
    # pointing mismatch: the angle between look and desired directions
    warns = scene_warnings(parse_scene(dict(BASE, look={"azimuth": 3, "elevation": 4})))
    expected = angle_between_deg(3, 4, 0, 0)
    assert expected == pytest.approx(math.degrees(math.acos(math.cos(math.radians(3)) *
                                                            math.cos(math.radians(4)))))
    assert any(w.startswith("pointing mismatch") and f"{expected:.3g} degrees" in w for w in warns)


def test_summary_contents():
    scene = parse_scene(RICH)
    text = summarise_scene(scene)
    for words in ("custom layout of 4 elements", "3 degrees of freedom", "10-bit ADC",
                  "MPDR", "1000 snapshots x 7 trials, seed 123", "conventional, plain",
                  "chirp -0.1..0.2 / 64", "tone 0.125 cyc/snap",
                  "pulsing: on 10 of every 50, from 5, until 900", "moving az +0.01, el -0.001",
                  "gain 0.5 dB rms"):
        assert words in text, words
    assert len(text.splitlines()) < 40


@pytest.mark.parametrize("spacing", [0.5, 0.6, 0.9, 1.0])
def test_grating_lobe_closed_form_matches_search(spacing):
    # lines and grids use the closed-form uniform pattern; it agrees with the numerical
    # whole-sphere search of geometry.has_grating_lobe (same -1 dB criterion), including
    # the handbook edge d (1 + |sin theta0|) = 1 (antenna handbook)
    for arr in ({"elements": 12, "spacing": spacing},
                {"layout": "grid", "rows": 4, "columns": 5, "spacing": spacing,
                 "row_spacing": 0.5}):
        for az, el in ((0, 0), (30, 0), (60, 0), (20, 25)):
            data = mutate(array=arr, sources__0__azimuth=az)
            data["sources"][0]["elevation"] = el
            data["sources"][1]["azimuth"] = -az
            scene = parse_scene(data)
            assert grating_lobe(scene) == geometry.has_grating_lobe(
                scene.array.positions, az, el), (arr, az, el)


def test_check_handles_a_large_line(run_cli, write_file):
    # the largest allowed line (1024 elements) is summarised; its grating-lobe test is a
    # closed form, so this stays cheap (timing itself lives in benchmarks, not tests)
    big = mutate(array__elements=1024)
    file = write_file("big.yaml", yaml.safe_dump(big))
    code, out, _ = run_cli(["check", file])
    assert code == 0 and "1023 degrees of freedom" in out
