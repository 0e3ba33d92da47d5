"""Real-array effects: coherent copies, spatial smoothing, noise fields, element patterns
and mutual coupling. Each effect is checked against its true covariance and against a
closed form from the literature, computed here independently of the code under test."""
from __future__ import annotations

import warnings

import numpy as np
import pytest

from adapt.api import compare
from adapt.errors import SceneError
from adapt.scenefile import dump_scene, parse_scene
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


# --------------------------------------------------------------------------- smoothing
def _smoothed_closed_form(m, backward):
    """The asymptotic smoothed-MPDR SINR, computed here from the model: the true data
    covariance R_x = I + v v^H, its M x M diagonal blocks averaged (forward: Shan, Wax
    and Kailath 1985), averaged with J conj(.) J (forward-backward: Pillai and Kwon
    1989); the subarray MVDR weight on the first M elements, zero elsewhere."""
    n, ps, pc, phi = 8, 10.0, 10 ** 0.7, np.deg2rad(60)
    a, b = _steer(n, 0), _steer(n, 25)
    v = np.sqrt(ps) * a + np.sqrt(pc) * np.exp(1j * phi) * b
    rx = np.eye(n) + np.outer(v, v.conj())
    rs = sum(rx[i:i + m, i:i + m] for i in range(n - m + 1)) / (n - m + 1)
    if backward:
        rs = 0.5 * (rs + np.flipud(np.fliplr(rs)).conj())
    w = np.zeros(n, complex)
    w[:m] = np.linalg.solve(rs, a[:m])
    return ps * abs(np.vdot(w, a)) ** 2 / (pc * abs(np.vdot(w, b)) ** 2 + np.vdot(w, w).real)


def test_smoothing_restores_the_wanted_signal_at_the_cost_of_aperture():
    """Spatial smoothing (Shan, Wax and Kailath 1985; forward-backward, Pillai and Kwon
    1989) against MPDR signal cancellation (Widrow et al. 1982): the smoothed SMI
    reaches the closed form of the smoothed covariance (computed above), far above the
    cancelled unsmoothed SMI; its weight lives on one M-element subarray, so its
    white-noise gain is at most M (Cauchy-Schwarz) and its SINR at most the best
    M-element SINR, below the N-element optimum."""
    specs = ["smi", "smi subarray=5", "smi subarray=5 smoothing=forward-backward",
             "eigenspace subarray=5 rank=2"]
    res = _quiet(compare, _multipath_scene("signal"), specs, trials=200, snapshots=4000,
                 checkpoints=[4000])
    ev = res.evaluation
    ps, pc = 10.0, 10 ** 0.7
    a5, b5 = _steer(8, 0)[:5], _steer(8, 25)[:5]
    best5 = ps * np.vdot(a5, np.linalg.solve(np.eye(5) + pc * np.outer(b5, b5.conj()), a5)).real
    plain = ev.by_label("smi").sinr[:, -1].mean()
    for label, backward in ((specs[1], False), (specs[2], True), (specs[3], False)):
        p = ev.by_label(label)
        s = p.sinr[:, -1]
        closed = _smoothed_closed_form(5, backward)
        assert abs(s.mean() - closed) < 5 * s.std() / np.sqrt(len(s)), label
        assert s.mean() > 10 * plain and s.max() < best5 < ev.optimum_sinr[0, -1]
        assert np.all(p.white_noise_gain[:, -1] <= 5 * (1 + 1e-12))
        assert np.all(p.final_weights[:, 5:] == 0)
    # forward-backward decorrelates more with the same subarray
    assert ev.by_label(specs[2]).sinr.mean() > ev.by_label(specs[1]).sinr.mean()


