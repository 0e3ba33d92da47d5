"""Reference vectors: adapt record / adapt verify (adapt/studies/reference.py, adapt/report/junit.py).

Outside references named beside each check: the loaded-SMI weight (Reed, Mallett &
Brennan 1974; Carlson 1988), output SINR (Van Trees 2002, ch. 6), uniform quantisation
noise step^2/12 per rail (Widrow & Kollar, *Quantization Noise*, 2008), the SigMF
specification 1.2 (read back with the independent ``sigmf`` package), JUnit XML as CI
servers read it (common practice), numpy's float32 (IEEE 754 binary32: 24-bit
significand, relative rounding error <= 2^-24).
"""
from __future__ import annotations

import json
import os
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from adapt.errors import CorruptReferenceError, InputError, SpecError
from adapt.io import read_npy, write_manifest, write_npy
from adapt.scenefile import parse_scene
from adapt.studies.reference import (
    DEFAULT_TOLERANCES,
    format_report,
    load_reference,
    output_evm_db,
    record,
    reference_implementation,
    verify,
    weight_error_db,
    write_report_junit,
    write_sigmf,
)

HERE = Path(__file__).resolve().parent
CANDIDATE = HERE / "reference_candidate.py"
sys.path.insert(0, str(HERE))
import reference_candidate as cand  # noqa: E402

SCENE = {
    "name": "reference test line",
    "array": {"layout": "line", "elements": 6, "spacing": 0.5},
    "sources": [
        {"name": "wanted", "role": "desired", "azimuth": 20, "power_db": 0, "waveform": "qpsk"},
        {"name": "jam-a", "role": "interferer", "azimuth": -35, "power_db": 35},
        {"name": "jam-b", "role": "interferer", "azimuth": 55, "power_db": 30},
    ],
    "snapshots": 128, "trials": 3, "seed": 11,
}
SPEC = "smi loading_db=10"


@pytest.fixture(scope="module")
def smi_set(tmp_path_factory):
    out = tmp_path_factory.mktemp("sets") / "smi"
    return record(parse_scene(SCENE), SPEC, 3, 128, None, out)


@pytest.fixture(scope="module")
def smi_ref(smi_set):
    return load_reference(smi_set)


def copy_set(src: Path, dst: Path) -> Path:
    import shutil
    shutil.copytree(src, dst)
    return dst


# ---------------------------------------------------------------------------- metrics
def test_metric_definitions_on_constructed_errors():
    rng = np.random.default_rng(1)
    a = np.exp(1j * np.pi * np.arange(6) * np.sin(0.3))
    w = rng.standard_normal(6) + 1j * rng.standard_normal(6)
    w = w / np.conj(np.vdot(w, a))                    # w^H a = 1
    # any complex rescaling is removed: an exact match (floor -300 dB)
    assert weight_error_db(w * (0.3 - 2j), w, a) == pytest.approx(-300.0)
    # an error e orthogonal to a (e^H a = 0) leaves the normalisation alone, so the
    # metric is exactly 20 log10(||e|| / ||w||) (the definition)
    e = rng.standard_normal(6) + 1j * rng.standard_normal(6)
    e -= a * np.vdot(a, e) / np.vdot(a, a)
    e *= 0.01 * np.linalg.norm(w) / np.linalg.norm(e)
    assert weight_error_db(w + e, w, a) == pytest.approx(-40.0, abs=1e-9)
    # a weight with no look response cannot be normalised
    assert weight_error_db(e, w, a) == np.inf
    y = rng.standard_normal(50) + 1j * rng.standard_normal(50)
    assert output_evm_db(1.01 * y, y) == pytest.approx(-40.0, abs=1e-9)


