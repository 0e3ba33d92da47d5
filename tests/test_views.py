"""What a run shows: 2-D pattern scores of planar arrays, nonstationary summaries,
figures with many processors, and small command-line points."""
from __future__ import annotations

import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest

from adapt.engine import scores as S
from adapt.engine.execute import run_trials as evaluate
from adapt.engine.settings import checkpoints_for
from adapt.errors import InputError
from adapt.processors import Context, parse_spec, run_processors
from adapt.processors._covariance import outer_sum
from adapt.report import figures as F
from adapt.scene import geometry
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch
from adapt.studies.compare import render_table, summarise


def _uniform_line_first_sidelobe_db(n: int) -> float:
    """First sidelobe of the uniform n-element line, |sin(n x/2) / (n sin(x/2))|^2, found
    numerically beyond its first null x = 2 pi / n (Balanis, Antenna Theory, ch. 6)."""
    x = np.linspace(2 * np.pi / n, np.pi, 400_001)
    af = np.abs(np.sin(n * x / 2) / (n * np.sin(x / 2)))
    return float(20 * np.log10(af.max()))


def _grid(rows: int, columns: int) -> np.ndarray:
    pos = np.array([[0.5 * c, 0.0, 0.5 * r] for r in range(rows) for c in range(columns)])
    return pos - pos.mean(axis=0)


def _ring(n: int, radius: float) -> np.ndarray:
    ang = 2 * np.pi * np.arange(n) / n
    return np.stack([radius * np.cos(ang), radius * np.sin(ang), 0 * ang], axis=1)


# ------------------------------------------------------------------ 2-D pattern scores
def test_array_shape_tests():
    assert S.is_line_array(geometry.line_positions(8, 0.5))
    assert not S.is_line_array(_grid(3, 4))
    assert S.plane_normal(_grid(3, 4)) is not None
    assert abs(abs(S.plane_normal(_ring(8, 1.0))[2]) - 1) < 1e-12
    stacked = np.concatenate([_ring(8, 1.0), _ring(8, 1.0) + [0, 0, 0.3]])
    assert S.plane_normal(stacked) is None
    u = S.sphere_directions(5.0)
    np.testing.assert_allclose(np.linalg.norm(u, axis=1), 1.0)
    assert abs(u.mean(axis=0)).max() < 0.01          # even cover: the mean is the centre


@pytest.mark.parametrize("look", [(0.0, 0.0), (20.0, 10.0)])
def test_grid_peak_sidelobe_is_the_worse_of_its_two_lines(look):
    # A uniform rectangular grid's array factor is the product of a row factor and a
    # column factor (Balanis, Antenna Theory, planar arrays): its peak sidelobe is the
    # higher first sidelobe of the two lines, here the 6-element one (-12.43 dB), which
    # the azimuth cut (along the 8-element rows) never shows (-12.80 dB).
    pos = _grid(6, 8)
    w = geometry.steering_vector(pos, *look)[None] / 48
    want = max(_uniform_line_first_sidelobe_db(6), _uniform_line_first_sidelobe_db(8))
    got = S.peak_sidelobe_2d_db(w, pos, *look, step_deg=1.0)[0]
    assert abs(got - want) < 0.05, (got, want)
    cut = S.peak_sidelobe_db(w, pos, *look, step_deg=0.05)[0]
    assert abs(cut - _uniform_line_first_sidelobe_db(8)) < 0.05


@pytest.mark.parametrize("elevation", [90.0, 60.0])
def test_dense_ring_sidelobe_is_the_bessel_sidelobe(elevation):
    # A dense uniform ring's pattern is J0(2 pi r |rho - rho0|) in the direction cosines
    # of its plane (Balanis, circular arrays); J0's first sidelobe is |J0(3.8317)| =
    # 0.40276, -7.90 dB (Abramowitz and Stegun, table 9.5). Checked also for a stack of
    # two rings (a 3-D array, searched over azimuth x elevation).
    pos = _ring(40, 1.5)
    want = 20 * np.log10(0.40276)
    w = geometry.steering_vector(pos, 0.0, elevation)[None] / 40
    assert abs(S.peak_sidelobe_2d_db(w, pos, 0.0, elevation, step_deg=1.0)[0] - want) < 0.05
    stack = np.concatenate([pos, pos + [0, 0, 0.25]])
    w = geometry.steering_vector(stack, 0.0, elevation)[None] / 80
    assert abs(S.peak_sidelobe_2d_db(w, stack, 0.0, elevation, step_deg=1.0)[0] - want) < 0.1


