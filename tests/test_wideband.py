"""Wideband scenes: keys, dispersive generation, space-time covariances, tapped processors."""
from __future__ import annotations

import numpy as np
import pytest

from adapt.engine import scores
from adapt.engine.evaluate import evaluate_batch
from adapt.errors import SceneError
from adapt.processors import Context, parse_spec, run_processors
from adapt.scenefile import parse_scene, scene_to_mapping
from adapt.streams import wideband as wb
from adapt.streams.snapshots import TrialBatch


def _scene(fb=0.4, jammers=None, elements=6, desired=None, **extra):
    desired = desired or {"name": "s", "role": "desired", "azimuth": 0, "power_db": 0}
    if jammers is None:
        jammers = [{"name": "j", "role": "interferer", "azimuth": 40, "power_db": 20}]
    data = {"array": {"layout": "line", "elements": elements, "spacing": 0.5},
            "sources": [desired] + jammers, "snapshots": 256, "trials": 3, "seed": 7}
    if fb is not None:
        data["receiver"] = {"fractional_bandwidth": fb}
    data.update(extra)
    return parse_scene(data)


# ----------------------------------------------------------------------------- keys
def test_keys_round_trip_and_mark_the_scene_wideband():
    sc = _scene(jammers=[{"name": "j", "role": "interferer", "azimuth": 40, "power_db": 20,
                          "bandwidth": 0.3, "offset": -0.1}],
                array={"layout": "line", "elements": 4,
                       "errors": {"channel_delay_rms": 0.05,
                                  "channel_ripple_rms": 0.02}})
    assert sc.wideband and sc.receiver.fractional_bandwidth == 0.4
    assert sc.sources[1].bandwidth == 0.3 and sc.sources[1].offset == -0.1
    again = parse_scene(scene_to_mapping(sc))
    assert scene_to_mapping(again) == scene_to_mapping(sc)
    plain = _scene(fb=None)
    assert not plain.wideband
    m = scene_to_mapping(plain)
    assert "fractional_bandwidth" not in m["receiver"] and "bandwidth" not in m["sources"][1]
    assert "channel_delay_rms" not in m["array"]["errors"]
    assert "channel_ripple_rms" not in m["array"]["errors"]
    assert sc.array.errors.channel_ripple_rms == 0.02


@pytest.mark.parametrize("change, path", [
    ({"receiver": {"fractional_bandwidth": 0}}, "receiver.fractional_bandwidth"),
    ({"receiver": {"fractional_bandwidth": 1.5}}, "receiver.fractional_bandwidth"),
    ({"sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0},
                  {"name": "t", "role": "interferer", "azimuth": 9, "power_db": 0,
                   "waveform": "tone", "bandwidth": 0.2}]}, "sources[1].bandwidth"),
    ({"sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0,
                   "bandwidth": 0.5, "offset": 0.4}]}, "sources[0].offset"),
    ({"sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0},
                  {"name": "c", "role": "interferer", "azimuth": 9, "power_db": 0,
                   "waveform": {"kind": "copy", "of": "s", "delay": 2e5}}]},
     "sources[1].waveform.delay"),
    ({"receiver": {}, "sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0},
                                  {"name": "c", "role": "interferer", "azimuth": 9,
                                   "power_db": 0,
                                   "waveform": {"kind": "copy", "of": "s", "delay": 1.5}}]},
     "sources[1].waveform.delay"),
    ({"sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0},
                  {"name": "c", "role": "interferer", "azimuth": 9, "power_db": 0,
                   "waveform": {"kind": "copy", "of": "s"}, "bandwidth": 0.5}]},
     "sources[1].bandwidth"),
])
def test_bad_wideband_keys_are_refused_with_their_path(change, path):
    data = {"array": {"layout": "line", "elements": 4},
            "receiver": {"fractional_bandwidth": 0.2},
            "sources": [{"name": "s", "role": "desired", "azimuth": 0, "power_db": 0}]}
    data.update(change)
    with pytest.raises(SceneError) as err:
        parse_scene(data)
    assert path in str(err.value)


# ----------------------------------------------------------------------- generation
def _mixed():
    return _scene(jammers=[
        {"name": "j", "role": "interferer", "azimuth": 40, "power_db": 10},
        {"name": "t", "role": "interferer", "azimuth": -30, "power_db": 5,
         "waveform": {"kind": "tone", "frequency": 0.1}},
        {"name": "b", "role": "interferer", "azimuth": 60, "power_db": 3,
         "bandwidth": 0.3, "offset": 0.1, "waveform": "qpsk"},
        {"name": "c", "role": "interferer", "azimuth": -60, "power_db": 3,
         "waveform": {"kind": "chirp", "start": -0.2, "stop": 0.3, "period": 50}}],
        elements=4, array={"layout": "line", "elements": 4,
                           "errors": {"channel_delay_rms": 0.1, "gain_db_rms": 0.3}})


def test_blocks_are_block_size_and_batch_invariant():
    sc = _mixed()
    batch = TrialBatch(sc)
    whole = batch.samples(600)
    parts = list(batch.blocks(600, block=97))
    for name in ("data", "signal", "reference"):
        joined = np.concatenate([getattr(p, name) for p in parts], axis=1)
        assert np.array_equal(joined, getattr(whole, name)), name
    alone = TrialBatch(sc, trials=1, first_trial=2).samples(600)
    assert np.array_equal(alone.data[0], whole.data[2])


