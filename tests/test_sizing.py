"""Snapshot sizing (adapt/studies/sizing.py, adapt size): simulation against the closed forms,
the sizing answers and their intervals, the run folder and the command line."""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from adapt import io
from adapt.cli.main import main
from adapt.errors import InputError
from adapt.scenefile import dump_scene, parse_scene
from adapt.studies import sizing, theory

N = 8
WANTED = {"name": "s", "role": "desired", "azimuth": 0, "power_db": 0}
JAMMERS = [{"name": "j1", "role": "interferer", "azimuth": 35, "power_db": 30},
           {"name": "j2", "role": "interferer", "azimuth": -50, "power_db": 30}]


def _scene(sources=None, **extra):
    data = {"name": "sizing test", "array": {"layout": "line", "elements": N, "spacing": 0.5},
            "sources": sources or [WANTED, *JAMMERS], "snapshots": 64, "trials": 400,
            "seed": 7}
    data.update(extra)
    return parse_scene(data)


@pytest.fixture(scope="module")
def unloaded():
    # one stream per trial, scored at every sweep point (2N-3 = 13 included)
    return sizing.size(_scene(), ["smi"], snapshots=[8, 10, 11, 12, 13, 14, 15, 16, 24, 40],
                       trials=800, seed=11)


def _points(rec):
    return {p["snapshots"]: p for p in rec["points"]}


def test_unloaded_smi_matches_rmb_within_four_sem(unloaded):
    # Reed, Mallett and Brennan 1974: E[rho] = (K+2-N)/(K+1) for Gaussian interference
    proc = unloaded.record["processors"][0]
    assert proc["theory"]["name"] == "rmb"
    for k, p in _points(proc).items():
        expected = (k + 2 - N) / (k + 1)
        assert p["theory_normalized_sinr_mean"] == pytest.approx(expected, rel=1e-12)
        assert abs(p["normalized_sinr_mean"] - expected) < 4 * p["normalized_sinr_sem"], k
    assert proc["disagreements"] == [] and unloaded.record["disagreements"] == []
    # the SEM is the sample standard deviation over sqrt(trials) of the per-trial rho
    rho = unloaded.evaluation.processors[0].normalised
    assert proc["points"][4]["normalized_sinr_sem"] == pytest.approx(
        rho[:, 4].std(ddof=1) / np.sqrt(rho.shape[0]), rel=1e-9)


def test_three_db_point_of_unloaded_smi(unloaded):
    # RMB 1974: mean rho = 1/2 exactly at K = 2N-3 = 13
    proc = unloaded.record["processors"][0]
    p13 = _points(proc)[13]
    assert abs(p13["normalized_sinr_mean"] - 0.5) < 4 * p13["normalized_sinr_sem"]
    # a 3.00 dB target (rho >= 0.50119) is met in theory at ceil((N-2+t)/(1-t)) = 14,
    # one more than the half-power point 2N-3
    t = 10 ** -0.3
    assert proc["theory"]["required_snapshots"] == int(np.ceil((N - 2 + t) / (1 - t))) == 14
    assert proc["theory"]["half_power_snapshots"] == 13
    req = proc["required_snapshots_mean"]
    assert req is not None and abs(req - 13) <= 2
    lo, hi = proc["required_snapshots_mean_range"]
    assert lo <= req <= hi and hi - lo <= 5
    # the rule of thumb of RMB: about 2N
    assert proc["rule_of_thumb"]["snapshots"] == 2 * N


def test_loaded_smi_meets_three_db_near_2j():
    # Carlson 1988: with loading 10 dB above the noise, about 2J snapshots for 3 dB
    # (J = 2 strong jammers here: eigenvalues 8 x 1000, far above the load)
    res = sizing.size(_scene(), ["smi loading_db=10"], snapshots="1:64", trials=400, seed=5)
    proc = res.record["processors"][0]
    assert proc["theory"] is None                    # no exact law for loaded SMI
    assert proc["rule_of_thumb"]["snapshots"] == 4 and proc["rule_of_thumb"]["strong_interferers"] == 2
    req = proc["required_snapshots_mean"]
    assert req is not None and 2 < req <= 8          # near 2J = 4, far below 2N = 16
    assert res.record["rules_of_thumb"]["loaded_2j"] == 4