def test_pointing_error_2d_is_the_angle_to_the_steered_direction():
    # Weights phase-steered to u0 peak at u0 (the phased-array steering relation).
    pos = _grid(6, 8)
    t = [(3.0, 4.0), (-4.0, -2.0), (0.0, 0.0)]
    w = np.stack([geometry.steering_vector(pos, a, e) for a, e in t]) / 48
    got = S.pointing_error_2d_deg(w, pos, 0.0, 0.0)
    look = geometry.direction_vector(0.0, 0.0)
    want = [np.rad2deg(np.arccos(geometry.direction_vector(a, e) @ look)) for a, e in t]
    np.testing.assert_allclose(got, want, atol=0.02)


def _planar_scene(procs, look_el=0.0):
    return parse_scene({
        "name": "planar", "array": {"layout": "grid", "rows": 6, "columns": 8},
        "sources": [{"name": "w", "role": "desired", "azimuth": 0, "elevation": look_el,
                     "power_db": 0},
                    {"name": "high", "role": "interferer", "azimuth": 30, "elevation": 35,
                     "power_db": 30}],
        "trials": 3, "snapshots": 64, "seed": 2, "processors": procs})


def test_compare_scores_planar_arrays_over_all_directions():
    sc = _planar_scene(["conventional", "smi loading_db=10"])
    ev = evaluate(sc, [parse_spec("conventional"), parse_spec("smi loading_db=10")],
                  trials=3, snapshots=64, seed=2)
    m = summarise(ev)
    conv = m.processors[0].final.patterns
    assert conv.scope == "all directions"
    want = _uniform_line_first_sidelobe_db(6)          # not the cut's -12.80 dB
    assert abs(conv.peak_sidelobe_db_mean - want) < 0.05
    assert conv.pointing_error_deg_mean < 0.05
    assert abs(conv.peak_over_look_db_mean) < 1e-3
    # a line keeps the cut (no scope key: its results are unchanged)
    line = parse_scene({"name": "l", "array": {"layout": "line", "elements": 8},
                        "sources": [{"name": "w", "role": "desired", "azimuth": 0,
                                     "power_db": 0}]})
    ml = summarise(evaluate(line, [parse_spec("conventional")], trials=2, snapshots=16))
    assert "pattern_scope" not in ml.to_json()["processors"][0]["final"]
    assert ml.processors[0].final.patterns.scope is None


# ------------------------------------------------------------------ nonstationary
def test_staying_within_differs_from_first_reached():
    cps = np.array([1, 2, 4, 8, 16])
    rho = np.array([[0.1, 0.6, 0.2, 0.7, 0.8]] * 3)     # within 3 dB at 2, lost at 4
    assert S.snapshots_to_target(cps, rho) == (2, 2)
    assert S.snapshots_staying_within(cps, rho) == (8, 8)
    assert S.snapshots_staying_within(cps[:3], rho[:, :3]) == (None, None)
    mixed = np.array([[0.9] * 5, [0.9] * 5, [0.1, 0.1, 0.9, 0.2, 0.9]])
    assert S.snapshots_staying_within(cps, mixed, fraction=0.9) == (1, 16)


@pytest.fixture(scope="module")
def pulsed():
    sc = parse_scene({
        "name": "pulsed", "array": {"layout": "line", "elements": 8},
        "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                    {"name": "steady", "role": "interferer", "azimuth": 40, "power_db": 30},
                    {"name": "burst", "role": "interferer", "azimuth": -30, "power_db": 40,
                     "pulsing": {"start": 0, "stop": 100}}]})
    procs = [parse_spec("conventional"), parse_spec("optimum"), parse_spec("smi loading_db=10")]
    return evaluate(sc, procs, checkpoints=checkpoints_for("10:190:20", 200), trials=4,
                    snapshots=200, seed=7)


