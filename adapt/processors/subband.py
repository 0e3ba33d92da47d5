"""Sub-band (FFT-domain) MVDR: one loaded MVDR per frequency bin, synthesised back into
one FIR filter per element.

Analysis: each element's training stream (``block.training``) is cut into frames of F
snapshots (frame j covers snapshots jF .. jF + F - 1, from the stream's start), windowed
(Hann, or rectangular) and transformed with an F-point FFT; bin b (frequency
``nu_b = fftfreq(F)[b]`` cycles per snapshot) collects one training vector per frame.
Per bin, after m complete frames: ``R_b = (1/m) sum X_b X_b^H / sum(window^2) + delta I``
(noise floor 1 per bin), ``delta`` the loading ``loading_db`` dB above the noise, and
``w_b = R_b^-1 a_b / (a_b^H R_b^-1 a_b)`` with ``a_b`` the assumed look steering at that
frequency, ``exp(j 2 pi p_n.u (1 + nu_b B))`` (B the scene's fractional bandwidth; the
carrier's look vector for a narrowband scene).

Synthesis: element n's filter has the frequency response ``H_n(nu_b) = conj(w_{b,n})
exp(-j 2 pi nu_b c)`` at the bin frequencies, c = F // 2 (a delay that centres the
impulse responses); its F taps are the inverse FFT (frequency sampling). The weights
reported are those taps as a space-time weight of N x F entries in the stacked order of
``taps=F`` (entry ``l N + n`` multiplies element n delayed by l snapshots; ``y = w^H z``),
so outputs and scores are exact for the filter applied; :func:`overlap_save` applies it
block-wise with FFTs of 2F points and gives the same output (tested).

Latency: the look-direction response is a pure delay of c = F // 2 snapshots at every
bin frequency; weights change once per frame (every F snapshots; checkpoint k uses the
floor(k / F) frames completed); overlap-save adds a frame (F snapshots) of buffering.
Training: each bin sees one snapshot per frame, so after K snapshots floor(K / F) per
bin; without loading a bin's covariance is singular until N frames (N F snapshots), and
sample-matrix-inversion theory (Reed, Mallett and Brennan 1974) then applies per bin
with K / F in place of K.

Source: frequency-domain (sub-band) adaptive beamforming, Compton, "The relationship
between tapped delay-line and FFT processing in adaptive arrays", IEEE Trans. AP-36
(1988) (from memory); Van Trees, *Optimum Array Processing* (2002), broadband chapter
(MVDR per frequency bin); overlap-save, Oppenheim and Schafer, *Discrete-Time Signal
Processing*, ch. 8. Checkable facts: the look-direction response is exactly the delay c
at every bin; overlap-save output equals the direct form.

Parameters: ``bins`` F (2 .. 256, default 16); ``loading_db`` dB above the noise
(default 10; none: no loading); ``window`` hann | rectangular.
Cost: per snapshot O(N log F) for the FFTs and O(N^2) to accumulate; per weight update
F Cholesky solves of size N.
"""
from __future__ import annotations

import numpy as np

from adapt.numerics.linalg import solve_hermitian
from adapt.processors.base import Context, Parameter, Processor, State
from adapt.scene import geometry


def overlap_save(x: np.ndarray, weights: np.ndarray, taps: int) -> np.ndarray:
    """Apply space-time weights (T, N taps) (stacked order) to a stream x (T, K, N) with
    FFTs of 2 taps points (overlap-save; zeros before the stream): ``y_k = sum_{l,n}
    conj(w_{l,n}) x_{k-l,n}``, (T, K)."""
    t_, k, n = x.shape
    h = np.conj(weights).reshape(t_, taps, n)                       # h[l, n]
    size = 2 * taps
    hf = np.fft.fft(h, size, axis=1)                                # (T, 2F, N)
    padded = np.concatenate([np.zeros((t_, taps, n), x.dtype), x,
                             np.zeros((t_, (-k) % taps, n), x.dtype)], axis=1)
    out = []
    for s in range(0, padded.shape[1] - taps, taps):
        seg = np.fft.fft(padded[:, s:s + size], size, axis=1) if s + size <= padded.shape[1] \
            else np.fft.fft(padded[:, s:], size, axis=1)
        y = np.fft.ifft((seg * hf).sum(-1), axis=1)
        out.append(y[:, taps:size])                                 # the valid half
    return np.concatenate(out, axis=1)[:, :k]