def test_sample_space_time_covariance_converges_to_the_closed_form():
    # Gaussian sources only: the error of a sample covariance of K independent
    # snapshots has E ||R^-1/2 (S - R) R^-1/2||_F^2 = D^2 / K (complex Wishart, common
    # practice); overlapping stacks and band-limited sources make neighbouring
    # snapshots dependent, which inflates it by at most the correlation length
    # (taps + 1/bandwidth), the bound checked here; and it must fall with K.
    sc = _scene(jammers=[
        {"name": "j", "role": "interferer", "azimuth": 40, "power_db": 10},
        {"name": "b", "role": "interferer", "azimuth": -50, "power_db": 6,
         "bandwidth": 0.5, "offset": 0.2}], elements=4)
    taps = 3
    batch = TrialBatch(sc, trials=2)
    truth = wb.space_time_covariance(batch, taps, kind="data")
    line = wb.TapLine(taps)
    z = np.concatenate([line(b.data) for b in batch.blocks(64000, block=8000)], axis=1)
    z = z[:, taps:]
    c = np.linalg.cholesky(truth)
    dim = truth.shape[-1]
    errs = []
    for k in (4000, 63000):
        s = np.einsum("tki,tkj->tij", z[:, :k], np.conj(z[:, :k])) / k
        x = np.linalg.solve(c, s)
        white = np.linalg.solve(c, np.conj(np.swapaxes(x, -1, -2)))
        errs.append(np.sum(np.abs(white - np.eye(dim)) ** 2, axis=(-1, -2)) * k / dim ** 2)
    inflation = taps + 1 / 0.5
    assert np.all(errs[0] < 3 * inflation) and np.all(errs[1] < 3 * inflation)
    assert np.all(errs[0] > 0.3) and np.all(errs[1] > 0.3)    # not trivially equal


def test_spatial_optimum_against_a_white_wideband_jammer_matches_quadrature():
    # Van Trees, Optimum Array Processing (2002), broadband chapter: the spatial-only
    # optimum is sigma_s^2 a^H R^-1 a with R = I + P int a(f) a(f)^H df over the band,
    # a_n(f) = exp(j 2 pi p_n.u (1 + f B)); the integral by Gauss-Legendre quadrature.
    fb, p_j, az = 0.4, 1000.0, 30.0
    for band in (None, 0.8):
        jam = {"name": "j", "role": "interferer", "azimuth": az, "power_db": 30}
        if band is not None:
            jam["bandwidth"] = band
        sc = _scene(fb=fb, jammers=[jam], elements=8)
        batch = TrialBatch(sc, trials=1)
        width = 1.0 if band is None else band
        x, wq = np.polynomial.legendre.leggauss(400)
        f, wq = x * width / 2, wq / 2
        u = np.array([np.sin(np.radians(az)), np.cos(np.radians(az)), 0.0])
        a = np.exp(2j * np.pi * (sc.array.positions @ u)[None, :] * (1 + f[:, None] * fb))
        r = np.eye(8) + p_j * np.einsum("f,fn,fm->nm", wq, a, np.conj(a))
        want = np.real(np.ones(8) @ np.linalg.solve(r, np.ones(8)))
        got = scores.optimum_sinr_space_time(wb.space_time_covariance(batch, 1, kind="signal"),
                                             wb.space_time_covariance(batch, 1))[0]
        # the filters' band edges (transition about 1/HALF wide) leave 0.03 dB at full
        # band, less inside a guard band; halving as the filters double (tested below)
        assert abs(10 * np.log10(got / want)) < (0.05 if band is None else 0.01)
        # and the quadrature R itself: the spatial covariance of the generated jammer
        half = wb.HALF
        try:
            gaps = []
            for h in (32, 128):
                wb.HALF = h
                gaps.append(np.abs(wb.space_time_covariance(batch, 1)[0] - r).max() / p_j)
        finally:
            wb.HALF = half
        assert gaps[1] < gaps[0] / 2


def test_narrowband_scene_with_taps_has_block_diagonal_truth():
    sc = _scene(fb=None)
    batch = TrialBatch(sc, trials=1)
    r1 = batch.covariance()[0]
    r3 = wb.space_time_covariance(batch, 3)[0]
    assert np.allclose(r3, np.kron(np.eye(3), r1), atol=1e-12)


# ----------------------------------------------------------------------- processors
def test_taps_one_leaves_specs_and_params_as_before():
    p = parse_spec("smi loading_db=10")
    assert "taps" not in p.params and "taps" not in p.spec()
    assert "taps" not in parse_spec("smi taps=1").params
    q = parse_spec("smi taps=3")
    assert q.params["taps"] == 3 and q.label == "smi taps=3"