def test_worst_null_counts_only_interferers_that_are_on(pulsed):
    m = summarise(pulsed, patterns=False)
    assert m.interferers_on_at_end == ("steady",)
    for p in m.processors:
        f = p.final
        assert f.worst_null_db == f.null_depth_db["steady"]
    # the growing-window SMI still nulls the burst that is over; the optimum of the
    # moment does not need to, and its worst null is the steady jammer's
    opt = m.processors[1].final
    assert opt.null_depth_db["burst"] > opt.null_depth_db["steady"]
    table = render_table(m)
    assert "off then: burst" in table
    row = next(line for line in table.splitlines()
               if line.split()[:1] == ["optimum"] and "SINR" not in line)
    assert f"{opt.worst_null_db:.1f}" in row


def test_checkpoint_ranges():
    np.testing.assert_array_equal(checkpoints_for("100:1000:300", 1000), [100, 400, 700, 1000])
    np.testing.assert_array_equal(checkpoints_for("5:17:4", 20), [5, 9, 13, 17])
    np.testing.assert_array_equal(checkpoints_for("5:18:4", 20), [5, 9, 13, 17, 18])
    for bad in ("1:30:1", "0:10:1", "5:3:1", "1:10:0", "1:10", "a:10:2", "1::2"):
        with pytest.raises(InputError, match="checkpoints"):
            checkpoints_for(bad, 20)


def test_nonstationary_convergence_has_a_linear_time_axis(pulsed):
    fig = F.convergence_figure(pulsed, summarise(pulsed, patterns=False))
    assert all(ax.get_xscale() == "linear" for ax in fig.axes)
    labels = [t.get_text() for t in fig.axes[-1].get_yticklabels()]
    assert labels == ["burst on"]
    # the title states the run's snapshots (the summary's), and the last checkpoint
    assert "200 snapshots (last checkpoint 190)" in fig.get_suptitle()
    stationary = parse_scene({"name": "s", "array": {"layout": "line", "elements": 4},
                              "sources": [{"name": "w", "role": "desired", "azimuth": 0,
                                           "power_db": 0}]})
    ev = evaluate(stationary, [parse_spec("conventional")], trials=2, snapshots=64)
    assert F.convergence_figure(ev, summarise(ev)).axes[0].get_xscale() == "log"


# ------------------------------------------------------------------ many processors
MANY = ["conventional", "conventional taper=chebyshev", "optimum", "smi",
        "smi loading_db=10", "smi loading_db=10 window=sliding length=64", "lcmv",
        "power_inversion loading_db=0", "eigenspace", "nlms", "rls", "gsc", "frost",
        "lms"]


def test_styles_never_repeat_colour_and_dash_and_group_families():
    procs = [parse_spec(s) for s in MANY]
    st = F.series_styles([p.label for p in procs], [p.method for p in procs])
    pairs = [(v["color"], v["linestyle"]) for v in st.values()]
    assert len(set(pairs)) == len(pairs)
    assert st["smi"]["color"] == st["smi loading_db=10"]["color"]
    assert st["smi"]["linestyle"] != st["smi loading_db=10"]["linestyle"]
    assert len({st[m]["color"] for m in ("smi", "lcmv", "rls", "nlms", "gsc", "frost", "lms",
                                         "eigenspace", "conventional")}) == 9
    assert st["optimum"]["color"] == F.REFERENCE_COLOUR
    # labels alone: many variants of one family still get distinct pairs
    alone = F.series_styles([f"smi length={i}" for i in range(12)])
    pairs = [(v["color"], v["linestyle"]) for v in alone.values()]
    assert len(set(pairs)) == len(pairs)


@pytest.fixture(scope="module")
def crowded():
    jammers = [{"name": f"jammer-number-{i}", "role": "interferer", "azimuth": a,
                "elevation": 5.0 * (i % 3), "power_db": 30 + i}
               for i, a in enumerate((-70, -55, -40, -25, -12, 9, 21, 33, 48, 66))]
    sc = parse_scene({"name": "crowded", "array": {"layout": "line", "elements": 24},
                      "sources": [{"name": "wanted", "role": "desired", "azimuth": 0,
                                   "power_db": 0}] + jammers})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return evaluate(sc, [parse_spec(s) for s in MANY], trials=2, snapshots=48, seed=1)


