"""Wideband (dispersive) sources, channel delay errors and space-time covariances.

Model (README, "wideband scenes"): with ``receiver.fractional_bandwidth`` B (complex
sample rate over carrier frequency) a plane wave from direction u reaches element n
delayed by ``p_n.u / f_c``; at baseband frequency f (cycles per snapshot, -1/2..1/2)
its phase is ``2 pi p_n.u (1 + f B)``. In the time domain element n sees the carrier
phase ``exp(j 2 pi p_n.u)`` (with the element gain: the steering entry ``a_n``) times
the source's complex envelope *advanced* by ``d_n = B p_n.u`` snapshots (plus the
channel's delay error, ``array.errors.channel_delay_rms``, clipped at 4 rms; and, with
``array.errors.channel_ripple_rms``, through a 3-tap channel filter ``[e_-1, 1, e_+1]``
per channel and trial, applied to the sources and not to the noise)::

    x_n[k] = a_n s(k + d_n)

Noise-like sources (gaussian, bpsk, qpsk) are a white sequence ``s_m`` (the source's
own counter-based normal stream, as in the narrowband model) turned into a band-limited
process by a windowed-sinc FIR, one per element, that also applies the fractional
advance::

    s(k + d) = sum_{j=-K..K} h(j + d) s_{k-j},
    h(t) = sqrt(b) sinc(b t) exp(j 2 pi o t) w(t / H) / g

with b the band (``bandwidth``, default 1 = the whole sampled band), o its centre
(``offset``), w a Kaiser window (beta :data:`KAISER_BETA`) of half-length
``H = ceil(HALF / b)`` taps, K = H plus the largest possible integer delay, and g the
norm of the undelayed filter (unit power). A block needs ``s`` over
``[start - K, start + size + K)``: those numbers are read from the counter-based stream
directly (normals ``2 (m + K)`` and ``2 (m + K) + 1`` for ``s_m``), so blocks carry no
state, are block-size invariant (each output is the same sum over j in the same order)
and bit-identical across threads and workers; memory is bounded by the block.
Tones are exact: ``exp(j (2 pi f (k + d_n) + phi))``; a chirp is evaluated at the
fractional time ``k + d_n``.

True covariances (for scoring), exact for the filters as generated (finite sums, no
quadrature): with the stacked space-time snapshot ``z_k = [x_k; x_{k-1}; ...;
x_{k-L+1}]`` (entry ``l N + n`` is element n delayed by l snapshots) a noise-like source
contributes ``R[lN+n, mN+n'] = P a_n a_n'^* sum_j h_n[j] conj(h_n'[j + l - m])``;
a tone of frequency f0 the rank-one ``P v v^H``, ``v[lN+n] = a_n exp(j 2 pi f0 (d_n -
l))``; a chirp, whose spectrum over a period is flat across its sweep, the sinc kernel
``P a_n a_n'^* exp(j 2 pi f_c tau) sinc(W tau)``, ``tau = d_n - d_n' - (l - m)`` (an
approximation: a chirp is not stationary). As the filter grows the noise-like kernel
tends to the ideal flat-band sinc kernel (tested against quadrature).

Sources: the broadband array model and space-time (tapped-delay-line) covariance,
Van Trees, *Optimum Array Processing* (2002), broadband chapter; Compton, "The
bandwidth performance of a two-element adaptive array with tapped delay-line
processing", IEEE Trans. AP-36 (1988) (from memory); windowed-sinc fractional delays
and the Kaiser window, Laakso, Valimaki, Karjalainen and Laine, "Splitting the unit
delay", IEEE Signal Processing Magazine (1996).
"""
from __future__ import annotations

import math

import numpy as np

from adapt.numerics.fir import filter_bank
from adapt.scene import geometry
from adapt.streams import normals
from adapt.streams.seeding import trial_generators

__all__ = ["HALF", "KAISER_BETA", "half_length", "reach", "element_delays", "filter_taps",
           "draw_channel_delays", "draw_channel_filters", "source_block", "space_time_covariance",
           "direction_covariance", "TapLine", "delay_spread", "expected_eigenvalues"]

#: half-length in taps of the full-band filter's window (a band b uses HALF / b)
HALF = 32
#: Kaiser window shape (sidelobes near -70 dB)
KAISER_BETA = 7.0
#: spawn keys of the channel delay errors' and channel filters' per-trial generators
CHANNEL_KEY = 2
RIPPLE_KEY = 3
_NOISE_LIKE = ("gaussian", "bpsk", "qpsk")