def test_smoothing_refused_where_it_cannot_work():
    from adapt.errors import SpecError
    from adapt.processors import parse_spec
    assert "subarray" not in parse_spec("smi").params
    assert "smoothing" not in parse_spec("eigenspace").params
    with pytest.raises(SpecError, match="smoothing applies with subarray only"):
        parse_spec("smi smoothing=forward-backward")
    ring = parse_scene({"array": {"layout": "ring", "elements": 8},
                        "sources": [{"name": "s", "role": "desired", "azimuth": 0,
                                     "power_db": 0}]})
    with pytest.raises(SpecError, match="needs a uniform line"):
        compare(ring, ["smi subarray=4"], trials=2, snapshots=16)
    with pytest.raises(SpecError, match="larger than the 8-element array"):
        compare(_multipath_scene(), ["eigenspace subarray=9"], trials=2, snapshots=16)
    with pytest.raises(SpecError, match="rank must leave"):
        compare(_multipath_scene(), ["eigenspace subarray=4 rank=4"], trials=2, snapshots=16)


def test_smoothed_covariance_blocks():
    from adapt.processors._covariance import smoothed_covariance
    rng = np.random.default_rng(1)
    x = rng.standard_normal((3, 6, 6)) + 1j * rng.standard_normal((3, 6, 6))
    r = x @ np.conj(np.swapaxes(x, -1, -2))
    f = smoothed_covariance(r, 4)
    np.testing.assert_allclose(f, (r[:, :4, :4] + r[:, 1:5, 1:5] + r[:, 2:, 2:]) / 3)
    fb = smoothed_covariance(r, 4, backward=True)
    j = np.eye(4)[::-1]
    np.testing.assert_allclose(fb, 0.5 * (f + j @ np.conj(f) @ j))
    np.testing.assert_array_equal(smoothed_covariance(r, 6), r)


# --------------------------------------------------------------------------- noise fields
def _noise_scene(noise, n=6, spacing=0.3, layout="line", **extra):
    array = {"layout": layout, "elements": n}
    array["radius" if layout == "ring" else "spacing"] = spacing
    data = {"array": array,
            "sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": -100}],
            "noise": noise, "trials": 2, "seed": 5}
    data.update(extra)
    return parse_scene(data)


@pytest.mark.parametrize("field, layout", [("isotropic", "line"), ("cylindrical", "line"),
                                           ("isotropic", "ring"), ("cylindrical", "ring")])
def test_diffuse_noise_coherence_matches_the_closed_forms(field, layout):
    """Cox, "Spatial correlation in arbitrary noise fields with application to ambient
    sea noise", JASA 54, 1973: the coherence of spherically isotropic noise between two
    points d wavelengths apart is sin(kd)/(kd), of cylindrically isotropic (horizontal)
    noise J0(kd), k = 2 pi (scipy.special.j0). The sample covariance of the generated
    noise (thermal floor 1 plus the field at 10 dB) is compared entry by entry with
    I + 10 * coherence, within 5 standard errors (var of an entry R_ii R_jj / K)."""
    from scipy.special import j0
    sc = _noise_scene({"field": field, "level_db": 10}, layout=layout, spacing=0.4)
    batch = TrialBatch(sc)
    k = 20000
    x = batch.samples(k).data
    p = sc.array.positions
    d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
    kd = 2 * np.pi * d
    with np.errstate(invalid="ignore", divide="ignore"):
        coh = np.where(d > 0, np.sin(kd) / kd, 1.0) if field == "isotropic" else j0(kd)
    truth = np.eye(len(p)) + 10.0 * coh
    np.testing.assert_allclose(batch.covariance(data=True)[0], truth, atol=1e-9)
    s = np.einsum("tkn,tkm->tnm", x, np.conj(x)) / k
    se = np.sqrt(np.outer(np.diag(truth), np.diag(truth)) / k)
    assert np.all(np.abs(s - truth) < 5 * se)
    # the sample coherence between two neighbours, against the closed form
    rho = s[:, 0, 1].real / np.sqrt(s[:, 0, 0].real * s[:, 1, 1].real)
    expect = 10 * coh[0, 1] / 11
    assert np.all(np.abs(rho - expect) < 5 * (1 - expect ** 2) / np.sqrt(k) + 1e-12)


