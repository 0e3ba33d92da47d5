"""The drawn-covariance fast path: sample covariances drawn directly, not from samples.

For a stationary scene whose training data are circular complex Gaussian (thermal noise
and noise-like ``gaussian`` sources only, no ADC quantisation), the sum of k training
snapshots ``S = sum x x^H`` is complex-Wishart distributed, ``S ~ CW_N(k, R)`` with R
the true training covariance, and the sums over disjoint snapshot spans are independent.
So the window sums a sample-covariance processor needs at its checkpoints can be drawn
span by span, at a cost that does not depend on the number of snapshots:

* the stream is cut at every checkpoint's update time and window start (for every
  processor); the sum over each span of n snapshots is drawn as ``G G^H`` with
  ``G = L_R A``, ``L_R`` the Cholesky factor of the trial's true training covariance and
  A the Bartlett factor of ``CW_N(n, I)``: lower triangular, ``|A_ii|^2 ~ Gamma(n - i, 1)``
  (that is chi-square with ``2(n - i)`` degrees of freedom over 2, i = 0..N-1) and
  ``A_ij ~ CN(0, 1)`` below the diagonal in the first ``min(n, N)`` columns (for
  ``n < N`` the factor is N x n lower-trapezoidal and S has rank n);
* a window sum is the sum of the spans inside it, so all processors and checkpoints of
  a trial share one draw (common random numbers, like the sample path).

Source: Goodman, "Statistical analysis based on a certain multivariate complex Gaussian
distribution", Ann. Math. Stat. 34 (1963) for the complex Wishart law; Bartlett's
decomposition (Bartlett 1933; Muirhead, *Aspects of Multivariate Statistical Theory*,
Thm 3.2.14, real case) carried to the complex case. Checkable fact (tested): the
normalised SINR of unloaded SMI from a drawn covariance follows the Reed-Mallett-Brennan
law Beta(K-N+2, N-1), the same distribution as from samples.

Randomness: trial i draws from ``SeedSequence(seed, spawn_key=(i, 2, ...))`` only (the
normals from the counter-based stream of key (i, 2, 1), the gamma variates from that of
key (i, 2, 2), :mod:`adapt.streams.normals`; the sample streams use keys (i, 0) and (i, 1)), so results do not depend on the chunk size. They
depend on the set of cut points, i.e. on the checkpoints and the processors' windows.
A drawn run is a different (equally distributed) realisation from the sample path: the
two agree in distribution, not trial by trial.

What it gives up: there are no output samples, so the SINR measured from samples is NaN;
only covariance-based processors (those built on the sample covariance: smi, eigenspace,
lcmv, power_inversion; and optimum and conventional, which need no data) can run.
"""
from __future__ import annotations

import time
from typing import Sequence

import numpy as np

from adapt.errors import InputError
from adapt.numerics import kernels as _kernels
from adapt.numerics.linalg import compiled_solves
from adapt.processors import registry
from adapt.processors.base import Context, Processor, ProcessorResult
from adapt.scene.model import Scene
from adapt.streams import normals
from adapt.streams.snapshots import scratch_array

__all__ = ["DRAWS", "DrawStreams", "covariance_draw_refusal", "check_covariance_draw", "cut_points",
           "bartlett_factors", "span_sums", "run_drawn"]

#: ways of producing the training data: ``samples`` (the streams) or ``covariance``
DRAWS = ("samples", "covariance")
#: spawn-key component of the drawn covariances (streams use 0 and 1)
_DRAWN_KEY = 2
#: complex values per (trials, spans, N, N) array of one trial group (about 4 MB)
_GROUP_VALUES = 1 << 18


