"""Tapped delay lines for any processor: ``taps=L`` turns an N-element processor into a
space-time processor of N L weights.

A processor that declares the shared :data:`TAPS` parameter is, for ``taps`` > 1, run
through :class:`Tapped`: it sees stacked snapshots ``z_k = [x_k; x_{k-1}; ...;
x_{k-L+1}]`` (entry ``l N + n`` is element n delayed by l snapshots; zeros before the
stream starts, carried across blocks so the block size changes nothing; a weight left
undefined by those incomplete first L - 1 stacks, such as an unloaded sample-matrix
solve on one snapshot, is replaced by the initial weight), a look vector
``e_c (x) a`` (the assumed steering vector at the centre tap c = (L - 1) // 2, zeros at
the others: a distortionless response through the centre tap), the reference waveform
delayed by c snapshots (reference-trained methods then aim at a look-direction response
that is a pure delay of c), and true covariances of the stacked snapshots for their
stability checks. Its weights have N L entries in the same order, applied as
``y = w^H z``.

Source: the tapped-delay-line (space-time) adaptive array, Widrow, Mantey, Griffiths
and Goode, "Adaptive antenna systems", Proc. IEEE 55 (1967); Frost, "An algorithm for
linearly constrained adaptive array processing", Proc. IEEE 60 (1972); Compton,
*Adaptive Antennas* (1988), ch. 7. Checkable fact (tests/test_wideband.py): with one tap
the processor is unchanged; with L taps its weights equal the same processor run on the
stacked snapshots by hand.
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.processors.base import Context, Parameter, State
from adapt.streams.wideband import TapLine

__all__ = ["TAPS", "Tapped", "StackedBlock", "tapped", "stacked_data", "stacked_context",
           "centre_tap", "regressors"]

#: the shared delay-line length parameter
TAPS = Parameter("int", 1, "delay-line length behind each element: N x taps weights, "
                 "stacked [x_k; x_{k-1}; ...] (entry l N + n)", unit="taps", low=1, high=32,
                 omit_unset=True)     # one tap: left out of params, specs and results


def centre_tap(taps: int) -> int:
    """The tap carrying the look constraint and the reference delay, (L - 1) // 2."""
    return (int(taps) - 1) // 2


def stacked_context(context: Context, taps: int) -> Context:
    """The context a processor sees behind delay lines of ``taps`` taps."""
    n = context.elements
    c = centre_tap(taps)
    look = np.zeros(n * taps, dtype=complex)
    look[c * n:(c + 1) * n] = context.look
    st = context.space_time

    def cov(kind):
        if st is None:
            return None
        return lambda k: st(np.atleast_1d(np.asarray(k)), taps, kind)

    return Context(look=look, positions=context.positions, trials=context.trials,
                   noise_power=context.noise_power, covariance=cov("interference"),
                   training_covariance=cov("training"), has_reference=context.has_reference,
                   look_direction=None, data_covariance=cov("data"), moments=context.moments,
                   space_time=st, fractional_bandwidth=context.fractional_bandwidth,
                   taps=taps)


