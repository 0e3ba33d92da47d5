"""Guards shared by every processor: element minimum, scene checks located in the spec
list, diverged weights refused, and `adapt check` running the processors' own checks.

No outside reference is needed here: these are the project's own defined outcomes
(README, "Reliability"): a processor either runs and gives finite weights or is refused
with one clear message and exit code 2 — never a traceback, never NaN scores.
"""
from __future__ import annotations

import numpy as np
import pytest
import yaml

from adapt.errors import SpecError
from adapt.processors import Context, parse_spec, registry, run_processors
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch


def scene_text(elements: int, processors=()) -> str:
    return yaml.safe_dump({
        "array": {"layout": "line", "elements": elements},
        "sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0},
                    {"name": "j", "role": "interferer", "azimuth": 30, "power_db": 20}],
        "trials": 3, "snapshots": 64, "seed": 5, "processors": list(processors)})


@pytest.mark.parametrize("method", sorted(registry()))
@pytest.mark.parametrize("elements", [1, 2])
def test_every_method_runs_or_is_refused_on_tiny_arrays(method, elements):
    scene = parse_scene(scene_text(elements))
    batch = TrialBatch(scene)
    proc = parse_spec(method)
    try:
        (res,) = run_processors([proc], batch.blocks(64), Context.from_batch(batch), [8, 64])
    except SpecError as exc:
        # refused: only for a stated reason, located at the spec
        assert elements < proc.min_elements or "processors[0]" in str(exc), str(exc)
        return
    assert elements >= proc.min_elements
    # space-time weights: the sub-band processor reports N x bins entries
    per = proc.params["bins"] if proc.method == "subband" else 1
    assert res.weights.shape == (3, 2, elements * per)
    assert np.all(np.isfinite(res.weights))


def test_diverged_weights_are_refused_not_scored(run_cli, write_file, tmp_path):
    # a forgetting factor far below 1 - 1/N makes the RLS recursion blow up
    path = write_file("s.yaml", scene_text(8))
    code, out, err = run_cli(["compare", path, "-p", "rls forgetting=0.01", "--out",
                              tmp_path / "runs", "--no-progress"])
    assert code == 2 and not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())
    assert "diverged" in err and "--processor[0]" in err and "Traceback" not in err


def test_scene_checks_are_located_at_the_spec(run_cli, write_file):
    path = write_file("s.yaml", scene_text(4, ["smi", "lms step=10"]))
    code, out, err = run_cli(["check", path])
    assert code == 2
    assert "processors[1].step" in err and "stability bound" in err
    code, out, err = run_cli(["check", write_file("ok.yaml", scene_text(4, ["smi", "lms"]))])
    assert code == 0, err


def test_element_minimum_through_the_cli(run_cli, write_file, tmp_path):
    path = write_file("one.yaml", scene_text(1))
    code, out, err = run_cli(["compare", path, "-p", "gsc", "--no-progress",
                              "--out", tmp_path / "runs"])
    assert code == 2 and "needs at least 2 elements" in err and "Traceback" not in err


def test_mean_square_divergent_lms_step_is_refused_by_check(run_cli, write_file):
    # Widrow, McCool, Larimore & Johnson (1976): 16-element half-wave line, 0 dB Gaussian
    # wanted signal, eight 30 dB jammers; step 1.5e-5 has mean-square sum 1.10 (refused
    # although 15 % of 2/lambda_max), step 1.2e-5 has 0.85 (accepted)
    sources = [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0,
                "waveform": "gaussian"}]
    sources += [{"name": f"j{i}", "role": "interferer", "azimuth": az, "power_db": 30}
                for i, az in enumerate((12, -12, 25, -25, 41, -41, 60, -60))]

    def text(step):
        return yaml.safe_dump({"array": {"layout": "line", "elements": 16},
                               "sources": sources, "trials": 2, "snapshots": 4000,
                               "seed": 5, "processors": [f"lms step={step}"]})
    code, out, err = run_cli(["check", write_file("bad.yaml", text(1.5e-5))])
    assert code == 2 and "Traceback" not in err
    assert "processors[0].step" in err and "mean-square stability bound" in err
    assert "1.1 at this step" in err and "step=auto" in err
    code, out, err = run_cli(["check", write_file("ok.yaml", text(1.2e-5))])
    assert code == 0, err
