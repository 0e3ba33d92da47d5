"""Wideband scenes with moving sources, coherent copies, mutual coupling and noise fields:
the streams against their closed-form space-time covariances, the promises the streams
keep, checks against outside sources and whole runs."""
from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
import yaml

from adapt.engine.execute import run_trials
from adapt.processors import parse_spec
from adapt.scene.geometry import diffuse_coherence
from adapt.scenefile import parse_scene, scene_to_mapping
from adapt.streams import wideband as wb
from adapt.streams.snapshots import TrialBatch

WANTED = {"name": "s", "role": "desired", "azimuth": 0, "power_db": 0}


def _data(sources, array=None, fb=0.4, **extra) -> dict:
    data = {"array": array or {"layout": "line", "elements": 4, "spacing": 0.5},
            "sources": sources, "snapshots": 256, "trials": 3, "seed": 7}
    if fb is not None:
        data["receiver"] = {"fractional_bandwidth": fb}
    data.update(extra)
    return data


def _scene(sources, array=None, fb=0.4, **extra):
    return parse_scene(_data(sources, array, fb, **extra))


def _copy(name, of, azimuth, power_db, **wave):
    return {"name": name, "role": "interferer", "azimuth": azimuth, "power_db": power_db,
            "waveform": {"kind": "copy", "of": of, **wave}}


#: one scene per feature (and the features that combine with it)
FEATURES = {
    "coupling": _data(
        [WANTED, {"name": "j", "role": "interferer", "azimuth": 40, "power_db": 10},
         {"name": "t", "role": "interferer", "azimuth": -50, "power_db": 6,
          "waveform": {"kind": "tone", "frequency": 0.15}}],
        array={"layout": "line", "elements": 4,
               "coupling": {"coefficients": [[0.2, 0.1], 0.05], "calibrated": False}}),
    "copies": _data(
        [WANTED, {"name": "j", "role": "interferer", "azimuth": 40, "power_db": 10,
                  "bandwidth": 0.6, "offset": 0.1},
         _copy("c", "j", -35, 8, phase_deg=40, delay=2.3),
         _copy("m", "s", 60, 3, delay=-0.7)]),
    "tone_copy": _data(
        [WANTED, {"name": "t", "role": "interferer", "azimuth": 40, "power_db": 10,
                  "waveform": {"kind": "tone", "frequency": 0.13}},
         _copy("c", "t", -35, 8, phase_deg=40, delay=2.3)],
        array={"layout": "line", "elements": 4, "errors": {"channel_ripple_rms": 0.1}}),
    "isotropic": _data(
        [WANTED, {"name": "j", "role": "interferer", "azimuth": 40, "power_db": 6}],
        fb=1.0, array={"layout": "line", "elements": 4, "spacing": 0.5},
        noise={"field": "isotropic", "level_db": 20}),
    "cylindrical": _data(
        [WANTED], fb=0.6, array={"layout": "ring", "elements": 5},
        noise={"field": "cylindrical", "level_db": 3, "element_noise_db_rms": 2}),
    "white_field": _data(
        [WANTED], noise={"field": "white", "level_db": 3, "element_noise_db_rms": 1},
        array={"layout": "line", "elements": 4, "errors": {"gain_db_rms": 1}}),
    "motion": _data(
        [WANTED, {"name": "j", "role": "interferer", "azimuth": 20, "power_db": 10,
                  "motion": {"azimuth_rate": 0.01}},
         {**_copy("c", "j", -20, 5, delay=0.5), "motion": {"azimuth_rate": -0.005}},
         {"name": "t", "role": "interferer", "azimuth": -60, "power_db": 4,
          "waveform": {"kind": "tone", "frequency": -0.21},
          "motion": {"azimuth_rate": 0.004}}],
        array={"layout": "line", "elements": 4, "errors": {"channel_ripple_rms": 0.1}}),
}


def _everything():
    """Every feature at once, with hardware and channel errors."""
    return _scene(
        [WANTED, _copy("echo", "s", -25, -3, phase_deg=70, delay=1.4),
         {"name": "jam", "role": "interferer", "azimuth": 35, "power_db": 30,
          "bandwidth": 0.8, "motion": {"azimuth_rate": 0.005}},
         _copy("rep", "jam", -50, 25, delay=3.0),
         {"name": "cw", "role": "interferer", "azimuth": 60, "power_db": 20,
          "waveform": {"kind": "tone", "frequency": 0.1}}],
        fb=0.3,
        array={"layout": "line", "elements": 5,
               "errors": {"channel_delay_rms": 0.05, "channel_ripple_rms": 0.03,
                          "gain_db_rms": 0.2, "position_rms": 0.02},
               "coupling": {"coefficients": [[0.15, 0.05], 0.03]}},
        noise={"field": "isotropic", "level_db": 0, "element_noise_db_rms": 0.5})


