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

from adapt.numerics.linalg import solve_hermitian
from adapt.scene import geometry

__all__ = ["output_sinr", "optimum_sinr", "normalised_sinr", "loss_db", "to_db",
           "white_noise_gain", "white_noise_gain_db", "array_gain", "response_db",
           "responses_db", "loss_db_of", "mean_loss_db",
           "fraction_meeting", "first_checkpoint", "snapshots_to_target", "trial_summary",
           "azimuth_cut", "main_beam_peak", "pointing_error_deg", "peak_sidelobe_db",
           "parabolic_peak"]


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
    return first_checkpoint(c, mean_ok), first_checkpoint(c, frac_ok)


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