# ---------------------------------------------------------------------------- record
def test_layout_and_contents(smi_set, smi_ref):
    root = smi_set
    case = root / "case-0000"
    expected = {"samples.npy", "steering.npy", "checkpoints.npy", "case.json",
                "samples.sigmf-data", "samples.sigmf-meta", "weights.npy", "outputs.npy",
                "sinr_db.npy", "truth_covariance.npy", "truth_steering.npy", "truth.json"}
    assert {p.name for p in case.iterdir()} == expected      # smi: no reference.npy
    for name in ("reference.json", "tolerances.json", "manifest.json"):
        assert (root / name).is_file()
    info = smi_ref.info
    assert info["processor"] == SPEC and info["trials"] == 3 and info["snapshots"] == 128
    assert info["scene_mapping"]["sources"][1]["name"] == "jam-a"
    assert smi_ref.tolerances == DEFAULT_TOLERANCES
    # default checkpoints N, 2N, 4N, ... and K
    assert list(smi_ref.cases[0].checkpoints) == [6, 12, 24, 48, 96, 128]
    c0 = smi_ref.cases[0]
    assert c0.samples.shape == (128, 6) and c0.weights.shape == (6, 6)
    assert c0.truth_covariance.shape == (6, 6) and c0.truth_steering.shape == (6,)
    # every file is listed in the manifest with its sha256
    manifest = json.loads((root / "manifest.json").read_text())
    assert "case-0002/weights.npy" in manifest["files"]
    # the expected weights are the textbook loaded SMI of the stored samples
    # (Reed, Mallett & Brennan 1974; Carlson 1988): an independent numpy implementation
    w = cand.loaded_smi(c0.inputs())
    assert np.max(np.abs(w - c0.weights)) < 1e-10 * np.max(np.abs(c0.weights))
    # outputs are y = w^H x with held weights (adapt.processors.base convention)
    j = 30                                     # held weight: checkpoint 24
    assert c0.outputs[j] == pytest.approx(np.vdot(c0.weights[2], c0.samples[j]), rel=1e-12)
    # the SINR curve on the truth is below the optimum a^H R^-1 a P (Van Trees 2002, ch. 6)
    a, r = c0.truth_steering, c0.truth_covariance
    opt = 10 * np.log10(np.real(np.vdot(a, np.linalg.solve(r, a))))
    assert np.all(c0.sinr_db <= opt + 1e-9) and c0.sinr_db[-1] > opt - 3.0


def test_refuses_existing_folder_and_truth_needing_specs(tmp_path, smi_set):
    scene = parse_scene(SCENE)
    with pytest.raises(InputError, match="not empty"):
        record(scene, SPEC, 2, 64, None, smi_set)
    empty = tmp_path / "empty"
    empty.mkdir()
    assert record(scene, SPEC, 1, 32, [8, 32], empty) == empty      # empty folder: fine
    with pytest.raises(SpecError, match="true covariance"):
        record(scene, "optimum", 1, 32, None, tmp_path / "opt")
    with pytest.raises(SpecError, match="give a step"):
        record(scene, "lms", 1, 32, None, tmp_path / "lms")        # step=auto needs truth
    assert not (tmp_path / "opt").exists() and not (tmp_path / "lms").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".partial")]


def test_record_is_deterministic(tmp_path):
    scene = parse_scene(SCENE)
    a = record(scene, SPEC, 2, 64, [6, 64], tmp_path / "a")
    b = record(scene, SPEC, 2, 64, [6, 64], tmp_path / "b")
    fa = json.loads((a / "manifest.json").read_text())["files"]
    fb = json.loads((b / "manifest.json").read_text())["files"]
    assert fa == fb


def test_nonstationary_reference_trained_round_trip(tmp_path):
    # a pulsed jammer: truth per checkpoint (C, N, N); LMS adapts on the received data
    # with the reference waveform (Widrow & Stearns 1985)
    m = json.loads(json.dumps(SCENE))
    m["sources"][1]["pulsing"] = {"start": 0, "period": 40, "on": 20}
    out = record(parse_scene(m), "lms step=2e-5", 2, 96, [10, 30, 60, 96], tmp_path / "lms")
    ref = load_reference(out)
    c0 = ref.cases[0]
    assert c0.truth_covariance.shape == (4, 6, 6) and c0.truth_steering.shape == (4, 6)
    assert c0.reference is not None and c0.reference.shape == (96,)
    # checkpoint 30 sits in the jammer's off time (30 mod 40 >= 20): only noise and the
    # other jammer there, so the true covariance differs from checkpoint 10's
    assert not np.allclose(c0.truth_covariance[0], c0.truth_covariance[1])
    rep = verify(ref, reference_implementation)
    assert rep.passed and rep.exit_code == 0