# ----------------------------------------------------------------------------- keys
def test_the_four_features_are_accepted_and_a_copy_delay_round_trips():
    for data in FEATURES.values():
        sc = parse_scene(data)
        assert sc.wideband
        assert scene_to_mapping(parse_scene(scene_to_mapping(sc))) == scene_to_mapping(sc)
    sc = parse_scene(FEATURES["copies"])
    assert sc.sources[2].waveform.delay == 2.3
    m = scene_to_mapping(sc)
    assert m["sources"][2]["waveform"]["delay"] == 2.3
    plain = scene_to_mapping(_scene([WANTED, _copy("c", "s", 30, 0)], fb=None))
    assert "delay" not in plain["sources"][1]["waveform"]      # narrowband: never written
    wide = scene_to_mapping(_scene([WANTED, _copy("c", "s", 30, 0)]))
    assert wide["sources"][1]["waveform"]["delay"] == 0.0     # wideband: always (sweepable)


# ------------------------------------------------------------------ the polynomial filters
def test_polynomial_segments_are_the_fixed_filters_and_delay_a_tone():
    for band, offset in [(None, 0.0), (0.3, 0.1), (0.5, -0.2)]:
        coef = wb.polynomial_coefficients(band, offset)
        h = coef.shape[1] // 2
        for d in (0.37, -1.81, 2.5):
            reach = h + 4
            fixed = wb.filter_taps(np.array([d]), band, offset, reach)[0]   # j = -K .. K
            whole = int(np.floor(d))
            seg = wb._segments(coef, np.array(2 * (d - whole) - 1))
            poly = np.zeros_like(fixed)
            for j in range(-reach, reach + 1):
                if -h <= j + whole < h:
                    poly[j + reach] = seg[j + whole + h]
            assert np.abs(poly - fixed).max() < 1e-12
            if band is None:
                # the ideal fractional delay (here an advance) has response e^{j 2 pi f d}
                # inside the band (Laakso, Valimaki, Karjalainen and Laine, "Splitting
                # the unit delay", IEEE SP Magazine 1996)
                for f in (-0.3, 0.0, 0.2):
                    resp = np.sum(poly * np.exp(-2j * np.pi * f * np.arange(-reach, reach + 1)))
                    assert abs(resp - np.exp(2j * np.pi * f * d)) < 1e-3


def test_a_zero_motion_gives_the_fixed_filters_values():
    jams = [{"name": "j", "role": "interferer", "azimuth": 40, "power_db": 10,
             "bandwidth": 0.7, "offset": 0.05},
            {"name": "t", "role": "interferer", "azimuth": -30, "power_db": 6,
             "waveform": {"kind": "tone", "frequency": 0.17}},
            {"name": "c", "role": "interferer", "azimuth": 65, "power_db": 6,
             "waveform": {"kind": "chirp", "start": -0.3, "stop": 0.2, "period": 80}}]
    array = {"layout": "line", "elements": 4, "errors": {"channel_ripple_rms": 0.1,
                                                          "channel_delay_rms": 0.2}}
    still = TrialBatch(_scene([WANTED] + jams, array=array))
    moving = TrialBatch(_scene([WANTED] + [{**j, "motion": {"azimuth_rate": 0.0}}
                                           for j in jams], array=array))
    assert all(wb.uses_polynomial_filters(moving.scene, i) for i in (1, 2, 3))
    assert not any(wb.uses_polynomial_filters(still.scene, i) for i in (1, 2, 3))
    a, b = still.samples(300), moving.samples(300)
    assert np.abs(a.data - b.data).max() < 1e-11
    ks = np.array([0, 100])
    assert np.abs(wb.space_time_covariance(still, 3, ks)
                  - wb.space_time_covariance(moving, 3, ks)).max() < 1e-11


