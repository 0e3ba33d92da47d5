"""Block (covariance-based) processors: optimum, smi, lcmv, power_inversion, eigenspace.

Every statistical check uses fixed seeds and tolerances of at least 4 standard errors
(computed from theory or from the data); every source is named beside its check.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import integrate, stats

from adapt.errors import SpecError
from adapt.processors import Context, parse_spec, registry, run_processors
from adapt.processors._covariance import GrowingSums, SlidingSums, outer_sum
from adapt.scene import geometry
from adapt.scene.geometry import steering_derivatives
from adapt.scene.model import ArrayLayout, HardwareErrors, Pulsing, Scene, Source
from adapt.streams.snapshots import TrialBatch


# ----------------------------------------------------------------------------- helpers
def make_scene(n=8, jammers=((-35.0, 30.0),), snr_db=0.0, training="interference",
               trials=50, seed=1, spacing=0.5, errors=None):
    """A line array looking at broadside; ``jammers`` are (azimuth, power_db) or
    (azimuth, power_db, Pulsing)."""
    arr = ArrayLayout("line", geometry.line_positions(n, spacing),
                      errors=errors or HardwareErrors())
    srcs = [Source("wanted", "desired", 0.0, 0.0, snr_db)]
    for i, jam in enumerate(jammers):
        srcs.append(Source(f"jammer{i}", "interferer", jam[0], 0.0, jam[1],
                           pulsing=jam[2] if len(jam) > 2 else None))
    return Scene("test", arr, tuple(srcs), 0.0, 0.0, training=training, trials=trials,
                 seed=seed)


def run(scene, specs, checkpoints, trials=None, first_trial=0, block=None):
    batch = TrialBatch(scene, trials=trials, first_trial=first_trial)
    ctx = Context.from_batch(batch)
    procs = [parse_spec(s) for s in specs]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        res = run_processors(procs, batch.blocks(max(checkpoints), block=block), ctx,
                             checkpoints)
    return batch, [r.weights for r in res]


def output_sinr(w, a, r, signal_power=1.0):
    """``sigma_s^2 |w^H a|^2 / (w^H R_in w)`` for weights (T, C, N), true steering a (T, N),
    true interference-plus-noise covariance r (T, N, N)."""
    num = signal_power * np.abs(np.einsum("tcn,tn->tc", np.conj(w), a)) ** 2
    den = np.einsum("tcn,tnm,tcm->tc", np.conj(w), r, w).real
    return num / den


def normalised_sinr(batch, w_proc, w_opt, signal_power=1.0):
    a, r = batch.desired_steering(), batch.covariance()
    return (output_sinr(w_proc, a, r, signal_power) / output_sinr(w_opt, a, r, signal_power))


# ----------------------------------------------------------------------------- registry
def test_methods_registered_with_documentation():
    reg = registry()
    for name in ("optimum", "smi", "lcmv", "power_inversion", "eigenspace"):
        cls = reg[name]
        assert cls.summary and cls.__module__
        doc = __import__(cls.__module__, fromlist=["x"]).__doc__
        assert "Source" in doc and "Cost" in doc and "heckable fact" in doc


# ----------------------------------------------------------------------------- optimum
def test_optimum_sinr_equals_inverse_covariance_form_and_woodbury_closed_form():
    # Van Trees, Optimum Array Processing, ch. 6: SINR_opt = sigma_s^2 a^H R^-1 a; for one
    # interferer R = I + P v v^H, Woodbury gives R^-1 = I - P v v^H / (1 + N P), so
    # SINR_opt = sigma_s^2 [N - P |a^H v|^2 / (1 + N P)].
    n, inr_db, snr_db, az = 10, 30.0, -3.0, 23.0
    scene = make_scene(n=n, jammers=((az, inr_db),), snr_db=snr_db, trials=3)
    batch, (w,) = run(scene, ["optimum"], [1, 5, 40])
    a, r = batch.desired_steering(), batch.covariance()
    ps, inr = 10 ** (snr_db / 10), 10 ** (inr_db / 10)
    got = output_sinr(w, a, r, ps)
    direct = ps * np.einsum("tn,tn->t", np.conj(a), np.linalg.solve(r, a[..., None])[..., 0]).real
    np.testing.assert_allclose(got, direct[:, None] * np.ones(3), rtol=1e-10)
    pos = geometry.line_positions(n, 0.5)
    look = geometry.steering_vector(pos, 0.0)
    v = geometry.steering_vector(pos, az)
    closed = ps * (n - inr * abs(np.vdot(look, v)) ** 2 / (1 + n * inr))
    np.testing.assert_allclose(got, closed, rtol=1e-10)
    # distortionless toward the assumed look direction
    np.testing.assert_allclose(np.einsum("tcn,n->tc", np.conj(w), look), 1.0, atol=1e-12)


def test_optimum_follows_a_jammer_that_switches_on():
    # The optimum at checkpoint c uses the true covariance of snapshot c (the moment the
    # scores use): the jammer switching on at snapshot 50 is nulled from checkpoint 50.
    n = 8
    scene = make_scene(n=n, jammers=((20.0, 40.0, Pulsing(start=50)),), trials=2)
    batch, (w,) = run(scene, ["optimum"], [49, 50, 80], block=7)
    look = batch.look
    np.testing.assert_allclose(w[:, 0], np.broadcast_to(look / n, (2, n)), atol=1e-12)
    # from checkpoint 50 on, the 40 dB jammer is nulled (MVDR residual ~ 1/(N P))
    v = batch.steering(1)
    assert np.all(np.abs(np.einsum("tcn,tn->tc", np.conj(w[:, 1:]), v)) < 1e-4)
    np.testing.assert_array_equal(w[:, 1], w[:, 2])


# ----------------------------------------------------------------------------- SMI (RMB)
def test_smi_normalised_sinr_follows_reed_mallett_brennan():
    # Reed, Mallett & Brennan 1974: unloaded SMI on K interference-only snapshots gives
    # rho = SINR/SINR_opt ~ Beta(K-N+2, N-1), mean (K+2-N)/(K+1).
    n, trials = 8, 1500
    scene = make_scene(n=n, jammers=((-35.0, 30.0), (17.0, 25.0)), trials=trials, seed=11)
    ks = [n, 2 * n, 4 * n]
    batch, (w_opt, w_smi) = run(scene, ["optimum", "smi"], ks)
    rho = normalised_sinr(batch, w_smi, w_opt)
    for i, k in enumerate(ks):
        law = stats.beta(k - n + 2, n - 1)
        assert law.mean() == pytest.approx((k + 2 - n) / (k + 1))
        se = law.std() / np.sqrt(trials)
        assert abs(rho[:, i].mean() - law.mean()) < 4 * se, (k, rho[:, i].mean(), law.mean())
    # the full distribution at K = 2N (scipy.stats.kstest against scipy.stats.beta)
    assert stats.kstest(rho[:, 1], stats.beta(n + 2, n - 1).cdf).pvalue > 1e-3


def test_diagonal_loading_converges_in_about_2j_snapshots():
    # Carlson 1988: loading ~10 dB above the noise floor against J strong jammers brings
    # the mean loss within 3 dB after about 2J snapshots; unloaded SMI needs about 2N
    # (RMB 1974: at K = 2N-3 its mean rho is exactly 1/2).
    n, trials = 16, 400
    jams = ((-40.0, 40.0), (20.0, 40.0), (55.0, 40.0))
    j = len(jams)
    scene = make_scene(n=n, jammers=jams, trials=trials, seed=7)
    ks = [2 * j, 3 * j, 2 * n - 3]
    batch, (w_opt, w_load, w_raw) = run(scene, ["optimum", "smi loading_db=10", "smi"], ks)
    loaded = normalised_sinr(batch, w_load, w_opt)
    raw = normalised_sinr(batch, w_raw, w_opt)
    for i in (0, 1):
        se = loaded[:, i].std() / np.sqrt(trials)
        assert loaded[:, i].mean() - 4 * se > 0.5, (ks[i], loaded[:, i].mean())
    law = stats.beta(ks[2] - n + 2, n - 1)
    assert law.mean() == pytest.approx(0.5)
    assert abs(raw[:, 2].mean() - 0.5) < 4 * law.std() / np.sqrt(trials)
    # the unloaded weight at K = 2J < N is the minimum-norm one: far worse than loaded
    assert raw[:, 0].mean() < 0.5 * loaded[:, 0].mean()


def test_auto_loading_close_to_fixed_loading_at_the_true_noise_floor():
    # common practice: the noise floor estimated from the smaller data eigenvalues; with
    # many snapshots it approaches the true noise power, so auto and fixed 10 dB loading
    # give nearly the same SINR.
    n = 8
    scene = make_scene(n=n, jammers=((-35.0, 30.0),), trials=100, seed=4)
    batch, (w_opt, w_fix, w_auto) = run(scene, ["optimum", "smi loading_db=10",
                                                "smi loading=auto"], [12, 200])
    fix = normalised_sinr(batch, w_fix, w_opt)
    auto = normalised_sinr(batch, w_auto, w_opt)
    assert abs(fix[:, 1].mean() - auto[:, 1].mean()) < 0.01
    assert auto[:, 0].mean() > 0.5


def test_mpdr_signal_present_training_degrades_with_snr():
    # Signal present in training (MPDR-SMI). Derived from RMB 1974 applied to the total
    # covariance R_x = R_in + sigma_s^2 a a^H: rho_x = P_opt/P (output powers w.r.t. R_x)
    # ~ Beta(K-N+2, N-1), and SINR/SINR_opt = rho_x / (1 + S (1 - rho_x)),
    # S = SINR_opt (Van Trees sec. 7.3 discusses the same effect).
    n, k, trials = 8, 32, 1500
    jams = ((-35.0, 30.0),)
    rhos = {}
    for training in ("interference", "signal"):
        scene = make_scene(n=n, jammers=jams, snr_db=10.0, training=training,
                           trials=trials, seed=3)
        batch, (w_opt, w_smi) = run(scene, ["optimum", "smi"], [k])
        rhos[training] = normalised_sinr(batch, w_smi, w_opt, 10.0)[:, 0]
        s_opt = output_sinr(w_opt, batch.desired_steering(), batch.covariance(), 10.0)[0, 0]
    assert rhos["signal"].mean() < 0.2 * rhos["interference"].mean()
    law = stats.beta(k - n + 2, n - 1)
    mean, _ = integrate.quad(lambda x: x / (1 + s_opt * (1 - x)) * law.pdf(x), 0, 1)
    se = rhos["signal"].std() / np.sqrt(trials)
    assert abs(rhos["signal"].mean() - mean) < 4 * se
    rho_x = rhos["signal"] * (1 + s_opt) / (1 + s_opt * rhos["signal"])
    assert stats.kstest(rho_x, law.cdf).pvalue > 1e-3


def test_singular_sample_covariance_warns_once_and_uses_minimum_norm():
    # fewer snapshots than elements without loading: defined minimum-norm outcome.
    n = 8
    scene = make_scene(n=n, trials=3)
    batch = TrialBatch(scene)
    ctx = Context.from_batch(batch)
    proc = parse_spec("smi")
    with pytest.warns(RuntimeWarning, match="singular") as caught:
        res = run_processors([proc], batch.blocks(20, block=1), ctx, [2, 3, 5, 20])
    assert len([w for w in caught if "singular" in str(w.message)]) == 1
    w = res[0].weights
    x = next(iter(batch.blocks(5, block=5))).training
    # minimum norm: the weight lies in the span of the 3 training snapshots (and the
    # look response is 1)
    basis = x[:, :3, :].transpose(0, 2, 1)
    coef, *_ = np.linalg.lstsq(basis[0], w[0, 1], rcond=None)
    np.testing.assert_allclose(basis[0] @ coef, w[0, 1], atol=1e-10)
    np.testing.assert_allclose(np.einsum("tcn,n->tc", np.conj(w), batch.look), 1, atol=1e-10)


# ----------------------------------------------------------------------------- sliding
def test_sliding_sums_equal_direct_window_sums_over_a_long_stream():
    rng = np.random.default_rng(5)
    t_, n, total, length = 3, 4, 1000, 37
    x = (rng.standard_normal((t_, total, n)) + 1j * rng.standard_normal((t_, total, n))) / 2 ** .5
    x[:, 200:260] *= 1e3           # a 60 dB burst, then noise again
    stops = np.unique(rng.integers(1, total + 1, size=80))
    acc = SlidingSums(t_, n, length)
    grow = GrowingSums(t_, n)
    start, got, got_g = 0, [], []
    for size in np.resize(rng.integers(1, 90, size=40), 40):
        size = int(min(size, total - start)) if start < total else 0
        if size == 0:
            break
        inside = stops[(stops > start) & (stops <= start + size)]
        got.append(acc.advance(x[:, start:start + size], start, inside))
        got_g.append(grow.advance(x[:, start:start + size], start, inside))
        start += size
    if start < total:
        inside = stops[stops > start]
        got.append(acc.advance(x[:, start:], start, inside))
        got_g.append(grow.advance(x[:, start:], start, inside))
    got, got_g = np.concatenate(got, 1), np.concatenate(got_g, 1)
    for i, s in enumerate(stops):
        direct = outer_sum(x[:, max(0, s - length):s])
        scale = np.abs(direct).max()
        # the window after the burst is accurate relative to its own (noise) level
        assert np.abs(got[:, i] - direct).max() < 1e-9 * scale, s
        np.testing.assert_allclose(got_g[:, i], outer_sum(x[:, :s]), rtol=1e-10,
                                   atol=1e-10 * np.abs(got_g[:, i]).max())


def test_sliding_smi_weights_equal_mvdr_of_the_direct_window():
    n, length, every = 6, 20, 5
    scene = make_scene(n=n, jammers=((30.0, 20.0), (-60.0, 10.0)), trials=4, seed=9)
    cps = [4, 7, 23, 24, 49, 97]
    batch, (w,) = run(scene, [f"smi window=sliding length={length} interval={every}"],
                      cps, block=9)
    x = batch.samples(max(cps)).training
    for i, c in enumerate(cps):
        u = (c // every) * every
        if u == 0:
            np.testing.assert_allclose(w[:, i], np.broadcast_to(batch.look / n, (4, n)))
            continue
        seg = x[:, max(0, u - length):u]
        r = outer_sum(seg) / seg.shape[1]
        if seg.shape[1] < n:
            continue            # minimum-norm case, covered elsewhere
        z = np.linalg.solve(r, np.broadcast_to(batch.look, (4, n))[..., None])[..., 0]
        ref = z / np.conj(np.einsum("tn,n->t", np.conj(z), batch.look))[:, None]
        np.testing.assert_allclose(w[:, i], ref, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize("switch_on", [True, False])
def test_sliding_window_tracks_a_jammer_that_switches(switch_on):
    # Once the sliding window of L snapshots holds only post-switch data it is stationary
    # SMI with K = L: rho ~ Beta(L-N+2, N-1) against the optimum of the moment (RMB
    # 1974). When a jammer near the main beam switches OFF, the growing window keeps a
    # stale null there and stays worse than the sliding window.
    n, length, trials, switch = 8, 48, 600, 300
    pulse = Pulsing(start=switch) if switch_on else Pulsing(stop=switch)
    jams = ((-35.0, 20.0), (25.0 if switch_on else 9.0, 40.0, pulse))
    scene = make_scene(n=n, jammers=jams, trials=trials, seed=21)
    c = switch + length + 20                     # u = c - c % 4: window fully post-switch
    batch, (w_opt, w_sl, w_gr) = run(scene, [
        "optimum", f"smi window=sliding length={length} interval=4", "smi"], [c])
    a, r = batch.desired_steering(), batch.covariance(np.array([c - 1]))[:, 0]
    opt = output_sinr(w_opt, a, r)
    rho = output_sinr(w_sl, a, r) / opt
    law = stats.beta(length - n + 2, n - 1)
    assert abs(rho.mean() - law.mean()) < 4 * law.std() / np.sqrt(trials)
    if switch_on:
        # the new 40 dB jammer is suppressed to within 10 dB of the noise in every trial
        v = batch.steering(2)
        resp = np.abs(np.einsum("tcn,tn->tc", np.conj(w_sl), v)) ** 2 * 1e4
        assert np.all(10 * np.log10(resp) < 10)
    else:
        grow = output_sinr(w_gr, a, r) / opt
        diff = rho - grow
        assert diff.mean() - 4 * diff.std() / np.sqrt(trials) > 0.03


# ----------------------------------------------------------------------------- LCMV
def test_lcmv_meets_its_constraints_exactly():
    # Frost 1972; Buckley & Griffiths 1986 (derivative constraints): C^H w = f exactly.
    n = 10
    scene = make_scene(n=n, jammers=((-35.0, 30.0), (50.0, 20.0)), trials=4)
    spec = "lcmv nulls=20,-62.5 derivative=true second_derivative=true loading_db=3"
    batch, (w,) = run(scene, [spec], [5, 40, 200])
    pos = geometry.line_positions(n, 0.5)
    look = geometry.steering_vector(pos, 0.0)
    np.testing.assert_allclose(np.einsum("tcn,n->tc", np.conj(w), look), 1, atol=1e-10)
    for az in (20.0, -62.5):
        resp = np.einsum("tcn,n->tc", np.conj(w), geometry.steering_vector(pos, az))
        assert np.abs(resp).max() < 1e-8
    for d in steering_derivatives(pos, 0.0, 0.0, 2):
        assert np.abs(np.einsum("tcn,n->tc", np.conj(w), d)).max() < 1e-8
    # the derivative really is the azimuth derivative (central difference, 1e-5 rad)
    h = np.rad2deg(1e-5)
    fd = (geometry.steering_vector(pos, h) - geometry.steering_vector(pos, -h)) / 2e-5
    np.testing.assert_allclose(steering_derivatives(pos, 0.0, 0.0, 1)[0], fd, atol=1e-6)


def test_lcmv_without_extra_constraints_is_mvdr():
    n = 8
    scene = make_scene(n=n, jammers=((-35.0, 30.0),), trials=4)
    _, (w_l, w_s) = run(scene, ["lcmv loading_db=6", "smi loading_db=6"], [3, 20, 64])
    np.testing.assert_allclose(w_l, w_s, rtol=1e-10, atol=1e-12)
    _, (w_l, w_s) = run(scene, ["lcmv", "smi"], [20, 64])
    np.testing.assert_allclose(w_l, w_s, rtol=1e-9, atol=1e-11)


def test_lcmv_spec_accepts_text_and_lists():
    p = parse_spec({"method": "lcmv", "nulls": [20, 35.5], "null_elevations": 10})
    assert p.params["nulls"] == "20,35.5" and p.params["null_elevations"] == "10"
    assert parse_spec(p.spec()).params == p.params
    q = parse_spec("lcmv nulls=20,35.5")
    assert q.params["nulls"] == "20,35.5"
    with pytest.raises(SpecError, match="list of angles"):
        parse_spec("lcmv nulls=20,abc")
    with pytest.raises(SpecError, match="elevations"):
        parse_spec("lcmv nulls=20,30,40 null_elevations=1,2")
    scene = make_scene(n=4, trials=1)
    ctx = Context.from_batch(TrialBatch(scene))
    with pytest.raises(SpecError, match="degree of freedom"):
        parse_spec("lcmv nulls=20,40,60").check(ctx)
    with pytest.raises(SpecError, match="dependent"):
        parse_spec("lcmv nulls=0").check(ctx)


# ----------------------------------------------------------------------------- power inversion
def test_power_inversion_nulls_strong_jammers_deeper_than_30_db():
    # Compton 1979: power inversion nulls jammers by their power. Null depth: response
    # toward the jammer relative to the quiescent (reference element alone: 1 in every
    # direction) response, |w^H v|^2 with w_ref = 1.
    n, trials = 8, 300
    jams = ((-50.0, 40.0), (12.0, 40.0), (38.0, 40.0))
    scene = make_scene(n=n, jammers=jams, trials=trials, seed=5)
    batch, (w,) = run(scene, ["power_inversion"], [2 * n, 8 * n])
    np.testing.assert_allclose(w[:, :, 0], 1.0, atol=1e-12)
    for j in (1, 2, 3):
        depth = -10 * np.log10(np.abs(np.einsum("tcn,tn->tc", np.conj(w), batch.steering(j))) ** 2)
        assert depth.min() > 30.0
    ctx = Context.from_batch(batch)
    p = parse_spec("power_inversion reference_element=3")
    np.testing.assert_array_equal(p.initial_weights(ctx)[0], np.eye(n)[3])
    with pytest.raises(SpecError, match="reference_element"):
        parse_spec("power_inversion reference_element=8").check(ctx)


# ----------------------------------------------------------------------------- eigenspace
def test_dmr_with_the_right_rank_converges_in_about_2j_snapshots():
    # With J strong jammers the eigenspace (DMR / projection) normalised SINR is close to
    # Beta(K-J+1, J), mean (K+1-J)/(K+1) (Haimovich, "Asymptotic distribution of the
    # conditional SNR in an eigenanalysis-based adaptive array", IEEE Trans. AES; from memory, valid for
    # INR >> 1; 0.015 allowed for that approximation). Unloaded SMI needs K = 2N-3 for a
    # mean of 1/2 (RMB 1974); DMR is above 1/2 already at K = 2J.
    n, trials = 16, 400
    jams = ((-40.0, 40.0), (20.0, 40.0), (55.0, 40.0))
    j = len(jams)
    scene = make_scene(n=n, jammers=jams, trials=trials, seed=7)
    ks = [2 * j, 3 * j, 4 * n]
    batch, (w_opt, w_dmr, w_prj, w_auto) = run(
        scene, ["optimum", f"eigenspace rank={j}", f"eigenspace variant=projection rank={j}",
                "eigenspace"], ks)
    for wk in (w_dmr, w_prj):
        rho = normalised_sinr(batch, wk, w_opt)
        for i, k in enumerate(ks):
            se = rho[:, i].std() / np.sqrt(trials)
            assert abs(rho[:, i].mean() - (k + 1 - j) / (k + 1)) < 4 * se + 0.015, (k, rho[:, i].mean())
        assert rho[:, 0].mean() - 4 * rho[:, 0].std() / np.sqrt(trials) > 0.5
    # auto rank (eigenvalues 10 dB above the noise) finds J for 40 dB jammers at K = 4N
    np.testing.assert_allclose(w_auto[:, 2], w_dmr[:, 2], rtol=1e-10, atol=1e-13)


def test_dmr_on_the_true_covariance_is_exact_mvdr():
    # Abraham & Owsley 1990: with the exact covariance of J interferers in white noise
    # the dominant-mode matrix equals R, so DMR = MVDR. A very long window approximates it.
    n = 6
    scene = make_scene(n=n, jammers=((30.0, 30.0),), trials=2, seed=2)
    batch, (w_opt, w_dmr) = run(scene, ["optimum", "eigenspace rank=1"], [20000])
    rho = normalised_sinr(batch, w_dmr, w_opt)
    assert np.all(rho > 0.995)


def test_eigenspace_rank_validation():
    assert parse_spec({"method": "eigenspace", "rank": 3}).params["rank"] == "3"
    assert parse_spec("eigenspace rank=AUTO").params["rank"] == "auto"
    with pytest.raises(SpecError, match="rank"):
        parse_spec("eigenspace rank=two")
    with pytest.raises(SpecError, match="rank"):
        parse_spec("eigenspace rank=-1")
    ctx = Context.from_batch(TrialBatch(make_scene(n=4, trials=1)))
    with pytest.raises(SpecError, match="noise eigenvector"):
        parse_spec("eigenspace rank=4").check(ctx)


# ----------------------------------------------------------------------------- SMI specs
def test_smi_spec_validation():
    p = parse_spec("smi loading_db=10")
    assert p.params["loading"] is None and p.label == "smi loading_db=10"
    assert parse_spec("smi loading=auto").params["loading_db"] is None
    with pytest.raises(SpecError, match="needs loading_db"):
        parse_spec("smi loading=fixed")
    with pytest.raises(SpecError, match="contradicts"):
        parse_spec("smi loading=none loading_db=10")
    with pytest.raises(SpecError, match="needs length"):
        parse_spec("smi window=sliding")
    with pytest.raises(SpecError, match="sliding only"):
        parse_spec("smi length=10")
    with pytest.raises(SpecError, match="did you mean"):
        parse_spec("smi loading=atuo")
    ctx = Context.from_batch(TrialBatch(make_scene(n=8, trials=1)))
    with pytest.raises(SpecError, match="shorter"):
        parse_spec("smi window=sliding length=6").check(ctx)
    parse_spec("smi window=sliding length=6 loading_db=5").check(ctx)


# ----------------------------------------------------------------------------- invariances
SPECS = ["optimum", "smi", "smi loading_db=10", "smi loading=auto",
         "smi window=sliding length=16 interval=5", "smi interval=7 loading_db=3",
         "lcmv nulls=40 derivative=true loading_db=3", "lcmv",
         "power_inversion reference_element=2", "power_inversion loading_db=5",
         "eigenspace rank=2", "eigenspace variant=projection", "eigenspace"]


@pytest.mark.parametrize("spec", SPECS + ["smi loading_db=10 label=loaded"])
def test_spec_round_trip(spec):
    p = parse_spec(spec)
    q = parse_spec(p.spec())
    assert (q.params, q.label) == (p.params, p.label)


@pytest.fixture(scope="module")
def invariance_scene():
    jams = ((-35.0, 30.0), (25.0, 20.0, Pulsing(start=10, period=20, on=12)))
    return make_scene(n=6, jammers=jams, trials=5, seed=13,
                      errors=HardwareErrors(gain_db_rms=0.5, phase_deg_rms=3.0))


CPS = [3, 12, 30, 64]


def test_batch_and_one_by_one_trials_agree(invariance_scene):
    _, together = run(invariance_scene, SPECS, CPS, block=11)
    for i in range(invariance_scene.trials):
        _, alone = run(invariance_scene, SPECS, CPS, trials=1, first_trial=i, block=11)
        for spec, wt, wa in zip(SPECS, together, alone):
            np.testing.assert_allclose(wa[0], wt[i], rtol=1e-10, atol=1e-12, err_msg=spec)


@pytest.mark.parametrize("block", [1, 4, 64])
def test_results_independent_of_block_size(invariance_scene, block):
    _, ref = run(invariance_scene, SPECS, CPS, block=13)
    _, got = run(invariance_scene, SPECS, CPS, block=block)
    for spec, a, b in zip(SPECS, ref, got):
        np.testing.assert_allclose(b, a, rtol=1e-10, atol=1e-12, err_msg=spec)


# --------------------------------------- loading=auto when the interferers nearly fill N
def _wishart_covariances(rng, r, k, trials):
    """``trials`` sample covariances of k CN(0, r) snapshots, (T, 1, N, N)."""
    n = r.shape[0]
    low = np.linalg.cholesky(r)
    z = (rng.standard_normal((trials, k, n)) + 1j * rng.standard_normal((trials, k, n)))
    x = (z / np.sqrt(2)) @ low.T
    return (np.einsum("tkn,tkm->tnm", x, np.conj(x)) / k)[:, None]


@pytest.mark.parametrize("jammers", [5, 6])
@pytest.mark.parametrize("k", [28, 100])
def test_auto_noise_floor_with_the_interferers_close_to_n(jammers, k):
    # Wax & Kailath (1985): MDL counts the interference eigenvalues; the floor is the
    # rest divided by their (N - k)(K - k)/K noise shares. 7 elements, J = 5 and
    # J = N - 1 = 6 jammers of 42-60 dB: the estimate is the unit noise power to within
    # five standard errors (from the trials) plus 2 % (the bias left at K = 4N).
    from adapt.processors._covariance import noise_floor_estimate, signal_count_mdl
    rng = np.random.default_rng(7 + jammers + k)
    n, trials = 7, 400
    a = np.exp(2j * np.pi * rng.random((n, jammers)))
    power = 10 ** (rng.uniform(4.2, 6.0, jammers))
    r = np.eye(n) + (a * power) @ np.conj(a).T
    s = _wishart_covariances(rng, r, k, trials)
    floor = noise_floor_estimate(s, [k])[:, 0]
    se = floor.std(ddof=1) / np.sqrt(trials)
    assert abs(floor.mean() - 1.0) < 5 * se + 0.02, (floor.mean(), se)
    lam = np.linalg.eigvalsh(s[:, 0])[:, ::-1]
    assert np.mean(signal_count_mdl(lam, k) == jammers) > 0.9


def test_auto_loading_on_a_seven_element_ring_with_five_jammers():
    # 7-element ring-plus-centre, -25 dB wanted signal, five 42-60 dB jammers: the loading
    # estimated from the data is now close to 10 dB above the true noise, so auto and
    # fixed 10 dB loading give the same SINR to 0.2 dB (with the old smaller-half floor
    # auto scored about 44 dB worse). Reference: the optimum (Van Trees 2002), and the
    # fixed-loading result (Carlson 1988).
    ring = [[0.0, 0.0, 0.0]] + [[0.5 * np.cos(t), 0.5 * np.sin(t), 0.0]
                                for t in np.radians(np.arange(6) * 60.0)]
    arr = ArrayLayout("custom", np.array(ring))
    srcs = [Source("sat", "desired", 0.0, 75.0, -25.0)]
    for i, (az, el, p) in enumerate(((10, 60.2, 42), (80, 2, 60), (150, 20, 50),
                                     (-130, 35, 45), (-60, 48, 55))):
        srcs.append(Source(f"j{i}", "interferer", az, el, p))
    scene = Scene("ring", arr, tuple(srcs), 0.0, 75.0, trials=60, seed=3)
    batch, (w_opt, w_fix, w_auto) = run(scene, ["optimum", "smi loading_db=10",
                                                "smi loading=auto"], [28, 400])
    fix = normalised_sinr(batch, w_fix, w_opt, 10 ** -2.5)
    auto = normalised_sinr(batch, w_auto, w_opt, 10 ** -2.5)
    gap = 10 * np.log10(fix.mean(axis=0) / auto.mean(axis=0))
    assert np.all(np.abs(gap) < 0.2), gap


def test_auto_loading_warns_when_the_interferers_nearly_fill_the_array():
    # Wax & Kailath (1985) count: 5 jammers on 7 elements leave 2 noise eigenvalues
    # (warned); 1 jammer leaves 6 (silent)
    def scene(jams):
        return make_scene(n=7, jammers=jams, trials=4, seed=2)
    crowded = scene(tuple((az, 45.0) for az in (-60, -35, 20, 40, 65)))
    batch = TrialBatch(crowded)
    with pytest.warns(RuntimeWarning, match="loading=auto finds 5 interference"):
        run_processors([parse_spec("smi loading=auto")], batch.blocks(100),
                       Context.from_batch(batch), [50, 100])
    quiet = TrialBatch(scene(((-35.0, 45.0),)))
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        run_processors([parse_spec("smi loading=auto")], quiet.blocks(100),
                       Context.from_batch(quiet), [50, 100])