# ---------------------------------------------------------------------------- verify (python)
def test_round_trip_and_independent_implementation_pass(smi_ref):
    rep = verify(smi_ref, reference_implementation)
    assert rep.passed, format_report(rep)
    assert all(np.nanmax(c.weight_error_db) < -200 for c in rep.cases)
    # the independent textbook SMI passes the default tolerances too
    rep = verify(smi_ref, cand.loaded_smi)
    assert rep.passed, format_report(rep)


@pytest.mark.parametrize("wrong, metric", [
    (lambda case: cand.loaded_smi(case, conjugate=True), None),     # conj steering
    (lambda case: cand.loaded_smi(case, window_offset=1), None),    # k-1 snapshots
    (lambda case: cand.loaded_smi(case, loading=False), None),      # loading missing
])
def test_wrong_implementations_fail_naming_the_metric(smi_ref, wrong, metric):
    rep = verify(smi_ref, wrong)
    assert not rep.passed and rep.exit_code == 1
    text = format_report(rep)
    for c in rep.cases:
        assert c.kind == "failure"
        name, cp, value, limit, excess = c.worst
        assert excess > 0 and name in c.message and f"checkpoint {cp}" in c.message
    w = rep.worst
    assert f"worst: {w[0]}, checkpoint {w[2]}, {w[1]}" in text


def test_twelve_bit_weights_pass_loose_fail_tight(smi_ref):
    bits = 12

    def quantised(case):
        w = reference_implementation(case)
        out = []
        for row in w:
            fs = np.max(np.abs(np.concatenate([row.real, row.imag])))
            step = 2 * fs / 2 ** bits
            out.append(np.round(row.real / step) * step + 1j * np.round(row.imag / step) * step)
        return np.array(out)

    # the output EVM on interference-only training data is the weight error scaled by
    # the jammer-to-output power ratio (the nulls leak), so a loose EVM limit is needed
    loose = verify(smi_ref, quantised, tolerances=["output_evm_db=-20"])
    assert loose.passed, format_report(loose)
    tight = verify(smi_ref, quantised, tolerances=["weight_error_db=-100", "output_evm_db=-20"])
    assert not tight.passed
    assert all(c.worst[0] == "weight_error_db" for c in tight.cases)
    # uniform quantisation: error variance step^2/12 per rail (Widrow & Kollar 2008), so
    # ||dw||^2 ~ 2N step^2 / 12; measured per checkpoint within -12 .. +6 dB of that
    for case, res in zip(smi_ref.cases, loose.cases):
        w = case.weights
        fs = np.max(np.abs(np.concatenate([w.real, w.imag], axis=1)), axis=1)
        step = 2 * fs / 2 ** bits
        predicted = 10 * np.log10(2 * 6 * step ** 2 / 12 / np.sum(np.abs(w) ** 2, axis=1))
        assert np.all(res.weight_error_db < predicted + 6)
        assert np.all(res.weight_error_db > predicted - 12)


