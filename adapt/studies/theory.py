"""Closed-form convergence theory for sample-covariance beamformers, and rules of thumb.

Everything here is about the normalised SINR ``rho = SINR / SINR_opt`` of the SMI (MVDR
from a sample covariance) weight ``w = R_hat^-1 a`` after K training snapshots of an
N-element array.

Sources
-------
* Reed, Mallett and Brennan, "Rapid convergence rate in adaptive arrays", IEEE Trans.
  Aerospace and Electronic Systems AES-10(6), 1974 (RMB): trained on K independent
  circular complex Gaussian snapshots of the interference plus noise alone, without
  loading, ``rho ~ Beta(K - N + 2, N - 1)`` for K >= N; mean ``(K + 2 - N)/(K + 1)``;
  the mean reaches 1/2 (3 dB loss) at exactly ``K = 2N - 3``, hence "about 2N snapshots".
* Signal present (the wanted signal in the training data, MPDR): derived below and
  checked by Monte Carlo in tests/test_theory.py. The published analysis is Boroson,
  "Sample size considerations for adaptive arrays", IEEE Trans. AES-16(4), 1980 (volume
  and page details from memory); see also Monzingo and Miller, *Introduction to Adaptive
  Arrays* (Wiley, 1980), the chapter on sample matrix inversion (chapter from memory).
* Carlson, "Covariance matrix estimation errors and diagonal loading in adaptive
  arrays", IEEE Trans. AES-24(4), 1988: with diagonal loading about 10 dB above the noise
  floor, the loss is about 3 dB after about 2J snapshots, J the number of strong
  interferers (the rule of thumb; there is no exact law for loaded SMI).

Signal-present law (derivation). Let ``R_x = R_in + s2 a a^H`` be the covariance of the
training data and ``w`` proportional to ``R_x_hat^-1 a``. The RMB argument needs only
Gaussian data of covariance R_x and a fixed vector a, so
``eta = |w^H a|^2 / (w^H R_x w * a^H R_x^-1 a) ~ Beta(K - N + 2, N - 1)``.
With ``S = SINR_opt = s2 a^H R_in^-1 a``, Sherman-Morrison gives
``a^H R_x^-1 a = a^H R_in^-1 a / (1 + S)``, and ``w^H R_x w = w^H R_in w + s2 |w^H a|^2``;
substituting ``SINR = s2 |w^H a|^2 / (w^H R_in w) = S rho`` gives
``eta = (1 + S) rho / (1 + S rho)``, i.e. ``rho = eta / (1 + S (1 - eta))``. This map is
increasing in eta (its derivative is ``(1 + S) / (1 + S (1 - eta))^2 > 0``), so quantiles
of rho are the mapped beta quantiles; the mean is an integral against the beta density.
Consequence: rho = 1/2 needs ``1 - eta = 1 / (2 + S)`` and ``E[1 - eta] = (N-1)/(K+1)``, so
the snapshots for 3 dB grow roughly as ``K ~ (N - 1)(2 + S) - 1``: in proportion to
``1 + SINR_opt``. For S -> 0 the law reduces to RMB.

Assumptions behind both laws (:func:`assumption_violations` lists those a scene breaks):
independent circular complex Gaussian training snapshots of one fixed covariance
(Gaussian, noise-like interferers and, for the signal-present law, a Gaussian wanted
signal; a stationary scene; no quantisation), and the weight steered with the true
steering vector of the wanted source (no pointing mismatch, no hardware errors).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from adapt.scene import geometry
from adapt.scene.model import Scene

__all__ = ["rmb_mean", "rmb_quantile", "rmb_three_db_snapshots", "signal_present_map",
           "signal_present_mean", "signal_present_quantile",
           "signal_present_three_db_snapshots", "unloaded_rule_of_thumb",
           "loaded_rule_of_thumb", "interference_eigenvalues", "strong_interferers",
           "nominal_optimum_sinr", "assumption_violations", "scene_facts", "training_count",
           "Law", "theory_for", "RMB_SOURCE", "SIGNAL_PRESENT_SOURCE", "CARLSON_SOURCE"]

RMB_SOURCE = "Reed, Mallett and Brennan, IEEE Trans. AES-10, 1974"
SIGNAL_PRESENT_SOURCE = ("signal-present SMI law (derived in adapt.studies.theory; Boroson, IEEE "
                         "Trans. AES-16, 1980, details from memory)")
CARLSON_SOURCE = "Carlson, IEEE Trans. AES-24, 1988"

#: default threshold for a "strong" interferer when no loading level is given, dB above
#: the per-element noise power (Carlson's loading level, 10 dB above the noise)
STRONG_DEFAULT_DB = 10.0


def _check_elements(n) -> int:
    if isinstance(n, bool) or not float(n).is_integer() or int(n) < 2:
        raise ValueError(f"elements must be an integer >= 2, got {n!r}")
    return int(n)


def _counts(k, n: int) -> np.ndarray:
    k = np.asarray(k, dtype=float)
    if np.any(~np.isfinite(k)) or np.any(k != np.round(k)) or np.any(k < 1):
        raise ValueError("snapshot counts must be whole numbers >= 1")
    return k


def _check_sinr(sinr_opt) -> float:
    s = float(sinr_opt)
    if not math.isfinite(s) or s < 0:
        raise ValueError(f"optimum SINR must be a finite linear ratio >= 0, got {sinr_opt!r}")
    return s


def _check_q(q) -> np.ndarray:
    q = np.asarray(q, dtype=float)
    if np.any(~(q >= 0)) or np.any(~(q <= 1)):
        raise ValueError("probabilities must lie in [0, 1]")
    return q


# --------------------------------------------------------------------------- the Beta law
def beta_quantile(q, a, b) -> np.ndarray:
    """Quantile ``q`` of ``Beta(a, b)``: the inverse regularised incomplete beta
    function (``scipy.special.betaincinv``; the same numbers as ``scipy.stats.beta.ppf``,
    tested, at a quarter of its import cost: scipy.stats takes about 0.7 s to import,
    scipy.special 0.18 s)."""
    from scipy import special  # only where it is used
    return special.betaincinv(a, b, q)


def beta_survival(x, a, b) -> np.ndarray:
    """``P(X > x)`` for ``X ~ Beta(a, b)``: the complemented regularised incomplete beta
    function (``scipy.special.betaincc``, scipy 1.11 and later; the same numbers as
    ``scipy.stats.beta.sf``, tested; before 1.11, that function itself)."""
    from scipy import special  # only where it is used
    if hasattr(special, "betaincc"):
        return special.betaincc(a, b, x)
    from scipy import stats
    return stats.beta.sf(x, a, b)


# --------------------------------------------------------------------------- RMB
def rmb_mean(k, n) -> np.ndarray:
    """Mean normalised SINR of unloaded SMI after ``k`` interference-only snapshots,
    ``(K + 2 - N) / (K + 1)`` (RMB 1974); NaN where K < N (the law needs K >= N).

    Checkable fact: equals ``scipy.stats.beta(K-N+2, N-1).mean()`` and is exactly 1/2 at
    K = 2N - 3.
    """
    n = _check_elements(n)
    k = _counts(k, n)
    with np.errstate(invalid="ignore"):
        return np.where(k >= n, (k + 2.0 - n) / (k + 1.0), np.nan)


def rmb_quantile(q, k, n) -> np.ndarray:
    """Quantile ``q`` of the RMB law ``Beta(K - N + 2, N - 1)`` (:func:`beta_quantile`); NaN
    where K < N. q and k broadcast."""
    n = _check_elements(n)
    k = _counts(k, n)
    q = _check_q(q)
    q, k = np.broadcast_arrays(q, k)
    out = np.full(k.shape, np.nan)
    ok = k >= n
    out[ok] = beta_quantile(q[ok], k[ok] - n + 2.0, n - 1.0)
    return out


def rmb_three_db_snapshots(n) -> int:
    """Snapshots at which the RMB mean is exactly 1/2: ``2N - 3`` (solve
    (K + 2 - N)/(K + 1) = 1/2). For N = 2 this is 1 < N, so N (mean 2/3) is returned."""
    n = _check_elements(n)
    return max(2 * n - 3, n)


def unloaded_rule_of_thumb(n) -> int:
    """The unloaded rule of thumb: about ``2N`` snapshots for a 3 dB average loss (RMB
    1974; the exact point is 2N - 3)."""
    return 2 * _check_elements(n)


# --------------------------------------------------------------------------- signal present
def signal_present_map(eta, sinr_opt) -> np.ndarray:
    """``rho = eta / (1 + S (1 - eta))``: normalised SINR from the RMB-distributed ratio
    eta when the wanted signal (optimum SINR S, linear) is in the training data (derived
    in the module docstring). Increasing in eta; identity for S = 0."""
    s = _check_sinr(sinr_opt)
    eta = np.asarray(eta, dtype=float)
    return eta / (1.0 + s * (1.0 - eta))


def _signal_present_mean_one(k: float, n: int, s: float) -> float:
    a, b = k - n + 2.0, n - 1.0
    if s == 0.0:
        return a / (a + b)
    from scipy import integrate, stats  # slow to import: only where it is used
    dist = stats.beta(a, b)
    lo, hi = dist.ppf(1e-13), dist.isf(1e-13)
    mode = min(max(dist.mean(), lo), hi)
    val, _ = integrate.quad(lambda t: t / (1.0 + s * (1.0 - t)) * dist.pdf(t), lo, hi,
                            points=[mode], limit=200, epsabs=1e-13, epsrel=1e-10)
    return float(val)


def signal_present_mean(k, n, sinr_opt) -> np.ndarray:
    """Mean normalised SINR of unloaded SMI trained with the wanted signal present (MPDR)
    after ``k`` snapshots, ``E[eta / (1 + S (1 - eta))]`` with eta ~ Beta(K-N+2, N-1),
    by ``scipy.integrate.quad`` against the beta density; NaN where K < N.

    Checkable facts: equals :func:`rmb_mean` for S = 0; matches a direct Monte Carlo of
    ``w = R_x_hat^-1 a`` on complex Gaussian data (tests/test_theory.py).
    """
    n = _check_elements(n)
    k = _counts(k, n)
    s = _check_sinr(sinr_opt)
    out = np.full(k.shape, np.nan)
    flat = out.reshape(-1)
    for i, kk in enumerate(k.reshape(-1)):          # one quadrature per snapshot count
        if kk >= n:
            flat[i] = _signal_present_mean_one(float(kk), n, s)
    return out


def signal_present_quantile(q, k, n, sinr_opt) -> np.ndarray:
    """Quantile q of the signal-present law: the RMB beta quantile mapped through
    :func:`signal_present_map` (valid because the map is increasing); NaN where K < N."""
    return signal_present_map(rmb_quantile(q, k, n), sinr_opt)


def signal_present_three_db_snapshots(n, sinr_opt) -> int:
    """Smallest K >= N with :func:`signal_present_mean` >= 1/2 (3 dB average loss when
    training with the signal present). Roughly ``(N - 1)(2 + S) - 1``; 2N - 3 for S = 0.
    """
    n = _check_elements(n)
    s = _check_sinr(sinr_opt)

    def ok(k: int) -> bool:
        return _signal_present_mean_one(float(k), n, s) >= 0.5

    lo = n
    if ok(lo):
        return lo
    hi = max(n + 1, int(math.ceil((n - 1) * (2.0 + s))) + 1)
    while not ok(hi):
        lo, hi = hi, 2 * hi
        if hi > 10 ** 15:
            raise ValueError("optimum SINR too large for a finite 3 dB snapshot count")
    while hi - lo > 1:                       # ok(lo) False, ok(hi) True; mean increases in K
        mid = (lo + hi) // 2
        lo, hi = (lo, mid) if ok(mid) else (mid, hi)
    return hi


# --------------------------------------------------------------------------- scene facts
def _extended(scene: Scene) -> bool:
    """True when the scene uses coherent copies, element patterns, coupling or a noise
    field: its nominal truth then comes from the streams' own true covariance."""
    return scene.coherent or scene.array.patterned or not scene.noise.plain