class SubbandMvdr(Processor):
    """Sub-band MVDR: per FFT bin a loaded MVDR at the bin's look steering, synthesised
    into one FIR filter per element (see the module docstring).

    Parameters
    ----------
    bins : int
        FFT length F (2 .. 256): bins, and snapshots per frame.
    loading_db : float or None
        Diagonal loading per bin, dB above the noise (none: unloaded).
    window : str
        Analysis window, hann or rectangular.

    Returns
    -------
    weights : ndarray, (T, C, N F)
        Space-time weights in the stacked order of ``taps=F`` (entry ``l N + n``).

    Notes
    -----
    Capability flags: none (it trains on ``block.training`` by frames; not a sample
    covariance of snapshots, so no drawn covariances and no Reed-Mallett-Brennan law).
    Checkable fact: the look-direction response is exactly a delay of F // 2 snapshots
    at every bin frequency; overlap-save output equals the direct form.

    References
    ----------
    .. [1] R. T. Compton, "The relationship between tapped delay-line and FFT processing
       in adaptive arrays", IEEE Trans. AP-36 (1988) (from memory).
    .. [2] H. L. Van Trees, *Optimum Array Processing* (2002), broadband chapter.
    """

    method = "subband"
    min_elements = 2
    summary = "sub-band MVDR: FFT of F bins, loaded MVDR per bin, FIR synthesis"
    parameters = {
        "bins": Parameter("int", 16, "FFT length F: bins, and snapshots per frame",
                          unit="bins", low=2, high=256),
        "loading_db": Parameter("float", 10.0, "diagonal loading per bin over the noise",
                                unit="dB", low=-100, high=100, allow_none=True),
        "window": Parameter("choice", "hann", "analysis window",
                            choices=("hann", "rectangular")),
    }

    def _look(self, context: Context) -> np.ndarray:
        """(F, N) assumed look steering at every bin frequency."""
        f = self.params["bins"]
        nu = np.fft.fftfreq(f)
        a = np.asarray(context.look, dtype=complex)
        if not context.fractional_bandwidth or context.look_direction is None:
            return np.broadcast_to(a, (f, a.shape[0])).copy()
        u = geometry.direction_vector(*context.look_direction)
        pu = np.asarray(context.positions) @ u
        return a[None, :] * np.exp(2j * np.pi * pu[None, :] * nu[:, None]
                                   * context.fractional_bandwidth)

    def _fir(self, wb: np.ndarray) -> np.ndarray:
        """Bin weights (..., F, N) -> space-time weights (..., F N)."""
        f = self.params["bins"]
        c = f // 2
        nu = np.fft.fftfreq(f)
        resp = np.conj(wb) * np.exp(-2j * np.pi * nu * c)[:, None]
        h = np.fft.ifft(resp, axis=-2)                              # h[l, n] = conj(w_st)
        return np.conj(h).reshape(h.shape[:-2] + (-1,))

    def initial_weights(self, context: Context) -> np.ndarray:
        a = self._look(context)
        w = self._fir(a / a.shape[-1])
        return np.broadcast_to(w, (context.trials, w.shape[-1])).copy()

    def begin(self, context: Context) -> State:
        f = self.params["bins"]
        n = context.elements
        win = np.hanning(f + 1)[:f] if self.params["window"] == "hann" else np.ones(f)
        return State(context=context, a=self._look(context), win=win,
                     norm=float(np.sum(win ** 2)),
                     sums=np.zeros((context.trials, f, n, n), dtype=complex), frames=0,
                     left=np.zeros((context.trials, 0, n), dtype=complex),
                     initial=self.initial_weights(context))

    def _weights(self, state: State, sums: np.ndarray, frames: int) -> np.ndarray:
        if frames == 0:
            return state.initial
        n = sums.shape[-1]
        r = sums / (frames * state.norm)
        if self.params["loading_db"] is not None:
            r = r + 10.0 ** (self.params["loading_db"] / 10.0) * np.eye(n)
        a = np.broadcast_to(state.a, r.shape[:-1])
        x = solve_hermitian(r, a)
        w = x / np.conj(np.einsum("...n,...n->...", np.conj(a), x))[..., None]
        return self._fir(w)

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        f = self.params["bins"]
        t_ = state.context.trials
        buf = np.concatenate([state.left, block.training], axis=1)
        count = buf.shape[1] // f
        wanted = {int(s) // f for s in np.asarray(checkpoints, dtype=np.int64)}
        kept = {state.frames: state.sums.copy()}
        if count:
            frames = buf[:, :count * f].reshape(t_, count, f, -1) * state.win[:, None]
            spec = np.fft.fft(frames, axis=2)                      # (T, m, F, N)
            for j in range(count):     # frame by frame: sums independent of block sizes
                x = spec[:, j]
                state.sums += x[..., :, None] * np.conj(x[..., None, :])
                state.frames += 1
                if state.frames in wanted:
                    kept[state.frames] = state.sums.copy()
        state.left = buf[:, count * f:].copy()
        out = np.empty((t_, len(checkpoints), f * state.context.elements), dtype=complex)
        for i, s in enumerate(np.asarray(checkpoints, dtype=np.int64)):
            done = int(s) // f
            out[:, i] = self._weights(state, kept[done], done)
        return out