def test_bad_returns_are_per_case_failures(smi_ref, tmp_path):
    calls = []

    def flaky(case):
        calls.append(case.name)
        # the case is read-only
        with pytest.raises((AttributeError, TypeError)):
            case.samples = None
        with pytest.raises(ValueError):
            case.samples[0, 0] = 0
        if case.name == "case-0000":
            raise ZeroDivisionError("boom")
        w = reference_implementation(case)
        if case.name == "case-0001":
            return np.array(["not", "numbers"])     # no numeric weights
        w[2, 1] = np.nan
        return w

    rep = verify(smi_ref, flaky)
    assert calls == ["case-0000", "case-0001", "case-0002"]
    kinds = [c.kind for c in rep.cases]
    assert kinds == ["error", "failure", "failure"]
    assert "ZeroDivisionError" in rep.cases[0].message
    assert "numeric" in rep.cases[1].message and "NaN" in rep.cases[2].message
    path = write_report_junit(rep, tmp_path / "junit.xml")
    root = ET.parse(path).getroot()
    suite = root.find("testsuite")
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors")) == ("3", "2", "1")
    cases = suite.findall("testcase")
    assert [c.get("name") for c in cases] == ["case-0000", "case-0001", "case-0002"]
    assert cases[0].find("error") is not None and cases[1].find("failure") is not None
    assert "numeric" in cases[1].find("failure").get("message")


# ---------------------------------------------------------------------------- verify (command)
def test_command_mode_good_crash_hang(smi_set, tmp_path):
    good = f"{sys.executable} {CANDIDATE} good {{case}} {{out}}"
    rep = verify(smi_set, good, timeout=60)
    assert rep.passed, format_report(rep)
    pidfile = tmp_path / "pid"
    mixed = f"{sys.executable} {CANDIDATE} mixed {{case}} {{out}} {pidfile}"
    rep = verify(smi_set, mixed, timeout=2)
    assert [c.kind for c in rep.cases] == ["pass", "error", "error"]
    assert "exited with code 1" in rep.cases[1].message
    assert "deliberate crash" in rep.cases[1].details            # tail of stderr
    assert "timed out after 2 s" in rep.cases[2].message
    assert rep.cases[2].seconds > 1.9                            # killed at the timeout, not before
    pid = int(pidfile.read_text())
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)                                           # the hung program is gone
    path = write_report_junit(rep, tmp_path / "j.xml")
    suite = ET.parse(path).getroot().find("testsuite")
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors")) == ("3", "0", "2")
    rep = verify(smi_set, f"{sys.executable} {CANDIDATE} nofile {{case}} {{out}}")
    assert all(c.kind == "error" and "no weights file" in c.message for c in rep.cases)
    with pytest.raises(InputError, match="must contain"):
        verify(smi_set, f"{sys.executable} {CANDIDATE} good {{case}}")


# ---------------------------------------------------------------------------- CLI
def test_cli_record_verify_exit_codes(run_cli, tmp_path, write_file):
    scene = tmp_path / "scene.json"                  # JSON is YAML: a scene file
    scene.write_text(json.dumps(SCENE))
    out = tmp_path / "set"
    code, text, err = run_cli(["record", scene, "--processor", SPEC, "--trials", 2,
                               "--snapshots", 64, "--checkpoints", "8,16,64",
                               "--tolerance", "sinr_db=0.2", "--out", out])
    assert code == 0, err
    assert "wrote reference set" in text
    assert load_reference(out).tolerances["sinr_db"] == 0.2
    junit = tmp_path / "v.xml"
    code, text, err = run_cli(["verify", out, "--python", f"{CANDIDATE}:loaded_smi",
                               "--junit", junit])
    assert code == 0, text + err
    assert "2 passed" in text and ET.parse(junit).getroot().find("testsuite").get("tests") == "2"
    code, text, err = run_cli(["verify", out, "--python", "adapt.studies.reference:reference_implementation",
                               "--tolerance", "weight_error_db=-400"])
    assert code == 1 and "FAIL" in text and "worst: case-0000" in text
    code, text, err = run_cli(["verify", out, "--python", "adapt.studies.reference:no_such_function"])
    assert code == 2 and "no function" in err
    code, text, err = run_cli(["record", scene, "--processor", SPEC, "--out", out])
    assert code == 2 and "never overwritten" in err