def _nominal_truth(scene: Scene) -> tuple[np.ndarray, np.ndarray]:
    """(R_in (N, N), a_d (N,)) of the nominal scene at snapshot 0 from
    :meth:`adapt.streams.snapshots.TrialBatch.covariance` (coherent groups, patterns,
    coupling and the diffuse noise field included), with the hardware errors and the
    channel noise spread left out."""
    import dataclasses

    from adapt.scene.model import HardwareErrors
    from adapt.streams.snapshots import TrialBatch
    changes = {"array": dataclasses.replace(scene.array, errors=HardwareErrors()),
               "noise": dataclasses.replace(scene.noise, element_noise_db_rms=0.0)}
    if scene.wideband and scene.receiver.fractional_bandwidth is None:
        # wideband through channel errors alone: stays wideband (no dispersion), so
        # band limits and a copy's delay still shape the nominal truth
        changes["receiver"] = dataclasses.replace(scene.receiver, fractional_bandwidth=0.0)
    nominal = scene.with_overrides(**changes)
    batch = TrialBatch(nominal, trials=1, seed=0)
    return batch.covariance()[0], batch.desired_steering()[0]


def _interferer_covariance(scene: Scene) -> np.ndarray:
    """Nominal interference covariance without noise, every interferer on, at its
    starting direction (nominal element positions, no hardware errors). With the
    scene's real-array effects (:func:`_extended`): the nominal R_in less the thermal
    floor (a diffuse noise field counts as interference), at snapshot 0."""
    if _extended(scene):
        return _nominal_truth(scene)[0] - np.eye(scene.elements)
    pos = scene.array.positions
    n = scene.elements
    r = np.zeros((n, n), dtype=complex)
    for src in scene.interferers:
        a = geometry.steering_vector(pos, src.azimuth, src.elevation)
        r += src.power * np.outer(a, np.conj(a))
    return r


