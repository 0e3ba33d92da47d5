"""The Monte Carlo engine's core: draw a batch of trials, run processors, score every
checkpoint.

``evaluate_batch`` scores one :class:`~adapt.streams.snapshots.TrialBatch`; ``merge`` joins
consecutive batches; :func:`adapt.engine.execute.run_trials` (what ``compare``, ``size`` and the
benchmarks share) runs the batches serially, on a cluster or resumably. For each processor,
checkpoint and trial it returns the output SINR on the true covariance of the moment,
the normalised SINR and loss against the optimum, the white-noise gain, the null depth
toward every interferer and the SINR measured from the output samples.

Timing convention: the weight a processor holds after c snapshots is scored against the
scene as it is at snapshot index c (0-based), the first snapshot that weight is applied
to. For a stationary scene this is simply *the* covariance; for a pulsing or moving
jammer it makes the scores dip when the scene changes and recover as the processor
adapts.

Trials are processed in chunks (``chunk`` trials at a time, each chunk its own
:class:`~adapt.streams.snapshots.TrialBatch`); every trial's randomness comes from its own seed, so
results do not depend on the chunk size, block size or worker count.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Iterator, Sequence

import numpy as np

from adapt.engine import scores
from adapt.errors import SpecError
from adapt.numerics import kernels as _kernels
from adapt.processors import Context, Processor, run_processors
from adapt.processors.base import normalised_checkpoints
from adapt.scene.model import Scene
from adapt.streams import wideband
from adapt.streams.snapshots import Block, TrialBatch

__all__ = ["ProcessorScores", "Evaluation", "evaluate_batch", "merge", "trial_chunks",
           "default_checkpoints"]


def default_checkpoints(snapshots: int, per_octave: int = 4, first: int = 1) -> np.ndarray:
    """Checkpoints spaced geometrically (``per_octave`` per doubling) from ``first`` to
    ``snapshots``, always including both ends."""
    if snapshots < 1:
        raise ValueError(f"snapshots must be >= 1, got {snapshots}")
    n = max(2, int(np.ceil(np.log2(max(snapshots / first, 1)) * per_octave)) + 1)
    c = np.unique(np.round(np.geomspace(first, snapshots, n)).astype(np.int64))
    return c[(c >= 1) & (c <= snapshots)]


def trial_chunks(trials: int, chunk: int | None, first: int = 0) -> list[tuple[int, int]]:
    """(first_trial, count) pairs covering ``trials`` trials in chunks of ``chunk``."""
    if trials < 1:
        raise ValueError(f"trials must be >= 1, got {trials}")
    size = trials if not chunk else int(chunk)
    if size < 1:
        raise ValueError(f"chunk must be >= 1 trial, got {chunk}")
    return [(first + s, min(size, trials - s)) for s in range(0, trials, size)]


@dataclass
class ProcessorScores:
    """Scores of one processor: arrays are (trials, checkpoints) unless noted."""
    label: str
    method: str
    params: dict
    spec: str
    checkpoints: np.ndarray
    sinr: np.ndarray
    normalised: np.ndarray
    loss_db: np.ndarray
    white_noise_gain: np.ndarray
    #: (T, C, J) response toward each interferer relative to the look direction, dB
    null_depth_db: np.ndarray
    #: SINR measured from the output samples the weight produced before the next
    #: checkpoint (NaN where there were none)
    measured_sinr: np.ndarray
    #: (T, N) weights at the last checkpoint
    final_weights: np.ndarray
    seconds: float = 0.0


@dataclass
class Evaluation:
    """A scored Monte Carlo run of several processors on one scene."""
    scene: Scene
    trials: int
    seed: int
    snapshots: int
    checkpoints: np.ndarray
    #: (T, C) optimum SINR at each checkpoint's moment, linear
    optimum_sinr: np.ndarray
    processors: list[ProcessorScores] = field(default_factory=list)
    interferers: tuple[str, ...] = ()
    #: (T, N, 3) true element positions and (T, N) gains of every trial (for patterns)
    positions: np.ndarray | None = None
    element_gains: np.ndarray | None = None

    def by_label(self, label: str) -> ProcessorScores:
        for p in self.processors:
            if p.label == label:
                return p
        raise KeyError(label)


class _Measure:
    """Accumulates output-sample powers of the signal and the rest, per checkpoint span.

    Space-time weights apply to stacked snapshots: with the compiled kernels the
    output sums ``sum_l w_l^H x_{k-l}`` are formed from the block and the last L - 1
    snapshots before it (:func:`adapt.numerics.loops.tapped_powers_kernel`), without
    stacking; in numpy, the block is stacked by delay lines of its own (equal to
    rounding)."""

    def __init__(self, count: int, trials: int, checkpoints: np.ndarray):
        self.checkpoints = checkpoints
        self.sig = np.zeros((count, trials, len(checkpoints)))
        self.rest = np.zeros((count, trials, len(checkpoints)))
        self.n = np.zeros((count, len(checkpoints)))
        self.lines: dict = {}
        self.history: dict = {}

    def stacked(self, index: int, block, taps: int):
        """The block as space-time snapshots for processor ``index`` (its own delay
        lines, carried across blocks)."""
        if index not in self.lines:
            self.lines[index] = (wideband.TapLine(taps, recycle=True),
                                 wideband.TapLine(taps, recycle=True))
        data_line, signal_line = self.lines[index]
        return Block(block.start, block.stop, data_line(block.data),
                     signal_line(block.signal), block.training, block.reference, None)

    def __call__(self, index, block, block_checkpoints, weights, held) -> None:
        n = block.data.shape[-1]
        tapped = held.shape[-1] != n                            # space-time weights
        if tapped and not _kernels.compiled():
            block = self.stacked(index, block, held.shape[-1] // n)
            tapped = False
        start = block.start
        edges = [0] + [int(c - start) for c in block_checkpoints] + [block.size]
        # which checkpoint's weight is in force on each span (-1: initial weight)
        first = int(np.searchsorted(self.checkpoints, start, side="right")) - 1
        if tapped:
            self._tapped(index, block, edges, first, weights, held)
            return
        if block.desired is not None and _kernels.compiled():
            powers = self._rank_one_powers(block)
        else:
            powers = self._numpy_powers(block)
        self._add_spans(index, edges, first, weights, held, powers)

    @staticmethod
    def _numpy_powers(block):
        """Output powers of a span in numpy (see :meth:`_add_spans`)."""
        rank_one = block.desired is not None
        rest = None if rank_one else block.data - block.signal

        def powers(w, lo, hi, ps, pr):
            if rank_one:      # a fixed wanted source: w^H s = reference * (w^H a_d)
                gain = np.einsum("tn,tn->t", np.conj(w), block.desired)
                ys = block.reference[:, lo:hi] * gain[:, None]
                yr = np.einsum("tn,tbn->tb", np.conj(w), block.data[:, lo:hi]) - ys
            else:
                ys = np.einsum("tn,tbn->tb", np.conj(w), block.signal[:, lo:hi])
                yr = np.einsum("tn,tbn->tb", np.conj(w), rest[:, lo:hi])
            ps += np.sum(np.abs(ys) ** 2, axis=1)
            pr += np.sum(np.abs(yr) ** 2, axis=1)
        return powers

    @staticmethod
    def _rank_one_powers(block):
        """Compiled output powers when the wanted signal is rank one (one pass over each
        span, outside the interpreter lock; equal to the numpy sums to rounding)."""
        dat = np.ascontiguousarray(block.data, dtype=complex)
        ref = np.ascontiguousarray(block.reference, dtype=complex)
        desired = np.ascontiguousarray(block.desired, dtype=complex).reshape(-1, dat.shape[-1])

        def powers(w, lo, hi, ps, pr):
            _kernels.loops().rank_one_powers_kernel(w, desired, ref, dat, lo, hi, ps, pr)
        return powers

    def _add_spans(self, index, edges, first, weights, held, powers) -> None:
        """For each checkpoint span [lo, hi) of a block (``edges``; span j is slot
        ``first + j``, under the held weight for j = 0), ``powers(w, lo, hi, ps, pr)``
        (adds the span's output powers of the signal and of the rest into ps, pr, zeroed
        first) and the results added to the processor's sums."""
        t_ = held.shape[0]
        ps, pr = np.zeros(t_), np.zeros(t_)
        for j in range(len(edges) - 1):
            lo, hi = edges[j], edges[j + 1]
            slot = first + j
            if hi <= lo or slot < 0:
                continue
            w = held if j == 0 else weights[:, j - 1, :]
            ps[:] = 0.0
            pr[:] = 0.0
            powers(np.ascontiguousarray(w, dtype=complex), lo, hi, ps, pr)
            self.sig[index, :, slot] += ps
            self.rest[index, :, slot] += pr
            self.n[index, slot] += hi - lo

    def _tapped(self, index, block, edges, first, weights, held) -> None:
        """Compiled output powers of space-time weights (see the class docstring)."""
        t_, b, n = block.data.shape
        lag = held.shape[-1] // n - 1
        if index not in self.history:
            zeros = np.zeros((t_, lag, n), dtype=complex)
            self.history[index] = (zeros, zeros)
        sig_hist, dat_hist = self.history[index]
        sig = np.ascontiguousarray(block.signal, dtype=complex)
        dat = np.ascontiguousarray(block.data, dtype=complex)

        def powers(w, lo, hi, ps, pr):
            _kernels.loops().tapped_powers_kernel(w, sig_hist, sig, dat_hist, dat, lo, hi,
                                                  ps, pr)

        self._add_spans(index, edges, first, weights, held, powers)

        def keep(hist, x):              # the last L - 1 snapshots, for the next block
            return (x[:, b - lag:].copy() if b >= lag
                    else np.concatenate([hist[:, b:], x], axis=1))

        self.history[index] = (keep(sig_hist, sig), keep(dat_hist, dat))

    def sinr(self, index: int) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            out = self.sig[index] / self.rest[index]
        out[:, self.n[index] == 0] = np.nan
        return out