def test_tampered_file_refused(run_cli, smi_set, tmp_path):
    bad = copy_set(smi_set, tmp_path / "tampered")
    target = bad / "case-0001" / "weights.npy"
    raw = bytearray(target.read_bytes())
    raw[-5] ^= 0x01                                  # one bit of one weight
    target.write_bytes(bytes(raw))
    with pytest.raises(CorruptReferenceError, match="case-0001/weights.npy"):
        load_reference(bad)
    code, text, err = run_cli(["verify", bad, "--python", "adapt.studies.reference:reference_implementation"])
    assert code == 2 and "case-0001/weights.npy" in err and "sha256" in err
    (bad / "case-0002" / "samples.npy").unlink()
    code, text, err = run_cli(["verify", bad, "--command", "true {case} {out}"])
    assert code == 2 and "case-0002/samples.npy: listed in the manifest but missing" in err


def test_nan_in_reference_reported(run_cli, smi_set, tmp_path):
    bad = copy_set(smi_set, tmp_path / "nan")
    w = read_npy(bad / "case-0000" / "sinr_db.npy")
    w[1] = np.nan
    write_npy(bad / "case-0000" / "sinr_db.npy", w)
    write_manifest(bad, {})                          # even with a matching manifest
    with pytest.raises(CorruptReferenceError, match="NaN"):
        load_reference(bad)
    code, text, err = run_cli(["verify", bad, "--python", "adapt.studies.reference:reference_implementation"])
    assert code == 2 and "case-0000/sinr_db.npy" in err and "NaN" in err
    # a pickled (object) array is never loaded (numpy allow_pickle=False)
    write_npy(bad / "case-0000" / "sinr_db.npy", np.zeros(6))
    np.save(bad / "case-0001" / "weights.npy", np.array([{"x": 1}], dtype=object),
            allow_pickle=True)
    write_manifest(bad, {})
    with pytest.raises(CorruptReferenceError, match="case-0001/weights.npy: not a readable"):
        load_reference(bad)


# ---------------------------------------------------------------------------- SigMF
def test_sigmf_round_trip_with_sigmf_library(smi_ref, tmp_path):
    from sigmf import sigmffile
    c0 = smi_ref.cases[0]
    handle = sigmffile.fromfile(str(c0.folder / "samples.sigmf-meta"))   # checks sha512
    got = handle.read_samples()
    assert got.shape == (128, 6)
    # float32 storage: each rail within 2^-24 relative (IEEE 754 binary32)
    assert np.array_equal(got, c0.samples.astype(np.complex64))
    assert np.max(np.abs(got - c0.samples)) <= 2.0 ** -24 * np.max(np.abs(c0.samples)) * 2
    g = handle.get_global_info()
    assert g["core:datatype"] == "cf32_le" and g["core:num_channels"] == 6
    assert g["core:sample_rate"] == 1.0 and g["core:recorder"].startswith("adapt ")
    assert g["core:version"].startswith("1.")
    assert handle.get_captures()[0]["core:sample_start"] == 0
    starts = [a["core:sample_start"] for a in handle.get_annotations()]
    assert starts == [0, 6, 12, 24, 48, 96]
    # the hand-written fallback (no sigmf installed) gives the same files, bar the version
    data, meta = write_sigmf(tmp_path / "fallback", c0.samples, c0.checkpoints,
                             description=g["core:description"], use_library=False)
    assert data.read_bytes() == (c0.folder / "samples.sigmf-data").read_bytes()
    mine = json.loads(meta.read_text())
    lib = json.loads((c0.folder / "samples.sigmf-meta").read_text())
    mine["global"].pop("core:version")
    lib["global"].pop("core:version")
    assert mine == lib
    back = sigmffile.fromfile(str(meta))
    assert np.array_equal(back.read_samples(), got)


