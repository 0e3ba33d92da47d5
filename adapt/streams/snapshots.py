"""Seeded, streamable multi-element sample generation.

A :class:`TrialBatch` is a set of independent Monte Carlo trials of one scene. Each trial
draws its own hardware errors and waveform phases once, then produces complex-baseband
snapshots block by block:

``x[t, k, :] = sum_s sqrt(P_s) g_s(k) s_s[t, k] a_s[t, k, :] + n[t, k, :]``

with ``a_s`` the true steering vector of source s in trial t (hardware errors included),
``g_s(k)`` its on/off gate, ``s_s`` its unit-power waveform and ``n`` circular complex
Gaussian noise of unit power per element.

Reproducibility (tested):

* trial i's randomness comes only from ``SeedSequence(seed, spawn_key=(i, ...))``, so trial
  i is bit-identical whether 1, 10 or 10,000 trials are drawn, and whatever the batch it
  sits in (this is what makes results independent of batch size and worker count);
* within a trial, the noise and each source's waveform have their own streams keyed by the
  source's name, so adding or removing one jammer leaves the noise and the other sources'
  waveforms unchanged (common random numbers across scene variants);
* blocks concatenated are bit-identical to one-shot generation, whatever the block size,
  and memory is bounded by the block.

The noise and the random waveforms come from counter-based normal streams
(:mod:`adapt.streams.normals`): normal j of a stream is a function of the stream's key and j, so
a block of every trial is computed in one pass, with no Python loop over trials.
"""
from __future__ import annotations

import zlib
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from adapt.numerics import kernels as _kernels
from adapt.numerics.fir import FilterBank, add_filtered
from adapt.scene import elements, geometry
from adapt.scene.geometry import diffuse_coherence
from adapt.scene.model import Scene
from adapt.streams import normals
from adapt.streams import wideband as _wideband
from adapt.streams.seeding import trial_generators

__all__ = ["TrialBatch", "Block", "generate", "default_block_size", "quantise",
           "scratch_array", "STREAMS", "diffuse_coherence"]

#: the definition of the random numbers (recorded in resumable run plans): noise and
#: random waveforms from counter-based normal streams (adapt.streams.normals)
STREAMS = "counter-normals-1"

_CONSTANTS, _STREAMS = 0, 1
_NOISE_KEY = 0xFFFFFFFF
#: the diffuse noise field's normal stream, and the per-channel noise power spread's
#: (their own keys: scenes without a noise field draw exactly what they drew before)
_DIFFUSE_KEY = 0xFFFFFFFE
_SPREAD_KEY = 0xFFFFFFFD
_MAX_BLOCK_VALUES = 1 << 21      # complex values per (trials x block x elements) array


def _component_key(name: str) -> int:
    return zlib.crc32(name.encode("utf-8")) & 0x7FFFFFFF


