"""Scores: plain functions over weights, true steering vectors and true covariances.

All functions broadcast over leading dimensions (trials, checkpoints), so a whole Monte
Carlo run is scored in a few batched calls. Weights are applied as ``y = w^H x``.

Sources: output SINR and the optimum bound, Van Trees, *Optimum Array Processing* (2002),
ch. 6; normalised SINR as in Reed, Mallett and Brennan (1974); white-noise gain (array
gain against spatially white noise), Cox, Zeskind and Kooij (1987); main-beam pointing
and sidelobe levels of the array factor, the antenna handbook (Mailloux, *Phased Array
Antenna Handbook*, ch. 2; the uniform line's first sidelobe tends to -13.26 dB);
three-point parabolic peak interpolation as used for spectral peaks (J. O. Smith,
*Spectral Audio Signal Processing*, "quadratic interpolation of spectral peaks").

Convergence and summaries across trials:

* the *mean loss* at a checkpoint is the loss of the mean normalised SINR,
  ``-10 log10(mean_t rho_t)`` (the curve Reed, Mallett and Brennan plot: their
  E[rho] = (K + 2 - N) / (K + 1)); it is what "snapshots to 3 dB" uses;
* per-trial statistics of the loss (mean, median, p10, p90) are taken over the per-trial
  losses in dB.
"""
from __future__ import annotations

import numpy as np

from adapt.numerics import kernels as _kernels
from adapt.numerics.linalg import solve_hermitian
from adapt.scene import geometry

__all__ = ["output_sinr", "optimum_sinr", "normalised_sinr", "loss_db", "to_db",
           "white_noise_gain", "white_noise_gain_db", "array_gain", "response_db",
           "responses_db", "loss_db_of", "mean_loss_db",
           "fraction_meeting", "first_checkpoint", "snapshots_to_target", "trial_summary",
           "snapshots_staying_within",
           "azimuth_cut", "main_beam_peak", "pointing_error_deg", "peak_sidelobe_db",
           "parabolic_peak", "is_line_array", "plane_normal", "sphere_directions", "tangent_frame",
           "direction_response", "main_beam_peak_2d", "pointing_error_2d_deg",
           "peak_sidelobe_2d_db", "output_sinr_space_time",
           "optimum_sinr_space_time", "band_response", "band_centre_weights",
           "quadratic_form"]


def _check_shapes(w: np.ndarray, a: np.ndarray, r: np.ndarray | None = None) -> None:
    if w.shape[-1] != a.shape[-1]:
        raise ValueError(f"weights have {w.shape[-1]} elements, steering vector {a.shape[-1]}")
    if r is not None and (r.shape[-1] != w.shape[-1] or r.shape[-2] != w.shape[-1]):
        raise ValueError(f"covariance is {r.shape[-2:]}, weights have {w.shape[-1]} elements")


def to_db(x, floor: float = 1e-30) -> np.ndarray:
    """10 log10 of a power ratio, floored to avoid -inf."""
    return 10.0 * np.log10(np.maximum(np.asarray(x, dtype=float), floor))


def output_sinr(weights: np.ndarray, steering: np.ndarray, covariance: np.ndarray,
                signal_power: float | np.ndarray) -> np.ndarray:
    """Output SINR ``sigma_s^2 |w^H a|^2 / (w^H R_in w)`` (linear).

    weights (..., N); steering: the TRUE wanted-source steering vector (..., N);
    covariance: the TRUE interference-plus-noise covariance (..., N, N); all broadcast.
    Van Trees (2002), eq. 6.x: the quantity every adaptive processor is judged by.
    Returns 0 for an all-zero weight (no output).
    """
    w = np.asarray(weights)
    a = np.asarray(steering)
    r = np.asarray(covariance)
    _check_shapes(w, a, r)
    num = np.asarray(signal_power) * np.abs(np.einsum("...n,...n->...", np.conj(w), a)) ** 2
    den = np.real(np.einsum("...n,...nm,...m->...", np.conj(w), r, w))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return out


def optimum_sinr(steering: np.ndarray, covariance: np.ndarray,
                 signal_power: float | np.ndarray) -> np.ndarray:
    """Optimum (clairvoyant MVDR) SINR ``sigma_s^2 a^H R_in^-1 a`` (linear), the upper
    bound of :func:`output_sinr` over all weights (Cauchy-Schwarz; Van Trees 2002, ch. 6).
    """
    a = np.asarray(steering)
    r = np.asarray(covariance)
    if r.shape[-1] != a.shape[-1]:
        raise ValueError("steering vector and covariance sizes differ")
    a_b = np.broadcast_to(a, np.broadcast_shapes(a.shape, r.shape[:-1]))
    x = solve_hermitian(np.broadcast_to(r, a_b.shape + (a.shape[-1],)), a_b)
    return np.asarray(signal_power) * np.real(np.einsum("...n,...n->...", np.conj(a_b), x))