def test_channel_noise_spread_is_drawn_per_trial():
    sc = _noise_scene({"element_noise_db_rms": 2.0}, n=8, trials=400)
    batch = TrialBatch(sc, trials=400)
    g = 10 * np.log10(batch.channel_noise)                   # (T, N) Gaussian in dB
    assert abs(g.mean()) < 5 * 2.0 / np.sqrt(g.size)
    assert abs(g.std() / 2.0 - 1) < 5 / np.sqrt(2 * g.size)
    # trial i's draw does not depend on the batch it sits in; the truth holds it
    part = TrialBatch(sc, trials=3, first_trial=10)
    np.testing.assert_array_equal(part.channel_noise, batch.channel_noise[10:13])
    np.testing.assert_allclose(np.diagonal(part.covariance(), axis1=-2, axis2=-1).real,
                               part.channel_noise)
    x = part.samples(20000).data
    power = np.mean(np.abs(x) ** 2, axis=1)
    assert np.all(np.abs(power / part.channel_noise - 1) < 5 / np.sqrt(20000))
    assert not part.same_array


def test_noise_field_keeps_the_thermal_stream_and_refuses_bad_input():
    plain = _noise_scene(None)
    assert "noise" not in plain.resolved
    field = _noise_scene({"field": "isotropic", "level_db": 0})
    again = parse_scene(dump_scene(field))
    assert again.noise == field.noise and again.resolved == field.resolved
    a = TrialBatch(plain).samples(32).data
    b = TrialBatch(field).samples(32).data
    d = b - a
    # the difference is the diffuse field alone: its sample covariance is no white noise
    assert np.abs(d).max() > 0.1
    for noise, words in (({"field": "isotropic"}, "needs level_db"),
                         ({"field": "sphere", "level_db": 1}, "unknown choice"),
                         ({"level_db": 200}, "out of range"),
                         ({"element_noise_db_rms": -1}, "out of range"),
                         ({"colour": "pink"}, "unknown key")):
        with pytest.raises(SceneError, match=words):
            _noise_scene(noise)


def test_superdirective_gain_in_isotropic_noise():
    """Uzkov (1946) / Cox, Zeskind and Owen, "Robust adaptive beamforming", IEEE Trans.
    ASSP-35, 1987 (from memory): a closely spaced line steered to endfire in spherically
    isotropic noise has a directivity (array gain against the isotropic field) that can
    exceed 10 log10 N and tends to N^2 as the spacing shrinks, while the white-noise
    gain of that weight collapses. The optimum, formed from the true noise covariance
    (thermal floor plus a strong isotropic field), shows both."""
    from adapt.engine import scores
    n = 5
    gains = {}
    for spacing in (0.5, 0.1):
        sc = parse_scene({"array": {"layout": "line", "elements": n, "spacing": spacing},
                          "sources": [{"name": "s", "role": "desired", "azimuth": 90,
                                       "power_db": 0}],
                          "noise": {"field": "isotropic", "level_db": 50}})
        res = compare(sc, ["optimum"], trials=1, snapshots=4)
        w = res.evaluation.by_label("optimum").final_weights[0]
        x = _line(n, spacing)
        a = np.exp(2j * np.pi * x)
        coh = np.sinc(2 * np.abs(x[:, None] - x[None, :]))        # sin(kd)/(kd)
        directivity = abs(np.vdot(w, a)) ** 2 / np.vdot(w, coh @ w).real
        assert scores.array_gain(w, a, coh) == pytest.approx(directivity, rel=1e-12)
        assert scores.array_gain(w, a, np.eye(n)) == pytest.approx(
            scores.white_noise_gain(w, a), rel=1e-12)
        wng = res.evaluation.by_label("optimum").white_noise_gain[0, -1]
        bound = np.vdot(a, np.linalg.solve(coh, a)).real          # max directivity
        gains[spacing] = (directivity, wng, bound)
    d_half, wng_half, _ = gains[0.5]
    d_close, wng_close, bound = gains[0.1]
    assert abs(d_half - n) < 1e-6 and abs(wng_half - n) < 1e-6   # half-wave: white, D = N
    assert d_close > 3 * n and bound > 0.95 * n ** 2 and bound < n ** 2
    assert d_close > 0.7 * bound            # the thermal floor (50 dB down) limits it
    assert wng_close < 0.01                                       # -20 dB: superdirective