def half_length(bandwidth: float | None) -> int:
    """Window half-length H (taps) of a source's filter: ``ceil(HALF / b)``."""
    return int(math.ceil(HALF / (1.0 if bandwidth is None else float(bandwidth))))


def _max_delay(scene) -> float:
    """Largest |d_n| any trial can have, snapshots: B max|p_n| (position errors at most
    1 wavelength more) plus 4 rms of the channel delay error."""
    fb = scene.receiver.fractional_bandwidth or 0.0
    radius = float(np.max(np.linalg.norm(scene.array.positions, axis=1)))
    if scene.array.errors.position_rms:
        radius += 1.0
    return fb * radius + 4.0 * scene.array.errors.channel_delay_rms


def reach(scene, source) -> int:
    """K: the filter of ``source`` spans taps -K .. K."""
    ripple = 1 if scene.array.errors.channel_ripple_rms else 0
    return half_length(source.bandwidth) + int(math.ceil(_max_delay(scene))) + ripple


def draw_channel_delays(batch) -> np.ndarray:
    """(T, N) per-channel delay errors of every trial, snapshots (zeros without
    ``channel_delay_rms``), from ``SeedSequence(seed, spawn_key=(i, CHANNEL_KEY))``,
    normal with the given rms, clipped at 4 rms."""
    sc = batch.scene
    n = sc.elements
    rms = sc.array.errors.channel_delay_rms
    out = np.zeros((batch.trials, n))
    if not rms:
        return out
    for t, g in enumerate(trial_generators(batch.seed, batch.trial_indices, CHANNEL_KEY)):
        g.standard_normal(out=out[t])
    return np.clip(out, -4.0, 4.0) * rms


def draw_channel_filters(batch) -> np.ndarray | None:
    """(T, N, 3) per-channel filters ``[e_-1, 1, e_+1]`` (taps for j = -1, 0, 1 of
    ``x[k] = sum_j c_j y[k - j]``), the outer taps circular complex normal with rms
    ``channel_ripple_rms``, from ``SeedSequence(seed, spawn_key=(i, RIPPLE_KEY))``;
    None without ripple."""
    sc = batch.scene
    rms = sc.array.errors.channel_ripple_rms
    if not rms:
        return None
    n = sc.elements
    z = np.empty((batch.trials, 4 * n))
    for t, g in enumerate(trial_generators(batch.seed, batch.trial_indices, RIPPLE_KEY)):
        g.standard_normal(out=z[t])
    e = (z[:, :2 * n] + 1j * z[:, 2 * n:]).reshape(batch.trials, n, 2) * (rms / np.sqrt(2))
    out = np.ones((batch.trials, n, 3), dtype=complex)
    out[:, :, 0], out[:, :, 2] = e[:, :, 0], e[:, :, 1]
    return out


def _with_channel(h: np.ndarray, c: np.ndarray | None) -> np.ndarray:
    """Taps h (..., D, 2K+1) followed by channel filters c (T, D, 3) broadcast on the
    leading axis: (..., D, 2K+3), j = -K-1 .. K+1."""
    if c is None:
        return h
    c = c.reshape(c.shape[:1] + (1,) * (h.ndim - 3) + c.shape[1:])
    out = np.zeros(h.shape[:-1] + (h.shape[-1] + 2,), dtype=complex)
    for q in range(3):
        out[..., q:q + h.shape[-1]] += c[..., q:q + 1] * h
    return out


def _channel_response(c: np.ndarray | None, f: float) -> np.ndarray | float:
    """(T, N) response of the channel filters at frequency f (1 without ripple)."""
    if c is None:
        return 1.0
    return c @ np.exp(-2j * np.pi * f * np.arange(-1, 2))


def element_delays(batch, source: int, k=None) -> np.ndarray:
    """Advances d_n (snapshots) of ``source`` at every element: (T, N) at snapshot 0,
    or (T, len(k), N). ``B p_n.u`` with the trial's true positions, plus the channel
    delay errors."""
    sc = batch.scene
    src = sc.sources[source]
    fb = sc.receiver.fractional_bandwidth or 0.0
    kk = np.atleast_1d(np.asarray(0 if k is None else k))
    u = geometry.direction_vector(*src.direction(kk))                       # (M, 3)
    d = fb * (batch.positions[:, None, :, :] * u[None, :, None, :]).sum(-1)  # (T, M, N)
    d = d + batch.channel_delays[:, None, :]
    return d[:, 0, :] if k is None else d


