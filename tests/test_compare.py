"""compare(): metrics against closed forms, run folders, the CLI, the Python API example."""
from __future__ import annotations

import csv
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from adapt import api, io
from adapt.cli.main import main
from adapt.errors import InputError, SpecError
from adapt.report.runfolder import CURVE_COLUMNS, RUN_FILES, read_run
from adapt.scene import geometry
from adapt.scenefile import parse_scene
from adapt.studies.compare import compare, write_compare_run

ROOT = Path(__file__).resolve().parents[1]

SCENE = {
    "name": "four elements, one jammer",
    "array": {"layout": "line", "elements": 4, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 20, "power_db": 20}],
    "snapshots": 64, "trials": 12, "seed": 3,
    "processors": ["conventional", "optimum"],
}


@pytest.fixture(scope="module")
def small():
    scene = parse_scene(SCENE)
    return compare(scene, checkpoints=[1, 2, 4, 8, 16, 32, 64])


def _scene_file(tmp_path: Path) -> Path:
    p = tmp_path / "four.yaml"
    p.write_text(yaml.safe_dump(SCENE), encoding="utf-8")
    return p


# ------------------------------------------------------------------ metrics
def test_conventional_scores_the_closed_form(small):
    # w = a/N: SINR = s2 N^2 / (N + P_j |a^H v|^2) (derived in tests/test_scores.py),
    # here a = ones(4) (broadside), v the jammer's steering at 20 degrees, s2 = 1, P_j = 100
    pos = geometry.line_positions(4, 0.5)
    a = geometry.steering_vector(pos, 0.0)
    v = geometry.steering_vector(pos, 20.0)
    sinr = 16 / (4 + 100 * abs(np.vdot(a, v)) ** 2)
    opt = np.real(np.vdot(a, np.linalg.solve(np.eye(4) + 100 * np.outer(v, v.conj()), a)))
    conv = small.processor("conventional")["final"]
    assert conv["sinr_db_mean"] == pytest.approx(10 * np.log10(sinr), abs=1e-9)
    assert small.metrics["optimum_sinr_db"] == pytest.approx(10 * np.log10(opt), abs=1e-9)
    assert conv["loss_db_mean"] == pytest.approx(10 * np.log10(opt / sinr), abs=1e-9)
    # null depth toward the jammer: |w^H v|^2 / |w^H a|^2 = |a^H v|^2 / 16
    assert conv["null_depth_db"]["jammer"] == pytest.approx(
        10 * np.log10(abs(np.vdot(a, v)) ** 2 / 16), abs=1e-9)
    assert conv["white_noise_gain_db"] == pytest.approx(10 * np.log10(4), abs=1e-9)
    assert conv["pointing_error_deg_mean"] == pytest.approx(0.0, abs=1e-3)
    # the optimum (Van Trees 2002, ch. 6) loses nothing and converges at once
    optimum = small.processor("optimum")
    assert abs(optimum["final"]["loss_db_mean"]) < 1e-9
    assert optimum["snapshots_to_3db"] == 1 and optimum["snapshots_to_3db_fraction"] == 1


def test_measured_sinr_agrees_with_the_covariance_sinr(small):
    # the measured SINR of the held final weight over the 256-snapshot tail estimates
    # the same SINR; ratio of two chi-square(512)/512 variables per trial: sd of the dB
    # value about 4.34 * sqrt(2/256) = 0.38 dB per trial, 0.11 dB over 12 trials;
    # allow 4 of those (plus the small bias of the ratio)
    f = small.processor("conventional")["final"]
    assert f["measured_sinr_db_mean"] == pytest.approx(f["sinr_db_mean"], abs=0.45)