# --------------------------------------------------------------------------- elements
def _patterned(element=None, coupling=None, layout="line", n=8, **extra):
    array = {"layout": layout, "elements": n}
    if element is not None:
        array["element"] = element
    if coupling is not None:
        array["coupling"] = coupling
    data = {"array": array,
            "sources": [{"name": "s", "role": "desired", "azimuth": 30, "power_db": 0},
                        {"name": "j", "role": "interferer", "azimuth": 150, "power_db": 30}],
            "trials": 2}
    data.update(extra)
    return parse_scene(data)


def test_cosine_pattern_tells_front_from_back():
    """A line along x cannot tell azimuth 30 from its mirror 150 (same x direction
    cosine); elements facing +y with a cos^q power pattern (common practice) see the
    front at cos(30 deg)^q and the back at the back-lobe level."""
    flat = TrialBatch(_patterned())
    np.testing.assert_allclose(flat.steering(0), flat.steering(1), atol=1e-12)
    sc = _patterned({"pattern": "cosine", "exponent": 1.5, "back_db": -20})
    again = parse_scene(dump_scene(sc))
    assert again.resolved == sc.resolved and again.array.element == sc.array.element
    batch = TrialBatch(sc)
    front = np.sqrt(np.cos(np.deg2rad(30)) ** 1.5)
    np.testing.assert_allclose(batch.steering(0), front * flat.steering(0), atol=1e-12)
    np.testing.assert_allclose(batch.steering(1), 0.1 * flat.steering(1), atol=1e-12)
    # the assumed look steering carries the pattern too; scores see the jammer 20 dB down
    np.testing.assert_allclose(sc.look_steering(), front * _patterned().look_steering())
    assert np.isclose(batch.covariance()[0, 0, 0].real, 1 + 1000 * 0.01)


def test_table_pattern_interpolates_in_db():
    from adapt.scene.elements import pattern_gain
    sc = _patterned({"pattern": "table", "angles_deg": [0, 90, 180],
                     "gains_db": [0, -6, -26], "normal": [0, 2, 0]})
    el = sc.array.element
    assert el.normal == (0.0, 1.0, 0.0)
    u = np.array([[0, 1, 0], [1, 0, 0], [0, -1, 0], [np.sin(np.pi / 4), np.cos(np.pi / 4), 0]])
    np.testing.assert_allclose(20 * np.log10(pattern_gain(el, u)), [0, -6, -26, -3])
    with pytest.raises(SceneError, match="increase from 0 to 180"):
        _patterned({"pattern": "table", "angles_deg": [0, 90], "gains_db": [0, -6]})
    with pytest.raises(SceneError, match="does not apply|unknown key"):
        _patterned({"pattern": "cosine", "angles_deg": [0, 180]})


