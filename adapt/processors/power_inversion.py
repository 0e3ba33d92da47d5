"""Power inversion: minimum output power with one element's weight fixed to 1.

Source: Compton, "The power-inversion adaptive array: concept and performance", IEEE
Trans. AES-15, 1979 (the classic GNSS/communications anti-jam processor).

Weight: ``w = R^-1 e / (e^H R^-1 e)``, ``e`` the unit vector of ``reference_element``,
R the sample covariance of the training data over a growing window (every snapshot so
far) or a sliding one (the last ``length`` snapshots, for jammers that change),
optionally loaded ``loading_db`` above the noise floor. No look direction is used: the processor
minimises total output power subject to ``w_ref = 1``, which puts deep nulls on strong
jammers (they are "inverted": the stronger the jammer, the deeper its null) and leaves
signals below the noise nearly untouched. Initial weight: ``e`` (the reference element
alone).

Checkable fact: against 40 dB jammers (fewer than N of them) the response toward each
jammer, relative to the quiescent response (that of the reference element alone, 1 in
every direction for isotropic elements), is below -30 dB after a few times N snapshots.

Parameters: ``reference_element`` (index, default 0), ``loading_db`` (dB above the noise
floor, default none), ``window`` (growing | sliding, default growing) and ``length``
(sliding window length, snapshots; a window shorter than N needs loading, as for ``smi``).
Cost per snapshot: O(N^2) accumulation (2x for sliding); O(N^3) per checkpoint.
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.processors._covariance import (
    SampleCovarianceProcessor,
    check_window,
    loading_parameters,
    solve_sample,
    window_parameters,
)
from adapt.processors._taps import TAPS
from adapt.processors.base import Context, Parameter, State


class PowerInversion(SampleCovarianceProcessor):
    """Power inversion: minimum output power with the reference element's weight held
    at 1, from the sample covariance (growing or sliding window); no look direction used.

    Parameters
    ----------
    reference_element : int
        Index of the element whose weight is held at 1.
    loading_db : float or None
        Diagonal load above the noise floor, dB, in [-60, 100].
    window : {"growing", "sliding"}
        Training window: every snapshot so far, or the last ``length``.
    length : int or None
        Sliding window length, snapshots (shorter than N needs loading).
    taps : int
        Delay-line length L behind each element (default 1): run on stacked space-time
        snapshots, N L weights (adapt.processors._taps).

    Returns
    -------
    weights : ndarray, (T, C, N)
        ``R^-1 e / (e^H R^-1 e)`` at each checkpoint.

    Notes
    -----
    Checkable fact: against 40 dB jammers (fewer than N) the response toward each
    jammer, relative to the reference element alone, is below -30 dB after a few
    times N snapshots.

    References
    ----------
    .. [1] R. T. Compton, "The power-inversion adaptive array: concept and
       performance", IEEE Trans. Aerosp. Electron. Syst. 15 (1979).
    """

    method = "power_inversion"
    summary = "minimum output power with the reference element's weight fixed at 1 (Compton)"
    parameters = {
        "reference_element": Parameter("int", 0, "element whose weight is held at 1",
                                       low=0, high=10 ** 6),
        **loading_parameters(auto=False),
        **window_parameters(),
        "taps": TAPS,
    }

    @classmethod
    def cross_check(cls, params: dict, where: str) -> None:
        check_window(params, where)

    def check(self, context: Context) -> None:
        if self.params["reference_element"] >= context.elements:
            raise SpecError("reference_element is not an element of this array",
                            path="reference_element", value=self.params["reference_element"],
                            allowed=f"0 .. {context.elements - 1}")
        n = context.elements
        if (self.params["window"] == "sliding" and self.params["loading_db"] is None
                and self.params["length"] < n):
            raise SpecError(f"a sliding window of {self.params['length']} snapshots is shorter "
                            f"than the {n} elements: its covariance is always singular",
                            path="length", value=self.params["length"],
                            allowed=f">= {n} snapshots, or add loading_db")

    def window_settings(self):
        return self.params["window"], self.params["length"], 1

    def _unit(self, context: Context) -> np.ndarray:
        e = np.zeros(context.elements, dtype=complex)
        e[self.params["reference_element"]] = 1.0
        return e

    def begin(self, context: Context) -> State:
        state = super().begin(context)
        state.e = self._unit(context)
        return state

    def initial_weights(self, context: Context) -> np.ndarray:
        return np.broadcast_to(self._unit(context), (context.trials, context.elements)).copy()

    def weights_from(self, state, r, counts, exact):
        e = np.broadcast_to(state.e, r.shape[:-1])
        x = solve_sample(r, e, counts, exact)
        ref = self.params["reference_element"]
        return x / np.conj(x[..., ref])[..., None]