# ------------------------------------------------------- samples against the closed form
def _sample_against_truth(sc, taps=3, trials=100, spacing=160, count=24, truth_of=None):
    """Stacked snapshots at k = spacing, 2 spacing, ... of one long stream per trial
    (spacing beyond every filter's span: Gaussian samples then independent) against the
    true space-time covariance at those k: (|S - R| / standard error, S, R)."""
    batch = TrialBatch(sc, trials=trials)
    ks = spacing * np.arange(1, count + 1)
    data = np.concatenate([b.data for b in batch.blocks(int(ks[-1]) + 1, block=1000)],
                          axis=1)
    z = np.concatenate([data[:, ks - l_] for l_ in range(taps)], axis=-1)   # (T, M, NL)
    source = TrialBatch(sc, trials=1) if batch.same_array else batch
    truth = (truth_of or (lambda b: wb.space_time_covariance(b, taps, ks, "data")))(source)
    count_ = z.shape[0] * z.shape[1]
    s = np.einsum("tki,tkj->ij", z, np.conj(z)) / count_
    r = truth.mean(axis=(0, 1))
    d = np.real(np.einsum("tmii->tmi", truth))
    # complex Wishart: E |S_ab - R_ab|^2 = R_aa R_bb / K for K independent circular
    # Gaussian snapshots (Goodman 1963); the mean of such terms over the moments used
    se = np.sqrt(np.mean(d[..., :, None] * d[..., None, :], axis=(0, 1)) / count_)
    return np.abs(s - r) / se, s, r, se


@pytest.mark.parametrize("feature", sorted(FEATURES))
def test_sample_space_time_covariance_converges_to_the_closed_form(feature):
    sc = parse_scene(FEATURES[feature])
    stat, s, r, se = _sample_against_truth(sc)
    # |S_ab - R_ab| / se is the modulus of a unit complex normal for Gaussian sources
    # (mean sqrt(pi)/2 = 0.886, a mean over entries that move together: loosely); tones
    # make the error smaller, never larger (chirps, deterministic, are checked exactly
    # over whole periods below)
    assert stat.max() < 5.0, feature
    assert 0.3 < stat.mean() < 1.3, feature
    # and the truth is not trivially close: its off-diagonal terms are well resolved
    off = np.abs(r - np.diag(np.diag(r)))
    assert off.max() > 5 * se.max(), feature


def test_the_closed_forms_are_needed_a_simpler_model_is_refused():
    # copies without their cross terms, motion frozen at its start, and a diffuse field
    # taken as white in time (the carrier's coherence at lag 0 only) all miss the samples
    copies = parse_scene(FEATURES["copies"])

    def apart(b):
        taps, ks = 3, 160 * np.arange(1, 25)
        r = np.broadcast_to(np.eye(12, dtype=complex), (1, len(ks), 12, 12)).copy()
        for i in range(len(copies.sources)):
            r = r + wb.source_covariance(b, i, taps, ks)
        return r
    # (each fails the bound of 5 standard errors that the closed forms meet)
    assert _sample_against_truth(copies, truth_of=apart)[0].max() > 10
    motion = parse_scene(FEATURES["motion"])
    frozen = lambda b: np.repeat(wb.space_time_covariance(b, 3, np.array([160]), "data"),  # noqa: E731
                                 24, axis=1)
    assert _sample_against_truth(motion, truth_of=frozen)[0].max() > 10
    iso = parse_scene(FEATURES["isotropic"])

    def white_in_time(b):
        q = np.eye(4) + 100.0 * diffuse_coherence(iso.array.positions, "isotropic")
        full = wb.space_time_covariance(b, 3, 160 * np.arange(1, 49), "data")
        noise = wb.noise_space_time(b, 3)[:, None]
        return full - noise + np.kron(np.eye(3), q)
    assert _sample_against_truth(iso, count=48, truth_of=white_in_time)[0].max() > 5



def test_the_chirp_period_mean_is_the_direct_sum_over_a_period():
    # the closed form against the plain sum over one period of the chirp the streams
    # evaluate, for periods from 2 (offsets many periods apart) to 4096, equal and
    # whole offsets, offsets a whole period apart, and full-band sweeps either way
    from adapt.scene.model import Waveform
    rng = np.random.default_rng(11)
    for period, f0, f1 in [(2, -0.3, 0.4), (3, 0.1, -0.45), (7, -0.5, 0.5), (50, -0.2, 0.3),
                           (256, -0.2, 0.2), (1000, 0.45, -0.45), (4096, -0.5, 0.5)]:
        wf = Waveform(kind="chirp", start=f0, stop=f1, period=period)
        ta, tb = rng.uniform(-9, 9, (2, 200))
        ta[:20] = np.round(ta[:20])
        tb[:10] = ta[:10]
        tb[10:20] = ta[10:20] + period
        k = np.arange(period)[:, None]
        direct = np.mean(wb._deterministic(wf, k + ta, 0.0)
                         * np.conj(wb._deterministic(wf, k + tb, 0.0)), axis=0)
        assert np.abs(wb.chirp_period_mean(wf, ta, tb) - direct).max() < 1e-12, period


@pytest.mark.parametrize("path,azimuth", [("fixed", 0), ("polynomial", 0), ("fixed", 180),
                                          ("polynomial", 180)])