def interference_eigenvalues(scene: Scene) -> np.ndarray:
    """Eigenvalues (descending, linear, relative to the per-element noise power) of the
    nominal interference covariance ``sum_j P_j a_j a_j^H``. A lone interferer of
    per-element INR P contributes ``N P`` (its INR after array gain); closely spaced
    interferers share one large and one small eigenvalue."""
    lam = np.linalg.eigvalsh(_interferer_covariance(scene))[::-1]
    return np.maximum(lam, 0.0)


def strong_interferers(scene: Scene, loading_db: float | None = None) -> int:
    """J: the number of interference eigenvalues (:func:`interference_eigenvalues`) above
    the loading level ``10^(loading_db/10)`` times the noise power; without a loading
    level, above 10 dB over the noise (:data:`STRONG_DEFAULT_DB`). Capped at N - 1.

    Definition chosen here (common practice, no single source): a direction the loaded
    sample covariance must learn is one whose eigenvalue stands above the load; weaker
    ones are hidden under the load and cost no snapshots. A lone interferer is strong when
    its INR after array gain (N times its per-element INR) exceeds the load.
    """
    db = STRONG_DEFAULT_DB if loading_db is None else float(loading_db)
    if not math.isfinite(db):
        raise ValueError(f"loading level must be finite dB, got {loading_db!r}")
    lam = interference_eigenvalues(scene)
    return int(min(np.sum(lam > 10.0 ** (db / 10.0)), scene.elements - 1))