# ---------------------------------------------------------------------------- space-time
# A wideband scene (fractional bandwidth 0.4: a 25 dB white jammer and a 20 dB band-
# limited one) and a pulsing narrowband one; weights of N L entries, column l N + n.
WIDE = {
    "name": "reference test wideband",
    "array": {"layout": "line", "elements": 4, "spacing": 0.5},
    "receiver": {"fractional_bandwidth": 0.4},
    "sources": [
        {"name": "wanted", "role": "desired", "azimuth": 10, "power_db": 0, "waveform": "qpsk"},
        {"name": "jam-a", "role": "interferer", "azimuth": -40, "power_db": 25},
        {"name": "jam-b", "role": "interferer", "azimuth": 50, "power_db": 20,
         "bandwidth": 0.5, "offset": 0.1},
    ],
    "snapshots": 96, "trials": 2, "seed": 3,
}
PULSED = json.loads(json.dumps(SCENE))
PULSED["sources"][1]["pulsing"] = {"start": 0, "period": 40, "on": 20}
# name -> (scene, spec, taps of the weights, checkpoints)
SPACE_TIME = {
    "smi": (WIDE, "smi taps=3 loading_db=3", 3, None),
    "nlms": (PULSED, "nlms taps=2 step=0.2", 2, [10, 30, 60, 96]),
    "frost": (WIDE, "frost taps=3 step=2e-5", 3, None),
    "subband": (WIDE, "subband bins=8", 8, [8, 24, 40, 96]),
    "spatial": (WIDE, "smi loading_db=3", 1, None),      # a wideband scene, one tap
}


@pytest.fixture(scope="module")
def space_time_sets(tmp_path_factory):
    root = tmp_path_factory.mktemp("space-time")
    return {name: record(parse_scene(scene), spec, 2, 96, cps, root / name)
            for name, (scene, spec, _, cps) in SPACE_TIME.items()}


@pytest.mark.parametrize("name", list(SPACE_TIME))
def test_space_time_set_layout_truth_and_round_trip(space_time_sets, name):
    from scipy.linalg import eigh

    from adapt.engine.evaluate import evaluate_batch
    from adapt.engine.scores import to_db
    from adapt.processors import parse_spec
    from adapt.streams.snapshots import TrialBatch
    from adapt.studies.reference import SPACE_TIME_METRICS
    scene, spec, taps, _ = SPACE_TIME[name]
    n = scene["array"]["elements"]
    m = n * taps
    folder = space_time_sets[name]
    ref = load_reference(folder)
    info = ref.info
    c = len(info["checkpoints"])
    # the shape metadata a candidate in any language reads (format version 2)
    assert info["format_version"] == 2
    assert info["weights"]["shape"] == [c, m] and info["weights"]["elements"] == n
    assert info["weights"]["taps"] == taps and info["weights"]["column"] == "l*N + n"
    assert ("bins" in info["weights"]) == (name == "subband")
    wide = "receiver" in scene
    assert info["fractional_bandwidth"] == (0.4 if wide else 0.0)
    case_json = json.loads((folder / "case-0000" / "case.json").read_text())
    assert case_json["weights"] == info["weights"]
    assert json.loads((folder / "tolerances.json").read_text())["metrics"] == SPACE_TIME_METRICS
    c0 = ref.cases[0]
    assert (folder / "case-0000" / "truth_signal_covariance.npy").is_file()
    assert c0.samples.shape == (96, n) and c0.weights.shape == (c, m)
    truth = (m, m) if wide else (c, m, m)            # the pulsing scene: per checkpoint
    assert c0.truth_covariance.shape == truth and c0.signal_covariance.shape == truth
    # outputs are y_k = w^H z_k on stacked snapshots written out independently
    z = cand.stacked(c0.samples, taps)
    cps = c0.checkpoints
    j = int(cps[1]) + 1                              # held weight: checkpoint 1
    assert c0.outputs[j] == pytest.approx(np.vdot(c0.weights[1], z[j]), rel=1e-10)
    # SINR on the truth below the optimum for the same taps, the largest generalised
    # eigenvalue of (R_s, R_in) (Van Trees 2002, broadband chapter; scipy.linalg.eigh)
    rs = c0.signal_covariance if wide else c0.signal_covariance[-1]
    rin = c0.truth_covariance if wide else c0.truth_covariance[-1]
    best = 10 * np.log10(eigh(rs, rin, eigvals_only=True)[-1])
    assert c0.sinr_db[-1] <= best + 1e-9
    # the recorded SINR is the engine's score of the same processor on the same trials
    sc = parse_scene(scene)
    ev = evaluate_batch(TrialBatch(sc, trials=2), [parse_spec(spec)], cps, 96)
    got = np.array([case.sinr_db for case in ref.cases])
    assert np.allclose(to_db(ev.processors[0].sinr), got, rtol=0, atol=1e-6)
    # the candidate-style re-computation from the stored samples reproduces the weights
    rep = verify(ref, reference_implementation)
    assert rep.passed, format_report(rep)
    assert all(np.nanmax(r.weight_error_db) < -200 for r in rep.cases)