def test_a_chirps_truth_is_its_samples_averaged_over_a_period(path, azimuth, monkeypatch):
    # a chirp is deterministic up to its start phase, so the stacked outer products of
    # its own contribution averaged over any whole period equal the truth to rounding,
    # through channel delay errors, channel ripple, gain errors and coupling; the fixed
    # filters and the polynomial path (a copied source) alike. The sweep's flat-band
    # sinc kernel, the former approximation, misses by far more. At azimuth 180 the
    # line's delays without errors are geometric zeros left as 1e-17 by the cosine,
    # which the streams' times k + d round away: the truth must take them as whole.
    period, taps = 64, 3
    chirp = {**WANTED, "azimuth": azimuth,
             "waveform": {"kind": "chirp", "start": -0.35, "stop": 0.4, "period": period}}
    sources = [chirp] + ([_copy("c", "s", 40, 0, delay=1.7)] if path == "polynomial" else [])
    errors = {"channel_delay_rms": 0.3, "channel_ripple_rms": 0.1, "gain_db_rms": 0.5} \
        if azimuth == 0 else {}
    sc = _scene(sources, fb=0.5, array={"layout": "line", "elements": 4, "errors": errors,
                                        "coupling": {"coefficients": [[0.2, 0.1], 0.05]}})
    assert wb.uses_polynomial_filters(sc, 0) == (path == "polynomial")
    batch = TrialBatch(sc, trials=2)
    first = 37                                   # any start: the sum has period P in k
    sig = batch.samples(first + period).signal
    z = np.concatenate([sig[:, first - l_:first - l_ + period] for l_ in range(taps)],
                       axis=-1)                                         # (T, P, NL)
    s = np.einsum("tki,tkj->tij", z, np.conj(z)) / period
    r = wb.space_time_covariance(batch, taps, np.array([first]), "signal")[:, 0]
    assert np.abs(s - r).max() < 1e-10 * np.abs(r).max()
    # worked out a row at a time (its memory bound), the same values
    monkeypatch.setattr(wb, "_CHIRP_VALUES", 1)
    alone = wb.space_time_covariance(batch, taps, np.array([first]), "signal")[:, 0]
    assert np.array_equal(alone, r)
    # the former kernel on the same time offsets, exp(j pi (f0 + f1) tau) sinc((f1 -
    # f0) tau) with tau = tau_a - tau_b, misses the period mean by per cents of the power
    wf = sc.sources[0].waveform
    tt = np.tile(wb.element_delays(batch, 0), (1, taps)) - np.repeat(np.arange(taps), 4)
    tau = tt[:, :, None] - tt[:, None, :]
    flat = np.exp(1j * np.pi * (wf.start + wf.stop) * tau) * np.sinc((wf.stop - wf.start) * tau)
    exact = wb.chirp_period_mean(wf, tt[:, :, None], tt[:, None, :])
    assert np.abs(flat - exact).max() > 0.02


@pytest.mark.parametrize("moving", [False, True], ids=["fixed", "moving"])
def test_a_stacked_snapshot_straddling_a_pulse_edge_gates_each_tap_at_its_own_time(moving):
    # a jammer on for 7 snapshots of every 20, checked at k = 160 m: tap 0 (snapshot k)
    # has it, taps 1 and 2 (k - 1, k - 2) do not; the streams gate each element's output
    # at its own snapshot, so the truth's blocks are scaled by g(k - l) g(k - l')
    # (fixed filters and the polynomial path alike); gating every tap at k misses
    jam = {"name": "j", "role": "interferer", "azimuth": 35, "power_db": 10,
           "pulsing": {"period": 20, "on": 7, "start": 0}}
    if moving:
        jam["motion"] = {"azimuth_rate": 0.002}
    sc = parse_scene(_data([WANTED, jam]))
    assert wb.tap_gates(sc.sources[1], np.array([160]), 3, 4).tolist() == \
        [[1.0] * 4 + [0.0] * 8]
    stat, s, r, se = _sample_against_truth(sc)
    assert stat.max() < 5.0 and 0.3 < stat.mean() < 1.3

    def at_the_checkpoint(b):             # the former model: every tap gated at k
        taps, ks = 3, 160 * np.arange(1, 25)
        r = wb.space_time_covariance(b, taps, ks, "data")
        unit = wb.source_covariance(b, 1, taps, ks, unit=True)
        g = wb.tap_gates(sc.sources[1], ks, taps, 4)
        on = sc.sources[1].active(ks).astype(float)[:, None, None]
        return r + sc.sources[1].power * unit * (on - g[:, :, None] * g[:, None, :])[None]
    assert _sample_against_truth(sc, truth_of=at_the_checkpoint)[0].max() > 10

