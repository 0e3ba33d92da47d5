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
from adapt.processors.base import Context, Processor


class Optimum(Processor):
    method = "optimum"
    summary = "clairvoyant MVDR from the true interference-plus-noise covariance (the bound)"
    parameters = {}

    def check(self, context: Context) -> None:
        if context.covariance is None:
            raise SpecError("the optimum needs the true covariance, known only in simulation",
                            path="method", value="optimum")

    def begin(self, context: Context) -> None:
        self.check(context)
        self.context = context
        self._r = None          # last solved covariance (T, N, N)
        self._w = None

    def _solve(self, r: np.ndarray) -> np.ndarray:
        """MVDR for r (T, N, N), reusing the previous solve for an identical covariance."""
        if self._r is None or not np.array_equal(r, self._r):
            self._r, self._w = r.copy(), mvdr(r, self.context.look)
        return self._w

    def initial_weights(self, context: Context) -> np.ndarray:
        r = context.covariance(np.array([0]))[:, 0]
        return mvdr(r, context.look)

    def update(self, block, stops: np.ndarray) -> np.ndarray:
        t_, n = self.context.trials, self.context.elements
        stops = np.asarray(stops, dtype=np.int64)
        if not stops.size:
            return np.empty((t_, 0, n), dtype=complex)
        r = self.context.covariance(stops)                      # (T, C, N, N)
        if np.all(r == r[:, :1]):
            w = self._solve(r[:, 0])
            return np.repeat(w[:, None, :], len(stops), axis=1)
        return mvdr(r, self.context.look)