def test_metrics_schema(small):
    m = json.loads(json.dumps(io.to_jsonable(small.metrics)))
    for key, kind in [("scene", str), ("elements", int), ("trials", int), ("snapshots", int),
                      ("seed", int), ("optimum_sinr_db", float), ("processors", list)]:
        assert isinstance(m[key], kind), key
    assert (m["elements"], m["trials"], m["snapshots"], m["seed"]) == (4, 12, 64, 3)
    for p in m["processors"]:
        assert isinstance(p["label"], str) and isinstance(p["method"], str)
        assert isinstance(p["params"], dict)
        for key in ("sinr_db_mean", "loss_db_mean", "normalized_sinr_mean",
                    "white_noise_gain_db"):
            assert isinstance(p["final"][key], float), key
        assert set(p["final"]["null_depth_db"]) == {"jammer"}
        assert p["snapshots_to_3db"] is None or isinstance(p["snapshots_to_3db"], int)
        c = p["curve"]
        assert c["snapshots"] == [1, 2, 4, 8, 16, 32, 64]
        for key in ("normalized_sinr_mean", "loss_db_p10", "loss_db_p90"):
            assert len(c[key]) == 7 and all(isinstance(x, float) for x in c[key])


def test_table_fits_100_columns_and_names_everything(small):
    text = small.table()
    assert max(len(line) for line in text.splitlines()) <= 100
    for word in ("conventional", "optimum", "Simulation only", "optimum SINR"):
        assert word in text
    assert "-0.00" not in text


def test_processors_default_to_the_scene_and_errors_are_input_errors():
    scene = parse_scene({k: v for k, v in SCENE.items() if k != "processors"})
    with pytest.raises(SpecError):
        compare(scene)
    with pytest.raises(InputError):
        compare(scene, ["conventional"], trials=0)
    with pytest.raises(InputError):
        compare(scene, ["conventional"], checkpoints=[0, 4])
    with pytest.raises(SpecError):
        compare(scene, ["conventional", "conventional"])


def test_progress_counts_every_trial_snapshot_and_results_do_not_depend_on_it():
    # progress total = trials x (snapshots + tail); blocks change, results do not
    from adapt.studies.compare import TAIL
    scene = parse_scene(SCENE)
    done = []
    with_bar = compare(scene, ["smi loading_db=10"], trials=3, snapshots=40,
                       checkpoints=[5, 40], progress=done.append)
    plain = compare(scene, ["smi loading_db=10"], trials=3, snapshots=40, checkpoints=[5, 40])
    assert sum(done) == 3 * (40 + TAIL) and len(done) > 1
    np.testing.assert_array_equal(with_bar.evaluation.processors[0].sinr,
                                  plain.evaluation.processors[0].sinr)


# ------------------------------------------------------------------ run folders
def test_run_folders_are_complete_verified_and_never_overwritten(small, tmp_path):
    first = write_compare_run(small, tmp_path / "runs", command_line="adapt compare x")
    names = {p.name for p in first.iterdir()}
    assert set(RUN_FILES) <= names
    assert {"convergence.png", "beam_pattern.png", "null_depth.png", "report.html"} <= names
    assert not any(n.startswith(".partial-") for n in names)
    assert io.check_manifest(first) == []
    manifest = json.loads((first / "manifest.json").read_text())
    assert manifest["seed"] == 3 and manifest["command_line"] == "adapt compare x"
    assert {"adapt", "numpy", "scipy"} <= set(manifest["versions"])
    assert set(manifest["files"]) == names - {"manifest.json"}
    before = {p.name: io.sha256_file(p) for p in first.iterdir()}
    second = write_compare_run(small, tmp_path / "runs", figures=False)
    assert second != first and second.parent == first.parent
    assert {p.name: io.sha256_file(p) for p in first.iterdir()} == before
    # a changed byte is caught
    (second / "curves.csv").write_text("tampered\n")
    assert any("curves.csv" in msg for msg in io.check_manifest(second))