# -------------------------------------------------------------------- the promises
def test_identity_coupling_is_bit_identical_to_no_coupling():
    base = FEATURES["motion"]
    eye = [[1.0 if i == j else 0.0 for j in range(4)] for i in range(4)]
    coupled = {**base, "array": {**base["array"], "coupling": {"matrix": eye}}}
    a, b = TrialBatch(parse_scene(base)), TrialBatch(parse_scene(coupled))
    x, y = a.samples(400), b.samples(400)
    for name in ("data", "signal", "training", "reference"):
        assert np.array_equal(getattr(x, name), getattr(y, name)), name
    ks = np.array([0, 77, 399])
    for kind in ("interference", "training", "data", "signal"):
        assert np.array_equal(wb.space_time_covariance(a, 3, ks, kind),
                              wb.space_time_covariance(b, 3, ks, kind)), kind
    specs = [parse_spec(s) for s in ("smi taps=2 loading_db=3", "nlms taps=2 step=0.3")]
    one, two = (run_trials(sc.scene, specs, [32, 300], trials=3, snapshots=300, threads=1)
                for sc in (a, b))
    for p, q in zip(one.processors, two.processors):
        assert np.array_equal(p.sinr, q.sinr) and np.array_equal(p.null_depth_db,
                                                                 q.null_depth_db)
    assert np.array_equal(one.optimum_sinr, two.optimum_sinr)


@pytest.mark.parametrize("feature", sorted(FEATURES) + ["everything"])
def test_every_feature_is_block_size_and_batch_invariant(feature):
    sc = _everything() if feature == "everything" else parse_scene(FEATURES[feature])
    batch = TrialBatch(sc)
    whole = batch.samples(600)
    parts = list(batch.blocks(600, block=97))
    for name in ("data", "signal", "training", "reference"):
        joined = np.concatenate([getattr(p, name) for p in parts], axis=1)
        assert np.array_equal(joined, getattr(whole, name)), name
    alone = TrialBatch(sc, trials=1, first_trial=2).samples(600)
    assert np.array_equal(alone.data[0], whole.data[2])


def test_results_do_not_depend_on_chunks_threads_or_blocks():
    sc = _everything()
    specs = ["smi taps=3 loading_db=3", "nlms taps=2 step=0.3", "optimum taps=2"]
    runs = [run_trials(sc, [parse_spec(s) for s in specs], [16, 300], trials=4,
                       snapshots=300, tail=16, **kw)
            for kw in ({"threads": 1}, {"threads": 2, "chunk": 1}, {"threads": 1, "block": 23})]
    for a, b in zip(runs[0].processors, runs[1].processors):         # chunks and threads
        assert np.array_equal(a.sinr, b.sinr), a.label
        assert np.array_equal(a.final_weights, b.final_weights), a.label
        assert np.array_equal(a.null_depth_db, b.null_depth_db), a.label
    for a, b in zip(runs[0].processors, runs[2].processors):         # another block size
        assert np.allclose(a.final_weights, b.final_weights, rtol=1e-10, atol=1e-13), a.label


def test_compiled_and_numpy_streams_agree(monkeypatch):
    from adapt.numerics import kernels as _kernels
    sc = _everything()
    monkeypatch.setenv("ADAPT_KERNELS", "numpy")
    plain = TrialBatch(sc).samples(300)
    monkeypatch.setenv("ADAPT_KERNELS", "auto")
    if not _kernels.compiled():
        # without numba the compiled path must be refused by name, not silently replaced
        monkeypatch.setenv("ADAPT_KERNELS", "numba")
        with pytest.raises(RuntimeError, match="numba is not installed"):
            _kernels.compiled()
        return
    fast = TrialBatch(sc).samples(300)
    scale = np.abs(plain.data).max()
    assert np.abs(fast.data - plain.data).max() < 1e-10 * scale
    assert np.abs(fast.reference - plain.reference).max() < 1e-10 * scale


def test_memory_estimate_counts_a_dispersive_field_filter():
    from adapt.engine.settings import estimate_run
    data = FEATURES["isotropic"]
    base = estimate_run(_scene(data["sources"], data["array"], fb=1.0), 2, 10).bytes
    field = estimate_run(parse_scene(data), 2, 10).bytes
    assert field > base


# ------------------------------------------------------------- outside sources
def _band_quadrature(fb, width, centre=0.0, count=400):
    x, w = np.polynomial.legendre.leggauss(count)
    return centre + x * width / 2, w / 2


