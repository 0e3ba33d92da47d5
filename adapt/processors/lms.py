"""Widrow-Hoff least-mean-square (LMS) processor trained on the reference waveform.

Source: Widrow & Hoff (1960); Widrow, Mantey, Griffiths & Goode, "Adaptive antenna
systems", Proc. IEEE 55 (1967); Widrow & Stearns, *Adaptive Signal Processing* (1985).
Complex form as in Haykin, *Adaptive Filter Theory*.

Recursion, for every trial at once (weights applied as ``y = w^H x``)::

    e(k) = d(k) - w^H(k) x(k)          d = block.reference, x = block.data
    w(k+1) = w(k) + mu x(k) e^*(k)

The reference ``d(k) = sqrt(P_d) g(k) s(k)`` is the wanted source's complex envelope, so
LMS always trains on the received data *with the wanted signal present* (whatever the
scene's ``training`` setting) and steers toward the true wanted direction, not the
assumed look direction.

Step-size convention: ``step`` is the unnormalised ``mu`` above, in inverse noise-power
units (noise is 1 per element). The mean weight converges iff
``0 < mu < 2 / lambda_max(R_xx)`` with ``R_xx = R_in + P_d a a^H`` the data covariance
(Widrow & Stearns 1985; their ``w += 2 mu e x`` halves the bound); the mean-square error
stays bounded iff ``sum_i mu lambda_i / (2 - mu lambda_i) < 1`` over the eigenvalues of
``R_xx`` (Widrow, McCool, Larimore & Johnson, Proc. IEEE 64, 1976; Haykin, *Adaptive
Filter Theory*, for independent circular Gaussian snapshots), a far tighter ceiling when
several strong jammers share the spread. Enforced: ``check`` refuses a step at which that
sum reaches 1 (and a fortiori one at or above ``2 / lambda_max``) in any trial, at every
checked moment of a changing scene, quoting the bound and the sum. The default
``step=auto`` (same as ``none``) is ``0.1 / tr(R_xx)`` per trial: each ``mu lambda_i <=
0.1`` so the sum stays below ``0.1 / 1.9``, misadjustment about 5 %, slowest time
constant ``1/(mu lambda_min)`` snapshots.

Checkable fact: for independent snapshots the mean weight converges to the Wiener
solution ``w_o = R_xx^-1 r_xd`` with ``r_xd = E[x d^*] = P_d a`` (Widrow & Stearns 1985).

Cost per snapshot and trial: about 4N complex multiply-adds.
"""
from __future__ import annotations

import numpy as np

from adapt.numerics import kernels as _kernels
from adapt.processors._recursive import (
    AutoStep,
    bounded_steps,
    local_marks,
    starting_weights,
)
from adapt.processors._taps import TAPS, regressors
from adapt.processors.base import Context, Parameter, State

INITIAL_HELP = "start weight: quiescent (look vector / N, the conventional beam) or zero"


class LeastMeanSquares(AutoStep):
    """Widrow-Hoff LMS trained on the reference waveform, ``w += mu x e^*``.

    Parameters
    ----------
    step : float or None
        Step size ``mu`` in inverse noise-power units; ``auto`` (or none):
        ``0.1 / tr(R_xx)`` per trial. Refused where the mean-square sum
        ``sum_i mu lambda_i / (2 - mu lambda_i)`` over ``R_xx`` reaches 1.
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
    Checkable fact: for independent snapshots the mean weight converges to the Wiener
    solution ``R_xx^-1 P_d a``.

    References
    ----------
    .. [1] B. Widrow, P. E. Mantey, L. J. Griffiths and B. B. Goode, "Adaptive antenna
       systems", Proc. IEEE 55 (1967).
    .. [2] B. Widrow and S. D. Stearns, *Adaptive Signal Processing* (1985), ch. 6.
    .. [3] B. Widrow, J. M. McCool, M. G. Larimore and C. R. Johnson, "Stationary and
       nonstationary learning characteristics of the LMS adaptive filter", Proc. IEEE 64
       (1976) (the mean-square bound; title from memory).
    """

    method = "lms"
    summary = "Widrow-Hoff LMS on the reference waveform, w += mu x e^*"
    reference_trained = True
    parameters = {
        "step": Parameter("float", None,
                          "step size mu; auto (or none): 0.1 / tr(R_xx) per trial; must keep "
                          "sum mu lambda_i/(2 - mu lambda_i) < 1 over R_xx", unit="per noise power",
                          low=0.0, low_open=True, allow_none=True),
        "initial": Parameter("choice", "quiescent", INITIAL_HELP,
                             choices=("quiescent", "zero")),
        "taps": TAPS,
    }

    def _steps(self, context: Context) -> np.ndarray:
        return bounded_steps(self.params["step"], context.data_covariance, context,
                             self.method, "data covariance",
                             "the received data covariance R_xx")

    def check(self, context: Context) -> None:
        self._steps(context)

    def initial_weights(self, context: Context) -> np.ndarray:
        return starting_weights(context, self.params["initial"])

    def begin(self, context: Context) -> State:
        return State(context=context, steps=self._steps(context),
                     wc=np.conj(self.initial_weights(context)))

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        marks = local_marks(block, checkpoints)
        x, taps = regressors(block)
        return _kernels.lms_block(state.wc, x, marks, gain=state.steps,
                                  desired=block.reference, taps=taps)
