"""``adapt size --draw auto`` (the default): drawn covariances exactly where they are
statistically exact, the snapshot streams otherwise, and the record says which and why.

Source of the condition: the sample covariance of K independent CN(0, R) snapshots is
complex Wishart CW(K, R) (Goodman 1963), so drawing it directly is exact only for
stationary Gaussian training data without quantisation, and only serves processors that
use nothing but the sample covariance (:func:`adapt.engine.drawn.covariance_draw_refusal`).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from adapt.cli.main import main
from adapt.errors import InputError
from adapt.scenefile import dump_scene, parse_scene
from adapt.studies.sizing import choose_draw, size

WANTED = {"name": "s", "role": "desired", "azimuth": 0, "power_db": 0, "waveform": "qpsk"}
JAMMERS = [{"name": "j1", "role": "interferer", "azimuth": 40, "power_db": 20,
            "waveform": "gaussian"},
           {"name": "j2", "role": "interferer", "azimuth": -25, "power_db": 25,
            "waveform": "gaussian"}]


def _scene(sources=None, **extra):
    data = {"name": "draw auto", "array": {"layout": "line", "elements": 4, "spacing": 0.5},
            "sources": sources or [WANTED, *JAMMERS], "snapshots": 32, "trials": 20,
            "seed": 5}
    data.update(extra)
    return parse_scene(data)


@pytest.mark.parametrize("change, specs, draw, words", [
    ({}, ["smi", "smi loading_db=10"], "covariance", "complex-Wishart"),
    ({}, ["smi", "lms"], "samples", "lms"),
    ({"receiver": {"bits": 8, "full_scale_db": 30}}, ["smi"], "samples", "quantises"),
    ({"sources": [WANTED, {**JAMMERS[0], "waveform": "bpsk"}]}, ["smi"], "samples",
     "not Gaussian"),
    ({"sources": [WANTED, {**JAMMERS[0], "pulsing": {"period": 8, "on": 4}}]}, ["smi"],
     "samples", "stationary"),
])
def test_auto_draws_covariance_only_where_exact(change, specs, draw, words):
    sizing = size(_scene(**change), specs, snapshots="4,8,16", draw="auto")
    rec = sizing.record
    assert rec["draw"] == draw
    assert rec["draw_reason"].startswith("auto:") and words in rec["draw_reason"]
    assert f"training data: {draw}" in sizing.table()


def test_auto_is_the_api_default_and_equals_the_drawn_run_where_exact():
    # the same choice, the same draws: bit-identical to asking for the covariance path
    from adapt import api
    sc = _scene()
    auto = api.size(sc, ["smi loading_db=10"], snapshots="4,8,16")
    drawn = size(sc, ["smi loading_db=10"], snapshots="4,8,16", draw="covariance")
    assert auto.record["draw"] == "covariance"
    assert np.array_equal(auto.evaluation.processors[0].normalised,
                          drawn.evaluation.processors[0].normalised)


def test_samples_forces_the_streams_and_unknown_values_are_refused():
    sc = _scene()
    forced = size(sc, ["smi"], snapshots="4,8", draw="samples")
    assert forced.record["draw"] == "samples"
    assert forced.record["draw_reason"].startswith("samples requested")
    with pytest.raises(InputError, match="unknown way"):
        choose_draw("wishart", sc, [])


def test_size_command_reports_the_choice(tmp_path, capsys):
    scene_file = tmp_path / "scene.yaml"
    scene_file.write_text(dump_scene(_scene()))
    out = tmp_path / "runs"
    assert main(["size", str(scene_file), "-p", "smi", "--snapshots", "4,8",
                 "--no-progress", "--out", str(out / "a")]) == 0
    assert "training data: covariance (auto:" in capsys.readouterr().out
    (folder,) = (out / "a").iterdir()
    rec = json.loads((folder / "sizing.json").read_text())
    assert rec["draw"] == "covariance" and rec["draw_reason"].startswith("auto:")
    assert main(["size", str(scene_file), "-p", "smi", "--snapshots", "4,8", "--draw",
                 "samples", "--no-progress", "--out", str(out / "b")]) == 0
    assert "training data: samples (samples requested" in capsys.readouterr().out
    (folder,) = (out / "b").iterdir()
    assert json.loads((folder / "sizing.json").read_text())["draw"] == "samples"