def test_tapped_adapter_keeps_its_run_data_in_the_state_and_serves_runs_at_once():
    from adapt.processors._taps import Tapped, tapped
    sc = _scene(fb=0.3, elements=4)
    proc = parse_spec("nlms taps=3 step=0.3")
    t = tapped(proc)
    assert isinstance(t, Tapped) and t.label == proc.label and t.params == proc.params
    with pytest.raises(AttributeError):
        t.lines = None                                   # settings only
    batch = TrialBatch(sc, trials=2)
    ctx = Context.from_batch(batch)
    a, b = t.begin(ctx), t.begin(ctx)                    # two runs interleaved
    assert a is not b and a.lines[0] is not b.lines[0] and a.inner is not b.inner
    blocks = list(batch.blocks(64, block=16))
    for blk in blocks:
        wa = t.update(a, blk, np.array([blk.stop]))
        wb_ = t.update(b, blk, np.array([blk.stop]))
        assert np.array_equal(wa, wb_)
    assert vars(t) == {"inner": proc, "taps": 3}         # nothing a run changed
    # the same processor object in two sequential runs gives the same weights
    runs = [run_processors([proc], TrialBatch(sc, trials=2).blocks(64, block=16), ctx,
                           [16, 64])[0].weights for _ in range(2)]
    assert runs[0].shape == (2, 2, 12) and np.array_equal(runs[0], runs[1])


def test_subband_is_in_the_table_with_no_capability_flags_and_frost_response_stays_out():
    from adapt.processors import PROCESSORS
    cls = PROCESSORS["subband"]
    assert cls.method == "subband"
    assert not (cls.covariance_based or cls.reference_trained or cls.clairvoyant
                or cls.data_free or cls.drawn_covariance or cls.sample_mvdr)
    assert parse_spec(parse_spec("subband bins=8").spec()) == parse_spec("subband bins=8")
    f = parse_spec("frost")
    assert "response" not in f.params and "taps" not in f.params
    g = parse_spec("frost taps=3 response=0,1,0")
    assert parse_spec(g.spec()) == g and g.params["response"] == "0,1,0"


def test_tapped_smi_equals_smi_on_stacked_snapshots_by_hand():
    sc = _scene(fb=0.3, elements=4)
    batch = TrialBatch(sc, trials=2)
    cps = np.array([20, 100, 256])
    got = run_processors([parse_spec("smi taps=3 loading_db=3")],
                         batch.blocks(256, block=50), Context.from_batch(batch), cps)[0]
    block = batch.samples(256)
    z = wb.TapLine(3)(block.training)
    look = np.zeros(12, complex)
    look[4:8] = batch.look
    want = []
    for c in cps:
        r = np.einsum("tki,tkj->tij", z[:, :c], np.conj(z[:, :c])) / c + 10 ** 0.3 * np.eye(12)
        w = np.linalg.solve(r, look)
        want.append(w / np.einsum("ti,i->t", np.conj(w), look)[:, None].conj())
    assert got.weights.shape == (2, 3, 12)
    assert np.allclose(got.weights, np.stack(want, 1), atol=1e-10)


def test_optimum_taps_on_a_narrowband_scene_equals_the_spatial_optimum():
    sc = _scene(fb=None, processors=["optimum", "optimum taps=3", "smi taps=3 loading_db=3"])
    batch = TrialBatch(sc, trials=2)
    ev = evaluate_batch(batch, [parse_spec(s) for s in sc.processors], [64, 256], 256)
    one, three = ev.processors[0], ev.processors[1]
    assert np.allclose(one.sinr, three.sinr, rtol=1e-9)
    assert np.allclose(three.loss_db, 0, atol=1e-9)
    assert np.all(np.isfinite(ev.processors[2].measured_sinr[:, 0]))   # no tail after the last


def test_space_time_scores_reduce_to_the_rank_one_forms():
    rng = np.random.default_rng(3)
    a = rng.standard_normal(5) + 1j * rng.standard_normal(5)
    b = rng.standard_normal((5, 5)) + 1j * rng.standard_normal((5, 5))
    r = b @ b.conj().T + np.eye(5)
    w = rng.standard_normal(5) + 1j * rng.standard_normal(5)
    rs = 2.0 * np.outer(a, a.conj())
    assert np.isclose(scores.output_sinr_space_time(w, rs, r), scores.output_sinr(w, a, r, 2.0))
    assert np.isclose(scores.optimum_sinr_space_time(rs, r), scores.optimum_sinr(a, r, 2.0))


def test_taps_recover_near_narrowband_sinr_against_wideband_jammers():
    # Trend of the tapped-delay-line bandwidth studies (Rodgers and Compton 1979;
    # Compton 1988, from memory): a spatial-only array loses against jammers that fill
    # a wide band, and a few taps per element bring the optimum back near the
    # narrowband value.
    jam = [{"name": "j1", "role": "interferer", "azimuth": 40, "power_db": 40},
           {"name": "j2", "role": "interferer", "azimuth": -25, "power_db": 40}]
    narrow = TrialBatch(_scene(fb=None, jammers=jam, elements=8), trials=1)
    wide = TrialBatch(_scene(fb=0.3, jammers=jam, elements=8), trials=1)

    def opt(batch, taps):
        return 10 * np.log10(scores.optimum_sinr_space_time(
            wb.space_time_covariance(batch, taps, kind="signal"),
            wb.space_time_covariance(batch, taps))[0])

    ref = opt(narrow, 1)
    gaps = [ref - opt(wide, taps) for taps in (1, 3, 5)]
    assert gaps[0] > 1.0                 # the spatial-only array loses dB
    # (slightly above the narrowband value is possible: the generated jammers roll off
    # within 1/HALF of the band edges, where the wanted signal stays)
    assert gaps[0] > gaps[1] > gaps[2] > -0.1
    assert gaps[2] < 0.5