def test_coupling_on_the_true_steering_and_its_cost():
    """Banded symmetric Toeplitz coupling (Friedlander and Weiss 1991, from memory):
    the true steering is C a, the assumed one a unless calibrated. MVDR on the assumed
    steering then loses what the closed forms (computed here) say: little when trained
    on interference alone (the clairvoyant weight, exact), much when trained with the
    signal present (SMI, Monte Carlo); nothing when the array is calibrated."""
    coeff = [[0.3, 0.1], -0.1]
    n = 8
    c = np.eye(n, dtype=complex)
    for i in range(n - 1):
        c[i, i + 1] = c[i + 1, i] = 0.3 + 0.1j
    for i in range(n - 2):
        c[i, i + 2] = c[i + 2, i] = -0.1
    sources = [{"name": "s", "role": "desired", "azimuth": 10, "power_db": 0},
               {"name": "j", "role": "interferer", "azimuth": 35, "power_db": 30}]
    a0, b0 = _steer(n, 10), _steer(n, 35)
    a, b = c @ a0, c @ b0
    r = np.eye(n) + 1000 * np.outer(b, b.conj())
    bound = np.vdot(a, np.linalg.solve(r, a)).real

    def sinr(w):
        return abs(np.vdot(w, a)) ** 2 / np.vdot(w, r @ w).real

    mvdr = sinr(np.linalg.solve(r, a0))
    mpdr = sinr(np.linalg.solve(r + np.outer(a, a.conj()), a0))
    for calibrated in (False, True):
        sc = _patterned(coupling={"coefficients": coeff, "calibrated": calibrated},
                        sources=sources, training="signal")
        assert parse_scene(dump_scene(sc)).resolved == sc.resolved
        batch = TrialBatch(sc)
        np.testing.assert_allclose(batch.steering(0)[0], a, atol=1e-12)
        np.testing.assert_allclose(sc.look_steering(), a if calibrated else a0, atol=1e-12)
        ev = _quiet(compare, sc, ["optimum", "smi"], trials=100, snapshots=4000,
                    checkpoints=[4000]).evaluation
        np.testing.assert_allclose(ev.optimum_sinr[:, -1], bound, rtol=1e-9)
        opt = ev.by_label("optimum").sinr[:, -1]
        smi = ev.by_label("smi").sinr[:, -1]
        se = smi.std() / np.sqrt(len(smi))
        if calibrated:
            np.testing.assert_allclose(opt, bound, rtol=1e-9)
            # the signal-present law (Boroson 1980): rho = eta / (1 + SINR_opt (1 - eta)),
            # E[1 - eta] = (N - 1) / (K + 1); to first order in 1 - eta
            expect = bound * (1 - 7 / 4001 * (1 + bound))
            assert abs(smi.mean() - expect) < 5 * se + 0.002 * bound
        else:
            np.testing.assert_allclose(opt, mvdr, rtol=1e-9)
            assert abs(smi.mean() - mpdr) < 5 * se
            assert 10 * np.log10(bound / mpdr) > 4 and 10 * np.log10(bound / mvdr) > 0.01


