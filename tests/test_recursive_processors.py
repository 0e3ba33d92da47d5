"""Sample-recursive processors: LMS, NLMS, Frost, GSC, RLS.

Sources named beside each check: Widrow & Stearns, *Adaptive Signal Processing* (1985);
Frost, Proc. IEEE 60 (1972); Griffiths & Jim, IEEE Trans. AP-30 (1982); Haykin,
*Adaptive Filter Theory*. Monte Carlo checks use fixed seeds and tolerances of five
standard errors computed from the trials, plus a bias bound from the exact mean-weight
recursion (exact for independent snapshots, as drawn here).
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from adapt.errors import SpecError
from adapt.numerics.linalg import mvdr
from adapt.processors import Context, Processor, State, parse_spec, registry, run_processors
from adapt.processors._recursive import look_blocking_matrix, mean_square_bound, mean_square_sum
from adapt.processors.frost import look_constraints
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch

METHODS = ("lms", "nlms", "frost", "gsc", "rls")


# ----------------------------------------------------------------------------- helpers
def make_scene(elements=4, sources=None, **top):
    """A line-array scene from a plain mapping (our own invented scenarios)."""
    if sources is None:
        sources = [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                   {"name": "jam", "role": "interferer", "azimuth": 40, "power_db": 10}]
    data = {"array": {"layout": "line", "elements": elements, "spacing": 0.5},
            "sources": sources, "snapshots": 1000, "trials": 10, "seed": 11}
    data.update(top)
    return parse_scene(data)


def run(spec, scene, checkpoints, snapshots=None, trials=None, first_trial=0, block=None):
    """Weights (T, C, N) of one processor, plus its batch and context."""
    batch = TrialBatch(scene, trials=trials, first_trial=first_trial)
    ctx = Context.from_batch(batch)
    k = int(max(checkpoints) if snapshots is None else snapshots)
    proc = parse_spec(spec)
    res = run_processors([proc], batch.blocks(k, block=block), ctx, checkpoints)[0]
    return res, batch, ctx


def sinr(w, a, r_in, power):
    """Output SINR ``P_s |w^H a|^2 / (w^H R_in w)`` with the true a and R_in;
    w (T, C, N), a (T, N), r_in (T, N, N)."""
    num = power * np.abs(np.einsum("tcn,tn->tc", np.conj(w), a)) ** 2
    den = np.einsum("tcn,tnm,tcm->tc", np.conj(w), r_in, w).real
    return num / den


def optimum_sinr(a, r_in, power):
    """``P_s a^H R_in^-1 a`` (Reed, Mallett & Brennan 1974; Van Trees 2002)."""
    x = np.linalg.solve(r_in, a[..., None])[..., 0]
    return power * np.einsum("tn,tn->t", np.conj(a), x).real


def assert_mean_near(weights, target, bias_bound, sigmas=5.0):
    """Trial-mean weight (T, N) within ``sigmas`` standard errors (from the trials, per
    real and imaginary part) plus a bias bound of ``target``; returns the tolerance."""
    t_ = weights.shape[0]
    mean = weights.mean(axis=0)
    se_re = weights.real.std(axis=0, ddof=1) / np.sqrt(t_)
    se_im = weights.imag.std(axis=0, ddof=1) / np.sqrt(t_)
    d = mean - target
    assert np.all(np.abs(d.real) <= sigmas * se_re + bias_bound), (d, se_re, bias_bound)
    assert np.all(np.abs(d.imag) <= sigmas * se_im + bias_bound), (d, se_im, bias_bound)
    return float(np.max(sigmas * np.maximum(se_re, se_im)) + bias_bound)


def normalised_rate(vectors):
    """Smallest eigenvalue of ``E[v v^H / |v|^2]`` estimated from (..., M) samples: the
    NLMS mean-weight rate per unit step (Haykin; mean recursion of NLMS)."""
    v = vectors.reshape(-1, vectors.shape[-1])
    v = v / np.linalg.norm(v, axis=1, keepdims=True)
    return float(np.linalg.eigvalsh(v.T @ np.conj(v) / len(v))[0])


# ------------------------------------------------------------------------ registry etc.
def test_all_recursive_methods_registered_with_documented_parameters():
    reg = registry()
    for m in METHODS:
        cls = reg[m]
        assert cls.summary
        assert cls.parameters                       # declared, not implicit
        mod = __import__(cls.__module__, fromlist=["x"])
        assert "Source" in mod.__doc__ and "Checkable fact" in mod.__doc__
        assert "Cost per snapshot" in mod.__doc__


@pytest.mark.parametrize("spec, where", [
    ("nlms step=2", "step"),                # NLMS stable only for 0 < mu < 2 (Haykin)
    ("gsc step=0", "step"),
    ("rls forgetting=0", "forgetting"),
    ("rls forgetting=1.5", "forgetting"),
    ("lms step=-1", "step"),
    ("lms initial=random", "initial"),
    ("frost derivatives=3", "derivatives"),
    ("rls loading=3", "loading"),
])
def test_bad_parameters_are_refused_with_a_spec_error(spec, where):
    with pytest.raises(SpecError) as err:
        parse_spec(spec)
    assert where in str(err.value)


def test_step_auto_is_accepted_and_same_as_default():
    assert parse_spec("lms step=auto").params["step"] is None
    assert parse_spec("frost step=auto").params["step"] is None
    assert parse_spec("lms").spec() == parse_spec("lms step=none").spec()


def test_frost_refuses_constraints_that_leave_no_freedom():
    scene = make_scene(elements=3)
    ctx = Context.from_batch(TrialBatch(scene, trials=1))
    with pytest.raises(SpecError, match="no freedom"):
        parse_spec("frost derivatives=2").check(ctx)


# ------------------------------------------------------- reproducibility, block size
@pytest.fixture(scope="module")
def rough_scene():
    """Hardware errors make every trial different; a pulsed jammer makes it change."""
    return parse_scene({
        "array": {"layout": "line", "elements": 5, "spacing": 0.5,
                  "errors": {"gain_db_rms": 0.5, "phase_deg_rms": 5}},
        "sources": [{"name": "wanted", "role": "desired", "azimuth": 5, "power_db": 3},
                    {"name": "jam", "role": "interferer", "azimuth": -35, "power_db": 25},
                    {"name": "pulser", "role": "interferer", "azimuth": 50, "power_db": 15,
                     "pulsing": {"start": 40, "period": 100, "on": 30}}],
        "snapshots": 300, "trials": 3, "seed": 5})


SPECS = ("lms", "lms step=0.0002 initial=zero", "nlms step=0.3", "frost", "frost derivatives=1",
         "gsc step=0.2", "rls", "rls forgetting=0.97 loading_db=10 initial=zero")
CPS = [1, 7, 64, 65, 150, 300]


@pytest.mark.parametrize("spec", SPECS)
def test_batch_equals_trials_one_by_one(spec, rough_scene):
    # common practice: results must not depend on how trials are grouped
    whole = run(spec, rough_scene, CPS, block=64)[0].weights
    for i in range(3):
        one = run(spec, rough_scene, CPS, trials=1, first_trial=i, block=64)[0].weights
        np.testing.assert_allclose(one[0], whole[i], rtol=0, atol=1e-10)


@pytest.mark.parametrize("spec", SPECS)
def test_weights_do_not_depend_on_block_size(spec, rough_scene):
    # common practice: a checkpoint is the weight after exactly c snapshots
    ref = run(spec, rough_scene, CPS, block=300)[0].weights
    for b in (1, 17, 64):
        got = run(spec, rough_scene, CPS, block=b)[0].weights
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-10)
    assert np.all(np.isfinite(ref))


# ----------------------------------------------- the recursions, written out literally
@pytest.fixture(scope="module")
def short_run(rough_scene):
    batch = TrialBatch(rough_scene, trials=2)
    block = batch.samples(60)
    return batch, block, Context.from_batch(batch)


def test_lms_and_nlms_follow_the_textbook_recursion(short_run):
    # Widrow & Stearns (1985) / Haykin: e = d - w^H x, w += mu x e^*; NLMS divides by
    # eps + x^H x (Nagumo & Noda 1967). Written per trial, snapshot by snapshot.
    batch, block, ctx = short_run
    cps = [1, 2, 30, 60]
    for spec, normalised in (("lms step=0.0005", False), ("nlms step=0.4 eps=0.5", True)):
        got = run(spec, batch.scene, cps, snapshots=60, trials=2, block=13)[0].weights
        proc = parse_spec(spec)
        for t in range(2):
            w = ctx.look / ctx.elements
            for k in range(60):
                x, d = block.data[t, k], block.reference[t, k]
                e = d - np.vdot(w, x)
                mu = proc.params["step"]
                if normalised:
                    mu = mu / (proc.params["eps"] + np.vdot(x, x).real)
                w = w + mu * x * np.conj(e)
                if k + 1 in cps:
                    np.testing.assert_allclose(got[t, cps.index(k + 1)], w, atol=1e-12)


def test_frost_follows_the_projected_recursion(short_run):
    # Frost (1972): w(k+1) = P[w(k) - mu y^*(k) x(k)] + F, P = I - C(C^H C)^-1 C^H
    batch, block, ctx = short_run
    cps = [1, 10, 60]
    got = run("frost step=0.0005 derivatives=1", batch.scene, cps, snapshots=60, trials=2,
              block=7)[0].weights
    c, f = look_constraints(ctx.look, ctx.positions, ctx.look_direction, 1)
    g = np.linalg.inv(c.conj().T @ c)
    p = np.eye(ctx.elements) - c @ g @ c.conj().T
    big_f = c @ g @ f
    for t in range(2):
        w = big_f.copy()
        for k in range(60):
            x = block.training[t, k]
            y = np.vdot(w, x)
            w = p @ (w - 0.0005 * np.conj(y) * x) + big_f
            if k + 1 in cps:
                np.testing.assert_allclose(got[t, cps.index(k + 1)], w, atol=1e-12)


def test_gsc_equals_the_explicit_blocked_form(short_run):
    # Griffiths & Jim (1982): y = w_q^H x - w_a^H B^H x, NLMS on z = B^H x,
    # reported w = w_q - B w_a; B^H a = 0 with orthonormal columns.
    batch, block, ctx = short_run
    a = ctx.look
    b = look_blocking_matrix(a)
    np.testing.assert_allclose(b.conj().T @ a, 0, atol=1e-12)
    np.testing.assert_allclose(b.conj().T @ b, np.eye(len(a) - 1), atol=1e-12)
    cps = [1, 5, 60]
    got = run("gsc step=0.5 eps=0.1", batch.scene, cps, snapshots=60, trials=2,
              block=11)[0].weights
    wq = a / len(a)
    for t in range(2):
        wa = np.zeros(len(a) - 1, complex)
        for k in range(60):
            x = block.training[t, k]
            z = b.conj().T @ x
            y = np.vdot(wq, x) - np.vdot(wa, z)
            wa = wa + 0.5 / (0.1 + np.vdot(z, z).real) * z * np.conj(y)
            if k + 1 in cps:
                np.testing.assert_allclose(got[t, cps.index(k + 1)], wq - b @ wa, atol=1e-12)


@pytest.mark.parametrize("forgetting, loading_db, initial", [(1.0, 0.0, "quiescent"),
                                                              (0.95, 10.0, "zero")])
def test_rls_is_the_exact_regularised_least_squares_solution(short_run, forgetting,
                                                             loading_db, initial):
    # Haykin: w(c) = Phi^-1 theta, Phi = sum lambda^(c-1-i) x x^H + delta lambda^c I,
    # theta = sum lambda^(c-1-i) x d^* + delta lambda^c w(0), delta = 10^(loading_db/10)
    batch, block, ctx = short_run
    cps = [1, 3, 5, 20, 60]
    spec = f"rls forgetting={forgetting} loading_db={loading_db} initial={initial}"
    got = run(spec, batch.scene, cps, snapshots=60, trials=2, block=9)[0].weights
    delta = 10 ** (loading_db / 10)
    n = ctx.elements
    w0 = ctx.look / n if initial == "quiescent" else np.zeros(n)
    for t in range(2):
        for j, c in enumerate(cps):
            x, d = block.data[t, :c], block.reference[t, :c]
            lam = forgetting ** (c - 1 - np.arange(c))
            phi = (x.T * lam) @ np.conj(x) + delta * forgetting ** c * np.eye(n)
            theta = (x.T * lam) @ np.conj(d) + delta * forgetting ** c * w0
            np.testing.assert_allclose(got[t, j], np.linalg.solve(phi, theta), atol=1e-9)


# ------------------------------------------------------------- convergence (Monte Carlo)
def test_lms_mean_weight_converges_to_the_wiener_solution():
    # Widrow & Stearns (1985), ch. 6: E[w(k)] -> w_o = R_xx^-1 r_xd, r_xd = P_d a, with
    # E[w(k+1)] - w_o = (I - mu R_xx)(E[w(k)] - w_o) exactly for independent snapshots.
    scene = make_scene(trials=400)
    k = 5000
    res, batch, ctx = run("lms", scene, [k], block=1000)
    a = batch.desired_steering()
    r_xx = ctx.data_covariance([0])[:, 0]
    w_o = np.linalg.solve(r_xx, scene.desired.power * a[..., None])[0, :, 0]  # all trials
    lam = np.linalg.eigvalsh(r_xx[0])
    mu = 0.1 / lam.sum()                                            # the documented auto step
    start = np.linalg.norm(ctx.look / ctx.elements - w_o)
    bias = np.max(np.abs(1 - mu * lam)) ** k * start
    tol = assert_mean_near(res.weights[:, 0], w_o, bias)
    assert start > 10 * tol                                         # the test can fail


def test_nlms_mean_weight_converges_to_the_wiener_solution():
    # Haykin (NLMS): for jointly Gaussian data and reference the fixed point is the Wiener
    # weight; the mean error decays at least as (1 - mu lambda_min E[x x^H/|x|^2])^k.
    scene = make_scene(trials=400)
    k, step = 5000, 0.2
    res, batch, ctx = run(f"nlms step={step}", scene, [k], block=1000)
    a = batch.desired_steering()
    r_xx = ctx.data_covariance([0])[:, 0]
    w_o = np.linalg.solve(r_xx, scene.desired.power * a[..., None])[0, :, 0]
    rate = normalised_rate(batch.samples(200).data)
    start = np.linalg.norm(ctx.look / ctx.elements - w_o)
    bias = (1 - step * rate) ** k * start
    tol = assert_mean_near(res.weights[:, 0], w_o, bias)
    assert start > 10 * tol


@pytest.fixture(scope="module")
def frost_scene():
    """Interference-only training, 10 dB jammer in a -13 dB sidelobe of a 4-element line."""
    return make_scene(trials=400, training="interference")


@pytest.mark.parametrize("spec", ["frost", "gsc"])
def test_frost_and_gsc_converge_to_mvdr(spec, frost_scene):
    # Frost (1972): E[w(k+1)] = P(I - mu R)E[w(k)] + F -> R^-1 a / (a^H R^-1 a);
    # Griffiths & Jim (1982): the converged GSC equals the same MVDR weight.
    k = 5000
    batch = TrialBatch(frost_scene)
    ctx = Context.from_batch(batch)
    r = batch.covariance()[0]
    a = ctx.look
    w_mvdr = mvdr(r, a)
    c, _ = look_constraints(a, ctx.positions, ctx.look_direction, 0)
    basis = np.linalg.svd(c)[0][:, 1:]
    lam = np.linalg.eigvalsh(basis.conj().T @ r @ basis)             # eig of P R P
    start = np.linalg.norm(a / len(a) - w_mvdr)
    if spec == "frost":
        step = 0.5 / lam[-1]                                          # inside 2/lambda_max
        spec = f"frost step={step}"
        bias = np.max(np.abs(1 - step * lam)) ** k * start
    else:
        step = 0.2
        spec = f"gsc step={step}"
        z = batch.samples(200).training @ np.conj(basis)              # blocked data
        bias = (1 - step * normalised_rate(z)) ** k * start
    res = run_processors([parse_spec(spec)], batch.blocks(k, block=1000), ctx, [k])[0]
    tol = assert_mean_near(res.weights[:, 0], w_mvdr, bias)
    assert start > 10 * tol


def test_frost_constraints_hold_at_every_checkpoint(frost_scene):
    # Frost (1972): the projection keeps C^H w = f exactly (to rounding) at every step
    cps = [1, 2, 3, 50, 333, 1000]
    for derivatives in (0, 2):
        res, batch, ctx = run(f"frost derivatives={derivatives}", frost_scene, cps,
                              trials=20, block=128)
        c, f = look_constraints(ctx.look, ctx.positions, ctx.look_direction, derivatives)
        lhs = np.einsum("nm,tcn->tcm", np.conj(c), res.weights)
        np.testing.assert_allclose(lhs, np.broadcast_to(f, lhs.shape), atol=1e-12)
    res = run("gsc", frost_scene, cps, trials=20, block=128)[0]
    resp = np.einsum("tcn,n->tc", np.conj(res.weights), ctx.look)
    np.testing.assert_allclose(resp, 1.0, atol=1e-12)


# --------------------------------------------------- step-size bound and divergence
@pytest.fixture(scope="module")
def strong_scene():
    """One strong constant-modulus source: x x^H is nearly deterministic along a, so the
    mean and mean-square LMS bounds coincide and 2/lambda_max is sharp."""
    return make_scene(sources=[{"name": "beacon", "role": "desired", "azimuth": 10,
                                "power_db": 40, "waveform": "qpsk"}], trials=50)


def test_lms_diverges_just_above_2_over_lambda_max_and_not_just_below(strong_scene):
    # Widrow & Stearns (1985): mean weights converge iff 0 < mu < 2/lambda_max
    # (w += mu x e^* convention); the mode along a decays as |1 - mu lambda_max|^k.
    batch = TrialBatch(strong_scene)
    ctx = Context.from_batch(batch)
    r_xx = ctx.data_covariance([0])[0, 0]
    lam_max = np.linalg.eigvalsh(r_xx)[-1]
    np.testing.assert_allclose(lam_max, 1 + 4 * 1e4, rtol=1e-12)      # 1 + N P
    k = 300
    w_o = np.linalg.solve(r_xx, 1e4 * batch.desired_steering()[0])
    for factor in (0.95, 1.05):
        proc = parse_spec(f"lms step={factor * 2 / lam_max} initial=zero")
        blind = dataclasses.replace(ctx, data_covariance=None)   # no bound known: no refusal
        w = proc.run(batch.blocks(k), blind, [k]).weights[:, 0]
        if factor < 1:
            bias = abs(1 - factor * 2) ** k * np.linalg.norm(w_o)
            assert_mean_near(w, w_o, bias)
        else:
            # |1 - 2.1|^300 = 1.1^300 ~ 3e12 times the initial error 0.5
            assert np.linalg.norm(w.mean(axis=0)) > 1e9
            assert np.all(np.linalg.norm(w, axis=1) > 1e9)


def test_lms_check_refuses_a_step_above_the_bound_and_names_it(strong_scene):
    # Widrow & Stearns (1985): bound 2/lambda_max(R_xx); here lambda_max = 1 + N P
    batch = TrialBatch(strong_scene, trials=2)
    ctx = Context.from_batch(batch)
    bound = 2 / (1 + 4 * 1e4)
    with pytest.raises(SpecError) as err:
        parse_spec(f"lms step={1.01 * bound}").check(ctx)
    text = str(err.value)
    assert "2/lambda_max" in text and f"{bound:g}" in text and "diverge" in text
    # just below 2/lambda_max the mean converges but the mean-square sum is ~99: refused
    # since the mean-square bound is enforced too (Widrow, McCool, Larimore & Johnson 1976)
    with pytest.raises(SpecError, match="mean-square"):
        parse_spec(f"lms step={0.99 * bound}").check(ctx)
    lam = np.linalg.eigvalsh(ctx.data_covariance([0])[0, 0])
    parse_spec(f"lms step={0.99 * mean_square_bound(lam)}").check(ctx)   # accepted
    parse_spec("lms").check(ctx)                                      # auto is always safe
    # the same through the driver: nothing runs
    with pytest.raises(SpecError):
        run_processors([parse_spec(f"lms step={2 * bound}")], batch.blocks(10), ctx, [10])


def test_frost_check_uses_the_projected_covariance(strong_scene):
    # Frost (1972): bound 2/lambda_max(P R P); a strong source in the look direction is
    # removed by P, so a step far above 2/lambda_max(R) is still accepted.
    scene = make_scene(sources=[{"name": "beacon", "role": "desired", "azimuth": 0,
                                 "power_db": 40}], training="signal")
    ctx = Context.from_batch(TrialBatch(scene, trials=2))
    # P R P on the range of P is the identity (3 unit eigenvalues): 2/lambda_max = 2 and
    # the mean-square bound solves 3 mu/(2 - mu) = 1, mu = 0.5 (Widrow et al. 1976)
    parse_spec("frost step=0.45").check(ctx)
    with pytest.raises(SpecError, match="P R P"):
        parse_spec("frost step=2.5").check(ctx)


def test_auto_step_is_inside_the_bound_for_a_changing_scene(rough_scene):
    # auto = 0.1/tr(R) < 2/lambda_max since tr >= lambda_max, at every checked moment
    batch = TrialBatch(rough_scene)
    ctx = Context.from_batch(batch)
    proc = parse_spec("lms")
    proc.check(ctx)
    r = ctx.data_covariance(ctx.moments)
    lam = np.linalg.eigvalsh(r)[..., -1].max(axis=1)
    assert len(ctx.moments) > 1 and np.all(proc.begin(ctx).steps < 2 / lam)
    # the pulsed jammer's on-time raises the bound check: worse than snapshot 0 alone
    lam0 = np.linalg.eigvalsh(ctx.data_covariance([0])[:, 0])[:, -1]
    assert np.all(lam > lam0)


# ---------------------------------------------------- RLS against LMS, eigenvalue spread
def test_rls_converges_in_a_few_n_snapshots_whatever_the_eigenvalue_spread():
    # Haykin: RLS converges in about 2N snapshots independently of the eigenvalue spread,
    # where LMS (mean modes decaying as (1 - mu lambda_i)^k) is still far from the optimum.
    scene = make_scene(elements=8, trials=300, sources=[
        {"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
        {"name": "weak", "role": "interferer", "azimuth": 25, "power_db": 10},
        {"name": "strong", "role": "interferer", "azimuth": -50, "power_db": 50}])
    batch = TrialBatch(scene)
    ctx = Context.from_batch(batch)
    lam = np.linalg.eigvalsh(ctx.data_covariance([0])[0, 0])
    assert lam[-1] / lam[0] > 1e5                                      # large spread
    k = 5 * scene.elements
    procs = [parse_spec("rls"), parse_spec("lms"),
             parse_spec(f"lms step={0.5 / lam[-1]} label=fast")]
    res = run_processors(procs, batch.blocks(k), ctx, [k])
    a, r_in = batch.desired_steering(), batch.covariance()
    opt = optimum_sinr(a, r_in, 1.0)
    loss = [10 * np.log10(opt / sinr(r.weights, a, r_in, 1.0)[:, 0]) for r in res]
    se = [x.std(ddof=1) / np.sqrt(len(x)) for x in loss]
    assert loss[0].mean() + 5 * se[0] < 1.5                            # RLS near optimum
    for lms_loss, lms_se in zip(loss[1:], se[1:]):
        assert lms_loss.mean() - 5 * lms_se > loss[0].mean() + 5 * se[0] + 3.0


def test_auto_step_needs_the_true_covariance(strong_scene):
    # without the truth (a candidate implementation's context) auto cannot be resolved
    ctx = dataclasses.replace(Context.from_batch(TrialBatch(strong_scene, trials=2)),
                              data_covariance=None, training_covariance=None)
    for spec in ("lms", "frost"):
        with pytest.raises(SpecError, match="give a step"):
            parse_spec(spec).check(ctx)
    parse_spec("lms step=1e-5").check(ctx)                 # an explicit step runs unchecked


def test_shared_covariance_view_equals_the_per_trial_covariance(rough_scene):
    # without hardware errors every trial has the same covariance: the context computes
    # it once; it must equal the per-trial truth (adapt.streams.snapshots.TrialBatch.covariance)
    scene = make_scene(sources=list(rough_scene.resolved["sources"]), training="signal")
    batch = TrialBatch(scene, trials=4, first_trial=2)
    ctx = Context.from_batch(batch)
    k = np.array([0, 45, 250])
    full = batch.covariance(k, training=True)
    np.testing.assert_allclose(ctx.training_covariance(k), full, atol=1e-12)
    np.testing.assert_allclose(ctx.data_covariance(k), full, atol=1e-12)


# ------------------------------------------------------- the mean-square step bound
def eight_jammer_scene(trials=4):
    """16-element half-wavelength line, 0 dB Gaussian wanted signal at 0 degrees, eight
    30 dB jammers at +-12, +-25, +-41, +-60 degrees (the case where the mean-weight bound
    alone let a mean-square-divergent step through)."""
    sources = [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0,
                "waveform": "gaussian"}]
    for i, az in enumerate((12, -12, 25, -25, 41, -41, 60, -60)):
        sources.append({"name": f"j{i}", "role": "interferer", "azimuth": az,
                        "power_db": 30})
    return make_scene(elements=16, sources=sources, trials=trials, snapshots=4000)


def test_mean_square_sum_and_bound_against_closed_forms():
    # Widrow, McCool, Larimore & Johnson (1976): equal eigenvalues lambda (N of them) give
    # N mu lambda/(2 - mu lambda) = 1 at mu* = 2/((N + 1) lambda); one eigenvalue alone
    # gives mu* = 1/lambda (sum mu lambda/(2 - mu lambda) = 1)
    lam = np.full(5, 3.0)
    np.testing.assert_allclose(mean_square_bound(lam), 2 / (6 * 3.0), rtol=1e-12)
    np.testing.assert_allclose(mean_square_bound(np.array([4.0, 0, 0])), 0.25, rtol=1e-12)
    np.testing.assert_allclose(mean_square_sum(0.1, np.array([1.0, 2.0])),
                               0.1 / 1.9 + 0.2 / 1.8, rtol=1e-14)
    assert mean_square_sum(1.0, np.array([2.0])) == np.inf


def test_lms_step_in_the_mean_square_gap_is_refused_and_below_it_accepted():
    # Widrow, McCool, Larimore & Johnson (1976); Haykin, Adaptive Filter Theory: with eight
    # 30 dB jammers on 16 elements 2/lambda_max = 1.013e-4, yet mu = 1.5e-5 gives
    # sum mu lambda_i/(2 - mu lambda_i) = 1.10 (the mean-square error diverges), while
    # mu = 1.2e-5 gives 0.85
    ctx = Context.from_batch(TrialBatch(eight_jammer_scene()))
    lam = np.linalg.eigvalsh(ctx.data_covariance([0])[0, 0])
    np.testing.assert_allclose(2 / lam[-1], 1.013e-4, rtol=1e-3)
    np.testing.assert_allclose(mean_square_sum(1.5e-5, lam), 1.10, atol=0.005)
    np.testing.assert_allclose(mean_square_sum(1.2e-5, lam), 0.85, atol=0.005)
    with pytest.raises(SpecError) as err:
        parse_spec("lms step=1.5e-5").check(ctx)
    text = str(err.value)
    bound = mean_square_bound(lam)
    assert f"{bound:.4g}" in text and "1.1 at this step" in text and "step=auto" in text
    parse_spec("lms step=1.2e-5").check(ctx)
    parse_spec("lms step=auto").check(ctx)


def test_frost_refuses_a_step_beyond_its_projected_mean_square_bound():
    # the same law on the eigenvalues of P R P (projected covariance; Frost 1972 for the
    # recursion, Widrow et al. 1976 for the mean-square sum)
    scene = eight_jammer_scene()
    ctx = Context.from_batch(TrialBatch(scene))
    proc = parse_spec("frost")
    proc.check(ctx)
    basis = proc.begin(ctx).proj.basis()
    r = ctx.training_covariance([0])[0, 0]
    lam = np.linalg.eigvalsh(np.conj(basis).T @ r @ basis)
    bound = mean_square_bound(lam)
    assert bound < 0.5 * 2 / lam[-1]                       # far inside the mean bound
    with pytest.raises(SpecError, match="mean-square"):
        parse_spec(f"frost step={1.01 * bound}").check(ctx)
    parse_spec(f"frost step={0.99 * bound}").check(ctx)


def test_mean_square_bound_is_checked_at_every_moment_of_a_changing_scene(rough_scene):
    # the pulsed jammer's on-time sets the bound: a step safe at snapshot 0 alone is refused
    batch = TrialBatch(rough_scene)
    ctx = Context.from_batch(batch)
    first = mean_square_bound(np.linalg.eigvalsh(ctx.data_covariance([0])[:, 0])).min()
    every = mean_square_bound(np.linalg.eigvalsh(ctx.data_covariance(ctx.moments))).min()
    assert every < first
    step = 0.5 * (every + first)
    with pytest.raises(SpecError, match="mean-square"):
        parse_spec(f"lms step={step}").check(ctx)
    parse_spec(f"lms step={0.99 * every}").check(ctx)


# ------------------------------------------- weights that grow without bound, finitely
def test_runaway_weights_are_refused_and_stable_ones_pass():
    # Widrow, McCool, Larimore & Johnson (1976): mu = 1.5e-5 (mean-square sum 1.10)
    # diverges in mean square although the mean converges; mu = 1.2e-5 (sum 0.85) stays
    # bounded. With the check bypassed the weights stay finite over 4000 snapshots but
    # grow by many orders: the run must be refused, not scored.
    from adapt.engine.evaluate import RUNAWAY_RATIO, require_bounded
    scene = eight_jammer_scene(trials=3)
    batch = TrialBatch(scene)
    ctx = Context.from_batch(batch)
    blind = dataclasses.replace(ctx, data_covariance=None)
    cps = np.array([100, 1000, 2000, 4000])
    r_in = batch.covariance(np.zeros(1, dtype=np.int64))
    a_d = batch.desired_steering(np.zeros(1, dtype=np.int64))
    p_d = np.array([1.0])
    for step, diverges in ((1.5e-5, True), (1.2e-5, False)):
        proc = parse_spec(f"lms step={step}")
        w = proc.run(batch.blocks(4000), blind, cps).weights
        assert np.all(np.isfinite(w))
        if diverges:
            assert np.median(np.linalg.norm(w[:, -1], axis=1)) > 1e6
            with pytest.raises(SpecError, match="diverged.*grow without bound"):
                require_bounded(proc, 0, w, r_in, a_d, p_d, cps)
        else:
            require_bounded(proc, 0, w, r_in, a_d, p_d, cps)
            # far from the ceiling: the output power stays below 10^-6 of it
            power = np.einsum("tcn,tnm,tcm->tc", np.conj(w), r_in[:, 0], w).real
            assert power.max() < 1e-6 * RUNAWAY_RATIO * np.trace(r_in[0, 0]).real


class _Runaway(Processor):
    """A stand-in whose weights grow geometrically (as a diverging recursion's do)."""
    method = "runaway_test"

    def begin(self, context):
        return State(context=context, n=context.elements)

    def update(self, state, block, stops):
        t_ = block.data.shape[0]
        grow = 1.05 ** np.asarray(stops, float)
        return np.ones((t_, len(stops), state.n), complex) * grow[None, :, None]


@pytest.mark.filterwarnings("ignore:.*training snapshots:RuntimeWarning")
def test_engine_refuses_finite_runaway_weights_as_an_error():
    # the project's own guard (README, "Reliability"): finite but runaway weights are
    # refused like non-finite ones; 1.05^1000 = 1.5e21 passes 120 dB above tr R_xx
    from adapt.engine.evaluate import evaluate_batch
    scene = make_scene(trials=2)
    with pytest.raises(SpecError, match="diverged") as err:
        evaluate_batch(TrialBatch(scene), [_Runaway()], [10, 100, 1000], 1000)
    assert "processors[0]" in str(err.value)
    # every real method on an ordinary scene is scored (the rule never trips there)
    evaluate_batch(TrialBatch(scene), [parse_spec(m) for m in sorted(registry())],
                   [1, 3, 10, 100, 1000], 1000)