def test_independent_space_time_candidates_pass_and_a_misread_tap_order_fails(
        space_time_sets):
    # written from the documented layout alone: stacked SMI with the look at the centre
    # tap (Frost 1972; Compton 1988, ch. 7) and the sub-band recipe of the set
    rep = verify(space_time_sets["smi"], cand.space_time_smi)
    assert rep.passed, format_report(rep)
    rep = verify(space_time_sets["subband"], cand.subband_mvdr)
    assert rep.passed, format_report(rep)
    wrong = verify(space_time_sets["smi"], lambda c: cand.space_time_smi(c, oldest_first=True))
    assert not wrong.passed
    assert all("weight_error_db" in r.message for r in wrong.cases)


def test_scaled_weight_error_definition():
    from adapt.studies.reference import scaled_weight_error_db
    rng = np.random.default_rng(4)
    w = rng.standard_normal(12) + 1j * rng.standard_normal(12)
    assert scaled_weight_error_db((0.2 - 3j) * w, w) == pytest.approx(-300.0)
    # an error e orthogonal to w: the best scale leaves ||e|| / sqrt(||w||^2 + ||e||^2)
    e = rng.standard_normal(12) + 1j * rng.standard_normal(12)
    e -= w * np.vdot(w, e) / np.vdot(w, w)
    e *= 0.01 * np.linalg.norm(w) / np.linalg.norm(e)
    want = 20 * np.log10(0.01 / np.sqrt(1 + 1e-4))
    assert scaled_weight_error_db(w + e, w) == pytest.approx(want, abs=1e-9)
    assert scaled_weight_error_db(np.zeros(12), w) == pytest.approx(0.0)


def test_perturbed_space_time_weight_fails_naming_the_case(space_time_sets, tmp_path):
    ref = load_reference(space_time_sets["frost"])
    cps = ref.cases[1].checkpoints

    def perturbed(case):
        w = reference_implementation(case)
        if case.name == "case-0001":
            i = 2 * 4 + 1                           # tap 2, element 1 (column l N + n)
            w[2, i] += 0.05 * np.linalg.norm(w[2])  # about -26 dB at checkpoint index 2
        return w

    rep = verify(ref, perturbed)
    assert [r.kind for r in rep.cases] == ["pass", "failure"]
    bad = rep.cases[1]
    assert "weight_error_db = " in bad.message and f"at checkpoint {cps[2]}" in bad.message
    assert bad.weight_error_db[2] == pytest.approx(20 * np.log10(0.05), abs=0.5)
    root = ET.parse(write_report_junit(rep, tmp_path / "j.xml")).getroot()
    cases = root.find("testsuite").findall("testcase")
    assert cases[0].find("failure") is None and cases[1].find("failure") is not None
    assert "weight_error_db" in cases[1].find("failure").get("message")


