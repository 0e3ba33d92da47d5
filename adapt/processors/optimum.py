"""The clairvoyant optimum: MVDR from the true interference-plus-noise covariance.

Source: Van Trees, Optimum Array Processing (2002), ch. 6 (the MVDR beamformer); Capon,
"High-resolution frequency-wavenumber spectrum analysis", Proc. IEEE 1969.

Weight at checkpoint c: ``w = R^-1 a / (a^H R^-1 a)`` with R the TRUE interference-plus-
noise covariance at snapshot index c (0-based), the first snapshot the weight is applied
to and the moment the scores use (see adapt.engine.evaluate), and ``a`` the ASSUMED
look steering vector (nominal array, no hardware errors). Under pointing or calibration
mismatch this is the optimum for the assumed steering, not the matched-filter bound.

Checkable fact: with no mismatch its output SINR is ``sigma_s^2 a^H R^-1 a``, the bound
every other processor's score is measured against; for one interferer of INR P and
steering v (Woodbury) ``SINR = sigma_s^2 [N - P |a^H v|^2 / (1 + N P)]``. Its initial weight uses the covariance at
snapshot 0. Simulation only: it needs ``context.covariance``.

No parameters. Cost: one O(N^3) Cholesky solve per checkpoint for a changing scene; one
solve for all checkpoints of a stationary scene (the covariance is compared exactly and
the weight reused). No per-snapshot cost.
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.numerics.linalg import mvdr
from adapt.processors._taps import TAPS
from adapt.processors.base import Context, Processor, State


class Optimum(Processor):
    """The clairvoyant optimum: MVDR from the true interference-plus-noise covariance.

    Parameters
    ----------
    taps : int
        Delay-line length L behind each element (default 1): run on stacked space-time
        snapshots, N L weights (adapt.processors._taps). Needs
        ``context.covariance`` (``clairvoyant``), known only in simulation.

    Returns
    -------
    weights : ndarray, (T, C, N)
        ``R^-1 a / (a^H R^-1 a)`` with R the true covariance at each checkpoint's
        snapshot index and ``a`` the assumed look steering.

    Notes
    -----
    Checkable fact: with no mismatch its output SINR is ``sigma_s^2 a^H R^-1 a``; for one
    interferer of INR P and steering v, ``sigma_s^2 [N - P |a^H v|^2 / (1 + N P)]``
    (Woodbury).

    References
    ----------
    .. [1] J. Capon, "High-resolution frequency-wavenumber spectrum analysis", Proc.
       IEEE 57 (1969).
    .. [2] H. L. Van Trees, *Optimum Array Processing* (2002), ch. 6.
    """

    method = "optimum"
    summary = "clairvoyant MVDR from the true interference-plus-noise covariance (the bound)"
    parameters = {"taps": TAPS}
    clairvoyant = True
    data_free = True
    drawn_covariance = True

    def check(self, context: Context) -> None:
        if context.covariance is None:
            raise SpecError("the optimum needs the true covariance, known only in simulation",
                            path="method", value="optimum")

    def begin(self, context: Context) -> State:
        self.check(context)
        return State(context=context,
                     r=None,             # last solved covariance (T, N, N)
                     w=None)

    @staticmethod
    def _solve(state: State, r: np.ndarray) -> np.ndarray:
        """MVDR for r (T, N, N), reusing the previous solve for an identical covariance."""
        if state.r is None or not np.array_equal(r, state.r):
            state.r, state.w = r.copy(), mvdr(r, state.context.look)
        return state.w

    def initial_weights(self, context: Context) -> np.ndarray:
        r = context.covariance(np.array([0]))[:, 0]
        return mvdr(r, context.look)

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        t_, n = state.context.trials, state.context.elements
        checkpoints = np.asarray(checkpoints, dtype=np.int64)
        if not checkpoints.size:
            return np.empty((t_, 0, n), dtype=complex)
        r = state.context.covariance(checkpoints)                     # (T, C, N, N)
        if np.all(r == r[:, :1]):
            w = self._solve(state, r[:, 0])
            return np.repeat(w[:, None, :], len(checkpoints), axis=1)
        return mvdr(r, state.context.look)