def test_coupling_input_checked():
    ring = _patterned(coupling=[0.2], layout="ring", n=6)
    from adapt.scene.elements import coupling_matrix
    cm = coupling_matrix(ring.array.coupling, 6)
    assert cm[0, 5] == 0.2 and cm[0, 1] == 0.2 and cm[0, 3] == 0     # circulant
    for coupling, words in (([1.0], "magnitude"), ([0.1] * 8, "1 to 7 coefficients"),
                            ({"matrix": [[1, 0], [0, 1]]}, "8 x 8 matrix"),
                            ({"coefficients": [0.1], "matrix": [[1]]}, "either"),
                            ({"coefficients": [0.1], "calibrated": "yes"}, "true or false")):
        with pytest.raises(SceneError, match=words):
            _patterned(coupling=coupling)
    grid = {"array": {"layout": "grid", "rows": 2, "columns": 2, "coupling": [0.1]},
            "sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0}]}
    with pytest.raises(SceneError, match="neighbours in a line or ring"):
        parse_scene(grid)
    grid["array"]["coupling"] = {"matrix": np.eye(4).tolist()}
    assert parse_scene(grid).array.coupling.matrix is not None


# --------------------------------------------------------------------------- the tool
def test_check_warns_about_each_new_effect():
    from pathlib import Path

    from adapt.scenefile import load_scene
    from adapt.studies.check import scene_warnings, summarise_scene
    sc = load_scene(Path(__file__).parent.parent / "scenes" / "navigation_ring.yaml")
    text = "\n".join(scene_warnings(sc))
    assert "coherent copy with signal-present training" in text and "'repeater'" in text
    assert "uncalibrated coupling" in text
    summary = summarise_scene(sc)
    assert "copy of satellite" in summary and "not calibrated" in summary
    # each warning goes away with its cause
    quiet = _multipath_scene("interference")
    assert not any("coherent" in w for w in scene_warnings(quiet))
    calibrated = _patterned(coupling={"coefficients": [0.1], "calibrated": True})
    assert not any("coupling" in w for w in scene_warnings(calibrated))
    close = _noise_scene({"field": "isotropic", "level_db": 10}, spacing=0.2)
    assert any("superdirective spacing" in w for w in scene_warnings(close))
    half = _noise_scene({"field": "isotropic", "level_db": 10}, spacing=0.5)
    assert not any("superdirective" in w for w in scene_warnings(half))
    white = _noise_scene({"element_noise_db_rms": 1}, spacing=0.2)
    assert not any("superdirective" in w for w in scene_warnings(white))


def test_beam_figure_marks_coherent_copies():
    from adapt.report.figures import COPY_COLOUR, beam_pattern_figure
    res = _quiet(compare, _multipath_scene("interference"), ["smi"], trials=2, snapshots=32)
    fig = beam_pattern_figure(res.evaluation)
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "coherent copy" in labels
    assert any("copy of s" in t.get_text() for t in ax.texts)
    assert any(line.get_color() == COPY_COLOUR for line in ax.lines)
    plain = compare(_patterned(), ["smi loading_db=10"], trials=2, snapshots=32)
    labels = [t.get_text() for t in beam_pattern_figure(plain.evaluation).axes[0]
              .get_legend().get_texts()]
    assert "coherent copy" not in labels


def test_new_effects_keep_the_stream_rules(monkeypatch):
    """Trial i is the same in any batch, and blocks concatenate to the one-shot stream
    bit for bit, with every new effect on (copies, moving copy, noise field with spread,
    hardware errors, pattern and coupling); compiled kernels and numpy agree to 1e-10."""
    sc = parse_scene({
        "array": {"layout": "line", "elements": 5,
                  "errors": {"gain_db_rms": 0.5, "position_rms": 0.01},
                  "element": "cosine", "coupling": [[0.2, 0.1]]},
        "sources": [{"name": "s", "role": "desired", "azimuth": 5, "power_db": 0,
                     "waveform": "qpsk"},
                    {"name": "m", "role": "interferer", "azimuth": 40, "power_db": 3,
                     "waveform": {"kind": "copy", "of": "s", "phase_deg": 10},
                     "motion": {"azimuth_rate": 0.01}},
                    {"name": "j", "role": "interferer", "azimuth": -30, "power_db": 20,
                     "waveform": {"kind": "tone", "frequency": 0.2}},
                    {"name": "jc", "role": "interferer", "azimuth": 60, "power_db": 10,
                     "waveform": {"kind": "copy", "of": "j"}}],
        "noise": {"field": "cylindrical", "level_db": 3, "element_noise_db_rms": 1},
        "training": "signal", "seed": 4})
    runs = {}
    for kernels in ("numpy", "auto"):
        monkeypatch.setenv("ADAPT_KERNELS", kernels)
        whole = TrialBatch(sc, trials=5).samples(60)
        part = TrialBatch(sc, trials=2, first_trial=3)
        np.testing.assert_array_equal(part.samples(60).data, whole.data[3:])
        pieces = np.concatenate([b.data for b in part.blocks(60, block=7)], axis=1)
        np.testing.assert_array_equal(pieces, whole.data[3:])
        runs[kernels] = whole.data
    np.testing.assert_allclose(runs["numpy"], runs["auto"], rtol=0, atol=1e-10)


def test_theory_sees_the_new_effects():
    from adapt.studies import theory
    sc = _multipath_scene("signal")
    ps, pc = 10.0, 10 ** 0.7
    a, b = _steer(8, 0), _steer(8, 25)
    best = ps * np.vdot(a, np.linalg.solve(np.eye(8) + pc * np.outer(b, b.conj()), a)).real
    assert theory.nominal_optimum_sinr(sc) == pytest.approx(best, rel=1e-10)
    assert any("coherent copies" in v for v in theory.assumption_violations(sc))
    assert theory.theory_for("smi subarray=5", sc) is None
    assert theory.theory_for("smi", sc) is not None
    field = _noise_scene({"field": "isotropic", "level_db": 10})
    assert theory.interference_eigenvalues(field)[0] > 10      # the field must be learned