def loaded_rule_of_thumb(strong: int) -> int:
    """Carlson's (1988) rule of thumb: loaded SMI (about 10 dB above the noise) loses
    about 3 dB after ``2J`` snapshots, J strong interferers."""
    if isinstance(strong, bool) or int(strong) != strong or strong < 0:
        raise ValueError(f"number of strong interferers must be an integer >= 0, got {strong!r}")
    return 2 * int(strong)


def nominal_optimum_sinr(scene: Scene) -> float:
    """Optimum SINR ``P_s a^H R_in^-1 a`` (linear) of the nominal scene at snapshot 0
    (nominal array, pulsing sources at their snapshot-0 state)."""
    if _extended(scene):
        r, a = _nominal_truth(scene)
        d = scene.desired
        p = d.power if d.active(0) else 0.0
        return float(p * np.real(np.conj(a) @ np.linalg.solve(r, a)))
    pos = scene.array.positions
    n = scene.elements
    r = np.eye(n, dtype=complex)
    for src in scene.interferers:
        if src.active(0):
            a = geometry.steering_vector(pos, src.azimuth, src.elevation)
            r += src.power * np.outer(a, np.conj(a))
    d = scene.desired
    a = geometry.steering_vector(pos, d.azimuth, d.elevation)
    p = d.power if d.active(0) else 0.0
    return float(p * np.real(np.conj(a) @ np.linalg.solve(r, a)))


