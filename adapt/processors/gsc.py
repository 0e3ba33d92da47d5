"""Generalised sidelobe canceller (GSC) with an NLMS-adapted sidelobe branch.

Source: L. J. Griffiths & C. W. Jim, "An alternative approach to linearly constrained
adaptive beamforming", IEEE Trans. Antennas and Propagation 30 (1982).

Structure (weights applied as ``y = w^H x``, x = ``block.training``):

* quiescent weight ``w_q = a / (a^H a) = a / N`` (a the look vector: unit look
  response, the conventional beam);
* blocking matrix B (N x N-1) with ``B^H a = 0`` and orthonormal columns: the last N-1
  columns of the complete QR factorisation of a (``look_blocking_matrix``);
* blocked data ``z = B^H x``, main-beam output ``d = w_q^H x``, output
  ``y = d - w_a^H z``: the full weight ``w = w_q - B w_a`` is the weight reported;
* the adaptive branch minimises ``E|y|^2`` by normalised LMS::

      w_a(k+1) = w_a(k) + mu / (eps + z^H z) z(k) y^*(k)

Implementation: with orthonormal B, ``B B^H = P = I - a a^H / (a^H a)``, so the update
of the full weight is ``w(k+1) = w(k) - mu / (eps + x^H P x) (P x) y^*(k)`` with
``z^H z = x^H P x``. The recursion runs on w directly (2N work for P x instead of N^2
for B^H x; tested equal to the explicit blocked form) and the reported weight is
re-projected, ``w_q + P w``, so ``w^H a = 1`` holds to rounding. Start weight: w_q.

Because ``B^H a = 0`` the look response stays 1 whatever ``w_a``: the GSC is the
unconstrained form of Frost's processor, here with a normalised step.

Step-size convention: ``step`` is the dimensionless NLMS ``mu``, stable for
``0 < mu < 2`` (Haykin, *Adaptive Filter Theory*); ``eps`` (noise-power units) guards the
division.

Checkable fact: converged, the weight equals the MVDR weight ``R^-1 a / (a^H R^-1 a)``
of the training covariance R (Griffiths & Jim 1982): the Wiener solution
``w_a = (B^H R B)^-1 B^H R w_q`` gives exactly that.

Cost per snapshot and trial: about 8N complex multiply-adds.
"""
from __future__ import annotations

import numpy as np

from adapt.processors._recursive import Projector, constrained_pass, local_marks, per_snapshot
from adapt.processors._taps import TAPS
from adapt.processors.base import Context, Parameter, Processor, State
from adapt.processors.nlms import normalised_gain


class GeneralisedSidelobeCanceller(Processor):
    """Griffiths-Jim generalised sidelobe canceller: the look beam minus an
    NLMS-adapted blocked branch.

    Parameters
    ----------
    step : float
        Normalised step ``mu`` of the adaptive branch, stable for ``0 < mu < 2``.
    eps : float
        Regularisation added to ``z^H z``, noise-power units, > 0.
    taps : int
        Delay-line length L behind each element (default 1): run on stacked space-time
        snapshots, N L weights (adapt.processors._taps).

    Returns
    -------
    weights : ndarray, (T, C, N)
        The full weight ``w = w_q - B w_a`` at each checkpoint (``w^H a = 1`` to
        rounding).

    Notes
    -----
    Checkable fact: converged, the weight equals the MVDR weight
    ``R^-1 a / (a^H R^-1 a)`` of the training covariance.

    References
    ----------
    .. [1] L. J. Griffiths and C. W. Jim, "An alternative approach to linearly
       constrained adaptive beamforming", IEEE Trans. Antennas Propag. 30 (1982).
    """

    method = "gsc"
    min_elements = 2
    summary = "Griffiths-Jim sidelobe canceller: look beam minus NLMS-adapted blocked branch"
    parameters = {
        "step": Parameter("float", 0.05, "normalised step mu of the adaptive branch; stable "
                          "for 0 < mu < 2", low=0.0, high=2.0, low_open=True, high_open=True),
        "eps": Parameter("float", 1e-6, "regularisation added to z^H z",
                         unit="noise power", low=0.0, low_open=True),
        "taps": TAPS,
    }

    @staticmethod
    def _projector(context: Context) -> Projector:
        look = np.asarray(context.look, dtype=complex)
        return Projector(look[:, None], np.ones(1))           # w_q = a / (a^H a)

    def initial_weights(self, context: Context) -> np.ndarray:
        quiescent = self._projector(context).quiescent
        return np.broadcast_to(quiescent, (context.trials, context.elements)).copy()

    def begin(self, context: Context) -> State:
        proj = self._projector(context)
        wc = np.conj(np.broadcast_to(proj.quiescent, (context.trials, context.elements)))
        return State(context=context, proj=proj, wc=wc)

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        x = per_snapshot(block.training)                      # (B, T, N)
        px = state.proj.project(x)                            # B B^H x = P x
        gain = normalised_gain(px, self.params["step"], self.params["eps"])
        return constrained_pass(state.wc, x, local_marks(block, checkpoints), gain, state.proj, px)
