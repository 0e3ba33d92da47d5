"""Numerical corner cases: each has a defined, documented outcome, never a silent NaN.

* fewer snapshots than elements without loading: the minimum-norm (pseudo-inverse)
  solution with a warning, finite scores;
* extreme powers: scenes beyond double precision's reach (elements x total source power
  above scenefile.MAX_DYNAMIC_RANGE_DB) are refused with a located error; within it,
  scores are finite and no processor beats the optimum;
* a jammer exactly in the look direction, coincident jammers, more jammers than degrees
  of freedom: finite scores matching closed forms; warnings where the scene is hopeless;
* an LMS step above its stability bound: a SpecError with the bound (command line, exit 2);
* the wanted source off at a checkpoint: optimum SINR 0, normalised SINR NaN by design,
  null in metrics.json, empty in curves.csv, "n/a" in the table;
* reference sets or candidate outputs holding NaN or infinity: reported as such.
"""
from __future__ import annotations

import csv
import json
import math
import warnings

import numpy as np
import pytest

from adapt.errors import SceneError
from adapt.io import read_npy, write_manifest, write_npy
from adapt.processors import parse_spec
from adapt.scenefile import MAX_DYNAMIC_RANGE_DB, parse_scene
from adapt.streams.snapshots import TrialBatch
from adapt.studies.compare import compare, write_compare_run

ALL = ["conventional", "optimum", "smi", "smi loading_db=10", "lms", "nlms", "rls",
       "frost", "gsc", "lcmv", "power_inversion", "eigenspace"]
