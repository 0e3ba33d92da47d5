"""Real-array effects: coherent copies, spatial smoothing, noise fields, element patterns
and mutual coupling. Each effect is checked against its true covariance and against a
closed form from the literature, computed here independently of the code under test."""
from __future__ import annotations

import warnings

import numpy as np
import pytest

from adapt.api import compare
from adapt.errors import SceneError
from adapt.scene.files import dump_scene, parse_scene
from adapt.streams.snapshots import TrialBatch


def _line(n=8, spacing=0.5):
    return (np.arange(n) - (n - 1) / 2) * spacing


def _steer(n, az_deg, spacing=0.5):
    return np.exp(2j * np.pi * _line(n, spacing) * np.sin(np.deg2rad(az_deg)))


def _multipath_scene(training="signal", **extra):
    data = {"array": {"layout": "line", "elements": 8},
            "sources": [
                {"name": "s", "role": "desired", "azimuth": 0, "power_db": 10},
                {"name": "m", "role": "interferer", "azimuth": 25, "power_db": 7,
                 "waveform": {"kind": "copy", "of": "s", "phase_deg": 60}}],
            "training": training, "trials": 200, "seed": 3, "snapshots": 4000}
    data.update(extra)
    return parse_scene(data)


def _quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return fn(*args, **kw)


# --------------------------------------------------------------------------- copies
def _copy_scene(copy, extra_sources=()):
    return {"array": {"layout": "line", "elements": 6},
            "sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0},
                        {"name": "m", "role": "interferer", "azimuth": 30, "power_db": 3,
                         "waveform": {"kind": "copy", "of": "s"}},
                        {"name": "c", "role": "interferer", "azimuth": -30, "power_db": 3,
                         "waveform": copy}, *extra_sources]}


@pytest.mark.parametrize("copy, words", [
    ({"kind": "copy", "of": "zz"}, ["sources[2].waveform.of", "no source is named 'zz'"]),
    ({"kind": "copy", "of": "m"}, ["sources[2].waveform.of", "itself a copy", "chains"]),
    ({"kind": "copy", "of": "c"}, ["cannot copy itself"]),
    ({"kind": "copy"}, ["sources[2].waveform", "'of' is missing"]),
    ({"kind": "copy", "of": "s", "frequency": 0.1}, ["does not apply to a copy"]),
    ({"kind": "copy", "of": "s", "phase_deg": 400}, ["phase_deg", "out of range"]),
])
def test_copy_refused_with_a_clear_message(copy, words):
    with pytest.raises(SceneError) as err:
        parse_scene(_copy_scene(copy))
    for w in words:
        assert w in str(err.value)


def test_wanted_source_cannot_be_a_copy():
    data = _copy_scene({"kind": "copy", "of": "m"})
    data["sources"][0]["waveform"] = {"kind": "copy", "of": "c"}
    data["sources"][2]["waveform"] = "qpsk"
    with pytest.raises(SceneError, match="wanted source cannot be a copy"):
        parse_scene(data)


def test_copy_round_trips_and_repeats_the_waveform():
    sc = parse_scene(_copy_scene({"kind": "copy", "of": "j", "phase_deg": 40},
                                 [{"name": "j", "role": "interferer", "azimuth": 50,
                                   "power_db": 5, "waveform": {"kind": "tone",
                                                               "frequency": 0.1}}]))
    again = parse_scene(dump_scene(sc))
    assert again.resolved == sc.resolved and again.sources == sc.sources
    batch = TrialBatch(sc, trials=3)
    # the waveform of the copy is the copied source's, rotated (unit power, own gate)
    from adapt.streams import normals
    keys = normals.stream_keys(batch.seed, batch.trial_indices, 1, 0)
    tone = batch._waveform(keys, 3, 5, 20)
    copy = batch._waveform(keys, 2, 5, 20)
    np.testing.assert_allclose(copy, tone * np.exp(1j * np.deg2rad(40)), rtol=0, atol=1e-14)