def test_eigenvalue_count_grows_with_the_time_bandwidth_product():
    # Slepian (1978): a process of band W seen over a span T has about 2WT + 1
    # significant eigenvalues; here W = 1 (the sampled band) and T the jammer's delay
    # spread across the aperture, B x (aperture projected on its direction).
    counts, expected = [], []
    for fb in (0.05, 0.5, 1.0):
        sc = _scene(fb=fb, elements=16,
                    jammers=[{"name": "j", "role": "interferer", "azimuth": 90,
                              "power_db": 0}])
        batch = TrialBatch(sc, trials=1)
        r = wb.source_covariance(batch, 1, 1, np.array([0]), unit=True)[0, 0]
        lam = np.linalg.eigvalsh(r)[::-1]
        counts.append(int(np.sum(lam > 1e-2 * lam[0])))
        expected.append(wb.expected_eigenvalues(sc, sc.sources[1]))
    assert counts == sorted(counts) and counts[0] < counts[-1]
    for c, e in zip(counts, expected):
        assert abs(c - e) <= 2 + 0.25 * e


def test_a_chirp_has_the_eigenvalues_of_a_flat_band_across_its_sweep():
    # a chirp's mean over a period (its truth) spreads over the band it sweeps: its
    # eigenvalues follow those of a flat band of that width from the same direction
    # (Slepian 1978, as above), on the array and on a delay line; a tone stays rank one
    sweep = {"kind": "chirp", "start": 0.3, "stop": -0.3, "period": 97}
    sc = _scene(fb=0.8, elements=16, jammers=[
        {"name": "c", "role": "interferer", "azimuth": 90, "power_db": 0, "waveform": sweep},
        {"name": "f", "role": "interferer", "azimuth": 90, "power_db": 0, "bandwidth": 0.6},
        {"name": "t", "role": "interferer", "azimuth": 90, "power_db": 0,
         "waveform": {"kind": "tone", "frequency": 0.2}}])
    batch = TrialBatch(sc, trials=1)
    for taps in (1, 3):
        lams = []
        for i in (1, 2, 3):
            r = wb.source_covariance(batch, i, taps, np.array([0]), unit=True)[0, 0]
            lam = np.linalg.eigvalsh(r)[::-1]
            lams.append(lam / lam.sum())
        counts = [int(np.sum(lam > 1e-2 * lam[0])) for lam in lams]
        # (the chirp's tail is a little longer: its spectrum ripples, and the sweep
        # jumps back once a period)
        assert abs(counts[0] - counts[1]) <= 1 and min(counts[:2]) > 3, (taps, counts)
        assert counts[2] == 1
        assert np.abs(lams[0][:counts[1]] - lams[1][:counts[1]]).max() < 0.01
    assert wb.expected_eigenvalues(sc, sc.sources[1]) == \
        wb.expected_eigenvalues(sc, sc.sources[2]) > 2
    assert wb.expected_eigenvalues(sc, sc.sources[3]) == 1.0


@pytest.mark.parametrize("spec, fir", [("frost taps=3", [0, 1, 0]),
                                       ("frost taps=4 response=0.5,1,-0.25j,0", [0.5, 1, -0.25j, 0])])
def test_frost_delay_line_constraint_holds_exactly(spec, fir):
    # Frost (1972): the look-direction response of the tapped delay line is fixed to a
    # chosen FIR filter, C^H w = f: sum_n conj(a_n) w_{l,n} = f_l at every tap l and step.
    sc = _scene(fb=0.3, elements=5)
    batch = TrialBatch(sc, trials=2)
    p = parse_spec(spec)
    taps = p.params["taps"]
    res = run_processors([p], batch.blocks(300, block=64), Context.from_batch(batch),
                         [1, 10, 100, 300])[0]
    w = res.weights.reshape(2, 4, taps, 5)
    got = np.einsum("tcln,n->tcl", w, np.conj(batch.look))          # C^H w
    assert np.allclose(got, np.asarray(fir), atol=1e-12)
    assert res.weights[:, -1].std() > 0          # it adapted


def test_frost_response_is_checked():
    from adapt.errors import SpecError
    with pytest.raises(SpecError, match="response"):
        parse_spec("frost taps=3 response=1,2")
    with pytest.raises(SpecError, match="derivatives"):
        parse_spec("frost taps=3 derivatives=1")