def test_convergence_legend_names_each_curve_once(crowded):
    fig = F.convergence_figure(crowded, summarise(crowded, patterns=False))
    texts = [t.get_text() for ax in fig.axes if ax.get_legend() is not None
             for t in ax.get_legend().get_texts()]
    assert sum(t.startswith("optimum") for t in texts) == 1
    labels = [p.label for p in crowded.processors if p.method != "optimum"]
    assert sorted(t for t in texts if t in labels) == sorted(labels)
    # small multiples: no panel holds more than PANEL_CURVES processors
    for ax in fig.axes:
        named = [ln for ln in ax.get_lines() if ln.get_label() in labels]
        assert len(named) <= F.PANEL_CURVES


def _overlaps(texts, renderer) -> bool:
    """Do tick labels collide? Level labels: their boxes overlap. Slanted labels are
    parallel lines of text: they collide when the distance between neighbouring lines,
    the anchor spacing times the sine of the slant, is less than one line height."""
    texts = [t for t in texts if t.get_text()]
    angle = texts[0].get_rotation() if texts else 0.0
    if angle % 180 == 0:
        boxes = [t.get_window_extent(renderer) for t in texts]
        return any(a.overlaps(b) for i, a in enumerate(boxes) for b in boxes[i + 1:])
    x = np.sort([t.get_window_extent(renderer).x1 for t in texts])   # anchors: right ends
    height = max(renderer.points_to_pixels(t.get_fontsize()) for t in texts)
    return bool(np.min(np.diff(x)) * abs(np.sin(np.deg2rad(angle))) < height)


def test_null_depth_labels_fit_and_show_elevation(crowded):
    fig = F.null_depth_figure(crowded, summarise(crowded, patterns=False))
    fig.canvas.draw()
    ax = fig.axes[0]
    ticks = ax.get_xticklabels()
    assert not _overlaps(ticks, fig.canvas.get_renderer())
    assert all("el " in t.get_text() for t in ticks)
    # every processor and interferer is shown (as a table of cells when bars would be thin)
    assert len(ticks) == 10
    assert len(ax.get_yticklabels()) == len(MANY)
    # few processors: grouped bars, labels still apart
    few = evaluate(crowded.scene, [parse_spec("conventional"), parse_spec("optimum")],
                   trials=2, snapshots=48, seed=1)
    fig = F.null_depth_figure(few, summarise(few, patterns=False))
    fig.canvas.draw()
    assert not _overlaps(fig.axes[0].get_xticklabels(), fig.canvas.get_renderer())


# ------------------------------------------------------------------ planar figures
@pytest.fixture(scope="module")
def planar():
    sc = _planar_scene(["conventional", "smi loading_db=10"], look_el=10.0)
    return evaluate(sc, [parse_spec("conventional"), parse_spec("smi loading_db=10")],
                    trials=2, snapshots=64, seed=2)


def test_planar_beam_patterns_cut_through_each_jammer(planar):
    fig = F.beam_pattern_figure(planar)
    titles = [ax.get_title(loc="left") for ax in fig.axes]
    assert any("elevation 35" in t and "high" in t for t in titles)
    assert any("elevation 10" in t and "look" in t for t in titles)
    # on the jammer's own cut the adaptive null is deep; the look-elevation cut at the
    # jammer's azimuth is not where the null is
    smi_cut = F.mean_beam_pattern_db(planar, "smi loading_db=10", [30.0])
    on_jammer = F._patterns(planar, planar.by_label("smi loading_db=10").final_weights[None],
                            ["smi"], [30.0], 35.0)[0, 0]
    assert on_jammer < -40 and on_jammer < smi_cut[0] - 20


def test_response_map_marks_every_source(planar):
    summary = summarise(planar, patterns=False)
    pngs = F.standard_figures(planar, summary)
    assert set(pngs) == {"convergence", "beam_pattern", "null_depth", "response_map"}
    assert set(F.FIGURE_TEXT) >= set(pngs)
    fig = F.response_map_figure(planar, summary)
    maps = [ax for ax in fig.axes if ax.get_images()]
    assert len(maps) == 2
    marks = {(round(x, 6), round(y, 6)) for ax in maps[:1] for ln in ax.get_lines()
             for x, y in zip(ln.get_xdata(), ln.get_ydata())}
    assert {(0.0, 10.0), (30.0, 35.0)} <= marks
    # a grid in the x-z plane: the front half, the whole elevation range
    assert maps[0].get_xlim() == (-90.0, 90.0) and maps[0].get_ylim() == (-90.0, 90.0)
    grid = F.response_map_db(planar, ["smi loading_db=10"], [30.0], [35.0])
    assert grid.shape == (1, 1, 1) and grid[0, 0, 0] < -40


