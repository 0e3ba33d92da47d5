"""Conventional (phase-steered, delay-and-sum) beamformer, optionally tapered.

Source: the phase-steered array with amplitude taper; Dolph (1946) for the
Chebyshev taper (equal sidelobes at the requested level), Taylor (1955) for the
Taylor taper (``nbar`` near-in sidelobes near the requested level, decaying beyond).
Taper weights come from :mod:`adapt.numerics.tapers` (Dolph-Chebyshev and Taylor, equal
to ``scipy.signal.windows.chebwin`` and ``.taylor`` to the last bit, without the import cost).

Checkable fact: untapered on a uniform half-wavelength line its first sidelobe is
-13.26 dB; with ``taper=chebyshev sidelobe_db=30`` every sidelobe is -30 dB.

Weight: ``w = t * a_look / sum(t)`` (unit response in the look direction, ``w^H a = 1``).
Not adaptive: the same weight at every checkpoint. Cost per snapshot: N complex
multiply-adds for the output; none for the weights.
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.numerics.tapers import chebyshev_taper, taylor_taper
from adapt.processors.base import Context, Parameter, Processor, State


def taper_weights(positions: np.ndarray, taper: str, sidelobe_db: float, nbar: int,
                  layout_only: bool = False) -> np.ndarray:
    """Real amplitude taper (N,) for a line (along x) or a grid (x-z plane, separable).

    Raises ValueError for other layouts, where no standard taper applies.
    ``layout_only``: check the layout only and return ones.
    """
    pos = np.asarray(positions, float)
    n = len(pos)
    if taper == "none":
        return np.ones(n)

    def one_axis(coord: np.ndarray) -> np.ndarray:
        values, index = np.unique(np.round(coord, 9), return_inverse=True)
        m = len(values)
        if m == 1:
            return np.ones(len(coord))
        steps = np.diff(values)
        if not np.allclose(steps, steps[0], rtol=1e-6, atol=1e-9):
            raise ValueError("a taper needs uniformly spaced elements along each axis")
        if layout_only:
            return np.ones(len(coord))
        if taper == "chebyshev":
            w = chebyshev_taper(m, sidelobe_db)
        else:
            w = taylor_taper(m, nbar, sidelobe_db)
        return w[index]

    spread = np.ptp(pos, axis=0) > 1e-12
    if spread[1]:
        raise ValueError("tapers apply to line arrays (along x) and grids (x-z plane) only")
    t = np.ones(n)
    for axis in (0, 2):
        if spread[axis]:
            t = t * one_axis(pos[:, axis])
    # a grid must be complete for a separable taper to make sense
    if spread[0] and spread[2]:
        nx = len(np.unique(np.round(pos[:, 0], 9)))
        nz = len(np.unique(np.round(pos[:, 2], 9)))
        if nx * nz != n:
            raise ValueError("a taper on a planar array needs a full rectangular grid")
    return t


class Conventional(Processor):
    """Phase-steered (delay-and-sum) beam toward the look direction, optionally tapered.

    Parameters
    ----------
    taper : {"none", "taylor", "chebyshev"}
        Amplitude taper (lines along x and full x-z grids only).
    sidelobe_db : float
        Taper sidelobe level below the main beam, dB, in [10, 120].
    nbar : int
        Taylor taper: number of near-in equal sidelobes, in [1, 64].

    Returns
    -------
    weights : ndarray, (T, C, N)
        ``update`` gives ``w = t * a_look / sum(t)`` (unit look response) at every
        checkpoint; not adaptive, and needs no data (``data_free``).

    Notes
    -----
    Checkable fact: untapered on a uniform half-wavelength line the first sidelobe is
    -13.26 dB; with ``taper=chebyshev sidelobe_db=30`` every sidelobe is -30 dB.

    References
    ----------
    .. [1] C. L. Dolph, "A current distribution for broadside arrays which optimizes the
       relationship between beam width and side-lobe level", Proc. IRE 34 (1946).
    .. [2] T. T. Taylor, "Design of line-source antennas for narrow beamwidth and low
       side lobes", IRE Trans. Antennas Propag. 3 (1955).
    """

    method = "conventional"
    summary = "phase-steered sum toward the look direction, optional Taylor or Chebyshev taper"
    data_free = True
    drawn_covariance = True
    parameters = {
        "taper": Parameter("choice", "none", "amplitude taper", choices=("none", "taylor", "chebyshev")),
        "sidelobe_db": Parameter("float", 30.0, "taper sidelobe level below the main beam",
                                 unit="dB", low=10.0, high=120.0),
        "nbar": Parameter("int", 4, "Taylor taper: number of near-in equal sidelobes",
                          low=1, high=64),
    }

    def _taper(self, context: Context, layout_only: bool = False) -> np.ndarray:
        try:
            return taper_weights(context.positions, self.params["taper"],
                                 self.params["sidelobe_db"], self.params["nbar"],
                                 layout_only=layout_only)
        except ValueError as exc:
            raise SpecError(str(exc), path="taper", value=self.params["taper"],
                            allowed="none for this array") from None

    def check(self, context: Context, layout_only: bool = True) -> None:
        self._taper(context, layout_only=layout_only)   # the layout only

    def _weight(self, context: Context) -> np.ndarray:
        """(T, N) read-only view of the one weight (the taper of this context's array)."""
        w = self._taper(context) * context.look
        w = w / np.conj(np.vdot(w, context.look))
        return np.broadcast_to(w, (context.trials, context.elements))

    def begin(self, context: Context) -> State:
        return State(context=context, w=self._weight(context))

    def initial_weights(self, context: Context) -> np.ndarray:
        return self._weight(context).copy()

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        w = state.w
        return np.broadcast_to(w[:, None, :], (w.shape[0], len(checkpoints), w.shape[1])).copy()