def _kaiser(x: np.ndarray) -> np.ndarray:
    inside = np.abs(x) < 1.0
    arg = np.sqrt(np.clip(1.0 - x * x, 0.0, None))
    return np.where(inside, np.i0(KAISER_BETA * arg) / np.i0(KAISER_BETA), 0.0)


def filter_taps(delays: np.ndarray, bandwidth: float | None, offset: float, reach_: int,
                half: int | None = None) -> np.ndarray:
    """Taps ``h(j + d)`` for j = -K..K (last axis, 2K + 1) for every advance d in
    ``delays`` (any shape), unit power for d = 0 (see the module docstring)."""
    b = 1.0 if bandwidth is None else float(bandwidth)
    h_len = half_length(bandwidth) if half is None else int(half)
    j = np.arange(-reach_, reach_ + 1, dtype=float)

    def taps(t):
        return (np.sqrt(b) * np.sinc(b * t) * np.exp(2j * np.pi * offset * t)
                * _kaiser(t / h_len))

    gain = math.sqrt(float(np.sum(np.abs(taps(j)) ** 2)))
    t = np.asarray(delays, dtype=float)[..., None] + j
    return taps(t) / gain


def _white(keys, kind: str, first: int, count: int) -> np.ndarray:
    """(T, count) unit-power white sequence values s_m, m = first .. first + count - 1
    (stream positions shifted so that they are >= 0 by the caller): gaussian from
    normals 2m, 2m+1; bpsk the sign of normal 2m; qpsk the signs of both."""
    t_ = keys.shape[0]
    z = np.empty((t_, count, 2))
    normals.fill(keys, 2 * first, z.reshape(t_, 2 * count))
    if kind == "gaussian":
        return z.view(np.complex128)[..., 0] * np.sqrt(0.5)
    sym = np.where(z >= 0, 1.0, -1.0)
    if kind == "bpsk":
        return sym[..., 0].astype(complex)
    return (sym[..., 0] + 1j * sym[..., 1]) * np.sqrt(0.5)


def _chirp_phase(wf, t: np.ndarray) -> np.ndarray:
    m = np.mod(t, wf.period)
    return 2 * np.pi * (wf.start * m + 0.5 * (wf.stop - wf.start) * m * m / wf.period)


def source_block(batch, source: int, keys, start: int, size: int,
                 delays: np.ndarray, channels: np.ndarray | None = None) -> np.ndarray:
    """(T, B, D) unit-power envelopes ``s(k + d)`` of ``source`` for snapshots
    ``start .. start + size - 1`` at each of the D advances ``delays`` (T, D) (without
    the steering entries, power or gate), through the channel filters ``channels``
    (T, D, 3) when given. D = 1 with zero delay is the reference at the array origin."""
    sc = batch.scene
    src = sc.sources[source]
    wf = src.waveform
    t_ = batch.trials
    delays = np.broadcast_to(delays, (t_, delays.shape[-1]))
    k = np.arange(start, start + size, dtype=float)
    if wf.kind in _NOISE_LIKE:
        kr = reach(sc, src)
        ripple = 1 if sc.array.errors.channel_ripple_rms else 0
        h = filter_taps(delays, src.bandwidth, src.offset, kr - ripple)
        if ripple:                       # (T, D, 2K+1), the channel filters included
            h = _with_channel(h, channels) if channels is not None else \
                np.concatenate([np.zeros(h.shape[:-1] + (1,)), h,
                                np.zeros(h.shape[:-1] + (1,))], axis=-1)
        # s_m for m in [start - K, start + size + K): stream index m + K >= 0
        s = _white(keys, wf.kind, start, size + 2 * kr)                      # (T, B + 2K)
        # s_{k - j} sits at column (k - start) + K - j: tap i = j + K reads column
        # (k - start) + 2K - i, as filter_bank sums (in increasing i)
        return filter_bank(h, s, size)
    phi0 = batch.start_phases[:, source][:, None, None]
    t = k[None, :, None] + delays[:, None, :]

    def at(tt):
        if wf.kind == "tone":
            return np.exp(1j * (2 * np.pi * wf.frequency * tt + phi0))
        return np.exp(1j * (_chirp_phase(wf, tt) + phi0))

    if channels is None:
        return at(t)
    return sum(channels[:, None, :, q] * at(t - (q - 1)) for q in range(3))


