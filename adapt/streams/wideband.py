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
l))``; a chirp, which is deterministic up to its start phase and repeats every P
snapshots, its mean over a period, ``R[lN+n, mN+n'] = P a_n a_n'^* (1/P) sum_{k<P}
c(k + d_n - l) conj(c(k + d_n' - m))`` (channel taps as extra terms), summed in closed
form (:func:`chirp_period_mean`): exact for the samples as generated, what the sample
covariance of any whole number of periods equals (tested to rounding). As the filter
grows the noise-like kernel tends to the ideal flat-band sinc kernel (tested against
quadrature).

The narrowband model's other effects, in the same terms:

* Moving sources, coherent copies and copied sources use the polynomial (Farrow) form
  of the same filters (:func:`polynomial_coefficients`): segment i of h, ``h(i + phi)``
  for ``0 <= phi < 1``, is a polynomial of degree :data:`DEGREE` in ``x = 2 phi - 1``, so
  an advance d (``D = floor(d)``) gives ``s(k + d) = sum_p x^p v_p[k + D]`` with the fixed
  filters ``v_p[m] = sum_i c_p[i] s_{m-i}`` run over the stream. d may then change from
  snapshot to snapshot (a moving source: ``d_n(k) = B p_n.u(k)``, the steering entry
  ``a_n(k)`` too) and a copy reads its origin's stream at ``d - delay`` (a copy's
  ``delay``, snapshots). The truth at checkpoint k takes stacked entry ``l N + n`` at
  snapshot ``k - l`` (its own direction), as a finite sum of the same taps; the
  sources sharing a waveform add with their cross terms (coherent groups, the
  narrowband convention).
* Mutual coupling (``array.coupling``, frequency flat): ``x = C y`` on every source's
  element outputs y (after the delays and channel filters, before the noise is
  added); every lag block ``R(tau) -> C R(tau) C^H``; the noise is not coupled.
* Noise fields: the thermal spread and a ``white`` field are white in time (their
  spatial covariance at lag 0 only); an isotropic or cylindrical field is dispersive,
  ``sum_j A_j z_{k-j}`` from white streams with taps designed from the coherence at
  ``(1 + f B)`` times the separations (:func:`diffuse_filters`), its lags in the
  truth (:func:`noise_space_time`).

Sources: the broadband array model and space-time (tapped-delay-line) covariance,
Van Trees, *Optimum Array Processing* (2002), broadband chapter; Compton, "The
bandwidth performance of a two-element adaptive array with tapped delay-line
processing", IEEE Trans. AP-36 (1988) (from memory); windowed-sinc fractional delays
and the Kaiser window, Laakso, Valimaki, Karjalainen and Laine, "Splitting the unit
delay", IEEE Signal Processing Magazine (1996); the polynomial form, Farrow, "A
continuously variable digital delay element", ISCAS 1988 (from memory); mutual coupling,
Friedlander and Weiss, IEEE Trans. AP-39 (1991); diffuse noise coherence, Cox, JASA 54
(1973).
"""
from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np

from adapt.numerics.fir import filter_bank
from adapt.scene import elements, geometry
from adapt.scene.geometry import diffuse_coherence
from adapt.scene.model import COPY
from adapt.streams import normals
from adapt.streams.seeding import trial_generators

__all__ = ["HALF", "KAISER_BETA", "DEGREE", "DIFFUSE_GRID", "half_length", "reach",
           "element_delays", "filter_taps", "draw_channel_delays", "draw_channel_filters",
           "source_filters", "white_block", "noise_like", "source_block",
           "space_time_covariance", "direction_covariance", "TapLine", "PushedBlock",
           "delay_spread", "expected_eigenvalues", "uses_polynomial_filters",
           "polynomial_coefficients", "polynomial_block", "stream_offset",
           "diffuse_filters", "diffuse_block", "noise_space_time", "source_covariance"]

#: half-length in taps of the full-band filter's window (a band b uses HALF / b)
HALF = 32
#: Kaiser window shape (sidelobes near -70 dB)
KAISER_BETA = 7.0
#: spawn keys of the channel delay errors' and channel filters' per-trial generators
CHANNEL_KEY = 2
RIPPLE_KEY = 3
_NOISE_LIKE = ("gaussian", "bpsk", "qpsk")
#: degree, in the fractional delay, of the polynomial each filter segment is for the
#: sources whose delays change (moving) or that share a waveform (copies and their
#: origins): a Farrow structure; the segments match the windowed sinc to about 1e-13
DEGREE = 13
#: frequencies of the grid on which a dispersive diffuse noise field's filter is
#: designed (its taps are the grid's inverse transform, windowed)
DIFFUSE_GRID = 256
#: values of one temporary array of the truth's polynomial path (chunked over moments)
_TRUTH_VALUES = 1 << 22
#: stream value at negative position p is value WRAP + p (normals 2 (WRAP + p) and the
#: next): 2**61, beyond any stream a run can read forward, within the counters' range
WRAP = 1 << 61


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
    """(T, count) unit-power white sequence values at stream positions ``first .. first
    + count - 1``: gaussian from normals 2p, 2p+1; bpsk the sign of normal 2p; qpsk the
    signs of both. A negative position p (values before the fixed filters' reach, read
    only by a delayed copy or a polynomial filter's margin) is value ``WRAP + p``: far
    beyond any stream's end, so it never meets a forward value and depends on p alone."""
    t_ = keys.shape[0]
    z = np.empty((t_, count, 2))
    if first >= 0:
        normals.fill(keys, 2 * first, z.reshape(t_, 2 * count))
    else:
        early = min(count, -first)
        head = np.empty((t_, 2 * early))
        normals.fill(keys, 2 * (WRAP + first), head)
        z[:, :early] = head.reshape(t_, early, 2)
        if count > early:
            tail = np.empty((t_, 2 * (count - early)))
            normals.fill(keys, 0, tail)
            z[:, early:] = tail.reshape(t_, count - early, 2)
    if kind == "gaussian":
        return z.view(np.complex128)[..., 0] * np.sqrt(0.5)
    sym = np.where(z >= 0, 1.0, -1.0)
    if kind == "bpsk":
        return sym[..., 0].astype(complex)
    return (sym[..., 0] + 1j * sym[..., 1]) * np.sqrt(0.5)


def _chirp_phase(wf, t: np.ndarray) -> np.ndarray:
    m = np.mod(t, wf.period)
    return 2 * np.pi * (wf.start * m + 0.5 * (wf.stop - wf.start) * m * m / wf.period)


#: time offsets within this many snapshots of a whole number are taken as whole by
#: chirp_period_mean: the streams add an offset to the snapshot index in floating
#: point, which rounds a geometric zero (the 1e-17 left by a cosine of 90 degrees) to
#: the index itself, so the sample then sits at the start of its period, not the end
WHOLE_OFFSET = 1e-12
#: pair entries worked out at a time by _chirp_kernel (bounds its temporaries)
_CHIRP_VALUES = 1 << 17


def _whole_if_near(t: np.ndarray) -> np.ndarray:
    r = np.round(t)
    return np.where(np.abs(t - r) <= WHOLE_OFFSET, r, t)


def chirp_period_mean(wf, ta, tb) -> np.ndarray:
    """``(1/P) sum_{k=0}^{P-1} c(k + ta) conj(c(k + tb))`` for the unit chirp ``c(t) =
    exp(j phi(t mod P))``, ``phi(m) = 2 pi (f0 m + (f1 - f0) m^2 / (2 P))`` (``wf``:
    start f0, stop f1, whole period P), at the real time offsets ``ta``, ``tb``
    (broadcast together): the chirp's average over one period of its sweep, the exact
    mean of ``x_k x_k^H`` over any P consecutive snapshots (the summand has period P in
    k), whatever the start phase. In closed form, exact for any P: over one period
    ``k + ta`` and ``k + tb`` each cross one period boundary, which cuts the sum into
    at most three runs on which both sit in fixed periods; on such a run the phase
    difference ``phi(m_a) - phi(m_b) = 2 pi D (f0 + c (m_a + m_b))`` (``D = m_a - m_b``,
    ``c = (f1 - f0) / (2 P)``) is linear in k, so each run is a geometric sum
    ``e^{j(A + B (a + b - 1)/2)} sin(n B/2) / sin(B/2)``, evaluated with ``B/2``
    reduced to within pi/2 of 0 (the ratio then stays accurate near its poles).
    Offsets within :data:`WHOLE_OFFSET` of a whole number are taken as whole, as the
    streams' floating-point times ``k + t`` round them. Tested against the direct sum
    over the period and against the streams' samples."""
    p = int(wf.period)
    f0, f1 = float(wf.start), float(wf.stop)
    c = (f1 - f0) / (2.0 * p)
    ta, tb = np.broadcast_arrays(_whole_if_near(np.asarray(ta, dtype=float)),
                                 _whole_if_near(np.asarray(tb, dtype=float)))
    pa, pb = np.floor(ta / p), np.floor(tb / p)
    # the first k >= 0 at which k + ta (k + tb) is in the next period: 1 .. P
    ka = np.clip(np.ceil((pa + 1) * p - ta), 0, p)
    kb = np.clip(np.ceil((pb + 1) * p - tb), 0, p)
    k1, k2 = np.minimum(ka, kb), np.maximum(ka, kb)
    a_first = ka <= kb
    runs = ((0.0, k1, pa, pb),
            (k1, k2, np.where(a_first, pa + 1, pa), np.where(a_first, pb, pb + 1)),
            (k2, float(p), pa + 1, pb + 1))
    total = np.zeros(ta.shape, dtype=complex)
    for lo, hi, pu, pv in runs:
        n = hi - lo
        d = (ta - tb) - (pu - pv) * p                 # m_a - m_b on this run
        big_a = 2 * np.pi * d * (f0 + c * (ta + tb - (pu + pv) * p))
        half = 2 * np.pi * c * d                      # B / 2
        turns = np.round(half / np.pi)
        x = half - turns * np.pi                      # |x| <= pi / 2
        safe = np.where(x == 0.0, 1.0, np.sin(x))
        ratio = np.where(x == 0.0, n, np.sin(n * x) / safe)
        sign = np.where(np.mod(turns * (n - 1), 2.0) == 1.0, -1.0, 1.0)
        total += np.exp(1j * (big_a + 2 * half * (lo + 0.5 * (n - 1)))) * (sign * ratio)
    return total / p


def _chirp_kernel(wf, terms) -> np.ndarray:
    """``sum_{q,q'} g_q g_q'^* chirp_period_mean(tau_q, tau_q')`` over the stacked
    entries: ``terms`` a list of (gain, offset) pairs, gain (..., E) complex (or a
    scalar) and offset (..., E) (the entry's time offset ``tau``: element e of the
    stacked snapshot at k is ``sum_q g_q c(k + tau_q)``, the start phase aside);
    (..., E, E). Worked out once per distinct set of gains and offsets (the same for
    every checkpoint of a still source, and for every trial of a shared array), each
    entry by the same elementwise steps, so the values do not depend on the batch."""
    lead = np.broadcast_shapes(*[np.shape(g)[:-1] for g, _ in terms if np.ndim(g)],
                               *[np.shape(t)[:-1] for _, t in terms])
    e = np.shape(terms[0][1])[-1]
    flat = [(np.broadcast_to(np.asarray(g, dtype=complex), lead + (e,)).reshape(-1, e),
             np.broadcast_to(np.asarray(t, dtype=float), lead + (e,)).reshape(-1, e))
            for g, t in terms]
    key = np.concatenate([np.concatenate([g.real, g.imag, t], axis=1) for g, t in flat],
                         axis=1)
    _, first, back = np.unique(key, axis=0, return_index=True, return_inverse=True)
    out = np.zeros((len(first), e, e), dtype=complex)
    step = max(1, _CHIRP_VALUES // (e * e))
    for lo in range(0, len(first), step):
        rows = first[lo:lo + step]
        part = out[lo:lo + step]
        for ga, ta in flat:
            for gb, tb in flat:
                part += ga[rows, :, None] * np.conj(gb[rows, None, :]) * chirp_period_mean(
                    wf, ta[rows, :, None], tb[rows, None, :])
    return out[np.ravel(back)].reshape(lead + (e, e))


def _deterministic(wf, tt: np.ndarray, phi0) -> np.ndarray:
    """A tone's or chirp's unit envelope at the (fractional) times ``tt``."""
    if wf.kind == "tone":
        return np.exp(1j * (2 * np.pi * wf.frequency * tt + phi0))
    return np.exp(1j * (_chirp_phase(wf, tt) + phi0))


def source_filters(batch, source: int, delays: np.ndarray,
                   channels: np.ndarray | None = None) -> np.ndarray:
    """Taps (T or 1, D, 2K + 1) of a noise-like ``source`` at each of the D advances
    ``delays`` (T, D) (:func:`filter_taps`), through the channel filters ``channels``
    (T, D, 3) when given (with channel ripple and no ``channels``: the same taps padded
    with a zero at each end, so that every filter of the scene has one length); one
    row (1, D, 2K + 1) when every trial has the same delays and no channel filters
    (each tap is computed element by element: the same numbers either way)."""
    sc = batch.scene
    src = sc.sources[source]
    delays = np.broadcast_to(delays, (batch.trials, delays.shape[-1]))
    ripple = 1 if sc.array.errors.channel_ripple_rms else 0
    if (channels is None or not ripple) and np.all(delays == delays[:1]):
        delays = delays[:1]
    h = filter_taps(delays, src.bandwidth, src.offset, reach(sc, src) - ripple)
    if ripple:                           # (T, D, 2K+1), the channel filters included
        h = _with_channel(h, channels) if channels is not None else \
            np.concatenate([np.zeros(h.shape[:-1] + (1,)), h,
                            np.zeros(h.shape[:-1] + (1,))], axis=-1)
    return h


def white_block(batch, source: int, keys, start: int, size: int) -> np.ndarray:
    """(T, size + 2K) the white sequence ``s_m`` of a noise-like ``source`` that the
    outputs of snapshots ``start .. start + size - 1`` read, m in [start - K, start +
    size + K) (stream index m + K >= 0)."""
    sc = batch.scene
    src = sc.sources[source]
    kr = reach(sc, src)
    return _white(keys, src.waveform.kind, start, size + 2 * kr)


def source_block(batch, source: int, keys, start: int, size: int,
                 delays: np.ndarray, channels: np.ndarray | None = None,
                 filters=None) -> np.ndarray:
    """(T, B, D) unit-power envelopes ``s(k + d)`` of ``source`` for snapshots
    ``start .. start + size - 1`` at each of the D advances ``delays`` (T, D) (without
    the steering entries, power or gate), through the channel filters ``channels``
    (T, D, 3) when given. D = 1 with zero delay is the reference at the array origin.
    ``filters``: the taps of a noise-like source computed beforehand
    (:func:`source_filters` of the same delays and channels, or a
    :class:`~adapt.numerics.fir.FilterBank` of them)."""
    sc = batch.scene
    src = sc.sources[source]
    wf = src.waveform
    t_ = batch.trials
    delays = np.broadcast_to(delays, (t_, delays.shape[-1]))
    k = np.arange(start, start + size, dtype=float)
    if wf.kind in _NOISE_LIKE:
        h = source_filters(batch, source, delays, channels) if filters is None else filters
        # s_m for m in [start - K, start + size + K): stream index m + K >= 0
        s = white_block(batch, source, keys, start, size)                    # (T, B + 2K)
        # s_{k - j} sits at column (k - start) + K - j: tap i = j + K reads column
        # (k - start) + 2K - i, as filter_bank sums (in increasing i)
        return filter_bank(h, s, size)
    phi0 = batch.start_phases[:, source][:, None, None]
    t = k[None, :, None] + delays[:, None, :]

    def at(tt):
        return _deterministic(wf, tt, phi0)

    if channels is None:
        return at(t)
    return sum(channels[:, None, :, q] * at(t - (q - 1)) for q in range(3))


def noise_like(source) -> bool:
    """True for the sources made of a filtered white sequence (gaussian, bpsk, qpsk)."""
    return source.waveform.kind in _NOISE_LIKE


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
    (T, N, 3) if any, before the steering entries. Tones: exact; chirps: exact for
    their average over a period (:func:`chirp_period_mean`)."""
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
    if wf.kind == "chirp":
        # the channel's taps j = -1, 0, 1 read the chirp at k - l - j + d_n
        if channels is None:
            return _chirp_kernel(wf, [(1.0, dd - lag)])
        ch = channels.reshape(channels.shape[:1] + (1,) * (len(lead) - 1) + channels.shape[1:])
        ch = np.tile(ch, (1,) * len(lead) + (taps, 1))                     # (.., LN, 3)
        return _chirp_kernel(wf, [(ch[..., q], dd - lag - (q - 1)) for q in range(3)])
    tau = dd[..., :, None] - dd[..., None, :] - (lag[:, None] - lag[None, :])
    out = np.exp(2j * np.pi * wf.frequency * tau)
    if channels is None:
        return out
    g = _channel_response(channels, wf.frequency)                         # (T, N)
    g = np.tile(g.reshape(g.shape[:1] + (1,) * (len(lead) - 1) + g.shape[1:]),
                (1,) * len(lead) + (taps,))
    return out * g[..., :, None] * np.conj(g[..., None, :])


def _steered(kernel: np.ndarray, a: np.ndarray, taps: int) -> np.ndarray:
    st = np.tile(a, (1,) * (a.ndim - 1) + (taps,))
    return kernel * st[..., :, None] * np.conj(st[..., None, :])


def _couple(batch, r: np.ndarray, taps: int) -> np.ndarray:
    """``(I_L kron C) r (I_L kron C)^H`` for space-time covariances r (..., NL, NL): the
    frequency-flat mutual coupling C (``array.coupling``) mixing the element outputs;
    r itself without coupling."""
    sc = batch.scene
    if sc.array.coupling is None:
        return r
    n = sc.elements
    c = elements.coupling_matrix(sc.array.coupling, n)
    shape = r.shape
    x = r.reshape(shape[:-2] + (taps, n, taps, n))
    x = np.einsum("ab,...lbmc->...lamc", c, x)
    x = np.einsum("...lamc,dc->...lamd", x, np.conj(c))
    return x.reshape(shape)


def source_covariance(batch, source: int, taps: int, kk: np.ndarray,
                      unit: bool = False) -> np.ndarray:
    """(T, M, NL, NL) space-time covariance of one source (power and gate included;
    ``unit``: unit power, always on) at snapshot indices kk, through the coupling."""
    sc = batch.scene
    if uses_polynomial_filters(sc, source):
        return _group_covariance(batch, [source], taps, kk, unit)
    src = sc.sources[source]
    a = batch.steering(source, kk, coupled=False)                           # (T, M, N)
    d = element_delays(batch, source, kk)                                   # (T, M, N)
    r = _steered(_kernel(src, d, taps, sc, batch.channel_filters), a, taps)
    r = _couple(batch, r, taps)
    if unit:
        return r
    if src.pulsing is not None:             # each tap gated at its own snapshot
        g = tap_gates(src, kk, taps, sc.elements)                           # (M, NL)
        return r * (src.power * (g[:, :, None] * g[:, None, :]))[None]
    p = src.power * src.active(kk).astype(float)
    return r * p[None, :, None, None]


def tap_gates(src, kk: np.ndarray, taps: int, elements: int) -> np.ndarray:
    """(M, L N) 0/1: whether source ``src`` is on at snapshot ``k - l``, for entry
    ``l N + n`` of the stacked snapshot at each k of ``kk``. The streams gate each
    element's output at its own snapshot, so a stacked snapshot straddling a pulse edge
    holds the source in some taps only (before the stream starts, k - l < 0, a source
    that starts at 0 is off, as the delay lines hold zeros there)."""
    k = np.asarray(kk)[:, None] - np.arange(taps)[None, :]
    return np.repeat(src.active(k).astype(float), elements, axis=1)


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

    Notes
    -----
    Coherent copies follow the narrowband convention (README): sources sharing one
    waveform add as one group, cross terms included; the wanted source's copies are
    one interference group without it, and ``signal`` is the wanted source's own term.
    The noise (:func:`noise_space_time`) and every source pass through the coupling as
    the streams do (sources coupled, noise not).
    """
    sc = batch.scene
    kk = np.atleast_1d(np.asarray(0 if k is None else k))
    n = sc.elements
    dim = n * taps
    r = np.zeros((batch.trials, len(kk), dim, dim), dtype=complex)
    if kind != "signal":
        if sc.noise.plain:
            r += np.eye(dim)
        else:
            r += noise_space_time(batch, taps)[:, None]
    signal = kind == "signal" or kind == "data" or (kind == "training"
                                                    and sc.training == "signal")
    if sc.coherent:
        groups = [[sc.desired_index]] if kind == "signal" else batch.coherent_groups(signal)
        for group in groups:
            if len(group) == 1:
                r += source_covariance(batch, group[0], taps, kk)
            else:
                r += _group_covariance(batch, group, taps, kk)
        return r[:, 0] if k is None else r
    members = [] if kind == "signal" else list(sc.interferer_indices)
    if signal:
        members.append(sc.desired_index)
    for i in members:
        r += source_covariance(batch, i, taps, kk)
    return r[:, 0] if k is None else r


def direction_covariance(batch, azimuth: float, elevation: float, taps: int) -> np.ndarray:
    """(T, NL, NL) space-time covariance of a unit-power source, white over the whole
    band, from a fixed direction (the true array, coupling included): the reference for
    band-averaged responses (``w^H R w`` is the response averaged over the band)."""
    from adapt.scene.model import Source
    sc = batch.scene
    src = Source(name="", role="interferer", azimuth=azimuth, elevation=elevation,
                 power_db=0.0)
    u = geometry.direction_vector(azimuth, elevation)
    fb = sc.receiver.fractional_bandwidth or 0.0
    d = fb * (batch.positions * u).sum(-1) + batch.channel_delays             # (T, N)
    a = batch.steering_toward(azimuth, elevation, coupled=False)
    return _couple(batch, _steered(_kernel(src, d, taps, sc, batch.channel_filters), a,
                                   taps), taps)


# ------------------------------------------------------- varying delays, shared waveforms
def uses_polynomial_filters(scene, i: int) -> bool:
    """True when source ``i`` is made by the polynomial (Farrow) filters: it moves (its
    delays change from snapshot to snapshot), is a coherent copy, or is copied (its
    stream is read at its copies' delays too). Other sources keep the fixed filters."""
    src = scene.sources[i]
    if src.motion is not None or src.waveform.kind == COPY:
        return True
    return any(s.waveform.kind == COPY and scene.origin_index(j) == i
               for j, s in enumerate(scene.sources))


def _copy_delay(src) -> float:
    return float(src.waveform.delay) if src.waveform.kind == COPY else 0.0


def _delay_bound(scene) -> float:
    """Bound on |d_n| for the polynomial filters, snapshots: ``B`` times the array's
    radius plus 8 rms of the position error per spanned axis, plus 4 rms of the
    channel delay error (beyond it, an event of about 1e-15, the whole part of the
    delay is clipped, in the streams and the truth alike)."""
    fb = scene.receiver.fractional_bandwidth or 0.0
    arr = scene.array
    radius = float(np.max(np.linalg.norm(arr.positions, axis=1)))
    radius += 8.0 * arr.errors.position_rms * math.sqrt(float(np.sum(arr.error_axes)))
    return fb * radius + 4.0 * arr.errors.channel_delay_rms


def _whole_range(scene, i: int) -> tuple[int, int]:
    """Smallest and largest whole part of source i's advances ``d_n - delay``."""
    bound, delay = _delay_bound(scene), _copy_delay(scene.sources[i])
    return int(math.floor(-bound - delay)), int(math.floor(bound - delay))


def stream_offset(scene, origin: int) -> int:
    """Where value s_m of a noise-like source's white sequence sits in its stream:
    position ``m + offset``, the fixed filters' :func:`reach` of the source (the same for
    the fixed and the polynomial filters, and whatever copies the source has: adding a
    copy, or changing its delay, leaves its origin's values as they were, to the
    polynomial's rounding). Earlier values (a delayed copy's) sit at negative
    positions (:func:`_white`)."""
    return reach(scene, scene.sources[origin])


def polynomial_coefficients(bandwidth: float | None, offset: float) -> np.ndarray:
    """(DEGREE + 1, 2H) read-only: column ``i + H`` holds the coefficients (in powers of
    ``x = 2 phi - 1``) of the polynomial that equals the band filter ``h(i + phi)``
    (the module docstring's windowed sinc, unit power) for ``0 <= phi < 1``, segment
    ``i = -H .. H-1``: interpolated at DEGREE + 1 Chebyshev points. A filter of
    fractional advance d then has tap ``sum_p c_p[j + D] x^p`` on ``s_{k-j}``, with
    ``D = floor(d)``, ``x = 2 (d - D) - 1`` (Farrow, "A continuously variable digital
    delay element", ISCAS 1988, from memory; Laakso et al. 1996). Checked against
    :func:`filter_taps` to 1e-12 in the tests."""
    return _coefficients(None if bandwidth is None else float(bandwidth), float(offset),
                         half_length(bandwidth), DEGREE)


@functools.lru_cache(maxsize=64)
def _coefficients(bandwidth: float | None, offset: float, h: int, degree: int) -> np.ndarray:
    b = 1.0 if bandwidth is None else bandwidth
    j = np.arange(-h, h + 1, dtype=float)

    def taps(t):
        # the window's limit at its edge (x -> +-1), so the segments are polynomials
        inside = np.abs(t / h) <= 1.0
        arg = np.sqrt(np.clip(1.0 - (t / h) ** 2, 0.0, None))
        w = np.where(inside, np.i0(KAISER_BETA * arg) / np.i0(KAISER_BETA), 0.0)
        return np.sqrt(b) * np.sinc(b * t) * np.exp(2j * np.pi * offset * t) * w

    gain = math.sqrt(float(np.sum(np.abs(np.where(np.abs(j) < h, taps(j), 0.0)) ** 2)))
    count = degree + 1
    nodes = np.cos(np.pi * (np.arange(count) + 0.5) / count)
    values = taps(np.arange(-h, h)[None, :] + (nodes[:, None] + 1.0) / 2.0) / gain
    vander = np.polynomial.polynomial.polyvander(nodes, degree)
    out = np.linalg.solve(vander, values)
    out.setflags(write=False)
    return out


def _split_delay(d: np.ndarray, low: int, high: int) -> tuple[np.ndarray, np.ndarray]:
    """Whole part (clipped to [low, high]) and polynomial variable ``2 (d - D) - 1``."""
    whole = np.clip(np.floor(d), low, high)
    return whole.astype(np.int64), 2.0 * (d - whole) - 1.0


def _segments(coef: np.ndarray, x: np.ndarray) -> np.ndarray:
    """(..., 2H) every segment's polynomial at x (...,) by Horner's rule."""
    acc = np.broadcast_to(coef[-1], x.shape + coef.shape[1:]).astype(complex)
    for p in range(coef.shape[0] - 2, -1, -1):
        acc = acc * x[..., None] + coef[p]
    return acc


def polynomial_block(batch, source: int, keys, start: int, size: int,
                     channels: np.ndarray | None = None, reference: bool = False
                     ) -> np.ndarray:
    """(T, B, N) unit-power arrivals of a polynomial-path source (see
    :func:`uses_polynomial_filters`) at the elements, for snapshots ``start .. start +
    size - 1``: the origin's waveform (a copy's own delay subtracted from its advances)
    at every element's advance of each snapshot, times the element's true uncoupled
    steering entry of that snapshot, through the channel filters (T, N, 3) when given
    (power, gate and a copy's rotation not included). ``reference``: (T, B) the
    envelope at the array origin (zero advance, no steering or channel).

    Noise-like origins: the P + 1 fixed filters ``v_p[m] = sum_i c_p[i] s_{m-i}`` run
    over the origin's stream (:func:`filter_bank`, each output one sum in a fixed
    order), then ``y_n(k) = sum_p x^p v_p[k + D]`` per element and snapshot (Horner's
    rule): every value depends on its snapshot alone, so blocks are block-size
    invariant without state. Tones and chirps are evaluated at the delayed times."""
    sc = batch.scene
    src = sc.sources[source]
    origin = sc.origin_index(source)
    wf = sc.sources[origin].waveform
    t_ = batch.trials
    ripple = 1 if (channels is not None and not reference) else 0
    times = np.arange(start - ripple, start + size + ripple)
    if reference:
        d = np.zeros((t_, 1, 1))
    elif src.motion is not None:
        d = element_delays(batch, source, times) - _copy_delay(src)          # (T, B', N)
    else:
        d = (element_delays(batch, source) - _copy_delay(src))[:, None, :]   # (T, 1, N)
    if wf.kind in _NOISE_LIKE:
        so = sc.sources[origin]
        coef = polynomial_coefficients(so.bandwidth, so.offset)
        h = coef.shape[1] // 2
        low, high = (0, 0) if reference else _whole_range(sc, source)
        whole, x = _split_delay(d, low, high)
        first = int(times[0]) + low                      # v_p[m] for m = first .. first+W-1
        width = len(times) + high - low
        s = _white(keys, wf.kind, first - h + 1 + stream_offset(sc, origin), width + 2 * h - 1)
        v = filter_bank(coef[None], s, width)                               # (T, W, P+1)
        shape = (t_, len(times), d.shape[-1])
        at = np.broadcast_to(times[None, :, None] + whole - first, shape).reshape(t_, -1)
        x = np.broadcast_to(x, shape).reshape(t_, -1)
        y = np.take_along_axis(v[:, :, -1], at, axis=1)
        for p in range(coef.shape[0] - 2, -1, -1):
            y = y * x + np.take_along_axis(v[:, :, p], at, axis=1)
        y = y.reshape(shape)
    else:
        phi0 = batch.start_phases[:, origin][:, None, None]
        y = _deterministic(wf, times[None, :, None] + d, phi0)
        y = np.broadcast_to(y, (t_, len(times), y.shape[-1]))
    if reference:
        return y[:, :, 0]
    if src.motion is not None:
        a = batch.steering(source, times, coupled=False)                   # (T, B', N)
    else:
        a = batch.steering(source, coupled=False)[:, None, :]
    e = y * a
    if not ripple:
        return e
    return sum(channels[:, None, :, q] * e[:, 2 - q: 2 - q + size] for q in range(3))


def _member_delays(batch, i: int, taps: int, kk: np.ndarray, ripple: int):
    """(T, M, J, N) advances (a copy's delay subtracted) and uncoupled steering of
    source i at the times ``k - j``, ``j = -ripple .. taps - 1 + ripple`` (J of them)."""
    src = batch.scene.sources[i]
    js = np.arange(-ripple, taps + ripple)
    t_, m = batch.trials, len(kk)
    if src.motion is not None:
        times = (kk[:, None] - js[None, :]).ravel()
        d = element_delays(batch, i, times) - _copy_delay(src)
        a = batch.steering(i, times, coupled=False)
        n = d.shape[-1]
        return d.reshape(t_, m, len(js), n), a.reshape(t_, m, len(js), n)
    d = (element_delays(batch, i) - _copy_delay(src))[:, None, None, :]
    a = batch.steering(i, coupled=False)[:, None, None, :]
    return d, a


def _filter_frame(batch, i: int, taps: int, kk: np.ndarray) -> tuple[np.ndarray, int]:
    """Noise-like polynomial-path source i: (T, M, LN, W) taps of every stacked entry
    (entry ``l N + n``, element n at snapshot ``k - l``) on ``s_{k - r}`` for ``r = base
    .. base + W - 1`` (uncoupled, unit power, channel filters included), and base."""
    sc = batch.scene
    so = sc.sources[sc.origin_index(i)]
    coef = polynomial_coefficients(so.bandwidth, so.offset)
    h = coef.shape[1] // 2
    channels = batch.channel_filters
    ripple = 1 if channels is not None else 0
    low, high = _whole_range(sc, i)
    d, a = _member_delays(batch, i, taps, kk, ripple)
    whole, x = _split_delay(d, low, high)
    n = sc.elements
    t_, m = batch.trials, len(kk)
    width = taps + 2 * ripple - 1 + high - low + 2 * h
    cols = np.arange(2 * h)
    frame = np.zeros((t_, m, taps, n, width), dtype=complex)
    for l_ in range(taps):
        for q in range(2 * ripple + 1):          # channel tap j = q - ripple, time k - l - j
            jj = l_ + q
            jd = min(jj, d.shape[2] - 1)
            gain = a[:, :, min(jj, a.shape[2] - 1)]
            if ripple:
                gain = gain * channels[:, None, :, q]
            vals = np.broadcast_to(gain[..., None] * _segments(coef, x[:, :, jd]),
                                   (t_, m, n, 2 * h))
            at = np.broadcast_to(l_ + q + high - whole[:, :, jd], (t_, m, n))
            tmp = np.zeros((t_, m, n, width), dtype=complex)
            np.put_along_axis(tmp, at[..., None] + cols, vals, axis=-1)
            frame[:, :, l_] += tmp
    return frame.reshape(t_, m, taps * n, width), -ripple - h - high


def _member_setting(batch, i: int, taps: int, kk: np.ndarray):
    """What the tone and chirp truths of member i of a shared waveform start from: the
    waveform (its origin's), the channel filters and their ripple taps (1 or 0), the
    member's delays and gains (:func:`_member_delays`) and (T, M, N)."""
    sc = batch.scene
    channels = batch.channel_filters
    ripple = 1 if channels is not None else 0
    d, a = _member_delays(batch, i, taps, kk, ripple)
    return (sc.sources[sc.origin_index(i)].waveform, channels, ripple, d, a,
            (batch.trials, len(kk), sc.elements))


def _tone_vector(batch, i: int, taps: int, kk: np.ndarray) -> np.ndarray:
    """(T, M, LN) a tone's stacked response (exact: ``x = v e^{j(2 pi f k + phi)}``)."""
    wf, channels, ripple, d, a, (t_, m, n) = _member_setting(batch, i, taps, kk)
    v = np.zeros((t_, m, taps, n), dtype=complex)
    for l_ in range(taps):
        for q in range(2 * ripple + 1):
            jj = l_ + q
            lag = jj - ripple
            term = a[:, :, min(jj, a.shape[2] - 1)] * np.exp(
                2j * np.pi * wf.frequency * (d[:, :, min(jj, d.shape[2] - 1)] - lag))
            if ripple:
                term = term * channels[:, None, :, q]
            v[:, :, l_] += term
    return v.reshape(t_, m, taps * n)


def _chirp_terms(batch, i: int, taps: int, kk: np.ndarray) -> list:
    """A chirp's stacked entries as (gain, time offset) pairs, each (T, M, LN), one per
    channel tap (:func:`_chirp_kernel`): entry ``l N + n`` at snapshot k is ``sum_q
    g_q c(k + tau_q)``, as the streams form it (tap ``jj = l + q`` of the member's
    delays and steering, lag ``jj - ripple``)."""
    wf, channels, ripple, d, a, (t_, m, n) = _member_setting(batch, i, taps, kk)
    terms = []
    for q in range(2 * ripple + 1):
        alpha = np.empty((t_, m, taps, n), dtype=complex)
        tau = np.empty((t_, m, taps, n))
        for l_ in range(taps):
            jj = l_ + q
            gain = a[:, :, min(jj, a.shape[2] - 1)]
            if ripple:
                gain = gain * channels[:, None, :, q]
            alpha[:, :, l_] = np.broadcast_to(gain, (t_, m, n))
            tau[:, :, l_] = np.broadcast_to(d[:, :, min(jj, d.shape[2] - 1)] - (jj - ripple),
                                            (t_, m, n))
        terms.append((alpha.reshape(t_, m, taps * n), tau.reshape(t_, m, taps * n)))
    return terms


def _amplitudes(scene, i: int, kk: np.ndarray, unit: bool, taps: int) -> np.ndarray:
    """(1, M, 1) complex ``sqrt(P) g(k) e^{j phase}`` of source i (1 with ``unit``), or
    for a pulsing source (1, M, L N), each entry of the stacked snapshot gated at its
    own snapshot (:func:`tap_gates`)."""
    if unit:
        return np.ones((1, len(kk), 1), dtype=complex)
    src = scene.sources[i]
    if src.pulsing is not None:
        amp = np.sqrt(src.power) * tap_gates(src, kk, taps, scene.elements) + 0j
    else:
        amp = (np.sqrt(src.power) * src.active(kk).astype(float) + 0j)[:, None]
    if src.waveform.kind == COPY:
        amp = amp * np.exp(1j * np.deg2rad(src.waveform.phase_deg))
    return amp[None]


def _group_covariance(batch, group: list[int], taps: int, kk: np.ndarray,
                      unit: bool = False) -> np.ndarray:
    """(T, M, NL, NL) covariance of sources sharing one waveform (a source and its
    copies, or one polynomial-path source), cross terms included, through the
    coupling: every entry a finite sum over the same taps the streams use."""
    sc = batch.scene
    kind = sc.sources[sc.origin_index(group[0])].waveform.kind
    t_, n = batch.trials, sc.elements
    dim = n * taps
    out = np.zeros((t_, len(kk), dim, dim), dtype=complex)
    h = half_length(sc.sources[sc.origin_index(group[0])].bandwidth)
    per = max(1, t_ * (taps + 2) * n * 2 * h * 4)
    step = max(1, _TRUTH_VALUES // per)
    for lo in range(0, len(kk), step):
        ks = kk[lo:lo + step]
        amps = [_amplitudes(sc, i, ks, unit, taps) for i in group]
        if kind in _NOISE_LIKE:
            frames = [_filter_frame(batch, i, taps, ks) for i in group]
            r = 0
            for a_ in range(len(group)):
                fa, ba = frames[a_]
                ga = amps[a_][..., None] * fa
                for b_ in range(a_, len(group)):
                    fb_, bb = frames[b_]
                    first, last = max(ba, bb), min(ba + fa.shape[-1], bb + fb_.shape[-1])
                    if first >= last:
                        continue
                    gb = amps[b_][..., None] * fb_
                    x = np.einsum("...ar,...br->...ab", ga[..., first - ba:last - ba],
                                  np.conj(gb[..., first - bb:last - bb]))
                    r = r + (x if b_ == a_ else x + np.conj(np.swapaxes(x, -1, -2)))
        elif kind == "tone":
            v = sum(amp * _tone_vector(batch, i, taps, ks) for amp, i in zip(amps, group))
            r = v[..., :, None] * np.conj(v[..., None, :])
        else:
            wf = sc.sources[sc.origin_index(group[0])].waveform
            r = _chirp_kernel(wf, [(amp * g, tau) for amp, i in zip(amps, group)
                                   for g, tau in _chirp_terms(batch, i, taps, ks)])
        out[:, lo:lo + len(ks)] = r
    return _couple(batch, out, taps)


# ------------------------------------------------------------------- noise fields
def diffuse_filters(positions: np.ndarray, field: str, fractional_bandwidth: float
                    ) -> np.ndarray:
    """(R, N, N, 2H+1) taps ``A_j`` (j = -H .. H, H = :data:`HALF`) of a dispersive
    diffuse noise field at ``positions`` (R, N, 3): element n receives ``sum_j sum_m
    A_j[n, m] z_m[k - j]`` from unit white streams z_m. Design: at baseband frequency f
    the field's coherence is the carrier's at ``(1 + f B)`` times the separations
    (:func:`~adapt.scene.geometry.diffuse_coherence`: ``sin(k d)/(k d)`` or ``J0``,
    Cox 1973); its Hermitian square root on :data:`DIFFUSE_GRID` frequencies,
    inverse-transformed, Kaiser-windowed, each row scaled to unit power (so the
    per-element power is exactly the narrowband field's). Without a fractional
    bandwidth the coherence is flat and the taps are ``A_0`` alone (white in time).
    Each of the R arrays is designed alone, with products of fixed shape."""
    pos = np.asarray(positions, float)
    h = HALF
    grid = (np.arange(DIFFUSE_GRID) + 0.5) / DIFFUSE_GRID - 0.5
    j = np.arange(-h, h + 1)
    basis = np.exp(2j * np.pi * grid[:, None] * j[None, :]) / DIFFUSE_GRID   # (F, J)
    window = _kaiser(j / (h + 1.0))
    n = pos.shape[-2]
    out = np.empty((len(pos), n, n, len(j)), dtype=complex)
    fb = float(fractional_bandwidth or 0.0)
    for r_ in range(len(pos)):
        scaled = pos[r_][None, :, :] * (1.0 + fb * grid)[:, None, None]      # (F, N, 3)
        lam, e = np.linalg.eigh(diffuse_coherence(scaled, field))
        root = (e * np.sqrt(np.maximum(lam, 0.0))[:, None, :]) @ np.conj(
            np.swapaxes(e, -1, -2))                                          # (F, N, N)
        taps = (root.reshape(DIFFUSE_GRID, n * n).T @ basis).reshape(n, n, len(j))
        taps = taps * window
        power = np.sum(np.abs(taps) ** 2, axis=(1, 2))
        out[r_] = taps / np.sqrt(power)[:, None, None]
    return out


def diffuse_block(batch, keys, start: int, size: int) -> np.ndarray:
    """(T, B, N) the dispersive diffuse field (:func:`diffuse_filters`) for snapshots
    ``start .. start + size - 1``: unit streams z_m[k] from normals ``((k + H) N + m) 2
    + (0, 1)`` of the field's own stream (k >= -H), filtered, summed over m in order,
    times ``sqrt(level)`` and the element gains."""
    a = batch.diffuse_taps
    h = (a.shape[-1] - 1) // 2
    t_, n = batch.trials, a.shape[1]
    z = np.empty((t_, size + 2 * h, n, 2))
    normals.fill(keys, start * n * 2, z.reshape(t_, -1))
    z = z.view(np.complex128)[..., 0] * np.sqrt(0.5)
    out = None
    for m in range(n):
        part = filter_bank(a[:, :, m, :], np.ascontiguousarray(z[:, :, m]), size)
        out = part if out is None else out + part
    level = 10.0 ** (batch.scene.noise.level_db / 10.0)
    return out * (np.sqrt(level) * batch.element_gains)[:, None, :]


def noise_space_time(batch, taps: int) -> np.ndarray:
    """(T, NL, NL) the noise's space-time covariance: the thermal floor (each
    channel's power) and a white field's ``C C^H`` at lag 0 (white in time:
    ``I_L kron Q``), plus a dispersive diffuse field's lags ``level g_n g_n'^* sum_j
    sum_m A_j[n, m] conj(A_{j + l - l'}[n', m])`` (exact for the taps generated)."""
    n = batch.scene.elements
    q = batch.noise_covariance()                                             # (T, N, N)
    out = np.zeros((batch.trials, n * taps, n * taps), dtype=complex)
    for l_ in range(taps):
        out[:, l_ * n:(l_ + 1) * n, l_ * n:(l_ + 1) * n] = q
    a = batch.diffuse_taps
    if a is None:
        return out
    size = a.shape[-1]
    lead = (a.shape[0],)
    c = {}
    for lag in range(taps):
        if lag < size:
            c[lag] = np.einsum("rnmj,rpmj->rnp", a[..., :size - lag], np.conj(a[..., lag:]))
        else:
            c[lag] = np.zeros(lead + (n, n), dtype=complex)
        if lag:
            c[-lag] = np.conj(np.swapaxes(c[lag], -1, -2))
    g = batch.element_gains
    scale = 10.0 ** (batch.scene.noise.level_db / 10.0) * (g[:, :, None] * np.conj(g[:, None, :]))
    return out + _lag_matrix(c, taps, n, lead) * np.tile(scale, (1, taps, taps))


class TapLine:
    """Stacks a stream of blocks (T, B, N) into space-time snapshots (T, B, N L),
    ``z_k = [x_k; x_{k-1}; ...; x_{k-L+1}]`` (entry ``l N + n``), carrying the last
    L - 1 snapshots across blocks (zeros before the stream starts: prewindowed), so the
    result does not depend on the block size.

    ``recycle``: the stacked blocks are written into one buffer kept by the line (for
    a consumer done with each block before the next, like the engine): no fresh large
    array per block. :meth:`push` advances the line and leaves the stacking to the
    first use of the block (a processor that reads only some of its inputs never pays
    for the others)."""

    def __init__(self, taps: int, recycle: bool = False):
        self.taps = int(taps)
        self.history: np.ndarray | None = None
        self.recycle = bool(recycle)
        self._buffer: np.ndarray | None = None

    def __call__(self, x: np.ndarray) -> np.ndarray:
        return self.push(x)()

    def push(self, x: np.ndarray) -> "PushedBlock":
        """Advance the line by the block x (T, B, N); returns the block's
        :class:`PushedBlock`, which forms its stacked block on first use."""
        lag = self.taps - 1
        t_, b, n = x.shape
        if self.history is None:
            self.history = np.zeros((t_, lag, n), dtype=x.dtype)
        before = self.history
        if b >= lag:
            self.history = x[:, b - lag:].copy()
        else:
            self.history = np.concatenate([before[:, b:], x], axis=1)
        return PushedBlock(self, before, x)

    def _output(self, shape: tuple, dtype) -> np.ndarray:
        out = self._buffer if self.recycle else None
        if out is None or out.shape != shape or out.dtype != dtype:
            out = np.empty(shape, dtype=dtype)
            if self.recycle:
                self._buffer = out
        return out


class PushedBlock:
    """One block as it went through a :class:`TapLine`: ``pushed()`` its stacked block
    (T, B, N L), formed once on first use; :meth:`lined` the block after the L - 1
    snapshots before it (T, L - 1 + B, N), from which the stacked snapshot of index j
    is ``[lined[j + L - 1]; lined[j + L - 2]; ...; lined[j]]``. Valid until the line's
    next block when it recycles its buffer."""

    def __init__(self, line: TapLine, before: np.ndarray, x: np.ndarray):
        self.line, self.before, self.x = line, before, x
        self.taps = line.taps
        self._stacked: np.ndarray | None = None

    def __call__(self) -> np.ndarray:
        if self._stacked is None:
            self._stacked = self._stack()
        return self._stacked

    def _stack(self) -> np.ndarray:
        x, before, taps = self.x, self.before, self.taps
        lag = taps - 1
        if not lag:
            return x
        t_, b, n = x.shape
        out = self.line._output((t_, b, n * taps), np.result_type(x, complex))
        for l_ in range(taps):             # z_k entry l: x_{k-l}, before the block
            cols = slice(l_ * n, (l_ + 1) * n)       # from the carried history
            early = min(l_, b)
            out[:, :early, cols] = before[:, lag - l_:lag - l_ + early]
            out[:, early:, cols] = x[:, :b - early]
        return out

    def lined(self) -> np.ndarray:
        """(T, L - 1 + B, N): the L - 1 snapshots before the block, then the block."""
        return np.concatenate([self.before, self.x], axis=1)


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
    57, 1978). A coherent copy counts with its origin's waveform and band, at its own
    direction (its start direction when it moves). A chirp counts as a flat band across
    its sweep, ``W = |stop - start|`` (its mean over a period, the truth, has that
    band's eigenvalues: tested), a tone as one."""
    if source.waveform.kind == COPY:
        origin = scene.sources[scene.source_index(source.waveform.of)]
        source = dataclasses.replace(origin, azimuth=source.azimuth,
                                     elevation=source.elevation)
    wf = source.waveform
    if wf.kind == "chirp":
        w = abs(float(wf.stop) - float(wf.start))
    elif wf.kind in _NOISE_LIKE:
        w = 1.0 if source.bandwidth is None else float(source.bandwidth)
    else:
        return 1.0
    fb = scene.receiver.fractional_bandwidth or 0.0
    u = geometry.direction_vector(source.azimuth, source.elevation)
    proj = scene.array.positions @ u
    spread = fb * float(np.ptp(proj)) if proj.size else 0.0
    return 1.0 + 2.0 * w * spread