def _stationary_sinr(w: np.ndarray, a: np.ndarray, r: np.ndarray, power: float) -> np.ndarray:
    """:func:`adapt.engine.scores.output_sinr` for weights (T, C, N) against one steering vector
    (T, N) and covariance (T or 1, N, N) per trial, ``R w`` as one batched matrix product
    (equal to rounding; used by the drawn-covariance path, whose realisations differ
    from the sample path's anyway)."""
    rw = w @ np.swapaxes(r, -1, -2)                       # (R w) for every checkpoint
    den = np.einsum("tcn,tcn->tc", np.conj(w), rw).real
    num = power * np.abs(np.einsum("tcn,tn->tc", np.conj(w), a)) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


#: a weight whose output power on the true covariance exceeds this multiple of the total
#: received power (tr R_xx) is taken as diverged: 120 dB
RUNAWAY_RATIO = 1e12


def require_bounded(processor: Processor, index: int, w: np.ndarray, r_in: np.ndarray,
                    a_d: np.ndarray, p_d: np.ndarray, checkpoints: np.ndarray) -> None:
    """Refuse weights that grow without bound but stay finite (a recursion beyond its
    mean-square stability bound): SpecError when, in any trial and at any checkpoint,
    the output power ``w^H R_xx w`` on the true data covariance exceeds
    :data:`RUNAWAY_RATIO` times the total received power ``tr R_xx``.

    Parameters
    ----------
    processor, index : the processor and its place in the list (for the message).
    w : (T, C, N) weights at the checkpoints.
    r_in : (T or 1, 1 or C, N, N) interference-plus-noise covariance at each moment.
    a_d : (T, 1 or C, N) wanted steering vectors; p_d : (1 or C,) wanted powers.
    checkpoints : (C,) snapshot counts.

    Why a healthy run never trips it: the weights every method here estimates (Wiener,
    minimum-power distortionless, eigenspace, conventional) have an output power of at
    most the order of ``tr R_xx`` (the Wiener output power is below P_d; a constrained
    minimum-power output is below that of its quiescent weight, ``<= lambda_max |F|^2``).
    A mean-square-stable LMS-type recursion keeps the excess mean-square error at
    ``J_min s/(1 - s)`` with ``s`` the mean-square sum (Widrow et al. 1976): beyond 10^12
    times ``tr R_xx`` only for ``1 - s < 10^-12``. A diverging recursion grows
    geometrically and passes 120 dB long before it overflows (10^308). Processors that
    solve from a sample covariance are not iterations and are exempt: below N snapshots
    without loading their minimum-norm weights may be large by design (and are warned).
    """
    if processor.covariance_based:
        return
    with np.errstate(over="ignore", invalid="ignore"):
        power = scores.quadratic_form(w, r_in)                             # (T, C)
        power = power + p_d * np.abs(np.sum(np.conj(w) * a_d, axis=-1)) ** 2
        total = (np.real(np.trace(r_in, axis1=-2, axis2=-1))
                 + p_d * np.sum(np.abs(a_d) ** 2, axis=-1))
        ratio = power / total
    bad = ~(ratio <= RUNAWAY_RATIO)
    if bad.any():
        trial, c = (int(v) for v in np.argwhere(bad)[np.argmin(np.argwhere(bad)[:, 1])])
        raise SpecError(
            f"'{processor.label}' diverged: its weights grow without bound (output power "
            f"{10 * np.log10(ratio[trial, c]):.0f} dB above the total received power after "
            f"{int(checkpoints[c])} snapshots in trial {trial}); choose settings inside the "
            "method's stable range (a smaller step, a forgetting factor nearer 1, more "
            "loading)", path=f"processors[{index}]", value=processor.spec())