def _lag_matrix(c: dict, taps: int, n: int, lead: tuple) -> np.ndarray:
    """Assemble R[lN+n, mN+n'] = C_{l-m}[n, n'] from lag blocks c[q] (..., N, N)."""
    out = np.empty(lead + (taps * n, taps * n), dtype=complex)
    for l_ in range(taps):
        for m in range(taps):
            out[..., l_ * n:(l_ + 1) * n, m * n:(m + 1) * n] = c[l_ - m]
    return out


def _kernel(source, delays: np.ndarray, taps: int, scene,
            channels: np.ndarray | None = None) -> np.ndarray:
    """Unit-power space-time kernel (..., NL, NL) of one source's envelope at the
    elements with advances ``delays`` (..., N) through the channel filters ``channels``
    (T, N, 3) if any, before the steering entries. Tones: exact; chirps: the channels'
    response at the sweep's centre (approximate)."""
    wf = source.waveform
    n = delays.shape[-1]
    lead = delays.shape[:-1]
    if wf.kind in _NOISE_LIKE:
        if not scene.wideband:             # the narrowband model: s_k itself
            c = {0: np.ones(lead + (n, n), dtype=complex)}
            zero = np.zeros(lead + (n, n), dtype=complex)
            c.update({q: zero for q in range(-taps + 1, taps) if q})
            return _lag_matrix(c, taps, n, lead)
        ripple = 1 if scene.array.errors.channel_ripple_rms else 0
        h = filter_taps(delays, source.bandwidth, source.offset,
                        reach(scene, source) - ripple)
        h = _with_channel(h, channels)
        size = h.shape[-1]
        c = {}
        for q in range(taps):
            # sum_j h_n[j] conj(h_n'[j + q])
            c[q] = np.einsum("...aj,...bj->...ab", h[..., :size - q], np.conj(h[..., q:]))
            if q:
                c[-q] = np.conj(np.swapaxes(c[q], -1, -2))
        return _lag_matrix(c, taps, n, lead)
    lag = np.repeat(np.arange(taps), n)                                   # l of entry lN+n
    dd = np.tile(delays, (1,) * len(lead) + (taps,))                       # d_n of entry lN+n
    tau = dd[..., :, None] - dd[..., None, :] - (lag[:, None] - lag[None, :])
    if wf.kind == "tone":
        out = np.exp(2j * np.pi * wf.frequency * tau)
        centre = wf.frequency
    else:
        lo, hi = sorted((wf.start, wf.stop))
        out = np.exp(1j * np.pi * (lo + hi) * tau) * np.sinc((hi - lo) * tau)
        centre = 0.5 * (lo + hi)
    if channels is None:
        return out
    g = _channel_response(channels, centre)                               # (T, N)
    g = np.tile(g.reshape(g.shape[:1] + (1,) * (len(lead) - 1) + g.shape[1:]),
                (1,) * len(lead) + (taps,))
    return out * g[..., :, None] * np.conj(g[..., None, :])


def _steered(kernel: np.ndarray, a: np.ndarray, taps: int) -> np.ndarray:
    st = np.tile(a, (1,) * (a.ndim - 1) + (taps,))
    return kernel * st[..., :, None] * np.conj(st[..., None, :])


def source_covariance(batch, source: int, taps: int, kk: np.ndarray,
                      unit: bool = False) -> np.ndarray:
    """(T, M, NL, NL) space-time covariance of one source (power and gate included;
    ``unit``: unit power, always on) at snapshot indices kk."""
    sc = batch.scene
    src = sc.sources[source]
    a = batch.steering(source, kk)                                          # (T, M, N)
    d = element_delays(batch, source, kk)                                   # (T, M, N)
    r = _steered(_kernel(src, d, taps, sc, batch.channel_filters), a, taps)
    if unit:
        return r
    p = src.power * src.active(kk).astype(float)
    return r * p[None, :, None, None]