def test_subband_look_response_is_a_pure_delay_and_overlap_save_matches():
    from adapt.processors.subband import overlap_save
    sc = _scene(fb=0.3, elements=5)
    batch = TrialBatch(sc, trials=2)
    f = 8
    p = parse_spec(f"subband bins={f}")
    cps = [7, 80, 300]
    res = run_processors([p], batch.blocks(300, block=37), Context.from_batch(batch), cps)[0]
    again = run_processors([parse_spec(f"subband bins={f}")], batch.blocks(300, block=300),
                           Context.from_batch(batch), cps)[0]
    assert np.array_equal(res.weights, again.weights)              # block-size invariant
    w = res.weights[:, -1].reshape(2, f, 5)                         # w[l, n]
    nu = np.fft.fftfreq(f)
    u = np.array([0.0, 1.0, 0.0])                                   # look: broadside
    a = batch.look[None, :] * np.exp(2j * np.pi * (sc.array.positions @ u)[None, :]
                                     * nu[:, None] * 0.3)
    # response at nu: sum_{l,n} conj(w_{l,n}) a_n(nu) exp(-j 2 pi nu l)
    resp = np.einsum("tln,bn,bl->tb", np.conj(w), a, np.exp(-2j * np.pi * nu[:, None]
                                                             * np.arange(f)[None, :]))
    assert np.allclose(resp, np.exp(-2j * np.pi * nu * (f // 2)), atol=1e-10)
    # overlap-save (Oppenheim and Schafer, ch. 8) equals the direct form
    x = batch.samples(300).data
    z = wb.TapLine(f)(x)
    direct = np.einsum("tn,tkn->tk", np.conj(res.weights[:, -1]), z)
    assert np.allclose(overlap_save(x, res.weights[:, -1], f), direct, atol=1e-9)


def test_check_prints_wideband_lines_and_warns_past_the_space_time_freedom():
    from adapt.studies.check import scene_warnings, summarise_scene
    jams = [{"name": f"j{i}", "role": "interferer", "azimuth": az, "power_db": 30}
            for i, az in enumerate((50, -40, 70))]
    sc = _scene(fb=1.0, elements=4, jammers=jams, processors=["smi taps=2 loading_db=3"])
    text = summarise_scene(sc)
    assert "fractional bandwidth 1" in text and "delay spread 1.5 snapshots" in text
    assert "j0 " in text.split("eigenvalues:")[1]
    assert any("wideband interference" in w for w in scene_warnings(sc))
    more = _scene(fb=1.0, elements=4, jammers=jams, processors=["smi taps=4 loading_db=3"])
    assert not any("wideband interference" in w for w in scene_warnings(more))
    assert not any("wideband" in w for w in scene_warnings(_scene(fb=None)))


def test_band_map_shows_beam_squint_and_the_figure_is_written():
    # Van Trees (2002), broadband chapter: a spatial-only weight seen at baseband
    # frequency f responds toward u as its narrowband pattern at p.u (1 + f B): the
    # beam squints; at the band centre the map is the narrowband pattern.
    from adapt.report.figures import band_map_db, band_map_figure, is_png, save_png
    sc = _scene(fb=0.4, elements=6, processors=["optimum", "smi taps=3 loading_db=3"])
    ev = evaluate_batch(TrialBatch(sc, trials=2), [parse_spec(s) for s in sc.processors],
                        [256], 256)
    az = np.array([0.0, 20.0])
    m = band_map_db(ev, "optimum", az, [0.0, 0.25])
    assert abs(m[0, 0]) < 1e-9
    # at f = 0.25 and 20 degrees the pattern equals the centre pattern at sin(x) =
    # sin(20)(1 + 0.1)
    twin = np.degrees(np.arcsin(np.sin(np.radians(20.0)) * 1.1))
    centre = band_map_db(ev, "optimum", [twin], [0.0])
    assert np.isclose(m[1, 1], centre[0, 0], atol=1e-9)
    assert is_png(save_png(band_map_figure(ev, azimuths=np.linspace(-90, 90, 19),
                                               frequencies=np.linspace(-0.5, 0.5, 5))))


def test_drawn_covariances_are_refused_for_wideband_scenes_and_taps():
    from adapt.engine.drawn import covariance_draw_refusal
    assert "wideband" in covariance_draw_refusal(_scene(fb=0.2), [parse_spec("smi")])
    why = covariance_draw_refusal(_scene(fb=None), [parse_spec("smi taps=2")])
    assert "smi taps=2" in why
    assert covariance_draw_refusal(_scene(fb=None), [parse_spec("smi")]) is None


def test_subband_output_samples_apply_its_filters_to_the_stacked_snapshots():
    # held-weight outputs of the sub-band processor (N F weights of an N-element stream):
    # y_k = w^H z_k over z_k = [x_k; ...; x_{k-F+1}], whatever the block size
    sc = _scene(fb=0.3, elements=4)
    batch = TrialBatch(sc, trials=2)
    f, cps = 4, [40, 120]
    runs = [run_processors([parse_spec(f"subband bins={f}")], batch.blocks(160, block=b),
                           Context.from_batch(batch), cps, outputs=True)[0]
            for b in (13, 160)]
    assert np.allclose(runs[0].outputs, runs[1].outputs, rtol=1e-12, atol=1e-13)
    res = runs[1]
    z = wb.TapLine(f)(batch.samples(160).data)
    for i, (lo, hi) in enumerate(((40, 120), (120, 160))):
        direct = np.einsum("tn,tkn->tk", np.conj(res.weights[:, i]), z[:, lo:hi])
        assert np.allclose(res.outputs[:, lo:hi], direct, rtol=1e-12, atol=1e-12)
    early = np.einsum("tn,tkn->tk", np.conj(res.initial), z[:, :40])
    assert np.allclose(res.outputs[:, :40], early, rtol=1e-12, atol=1e-12)


def test_filter_bank_compiled_equals_numpy(monkeypatch):
    from adapt.numerics import fir
    from adapt.numerics import kernels as _kernels
    rng = np.random.default_rng(1)
    h = rng.standard_normal((3, 4, 9)) + 1j * rng.standard_normal((3, 4, 9))
    s = rng.standard_normal((3, 40)) + 1j * rng.standard_normal((3, 40))
    monkeypatch.setenv("ADAPT_KERNELS", "numpy")
    plain = fir.filter_bank(h, s, 32)
    want = np.stack([np.convolve(s[t], h[t, d], mode="valid") for t in range(3)
                     for d in range(4)]).reshape(3, 4, 32).transpose(0, 2, 1)
    assert np.allclose(plain, want, atol=1e-12)       # numpy's convolve: the definition
    monkeypatch.setenv("ADAPT_KERNELS", "auto")
    if _kernels.compiled():
        assert np.allclose(fir.filter_bank(h, s, 32), plain, atol=1e-12)


def test_wideband_results_do_not_depend_on_chunks_threads_or_blocks():
    from adapt.engine.execute import run_trials as evaluate
    sc = _mixed()
    specs = ["smi taps=3 loading_db=3", "nlms taps=2 step=0.3", "subband bins=4",
             "optimum"]
    runs = [evaluate(sc, [parse_spec(s) for s in specs], [16, 200], trials=4, snapshots=200,
                     tail=16, **kw)
            for kw in ({"threads": 1}, {"threads": 2, "chunk": 1}, {"threads": 1, "block": 23})]
    for a, b in zip(runs[0].processors, runs[1].processors):     # chunks and threads
        assert np.array_equal(a.sinr, b.sinr), a.label
        assert np.array_equal(a.final_weights, b.final_weights), a.label
        assert np.array_equal(a.measured_sinr, b.measured_sinr, equal_nan=True), a.label
    for a, b in zip(runs[0].processors, runs[2].processors):     # another block size:
        # the stream is identical; block processors' sums split differently (rounding)
        assert np.allclose(a.final_weights, b.final_weights, rtol=1e-10, atol=1e-13), a.label


@pytest.mark.parametrize("spec", ["lms taps=2", "rls taps=2", "power_inversion taps=2",
                                  "gsc taps=2", "nlms taps=2"])
def test_every_tapped_method_runs_with_space_time_weights(spec):
    sc = _scene(fb=0.3, elements=4)
    batch = TrialBatch(sc, trials=2)
    ev = evaluate_batch(batch, [parse_spec(spec)], [50, 300], 300)
    p = ev.processors[0]
    assert p.final_weights.shape == (2, 8)
    assert np.all(np.isfinite(p.sinr)) and np.all(p.normalised <= 1 + 1e-9)


def test_channel_ripple_enters_samples_and_truth_alike():
    # the sample space-time covariance of a scene with channel filters converges to the
    # closed form computed through the same filters (Gaussian and tone sources), and the
    # ripple decorrelates a jammer across channels (a second significant eigenvalue)
    jams = [{"name": "j", "role": "interferer", "azimuth": 30, "power_db": 20},
            {"name": "t", "role": "interferer", "azimuth": -40, "power_db": 10,
             "waveform": {"kind": "tone", "frequency": 0.2}}]
    arr = {"layout": "line", "elements": 4, "errors": {"channel_ripple_rms": 0.1}}
    sc = _scene(fb=None, elements=4, jammers=jams, array=arr)
    assert sc.wideband
    batch = TrialBatch(sc, trials=2)
    parts = list(batch.blocks(30000, block=7000))
    assert np.array_equal(np.concatenate([p.data for p in parts], 1)[:, :500],
                          batch.samples(500).data)
    taps = 2
    z = np.concatenate([wb.TapLine(taps)(p.data) for p in parts], axis=1)[:, taps:]
    truth = wb.space_time_covariance(batch, taps, kind="data")
    s = np.einsum("tki,tkj->tij", z, np.conj(z)) / z.shape[1]
    d = np.real(np.einsum("tii->ti", truth))
    se = np.sqrt(d[:, :, None] * d[:, None, :] / z.shape[1])
    assert np.max(np.abs(s - truth) / se) < 6          # several standard errors
    one = wb.source_covariance(batch, 1, 1, np.array([0]), unit=True)[0, 0]
    lam = np.linalg.eigvalsh(one)[::-1]
    assert lam[1] / lam[0] > 1e-4                       # narrowband alone: rank one
    plain = wb.source_covariance(TrialBatch(_scene(fb=None, elements=4, jammers=jams), trials=1),
                                 1, 1, np.array([0]), unit=True)[0, 0]
    assert np.linalg.eigvalsh(plain)[-2] / np.linalg.eigvalsh(plain)[-1] < 1e-12


# ------------------------------------------------------------------ fast paths (speed)
def _numpy_product_is_fused() -> bool:
    """numpy's contiguous complex product rounds as re = fma(ar, br, -ai bi), im =
    fma(ar, bi, ai br) on machines with its fused SIMD loops (then the compiled
    source pass equals the numpy operations it replaces to the last bit), else as the
    plain formula (then to rounding)."""
    rng = np.random.default_rng(11)
    a = rng.standard_normal(256) + 1j * rng.standard_normal(256)
    b = rng.standard_normal(256) + 1j * rng.standard_normal(256)
    p = a * b
    return not np.array_equal(p.real, a.real * b.real - a.imag * b.imag)


@pytest.mark.parametrize("reference", [False, True])
def test_source_pass_equals_filtering_then_numpy_weighting(monkeypatch, reference):
    # add_filtered (filter, weight by steering x gate, add or write) against the
    # operations it replaces: the filter bank, then numpy's part *= steer * gate and
    # out += part; the filter bank itself is numpy's convolve (the definition)
    from adapt.numerics import fir
    from adapt.numerics import kernels as _kernels
    rng = np.random.default_rng(5)
    t_, n, m, b = 3, 5, 9, 37
    h = rng.standard_normal((t_, n + reference, m)) + 1j * rng.standard_normal((t_, n + reference, m))
    h[:, 3] = h[:, 1]                   # equal filters (summed once by the compiled path)
    h[:, -1] = h[:, 0]
    s = rng.standard_normal((t_, b + m - 1)) + 1j * rng.standard_normal((t_, b + m - 1))
    steer = np.exp(2j * np.pi * rng.random((t_, n)))
    gate = np.where(rng.random(b) < 0.3, 0.0, 3.0)           # a pulsing source
    start = rng.standard_normal((t_, b, n)) + 1j * rng.standard_normal((t_, b, n))
    conv = np.stack([np.convolve(s[t], h[t, d], mode="valid") for t in range(t_)
                     for d in range(n + reference)]).reshape(t_, n + reference, b)
    bank = fir.FilterBank(h)
    for kernels in ("numpy", "auto"):
        monkeypatch.setenv("ADAPT_KERNELS", kernels)
        assert np.allclose(fir.filter_bank(bank, s, b), conv.transpose(0, 2, 1), atol=1e-12)
        part = fir.filter_bank(h[:, :n], s, b)
        part *= steer[:, None, :] * gate[None, :, None]
        out = start.copy() if not reference else np.empty_like(start)
        ref = np.empty((t_, b), dtype=complex) if reference else None
        fir.add_filtered(bank, s, steer, gate, out, ref, accumulate=not reference)
        want = part if reference else start + part
        exact = kernels == "numpy" or not _kernels.compiled() or _numpy_product_is_fused()
        if exact:
            assert np.array_equal(out, want), kernels
        assert np.allclose(out, want, rtol=1e-14, atol=1e-14), kernels
        if reference:
            want_ref = fir.filter_bank(h[:, n:], s, b)[..., 0] * gate[None, :]
            assert np.array_equal(ref, want_ref), kernels


def test_lagged_sums_equal_the_sums_of_stacked_snapshots():
    # the stacked sums formed from lag sums (processors/_covariance.LaggedSums) equal
    # the sums of the stacked snapshots themselves, for checkpoints before the stacks
    # fill (c < L), at block starts and across blocks of any size; exactly Hermitian
    from adapt.processors._covariance import GrowingSums, LaggedSums
    rng = np.random.default_rng(3)
    t_, n, taps = 2, 3, 4
    x = rng.standard_normal((t_, 60, n)) + 1j * rng.standard_normal((t_, 60, n))
    cps = np.array([1, 2, 3, 5, 11, 12, 13, 30, 59, 60])
    z = wb.TapLine(taps)(x)
    want = GrowingSums(t_, n * taps).advance(z, 0, cps)
    for edges in ([0, 60], [0, 11, 12, 13, 40, 60], [0, 1, 2, 3, 4, 30, 60]):
        sums = LaggedSums(t_, n, taps)
        got = []
        for lo, hi in zip(edges[:-1], edges[1:]):
            inside = cps[(cps > lo) & (cps <= hi)]
            part = x[:, lo:hi] if lo % 2 else z[:, lo:hi]     # raw or stacked input
            got.append(sums.advance(part, lo, inside).copy())
        got = np.concatenate(got, axis=1)
        assert np.allclose(got, want, rtol=1e-12, atol=1e-12), edges
        assert np.array_equal(got, np.conj(np.swapaxes(got, -1, -2))), edges
    assert np.array_equal(got[:, 0, n:, :], np.zeros_like(got[:, 0, n:, :]))  # c = 1


def test_tapped_lms_reads_stacked_regressors_in_place(monkeypatch):
    # the lined kernel (no stacked copy) gives the numbers of the stacked regressors
    from adapt.numerics import kernels as _kernels
    rng = np.random.default_rng(8)
    t_, b, n, taps = 3, 40, 4, 3
    xh = rng.standard_normal((t_, b + taps - 1, n)) + 1j * rng.standard_normal((t_, b + taps - 1, n))
    d = rng.standard_normal((t_, b)) + 1j * rng.standard_normal((t_, b))
    marks = np.array([0, 17, 39])
    for kernels in ("numpy", "auto"):
        monkeypatch.setenv("ADAPT_KERNELS", kernels)
        for gain in (None, 0.01):
            w1 = np.zeros((t_, n * taps), complex)
            w2 = w1.copy()
            a = _kernels.lms_block(w1, xh, marks, gain=gain, desired=d, step=0.3, eps=1e-3,
                                   taps=taps)
            s = _kernels.lms_block(w2, _kernels.lined(xh, taps), marks, gain=gain, desired=d,
                                   step=0.3, eps=1e-3)
            assert np.array_equal(a, s) and np.array_equal(w1, w2), (kernels, gain)


def test_quadratic_forms_each_by_itself(monkeypatch):
    # w^H R w one form at a time: equal to the element-wise sum to rounding, and a
    # stack equals its items one by one exactly (results never depend on the chunk)
    from adapt.engine import scores as sc_
    rng = np.random.default_rng(4)
    w = rng.standard_normal((5, 3, 6)) + 1j * rng.standard_normal((5, 3, 6))
    a = rng.standard_normal((5, 1, 6, 6)) + 1j * rng.standard_normal((5, 1, 6, 6))
    r = a @ np.conj(np.swapaxes(a, -1, -2))
    plain = np.real(np.einsum("...n,...nm,...m->...", np.conj(w), r, w))
    for kernels in ("numpy", "auto"):
        monkeypatch.setenv("ADAPT_KERNELS", kernels)
        got = sc_.quadratic_form(w, r)
        assert np.allclose(got, plain, rtol=1e-13)
        assert all(np.array_equal(sc_.quadratic_form(w[i:i + 1], r[i:i + 1]), got[i:i + 1])
                   for i in range(5))
        shared = sc_.quadratic_form(w, np.broadcast_to(r[:1], r.shape))
        assert all(np.array_equal(sc_.quadratic_form(w[i:i + 1], r[:1]), shared[i:i + 1])
                   for i in range(5))


def test_wideband_scores_agree_between_compiled_and_numpy_paths(monkeypatch):
    # the compiled paths (source pass, lag sums and compiled solves, lined LMS, output
    # powers from the block's history, quadratic forms) against numpy's, to rounding
    from adapt.engine.execute import run_trials as evaluate
    sc = _mixed()
    specs = ["smi taps=3 loading_db=3", "nlms taps=3 step=0.3", "lms taps=2", "optimum taps=2"]
    runs = []
    for kernels in ("numpy", "auto"):
        monkeypatch.setenv("ADAPT_KERNELS", kernels)
        runs.append(evaluate(sc, [parse_spec(s) for s in specs], [1, 2, 16, 200], trials=3,
                             snapshots=200, tail=16, threads=1, block=57))
    for a, b in zip(*(r.processors for r in runs)):
        for name in ("sinr", "measured_sinr", "null_depth_db", "white_noise_gain",
                     "final_weights"):
            assert np.allclose(getattr(a, name), getattr(b, name), rtol=1e-8, atol=1e-12,
                               equal_nan=True), (a.label, name)


def test_wideband_blocks_made_ahead_on_threads_are_the_same():
    # wideband blocks read their stream numbers directly (no state between blocks), so
    # blocks made by alternating threads equal the whole sequence to the last bit
    # (compared as they come: a block made ahead is valid until the next is asked for)
    batch = TrialBatch(_mixed(), trials=2)
    whole = list(batch.blocks(600, block=97))
    starts = []
    for n, a in enumerate(batch.blocks_on_threads(600, block=97, threads=3)):
        starts.append(a.start)
        for name in ("data", "signal", "training", "reference"):
            assert np.array_equal(getattr(a, name), getattr(whole[n], name)), name
    assert starts == [b.start for b in whole]


def test_the_table_names_the_optimum_each_delay_line_is_scored_against(tmp_path):
    # the loss of a space-time processor is against the optimum for its own taps (the
    # largest generalised eigenvalue); the table says so, with that optimum: the mean of
    # its final SINR plus its loss (both means of dB over the same trials)
    from adapt.studies.compare import compare, own_optima
    jam = [{"name": "j", "role": "interferer", "azimuth": 30, "power_db": 40}]
    sc = _scene(fb=0.4, jammers=jam, snapshots=200, trials=4)
    result = compare(sc, ["optimum", "optimum taps=3", "smi taps=3 loading_db=10"])
    s = result.summary
    own = own_optima(s)
    assert [labels for _, labels in own] == [["optimum taps=3", "smi taps=3 loading_db=10"]]
    value = own[0][0]
    for p in s.processors[1:]:
        assert p.final.sinr_db_mean + p.final.loss_db_mean == pytest.approx(value, abs=0.01)
    assert value > s.optimum_sinr_db + 0.1                  # more taps, a higher optimum
    table = " ".join(result.table().split())
    assert f"{value:.2f} dB for optimum taps=3, smi taps=3 loading_db=10" in table
    from adapt.studies.compare import write_compare_run
    page = (write_compare_run(result, out_root=tmp_path) / "report.html").read_text()
    assert f"{value:.2f} dB for optimum taps=3, smi taps=3 loading_db=10." in page
    narrow = compare(_scene(fb=None, jammers=jam, snapshots=200, trials=4),
                     ["optimum", "smi loading_db=10"])
    assert own_optima(narrow.summary) == []
    assert "own weight length" not in narrow.table()