def evaluate_batch(batch: TrialBatch, processors: Sequence[Processor], checkpoints,
                   snapshots: int, tail: int = 0, block: int | None = None,
                   progress: Callable[[int], None] | None = None,
                   draw: str = "samples", producers: int = 1) -> Evaluation:
    """Score ``processors`` on one :class:`TrialBatch` (all its trials at once).

    The stream runs to ``snapshots + tail``; the tail only serves the measured SINR of
    the last checkpoint's weight. ``draw="covariance"`` draws the window sample
    covariances directly (:mod:`adapt.engine.drawn`; Gaussian stationary scenes and
    covariance-based processors only, InputError otherwise): statistically the same
    scores at a cost independent of ``snapshots``, no samples, measured SINR NaN.
    ``producers`` > 1: the samples are generated ahead on that many threads
    (:meth:`TrialBatch.blocks_on_threads`; the same values), for a batch that is the
    whole run and cannot use the cores by its trials alone.
    """
    sc = batch.scene
    checkpoints = normalised_checkpoints(checkpoints, snapshots)
    context = Context.from_batch(batch)
    measure = _Measure(len(processors), batch.trials, checkpoints)

    def fed() -> Iterator:
        source = batch.blocks(snapshots + tail, block, recycle=True) if producers <= 1 \
            else batch.blocks_on_threads(snapshots + tail, block, threads=producers)
        for b in source:
            yield b
            if progress is not None:
                progress(b.size * batch.trials)

    if draw == "covariance":
        from adapt.engine.drawn import run_drawn
        results = run_drawn(processors, batch, context, checkpoints)
        if progress is not None:
            progress(snapshots * batch.trials)
    elif draw == "samples":
        results = run_processors(processors, fed(), context, checkpoints, on_block=measure)
    else:
        from adapt.errors import InputError
        raise InputError("unknown way to draw the training data", path="draw", value=draw,
                         allowed="samples | covariance")
    # truth at each checkpoint's moment
    moments = checkpoints if not sc.stationary else np.zeros(1, dtype=np.int64)
    drawn = sc.stationary and draw == "covariance"
    # the drawn path scores against one shared truth when every trial has the same array
    r_in = batch.covariance(moments, shared=drawn)                # (T or 1, M, N, N)
    d = sc.desired
    a_d = batch.desired_steering(moments)                         # (T, M, N)
    p_d = d.power * d.active(moments).astype(float)               # (M,)
    if sc.wideband:           # the dispersive model: the largest generalised eigenvalue
        opt = _space_time_truth(batch, 1, moments)["optimum"]
    elif batch.same_array:       # the same for every trial: solved once (items are exact)
        opt = np.broadcast_to(scores.optimum_sinr(a_d[:1], r_in[:1], p_d),
                              (batch.trials, len(moments)))
    else:
        opt = scores.optimum_sinr(a_d, r_in, p_d)                 # (T, M)
    look_true = batch.steering_toward(sc.look_azimuth, sc.look_elevation)   # (T, N)
    a_j = [batch.steering(i, moments) for i in sc.interferer_indices]       # (T, M, N) each
    look = batch.look
    if sc.stationary:
        opt = np.broadcast_to(opt, (batch.trials, len(checkpoints)))
    out = []
    truths: dict = {}
    for i, (p, res) in enumerate(zip(processors, results)):
        w = res.weights                                            # (T, C, N)
        taps = w.shape[-1] // batch.scene.elements      # space-time weights: N x taps
        if sc.wideband or taps > 1:
            if taps not in truths:
                truths[taps] = _space_time_truth(batch, taps, moments)
            if not drawn:       # the data covariance R_in + R_s bounds the output power
                t_ = truths[taps]
                r_x = _added(t_["in"], t_["signal"])
                zero = np.zeros(r_x.shape[:-1], dtype=complex)
                require_bounded(p, i, w, r_x, zero, np.zeros(r_x.shape[1]), checkpoints)
            sinr, norm, loss, wng, nd = _space_time_scores(truths[taps], w, checkpoints)
            out.append(ProcessorScores(
                label=p.label, method=p.method, params=dict(p.params), spec=p.spec(),
                checkpoints=checkpoints, sinr=sinr, normalised=norm, loss_db=loss,
                white_noise_gain=wng, null_depth_db=nd, measured_sinr=measure.sinr(i),
                final_weights=w[:, -1, :], seconds=res.seconds))
            continue
        if not drawn:
            require_bounded(p, i, w, r_in, a_d, p_d, checkpoints)
        if drawn:
            sinr = _stationary_sinr(w, a_d[:, 0], r_in[:, 0], p_d[0])
        elif sc.stationary:
            sinr = scores.output_sinr(w, a_d, r_in, p_d[0])
        else:
            sinr = scores.output_sinr(w, a_d, r_in, p_d)
        norm = scores.normalised_sinr(sinr, opt)
        loss = scores.loss_db_of(norm)
        wng = scores.white_noise_gain(w, look)
        if a_j:
            nd = scores.responses_db(w, a_j, look_true[:, None, :])
        else:
            nd = np.zeros(w.shape[:2] + (0,))
        out.append(ProcessorScores(
            label=p.label, method=p.method, params=dict(p.params), spec=p.spec(),
            checkpoints=checkpoints, sinr=sinr, normalised=norm, loss_db=loss,
            white_noise_gain=wng, null_depth_db=nd, measured_sinr=measure.sinr(i),
            final_weights=w[:, -1, :], seconds=res.seconds))
    return Evaluation(scene=sc, trials=batch.trials, seed=batch.seed, snapshots=snapshots,
                      checkpoints=checkpoints, optimum_sinr=np.array(opt), processors=out,
                      interferers=tuple(s.name for s in sc.interferers),
                      positions=batch.positions, element_gains=batch.element_gains)