# ------------------------------------------------------------------ small items
def _adapt(*argv, cwd=None):
    return subprocess.run([sys.executable, "-m", "adapt", *map(str, argv)], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def test_scene_file_spec_error_names_the_file_and_its_key(tmp_path):
    scene = tmp_path / "bad.yaml"
    scene.write_text("name: bad\narray: {layout: line, elements: 4}\n"
                     "sources:\n  - {name: w, role: desired, azimuth: 0, power_db: 0}\n"
                     "processors: [conventional, \"gsc stepp=0.1\"]\n")
    out = _adapt("compare", scene, "--out", tmp_path / "runs", "--no-progress")
    assert out.returncode == 2
    assert "processors[1].stepp" in out.stderr and "--processor" not in out.stderr
    assert str(scene) in out.stderr
    scene.write_text(scene.read_text().replace("stepp", "step"))
    given = _adapt("compare", scene, "-p", "gsc stepp=0.1", "--out", tmp_path / "runs")
    assert given.returncode == 2 and "--processor[0].stepp" in given.stderr


def test_method_names_are_case_insensitive():
    p = parse_spec("SMI loading_db=10")
    assert p.method == "smi" and p.label == "smi loading_db=10"
    assert parse_spec("Power_Inversion").method == "power_inversion"


def test_singular_counts_read_in_the_singular(tmp_path):
    sc = parse_scene({"name": "one", "array": {"layout": "line", "elements": 4, "spacing": 1},
                      "sources": [{"name": "w", "role": "desired", "azimuth": 0,
                                   "power_db": 0}]})
    with pytest.warns(RuntimeWarning, match="1 training snapshot for 4 elements"):
        evaluate(sc, [parse_spec("smi")], trials=1, snapshots=8, checkpoints=[1, 8])
    from adapt.studies.check import summarise_scene
    text = summarise_scene(sc)
    assert "spacing 1 wavelength;" in text or "spacing 1 wavelength\n" in text
    assert "1 wavelengths" not in text


def test_power_inversion_sliding_window_uses_the_last_snapshots():
    sc = parse_scene({"name": "pi", "array": {"layout": "line", "elements": 6},
                      "sources": [{"name": "w", "role": "desired", "azimuth": 0, "power_db": 0},
                                  {"name": "j", "role": "interferer", "azimuth": 30,
                                   "power_db": 30}], "trials": 3, "seed": 4})
    length, cps = 16, [10, 16, 40, 77]
    batch = TrialBatch(sc, trials=3)
    procs = [parse_spec(f"power_inversion window=sliding length={length} loading_db=0")]
    (res,) = run_processors(procs, batch.blocks(max(cps), block=13), Context.from_batch(batch), cps)
    x = batch.samples(max(cps)).training
    for i, c in enumerate(cps):
        seg = x[:, max(0, c - length):c]
        r = outer_sum(seg) / seg.shape[1] + np.eye(6)           # loading 0 dB: one noise power
        z = np.linalg.solve(r, np.broadcast_to(np.eye(6)[0], (3, 6))[..., None])[..., 0]
        np.testing.assert_allclose(res.weights[:, i], z / np.conj(z[:, :1]), rtol=1e-9)
    with pytest.raises(Exception, match="shorter than the 6 elements"):
        p = parse_spec("power_inversion window=sliding length=4")
        p.check(Context.from_batch(batch))
    with pytest.raises(Exception, match="needs length"):
        parse_spec("power_inversion window=sliding")


def test_distribution_has_its_own_name():
    tomllib = pytest.importorskip("tomllib")          # Python 3.11+
    meta = tomllib.loads((Path(__file__).parents[1] / "pyproject.toml").read_text())
    name = meta["project"]["name"]
    assert name != "adapt" and name.startswith("adapt-")
    assert meta["project"]["scripts"]["adapt"] == "adapt.cli.main:run_as_process"
    readme = (Path(__file__).parents[1] / "README.md").read_text()
    assert name in readme