def test_coupled_wideband_jammer_matches_quadrature():
    # Van Trees, Optimum Array Processing (2002), broadband chapter: R = I + P int
    # a(f) a(f)^H df over the jammer's band, a_n(f) = exp(j 2 pi p_n.u (1 + f B)), and the
    # spatial optimum sigma_s^2 b^H R^-1 b; with mutual coupling the element outputs are
    # C a(f) (Friedlander and Weiss, IEEE Trans. AP-39, 1991, from memory): R = I + P C
    # (int a a^H df) C^H and b = C 1 for a wanted source at broadside
    from adapt.engine import scores
    from adapt.scene import elements
    fb, az, band = 0.4, 30.0, 0.8
    coupling = [[0.25, 0.1], [0.05, -0.02]]
    sc = _scene([WANTED, {"name": "j", "role": "interferer", "azimuth": az,
                          "power_db": 30, "bandwidth": band}], fb=fb,
                array={"layout": "line", "elements": 6, "coupling": coupling})
    batch = TrialBatch(sc, trials=1)
    c = elements.coupling_matrix(sc.array.coupling, 6)
    f, wq = _band_quadrature(fb, band)
    u = np.array([np.sin(np.radians(az)), np.cos(np.radians(az)), 0.0])
    a = np.exp(2j * np.pi * (sc.array.positions @ u)[None, :] * (1 + f[:, None] * fb))
    spread = np.einsum("f,fn,fm->nm", wq, a, np.conj(a))
    r = np.eye(6) + 1000.0 * c @ spread @ c.conj().T
    b = c @ np.ones(6)
    want = np.real(np.conj(b) @ np.linalg.solve(r, b))
    got = scores.optimum_sinr_space_time(wb.space_time_covariance(batch, 1, kind="signal"),
                                         wb.space_time_covariance(batch, 1))[0]
    # the fixed filters' own gap from the flat band (0.016 dB for this jammer uncoupled)
    assert abs(10 * np.log10(got / want)) < 0.1
    truth = wb.space_time_covariance(batch, 1)[0]
    assert np.abs(truth - r).max() < 0.01 * 1000
    assert np.abs(truth - (np.eye(6) + 1000.0 * spread)).max() > 0.1 * 1000


def test_moving_jammer_truth_is_the_quadrature_at_its_direction_of_the_moment():
    # the narrowband convention for motion: a weight held after c snapshots is scored
    # against the scene at snapshot c; with one tap that is a fixed jammer at the
    # direction the moving one has at c, and the quadrature of Van Trees (2002,
    # broadband chapter) there: the optimum within the fixed filters' own gap from
    # the flat band (measured up to 0.06 dB over 10-50 degrees on this line)
    from adapt.engine import scores
    fb, band, rate = 0.4, 0.8, 0.02
    jam = {"name": "j", "role": "interferer", "azimuth": 10, "power_db": 30,
           "bandwidth": band, "motion": {"azimuth_rate": rate}}
    sc = _scene([WANTED, jam], fb=fb, array={"layout": "line", "elements": 6})
    batch = TrialBatch(sc, trials=1)
    f, wq = _band_quadrature(fb, band)
    ks = np.array([0, 500, 2000])
    got = wb.space_time_covariance(batch, 1, ks)[0]
    signal = wb.space_time_covariance(batch, 1, ks, "signal")[0]
    for m, k in enumerate(ks):
        az = 10 + rate * k
        fixed = _scene([WANTED, {**jam, "azimuth": az, "motion": None}], fb=fb,
                       array={"layout": "line", "elements": 6})
        assert np.abs(got[m] - wb.space_time_covariance(TrialBatch(fixed, trials=1), 1)[0]
                      ).max() < 1e-9 * 1000
        u = np.array([np.sin(np.radians(az)), np.cos(np.radians(az)), 0.0])
        a = np.exp(2j * np.pi * (sc.array.positions @ u)[None, :] * (1 + f[:, None] * fb))
        r = np.eye(6) + 1000.0 * np.einsum("f,fn,fm->nm", wq, a, np.conj(a))
        want = np.real(np.ones(6) @ np.linalg.solve(r, np.ones(6)))
        opt = scores.optimum_sinr_space_time(signal[m][None], got[m][None])[0]
        assert abs(10 * np.log10(opt / want)) < 0.1