def test_curves_csv_and_scene_yaml(small, tmp_path):
    folder = write_compare_run(small, tmp_path, figures=False)
    with open(folder / "curves.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == CURVE_COLUMNS
    assert len(rows) == 2 * 7
    assert [r["snapshots"] for r in rows[:7]] == ["1", "2", "4", "8", "16", "32", "64"]
    conv = small.processor("conventional")["curve"]
    np.testing.assert_allclose([float(r["normalized_sinr_mean"]) for r in rows[:7]],
                               conv["normalized_sinr_mean"], rtol=1e-9)
    # scene.yaml reloads to the scene as run
    again = parse_scene((folder / "scene.yaml").read_text())
    assert again.resolved == small.scene.resolved
    np.testing.assert_array_equal(again.array.positions, small.scene.array.positions)
    back = read_run(folder)
    assert back["problems"] == [] and back["metrics"]["trials"] == 12


# ------------------------------------------------------------------ command line
def test_cli_runs_and_prints_table_and_folder(tmp_path, capsys):
    path = _scene_file(tmp_path)
    code = main(["compare", str(path), "--trials", "4", "--snapshots", "32",
                 "--checkpoints", "1,4,16,32", "--out", str(tmp_path / "out"),
                 "--processor", "conventional", "-p", "optimum"])
    out = capsys.readouterr().out
    assert code == 0
    folder = Path(re.search(r"run folder: (.+)", out).group(1).strip())
    assert folder.parent == tmp_path / "out" and io.check_manifest(folder) == []
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["command_line"].startswith("adapt compare ") and "--trials 4" in manifest["command_line"]
    m = json.loads((folder / "metrics.json").read_text())
    assert m["trials"] == 4 and [p["label"] for p in m["processors"]] == ["conventional", "optimum"]
    assert "snapshots" in out and "optimum" in out


@pytest.mark.parametrize("extra", [
    ["--trials", "0"], ["--trials", "many"], ["--snapshots", "-5"], ["--seed", "-1"],
    ["--processor", "smy"], ["--processor", "smi loading_db=abc"],
    ["--checkpoints", "1,99999"], ["--checkpoints", "a,b"],
])
def test_cli_bad_input_exits_2_with_one_line(tmp_path, capsys, extra):
    path = _scene_file(tmp_path)
    code = main(["compare", str(path), "--out", str(tmp_path / "out"), *extra])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("adapt: error: ") and err.count("\n") == 1
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_cli_missing_scene_exits_2(tmp_path, capsys):
    assert main(["compare", str(tmp_path / "nope.yaml"), "--out", str(tmp_path)]) == 2
    assert capsys.readouterr().err.count("\n") == 1


# ------------------------------------------------------------------ Python API
def _api_example() -> str:
    doc = api.__doc__
    lines = doc.split("\n\n")[1]            # the indented example block
    return "\n".join(line[4:] for line in lines.splitlines())


def test_api_example_runs(tmp_path, monkeypatch, capsys):
    # the README example (same text as the adapt.api docstring) runs as written
    (tmp_path / "scenes").mkdir()
    shutil.copy(ROOT / "scenes" / "single_jammer.yaml", tmp_path / "scenes")
    monkeypatch.chdir(tmp_path)
    code = _api_example()
    assert "compare(" in code and "write_run(" in code
    namespace: dict = {}
    exec(compile(code, "README example", "exec"), namespace)  # noqa: S102
    assert namespace["block"].data.shape == (4, 256, 8)
    assert namespace["results"][1].weights.shape[::2] == (4, 8)
    folder = namespace["folder"]
    assert folder.parent == Path("runs") and io.check_manifest(folder) == []
    assert "Simulation only" in capsys.readouterr().out


def test_a_scene_listed_processor_refused_by_its_own_check_names_the_file(tmp_path, run_cli):
    # the spec parses; the processor refuses this array when the run starts
    path = tmp_path / "small.yaml"
    path.write_text("array: {layout: line, elements: 4, spacing: 0.5}\n"
                    "sources:\n"
                    "  - {name: s, role: desired, azimuth: 0, power_db: 0}\n"
                    "  - {name: j, role: interferer, azimuth: 30, power_db: 30}\n"
                    "trials: 2\nsnapshots: 64\nprocessors: ['eigenspace rank=9']\n")
    code, _, err = run_cli(["compare", str(path), "--out", str(tmp_path / "runs")])
    assert code == 2 and "Traceback" not in err
    assert f"{path}: processors[0].rank" in err