def quadratic_form(weights: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """``Re(w^H R w)`` for weights (..., M) and covariances (..., M, M), broadcast; for
    the engine's stacks, weights (T, C, M) and covariances (T or 1, C or 1, M, M), each
    form by itself (:func:`adapt.numerics.kernels.quadratic_forms`, compiled when the
    kernels are on; equal to the element-wise sum to rounding), so results never
    depend on the chunk."""
    w = np.asarray(weights)
    r = np.asarray(covariance)
    if w.ndim == 3 and r.ndim == 4 and r.shape[-2:] == (w.shape[-1],) * 2 \
            and all(r.shape[k] in (1, w.shape[k]) for k in (0, 1)):
        return _kernels.quadratic_forms(w, r)
    return np.real(np.einsum("...n,...nm,...m->...", np.conj(w), r, w))


def output_sinr_space_time(weights: np.ndarray, signal: np.ndarray,
                           covariance: np.ndarray) -> np.ndarray:
    """Output SINR ``w^H R_s w / (w^H R_in w)`` (linear) of space-time (or spatial)
    weights against the wanted source's covariance ``R_s`` and the interference-plus-
    noise covariance ``R_in`` (..., M, M), all broadcast; M = N L for L taps. For a rank-
    one ``R_s = sigma_s^2 a a^H`` it is :func:`output_sinr` (Van Trees 2002, broadband
    chapter: the SINR of a tapped-delay-line beamformer)."""
    num = quadratic_form(weights, signal)
    den = quadratic_form(weights, covariance)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def optimum_sinr_space_time(signal: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """The largest SINR any weight reaches, the largest generalised eigenvalue of
    ``(R_s, R_in)`` (Rayleigh quotient; Van Trees 2002, ch. 6 and the broadband
    chapter); ``sigma_s^2 a^H R_in^-1 a`` when ``R_s`` is rank one. (..., M, M) ->
    (...)."""
    r = np.asarray(covariance)
    c = np.linalg.cholesky(r)
    x = np.linalg.solve(c, np.broadcast_to(signal, r.shape))
    y = np.linalg.solve(c, np.conj(np.swapaxes(x, -1, -2)))         # C^-1 R_s C^-H
    y = 0.5 * (y + np.conj(np.swapaxes(y, -1, -2)))
    return np.linalg.eigvalsh(y)[..., -1]


def band_response(weights: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """``w^H R w`` (real): with R a unit-power white source's space-time covariance,
    the power response toward it averaged over the band."""
    return quadratic_form(weights, covariance)


def band_centre_weights(weights: np.ndarray, elements: int) -> np.ndarray:
    """Space-time weights (..., N L) folded to the N-element weight of their response at
    the band centre (f = 0): ``sum_l w_l``; spatial weights (..., N) unchanged. Patterns
    and pointing of a tapped processor are those of this weight."""
    w = np.asarray(weights)
    if w.shape[-1] == elements:
        return w
    return w.reshape(w.shape[:-1] + (-1, elements)).sum(axis=-2)


def normalised_sinr(sinr: np.ndarray, optimum: np.ndarray) -> np.ndarray:
    """SINR over the optimum SINR, in [0, 1] for the true covariance (Reed, Mallett and
    Brennan 1974 call this the normalised SINR; its mean is what their theory
    predicts). NaN where the optimum is not positive (the wanted source is off: the
    ratio is undefined). The code spells it "normalised"; output keys that users
    already read keep "normalized" (``normalized_sinr_mean``)."""
    sinr, optimum = np.asarray(sinr), np.asarray(optimum)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(optimum > 0, sinr / np.where(optimum > 0, optimum, 1), np.nan)


def loss_db(sinr: np.ndarray, optimum: np.ndarray) -> np.ndarray:
    """Loss against the optimum in dB (>= 0): ``-10 log10(SINR / SINR_opt)``; +inf for
    an output without signal, NaN where the optimum is not positive."""
    return loss_db_of(normalised_sinr(sinr, optimum))


def loss_db_of(normalised: np.ndarray) -> np.ndarray:
    """Loss in dB of normalised SINR values: ``-10 log10(rho)`` (+inf for 0, NaN for
    NaN)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return -10 * np.log10(normalised)


def white_noise_gain(weights: np.ndarray, steering: np.ndarray) -> np.ndarray:
    """White-noise gain ``|w^H a|^2 / (w^H w)`` (linear); N for the uniform
    phase-steered sum of N elements (the array gain against white noise), lower values
    mean less robustness to errors (Cox, Zeskind and Kooij 1987)."""
    w = np.asarray(weights)
    a = np.asarray(steering)
    _check_shapes(w, a)
    num = np.abs(np.einsum("...n,...n->...", np.conj(w), a)) ** 2
    den = np.real(np.einsum("...n,...n->...", np.conj(w), w))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def array_gain(weights: np.ndarray, steering: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Array gain against a noise field, ``|w^H a|^2 / (w^H Q w)`` (linear), with Q the
    noise covariance normalised to unit power per element (a coherence matrix): N for
    the phase-steered sum in white noise; against spherically isotropic noise it is the
    directivity, which a closely spaced line can push toward N^2 at endfire (Uzkov
    1946; Cox, Zeskind and Owen 1987), at the price of the white-noise gain
    (:func:`white_noise_gain`, the case Q = I).

    Parameters
    ----------
    weights : (..., N); steering : (..., N) the true steering toward the look
        direction; noise : (..., N, N) the noise covariance or coherence.

    Returns
    -------
    (...) the gain, 0 for an all-zero weight.

    References
    ----------
    H. Cox, R. Zeskind and T. Kooij, "Practical supergain", IEEE Trans. ASSP-34, 1986
    (from memory);
    Van Trees, Optimum Array Processing (2002), sec. 2.6 and 6.2.
    """
    w = np.asarray(weights)
    a = np.asarray(steering)
    q = np.asarray(noise)
    _check_shapes(w, a, q)
    num = np.abs(np.einsum("...n,...n->...", np.conj(w), a)) ** 2
    den = np.real(np.einsum("...n,...nm,...m->...", np.conj(w), q, w))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def response_db(weights: np.ndarray, toward: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """Power response toward steering vector ``toward`` relative to the response toward
    ``reference``, in dB: ``10 log10(|w^H b|^2 / |w^H a|^2)``. With ``toward`` an
    interferer's true steering and ``reference`` the look direction this is the null
    depth (negative: a null)."""
    return responses_db(weights, [toward], reference)[..., 0]


def responses_db(weights: np.ndarray, towards, reference: np.ndarray) -> np.ndarray:
    """:func:`response_db` toward each steering vector of ``towards`` (a sequence),
    stacked on a last axis; the response toward ``reference`` is computed once."""
    w = np.asarray(weights)
    ref = to_db(np.abs(np.einsum("...n,...n->...", np.conj(w), reference)) ** 2)
    return np.stack([to_db(np.abs(np.einsum("...n,...n->...", np.conj(w), b)) ** 2) - ref
                     for b in towards], -1)


def white_noise_gain_db(weights: np.ndarray, steering: np.ndarray) -> np.ndarray:
    """White-noise gain in dB: ``10 log10(|w^H a|^2 / (w^H w))``; ``10 log10 N`` for the
    uniform phase-steered sum of N elements (Cox, Zeskind and Kooij 1987)."""
    return to_db(white_noise_gain(weights, steering))


# --------------------------------------------------------------------------- convergence
def mean_loss_db(normalised: np.ndarray, axis: int = 0) -> np.ndarray:
    """Loss of the mean normalised SINR, ``-10 log10(mean rho)`` over ``axis`` (trials).

    This is the curve Reed, Mallett and Brennan (1974) analyse: for sample-matrix
    inversion with K snapshots and N elements, ``E[rho] = (K + 2 - N) / (K + 1)``, so
    the mean loss falls to 3 dB near K = 2N - 3.
    """
    rho = np.asarray(normalised, dtype=float)
    if rho.ndim == 0:
        raise ValueError("normalised SINR must have a trials axis")
    return -to_db(np.mean(rho, axis=axis))


def fraction_meeting(loss: np.ndarray, target_db: float = 3.0, axis: int = 0) -> np.ndarray:
    """Fraction of trials whose loss (dB) is at most ``target_db`` (NaN never meets)."""
    if not np.isfinite(target_db):
        raise ValueError(f"target_db must be finite, got {target_db}")
    x = np.asarray(loss, dtype=float)
    if x.ndim == 0:
        raise ValueError("loss must have a trials axis")
    return np.mean(x <= target_db, axis=axis)


def first_checkpoint(checkpoints, met):
    """The first checkpoint (snapshot count) where ``met`` is true.

    checkpoints (C,), met (..., C) booleans. For 1-D ``met`` returns an int, or None if
    never met; otherwise an int array with -1 where never met.
    """
    c = np.asarray(checkpoints)
    m = np.asarray(met, dtype=bool)
    if c.ndim != 1 or m.shape[-1:] != c.shape:
        raise ValueError(f"met has shape {m.shape}, expected (..., {c.size}) for the checkpoints")
    any_ = m.any(axis=-1)
    idx = np.argmax(m, axis=-1)
    out = np.where(any_, c[idx] if c.size else -1, -1)
    if m.ndim == 1:
        return int(out) if bool(any_) else None
    return out.astype(np.int64)


def snapshots_to_target(checkpoints, normalised: np.ndarray, target_db: float = 3.0,
                        fraction: float = 0.9) -> tuple[int | None, int | None]:
    """Convergence: (first checkpoint where the mean loss :func:`mean_loss_db` is at most
    ``target_db``, first checkpoint where at least ``fraction`` of the trials have loss
    at most ``target_db``); each None if never within the run.

    normalised: (T, C) normalised SINR per trial and checkpoint. "First" means the first
    time, even if a changing scene later pushes the loss back up. Checkable fact: for
    SMI the mean reaches 3 dB near K = 2N - 3 snapshots (Reed, Mallett and Brennan 1974).
    """
    c, mean_ok, frac_ok = _within_target(checkpoints, normalised, target_db, fraction)
    return first_checkpoint(c, mean_ok), first_checkpoint(c, frac_ok)


def _within_target(checkpoints, normalised, target_db: float, fraction: float):
    """(checkpoints, mean loss within target per checkpoint, share of trials within
    target reaching ``fraction`` per checkpoint), the inputs checked."""
    rho = np.asarray(normalised, dtype=float)
    c = np.asarray(checkpoints)
    if rho.ndim != 2 or rho.shape[1] != c.size:
        raise ValueError(f"normalised SINR must be (trials, {c.size} checkpoints), got {rho.shape}")
    if not 0 < fraction <= 1:
        raise ValueError(f"fraction must be in (0, 1], got {fraction}")
    with np.errstate(divide="ignore", invalid="ignore"):
        per_trial = -to_db(rho)
    mean_ok = mean_loss_db(rho, axis=0) <= target_db
    frac_ok = fraction_meeting(per_trial, target_db, axis=0) >= fraction - 1e-12
    return c, mean_ok, frac_ok


def snapshots_staying_within(checkpoints, normalised: np.ndarray, target_db: float = 3.0,
                             fraction: float = 0.9) -> tuple[int | None, int | None]:
    """Convergence that lasts: (the checkpoint from which the mean loss
    :func:`mean_loss_db` stays at most ``target_db`` through the last checkpoint, the
    checkpoint from which at least ``fraction`` of the trials stay within it); None
    when the last checkpoint itself misses the target.

    Unlike :func:`snapshots_to_target` ("first reached"), a processor that meets the
    target once and loses it again when the scene changes is not counted as converged
    until it meets it for good. For a stationary scene whose mean loss falls
    monotonically both agree (common practice: the settling time of a step response).
    """
    c, mean_ok, frac_ok = _within_target(checkpoints, normalised, target_db, fraction)

    def settled(ok: np.ndarray):
        if not ok[-1]:
            return None
        stays = np.flip(np.logical_and.accumulate(np.flip(ok)))      # ok from here on
        return int(c[int(np.argmax(stays))])

    return settled(mean_ok), settled(frac_ok)


def trial_summary(values: np.ndarray, axis: int = 0) -> dict[str, np.ndarray]:
    """Across-trial statistics of ``values`` along ``axis``: mean, median, p10, p90
    (numpy's default linear interpolation, Hyndman and Fan type 7), and the standard
    error of the mean (sample standard deviation / sqrt(n); NaN for one trial).
    NaN entries are ignored (a statistic is NaN only when all are NaN)."""
    x = np.asarray(values, dtype=float)
    if x.ndim == 0 or x.shape[axis] == 0:
        raise ValueError("values must have a non-empty trials axis")
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        n = np.sum(np.isfinite(x), axis=axis)
        sem = np.where(n > 1, np.nanstd(x, axis=axis, ddof=1) / np.sqrt(np.maximum(n, 1)), np.nan) \
            if x.shape[axis] > 1 else np.full(np.delete(x.shape, axis), np.nan)
        # plain percentiles when nothing is missing (nanpercentile loops over columns)
        pct = np.percentile if not np.isnan(x).any() else np.nanpercentile
        p10, p50, p90 = pct(x, [10, 50, 90], axis=axis)
        return {"mean": np.nanmean(x, axis=axis), "median": p50, "p10": p10, "p90": p90,
                "sem": sem}


# --------------------------------------------------------------------------- patterns
_CUT_VALUES = 1 << 21      # complex values per (..., directions, elements) block


def azimuth_cut(weights: np.ndarray, positions: np.ndarray, azimuths_deg,
                elevation_deg: float = 0.0, gains: np.ndarray | None = None) -> np.ndarray:
    """Power response ``|w^H a(az, el)|^2`` (linear) along an azimuth cut.

    weights (..., N); positions (N, 3) or (..., N, 3) in wavelengths (the TRUE positions
    of each trial, broadcast against the weights' leading dimensions); gains: optional
    (..., N) complex element gains (hardware errors); azimuths (D,) degrees. Returns
    (..., D). Computed in direction blocks to bound memory.
    """
    w = np.asarray(weights)
    pos = np.asarray(positions, dtype=float)
    az = np.atleast_1d(np.asarray(azimuths_deg, dtype=float))
    if pos.ndim < 2 or pos.shape[-1] != 3:
        raise ValueError(f"positions must be (..., N, 3), got {pos.shape}")
    if pos.shape[-2] != w.shape[-1]:
        raise ValueError(f"weights have {w.shape[-1]} elements, positions {pos.shape[-2]}")
    if az.ndim != 1:
        raise ValueError("azimuths must be a 1-D list of degrees")
    g = None if gains is None else np.asarray(gains)
    lead = np.broadcast_shapes(w.shape[:-1], pos.shape[:-2], () if g is None else g.shape[:-1])
    n = w.shape[-1]
    # w^H (g * a) = (conj(w) g) . a: fold the gains into the weights
    wc = np.conj(w) if g is None else np.conj(w) * g
    if pos.ndim > 2:
        flat = pos.reshape(-1, n, 3)
        if np.all(flat == flat[0]):
            pos = flat[0]                 # one array for all trials: a shared steering matrix
    out = np.empty(lead + az.shape)
    if pos.ndim == 2:
        wc = np.broadcast_to(wc, lead + (n,))
        step = max(1, _CUT_VALUES // n)
        for lo in range(0, az.size, step):
            a = geometry.steering_vector(pos, az[lo:lo + step], elevation_deg)   # (d, N)
            out[..., lo:lo + step] = np.abs(wc @ a.T) ** 2
        return out
    step = max(1, _CUT_VALUES // max(1, int(np.prod(lead, dtype=np.int64)) * n))
    for lo in range(0, az.size, step):
        u = geometry.direction_vector(az[lo:lo + step], elevation_deg)           # (d, 3)
        a = np.exp(1j * 2 * np.pi * np.einsum("dk,...nk->...dn", u, pos))      # (..., d, N)
        out[..., lo:lo + step] = np.abs(np.einsum("...n,...dn->...d", wc, a)) ** 2
    return out


def parabolic_peak(left: np.ndarray, middle: np.ndarray, right: np.ndarray):
    """Three-point parabolic (quadratic) peak interpolation.

    Given samples y(-1), y(0), y(+1), returns (offset, height): the vertex of the
    parabola through them, offset in samples (clipped to [-0.5, 0.5]) and its height.
    Source: quadratic interpolation of spectral peaks (J. O. Smith, Spectral Audio
    Signal Processing). Checkable fact: exact for a parabola.
    """
    y0, y1, y2 = (np.asarray(v, dtype=float) for v in (left, middle, right))
    den = y0 - 2 * y1 + y2
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where((den < 0) & np.isfinite(den), 0.5 * (y0 - y2) / np.where(den == 0, 1, den), 0.0)
    p = np.clip(p, -0.5, 0.5)
    return p, y1 - 0.25 * (y0 - y2) * p


def _nominal(positions: np.ndarray) -> np.ndarray:
    pos = np.asarray(positions, dtype=float)
    return pos.reshape(-1, pos.shape[-2], 3).mean(axis=0)


def _default_beamwidth(positions: np.ndarray, azimuth: float, elevation: float) -> float:
    bw = geometry.half_power_beamwidth_deg(_nominal(positions), azimuth, elevation,
                                           resolution_deg=0.01)
    return float(bw) if np.isfinite(bw) and bw > 0 else 30.0


def main_beam_peak(weights: np.ndarray, positions: np.ndarray, look_azimuth: float,
                   look_elevation: float = 0.0, gains: np.ndarray | None = None,
                   beamwidth_deg: float | None = None, points: int = 401):
    """Azimuth (deg) and power (dB, absolute ``|w^H a|^2``) of the main-beam peak.

    The azimuth cut at the look elevation is sampled on ``points`` points within +- one
    beamwidth (default: the half-power beamwidth of the uniform beam toward the look
    direction on the nominal array, :func:`adapt.scene.geometry.half_power_beamwidth_deg`) of
    the look azimuth; the local maximum nearest the look azimuth is refined by
    :func:`parabolic_peak` on the dB values. If the cut rises monotonically to an edge of
    the window, that edge is returned. Shapes: weights (..., N) -> (...).
    """
    if points < 5 or points % 2 == 0:
        raise ValueError(f"points must be odd and >= 5, got {points}")
    bw = _default_beamwidth(positions, look_azimuth, look_elevation) \
        if beamwidth_deg is None else float(beamwidth_deg)
    if not bw > 0:
        raise ValueError(f"beamwidth must be > 0 degrees, got {beamwidth_deg}")
    half = points // 2
    grid = look_azimuth + np.linspace(-bw, bw, points)
    step = grid[1] - grid[0]
    pdb = to_db(azimuth_cut(weights, positions, grid, look_elevation, gains))
    mid = pdb[..., 1:-1]
    is_max = (mid >= pdb[..., :-2]) & (mid >= pdb[..., 2:])
    dist = np.where(is_max, np.abs(np.arange(1, points - 1) - half), np.inf)
    i = np.argmin(dist, axis=-1) + 1
    found = np.isfinite(np.min(dist, axis=-1))
    take = lambda j: np.take_along_axis(pdb, j[..., None], axis=-1)[..., 0]  # noqa: E731
    off, height = parabolic_peak(take(i - 1), take(i), take(i + 1))
    az = grid[i] + off * step
    # no interior maximum: the higher edge of the window
    edge = np.where(pdb[..., 0] > pdb[..., -1], 0, points - 1)
    az = np.where(found, az, grid[edge])
    height = np.where(found, height, take(edge))
    return az, height


def pointing_error_deg(weights: np.ndarray, positions: np.ndarray, look_azimuth: float,
                       look_elevation: float = 0.0, gains: np.ndarray | None = None,
                       beamwidth_deg: float | None = None, points: int = 401) -> np.ndarray:
    """Main-beam pointing error in degrees of azimuth: the azimuth of the main-beam peak
    (:func:`main_beam_peak`) minus the look azimuth (signed). Checkable fact: a two-
    element pair at spacing d with inter-element phase beta peaks at
    ``asin(beta / (2 pi d))`` (the phased-array steering relation, antenna handbook)."""
    az, _ = main_beam_peak(weights, positions, look_azimuth, look_elevation, gains,
                           beamwidth_deg, points)
    return az - look_azimuth


def _cut_span(positions: np.ndarray) -> tuple[float, float]:
    # An array with no extent along y cannot tell azimuth az from 180 - az (front from
    # back): its cut is one half-space; otherwise the full circle.
    pos = np.asarray(positions, dtype=float)
    return (-90.0, 90.0) if np.ptp(pos[..., 1]) < 1e-9 else (-180.0, 180.0)


def peak_sidelobe_db(weights: np.ndarray, positions: np.ndarray, look_azimuth: float,
                     look_elevation: float = 0.0, gains: np.ndarray | None = None,
                     step_deg: float = 0.05, beamwidth_deg: float | None = None,
                     span: tuple[float, float] | None = None) -> np.ndarray:
    """Peak sidelobe level in dB relative to the main-beam peak (negative).

    Definition: on the azimuth cut at the look elevation (azimuth -90..90 for arrays
    with no extent along y, which cannot tell front from back; else -180..180; or
    ``span``), sampled every ``step_deg``, the main lobe is the region around the
    main-beam peak (the sample nearest :func:`main_beam_peak`) out to the first local
    minimum on each side (the first nulls); the sidelobe level is the highest sample
    outside it, refined by :func:`parabolic_peak`, minus the main-beam peak power. A
    grating lobe counts as a sidelobe. NaN when nothing lies outside the main lobe.

    Checkable facts: a uniform line's first sidelobe tends to -13.26 dB for large N (the
    antenna handbook); a Dolph-Chebyshev taper designed for S dB gives sidelobes of
    exactly -S dB (Dolph 1946).
    """
    if not step_deg > 0:
        raise ValueError(f"step_deg must be > 0, got {step_deg}")
    lo, hi = _cut_span(positions) if span is None else (float(span[0]), float(span[1]))
    if not hi > lo:
        raise ValueError(f"span must be (low, high) with high > low, got {span}")
    grid = np.arange(lo, hi + step_deg / 2, step_deg)
    m = grid.size
    if m < 5:
        raise ValueError("the cut needs at least 5 samples; use a smaller step_deg")
    peak_az, peak_db = main_beam_peak(weights, positions, look_azimuth, look_elevation,
                                      gains, beamwidth_deg)
    pdb = to_db(azimuth_cut(weights, positions, grid, look_elevation, gains))
    idx = np.arange(m)
    near = np.clip(np.rint((peak_az - lo) / step_deg).astype(np.int64), 0, m - 1)
    # the sampled maximum next to the refined peak (the peak lies between samples)
    around = np.clip(near[..., None] + np.arange(-2, 3), 0, m - 1)
    best = np.argmax(np.take_along_axis(pdb, around, axis=-1), axis=-1)
    i0 = np.take_along_axis(around, best[..., None], axis=-1)
    # first local minimum at or beyond the peak on each side: where the cut starts rising
    rising_right = np.zeros(pdb.shape, dtype=bool)
    rising_right[..., :-1] = pdb[..., 1:] > pdb[..., :-1]
    right_ok = rising_right & (idx >= i0)
    right = np.where(right_ok.any(-1), np.argmax(right_ok, axis=-1), m - 1)
    rising_left = np.zeros(pdb.shape, dtype=bool)
    rising_left[..., 1:] = pdb[..., :-1] > pdb[..., 1:]
    left_ok = rising_left & (idx <= i0)
    left = np.where(left_ok.any(-1), m - 1 - np.argmax(left_ok[..., ::-1], axis=-1), 0)
    outside = (idx < left[..., None]) | (idx > right[..., None])
    masked = np.where(outside, pdb, -np.inf)
    j = np.argmax(masked, axis=-1)
    has = outside.any(-1)
    take = lambda k: np.take_along_axis(pdb, k[..., None], axis=-1)[..., 0]  # noqa: E731
    interior = (j > 0) & (j < m - 1)
    jl, jr = np.clip(j - 1, 0, m - 1), np.clip(j + 1, 0, m - 1)
    _, height = parabolic_peak(take(jl), take(j), take(jr))
    level = np.where(interior, np.maximum(height, take(j)), take(j))
    return np.where(has, level - peak_db, np.nan)


# --------------------------------------------------------------------------- 2-D patterns
# A line responds only to the direction cosine along its axis, so its azimuth cut at the
# look elevation holds every value of its pattern; a planar or 3-D array does not (a
# jammer above the cut sits in a null the cut never crosses). For those the main beam
# and the sidelobes are searched over the whole sphere of directions.

def is_line_array(positions: np.ndarray, tol: float = 1e-9) -> bool:
    """True when the (nominal) element positions lie on one straight line (or there is
    a single element): the array's pattern is then a function of one direction cosine
    and the azimuth cut describes it completely."""
    pos = _nominal(positions)
    if pos.shape[0] < 3:
        return True
    s = np.linalg.svd(pos - pos.mean(axis=0), compute_uv=False)
    return bool(s[1] <= tol * max(float(s[0]), 1.0))


def plane_normal(positions: np.ndarray, tol: float = 1e-9) -> np.ndarray | None:
    """Unit normal of the plane holding the (nominal) element positions, or None when
    they span three dimensions. A planar array cannot tell a direction from its mirror
    image across that plane (the two give the same steering vector)."""
    pos = _nominal(positions)
    if pos.shape[0] < 3:
        return None
    _, s, vt = np.linalg.svd(pos - pos.mean(axis=0))
    if s.size < 3 or s[2] <= tol * max(float(s[0]), 1.0):
        return vt[-1] if s.size >= 3 else np.cross(vt[0], vt[1])
    return None


def _fold(u: np.ndarray, normal: np.ndarray | None, side: float) -> np.ndarray:
    """Directions mirrored into the half-space ``side * (u . normal) >= 0`` (no change
    without a plane)."""
    if normal is None:
        return u
    h = u @ normal
    return u - 2.0 * np.where(side * h < 0, h, 0.0)[..., None] * normal


def sphere_directions(step_deg: float) -> np.ndarray:
    """Unit vectors (D, 3) covering the sphere about every ``step_deg`` degrees.

    A Fibonacci (golden-angle) lattice: D = ceil(4 pi / step^2) points of equal area,
    with no crowding at the poles (Gonzalez, "Measurement of areas on a sphere using
    Fibonacci and latitude-longitude lattices", Math. Geosci. 42, 2010).
    """
    if not 0 < step_deg <= 30:
        raise ValueError(f"step_deg must be in (0, 30] degrees, got {step_deg}")
    d = int(np.ceil(4 * np.pi / np.deg2rad(step_deg) ** 2))
    i = np.arange(d) + 0.5
    z = 1.0 - 2.0 * i / d
    phi = np.pi * (3.0 - np.sqrt(5.0)) * i
    r = np.sqrt(np.maximum(0.0, 1.0 - z * z))
    return np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=-1)


def tangent_frame(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors (..., 3) orthogonal to the unit vectors ``u`` and to each other:
    toward increasing azimuth and increasing elevation where those are defined, any
    orthonormal pair at the poles."""
    u = np.asarray(u, dtype=float)
    east = np.stack([u[..., 1], -u[..., 0], np.zeros(u.shape[:-1])], axis=-1)
    norm = np.linalg.norm(east, axis=-1, keepdims=True)
    polar = norm[..., 0] < 1e-12
    east = np.where(polar[..., None], np.array([1.0, 0.0, 0.0]),
                    east / np.where(norm > 0, norm, 1.0))
    return east, np.cross(east, u)


def direction_response(weights: np.ndarray, positions: np.ndarray, directions: np.ndarray,
                       gains: np.ndarray | None = None) -> np.ndarray:
    """Power response ``|w^H a(u)|^2`` (linear) toward unit vectors ``u``.

    weights (T, N); positions (N, 3) or (T, N, 3) wavelengths; directions (D, 3) shared
    by every trial, or (T, D, 3) per trial; gains optional (T, N). Returns (T, D).
    Computed in direction blocks to bound memory.
    """
    w = np.asarray(weights)
    if w.ndim != 2:
        raise ValueError(f"weights must be (trials, elements), got {w.shape}")
    t_, n = w.shape
    pos = np.asarray(positions, dtype=float)
    u = np.asarray(directions, dtype=float)
    wc = np.conj(w) if gains is None else np.conj(w) * np.asarray(gains)
    if pos.ndim == 3:
        flat = pos.reshape(-1, n, 3)
        if np.all(flat == flat[0]):
            pos = flat[0]
    d = u.shape[-2]
    out = np.empty((t_, d))
    step = max(1, _CUT_VALUES // max(1, n * (t_ if (pos.ndim == 3 or u.ndim == 3) else 1)))
    for lo in range(0, d, step):
        uu = u[..., lo:lo + step, :]
        if pos.ndim == 2 and uu.ndim == 2:
            a = _cis(2 * np.pi * (uu @ pos.T))                                # (d, N)
            out[:, lo:lo + step] = np.abs(wc @ a.T) ** 2
        else:
            uu = np.broadcast_to(uu, (t_,) + uu.shape[-2:])
            pp = np.broadcast_to(pos, (t_, n, 3))
            a = _cis(2 * np.pi * np.einsum("tdk,tnk->tdn", uu, pp))           # (T, d, N)
            out[:, lo:lo + step] = np.abs(np.einsum("tn,tdn->td", wc, a)) ** 2
    return out


def _cis(phase: np.ndarray) -> np.ndarray:
    """``exp(j phase)`` of a real array, as cos + j sin (cheaper than a complex exp)."""
    out = np.empty(phase.shape, dtype=complex)
    np.cos(phase, out=out.real)
    np.sin(phase, out=out.imag)
    return out


def _offset_directions(center: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Unit vectors at tangent-plane offsets (x, y) radians (gnomonic) from ``center``
    (T, 3): returns (T, len(x), 3)."""
    e1, e2 = tangent_frame(center)
    v = (center[:, None, :] + x[None, :, None] * e1[:, None, :]
         + y[None, :, None] * e2[:, None, :])
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def main_beam_peak_2d(weights: np.ndarray, positions: np.ndarray, look_azimuth: float,
                      look_elevation: float = 0.0, gains: np.ndarray | None = None,
                      beamwidth_deg: float | None = None, points: int = 25):
    """Direction (unit vector, (T, 3)) and power (dB, absolute) of the main-beam peak,
    searched in two dimensions.

    A ``points`` x ``points`` grid of tangent-plane offsets within +- one beamwidth
    (default as :func:`main_beam_peak`) of the look direction is sampled; the local
    maximum (over its 8 neighbours) nearest the look direction is refined by
    :func:`parabolic_peak` along each grid axis; with no interior maximum the highest
    sample is taken. weights (T, N).
    """
    if points < 5 or points % 2 == 0:
        raise ValueError(f"points must be odd and >= 5, got {points}")
    w = np.asarray(weights)
    bw = _default_beamwidth(positions, look_azimuth, look_elevation) \
        if beamwidth_deg is None else float(beamwidth_deg)
    if not bw > 0:
        raise ValueError(f"beamwidth must be > 0 degrees, got {beamwidth_deg}")
    t_ = w.shape[0]
    half = points // 2
    axis = np.tan(np.deg2rad(np.linspace(-bw, bw, points)))
    step = axis[half + 1] - axis[half]
    gx, gy = np.meshgrid(axis, axis, indexing="ij")                        # x: axis 0
    look = np.broadcast_to(geometry.direction_vector(look_azimuth, look_elevation), (t_, 3))
    dirs = _offset_directions(look, gx.ravel(), gy.ravel())
    pdb = to_db(direction_response(w, positions, dirs, gains)).reshape(t_, points, points)
    mid = pdb[:, 1:-1, 1:-1]
    is_max = np.ones(mid.shape, dtype=bool)
    for dx in (-1, 0, 1):
        for dy in (-1, 0, 1):
            if dx or dy:
                is_max &= mid >= pdb[:, 1 + dx:points - 1 + dx, 1 + dy:points - 1 + dy]
    ii, jj = np.meshgrid(np.arange(1, points - 1), np.arange(1, points - 1), indexing="ij")
    dist = np.where(is_max, (ii - half) ** 2 + (jj - half) ** 2, np.inf).reshape(t_, -1)
    found = np.isfinite(dist.min(axis=1))
    k = np.where(found, np.argmin(dist, axis=1),
                 np.argmax(pdb[:, 1:-1, 1:-1].reshape(t_, -1), axis=1))
    i, j = k // (points - 2) + 1, k % (points - 2) + 1
    r = np.arange(t_)
    ox, hx = parabolic_peak(pdb[r, i - 1, j], pdb[r, i, j], pdb[r, i + 1, j])
    oy, hy = parabolic_peak(pdb[r, i, j - 1], pdb[r, i, j], pdb[r, i, j + 1])
    x = axis[i] + ox * step
    y = axis[j] + oy * step
    height = np.maximum(hx, hy)
    # the edges too: a beam pushed out of the window peaks on its border
    top = np.argmax(pdb.reshape(t_, -1), axis=1)
    edge = ~found & (pdb.reshape(t_, -1)[r, top] > pdb[r, i, j])
    x = np.where(edge, axis[top // points], x)
    y = np.where(edge, axis[top % points], y)
    height = np.where(edge, pdb.reshape(t_, -1)[r, top], height)
    e1, e2 = tangent_frame(look)
    v = look + x[:, None] * e1 + y[:, None] * e2
    return v / np.linalg.norm(v, axis=-1, keepdims=True), height


def pointing_error_2d_deg(weights: np.ndarray, positions: np.ndarray, look_azimuth: float,
                          look_elevation: float = 0.0, gains: np.ndarray | None = None,
                          beamwidth_deg: float | None = None, points: int = 25,
                          peak=None) -> np.ndarray:
    """Main-beam pointing error in degrees: the angle between the 2-D main-beam peak
    (:func:`main_beam_peak_2d`, or ``peak``: its result computed before) and the look
    direction (>= 0); for a planar array the peak's mirror image on the look side of the
    array plane. Checkable fact: weights phase-steered to a direction u0 peak at u0 (the
    phased-array steering relation, antenna handbook), so the error is the angle between
    u0 and the look direction."""
    peak, _ = main_beam_peak_2d(weights, positions, look_azimuth, look_elevation, gains,
                                beamwidth_deg, points) if peak is None else peak
    look = geometry.direction_vector(look_azimuth, look_elevation)
    normal = plane_normal(positions)
    if normal is not None:       # a planar array's peak and its mirror image are one beam
        peak = _fold(peak, normal, 1.0 if look @ normal >= 0 else -1.0)
    return np.rad2deg(np.arccos(np.clip(peak @ look, -1.0, 1.0)))


def _main_lobe(pdb: np.ndarray, start: np.ndarray, valid: np.ndarray,
               wrap: bool, tol: float = 1e-9) -> np.ndarray:
    """The main lobe on a 2-D grid of responses ``pdb`` (T, A, B) dB: every valid cell
    reached from the peak cell ``start`` (T, 2) by steps to one of the 8 neighbours that
    never go up (more than ``tol``). A sidelobe's peak is a local maximum, so no such
    walk reaches it; the walk stops at the first nulls in every bearing. ``wrap``: the
    second axis is periodic (azimuth)."""
    t_, a_, b_ = pdb.shape
    region = np.zeros(pdb.shape, dtype=bool)
    region[np.arange(t_), start[:, 0], start[:, 1]] = True
    val = np.where(valid, pdb, np.inf)
    # neighbours by slicing a grid padded with one cell: -inf (never a source of a step)
    # beyond the edges, the opposite columns where the second axis wraps around
    mode = (("constant",) * 2) if not wrap else ("constant", "wrap")

    def padded(x, fill):
        x = np.pad(x, ((0, 0), (1, 1), (0, 0)), mode="constant", constant_values=fill)
        if mode[1] == "wrap":
            return np.pad(x, ((0, 0), (0, 0), (1, 1)), mode="wrap")
        return np.pad(x, ((0, 0), (0, 0), (1, 1)), mode="constant", constant_values=fill)

    while True:
        ref = padded(np.where(region, val, -np.inf), -np.inf)
        grown = region.copy()
        for da in (-1, 0, 1):
            for db in (-1, 0, 1):
                if da or db:   # neighbour (a - da, b - db) of each cell (a, b)
                    grown |= val <= ref[:, 1 - da:1 - da + a_, 1 - db:1 - db + b_] + tol
        grown &= valid
        if np.array_equal(grown, region):
            return region
        region = grown


def peak_sidelobe_2d_db(weights: np.ndarray, positions: np.ndarray, look_azimuth: float,
                        look_elevation: float = 0.0, gains: np.ndarray | None = None,
                        step_deg: float = 1.0, beamwidth_deg: float | None = None,
                        peak=None) -> np.ndarray:
    """Peak sidelobe level in dB relative to the main-beam peak, over every direction.

    Definition (the 2-D form of :func:`peak_sidelobe_db`): the response is sampled on a
    regular 2-D grid of spacing about ``step_deg``; the main lobe is every sample reached
    from the main-beam peak (:func:`main_beam_peak_2d`) by steps between neighbours that
    never go up, which ends at the first nulls in every bearing (:func:`_main_lobe`). The
    sidelobe level is the highest sample outside it, refined by :func:`parabolic_peak`
    along each grid axis, minus the peak power. Grating lobes count as sidelobes. NaN
    when nothing lies outside. For a planar array the grid spans the direction cosines
    in the array plane (the disc ``|rho| <= 1``: the pattern depends on nothing else,
    and a direction and its mirror image across the plane cannot be told apart); for a
    3-D array azimuth x elevation over the whole sphere. weights (T, N); ``peak``: the
    result of :func:`main_beam_peak_2d` when already computed.

    Checkable facts: for a uniform rectangular grid the array factor is the product of
    its row and column factors (Balanis, *Antenna Theory*, planar arrays), so the peak
    sidelobe is the higher of the two lines' first sidelobes; a dense uniform ring
    steered to its axis has the pattern J0, whose first sidelobe is -7.90 dB
    (|J0| = 0.4028 at the first zero of J1, 3.8317; Abramowitz and Stegun, table 9.5).
    """
    if not step_deg > 0:
        raise ValueError(f"step_deg must be > 0, got {step_deg}")
    w = np.asarray(weights)
    t_ = w.shape[0]
    peak, peak_db = main_beam_peak_2d(w, positions, look_azimuth, look_elevation, gains,
                                      beamwidth_deg) if peak is None else peak
    normal = plane_normal(positions)
    look = geometry.direction_vector(look_azimuth, look_elevation)
    dr = np.deg2rad(step_deg)
    if normal is not None:
        side = 1.0 if look @ normal >= 0 else -1.0
        b1, b2 = tangent_frame(normal)
        ax1 = np.arange(-1.0, 1.0 + dr / 2, dr)
        ax1 = ax1 - ax1.mean()
        ax2 = ax1
        g1, g2 = np.meshgrid(ax1, ax2, indexing="ij")
        valid = g1 ** 2 + g2 ** 2 <= 1.0
        z = np.sqrt(np.maximum(0.0, 1.0 - g1 ** 2 - g2 ** 2))
        dirs = g1[..., None] * b1 + g2[..., None] * b2 + side * z[..., None] * normal
        c1, c2 = peak @ b1, peak @ b2
        wrap = False
    else:
        ax1 = np.linspace(-90.0, 90.0, int(np.ceil(180.0 / step_deg)) + 1)      # elevation
        nb = int(np.ceil(360.0 / step_deg))
        ax2 = -180.0 + np.arange(nb) * (360.0 / nb)                              # azimuth
        g1, g2 = np.meshgrid(ax1, ax2, indexing="ij")
        valid = np.ones(g1.shape, dtype=bool)
        dirs = geometry.direction_vector(g2, g1)
        c1 = np.rad2deg(np.arcsin(np.clip(peak[:, 2], -1.0, 1.0)))
        c2 = np.rad2deg(np.arctan2(peak[:, 0], peak[:, 1]))
        wrap = True
    a_, b_ = g1.shape
    pdb = to_db(direction_response(w, positions, dirs.reshape(-1, 3), gains)).reshape(t_, a_, b_)
    pdb = np.where(valid, pdb, -np.inf)
    # the start: the highest valid sample within two cells of the refined peak
    i0 = np.clip(np.rint((c1 - ax1[0]) / (ax1[1] - ax1[0])).astype(np.int64), 0, a_ - 1)
    j0 = np.rint((c2 - ax2[0]) / (ax2[1] - ax2[0])).astype(np.int64)
    j0 = j0 % b_ if wrap else np.clip(j0, 0, b_ - 1)
    off = np.arange(-2, 3)
    ii = np.clip(i0[:, None, None] + off[None, :, None], 0, a_ - 1)
    jj = j0[:, None, None] + off[None, None, :]
    jj = jj % b_ if wrap else np.clip(jj, 0, b_ - 1)
    ii, jj = np.broadcast_arrays(ii, jj)
    near = pdb[np.arange(t_)[:, None, None], ii, jj].reshape(t_, -1)
    k = np.argmax(near, axis=1)
    start = np.stack([ii.reshape(t_, -1)[np.arange(t_), k],
                      jj.reshape(t_, -1)[np.arange(t_), k]], axis=-1)
    lobe = _main_lobe(pdb, start, valid[None] & np.isfinite(pdb), wrap)
    outside = valid[None] & ~lobe & np.isfinite(pdb)
    flat = np.where(outside, pdb, -np.inf).reshape(t_, -1)
    best = np.argmax(flat, axis=1)
    has = outside.reshape(t_, -1).any(axis=1)
    r = np.arange(t_)
    bi, bj = best // b_, best % b_
    level = flat[r, best]

    def at(i, j):
        ok = (i >= 0) & (i < a_)
        j = j % b_ if wrap else j
        ok &= (j >= 0) & (j < b_)
        v = pdb[r, np.clip(i, 0, a_ - 1), np.clip(j, 0, b_ - 1)]
        return np.where(ok, v, -np.inf)

    with np.errstate(invalid="ignore"):
        _, h1 = parabolic_peak(at(bi - 1, bj), level, at(bi + 1, bj))
        _, h2 = parabolic_peak(at(bi, bj - 1), level, at(bi, bj + 1))
    h1 = np.where(np.isfinite(h1), h1, level)
    h2 = np.where(np.isfinite(h2), h2, level)
    level = np.maximum(level, np.maximum(h1, h2))
    return np.where(has, level - peak_db, np.nan)