def test_copies_do_not_change_the_other_streams():
    plain = parse_scene({"array": {"layout": "line", "elements": 4},
                         "sources": [{"name": "s", "role": "desired", "azimuth": 0,
                                      "power_db": 0, "waveform": "qpsk"},
                                     {"name": "j", "role": "interferer", "azimuth": 40,
                                      "power_db": 20}], "trials": 2})
    data = dict(plain.resolved)
    data["sources"] = list(data["sources"]) + [
        {"name": "m", "role": "interferer", "azimuth": -20, "power_db": 0,
         "waveform": {"kind": "copy", "of": "s", "phase_deg": 90}}]
    with_copy = parse_scene(data)
    a = TrialBatch(plain).samples(64)
    b = TrialBatch(with_copy).samples(64)
    np.testing.assert_array_equal(a.reference, b.reference)
    # data = old data + the copy's term, exactly sqrt(P) e^{j90} s(k) b
    bm = TrialBatch(with_copy).steering(2)
    extra = 1j * a.reference[..., None] * bm[:, None, :]
    np.testing.assert_allclose(b.data, a.data + extra, atol=1e-12)


@pytest.mark.parametrize("training", ["signal", "interference"])
def test_sample_covariances_match_the_true_ones_with_copies(training):
    """Sample covariance of block.data / block.training / the interference part against
    batch.covariance(data=True / training=True / default) within 5 standard errors per
    entry (Gaussian: var of an entry of the sample covariance is R_ii R_jj / K)."""
    sc = parse_scene(_copy_scene({"kind": "copy", "of": "j", "phase_deg": -70},
                                 [{"name": "j", "role": "interferer", "azimuth": 50,
                                   "power_db": 5}]) | {"training": training, "seed": 9})
    batch = TrialBatch(sc, trials=2)
    k = 20000
    blk = batch.samples(k)
    for x, r in ((blk.data, batch.covariance(data=True)),
                 (blk.training, batch.covariance(training=True)),
                 (blk.interference, batch.covariance())):
        s = np.einsum("tkn,tkm->tnm", x, np.conj(x)) / k
        d = np.real(np.diagonal(r, axis1=-2, axis2=-1))
        se = np.sqrt(d[:, :, None] * d[:, None, :] / k)
        assert np.all(np.abs(s - r) < 5 * se)
    # signal-present training holds the cross terms: it is not R_in + P_s a a^H
    a = batch.desired_steering()
    naive = batch.covariance() + a[:, :, None] * np.conj(a[:, None, :])
    if training == "signal":
        assert np.abs(batch.covariance(training=True) - naive).max() > 1.0


def test_mpdr_cancels_the_wanted_signal_closed_form():
    """Widrow, Duvall, Gooch and Newman, "Signal cancellation phenomena in adaptive
    antennas: causes and cures", IEEE Trans. AP-30, 1982: MVDR trained with the wanted
    signal present cancels it when a coherent copy arrives from elsewhere. Closed form,
    derived here by the matrix inversion lemma on R_x = I + v v^H with
    v = sqrt(Ps) a + sqrt(Pc) e^{j phi} b: w ~ a - v (v^H a) / (1 + |v|^2); scored by the
    convention SINR = Ps |w^H a|^2 / (Pc |w^H b|^2 + w^H w)."""
    ps, pc, phi = 10.0, 10 ** 0.7, np.deg2rad(60)
    a, b = _steer(8, 0), _steer(8, 25)
    v = np.sqrt(ps) * a + np.sqrt(pc) * np.exp(1j * phi) * b
    w = a - v * (np.vdot(v, a) / (1 + np.vdot(v, v).real))
    closed = ps * abs(np.vdot(w, a)) ** 2 / (pc * abs(np.vdot(w, b)) ** 2 + np.vdot(w, w).real)
    best = ps * np.vdot(a, np.linalg.solve(np.eye(8) + pc * np.outer(b, b.conj()), a)).real
    assert closed < 1.1 and best > 70          # cancelled: about 0 dB against 18.9 dB
    sc = _multipath_scene("signal")
    res = _quiet(compare, sc, ["optimum", "smi"], trials=200, snapshots=4000,
                 checkpoints=[4000])
    np.testing.assert_allclose(res.evaluation.optimum_sinr[:, -1], best, rtol=1e-10)
    s = res.evaluation.by_label("smi").sinr[:, -1]
    se = s.std() / np.sqrt(len(s))
    assert abs(s.mean() - closed) < 5 * se
    # trained on interference alone (the copy included), SMI reaches the optimum
    res = _quiet(compare, _multipath_scene("interference"), ["smi"], trials=50,
                 snapshots=4000, checkpoints=[4000])
    assert res.evaluation.by_label("smi").loss_db[:, -1].mean() < 0.05