WANTED = {"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0}


def _jam(name, az, p=30, **kw):
    return {"name": name, "role": "interferer", "azimuth": az, "power_db": p, **kw}


def _scene(sources, n=8, snapshots=64, trials=4, **kw):
    m = {"name": "numerics", "array": {"layout": "line", "elements": n, "spacing": 0.5},
         "sources": sources, "snapshots": snapshots, "trials": trials, "seed": 5, **kw}
    return parse_scene(m)


def _quiet_compare(scene, procs, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return compare(scene, procs, **kw)


def _all_finite(result):
    for p in result.evaluation.processors:
        for name in ("sinr", "normalised", "loss_db", "white_noise_gain"):
            assert np.all(np.isfinite(getattr(p, name))), (p.label, name)
    assert np.all(np.isfinite(result.evaluation.optimum_sinr))


def _write_scene(tmp_path, mapping, name="scene.yaml"):
    import yaml
    path = tmp_path / name
    path.write_text(yaml.safe_dump(mapping), encoding="utf-8")
    return path


# --------------------------------------------------------------------------- K < N
def test_fewer_snapshots_than_elements_is_minimum_norm_with_warning():
    n = 8
    scene = _scene([WANTED, _jam("j", 31)], n=n, snapshots=16)
    cps = [1, 3, 5, 7, 8, 16]
    with pytest.warns(RuntimeWarning, match="singular.*minimum-norm"):
        result = compare(scene, ["smi"], checkpoints=cps)
    _all_finite(result)
    # the documented fallback: w = R^+ a / (a^H R^+ a) with the Moore-Penrose inverse
    # (Golub and Van Loan, Matrix Computations, sec. 5.5) of the K-snapshot sample
    # covariance; computed here independently with numpy.linalg.pinv
    batch = TrialBatch(result.scene, trials=result.scene.trials)
    x = batch.samples(16).training                                  # (T, K, N)
    a = batch.look
    w = result.evaluation.processors[0]
    # final weights are at checkpoint 16; recompute the K = 5 weight by running again
    proc = parse_spec("smi")
    from adapt.processors import Context, run_processors
    with pytest.warns(RuntimeWarning, match="minimum-norm"):
        res = run_processors([proc], batch.blocks(16), Context.from_batch(batch), [5])[0]
    for t in range(batch.trials):
        r = x[t, :5].T @ np.conj(x[t, :5]) / 5
        v = np.linalg.pinv(r, hermitian=True) @ a
        v = v / np.vdot(v, a).conj()                  # scale to w^H a = 1
        got = res.weights[t, 0]
        got = got / np.vdot(got, a).conj()
        assert np.linalg.norm(got - v) <= 1e-8 * np.linalg.norm(v)
    assert np.all(w.normalised > 0)


# --------------------------------------------------------------------------- powers
def test_power_beyond_double_precision_is_refused(tmp_path, run_cli):
    # 8 elements x a 150 dB jammer = 159 dB: measured, the optimum then misses its own
    # bound by 0.24 dB and RLS scores a zero SINR; the scene is refused instead
    m = {"name": "too strong", "array": {"layout": "line", "elements": 8},
         "sources": [dict(WANTED, power_db=-100), _jam("j", 30, 150)]}
    with pytest.raises(SceneError) as info:
        parse_scene(m)
    assert info.value.path == "sources[1].power_db"
    assert f"{MAX_DYNAMIC_RANGE_DB:g} dB" in str(info.value)
    code, out, err = run_cli(["check", _write_scene(tmp_path, m)])
    assert code == 2 and "Traceback" not in err
    assert "sources[1].power_db" in err and "159.0 dB" in err
    # the limit counts elements x the sum of all powers: 129 dB on 8 elements passes
    # (129 + 9.03 = 138.0 dB), 132 dB fails (141.0 dB)
    m["sources"][1]["power_db"] = 129
    assert parse_scene(m).sources[1].power_db == 129
    m["sources"][1]["power_db"] = 132
    with pytest.raises(SceneError, match="141.0 dB"):
        parse_scene(m)


def test_extreme_powers_within_reach_give_finite_scores():
    # a 125 dB jammer and a -100 dB wanted source (225 dB apart), 8 elements
    scene = _scene([dict(WANTED, power_db=-100), _jam("j", 30, 125)], snapshots=64, trials=3)
    result = _quiet_compare(scene, ALL)
    _all_finite(result)
    ev = result.evaluation
    # the jammer sits on a null of the uniform line (sin 30 deg = 2 / (N d), Van Trees
    # 2002 sec. 2.4): the conventional beam's SINR is exactly N sigma_s^2 and equals
    # the optimum's, whose weight is then the conventional one
    ps = 10 ** (-100 / 10)
    conv = ev.by_label("conventional")
    # double precision holds the noise floor under N Pj to about eps N Pj (here 5.6e-3
    # relative; measured 1.2e-4): the tolerance the dynamic-range limit is built on
    rtol = np.finfo(float).eps * 8 * 10 ** (125 / 10)
    np.testing.assert_allclose(conv.sinr[:, -1], 8 * ps, rtol=rtol)
    np.testing.assert_allclose(ev.optimum_sinr, 8 * ps, rtol=rtol)
    # the optimum is an upper bound (Cauchy-Schwarz; Van Trees 2002 ch. 6): no
    # processor's loss is below 0 beyond rounding
    for p in ev.processors:
        assert np.all(p.loss_db > -10 * np.log10(1 + rtol)), (p.label, p.loss_db.min())


# --------------------------------------------------------------------------- geometry
def test_jammer_in_the_look_direction(tmp_path, run_cli):
    pj, n = 30.0, 8
    scene = _scene([WANTED, _jam("j", 0, pj)], n=n)
    result = _quiet_compare(scene, ALL)
    _all_finite(result)
    ev = result.evaluation
    # R = I + Pj a a^H: a^H R^-1 a = N / (1 + N Pj) (matrix inversion lemma; Van Trees
    # 2002 sec. 6.2), so the optimum SINR collapses to Ps N / (1 + N Pj) but stays > 0
    expected = n / (1 + n * 10 ** (pj / 10))
    np.testing.assert_allclose(ev.optimum_sinr, expected, rtol=1e-9)
    # the MVDR weight R^-1 a is proportional to a: the conventional beam is optimal
    np.testing.assert_allclose(ev.by_label("conventional").loss_db, 0, atol=1e-9)
    for p in ev.processors:
        assert np.all(p.loss_db > -1e-6), p.label
    m = {"name": "in look", "array": {"layout": "line", "elements": n},
         "sources": [WANTED, _jam("j", 0, pj)]}
    code, out, err = run_cli(["check", _write_scene(tmp_path, m)])
    assert code == 0 and "interferer in the main lobe" in out


def test_coincident_jammers_act_as_one():
    # two jammers at one direction add their powers (independent waveforms, covariances
    # add: R = I + (P1 + P2) a a^H); the optimum equals that of one jammer of P1 + P2
    two = _scene([WANTED, _jam("j1", 31, 20), _jam("j2", 31, 20, waveform="qpsk")])
    one = _scene([WANTED, _jam("j", 31, 10 * math.log10(2 * 10 ** 2))])
    r2 = _quiet_compare(two, ALL)
    r1 = _quiet_compare(one, ["optimum"])
    _all_finite(r2)
    np.testing.assert_allclose(r2.evaluation.optimum_sinr, r1.evaluation.optimum_sinr,
                               rtol=1e-10)


def test_more_jammers_than_degrees_of_freedom(tmp_path, run_cli):
    n = 4
    jams = [_jam(f"j{i}", -70 + 35 * i, 30) for i in range(5)]      # 5 > N - 1 = 3
    scene = _scene([WANTED] + jams, n=n)
    result = _quiet_compare(scene, ALL)
    _all_finite(result)
    for p in result.evaluation.processors:
        assert np.all(p.loss_db > -1e-6), p.label
    # far less than the interference-free N Ps: the nulls cannot all be placed
    assert np.all(result.evaluation.optimum_sinr < 0.1 * n)
    m = {"name": "crowded", "array": {"layout": "line", "elements": n},
         "sources": [WANTED] + jams}
    code, out, err = run_cli(["check", _write_scene(tmp_path, m)])
    assert code == 0 and "degrees of freedom" in out


# --------------------------------------------------------------------------- LMS bound
def test_lms_step_above_the_bound_through_the_cli(tmp_path, run_cli):
    m = {"name": "fast lms", "array": {"layout": "line", "elements": 8},
         "sources": [WANTED, _jam("j", 31, 30)], "snapshots": 64, "trials": 2}
    path = _write_scene(tmp_path, m)
    code, out, err = run_cli(["compare", path, "--processor", "lms step=0.01",
                              "--no-progress", "--out", tmp_path / "runs"])
    assert code == 2 and "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "stability bound 2/lambda_max" in lines[0]
    # the bound: 0 < mu < 2 / lambda_max of the received-data covariance (Widrow and
    # Stearns 1985, ch. 6); lambda_max from numpy for the same scene
    scene = parse_scene(m)
    batch = TrialBatch(scene, trials=1)
    from adapt.processors.base import _data_covariance
    lam = np.linalg.eigvalsh(_data_covariance(batch, [0])[0, 0])[-1]
    assert f"{2 / lam:g}" in lines[0]
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())


# --------------------------------------------------------------------------- wanted off
def test_wanted_source_off_at_a_checkpoint(tmp_path, run_cli):
    # on for 16 of every 32 snapshots from 0: off at snapshot indices 16..31, 48..63
    pulsed = dict(WANTED, pulsing={"start": 0, "period": 32, "on": 16})
    m = {"name": "pulsed wanted", "array": {"layout": "line", "elements": 8},
         "sources": [pulsed, _jam("j", 31, 30)], "snapshots": 56, "trials": 3, "seed": 2}
    scene = parse_scene(m)
    cps = [8, 16, 20, 32, 48, 56]
    result = _quiet_compare(scene, ["smi loading_db=10", "optimum"], checkpoints=cps)
    ev = result.evaluation
    off = np.array([(c % 32) >= 16 for c in cps])
    assert np.all(ev.optimum_sinr[:, off] == 0) and np.all(ev.optimum_sinr[:, ~off] > 0)
    for p in ev.processors:
        # normalised SINR = SINR / optimum is 0/0: NaN by design, only where off
        assert np.all(np.isnan(p.normalised[:, off]))
        assert np.all(np.isfinite(p.normalised[:, ~off]))
    final = result.metrics["processors"][0]["final"]
    assert final["normalized_sinr_mean"] is None or math.isnan(final["normalized_sinr_mean"])
    table = result.table()
    assert "nan" not in table.lower().replace("n/a", "")
    assert "n/a" in table and "wanted source is off" in table
    folder = write_compare_run(result, tmp_path / "runs", figures=False)
    metrics = json.loads((folder / "metrics.json").read_text())       # strict JSON: no NaN
    fin = metrics["processors"][0]["final"]
    assert fin["sinr_db_mean"] is None and fin["loss_db_mean"] is None
    assert fin["normalized_sinr_mean"] is None
    assert metrics["processors"][0]["curve"]["normalized_sinr_mean"][2] is None
    assert metrics["processors"][0]["curve"]["normalized_sinr_mean"][0] is not None
    with open(folder / "curves.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r["label"] == "smi loading_db=10"]
    assert rows[2]["normalized_sinr_mean"] == "" and rows[0]["normalized_sinr_mean"] != ""
    # and through the command line: exit 0, n/a in the table
    code, out, err = run_cli(["compare", _write_scene(tmp_path, m), "--processor",
                              "smi loading_db=10", "--checkpoints", "8,16,20,56",
                              "--no-progress", "--out", tmp_path / "cli-runs"])
    assert code == 0, err
    assert "n/a" in out and "nan" not in out.lower().replace("n/a", "")


# --------------------------------------------------------------------------- references
@pytest.fixture(scope="module")
def reference_set(tmp_path_factory):
    from adapt.studies.reference import record
    root = tmp_path_factory.mktemp("ref")
    scene = _scene([WANTED, _jam("j", 31, 30)], snapshots=48, trials=2)
    return record(scene, "smi loading_db=10", 2, 48, [8, 16, 48], root / "set")


def _copy(src, dst):
    import shutil
    shutil.copytree(src, dst)
    return dst


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("name", ["weights.npy", "truth_covariance.npy", "samples.npy"])
def test_reference_set_holding_non_finite_values(reference_set, tmp_path, run_cli, bad, name):
    folder = _copy(reference_set, tmp_path / "set")
    arr = read_npy(folder / "case-0001" / name).copy()
    arr.flat[3] = bad
    write_npy(folder / "case-0001" / name, arr)
    manifest = json.loads((folder / "manifest.json").read_text())
    write_manifest(folder, {k: v for k, v in manifest.items() if k != "files"})
    code, out, err = run_cli(["verify", folder, "--python",
                              "adapt.studies.reference:reference_implementation"])
    assert code == 2 and "Traceback" not in err
    line = err.strip()
    assert "\n" not in line and f"case-0001/{name}" in line
    assert "holds 1 NaN or infinite value(s)" in line


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_candidate_returning_non_finite_weights(reference_set, tmp_path, run_cli, bad):
    module = tmp_path / "candidate_bad.py"
    module.write_text(
        "import numpy as np\n"
        "from adapt.studies.reference import reference_implementation\n"
        "def run(case):\n"
        "    w = np.array(reference_implementation(case))\n"
        f"    w[1, 2] = float({str(bad)!r})\n"
        "    return w\n", encoding="utf-8")
    code, out, err = run_cli(["verify", reference_set, "--python", f"{module}:run"])
    assert code == 1, (out, err)
    assert "weights hold NaN or infinity at 1 checkpoint(s), first at row 1" in out
    assert "nan" not in out.lower().replace("nan or", "")