def _added(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a + b for two stacks (T, ...) of the same shape; one sum broadcast when both are
    one row broadcast over the trials (stride 0)."""
    if a.shape[0] > 1 and a.strides[0] == 0 and b.strides[0] == 0:
        return np.broadcast_to(a[:1] + b[:1], a.shape)
    return a + b


def _space_time_truth(batch: TrialBatch, taps: int, moments: np.ndarray) -> dict:
    """True space-time covariances for weights of ``taps`` taps per element
    (:mod:`adapt.streams.wideband`) at the moments scored, with the optimum SINR for
    the same taps (the largest generalised eigenvalue), the band-averaged look
    response's covariance and each interferer's unit-power covariance."""
    sc = batch.scene
    if batch.same_array and batch.trials > 1:   # every trial alike: one row, broadcast
        one = TrialBatch(sc, trials=1, seed=batch.seed, first_trial=batch.first_trial)
        truth = _space_time_truth(one, taps, moments)
        return {key: ([np.broadcast_to(v, (batch.trials,) + v.shape[1:]) for v in val]
                      if isinstance(val, list) else
                      val if key == "steering" else
                      np.broadcast_to(val, (batch.trials,) + val.shape[1:]))
                for key, val in truth.items()}
    r_in = wideband.space_time_covariance(batch, taps, moments)              # (T, M, D, D)
    r_s = wideband.space_time_covariance(batch, taps, moments, "signal")
    opt = scores.optimum_sinr_space_time(r_s, r_in)                          # (T, M)
    look = wideband.direction_covariance(batch, sc.look_azimuth, sc.look_elevation, taps)
    jam = [wideband.source_covariance(batch, i, taps, moments, unit=True)
           for i in sc.interferer_indices]
    return {"in": r_in, "signal": r_s, "optimum": opt, "look": look[:, None],
            "interferers": jam, "steering": batch.look}


def _space_time_scores(truth: dict, w: np.ndarray, checkpoints: np.ndarray):
    """Scores of weights (T, C, N L) against :func:`_space_time_truth`: SINR, normalised
    SINR and loss against the optimum for the same taps, white-noise gain at the band
    centre (``|sum_l w_l^H a|^2 / w^H w``) and band-averaged null depth per interferer
    relative to the band-averaged look response (dB)."""
    sinr = scores.output_sinr_space_time(w, truth["signal"], truth["in"])
    opt = np.broadcast_to(truth["optimum"], sinr.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        norm = np.where(opt > 0, sinr / np.where(opt > 0, opt, 1), np.nan)
        loss = -10 * np.log10(norm)
    n = truth["steering"].shape[-1]
    w_sum = w.reshape(w.shape[:-1] + (-1, n)).sum(axis=-2)
    gain = np.abs(np.einsum("...n,n->...", np.conj(w_sum), truth["steering"])) ** 2
    power = np.real(np.einsum("...n,...n->...", np.conj(w), w))
    with np.errstate(divide="ignore", invalid="ignore"):
        wng = np.where(power > 0, gain / np.where(power > 0, power, 1.0), 0.0)
    ref = scores.to_db(scores.band_response(w, truth["look"]))
    nd = [scores.to_db(scores.band_response(w, rj)) - ref for rj in truth["interferers"]]
    nd = np.stack(nd, -1) if nd else np.zeros(w.shape[:2] + (0,))
    return sinr, norm, loss, wng, nd


def merge(parts: Sequence[Evaluation]) -> Evaluation:
    """Concatenate evaluations of consecutive trial chunks (same processors)."""
    if len(parts) == 1:
        return parts[0]
    first = parts[0]
    procs = []
    for i, p in enumerate(first.processors):
        cat = {name: np.concatenate([getattr(e.processors[i], name) for e in parts], axis=0)
               for name in ("sinr", "normalised", "loss_db", "white_noise_gain",
                            "null_depth_db", "measured_sinr", "final_weights")}
        procs.append(ProcessorScores(label=p.label, method=p.method, params=p.params,
                                     spec=p.spec, checkpoints=p.checkpoints,
                                     seconds=sum(e.processors[i].seconds for e in parts), **cat))
    return Evaluation(scene=first.scene, trials=sum(e.trials for e in parts), seed=first.seed,
                      snapshots=first.snapshots, checkpoints=first.checkpoints,
                      optimum_sinr=np.concatenate([e.optimum_sinr for e in parts], axis=0),
                      processors=procs, interferers=first.interferers,
                      positions=np.concatenate([e.positions for e in parts], axis=0),
                      element_gains=np.concatenate([e.element_gains for e in parts], axis=0))