def test_signal_present_matches_its_closed_form():
    # derived in adapt/studies/theory.py (Boroson 1980): rho = eta / (1 + S (1 - eta)),
    # eta ~ Beta(K-N+2, N-1); S = SINR_opt = 8 (0 dB wanted signal, 8 elements, jammers
    # nulled almost perfectly)
    sc = _scene(training="signal")
    res = sizing.size(sc, ["smi"], snapshots=[8, 12, 20, 40, 80, 160], trials=600, seed=3)
    proc = res.record["processors"][0]
    s = 10 ** (res.record["optimum_sinr_db"] / 10)
    assert s == pytest.approx(theory.nominal_optimum_sinr(sc), rel=1e-9)
    assert proc["theory"]["name"] == "signal-present"
    for k, p in _points(proc).items():
        expected = float(theory.signal_present_mean(k, N, s))
        assert p["theory_normalized_sinr_mean"] == pytest.approx(expected, rel=1e-9)
        assert abs(p["normalized_sinr_mean"] - expected) < 4 * p["normalized_sinr_sem"], k
        # far below RMB once K is small against (N-1)(2+S)
        if k <= 40:
            assert expected < (k + 2 - N) / (k + 1) - 0.05
    assert proc["disagreements"] == []


def test_sweep_points_agree_with_single_count_runs():
    # one stream scored at every sweep point = separate runs of each count, same seed
    # (equal to summation rounding: the growing sums add the same snapshots in other
    # groupings)
    sc = _scene(trials=40)
    specs = ["smi", "smi loading_db=10"]
    sweep = sizing.size(sc, specs, snapshots=[9, 13, 20], seed=21)
    for j, k in enumerate((9, 13, 20)):
        alone = sizing.size(sc, specs, snapshots=[k], seed=21)
        for i in range(2):
            a = sweep.evaluation.processors[i].normalised[:, j]
            b = alone.evaluation.processors[i].normalised[:, 0]
            assert np.allclose(a, b, rtol=1e-9, atol=0)


def test_disagreement_is_reported_with_its_reason(tmp_path):
    # a 5-degree pointing mismatch breaks RMB's assumption (weight steered with the true
    # vector): the simulated mean stays below the law at large K
    sc = _scene([{**WANTED, "azimuth": 5}, *JAMMERS], look={"azimuth": 0, "elevation": 0},
                trials=300)
    res = sizing.size(sc, ["smi"], snapshots=[16, 64, 256], seed=2)
    assert res.record["disagreements"]
    text = res.record["disagreements"][0]
    assert "pointing mismatch" in text and "standard errors" in text
    assert "Simulation against theory" in res.table()
    folder = sizing.write_sizing_run(res, tmp_path)
    assert "pointing mismatch" in (folder / "report.html").read_text(encoding="utf-8")