def assumption_violations(scene: Scene) -> list[str]:
    """The assumptions of the RMB and signal-present laws this scene breaks, one plain
    sentence each (empty: the laws should hold within Monte Carlo error).

    Checked: non-Gaussian interferer waveforms (tone, chirp, BPSK, QPSK: the training
    data are not Gaussian), a non-Gaussian wanted waveform when training with the signal
    present, pulsing or moving sources (non-stationary), quantisation, hardware errors
    and pointing mismatch (the weight is steered with a vector other than the true one).
    """
    out = []
    kinds = [scene.sources[scene.origin_index(i)].waveform.kind     # a copy: its origin's
             for i in range(len(scene.sources))]
    odd = [f"{s.name} ({s.waveform.kind})" for i, s in enumerate(scene.sources)
           if s.role == "interferer" and kinds[i] != "gaussian"]
    if odd:
        out.append("non-Gaussian interferer waveforms: " + ", ".join(odd)
                   + " (the laws assume noise-like Gaussian training data)")
    d = scene.desired
    if scene.training == "signal" and d.waveform.kind != "gaussian":
        out.append(f"the wanted signal '{d.name}' is {d.waveform.kind}, not Gaussian, and "
                   "is in the training data")
    moving = [s.name for s in scene.sources if not s.stationary]
    if moving:
        out.append("non-stationary scene: " + ", ".join(moving)
                   + " pulse(s) or move(s) (the laws assume one fixed covariance)")
    if scene.receiver.bits is not None:
        out.append(f"{scene.receiver.bits}-bit quantisation of the training data")
    if scene.array.errors.any:
        out.append("hardware errors (gain, phase or position): the look steering vector "
                   "differs from the true response")
    if scene.coherent:
        out.append("coherent copies: sources share a waveform (the laws assume independent "
                   "sources)")
    if scene.array.coupling is not None and not scene.array.coupling.calibrated:
        out.append("uncalibrated mutual coupling: the look steering vector differs from "
                   "the true response")
    if scene.wideband:
        out.append("wideband scene: sources are filtered (band limits, fractional delays "
                   "across the aperture), which leaves neighbouring snapshots slightly "
                   "dependent")
    miss = geometry.angle_between_deg(scene.look_azimuth, scene.look_elevation, d.azimuth, d.elevation)
    if miss > 1e-6:
        out.append(f"pointing mismatch of {miss:.3g} degrees between the look direction and "
                   f"'{d.name}'")
    return out


def scene_facts(scene: Scene) -> dict:
    """Facts the theory needs, as a plain mapping: elements, training, nominal optimum
    SINR (linear and dB), interference eigenvalues (dB above noise), strong interferers
    at the default threshold, the rules of thumb and the assumption violations."""
    s = nominal_optimum_sinr(scene)
    lam = interference_eigenvalues(scene)
    j = strong_interferers(scene)
    n = scene.elements
    facts = {"elements": n, "training": scene.training, "optimum_sinr": s,
             "optimum_sinr_db": 10 * math.log10(s) if s > 0 else -math.inf,
             "interference_eigenvalues_db": [10 * math.log10(v) if v > 0 else None
                                             for v in lam[: max(len(scene.interferers), 0)]],
             "strong_interferers": j, "unloaded_rule": unloaded_rule_of_thumb(n),
             "rmb_three_db": rmb_three_db_snapshots(n), "loaded_rule": loaded_rule_of_thumb(j),
             "violations": assumption_violations(scene)}
    return facts