class Tapped:
    """A processor run on stacked space-time snapshots (see the module docstring):
    settings only (the processor and the delay-line length, immutable); the delay lines,
    the inner processor's state and the stacked data of the last block live in the
    :class:`~adapt.processors.base.State` that ``begin`` returns. Every other attribute
    (method, label, params, flags) is the processor's own."""

    def __init__(self, inner, taps: int):
        object.__setattr__(self, "inner", inner)
        object.__setattr__(self, "taps", int(taps))

    def __getattr__(self, name):
        if name == "inner" or name.startswith("__"):   # (unpickling: no inner yet)
            raise AttributeError(name)
        return getattr(self.inner, name)

    def __setattr__(self, name, value):
        raise AttributeError("a tapped processor is immutable: keep run state in the State "
                             "that begin() returns")

    def check(self, context: Context) -> None:
        if self.inner.params.get("subarray") is not None:
            raise SpecError("spatial smoothing and tapped delay lines do not combine",
                            path="taps", value=self.taps, allowed="1 with subarray")
        self.inner.check(stacked_context(context, self.taps))

    def initial_weights(self, context: Context) -> np.ndarray:
        return self.inner.initial_weights(stacked_context(context, self.taps))

    def begin(self, context: Context) -> State:
        if self.inner.params.get("subarray") is not None:
            raise SpecError("spatial smoothing and tapped delay lines do not combine",
                            path="taps", value=self.taps, allowed="1 with subarray")
        stacked = stacked_context(context, self.taps)
        return State(context=context, inner=self.inner.begin(stacked),
                     lines=(TapLine(self.taps, recycle=True),
                            TapLine(self.taps, recycle=True)),
                     reference_line=TapLine(centre_tap(self.taps) + 1),
                     initial=self.inner.initial_weights(stacked), last_data=None)

    def update(self, state: State, block, checkpoints) -> np.ndarray:
        data_line, training_line = state.lines
        data = data_line.push(block.data)
        same = block.training is block.data
        training = data if same else training_line.push(block.training)
        # the reference c snapshots late: the line's last c values, then the block's
        ref = state.reference_line.push(block.reference[..., None]).lined()[:, :block.size, 0]
        stacked = StackedBlock(block.start, block.stop, data, training, ref, block.training)
        state.last_data = stacked
        w = self.inner.update(state.inner, stacked, checkpoints)
        early = np.asarray(checkpoints) < self.taps - 1
        if early.any():     # incomplete stacks: a look response may be undefined there
            bad = early[None, :] & ~np.isfinite(w).all(axis=-1)
            w[bad] = np.broadcast_to(state.initial[:, None, :], w.shape)[bad]
        return w


class StackedBlock:
    """A block of stacked space-time snapshots as a tapped processor's inner processor
    sees it (the attributes of :class:`~adapt.streams.snapshots.Block` it reads):
    ``data`` and ``training`` (T, B, N L) are formed on first use (by the delay lines,
    which have already advanced), ``reference`` is the delayed reference, and
    ``unstacked_training`` the block's own training (T, B, N) for processors that form
    their space-time sums from it (:class:`~adapt.processors._covariance.LaggedSums`);
    ``lined_data`` the data's :class:`~adapt.streams.wideband.PushedBlock`, for kernels
    that read the stacked regressors in place (:func:`regressors`). Valid until the
    next block: the delay lines reuse their buffers."""

    stored_signal = None
    desired = None

    def __init__(self, start: int, stop: int, data, training, reference: np.ndarray,
                 unstacked_training: np.ndarray):
        self.start, self.stop = int(start), int(stop)
        self.lined_data, self._training = data, training
        self.reference = reference
        self.unstacked_training = unstacked_training

    @property
    def size(self) -> int:
        return self.stop - self.start

    @property
    def data(self) -> np.ndarray:
        return self.lined_data()

    @property
    def training(self) -> np.ndarray:
        return self._training()


def regressors(block) -> tuple[np.ndarray, int]:
    """``(x, taps)`` for :func:`adapt.numerics.kernels.lms_block`: a stacked block's
    data lined (T, L - 1 + B, N) with its L (read in place, no stacked copy), else the
    block's data and 1."""
    pushed = getattr(block, "lined_data", None)
    if pushed is not None and pushed.taps > 1:
        return pushed.lined(), pushed.taps
    return block.data, 1


def tapped(processor):
    """``processor`` itself for one tap, else wrapped in :class:`Tapped`."""
    if isinstance(processor, Tapped):
        return processor
    taps = int(getattr(processor, "params", {}).get("taps", 1))
    return processor if taps == 1 else Tapped(processor, taps)


def stacked_data(processor, state: State, block) -> np.ndarray:
    """The data the processor's weights apply to in ``block`` (stacked for a tapped
    processor, read from its run ``state`` after its update)."""
    if isinstance(processor, Tapped) and state.last_data is not None:
        return state.last_data.data
    return block.data