def covariance_draw_refusal(scene: Scene, processors: Sequence[Processor]) -> str | None:
    """Why ``draw="covariance"`` cannot serve this scene and these processors, or None.

    Needs: a stationary scene (no pulsing, no motion), no ADC quantisation, every source
    in the training data Gaussian (``waveform: gaussian``; the wanted source counts only
    when the scene trains with the signal present), and only covariance-based processors.
    """
    if not scene.stationary:
        moving = [s.name for s in scene.sources if not s.stationary]
        return ("the scene changes over time (" + ", ".join(moving) + " pulse or move): "
                "a drawn covariance needs a stationary scene")
    if scene.wideband:
        return ("the scene is wideband: its filtered sources leave neighbouring snapshots "
                "dependent, so their sample covariance is not Wishart (draw samples)")
    tapped = [p.label for p in processors if int(p.params.get("taps", 1)) > 1]
    if tapped:
        return ("these processors use tapped delay lines, whose stacked snapshots overlap "
                "(not independent): " + ", ".join(tapped) + " (draw samples)")
    if scene.receiver.bits is not None:
        return (f"the receiver quantises to {scene.receiver.bits} bits: quantised data are "
                "not Gaussian, so their sample covariance is not Wishart")
    members = list(scene.interferer_indices)
    if scene.training == "signal":
        members.append(scene.desired_index)
    odd = [f"{scene.sources[i].name} ({scene.sources[i].waveform.kind})" for i in members
           if scene.sources[i].waveform.kind != "gaussian"]
    if odd:
        return ("these training-data sources are not Gaussian: " + ", ".join(odd)
                + "; their sample covariance is not Wishart (use waveform: gaussian, or "
                "draw samples)")
    bad = [p.label for p in processors if not p.drawn_covariance]
    if bad:
        serves = ", ".join(m for m, cls in registry().items() if cls.drawn_covariance)
        return ("these processors need the samples themselves, not only their covariance: "
                + ", ".join(bad) + f" (a drawn covariance serves {serves})")
    return None


def check_covariance_draw(scene: Scene, processors: Sequence[Processor]) -> None:
    """Raise :class:`~adapt.errors.InputError` when ``draw="covariance"`` cannot be
    used (see :func:`covariance_draw_refusal`)."""
    why = covariance_draw_refusal(scene, processors)
    if why is not None:
        raise InputError("cannot draw the covariance directly: " + why, path="draw",
                         value="covariance", allowed="samples")


def cut_points(processors: Sequence[Processor], checkpoints) -> np.ndarray:
    """Sorted snapshot indices where the stream is cut into independently drawn spans:
    0, every update time behind a checkpoint and every window start, for every
    covariance-based processor."""
    cps = np.asarray(checkpoints, dtype=np.int64)
    cuts = [np.zeros(1, dtype=np.int64)]
    for p in processors:
        if p.covariance_based:
            times = p.update_times(cps)
            cuts += [times, p.window_start(times)]
    return np.unique(np.concatenate(cuts))


class DrawStreams:
    """The random streams of a drawn-covariance run for some trials, counter-based
    (:mod:`adapt.streams.normals`): trial i's gamma variates from the stream of
    ``SeedSequence(seed, spawn_key=(i, 2, 2))`` and its below-diagonal normals from
    that of ``SeedSequence(seed, spawn_key=(i, 2, 1))``. Slicing gives the streams of
    a subset of the trials (the same streams, not new ones)."""

    def __init__(self, seed: int, trials, _parts=None):
        if _parts is not None:
            self.normal_keys, self.gamma_keys = _parts
            return
        idx = np.asarray(trials, dtype=np.int64).reshape(-1)
        self.normal_keys = normals.stream_keys(int(seed), idx, _DRAWN_KEY, 1)
        self.gamma_keys = normals.stream_keys(int(seed), idx, _DRAWN_KEY, 2)

    def __len__(self) -> int:
        return len(self.normal_keys)

    def __getitem__(self, rows: slice) -> "DrawStreams":
        if not isinstance(rows, slice):
            raise TypeError("DrawStreams are sliced by a slice of trials")
        return DrawStreams(0, (), _parts=(self.normal_keys[rows], self.gamma_keys[rows]))