def test_wrong_weight_shape_is_refused_with_exit_2(run_cli, space_time_sets, smi_set,
                                                   tmp_path, write_file):
    spatial = write_file("spatial.py", "import numpy as np\n"
                         "def f(case):\n"
                         "    return np.zeros((len(case.checkpoints), case.samples.shape[1]),"
                         " complex)\n")
    folder = space_time_sets["smi"]
    c = len(load_reference(folder).cases[0].checkpoints)
    junit = tmp_path / "j.xml"
    code, out, err = run_cli(["verify", folder, "--python", f"{spatial}:f", "--junit", junit])
    assert code == 2, out + err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert f"shape ({c}, 4), expected ({c}, 12)" in err and "case-0000" in err
    assert "N x L = 4 x 3" in err
    cases = ET.parse(junit).getroot().find("testsuite").findall("testcase")
    assert "expected" in cases[0].find("error").get("message")
    assert "not run" in cases[1].find("error").get("message")
    # a command writing spatial weights is refused the same way
    good = f"{sys.executable} {CANDIDATE} good {{case}} {{out}}"
    code, out, err = run_cli(["verify", folder, "--command", good])
    assert code == 2 and f"expected ({c}, 12)" in err
    # and a narrowband set refuses a wrong shape too
    code, out, err = run_cli(["verify", smi_set, "--python", f"{spatial}:f"])
    assert code == 1 and "FAIL" in out, out + err   # (C, N) is its shape: compared
    short = write_file("short.py", "from adapt.studies.reference import "
                       "reference_implementation as r\n"
                       "def f(case):\n    return r(case)[:, :5]\n")
    code, out, err = run_cli(["verify", smi_set, "--python", f"{short}:f"])
    assert code == 2 and "shape (6, 5), expected (6, 6)" in err
    with pytest.raises(InputError, match="expected"):
        verify(smi_set, lambda case: reference_implementation(case)[:, :5])


def test_narrowband_sets_keep_the_version_1_layout(smi_set, smi_ref):
    from adapt.studies.reference import METRICS
    info = json.loads((smi_set / "reference.json").read_text())
    assert info["format_version"] == 1
    assert set(info) == {"format", "format_version", "scene", "scene_file", "seed",
                         "processor", "method", "label", "trials", "snapshots", "elements",
                         "checkpoints", "cases", "uses_reference", "versions",
                         "scene_mapping"}
    meta = json.loads((smi_set / "case-0000" / "case.json").read_text())
    assert set(meta) == {"case", "trial", "method", "spec", "label", "params",
                         "uses_reference", "stream", "noise_power", "elements", "snapshots",
                         "checkpoints", "look_direction", "positions"}
    truth = json.loads((smi_set / "case-0000" / "truth.json").read_text())
    assert "sinr" not in truth
    assert json.loads((smi_set / "tolerances.json").read_text())["metrics"] == METRICS
    assert not (smi_set / "case-0000" / "truth_signal_covariance.npy").exists()
    assert all(c.signal_covariance is None and c.taps == 1 for c in smi_ref.cases)


def test_space_time_sets_too_big_are_refused(tmp_path, monkeypatch):
    from adapt.studies import reference as refmod
    scene = parse_scene(WIDE)
    monkeypatch.setattr(refmod, "_MAX_STACKED", 2 * 96 * 4 * 3 - 1)
    with pytest.raises(InputError, match="stacked snapshots"):
        record(scene, "smi taps=3 loading_db=3", 2, 96, None, tmp_path / "a")
    monkeypatch.setattr(refmod, "_MAX_STACKED", 1 << 26)
    monkeypatch.setattr(refmod, "_MAX_TRUTH_VALUES", 2 * 2 * 12 * 12 - 1)
    with pytest.raises(InputError, match="space-time truth"):
        record(scene, "smi taps=3 loading_db=3", 2, 96, None, tmp_path / "b")
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_recorded_frost_weights_hold_the_fir_look_constraint_per_tap(space_time_sets):
    # Frost (1972): C^H w = f with C = [e_0 (x) a, ..., e_{L-1} (x) a]; the default f is
    # a pure delay at the centre tap (L-1)//2 = 1, so reading the columns as l N + n
    # gives sum_n conj(a_n) w[l, n] = (0, 1, 0) at every checkpoint
    for case in load_reference(space_time_sets["frost"]).cases:
        w = case.weights.reshape(len(case.checkpoints), 3, 4)
        resp = np.einsum("cln,n->cl", w, np.conj(case.steering))
        assert np.allclose(resp, [0, 1, 0], atol=1e-10)