# --------------------------------------------------------------------------- choosing a law
def training_count(params: dict, k) -> np.ndarray:
    """Training snapshots behind an SMI weight at checkpoint(s) k, from the smi
    parameters ``window``, ``length`` and ``interval`` (see adapt/processors/smi.py):
    ``u = floor(k / interval) * interval``, capped at ``length`` for a sliding window."""
    k = np.asarray(k, dtype=np.int64)
    every = int(params.get("interval") or 1)
    u = (k // every) * every
    if params.get("window", "growing") == "sliding" and params.get("length") is not None:
        u = np.minimum(u, int(params["length"]))
    return u


@dataclass(frozen=True)
class Law:
    """A closed-form law for one processor on one scene. Calling it gives the mean
    normalised SINR at checkpoint(s) k (NaN where no law applies, K < N)."""
    name: str
    source: str
    elements: int
    sinr_opt: float
    #: maps checkpoint k to training snapshot count K
    count: Callable[[Any], np.ndarray]
    #: assumptions of the law that the scene breaks
    violations: tuple[str, ...] = field(default=())

    def _kk(self, k):
        kk = np.asarray(self.count(k), dtype=float)
        return kk, kk >= self.elements

    def __call__(self, k) -> np.ndarray:
        return self.mean(k)

    def mean(self, k) -> np.ndarray:
        kk, ok = self._kk(k)
        out = np.full(kk.shape, np.nan)
        if np.any(ok):
            if self.name == "rmb":
                out[ok] = rmb_mean(kk[ok], self.elements)
            else:
                out[ok] = signal_present_mean(kk[ok], self.elements, self.sinr_opt)
        return out

    def quantile(self, q, k) -> np.ndarray:
        kk, ok = self._kk(k)
        q, kk = np.broadcast_arrays(np.asarray(q, dtype=float), kk)
        ok = np.broadcast_to(ok, kk.shape)
        out = np.full(kk.shape, np.nan)
        if np.any(ok):
            if self.name == "rmb":
                out[ok] = rmb_quantile(q[ok], kk[ok], self.elements)
            else:
                out[ok] = signal_present_quantile(q[ok], kk[ok], self.elements, self.sinr_opt)
        return out

    def share_meeting(self, target: float, k) -> np.ndarray:
        """Share of trials whose normalised SINR is at least ``target`` after checkpoint(s)
        k: ``P(rho >= t)`` under the law, from the Beta law's survival function
        (``scipy.stats.beta``; RMB 1974: ``rho ~ Beta(K-N+2, N-1)``; signal present:
        ``rho = eta / (1 + S (1 - eta))`` increasing in eta ~ the same Beta law, so
        ``P(rho >= t) = P(eta >= t (1 + S) / (1 + S t))``). NaN where K < N."""
        kk, ok = self._kk(k)
        t = float(target)
        if self.name != "rmb":
            s = self.sinr_opt
            t = t * (1.0 + s) / (1.0 + s * t)
        out = np.full(kk.shape, np.nan)
        if np.any(ok):
            out[ok] = beta_survival(t, kk[ok] - self.elements + 2.0, self.elements - 1.0)
        return out

    def required_snapshots_share(self, target: float, fraction: float, limit: int
                                 ) -> int | None:
        """Smallest checkpoint k in [1, limit] at which at least ``fraction`` of trials
        meet ``target`` under the law (the Beta law's ``1 - fraction`` quantile reaches
        the target), or None; bisection, the share never decreasing with k."""
        limit = int(limit)

        def ok(k: int) -> bool:
            v = float(self.share_meeting(target, np.array([k]))[0])
            return bool(np.isfinite(v) and v >= fraction)

        if limit < 1 or not ok(limit):
            return None
        lo, hi = 0, limit
        while hi - lo > 1:
            mid = (lo + hi) // 2
            lo, hi = (lo, mid) if ok(mid) else (mid, hi)
        return hi

    def three_db_snapshots(self) -> int:
        """Training snapshots for a 3 dB (half-power) average loss under this law."""
        if self.name == "rmb":
            return rmb_three_db_snapshots(self.elements)
        return signal_present_three_db_snapshots(self.elements, self.sinr_opt)

    def required_snapshots(self, target: float, limit: int) -> int | None:
        """Smallest checkpoint k in [1, limit] whose mean normalised SINR is >= ``target``
        (linear, in (0, 1)), or None. Bisection: the mean never decreases with k (the
        training count never decreases and the beta law improves with it). Note that a
        3.00 dB target (0.501) needs one snapshot more than the half-power point 2N - 3
        when (N - 2 + t)/(1 - t) is just above 2N - 3."""
        t = float(target)
        if not 0.0 < t < 1.0:
            raise ValueError(f"target normalised SINR must be in (0, 1), got {target!r}")
        limit = int(limit)
        if limit < 1:
            raise ValueError(f"limit must be >= 1, got {limit}")

        def ok(k: int) -> bool:
            v = float(self.mean(np.array([k]))[0])
            return bool(np.isfinite(v) and v >= t)

        if not ok(limit):
            return None
        lo, hi = 0, limit                      # ok(hi) True; ok(0) taken as False
        while hi - lo > 1:
            mid = (lo + hi) // 2
            lo, hi = (lo, mid) if ok(mid) else (mid, hi)
        return hi


def theory_for(processor, scene_info) -> Law | None:
    """The closed-form law that applies to ``processor`` (a Processor, spec string or
    mapping) on a scene (a :class:`Scene` or a :func:`scene_facts` mapping), or None.

    * unloaded ``smi`` (any window; the count is mapped by :func:`training_count`) trained
      on interference only -> RMB (1974);
    * unloaded ``smi`` trained with the signal present -> the signal-present law;
    * loaded ``smi`` -> None: no exact law, only Carlson's 2J rule of thumb;
    * ``smi taps=L``: the same laws with N L in place of N, the overlap of the stacked
      snapshots listed among the violations (the measured difference is a finding);
    * spatially smoothed ``smi`` (``subarray``) and any other method -> None.

    The law's ``violations`` list the assumptions the scene breaks, which explain a
    disagreement with simulation.
    """
    from adapt.processors import Processor, parse_spec
    from adapt.processors._covariance import effective_loading
    proc = processor if isinstance(processor, Processor) else parse_spec(processor)
    facts = scene_facts(scene_info) if isinstance(scene_info, Scene) else dict(scene_info)
    for key in ("elements", "training", "optimum_sinr"):
        if key not in facts:
            raise ValueError(f"scene information lacks '{key}'")
    if not proc.sample_mvdr or proc.params.get("subarray") is not None:
        return None                      # (the laws are for the whole, unsmoothed array)
    mode, _ = effective_loading(proc.params)
    if mode is not None:
        return None
    params = dict(proc.params)
    taps = int(params.get("taps", 1))
    n = int(facts["elements"]) * taps
    if n < 2:
        return None
    violations = tuple(facts.get("violations", ()))
    if taps > 1:
        # stacked space-time snapshots: the law is applied with N L in place of N; the
        # stacks overlap (neighbours share L - 1 snapshots), so they are not independent
        violations += (f"stacked space-time snapshots of {n} = {facts['elements']} x {taps} "
                       "entries overlap (neighbours share all but one snapshot per element) "
                       "and the first ones are incomplete: the law assumes independent "
                       "snapshots; it is applied with N L in place of N",)
    if facts["training"] == "signal":
        return Law("signal-present", SIGNAL_PRESENT_SOURCE, n, float(facts["optimum_sinr"]),
                   lambda k: training_count(params, k), violations)
    return Law("rmb", RMB_SOURCE, n, 0.0, lambda k: training_count(params, k), violations)