def space_time_covariance(batch, taps: int, k=None, kind: str = "interference") -> np.ndarray:
    """True space-time covariance of the stacked snapshots ``[x_k; ...; x_{k-L+1}]``.

    Parameters
    ----------
    batch : the :class:`~adapt.streams.snapshots.TrialBatch`.
    taps : L, snapshots per element in the stacked vector (1: the spatial covariance).
    k : snapshot indices (None: snapshot 0 and no moment axis).
    kind : ``interference`` (interference plus noise), ``training`` (adds the wanted
        source when the scene trains with it present), ``data`` (everything) or
        ``signal`` (the wanted source alone, no noise).

    Returns
    -------
    (T, M, NL, NL) complex, or (T, NL, NL) for ``k`` None.
    """
    sc = batch.scene
    kk = np.atleast_1d(np.asarray(0 if k is None else k))
    n = sc.elements
    dim = n * taps
    r = np.zeros((batch.trials, len(kk), dim, dim), dtype=complex)
    if kind != "signal":
        r += np.eye(dim)
    members = [] if kind == "signal" else list(sc.interferer_indices)
    if kind == "signal" or kind == "data" or (kind == "training" and sc.training == "signal"):
        members.append(sc.desired_index)
    for i in members:
        r += source_covariance(batch, i, taps, kk)
    return r[:, 0] if k is None else r


def direction_covariance(batch, azimuth: float, elevation: float, taps: int) -> np.ndarray:
    """(T, NL, NL) space-time covariance of a unit-power source, white over the whole
    band, from a fixed direction (the true array): the reference for band-averaged
    responses (``w^H R w`` is the response averaged over the band)."""
    from adapt.scene.model import Source
    sc = batch.scene
    src = Source(name="", role="interferer", azimuth=azimuth, elevation=elevation,
                 power_db=0.0)
    u = geometry.direction_vector(azimuth, elevation)
    fb = sc.receiver.fractional_bandwidth or 0.0
    d = fb * (batch.positions * u).sum(-1) + batch.channel_delays             # (T, N)
    a = batch.steering_toward(azimuth, elevation)
    return _steered(_kernel(src, d, taps, sc, batch.channel_filters), a, taps)


class TapLine:
    """Stacks a stream of blocks (T, B, N) into space-time snapshots (T, B, N L),
    ``z_k = [x_k; x_{k-1}; ...; x_{k-L+1}]`` (entry ``l N + n``), carrying the last
    L - 1 snapshots across blocks (zeros before the stream starts: prewindowed), so the
    result does not depend on the block size."""

    def __init__(self, taps: int):
        self.taps = int(taps)
        self.history: np.ndarray | None = None

    def __call__(self, x: np.ndarray) -> np.ndarray:
        lag = self.taps - 1
        if not lag:
            return x
        t_, b, n = x.shape
        if self.history is None:
            self.history = np.zeros((t_, lag, n), dtype=x.dtype)
        full = np.concatenate([self.history, x], axis=1)                   # (T, lag + B, N)
        out = np.empty((t_, b, n * self.taps), dtype=np.result_type(x, complex))
        for l_ in range(self.taps):
            out[:, :, l_ * n:(l_ + 1) * n] = full[:, lag - l_: lag - l_ + b]
        self.history = full[:, b:].copy()
        return out


def delay_spread(scene) -> float:
    """The aperture's largest delay difference in snapshots, ``B x aperture`` (0 for a
    narrowband scene)."""
    fb = scene.receiver.fractional_bandwidth or 0.0
    return float(fb * geometry.aperture(scene.array.positions))


def expected_eigenvalues(scene, source) -> float:
    """About ``1 + 2 W T`` significant eigenvalues of one noise-like source on the
    N-element array (and about that many more per extra tap spanned by its delays):
    W its band in cycles per snapshot, T its delay spread across the aperture in
    snapshots (the time-bandwidth product of the prolate spheroidal concentration
    problem; Slepian, "Prolate spheroidal wave functions ... V", Bell Syst. Tech. J.
    57, 1978)."""
    if source.waveform.kind not in _NOISE_LIKE:
        return 1.0
    fb = scene.receiver.fractional_bandwidth or 0.0
    u = geometry.direction_vector(source.azimuth, source.elevation)
    proj = scene.array.positions @ u
    spread = fb * float(np.ptp(proj)) if proj.size else 0.0
    w = 1.0 if source.bandwidth is None else float(source.bandwidth)
    return 1.0 + 2.0 * w * spread
