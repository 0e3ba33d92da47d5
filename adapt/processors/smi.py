"""Sample matrix inversion (SMI): MVDR weights from the sample covariance of the training
data, optionally diagonally loaded, over a growing or sliding window.

Source: Reed, Mallett & Brennan, "Rapid convergence rate in adaptive arrays", IEEE Trans.
AES-10, 1974 (the SMI weight and its convergence); Carlson, "Covariance matrix estimation
errors and diagonal loading in adaptive arrays", IEEE Trans. AES-24, 1988 (loading).

Weight at checkpoint c: ``w = R^-1 a / (a^H R^-1 a)``, ``a`` the assumed look steering,
``R = (1/k) sum x x^H + delta I`` over the k training snapshots of the window
(``block.training``: interference plus noise, or with the wanted signal present when the
scene trains that way; the latter is MPDR).

Checkable facts: trained on interference-only Gaussian data without loading, the
normalised SINR rho = SINR/SINR_opt follows Beta(K-N+2, N-1), mean (K+2-N)/(K+1) (RMB
1974), so K = 2N-3 snapshots lose 3 dB on average; loaded 10 dB above the noise floor
against J strong jammers, about 2J snapshots suffice (Carlson 1988).

Parameters (units):

* ``loading``: none | fixed | auto (default none). ``fixed``: delta = noise power x
  10^(loading_db/10); ``auto``: delta = estimated noise floor x 10^(loading_db/10), the
  noise floor being the min(k, N) data eigenvalues left after an MDL count of the
  interference eigenvalues (Wax & Kailath 1985), divided by their expected share of the
  noise (see ``_covariance.noise_floor_estimate``; holds with J up to N - 1 interferers,
  from about 2N snapshots; biased low, i.e. lighter loading, near K = N; with no more
  snapshots than interferers no noise eigenvalue exists and the floor is overestimated),
  loading_db defaulting to 10 dB. ``loading_db`` alone means fixed.
* ``loading_db``: dB above the noise floor.
* ``window``: growing (all snapshots so far) | sliding (the last ``length`` snapshots).
* ``length``: sliding window length, snapshots.
* ``interval``: weights recomputed every ``interval`` snapshots and held in between:
  checkpoint c uses the weight of the last update u = floor(c/interval)*interval,
  trained on [max(0, u-length), u) (sliding) or [0, u) (growing); u = 0 gives the
  initial weight (the conventional beam a/N).

Fewer snapshots than elements without loading: the sample covariance is singular; the
weight is the minimum-norm (pseudo-inverse) solution on the data subspace and a warning
is issued once per run. A sliding window shorter than N without loading is refused.

Spatial smoothing (``subarray`` M, ``smoothing`` forward | forward-backward; uniform
lines only): the weight is formed from the smoothed M x M covariance (Shan, Wax and
Kailath 1985; Pillai and Kwon 1989; :func:`adapt.processors._covariance.smoothed_covariance`)
and the first M entries of the look vector, and applied to the first subarray (zero on
the other elements). Checked in tests/test_arrays.py against the closed form of the
smoothed covariance in a coherent multipath scene where unsmoothed MPDR cancels the
wanted signal (Widrow et al. 1982).

Cost per snapshot: O(N^2) to accumulate (2x for sliding), O(N^3) per weight update
(one batched Cholesky solve per checkpoint; plus an eigenvalue decomposition for
``auto`` loading).
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.numerics import kernels as _kernels
from adapt.numerics.linalg import compiled_solves_active, distortionless
from adapt.processors._covariance import (
    SampleCovarianceProcessor,
    check_loading,
    check_smoothing,
    check_window,
    effective_loading,
    loading_parameters,
    smoothing_parameters,
    solve_sample,
    window_parameters,
)
from adapt.processors._taps import TAPS
from adapt.processors.base import Context, Parameter


class SampleMatrixInversion(SampleCovarianceProcessor):
    """Sample matrix inversion: MVDR from the sample covariance of the training data,
    optionally diagonally loaded, over a growing or sliding window.

    Parameters
    ----------
    loading : {"fixed", "auto"} or None
        Diagonal loading: none, fixed (``loading_db`` above the known noise floor) or
        auto (above a noise floor estimated from the data; ``loading_db`` defaults to 10).
    loading_db : float or None
        Diagonal load above the noise floor, dB, in [-60, 100] (alone: fixed loading).
    window : {"growing", "sliding"}
        Training window: every snapshot so far, or the last ``length``.
    length : int or None
        Sliding window length, snapshots.
    interval : int
        Weights recomputed every ``interval`` snapshots and held in between.
    subarray : int or None
        Spatial smoothing over subarrays of this many consecutive elements (uniform
        lines only); the weight is the subarray's, applied to the first subarray.
    smoothing : {"forward", "forward-backward"}
        With ``subarray``: forward, or forward-backward smoothing.
    taps : int
        Delay-line length L behind each element (default 1): run on stacked space-time
        snapshots, N L weights (adapt.processors._taps).

    Returns
    -------
    weights : ndarray, (T, C, N)
        ``R^-1 a / (a^H R^-1 a)`` at each checkpoint (the minimum-norm solution on the
        data subspace while an unloaded R is singular).

    Notes
    -----
    Checkable fact: trained on interference-only Gaussian data without loading, the
    normalised SINR follows Beta(K-N+2, N-1), mean (K+2-N)/(K+1), so K = 2N-3 snapshots
    lose 3 dB on average; loaded 10 dB above the noise floor against J strong jammers,
    about 2J snapshots suffice.

    References
    ----------
    .. [1] I. S. Reed, J. D. Mallett and L. E. Brennan, "Rapid convergence rate in
       adaptive arrays", IEEE Trans. Aerosp. Electron. Syst. 10 (1974).
    .. [2] B. D. Carlson, "Covariance matrix estimation errors and diagonal loading in
       adaptive arrays", IEEE Trans. Aerosp. Electron. Syst. 24 (1988).
    """

    method = "smi"
    summary = "MVDR from the sample covariance (Reed-Mallett-Brennan), optional diagonal loading"
    sample_mvdr = True
    parameters = {
        **loading_parameters(auto=True),
        **window_parameters(),
        "interval": Parameter("int", 1, "weights recomputed every `interval` snapshots "
                              "and held in between", unit="snapshots", low=1, high=10 ** 9),
        **smoothing_parameters(),
        "taps": TAPS,
    }

    @classmethod
    def validate(cls, given: dict, where: str = "") -> dict:
        params = super().validate(given, where)
        check_loading(params, given, where)
        check_smoothing(params, given, where)
        return params

    @classmethod
    def cross_check(cls, params: dict, where: str) -> None:
        check_window(params, where)

    def check(self, context: Context) -> None:
        self.check_subarray(context)
        mode, _ = effective_loading(self.params)
        n = context.elements
        if self.params["window"] == "sliding" and mode is None and self.params["length"] < n:
            raise SpecError(f"a sliding window of {self.params['length']} snapshots is shorter "
                            f"than the {n} elements: its covariance is always singular",
                            path="length", value=self.params["length"],
                            allowed=f">= {n} snapshots, or add loading_db")

    def window_settings(self):
        return self.params["window"], self.params["length"], self.params["interval"]

    def weights_from(self, state, r, counts, exact):
        a = np.broadcast_to(self.look(state.context), r.shape[:-1])
        return distortionless(solve_sample(r, a, counts, exact), a)

    def weights_from_scaled(self, state, table, counts, load):
        # the compiled solve with the 1/count scale and the load folded in: the same
        # numbers as weights_from on S / count + load I, without that copy of the stack
        if not compiled_solves_active():
            return None
        look = state.context.look
        try:
            x = _kernels.cholesky_solve(table, look[:, None], scale=(1.0 / counts)[None, :],
                                        load=load)
        except np.linalg.LinAlgError:          # the general path handles what is singular
            return None
        return distortionless(x[..., 0], np.broadcast_to(look, x.shape[:-1]))
