"""Normalised LMS (NLMS) processor trained on the reference waveform.

Source: Nagumo & Noda, "A learning method for system identification", IEEE Trans.
Automatic Control 12 (1967); Haykin, *Adaptive Filter Theory* (normalised LMS chapter).

Recursion, for every trial at once (weights applied as ``y = w^H x``)::

    e(k) = d(k) - w^H(k) x(k)                        d = block.reference, x = block.data
    w(k+1) = w(k) + mu / (eps + x^H(k) x(k)) x(k) e^*(k)

Like LMS it trains on the received data with the wanted signal present (the reference is
the wanted source's complex envelope).

Step-size convention: ``step`` is the dimensionless ``mu``; NLMS is stable in the mean
square for ``0 < mu < 2`` whatever the input power (Haykin), fastest near ``mu = 1``;
``eps`` (noise-power units, noise is 1 per element) only guards the division.

Checkable fact: for jointly Gaussian data and reference the mean weight converges to the
Wiener solution ``R_xx^-1 P_d a`` (the normalised error ``x e_o^*/|x|^2`` has zero mean
because the Wiener error ``e_o`` is independent of x).

Cost per snapshot and trial: about 5N complex multiply-adds.
"""
from __future__ import annotations

import numpy as np

from adapt.numerics import kernels as _kernels
from adapt.numerics.kernels import normalised_gain  # noqa: F401 - re-exported
from adapt.processors._recursive import local_marks, starting_weights
from adapt.processors._taps import TAPS, regressors
from adapt.processors.base import Context, Parameter, Processor, State
from adapt.processors.lms import INITIAL_HELP


class NormalisedLms(Processor):
    """Normalised LMS trained on the reference waveform,
    ``w += mu x e^* / (eps + x^H x)``.

    Parameters
    ----------
    step : float
        Normalised step ``mu``, stable for ``0 < mu < 2`` whatever the input power.
    eps : float
        Regularisation added to ``x^H x``, noise-power units, > 0.
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
    Checkable fact: for jointly Gaussian data and reference the mean weight converges
    to the Wiener solution ``R_xx^-1 P_d a``.

    References
    ----------
    .. [1] J. Nagumo and A. Noda, "A learning method for system identification", IEEE
       Trans. Automatic Control 12 (1967).
    .. [2] S. Haykin, *Adaptive Filter Theory*, the normalised LMS chapter.
    """

    method = "nlms"
    summary = "normalised LMS on the reference waveform, w += mu x e^* / (eps + x^H x)"
    reference_trained = True
    parameters = {
        "step": Parameter("float", 0.05, "normalised step mu; stable for 0 < mu < 2",
                          low=0.0, high=2.0, low_open=True, high_open=True),
        "eps": Parameter("float", 1e-6, "regularisation added to x^H x",
                         unit="noise power", low=0.0, low_open=True),
        "initial": Parameter("choice", "quiescent", INITIAL_HELP,
                             choices=("quiescent", "zero")),
        "taps": TAPS,
    }

    def initial_weights(self, context: Context) -> np.ndarray:
        return starting_weights(context, self.params["initial"])

    def begin(self, context: Context) -> State:
        return State(context=context, wc=np.conj(self.initial_weights(context)))

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        marks = local_marks(block, checkpoints)
        x, taps = regressors(block)
        return _kernels.lms_block(state.wc, x, marks, gain=None, desired=block.reference,
                                  step=self.params["step"], eps=self.params["eps"],
                                  taps=taps)
