"""Closed-form SMI convergence laws and rules of thumb (adapt/studies/theory.py)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from adapt.scenefile import parse_scene
from adapt.studies import theory


def _scene(sources, elements=8, **extra):
    data = {"name": "t", "array": {"layout": "line", "elements": elements, "spacing": 0.5},
            "sources": sources, "trials": 10, "snapshots": 64}
    data.update(extra)
    return parse_scene(data)


WANTED = {"name": "s", "role": "desired", "azimuth": 0, "power_db": 0}


def _jammer(name, az, db, waveform="gaussian"):
    return {"name": name, "role": "interferer", "azimuth": az, "power_db": db,
            "waveform": waveform}


def test_rmb_mean_is_the_beta_mean():
    # Reed, Mallett and Brennan 1974: rho ~ Beta(K-N+2, N-1); mean from scipy.stats.beta
    for n in (2, 4, 8, 16):
        k = np.arange(n, 6 * n)
        expected = stats.beta(k - n + 2, n - 1).mean()
        assert np.allclose(theory.rmb_mean(k, n), expected, rtol=1e-13)
        q = theory.rmb_quantile(0.1, k, n)
        assert np.allclose(q, stats.beta(k - n + 2, n - 1).ppf(0.1), rtol=1e-12)
    # the law needs K >= N
    assert np.isnan(theory.rmb_mean(7, 8))
    with pytest.raises(ValueError):
        theory.rmb_mean(10, 1)
    with pytest.raises(ValueError):
        theory.rmb_mean(10.5, 8)


def test_the_beta_law_functions_are_scipy_stats_beta():
    # beta_quantile and beta_survival (scipy.special, quick to import) against the
    # reference library's Beta distribution: quantiles and tails over the shapes sizing
    # meets (Clopper-Pearson counts up to 10^5 trials, RMB shapes up to 10^4 snapshots)
    rng = np.random.default_rng(5)
    a = np.round(rng.uniform(1, 1e5, 5000))
    b = np.round(rng.uniform(1, 1e4, 5000))
    x = rng.uniform(0, 1, 5000)
    for q in (x, 0.025, 0.975, 0.0, 1.0):
        assert np.allclose(theory.beta_quantile(q, a, b), stats.beta.ppf(q, a, b),
                           rtol=1e-12, atol=0)
    assert np.allclose(theory.beta_survival(x, a, b), stats.beta.sf(x, a, b),
                       rtol=1e-12, atol=1e-300)


def test_rmb_three_db_point_is_2n_minus_3():
    # RMB 1974: (K+2-N)/(K+1) = 1/2 exactly at K = 2N-3
    for n in range(3, 40):
        k = theory.rmb_three_db_snapshots(n)
        assert k == 2 * n - 3
        assert theory.rmb_mean(k, n) == 0.5
        assert theory.rmb_mean(k - 1, n) < 0.5 or k - 1 < n
        # the signal-present search gives the same point when the SINR is zero
        assert theory.signal_present_three_db_snapshots(n, 0.0) == k


def test_signal_present_law_reduces_to_rmb():
    # derived in adapt/studies/theory.py: rho = eta / (1 + S (1 - eta)) -> eta as S -> 0
    k = np.array([8, 9, 13, 20, 64, 500])
    assert np.allclose(theory.signal_present_mean(k, 8, 0.0), theory.rmb_mean(k, 8), rtol=1e-12)
    assert np.allclose(theory.signal_present_mean(k, 8, 1e-9), theory.rmb_mean(k, 8), rtol=1e-7)
    q = np.array([0.1, 0.5, 0.9])
    assert np.allclose(theory.signal_present_quantile(q, 20, 8, 0.0),
                       theory.rmb_quantile(q, 20, 8))
    # the signal in the training data only ever hurts, more so the stronger it is
    m = [theory.signal_present_mean(20, 8, s) for s in (0.0, 1.0, 10.0, 100.0)]
    assert all(a > b for a, b in zip(m, m[1:]))
    # the 3-dB point grows roughly as (N-1)(2+S)-1 (within 15 % here)
    for s in (10.0, 100.0, 1000.0):
        k3 = theory.signal_present_three_db_snapshots(8, s)
        assert theory.signal_present_mean(k3, 8, s) >= 0.5 > theory.signal_present_mean(k3 - 1, 8, s)
        assert abs(k3 / (7 * (2 + s) - 1) - 1) < 0.15


def test_signal_present_law_matches_direct_monte_carlo():
    # Direct Monte Carlo of w = R_x_hat^-1 a from complex Gaussian (complex Wishart) data
    # with the wanted signal present; the law is checked within 4 standard errors of the
    # mean and at three quantiles (binomial standard error of the empirical CDF).
    rng = np.random.default_rng(20240611)
    n, k, trials = 4, 9, 40000
    a = np.exp(1j * np.pi * np.arange(n) * np.sin(np.radians(10.0)))
    aj = np.exp(1j * np.pi * np.arange(n) * np.sin(np.radians(-40.0)))
    r_in = np.eye(n) + 1000.0 * np.outer(aj, aj.conj())
    for s_opt in (0.0, 3.0, 30.0):
        s2 = s_opt / np.real(a.conj() @ np.linalg.solve(r_in, a))
        r_x = r_in + s2 * np.outer(a, a.conj())
        chol = np.linalg.cholesky(r_x)
        z = (rng.standard_normal((trials, k, n)) + 1j * rng.standard_normal((trials, k, n))) / np.sqrt(2)
        x = z @ chol.T                                     # rows x_k with E[x x^H] = R_x
        r_hat = np.swapaxes(x, 1, 2) @ x.conj() / k
        w = np.linalg.solve(r_hat, np.broadcast_to(a, (trials, n))[..., None])[..., 0]
        gain = np.abs(w.conj() @ a) ** 2
        noise = np.real(np.einsum("tn,nm,tm->t", w.conj(), r_in, w))
        s_true = np.real(a.conj() @ np.linalg.solve(r_in, a))
        rho = gain / noise / s_true
        mean = theory.signal_present_mean(k, n, s_opt)
        sem = rho.std(ddof=1) / np.sqrt(trials)
        assert abs(rho.mean() - mean) < 4 * sem, (s_opt, rho.mean(), mean, sem)
        for q in (0.1, 0.5, 0.9):
            x_q = theory.signal_present_quantile(q, k, n, s_opt)
            frac = np.mean(rho <= x_q)
            assert abs(frac - q) < 4 * np.sqrt(q * (1 - q) / trials), (s_opt, q, frac)


def test_rules_of_thumb_and_strong_interferers():
    # RMB 1974: about 2N unloaded; Carlson 1988: about 2J loaded (J strong interferers)
    assert theory.unloaded_rule_of_thumb(8) == 16
    assert theory.loaded_rule_of_thumb(3) == 6
    with pytest.raises(ValueError):
        theory.loaded_rule_of_thumb(-1)
    # a lone 20 dB jammer on 8 elements: eigenvalue N * INR = 8 * 100 (29 dB)
    sc = _scene([WANTED, _jammer("j1", 40, 20)])
    lam = theory.interference_eigenvalues(sc)
    assert lam[0] == pytest.approx(800.0, rel=1e-9)
    assert np.allclose(lam[1:], 0.0, atol=1e-9)
    # strong: eigenvalue above the load (10 dB default); a -5 dB jammer (eigenvalue 4 dB)
    # is not, and a 10 dB jammer (19 dB) is strong at 10 dB loading but not at 20 dB
    sc3 = _scene([WANTED, _jammer("j1", 40, 20), _jammer("j2", -30, 10), _jammer("j3", 65, -5)])
    assert theory.strong_interferers(sc3) == 2
    assert theory.strong_interferers(sc3, loading_db=20.0) == 1
    facts = theory.scene_facts(sc3)
    assert facts["loaded_rule"] == 4 and facts["unloaded_rule"] == 16
    assert facts["rmb_three_db"] == 13


def test_theory_for_picks_the_law_and_lists_violations():
    clean = _scene([WANTED, _jammer("j1", 40, 30)])
    law = theory.theory_for("smi", clean)
    assert law is not None and law.name == "rmb" and law.violations == ()
    assert np.allclose(law(np.array([8, 13, 20])), theory.rmb_mean([8, 13, 20], 8))
    assert np.isnan(law(7))
    assert law.three_db_snapshots() == 13
    # update interval: checkpoint 15 with interval 4 trains on 12 snapshots
    held = theory.theory_for("smi interval=4", clean)
    assert held(15) == pytest.approx(theory.rmb_mean(12, 8))
    # sliding window: the count stops at the window length
    slide = theory.theory_for("smi window=sliding length=20", clean)
    assert slide(100) == pytest.approx(theory.rmb_mean(20, 8))
    # loaded SMI has no exact law; other methods none either
    assert theory.theory_for("smi loading_db=10", clean) is None
    assert theory.theory_for("conventional", clean) is None
    # signal present: the signal-present law with the scene's optimum SINR
    sp = _scene([WANTED, _jammer("j1", 40, 30)], training="signal")
    law = theory.theory_for("smi", sp)
    s = theory.nominal_optimum_sinr(sp)
    assert law.name == "signal-present" and law.sinr_opt == pytest.approx(s)
    # optimum SINR with no jammer is N * SNR (Van Trees 2002, ch. 6): 8 elements, 0 dB
    assert theory.nominal_optimum_sinr(_scene([WANTED])) == pytest.approx(8.0)
    # violations: a tone jammer, hardware errors, a mismatch, a pulsing jammer
    bad = _scene([{**WANTED, "azimuth": 2},
                  _jammer("tone", 40, 30, {"kind": "tone", "frequency": 0.1}),
                  {**_jammer("p", -30, 20), "pulsing": {"start": 10}}],
                 look={"azimuth": 0, "elevation": 0})
    text = " | ".join(theory.theory_for("smi", bad).violations)
    assert "non-Gaussian" in text and "tone" in text
    assert "pointing mismatch" in text and "non-stationary" in text