def test_copy_correlation_is_the_flat_band_autocorrelation_at_its_delay():
    # a noise-like source of flat band b centred on o has autocorrelation
    # sinc(b tau) exp(j 2 pi o tau) (Wiener-Khinchin; Papoulis, Probability, Random
    # Variables and Stochastic Processes, from memory): a copy at delay tau and phase
    # phi from the same direction (broadside: no aperture delay) adds
    # 2 sqrt(P P_c) Re(e^{-j phi} rho(tau)) to the power; the filters' transition bands
    # leave a gap that halves as they double
    half = wb.HALF
    try:
        gaps = []
        for h in (32, 64):
            wb.HALF = h
            worst = 0.0
            for band, offset, delay in [(0.5, 0.0, 1.7), (0.5, 0.2, 2.3), (0.2, -0.1, 4.6)]:
                sc = _scene([WANTED, {"name": "j", "role": "interferer", "azimuth": 0,
                                      "power_db": 0, "bandwidth": band, "offset": offset},
                             _copy("c", "j", 0, 0, delay=delay, phase_deg=30)],
                            array={"layout": "line", "elements": 2}, fb=0.3)
                r = wb.space_time_covariance(TrialBatch(sc, trials=1), 1)[0] - np.eye(2)
                rho = np.sinc(band * delay) * np.exp(2j * np.pi * offset * delay)
                want = 2 + 2 * np.real(np.exp(-1j * np.radians(30)) * rho)
                worst = max(worst, abs(r[0, 0] - want), abs(r[0, 1] - want))
            gaps.append(worst)
    finally:
        wb.HALF = half
    assert gaps[0] < 0.04 and gaps[1] < 0.6 * gaps[0]


def test_a_far_delayed_copy_is_an_independent_jammer():
    # beyond the filters' span the copy shares no stream values with its origin: the
    # truth is that of two independent jammers (no cross terms at all)
    far = _scene([WANTED, {"name": "j", "role": "interferer", "azimuth": 30, "power_db": 20},
                  _copy("c", "j", -40, 15, delay=500.0)])
    apart = _scene([WANTED, {"name": "j", "role": "interferer", "azimuth": 30, "power_db": 20},
                    {"name": "c", "role": "interferer", "azimuth": -40, "power_db": 15}])
    r1 = wb.space_time_covariance(TrialBatch(far, trials=1), 2)
    r2 = wb.space_time_covariance(TrialBatch(apart, trials=1), 2)
    assert np.abs(r1 - r2).max() < 1e-9 * np.abs(r2).max()


def test_an_undelayed_copy_at_a_tiny_bandwidth_is_the_narrowband_coherent_truth():
    # README's convention for coherent copies (narrowband: v v^H over the group,
    # Widrow, Duvall, Gooch and Newman 1982) is the limit of the wideband model
    sources = [WANTED, {"name": "j", "role": "interferer", "azimuth": 30, "power_db": 20},
               _copy("c", "j", -40, 15, phase_deg=50), _copy("e", "s", 25, -2)]
    wide = TrialBatch(_scene(sources, fb=1e-9), trials=1)
    narrow = TrialBatch(_scene(sources, fb=None), trials=1)
    for kind, flags in (("interference", {}), ("data", {"data": True})):
        r_w = wb.space_time_covariance(wide, 1, kind=kind)
        r_n = narrow.covariance(**flags)
        # the filters' unit-power normalisation of a full-band source at zero delay is
        # exact; the remaining gap is the filters' own passband ripple, under 1e-6
        assert np.abs(r_w - r_n).max() < 1e-6 * np.abs(r_n).max(), kind


def test_dispersive_diffuse_field_has_the_band_averaged_coherence():
    # Cox (1973): isotropic diffuse noise has coherence sin(kd)/(kd) between points d
    # apart at wavenumber k, cylindrical J0(kd); across the band k scales with
    # (1 + f B), so the lag-0 covariance of a flat-band field is their average over the
    # band (quadrature here); the design's windowed taps leave a gap that halves as the
    # filters double, and the per-element power is exact
    from scipy.special import j0
    half = wb.HALF
    try:
        gaps = {}
        for h in (32, 64):
            wb.HALF = h
            for field in ("isotropic", "cylindrical"):
                sc = _scene([WANTED], fb=1.0, noise={"field": field, "level_db": 0},
                            array={"layout": "line", "elements": 6, "spacing": 0.3})
                r = wb.noise_space_time(TrialBatch(sc, trials=1), 1)[0] - np.eye(6)
                f, wq = _band_quadrature(1.0, 1.0)
                p = sc.array.positions
                d = np.linalg.norm(p[:, None] - p[None], axis=-1)[None] * (1 + f)[:, None, None]
                kernel = np.sinc(2 * d) if field == "isotropic" else j0(2 * np.pi * d)
                want = np.einsum("f,fnm->nm", wq, kernel)
                assert np.allclose(np.diag(r).real, 1.0, atol=1e-12)
                gaps.setdefault(field, []).append(np.abs(r - want).max())
    finally:
        wb.HALF = half
    for field, (g32, g64) in gaps.items():
        assert g32 < 5e-3 and g64 < 0.6 * g32, field
    # at a vanishing bandwidth the field is the narrowband one, white in time
    sc = _scene([WANTED], fb=1e-9, noise={"field": "isotropic", "level_db": 0},
                array={"layout": "line", "elements": 6, "spacing": 0.3})
    r = wb.noise_space_time(TrialBatch(sc, trials=1), 2)[0]
    q = np.eye(6) + diffuse_coherence(sc.array.positions, "isotropic")
    assert np.abs(r[:6, :6] - q).max() < 1e-8 and np.abs(r[:6, 6:]).max() < 1e-8


