"""Design studies (adapt.studies.sweep, ``adapt sweep``): axes, points, common random
numbers, the recommendations, the run folder, and checks against closed forms."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from adapt.errors import InputError
from adapt.scenefile import parse_scene
from adapt.studies.sweep import parse_values, prepare, sweep, write_sweep_run

N = 8


def line_scene(**extra) -> dict:
    scene = {
        "name": "walk",
        "array": {"layout": "line", "elements": N, "spacing": 0.5},
        "sources": [
            {"name": "link", "role": "desired", "azimuth": 0, "power_db": 0},
            {"name": "jam-1", "role": "interferer", "azimuth": 20, "power_db": 20},
        ],
        "snapshots": 64, "trials": 40, "seed": 11,
        "processors": ["optimum", "smi loading_db=10", "conventional"],
    }
    scene.update(extra)
    return scene


def steering(az_deg: float) -> np.ndarray:
    # independent of adapt.scene.geometry: a half-wavelength line along x, centred,
    # phase exp(+j 2 pi x sin(az)) (README's convention)
    x = (np.arange(N) - (N - 1) / 2) * 0.5
    return np.exp(2j * np.pi * x * np.sin(np.deg2rad(az_deg)))


def test_values_forms():
    assert parse_values("0:10:5", "k") == ((0, 5, 10), "linear")
    assert parse_values("0:1:0.1", "k")[0][3] == 0.3            # no binary noise
    assert parse_values("0:1:0.1", "k")[0][-1] == 1.0           # STOP included
    assert parse_values("1,2.5,x", "k") == ((1, 2.5, "x"), "list")
    vals, spacing = parse_values("log:1e-4:1e-2:3", "k")
    assert spacing == "log" and np.allclose(vals, [1e-4, 1e-3, 1e-2])
    for bad in ("", "1:2", "0:10:-1", "log:0:1:3", "log:1:10:1", "1,,2", "a:b:c"):
        with pytest.raises(InputError):
            parse_values(bad, "k")


def test_optimum_follows_the_closed_form_as_a_jammer_walks_into_the_main_lobe():
    # Van Trees 2002, ch. 6: SINR_opt = sigma_s^2 a^H R^-1 a with R = I + P v v^H, and for
    # one jammer SINR_opt = sigma_s^2 (N - P |a^H v|^2 / (1 + N P)); at the look direction
    # itself it collapses to sigma_s^2 N / (1 + N P).
    scene = parse_scene(line_scene(processors=["optimum"], trials=2, snapshots=16))
    result = sweep(scene, ["sources[jam-1].azimuth=0:10:2"])
    p = 10 ** (20 / 10)
    a = steering(0.0)
    for point in result.points:
        v = steering(point.values["sources[jam-1].azimuth"])
        closed = N - p * abs(np.vdot(a, v)) ** 2 / (1 + N * p)
        r = np.eye(N) + p * np.outer(v, v.conj())
        direct = np.real(np.vdot(a, np.linalg.solve(r, a)))
        assert closed == pytest.approx(direct, rel=1e-10)
        assert point.optimum_sinr_db == pytest.approx(10 * np.log10(closed), abs=1e-9)
    first = result.points[0].optimum_sinr_db
    assert first == pytest.approx(10 * np.log10(N / (1 + N * p)), abs=1e-9)
    assert result.points[-1].optimum_sinr_db > first + 15      # out of the main lobe


def test_the_same_value_twice_gives_bit_identical_points():
    scene = parse_scene(line_scene(processors=["smi loading_db=10", "lms", "rls"]))
    result = sweep(scene, ["sources[jam-1].power_db=25,25"])
    a, b = result.points
    assert a.to_json()["processors"] == b.to_json()["processors"]
    assert [p.curve for p in a.processors] == [p.curve for p in b.processors]
    assert a.optimum_sinr_db == b.optimum_sinr_db
    for label in result.labels:
        assert np.array_equal(result.losses[label][0], result.losses[label][1], equal_nan=True)


def test_common_random_numbers_shrink_the_error_of_a_difference():
    # Paired trials (the same noise and waveforms at both points) against the error an
    # unpaired comparison would have: sqrt(se_a^2 + se_b^2) (independent runs).
    scene = parse_scene(line_scene(processors=["smi"], trials=200, snapshots=24))
    result = sweep(scene, ["sources[jam-1].azimuth=20,21"])
    la, lb = result.losses["smi"]
    d = la - lb
    paired = d.std(ddof=1) / math.sqrt(d.size)
    unpaired = math.sqrt(la.var(ddof=1) / la.size + lb.var(ddof=1) / lb.size)
    assert paired * 5 < unpaired


def test_loading_study_has_the_known_shape():
    # Reed, Mallett and Brennan 1974: unloaded SMI at K = 2N has mean normalised SINR
    # (K - N + 2) / (K + 1), about 2.3 dB of loss for N = 8; Carlson 1988: loading near
    # 10 dB above the noise recovers most of it; loading far above the jammer turns the
    # weights toward the conventional beam and the null fills in.
    scene = parse_scene(line_scene(processors=["smi", "conventional"], trials=400,
                                   snapshots=2 * N))
    result = sweep(scene, ["smi.loading_db=none,10,70"])
    loss = {p.values["smi.loading_db"]: next(q for q in p.processors
                                             if q.method == "smi").final
            for p in result.points}
    rmb = -10 * np.log10((2 * N - N + 2) / (2 * N + 1))
    rho = 10 ** (-np.asarray(result.losses["smi loading_db=varied"][0]) / 10)
    unloaded = -10 * np.log10(rho.mean())
    se_db = 10 / np.log(10) * rho.std(ddof=1) / rho.mean() / math.sqrt(rho.size)
    assert unloaded == pytest.approx(rmb, abs=4 * se_db)           # about 0.04 dB each
    assert loss[10].loss_db_mean < loss["none"].loss_db_mean - 1.0
    conv = result.points[0].processors[1].final.null_depth_db["jam-1"]
    heavy = loss[70].null_depth_db["jam-1"]
    assert heavy == pytest.approx(conv, abs=1.0)
    assert loss[10].null_depth_db["jam-1"] < heavy - 20
    best = next(r for r in result.recommendations if r["kind"] == "best_setting")
    assert best["best"] == 10


def test_a_scene_axis_reports_where_each_processor_holds():
    scene = parse_scene(line_scene(trials=30))
    result = sweep(scene, ["sources[jam-1].azimuth=0:30:5"])
    conv = next(r for r in result.recommendations if r["processor"] == "conventional")
    loss = [p.processor("conventional").final.loss_db_mean for p in result.points]
    values = [p.values["sources[jam-1].azimuth"] for p in result.points]
    # the words follow the numbers: every value inside a reported span is within 3 dB,
    # every value outside is not, and the worst point is the largest loss
    inside = set()
    for a, b in conv["within"]:
        inside |= {v for v in values if a <= v <= b}
    for v, x in zip(values, loss):
        assert (x <= 3.0) == (v in inside)
    assert conv["worst"] == values[int(np.argmax(loss))]
    assert not any(r["processor"] == "optimum" for r in result.recommendations)


def test_grid_study_and_run_folder(tmp_path):
    scene = parse_scene(line_scene(trials=8, snapshots=32))
    result = sweep(scene, ["sources[jam-1].azimuth=10,20", "smi.loading_db=0,10,20"])
    assert len(result.points) == 6 and result.shape() == (2, 3)
    folder = write_sweep_run(result, tmp_path, command_line="adapt sweep x")
    names = {p.name for p in folder.iterdir()}
    assert {"sweep.json", "sweep.csv", "sweep.png", "report.html", "scene.yaml",
            "manifest.json", "summary.txt"} <= names
    record = json.loads((folder / "sweep.json").read_text())
    assert [a["key"] for a in record["axes"]] == ["sources[jam-1].azimuth", "smi.loading_db"]
    assert set(record["points"][0]) >= {"values", "optimum_sinr_db", "processors"}
    metrics_final_keys = {"sinr_db_mean", "loss_db_mean", "loss_db_p10", "loss_db_p90",
                          "null_depth_db", "white_noise_gain_db"}
    assert metrics_final_keys <= set(record["points"][0]["processors"][0]["final"])
    rows = (folder / "sweep.csv").read_text().splitlines()
    assert len(rows) == 1 + 6 * 3
    assert "sweep" in folder.name


def test_threads_and_resume_give_identical_results(tmp_path):
    scene = parse_scene(line_scene(processors=["smi loading_db=10", "nlms"], trials=24))
    one = sweep(scene, ["sources[jam-1].azimuth=10,30"], threads=1, chunk=5)
    two = sweep(scene, ["sources[jam-1].azimuth=10,30"], threads=2, chunk=7,
                store=tmp_path / "partial")
    again = sweep(scene, ["sources[jam-1].azimuth=10,30"], threads=2, chunk=7,
                  store=tmp_path / "partial")                      # every chunk kept
    for r in (two, again):
        assert [p.to_json() for p in r.points] == [p.to_json() for p in one.points]
    assert sorted(p.name for p in (tmp_path / "partial").iterdir()) == ["point-0000",
                                                                        "point-0001"]


def test_bad_axes_are_refused_with_the_point_named():
    scene = parse_scene(line_scene())
    with pytest.raises(InputError, match="did you mean"):
        prepare(scene, ["sources[jam-1].azimut=0:10:1"])
    with pytest.raises(InputError, match="did you mean"):
        prepare(scene, ["smi.loadin_db=0:10:1"])
    with pytest.raises(InputError, match=r"sources\[jam-1\].power_db=200"):
        prepare(scene, ["sources[jam-1].power_db=20,200"])
    with pytest.raises(InputError, match="cannot be varied"):
        prepare(scene, ["seed=1,2"])
    with pytest.raises(InputError, match="points"):
        prepare(scene, ["sources[jam-1].azimuth=0:50:0.1"])
    assert len(prepare(scene, ["sources[jam-1].azimuth=0:50:0.1"], max_points=1000).points) \
        == 501
    with pytest.raises(InputError, match="axes"):
        prepare(scene, ["array.spacing=0.4,0.5", "look.azimuth=0,1", "receiver.bits=8,10"])


def test_keys_left_to_their_defaults_can_be_varied():
    scene = parse_scene(line_scene())
    study = prepare(scene, ["array.errors.phase_deg_rms=0,5", "sources[link].elevation=0,3"])
    phases = {sc.array.errors.phase_deg_rms for _, sc, _ in study.points}
    elevations = {sc.desired.elevation for _, sc, _ in study.points}
    assert phases == {0.0, 5.0} and elevations == {0.0, 3.0}


def test_sweep_command(tmp_path, run_cli):
    path = tmp_path / "walk.yaml"
    import yaml
    path.write_text(yaml.safe_dump(line_scene(
        trials=6, sweep={"vary": ["sources[jam-1].azimuth=10:30:10"], "target_loss_db": 2})))
    code, out, err = run_cli(["sweep", str(path), "--out", str(tmp_path / "runs"),
                              "--no-progress"])
    assert code == 0, err
    assert "holds within 2 dB" in out or "never within 2 dB" in out
    folder = next((tmp_path / "runs").iterdir())
    assert json.loads((folder / "sweep.json").read_text())["target_loss_db"] == 2
    code, out, err = run_cli(["sweep", str(path), "--vary", "sources[jam-9].azimuth=1,2",
                              "--out", str(tmp_path / "runs")])
    assert code == 2 and "Traceback" not in err and "jam-9" in err


def test_interrupted_study_resumes_to_the_same_result(tmp_path, run_cli, monkeypatch):
    import yaml

    import adapt.studies.compare as compare_module
    path = tmp_path / "walk.yaml"
    path.write_text(yaml.safe_dump(line_scene(trials=6, snapshots=32)))
    real = compare_module.compare
    calls = []

    def stop_at_second_point(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(compare_module, "compare", stop_at_second_point)
    out = tmp_path / "runs"
    code, _, err = run_cli(["sweep", str(path), "--vary", "sources[jam-1].azimuth=10,20,30",
                            "--out", str(out), "--no-progress"])
    assert code == 130, err
    folder = next(out.iterdir())
    assert (folder / "INCOMPLETE").is_file()
    monkeypatch.setattr(compare_module, "compare", real)
    code, _, err = run_cli(["sweep", "--resume", str(folder), "--no-progress"])
    assert code == 0, err
    got = json.loads((folder / "sweep.json").read_text())
    plain = sweep(str(path), ["sources[jam-1].azimuth=10,20,30"])
    assert got["points"] == json.loads(json.dumps(plain.to_json()["points"]))
    assert "--vary" in json.loads((folder / "manifest.json").read_text())["command_line"]


@pytest.mark.slow
def test_local_workers_give_the_same_study():
    pytest.importorskip("dask.distributed")
    scene = parse_scene(line_scene(processors=["smi loading_db=10", "nlms"], trials=12))
    one = sweep(scene, ["sources[jam-1].azimuth=10,30"], threads=1)
    many = sweep(scene, ["sources[jam-1].azimuth=10,30"], workers=2, chunk=5)
    assert [p.to_json() for p in many.points] == [p.to_json() for p in one.points]