def _draws(streams: DrawStreams, lengths: np.ndarray, n: int, scratch: dict | None = None):
    """One compiled (or vectorised) pass each for the gamma variates (S, N) of the
    diagonals and the normals of the below-diagonal entries (E, 2) of every span of
    every trial; returns (gam, z, (si, ii, jj)) (in ``scratch`` buffers when given, see
    :func:`adapt.streams.snapshots.scratch_array`)."""
    lengths = np.asarray(lengths, dtype=np.int64)
    if lengths.ndim != 1 or lengths.size == 0 or lengths.min() < 1:
        raise ValueError("span lengths must be a non-empty list of counts >= 1")
    if n < 1:
        raise ValueError(f"elements must be >= 1, got {n}")
    if not isinstance(streams, DrawStreams):
        raise TypeError(f"streams must be a wishart.DrawStreams, got {type(streams).__name__}")
    s_, t_ = len(lengths), len(streams)
    shape = np.maximum(lengths[:, None] - np.arange(n)[None, :], 0).astype(float)   # (S, N)
    # below-diagonal entries (s, i, j), j < i, in the first n_s columns only (rank n_s)
    where = np.nonzero((np.arange(n)[None, None, :] < np.arange(n)[None, :, None])
                       & (np.arange(n)[None, None, :] < lengths[:, None, None]))
    gam = scratch_array(scratch, "gamma", (t_, s_, n))
    z = scratch_array(scratch, "normals", (t_, len(where[0]), 2))
    normals.gamma_fill(streams.gamma_keys, shape.reshape(-1), gam.reshape(t_, -1))
    normals.fill(streams.normal_keys, 0, z.reshape(t_, -1))   # entry e: normals 2e, 2e+1
    return gam, z, where


def bartlett_factors(streams: DrawStreams, lengths: np.ndarray,
                     elements: int) -> np.ndarray:
    """(T, S, N, N) Bartlett factors A of ``CW_N(n_s, I)`` for each trial's streams and
    each span length n_s (all >= 1): ``A A^H`` is distributed as the sum of n_s outer
    products of independent CN(0, I) vectors (Goodman 1963; Bartlett decomposition).
    The arithmetic is batched over trials.
    """
    n = int(elements)
    gam, z, (si, ii, jj) = _draws(streams, lengths, n)
    a = np.zeros(gam.shape + (n,), dtype=complex)
    z *= np.sqrt(0.5)
    a[:, si, ii, jj] = z.view(np.complex128)[..., 0]
    idx = np.arange(n)
    a[..., idx, idx] = np.sqrt(gam)
    return a


def span_sums(covariance: np.ndarray, streams: DrawStreams,
              lengths: np.ndarray, cumulative: bool = False,
              scratch: dict | None = None) -> np.ndarray:
    """(T, S, N, N) independent draws of ``sum x x^H`` over spans of ``lengths`` (S,)
    snapshots of CN(0, R) data, R = ``covariance`` (T, N, N) Hermitian positive definite,
    or (1, N, N) shared by every trial: ``L_R A A^H L_R^H`` with A from
    :func:`bartlett_factors`, combined by :func:`adapt.numerics.kernels.wishart_spans`
    (compiled: a loop that skips the triangles' zeros, equal to rounding, exactly
    Hermitian sums; else batched numpy products).
    ``cumulative``: the running totals instead, entry s the sum over spans 0..s (the
    growing-window sums; ``np.cumsum`` order). ``scratch``: a dict whose buffers are
    reused from call to call (the result is then a view into it, valid
    until the next call with the same dict)."""
    r = np.asarray(covariance)
    if r.ndim != 3 or r.shape[1] != r.shape[2] or r.shape[0] not in (1, len(streams)):
        raise ValueError(f"covariance must be (T, N, N) with T = {len(streams)} trials, "
                         f"or (1, N, N) shared by all, got {r.shape}")
    chol = np.linalg.cholesky(r)                                   # (T or 1, N, N)
    n = r.shape[-1]
    gam, z, (si, ii, jj) = _draws(streams, lengths, n, scratch)
    counts = np.bincount(si, minlength=len(lengths))
    out = scratch_array(scratch, "sums", (len(streams), len(lengths), n, n), complex)
    return _kernels.wishart_spans(chol, gam, z, ii, jj, counts, cumulative, out=out)


class _Span:
    """Stand-in for a block when a data-free processor (optimum, conventional) is asked
    for its weights: it carries the span, never data."""

    def __init__(self, start: int, stop: int):
        self.start, self.stop = start, stop
        self.data = self.training = self.reference = self.signal = None