# ------------------------------------------------------------------------- whole runs
@pytest.mark.parametrize("feature", ["coupling", "copies", "isotropic", "motion", "everything"])
def test_a_scene_with_the_feature_runs_through_compare(feature, tmp_path, run_cli):
    data = (scene_to_mapping(_everything()) if feature == "everything"
            else dict(FEATURES[feature]))
    data.update(trials=3, snapshots=300, processors=[
        "smi taps=2 loading_db=3", "nlms taps=2 step=0.3", "subband bins=4", "optimum"])
    path = tmp_path / f"{feature}.yaml"
    path.write_text(yaml.safe_dump(data))
    code, out, err = run_cli(["compare", path, "--out", tmp_path / "runs", "--threads", 1,
                              "--no-progress"])
    assert code == 0, err
    folder = Path(re.search(r"run folder: (.+)", out).group(1).strip())
    m = json.loads((folder / "metrics.json").read_text())
    assert np.isfinite(m["optimum_sinr_db"])
    for p in m["processors"]:
        assert np.isfinite(p["final"]["sinr_db_mean"]), p["label"]
        assert p["final"]["normalized_sinr_mean"] <= 1 + 1e-9, p["label"]
    assert (folder / "band_map.png").exists()
    code, out, _ = run_cli(["check", path])
    assert code == 0 and "wideband:" in out
    if feature == "copies":
        assert "2.3 snap later" in out


def test_signal_cancellation_fades_as_the_copy_delay_outgrows_the_coherence():
    # MVDR trained with the wanted signal present cancels it when a coherent copy
    # arrives from elsewhere (Widrow, Duvall, Gooch and Newman, "Signal cancellation
    # phenomena in adaptive antennas", IEEE Trans. AP-30, 1982); the cancellation needs
    # the copy to stay coherent with the signal, so it fades once the copy's delay
    # exceeds the signal's correlation time (about one snapshot for a full-band source;
    # the filters' span here) - the same paper's remedy by decorrelation, from memory
    losses = []
    for delay in (0.0, 40.0):
        sc = _scene([WANTED, _copy("echo", "s", 30, 0, delay=delay)], fb=0.3,
                    training="signal", array={"layout": "line", "elements": 4})
        ev = run_trials(sc, [parse_spec("smi taps=2 loading_db=3")], [300], trials=4,
                        snapshots=300, threads=1)
        losses.append(float(np.mean(ev.processors[0].loss_db[:, -1])))
    assert losses[0] > 3.0 and losses[1] < 1.0


def test_the_processors_true_covariances_of_a_wideband_copy_scene_are_the_truths():
    # what LMS-type step bounds read (Context.data_covariance, training_covariance)
    from adapt.processors import Context
    sc = parse_scene({**FEATURES["copies"], "training": "signal"})
    batch = TrialBatch(sc, trials=2)
    ctx = Context.from_batch(batch)
    ks = np.array([0, 50])
    assert np.allclose(ctx.data_covariance(ks), wb.space_time_covariance(batch, 1, ks, "data"))
    assert np.allclose(ctx.training_covariance(ks),
                       wb.space_time_covariance(batch, 1, ks, "training"))
    assert np.allclose(ctx.covariance(ks), wb.space_time_covariance(batch, 1, ks))


def test_adding_a_copy_or_changing_its_delay_leaves_its_origin_as_it_was():
    # common random numbers across scene variants (a study varying the delay compares
    # the same realisations): the copied source's values do not move with its copies
    def blocks(extra):
        sc = _scene([WANTED, {"name": "j", "role": "interferer", "azimuth": 40,
                              "power_db": 10}] + extra)
        return TrialBatch(sc).samples(400)
    alone = blocks([])
    near, far = (blocks([_copy("e", "s", 30, 0, delay=d)]) for d in (20.0, 45.5))
    assert np.array_equal(near.signal, far.signal)
    assert np.array_equal(near.reference, far.reference)
    # alone it takes the fixed filters, copied the polynomial ones: equal to rounding
    assert np.abs(near.signal - alone.signal).max() < 1e-11
    assert np.abs(near.reference - alone.reference).max() < 1e-11