def test_sizing_json_schema_and_run_folder(tmp_path, unloaded):
    folder = sizing.write_sizing_run(unloaded, tmp_path / "runs", command_line="adapt size x")
    assert folder.parent == tmp_path / "runs"
    names = sorted(p.name for p in folder.iterdir())
    assert names == ["manifest.json", "report.html", "scene.yaml", "sizing.json", "sizing.png"]
    assert io.check_manifest(folder) == []
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["kind"] == "size" and manifest["seed"] == 11
    assert manifest["command_line"] == "adapt size x"
    assert (folder / "sizing.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "<!DOCTYPE html>" in (folder / "report.html").read_text(encoding="utf-8")
    # scene.yaml re-loads to the scene as run
    re = parse_scene((folder / "scene.yaml").read_text(encoding="utf-8"))
    assert dump_scene(re) == dump_scene(unloaded.scene)
    d = json.loads((folder / "sizing.json").read_text())
    top = {"scene": str, "elements": int, "trials": int, "seed": int, "optimum_sinr_db": float,
           "target_loss_db": float, "fraction": float, "processors": list}
    for key, kind in top.items():
        assert isinstance(d[key], kind), key
    assert (d["elements"], d["trials"], d["seed"]) == (N, 800, 11)
    p = d["processors"][0]
    for key, kind in {"label": str, "method": str, "params": dict, "points": list}.items():
        assert isinstance(p[key], kind), key
    assert isinstance(p["required_snapshots_mean"], int)
    assert isinstance(p["required_snapshots_fraction"], (int, type(None)))
    point_keys = {"snapshots": int, "normalized_sinr_mean": float, "normalized_sinr_sem": float,
                  "loss_db_median": float, "loss_db_p10": float, "loss_db_p90": float,
                  "fraction_meeting_target": float, "theory_normalized_sinr_mean": float}
    for pt in p["points"]:
        for key, kind in point_keys.items():
            assert isinstance(pt[key], kind), key
        # p10 is the best tail: less loss than the median, p90 more
        assert pt["loss_db_p10"] <= pt["loss_db_median"] <= pt["loss_db_p90"]
    assert [pt["snapshots"] for pt in p["points"]] == d["snapshots"]


def test_intervals_and_sweep_parsing():
    # Clopper-Pearson against scipy.stats.binomtest(...).proportion_ci(method="exact")
    for m, n in ((0, 20), (3, 20), (17, 20), (20, 20), (450, 500)):
        lo, hi = sizing.clopper_pearson(m, n)
        ci = stats.binomtest(m, n).proportion_ci(confidence_level=0.95, method="exact")
        assert lo == pytest.approx(ci.low, abs=1e-12) and hi == pytest.approx(ci.high, abs=1e-12)
    ok = np.array([[False, True, False, True, True], [True] * 5, [False] * 5])
    assert sizing.stays_met(ok).tolist() == [3, 0, 5]
    rho = np.random.default_rng(0).uniform(0.3, 0.7, size=(100, 5)) + np.linspace(0, 0.2, 5)
    a = sizing.bootstrap_required(rho, 0.6, seed=4)
    assert a.shape == (sizing.BOOTSTRAP_RESAMPLES,)
    assert np.array_equal(a, sizing.bootstrap_required(rho, 0.6, seed=4))   # fixed seed
    assert sizing.sweep_points("8,16, 12", 8, 64).tolist() == [8, 12, 16]
    assert sizing.sweep_points("8:64:1", 8, 64).tolist() == [8, 16, 32, 64]
    g = sizing.sweep_points(None, 8, 1024)
    # 7 octaves at 8 per octave: 57 geometric points, fewer after rounding to counts
    assert g[0] == 8 and g[-1] == 1024 and 50 <= len(g) <= 7 * sizing.PER_OCTAVE + 1
    assert np.all(np.diff(g) > 0) and np.all(g[1:] / g[:-1] <= 2 ** (1 / 8) + 1 / 8)
    for bad in ("64:8", "8,x", "0:10", "", "8:16:0", "1:2:3:4", "8.5"):
        with pytest.raises(InputError):
            sizing.sweep_points(bad, 8, 64)
    with pytest.raises(InputError):
        sizing.size(_scene(), ["smi"], snapshots=[8], trials=1)
    with pytest.raises(InputError):
        sizing.size(_scene(), ["smi"], snapshots=[8], target_loss_db=-1)


def test_command_line(tmp_path, capsys):
    path = tmp_path / "scene.yaml"
    path.write_text(dump_scene(_scene(trials=50)), encoding="utf-8")
    for bad in ("64:8", "8,x", "0:10"):
        assert main(["size", str(path), "--snapshots", bad, "--out", str(tmp_path / "r")]) == 2
        assert "--snapshots" in capsys.readouterr().err
    assert main(["size", str(path), "--fraction", "2", "--no-progress"]) == 2
    assert main(["size", str(path), "--snapshots", "8:32:2", "--trials", "20", "--seed", "1",
                 "--out", str(tmp_path / "r"), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "Recommendations:" in out and "RMB theory says" in out
    (run,) = (tmp_path / "r").iterdir()
    d = json.loads((run / "sizing.json").read_text())
    assert d["snapshots"] == [8, 11, 16, 23, 32] and d["trials"] == 20
    assert [p["label"] for p in d["processors"]] == ["smi", "smi loading_db=10"]


def test_carlson_rule_is_not_offered_for_signal_present_training():
    # Carlson 1988: the 2J rule is derived for training on interference plus noise only.
    # With the wanted signal in the training data (N = 8, 0 dB signal, jammers at 30 and
    # 25 dB, 10 dB loading) the simulated 3 dB point lies near 15 snapshots, far from
    # 2J = 4: no rule of thumb may be printed as if it applied.
    jam = [dict(JAMMERS[0]), dict(JAMMERS[1], power_db=25)]
    sc = _scene(sources=[WANTED, *jam], training="signal")
    res = sizing.size(sc, ["smi loading_db=10"], snapshots="1:64", trials=300, seed=5)
    proc = res.record["processors"][0]
    rule = proc["rule_of_thumb"]
    assert rule["snapshots"] is None and "none applies" in rule["text"]
    assert "2J" in rule["text"] and "without the wanted signal" in rule["text"]
    assert res.record["rules_of_thumb"]["loaded_2j"] is None
    line = sizing.recommendation(proc, 3.0, res.record["fraction"], 64)
    assert "about 2J" not in line and "none applies" in line
    req = proc["required_snapshots_mean"]
    assert req is not None and req > 8              # far from 2J = 4
    # without the signal in the training data the rule is offered as before
    clean = sizing.size(_scene(sources=[WANTED, *jam]), ["smi loading_db=10"],
                        snapshots="1:64", trials=50, seed=5)
    assert clean.record["processors"][0]["rule_of_thumb"]["snapshots"] == 4


def test_answers_are_refined_below_their_uncertainty_and_beside_the_beta_law():
    # Reed, Mallett and Brennan (1974): for N = 32 unloaded SMI the mean reaches a 3 dB
    # loss at K = ceil((N - 2 + t)/(1 - t)) = 62 (t = 10^-0.3), and rho ~ Beta(K-N+2,
    # N-1) gives the share of trials within 3 dB (scipy.stats.beta). A coarse sweep
    # (4 points per octave: ..., 54, 64, ...) used to answer "64 (range 64)"; refined,
    # the answer's step from the previous point is at most its range width (or 1).
    n = 32
    sc = parse_scene({"array": {"layout": "line", "elements": n, "spacing": 0.5},
                      "sources": [WANTED, *JAMMERS], "snapshots": 256, "trials": 300,
                      "seed": 3})
    res = sizing.size(sc, ["smi"], snapshots="32:256:4", trials=300, seed=3)
    proc = res.record["processors"][0]
    pts = [p["snapshots"] for p in proc["points"]]
    t = 10 ** -0.3
    assert proc["theory"]["required_snapshots"] == int(np.ceil((n - 2 + t) / (1 - t))) == 62
    for answer, (lo, hi) in ((proc["required_snapshots_mean"],
                              proc["required_snapshots_mean_range"]),
                             (proc["required_snapshots_fraction"],
                              proc["required_snapshots_fraction_range"])):
        for k in (answer, lo, hi):
            step = k - pts[pts.index(k) - 1]
            assert step <= max(1, hi - lo), (k, step, lo, hi)
    lo, hi = proc["required_snapshots_mean_range"]
    assert lo - 2 <= 62 <= hi + 2
    # the Beta law's share beside the simulated one, within 4 binomial standard errors
    for p in proc["points"]:
        share = stats.beta.sf(t, p["snapshots"] - n + 2, n - 1)
        assert p["theory_fraction_meeting_target"] == pytest.approx(share, abs=1e-12)
        se = np.sqrt(max(share * (1 - share), 1 / 300) / 300)
        assert abs(p["fraction_meeting_target"] - share) < 4 * se + 1e-9, p["snapshots"]
    kf = proc["theory"]["required_snapshots_fraction"]
    assert stats.beta.sf(t, kf - n + 2, n - 1) >= 0.9 > stats.beta.sf(t, kf - 1 - n + 2, n - 1)
    assert "of trials by" in sizing.recommendation(proc, 3.0, 0.9, 256)