def run_drawn(processors: Sequence[Processor], batch, context: Context,
              checkpoints: np.ndarray) -> list[ProcessorResult]:
    """Weights (T, C, N) of every processor at ``checkpoints`` (sorted, >= 1) from drawn
    window sums, for the trials of ``batch`` (a :class:`~adapt.streams.snapshots.TrialBatch`).
    The counterpart of :func:`adapt.processors.run_processors` for ``draw="covariance"``;
    InputError when the scene or a processor does not allow it. Trials are worked in
    cache-sized groups (results do not depend on the grouping)."""
    cps = np.asarray(checkpoints, dtype=np.int64)
    procs = list(processors)
    check_covariance_draw(batch.scene, procs)
    t_, n = batch.trials, batch.scene.elements
    seconds = [0.0] * len(procs)
    initial, states = [], []
    for i, p in enumerate(procs):
        t0 = time.perf_counter()
        p.check(context)
        states.append(p.begin(context))
        initial.append(p.initial_weights(context))
        seconds[i] += time.perf_counter() - t0
    weights = [np.empty((t_, len(cps), n), dtype=complex) for _ in procs]
    for i, p in enumerate(procs):
        if not p.covariance_based:
            t0 = time.perf_counter()
            weights[i][:] = p.update(states[i], _Span(0, int(cps[-1])), cps)
            seconds[i] += time.perf_counter() - t0
    cov = [(i, p) for i, p in enumerate(procs) if p.covariance_based]
    cuts = cut_points(procs, cps)
    if cov and len(cuts) > 1:                # spans [cuts[s], cuts[s+1]); none past the last
        t0 = time.perf_counter()
        r = batch.covariance(training=True, shared=True)            # (T or 1, N, N)

        def rows(lo: int, hi: int) -> np.ndarray:
            return r if len(r) == 1 else r[lo:hi]

        scratch: dict = {}                 # buffers reused by every group of this batch
        streams = DrawStreams(batch.seed, batch.trial_indices)
        lengths = np.diff(cuts)
        plans = []
        for i, p in cov:
            times = p.update_times(cps)
            distinct = np.unique(times[times > 0])
            lo_i = np.searchsorted(cuts, p.window_start(distinct))
            hi_i = np.searchsorted(cuts, distinct)     # spans before index hi_i end by u
            s_i = np.arange(len(lengths))[None, :]
            mask = ((s_i >= lo_i[:, None]) & (s_i < hi_i[:, None])).astype(float)
            plans.append((i, p, distinct, hi_i, None if np.all(lo_i == 0) else mask))
        growing = any(m is None for *_, m in plans)
        shared = time.perf_counter() - t0
        group = max(1, _GROUP_VALUES // (len(lengths) * n * n))
        only_growing = all(m is None for *_, m in plans)
        hermitian = _kernels.compiled()          # the compiled sums are exactly Hermitian
        for lo in range(0, t_, group):
            hi = min(t_, lo + group)
            t0 = time.perf_counter()
            if only_growing:     # running totals straight from the draw: total[s] = spans 0..s
                total = span_sums(rows(lo, hi), streams[lo:hi], lengths, cumulative=True,
                                  scratch=scratch)
            else:
                spans = span_sums(rows(lo, hi), streams[lo:hi], lengths)  # (G, S, N, N)
                if growing:
                    total = np.cumsum(spans, axis=1)
            shared += time.perf_counter() - t0
            for i, p, distinct, hi_i, mask in plans:
                t1 = time.perf_counter()
                if mask is None:                     # growing: the totals up to hi_i
                    every = len(hi_i) == len(lengths) and np.all(hi_i == np.arange(1, len(hi_i) + 1))
                    table = total if every else total[:, hi_i - 1]
                else:                                # sliding: the spans inside
                    table = np.einsum("us,tsij->tuij", mask, spans)
                with compiled_solves():
                    weights[i][lo:hi] = p.weights_from_sums(
                        states[i], cps, distinct, table, slice(lo, hi), hermitian=hermitian and mask is None)
                seconds[i] += time.perf_counter() - t1
        for i, _ in cov:
            seconds[i] += shared / len(cov)
    elif cov:                                  # every checkpoint before the first update
        for i, p in cov:
            weights[i][:] = initial[i][:, None, :]
    return [ProcessorResult(label=p.label, method=p.method, params=dict(p.params),
                            checkpoints=cps, weights=weights[i], initial=initial[i],
                            seconds=seconds[i]) for i, p in enumerate(procs)]