def default_block_size(trials: int, elements: int, snapshots: int) -> int:
    """Snapshots per block keeping one (trials, block, elements) array near 32 MB."""
    return int(max(1, min(snapshots, _MAX_BLOCK_VALUES // max(1, trials * elements))))


def scratch_array(store: dict | None, name: str, shape: tuple, dtype=float) -> np.ndarray:
    """An uninitialised C-contiguous array of ``shape``: new, or (``store`` given) a view
    of the buffer kept there under ``name``, grown when too small. Reusing buffers from
    block to block (or group to group) spares the page faults of fresh large arrays,
    which are slow on virtual machines and serialise threads."""
    count = int(np.prod(shape))
    if store is None:
        return np.empty(shape, dtype=dtype)
    buf = store.get(name)
    if buf is None or buf.size < count or buf.dtype != np.dtype(dtype):
        buf = store[name] = np.empty(count, dtype=dtype)
    return buf[:count].reshape(shape)


def quantise(x: np.ndarray, bits: int, full_scale: float) -> np.ndarray:
    """Uniform mid-rise quantiser applied separately to the real and imaginary rails,
    ``2**bits`` levels spanning [-full_scale, full_scale], clipping outside."""
    step = 2.0 * full_scale / (1 << bits)
    top = (1 << (bits - 1)) - 0.5

    def rail(v):
        return np.clip(np.floor(v / step) + 0.5, -top, top) * step

    return rail(x.real) + 1j * rail(x.imag)


@dataclass
class Block:
    """Snapshots ``start`` to ``stop - 1`` (0-based) of every trial in a batch.

    data:      (T, B, N) what the array receives (after the ADC model, if any);
    signal:    (T, B, N) the wanted source's part of ``data`` (before quantisation);
    training:  (T, B, N) what the adaptive processors train on: ``data`` when the scene
               trains with the wanted signal present, else interference plus noise only;
    reference: (T, B) the wanted source's complex envelope at the array origin,
               ``sqrt(P) g(k) s[k]``: the reference waveform LMS-type processors train on;
    desired:   (T, N) the wanted source's steering vector when it does not move (then
               ``signal = reference[..., None] * desired[:, None, :]``), else None.
    """
    start: int
    stop: int
    data: np.ndarray
    stored_signal: np.ndarray | None     # None: formed from reference and desired on use
    training: np.ndarray
    reference: np.ndarray
    desired: np.ndarray | None = None

    @property
    def size(self) -> int:
        return self.stop - self.start

    @property
    def signal(self) -> np.ndarray:
        """(T, B, N) the wanted source's part of ``data`` (before quantisation)."""
        if self.stored_signal is None:
            self.stored_signal = self.reference[..., None] * self.desired[:, None, :]
        return self.stored_signal

    @property
    def interference(self) -> np.ndarray:
        """(T, B, N) interference plus noise (and quantisation error) part of ``data``."""
        return self.data - self.signal



def _received(scene, data: np.ndarray, interference: np.ndarray, full_scale):
    """(data, training) as the receiver delivers them: through the ADC model when the
    scene has one; training is the interference alone or the data, as the scene says."""
    bits = scene.receiver.bits
    if bits is not None:
        data = quantise(data, bits, full_scale)
        training = (quantise(interference, bits, full_scale)
                    if scene.training == "interference" else data)
    else:
        training = interference if scene.training == "interference" else data
    return data, training

#: bytes of the buffer sets held by the threads of TrialBatch.blocks_on_threads (all of
#: them together; common practice: small beside the 300 MB a 10M-snapshot stream may
#: use, and enough for three threads of the default blocks of a one-trial stream)
AHEAD_BYTES = 64 << 20


def _buffer_sets(recycle: bool | int) -> list[dict] | None:
    """The buffer stores of :meth:`TrialBatch.blocks`' ``recycle``: None (fresh arrays)
    for False or 0, else that many stores (True: one), used block after block in turn."""
    count = int(recycle)
    if count < 0:
        raise ValueError(f"recycle must be a bool or a count >= 0, got {recycle!r}")
    return [{} for _ in range(count)] if count else None


def _envelope_params(wf) -> tuple | None:
    """The parameters of :class:`adapt.numerics.kernels.EnvelopePlan` for waveform
    ``wf``, computed as :meth:`TrialBatch._waveform` computes them; None for kinds the
    compiled pass does not form (copies)."""
    if wf.kind in ("gaussian", "bpsk", "qpsk"):
        return ()
    if wf.kind == "tone":
        return (2 * np.pi * wf.frequency,)
    if wf.kind == "chirp":
        return (wf.start, 0.5 * (wf.stop - wf.start), wf.period, 2 * np.pi)
    return None


class TrialBatch:
    """Trials ``first_trial`` .. ``first_trial + trials - 1`` of a scene.

    Parameters
    ----------
    scene : the scene.
    trials : number of trials (default: the scene's).
    seed : root seed (default: the scene's).
    first_trial : index of the first trial in this batch (for partitioning work).
    """

    def __init__(self, scene: Scene, trials: int | None = None, seed: int | None = None,
                 first_trial: int = 0):
        self.scene = scene
        self.trials = int(scene.trials if trials is None else trials)
        self.seed = int(scene.seed if seed is None else seed)
        self.first_trial = int(first_trial)
        if self.trials < 1:
            raise ValueError(f"trials must be >= 1, got {self.trials}")
        if self.first_trial < 0:
            raise ValueError(f"first_trial must be >= 0, got {self.first_trial}")
        if self.seed < 0:
            raise ValueError(f"seed must be >= 0, got {self.seed}")
        self._draw_constants()
        self._draw_noise()
        #: (T, N) per-channel delay errors, snapshots (zeros unless the scene has them)
        self.channel_delays = _wideband.draw_channel_delays(self)
        #: (T, N, 3) per-channel ripple filters [e_-1, 1, e_+1], or None
        self.channel_filters = _wideband.draw_channel_filters(self)

    # ------------------------------------------------------------------ constants
    @property
    def trial_indices(self) -> np.ndarray:
        return np.arange(self.first_trial, self.first_trial + self.trials)

    def _seed(self, trial: int, *key: int) -> np.random.SeedSequence:
        return np.random.SeedSequence(self.seed, spawn_key=(int(trial),) + key)

    def _draw_constants(self) -> None:
        sc = self.scene
        n = sc.elements
        s = len(sc.sources)
        err = sc.array.errors
        if not err.any and not any(src.waveform.kind in ("tone", "chirp") for src in sc.sources):
            # nothing here is random: the values the draws would give, exactly
            self.element_gains = np.ones((self.trials, n), dtype=complex)
            self.positions = np.repeat(sc.array.positions[None, :, :], self.trials, axis=0)
            self.start_phases = np.zeros((self.trials, s))
            return
        draws = np.empty((self.trials, 5 * n + s))
        gens = trial_generators(self.seed, self.trial_indices, _CONSTANTS)
        for t, g in enumerate(gens):
            g.standard_normal(out=draws[t, : 5 * n])
            draws[t, 5 * n:] = g.random(s)
        gain_db = err.gain_db_rms * draws[:, :n]
        phase = np.deg2rad(err.phase_deg_rms) * draws[:, n:2 * n]
        dpos = err.position_rms * draws[:, 2 * n:5 * n].reshape(self.trials, n, 3)
        dpos = dpos * sc.array.error_axes
        #: (T, N) complex element gains (1 without errors)
        self.element_gains = 10.0 ** (gain_db / 20.0) * np.exp(1j * phase)
        #: (T, N, 3) true element positions in wavelengths
        self.positions = sc.array.positions[None, :, :] + dpos
        #: (T, S) start phase of each source's tone or chirp, radians
        self.start_phases = 2 * np.pi * draws[:, 5 * n:]

    def _draw_noise(self) -> None:
        """Per-trial noise settings (scene key ``noise``): ``channel_noise`` (T, N), each
        channel's thermal noise power (1 without a spread; 10^(g/10), g Gaussian with the
        scene's dB rms, from the stream SeedSequence(seed, (i, 0, _SPREAD_KEY))), and
        ``diffuse_factor`` (T or 1, N, N) C with ``C C^H`` the diffuse noise covariance
        (None without one). A wideband scene's isotropic or cylindrical field is
        dispersive instead: ``diffuse_taps`` (T or 1, N, N, 2H+1), its space-time filter
        (:func:`adapt.streams.wideband.diffuse_filters`; one for every trial unless
        positions have errors), the element gains applied after it."""
        nf = self.scene.noise
        n = self.scene.elements
        self.channel_noise = np.ones((self.trials, n))
        self.diffuse_factor = None
        #: (T or 1, N, N, 2H+1) a wideband scene's dispersive diffuse field, or None
        self.diffuse_taps = None
        if nf.spread:
            g = np.empty((self.trials, n))
            normals.fill(normals.stream_keys(self.seed, self.trial_indices, _CONSTANTS,
                                             _SPREAD_KEY), 0, g)
            self.channel_noise = 10.0 ** (nf.element_noise_db_rms * g / 10.0)
        if nf.diffuse and self.scene.wideband and nf.field != "white":
            pos = self.positions if self.scene.array.errors.position_rms else self.positions[:1]
            self.diffuse_taps = _wideband.diffuse_filters(
                pos, nf.field, self.scene.receiver.fractional_bandwidth or 0.0)
        elif nf.diffuse:
            pos = self.positions[:1] if not self.scene.array.errors.any else self.positions
            gains = self.element_gains[:len(pos)]
            coherence = diffuse_coherence(pos, nf.field)                    # (T or 1, N, N)
            q = (10.0 ** (nf.level_db / 10.0)) * (
                gains[:, :, None] * coherence * np.conj(gains[:, None, :]))
            lam, e = np.linalg.eigh(q)
            self.diffuse_factor = e * np.sqrt(np.maximum(lam, 0.0))[:, None, :]

    def noise_covariance(self, rows: slice = slice(None)) -> np.ndarray:
        """True noise covariance (T or 1, N, N) of the trials in ``rows``: the thermal
        floor (each channel's power on the diagonal) plus the diffuse field ``C C^H``."""
        pw = self.channel_noise[rows]
        q = np.zeros(pw.shape + (pw.shape[-1],), dtype=complex)
        idx = np.arange(pw.shape[-1])
        q[:, idx, idx] = pw
        if self.diffuse_factor is not None:
            c = self.diffuse_factor
            c = c if len(c) == 1 else c[rows]
            q = q + c @ np.conj(np.swapaxes(c, -1, -2))
        return q

    # ------------------------------------------------------------------ geometry
    @property
    def look(self) -> np.ndarray:
        """Assumed look steering vector (N,): nominal positions, no errors."""
        return self.scene.look_steering()

    def steering(self, source: int, k=None, coupled: bool = True) -> np.ndarray:
        """True steering vector of source ``source`` (index into scene.sources).

        ``k`` None: at snapshot 0, shape (T, N). ``k`` an array of snapshot indices:
        shape (T, len(k), N). ``coupled`` False: without the mutual coupling (the
        element outputs before C mixes them; what the wideband streams delay).
        """
        if self.same_array and self.trials > 1:        # one row, the same for every trial
            return np.repeat(self._steering(source, k, slice(0, 1), coupled), self.trials,
                             axis=0)
        return self._steering(source, k, slice(None), coupled)

    def _steering(self, source: int, k, rows: slice, coupled: bool = True) -> np.ndarray:
        src = self.scene.sources[source]
        kk = np.atleast_1d(np.asarray(0 if k is None else k))
        u = geometry.direction_vector(*src.direction(kk))                    # (M, 3)
        # elementwise products (not matmul) so results do not depend on batch shape
        phase = 2 * np.pi * (self.positions[rows, None, :, :] * u[None, :, None, :]).sum(-1)
        a = self.element_gains[rows, None, :] * np.exp(1j * phase)
        if self.scene.array.patterned:
            a = self._element_effects(a, u, coupled)
        return a[:, 0, :] if k is None else a

    def _element_effects(self, a: np.ndarray, u: np.ndarray,
                         coupled: bool = True) -> np.ndarray:
        """Element pattern and (``coupled``) mutual coupling on plane-wave responses a
        (..., M, N) toward unit vectors u (M, 3) (:mod:`adapt.scene.elements`)."""
        arr = self.scene.array
        a = a * elements.pattern_gain(arr.element, u)[:, None]
        if arr.coupling is not None and coupled:
            a = elements.apply_coupling(elements.coupling_matrix(arr.coupling, a.shape[-1]), a)
        return a

    def steering_toward(self, azimuth_deg: float, elevation_deg: float = 0.0,
                        coupled: bool = True) -> np.ndarray:
        """True array response (T, N) toward a fixed direction (hardware errors
        included): what a plane wave from there actually produces at the elements
        (``coupled`` False: before the mutual coupling)."""
        u = geometry.direction_vector(azimuth_deg, elevation_deg)
        rows = slice(0, 1) if self.same_array else slice(None)
        phase = 2 * np.pi * (self.positions[rows] * u).sum(-1)
        a = self.element_gains[rows] * np.exp(1j * phase)
        if self.scene.array.patterned:
            a = self._element_effects(a[:, None, :], u[None, :], coupled)[:, 0, :]
        return np.repeat(a, self.trials, axis=0) if len(a) < self.trials else a

    def desired_steering(self, k=None) -> np.ndarray:
        return self.steering(self.scene.desired_index, k)

    @property
    def same_array(self) -> bool:
        """True when every trial of the batch has the same array (no hardware errors),
        so the true covariances and steering vectors are the same for every trial."""
        return not self.scene.array.errors.any and not self.scene.noise.spread

    def covariance(self, k=None, *, training: bool = False, shared: bool = False,
                   data: bool = False) -> np.ndarray:
        """True interference-plus-noise covariance ``R_in`` (noise power 1 per element).

        ``k`` None: at snapshot 0, shape (T, N, N) (the whole run for a stationary scene).
        ``k`` an array of snapshot indices: shape (T, len(k), N, N), the covariance of the
        moment (gates and directions at that snapshot). ``training=True`` adds the wanted
        source when the scene trains with the signal present (the covariance of the
        training data). Quantisation noise is not included. ``shared=True``: when every
        trial has the same array (:attr:`same_array`), one row (leading axis 1) for all.
        ``data=True``: the covariance of ``block.data`` (the wanted source always in).

        Coherent copies (README, conventions): sources sharing one waveform add as one
        term ``v v^H``, ``v = sum_m sqrt(P_m) g_m(k) e^{j phi_m} a_m``, over the copied
        source and its copies; in the interference-plus-noise covariance the copies of
        the wanted source form their own group without it (their term is interference,
        its own term is the signal), so ``w^H R_in w`` is the power of everything in the
        output but the wanted source's own term.
        """
        sc = self.scene
        if sc.wideband:            # the dispersive model's spatial covariance (L = 1)
            return _wideband.space_time_covariance(
                self, 1, k, "data" if data else "training" if training else "interference")
        kk = np.atleast_1d(np.asarray(0 if k is None else k))
        n = sc.elements
        # without hardware errors every trial has the same array: one row, repeated
        uniform = self.trials > 1 and self.same_array
        rows = slice(0, 1) if uniform else slice(None)
        r = np.zeros((1 if uniform else self.trials, len(kk), n, n), dtype=complex)
        if sc.noise.plain:
            r += np.eye(n)
        else:
            r += self.noise_covariance(rows)[:, None]
        signal = data or (training and sc.training == "signal")
        if sc.coherent:
            self._coherent_terms(r, kk, rows, signal)
            if uniform and not shared:
                r = np.repeat(r, self.trials, axis=0)
            return r[:, 0] if k is None else r
        members = list(sc.interferer_indices)
        if signal:
            members.append(sc.desired_index)
        for i in members:
            src = sc.sources[i]
            a = self._steering(i, kk, rows)                            # (T or 1, M, N)
            p = src.power * src.active(kk).astype(float)              # (M,)
            r += p[None, :, None, None] * (a[..., :, None] * np.conj(a[..., None, :]))
        if uniform and not shared:
            r = np.repeat(r, self.trials, axis=0)
        return r[:, 0] if k is None else r

    def coherent_groups(self, signal: bool) -> list[list[int]]:
        """Sources whose terms add coherently, as lists of indices: each source that is
        not a copy with its copies. ``signal`` False: the wanted source is left out of
        its group (its copies stay together as interference)."""
        sc = self.scene
        groups: dict[int, list[int]] = {}
        for i in range(len(sc.sources)):
            if i == sc.desired_index and not signal:
                continue
            groups.setdefault(sc.origin_index(i), []).append(i)
        return [g for g in groups.values() if g]

    def _coherent_terms(self, r: np.ndarray, kk: np.ndarray, rows: slice,
                        signal: bool) -> None:
        """Add ``v v^H`` of every coherent group (:meth:`coherent_groups`) to ``r``
        (T or 1, M, N, N) in place."""
        sc = self.scene
        for group in self.coherent_groups(signal):
            v = 0
            for i in group:
                src = sc.sources[i]
                a = self._steering(i, kk, rows)                        # (T or 1, M, N)
                amp = np.sqrt(src.power) * src.active(kk).astype(float)
                if src.waveform.kind == "copy":
                    amp = amp * np.exp(1j * np.deg2rad(src.waveform.phase_deg))
                v = v + amp[None, :, None] * a
            r += v[..., :, None] * np.conj(v[..., None, :])

    # ------------------------------------------------------------------ streams
    def _waveform(self, keys, src_index: int, start: int, size: int,
                  scratch: dict | None = None) -> np.ndarray:
        """(T, B) unit-power waveform of one source over snapshots [start, start+size);
        ``keys``: the source's normal streams (:mod:`adapt.streams.normals`) for the random
        kinds: gaussian uses normals 2k, 2k+1 (real, imaginary) at snapshot k, bpsk the
        sign of normal k, qpsk the signs of normals 2k, 2k+1."""
        src = self.scene.sources[src_index]
        wf = src.waveform
        t_ = self.trials
        if wf.kind == "copy":       # the copied source's waveform (its streams), rotated
            origin = self.scene.origin_index(src_index)
            out = self._waveform(keys, origin, start, size, scratch)
            return out * np.exp(1j * np.deg2rad(wf.phase_deg))
        if wf.kind in ("gaussian", "bpsk", "qpsk"):
            rails = 1 if wf.kind == "bpsk" else 2
            z = scratch_array(scratch, "waveform", (t_, size, rails))
            normals.fill(keys, start * rails, z.reshape(t_, size * rails))
            if wf.kind == "gaussian":
                return z.view(np.complex128)[..., 0] * np.sqrt(0.5)
            sym = np.where(z >= 0, 1.0, -1.0)
            if rails == 1:
                return sym[..., 0].astype(complex)
            return (sym[..., 0] + 1j * sym[..., 1]) * np.sqrt(0.5)
        k = np.arange(start, start + size, dtype=float)
        phi0 = self.start_phases[:, src_index][:, None]
        if wf.kind == "tone":
            return np.exp(1j * (2 * np.pi * wf.frequency * k[None, :] + phi0))
        # chirp: instantaneous frequency start + (stop - start) m / period, m = k mod period
        m = np.mod(k, wf.period)
        cyc = wf.start * m + 0.5 * (wf.stop - wf.start) * m * m / wf.period
        return np.exp(1j * (2 * np.pi * cyc[None, :] + phi0))

    def blocks(self, snapshots: int | None = None, block: int | None = None,
               recycle: bool | int = False, first: int = 0, every: int = 1) -> Iterator[Block]:
        """Yield :class:`Block` s covering snapshots 0 .. snapshots-1 of every trial.

        Each call starts the streams afresh, so two calls yield identical data.
        ``recycle``: the largest arrays of a block (the noise-and-interference and the
        data arrays) are overwritten by the next block, for a consumer that is done with
        each block before asking for the next (the engine): no fresh large arrays per
        block, whose page faults cost much on virtual machines and serialise threads.
        An integer m > 1 keeps m sets of buffers used in turn, for a consumer that may
        still hold the m - 1 blocks before the newest (:meth:`blocks_on_threads`).
        The values are the same either way. ``first``, ``every``: only blocks number
        ``first``, ``first + every``, ... (numbered from 0; each starts at its number
        times ``block``), for :meth:`blocks_on_threads`; every snapshot is a function
        of its index alone, so those blocks are the same as in the whole sequence.
        """
        sc = self.scene
        k_total = int(sc.snapshots if snapshots is None else snapshots)
        if k_total < 1:
            raise ValueError(f"snapshots must be >= 1, got {k_total}")
        n = sc.elements
        b = default_block_size(self.trials, n, k_total) if block is None else int(block)
        if b < 1:
            raise ValueError(f"block must be >= 1 snapshot, got {b}")
        if int(every) < 1 or not 0 <= int(first) < int(every):
            raise ValueError(f"need 0 <= first < every, got first={first}, every={every}")
        starts = range(int(first) * b, k_total, int(every) * b)
        if sc.wideband:         # its blocks read their stream numbers directly, too
            yield from self._wideband_blocks(k_total, b, recycle, starts)
            return
        idx = self.trial_indices

        def keys_for(key: int):       # normal streams of SeedSequence(seed, (i, 1, key))
            return normals.stream_keys(self.seed, idx, _STREAMS, key)

        noise_keys = keys_for(_NOISE_KEY)
        source_keys = {i: keys_for(_component_key(s.name))
                       for i, s in enumerate(sc.sources)
                       if s.waveform.kind in ("gaussian", "bpsk", "qpsk")}
        for i, s in enumerate(sc.sources):
            if s.waveform.kind == "copy":       # a copy draws the copied source's streams
                source_keys[i] = source_keys.get(sc.origin_index(i))
        d_idx = sc.desired_index
        moving = [i for i in sc.interferer_indices if sc.sources[i].motion is not None]
        fixed = [i for i in sc.interferer_indices if sc.sources[i].motion is None]
        # (T, J, N): steering rows of the fixed interferers, added element by element
        fixed_a = np.stack([self.steering(i) for i in fixed], axis=1) if fixed else None
        desired_a = None if sc.sources[d_idx].motion is not None else self.steering(d_idx)
        rx = sc.receiver
        full_scale = 10.0 ** (rx.full_scale_db / 20.0)

        def envelope(i: int, start: int, size: int, kk: np.ndarray) -> np.ndarray:
            src = sc.sources[i]
            env = self._waveform(source_keys.get(i), i, start, size, kept)    # (T, B)
            env *= np.sqrt(src.power)
            if src.pulsing is not None:
                env *= src.active(kk)
            return env

        sets = _buffer_sets(recycle)
        kept: dict[str, np.ndarray] | None = None

        def take(name: str, shape: tuple, dtype) -> np.ndarray:
            return scratch_array(kept, name, shape, dtype)

        # the plain waveforms are formed in compiled passes outside the interpreter
        # lock, all fixed interferers in one call per block (equal to the numpy steps
        # of envelope() to the last bit); plans laid out once per run
        def plan_for(indices: list[int]):
            srcs = [sc.sources[i] for i in indices]
            params = [_envelope_params(s.waveform) for s in srcs]
            if not indices or not _kernels.compiled() or any(p is None for p in params):
                return None
            return _kernels.EnvelopePlan(
                [source_keys.get(i) for i in indices], [s.waveform.kind for s in srcs],
                params, self.start_phases[:, indices], [np.sqrt(s.power) for s in srcs],
                [s.pulsing is not None for s in srcs])

        def envelopes_into(indices: list[int], plan, start: int, size: int,
                           kk: np.ndarray, out: np.ndarray) -> None:
            if plan is None:
                for j, i in enumerate(indices):
                    out[:, :, j] = envelope(i, start, size, kk)
                return
            gates = None
            if plan.gated.any():
                gates = np.zeros((len(indices), size))
                for j, i in enumerate(indices):
                    if plan.gated[j]:
                        gates[j] = sc.sources[i].active(kk)
            _kernels.envelopes_fill(plan, start, gates, out)

        fixed_plan = plan_for(fixed)
        desired_plan = plan_for([d_idx])

        # one pass forms noise, fixed sources and the data (no moving sources)
        fused = not moving and desired_a is not None and sc.noise.plain
        noise_scale = np.sqrt(0.5) if sc.noise.plain else 1.0
        diffuse_keys = keys_for(_DIFFUSE_KEY) if sc.noise.diffuse else None

        for number, start in enumerate(starts):
            kept = sets[number % len(sets)] if sets else None
            size = min(b, k_total - start)
            kk = np.arange(start, start + size)
            if fixed:
                env = take("envelopes", (self.trials, size, len(fixed)), complex)
                envelopes_into(fixed, fixed_plan, start, size, kk, env)
            reference = np.empty((self.trials, size, 1), dtype=complex)
            envelopes_into([d_idx], desired_plan, start, size, kk, reference)
            reference = reference[..., 0]
            signal = None
            if fused:
                interference = take("noise", (self.trials, size, n), complex)
                data = take("data", interference.shape, complex)
                env_f, steer_f = (env, fixed_a) if fixed else \
                    (np.empty((self.trials, size, 0), complex), np.empty((1, 0, n), complex))
                normals.noisy_sources(noise_keys, start, np.sqrt(0.5), env_f, steer_f,
                                      reference, desired_a, interference, data)
            else:
                z = take("noise", (self.trials, size, n, 2), float)
                # normals (k n + e) 2 + (0, 1) of the noise stream: element e, snapshot k
                normals.fill(noise_keys, start * n * 2, z.reshape(self.trials, size * n * 2))
                interference = z.view(np.complex128)[..., 0]
                if not sc.noise.plain:
                    self._noise_field(interference, diffuse_keys, start, take)
                if fixed:
                    # noise sqrt(1/2) + env @ fixed_a, element by element (block-size free)
                    _kernels.add_sources(interference, noise_scale, env, fixed_a)
                elif sc.noise.plain:
                    interference *= np.sqrt(0.5)
                for i in moving:
                    interference += envelope(i, start, size, kk)[..., None] * self.steering(i, kk)
                if desired_a is not None:      # data = interference + reference a_d, one pass
                    data = _kernels.add_sources(interference, 1.0, reference[..., None],
                                                desired_a[:, None, :],
                                                out=take("data", interference.shape, complex))
                else:
                    signal = reference[..., None] * self.steering(d_idx, kk)
                    data = signal + interference
            data, training = _received(sc, data, interference, full_scale)
            yield Block(start, start + size, data, signal, training, reference, desired_a)

    def blocks_on_threads(self, snapshots: int | None = None, block: int | None = None,
                          threads: int = 2) -> Iterator[Block]:
        """The blocks of :meth:`blocks` (same values, same order), generated ahead by
        ``threads`` threads taking alternate blocks (thread i makes blocks i, i +
        threads, ...; the heavy parts, the random fills and source mixing, release the
        interpreter lock), so a run of few trials, whose trials cannot fill the cores,
        still uses them. Like ``blocks(recycle=True)``, it is for a consumer that is
        done with each block before asking for the next: each thread fills two sets of
        buffers in turn and starts a block only when one is free (a set is freed when
        the consumer asks for the block after the one it holds). The sets of all
        threads are held to about :data:`AHEAD_BYTES`: fewer threads when the blocks are
        large, none (:meth:`blocks` in sequence) when two sets of one thread would
        exceed it. A generation error is raised here; closing the iterator early stops
        the threads. ``threads=1`` falls back to :meth:`blocks`."""
        import queue
        import threading
        k_total = int(self.scene.snapshots if snapshots is None else snapshots)
        if k_total < 1:
            raise ValueError(f"snapshots must be >= 1, got {k_total}")
        b = default_block_size(self.trials, self.scene.elements, k_total) if block is None \
            else int(block)
        count = -(-k_total // max(b, 1))
        sets = 2
        threads = min(int(threads), count, AHEAD_BYTES // (sets * self.block_bytes(b)))
        if threads <= 1:
            yield from self.blocks(k_total, b, recycle=True)
            return
        stop = threading.Event()
        lanes = [queue.Queue(maxsize=1) for _ in range(threads)]
        free = [threading.Semaphore(sets) for _ in range(threads)]

        def wait(attempt) -> bool:
            # retry attempt() (a put or an acquire with a timeout) until it succeeds or
            # the consumer has gone; True when it succeeded
            while not stop.is_set():
                if attempt():
                    return True
            return False

        def put(i: int, item) -> bool:
            def attempt() -> bool:
                try:
                    lanes[i].put(item, timeout=0.1)
                    return True
                except queue.Full:
                    return False
            return wait(attempt)

        def make(i: int) -> None:
            try:
                made = self.blocks(k_total, b, recycle=sets, first=i, every=threads)
                while wait(lambda: free[i].acquire(timeout=0.1)):
                    blk = next(made, None)          # into this thread's next set
                    if blk is None or not put(i, ("block", blk)):
                        return
            except BaseException as exc:        # handed to the consumer
                put(i, ("error", exc))

        workers = [threading.Thread(target=make, args=(i,), daemon=True,
                                    name=f"adapt-blocks-{i}") for i in range(threads)]
        for w in workers:
            w.start()
        try:
            for n in range(count):
                kind, item = lanes[n % threads].get()
                if kind == "error":
                    raise item
                yield item
                free[n % threads].release()      # the consumer is done with block n
        finally:
            stop.set()
            for lane in lanes:              # unblock a producer waiting to put
                try:
                    lane.get_nowait()
                except queue.Empty:
                    pass
            for w in workers:
                w.join()

    def block_bytes(self, block: int) -> int:
        """About the bytes of one set of a block's large arrays (noise, interference,
        data, training, signal and one envelope per source, complex): what
        :meth:`blocks_on_threads` budgets per buffer set."""
        n = self.scene.elements
        return max(1, self.trials * int(block) * 16 * (5 * n + len(self.scene.sources)))

    def _noise_field(self, noise: np.ndarray, keys, start: int, take) -> None:
        """Turn unit-variance complex normals ``noise`` (T, B, N) (before the sqrt(1/2)
        scale) into the scene's noise, in place: each channel's thermal power, plus the
        diffuse field ``C z'`` from its own stream (normals (k N + e) 2 + (0, 1) of
        SeedSequence(seed, (i, 1, _DIFFUSE_KEY)), element e, snapshot k), added element
        by element (block-size free)."""
        t_, b, n = noise.shape
        if self.scene.noise.spread:
            noise *= np.sqrt(self.channel_noise)[:, None, :]
        if self.diffuse_factor is None:
            noise *= np.sqrt(0.5)
            return
        z = take("diffuse", (t_, b, n, 2), float)
        normals.fill(keys, start * n * 2, z.reshape(t_, b * n * 2))
        mix = np.sqrt(0.5) * np.swapaxes(self.diffuse_factor, -1, -2)      # (T or 1, N, N)
        _kernels.add_sources(noise, np.sqrt(0.5), z.view(np.complex128)[..., 0], mix)

    def _wideband_blocks(self, k_total: int, b: int, recycle: bool | int = False,
                         starts=None) -> Iterator[Block]:
        """Blocks of a wideband scene (:mod:`adapt.streams.wideband`): every source
        dispersed across the aperture (fixed filters, or the polynomial filters for
        moving, copied and copy sources), coupled when the array is (``C`` on each
        source's element outputs), added element by element in scene order to the
        noise (thermal, a white field, or a dispersive diffuse field); the reference is
        the wanted source's envelope at the array origin (zero advance); ``desired`` is
        None (the wanted signal is not rank one). The fixed filters of the noise-like,
        uncoupled sources are made once per batch and each such source is filtered,
        weighted and added in one pass (:func:`adapt.numerics.fir.add_filtered`). ``recycle``: as in :meth:`blocks`;
        ``starts``: the first snapshots of the blocks wanted (default: every block)."""
        sc = self.scene
        n = sc.elements
        idx = self.trial_indices
        noise_keys = normals.stream_keys(self.seed, idx, _STREAMS, _NOISE_KEY)
        keys = {i: normals.stream_keys(self.seed, idx, _STREAMS, _component_key(s.name))
                for i, s in enumerate(sc.sources)}
        delays = {i: _wideband.element_delays(self, i) for i in range(len(sc.sources))}
        steer = {i: self.steering(i, coupled=False) for i in range(len(sc.sources))}
        varying = {i: _wideband.uses_polynomial_filters(sc, i)
                   for i in range(len(sc.sources))}
        coupling = elements.coupling_matrix(sc.array.coupling, n)
        diffuse_keys = normals.stream_keys(self.seed, idx, _STREAMS, _DIFFUSE_KEY) \
            if sc.noise.diffuse else None
        d_idx = sc.desired_index
        rx = sc.receiver
        full_scale = 10.0 ** (rx.full_scale_db / 20.0)
        zero = np.zeros((self.trials, 1))

        def fresh(name, shape, dtype):
            return np.empty(shape, dtype)

        banks = {}
        for i, src in enumerate(sc.sources):
            if not _wideband.noise_like(src) or varying[i] or coupling is not None:
                continue
            h = _wideband.source_filters(self, i, delays[i], self.channel_filters)
            if i == d_idx:                  # the reference's filter as output N
                ref = _wideband.source_filters(self, i, zero)
                rows = max(len(h), len(ref))
                h = np.concatenate([np.broadcast_to(h, (rows,) + h.shape[1:]),
                                    np.broadcast_to(ref, (rows,) + ref.shape[1:])], axis=1)
            banks[i] = FilterBank(h)
        sets = _buffer_sets(recycle)
        kept: dict[str, np.ndarray] | None = None

        def take(name: str, shape: tuple, dtype) -> np.ndarray:
            return scratch_array(kept, name, shape, dtype)

        for number, start in enumerate(range(0, k_total, b) if starts is None else starts):
            kept = sets[number % len(sets)] if sets else None
            size = min(b, k_total - start)
            kk = np.arange(start, start + size)
            z = take("noise", (self.trials, size, n, 2), float)
            normals.fill(noise_keys, start * n * 2, z.reshape(self.trials, size * n * 2))
            if sc.noise.plain:
                interference = np.multiply(z.view(np.complex128)[..., 0], np.sqrt(0.5),
                                           out=take("interference", (self.trials, size, n),
                                                    complex))
            else:
                interference = z.view(np.complex128)[..., 0]
                self._noise_field(interference, diffuse_keys, start, fresh)
                if self.diffuse_taps is not None:
                    interference += _wideband.diffuse_block(self, diffuse_keys, start, size)
            signal = None
            reference = None
            for i, src in enumerate(sc.sources):
                gate = np.sqrt(src.power) * src.active(kk).astype(float)       # (B,)
                if i in banks:
                    s = _wideband.white_block(self, i, keys[i], start, size)
                    if i == d_idx:
                        signal = take("signal", interference.shape, complex)
                        reference = np.empty((self.trials, size), dtype=complex)
                        add_filtered(banks[i], s, steer[i], gate, signal, reference,
                                     accumulate=False)
                    else:
                        add_filtered(banks[i], s, steer[i], gate, interference)
                    continue
                origin = sc.origin_index(i)
                if varying[i]:
                    part = _wideband.polynomial_block(self, i, keys[origin], start, size,
                                                      self.channel_filters)
                    part *= gate[None, :, None]
                    if src.waveform.kind == "copy":
                        part *= np.exp(1j * np.deg2rad(src.waveform.phase_deg))
                else:
                    part = _wideband.source_block(self, i, keys[i], start, size, delays[i],
                                                  self.channel_filters)
                    part *= steer[i][:, None, :] * gate[None, :, None]
                if coupling is not None:
                    part = elements.apply_coupling(coupling, part)
                if i == d_idx:
                    signal = part
                    if varying[i]:
                        ref = _wideband.polynomial_block(self, i, keys[i], start, size,
                                                         reference=True)
                        reference = ref * gate[None, :]
                    else:
                        ref = _wideband.source_block(self, i, keys[i], start, size, zero)
                        reference = ref[..., 0] * gate[None, :]
                else:
                    interference += part
            data = np.add(interference, signal, out=take("data", interference.shape, complex))
            data, training = _received(sc, data, interference, full_scale)
            yield Block(start, start + size, data, signal, training, reference, None)

    def samples(self, snapshots: int | None = None) -> Block:
        """All snapshots as one :class:`Block` (materialised; use :meth:`blocks` for long
        streams)."""
        k_total = int(self.scene.snapshots if snapshots is None else snapshots)
        return next(iter(self.blocks(k_total, block=k_total)))


def generate(scene: Scene, trials: int | None = None, snapshots: int | None = None,
             seed: int | None = None) -> tuple[TrialBatch, Block]:
    """Draw ``trials`` trials of ``snapshots`` snapshots in one go: (batch, block)."""
    batch = TrialBatch(scene, trials=trials, seed=seed)
    return batch, batch.samples(snapshots)
