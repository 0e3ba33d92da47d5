"""Exponentially weighted recursive least squares (RLS) trained on the reference waveform.

Source: Haykin, *Adaptive Filter Theory* (the RLS chapter); for arrays, Baird,
"Recursive processing for adaptive arrays" (1974).

Recursion, every trial at once (weights applied as ``y = w^H x``; x = ``block.data``,
d = ``block.reference``, the wanted signal present as for LMS)::

    pi(k) = P(k) x(k)
    g(k) = pi(k) / (lambda + x^H(k) pi(k))             gain vector
    e(k) = d(k) - w^H(k) x(k)                          a priori error
    w(k+1) = w(k) + g(k) e^*(k)
    P(k+1) = (P(k) - pi(k) pi^H(k) / (lambda + x^H pi)) / lambda

with ``P(0) = I / delta``, ``delta = noise_power * 10^(loading_db / 10)``. The weight
after k snapshots minimises ``sum_i lambda^(k-i) |d(i) - w^H x(i)|^2 + delta lambda^k
|w - w(0)|^2``: for ``forgetting = 1`` least squares on all the data with a diagonal
load ``delta`` that fades as the data accumulate. The P update is written as a Hermitian
outer product and P is re-symmetrised every 256 snapshots to keep it Hermitian.

Parameters: ``forgetting`` lambda in (0, 1] (memory about ``1/(1-lambda)`` snapshots);
``loading_db`` the initial load in dB above the per-element noise power; ``initial`` the
start weight (quiescent look vector / N, or zero).

Checkable fact: convergence in about 2N snapshots independent of the eigenvalue spread
of the data covariance (Haykin), unlike LMS whose slowest mode takes
``1 / (mu lambda_min)`` snapshots.

Cost per snapshot and trial: about 3 N^2 complex multiply-adds (trials are run in
cache-sized groups, each group through a whole block, to keep P in cache).
"""
from __future__ import annotations

import numpy as np

from adapt.numerics import kernels as _kernels
from adapt.processors._recursive import local_marks, starting_weights
from adapt.processors._taps import TAPS
from adapt.processors.base import Context, Parameter, Processor, State
from adapt.processors.lms import INITIAL_HELP


class RecursiveLeastSquares(Processor):
    """Exponentially weighted recursive least squares trained on the reference
    waveform.

    Parameters
    ----------
    forgetting : float
        Forgetting factor ``lambda`` in (0, 1] (memory about ``1/(1-lambda)``
        snapshots; 1: infinite memory).
    loading_db : float
        Initial diagonal load ``delta``, ``P(0) = I / delta``, dB above the noise power,
        in [-100, 100].
    initial : {"quiescent", "zero"}
        Start weight: the look vector / N (the conventional beam) or zero.
    taps : int
        Delay-line length L behind each element (default 1): run on stacked space-time
        snapshots, N L weights (adapt.processors._taps).

    Returns
    -------
    weights : ndarray, (T, C, N)
        The recursion's weight after each checkpoint's snapshot count.

    Notes
    -----
    Checkable fact: convergence in about 2N snapshots, independent of the eigenvalue
    spread of the data covariance.

    References
    ----------
    .. [1] S. Haykin, *Adaptive Filter Theory*, the RLS chapter.
    .. [2] C. A. Baird, "Recursive processing for adaptive arrays" (1974).
    """

    method = "rls"
    summary = "exponentially weighted recursive least squares on the reference waveform"
    reference_trained = True
    parameters = {
        "forgetting": Parameter("float", 1.0, "forgetting factor lambda (1: infinite memory)",
                                low=0.0, high=1.0, low_open=True),
        "loading_db": Parameter("float", 0.0, "initial diagonal load delta, P(0) = I / delta",
                                unit="dB above noise", low=-100.0, high=100.0),
        "initial": Parameter("choice", "quiescent", INITIAL_HELP,
                             choices=("quiescent", "zero")),
        "taps": TAPS,
    }

    def initial_weights(self, context: Context) -> np.ndarray:
        return starting_weights(context, self.params["initial"])

    def begin(self, context: Context) -> State:
        n, t_ = context.elements, context.trials
        delta = context.noise_power * 10.0 ** (self.params["loading_db"] / 10.0)
        p = np.zeros((t_, n, n), dtype=complex)
        p[:, np.arange(n), np.arange(n)] = 1.0 / delta
        return State(context=context, p=p, wc=np.conj(self.initial_weights(context)))

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        return _kernels.rls_block(state.p, state.wc, block.data, block.reference,
                                  float(self.params["forgetting"]), block.start,
                                  local_marks(block, checkpoints))
