"""Frost's linearly constrained LMS processor.

Source: O. L. Frost III, "An algorithm for linearly constrained adaptive array
processing", Proc. IEEE 60 (1972).

No reference waveform: the processor minimises the output power ``E|w^H x|^2`` of the
training data (``block.training``: interference plus noise, or the data with the wanted
signal when the scene trains with it present) subject to ``C^H w = f``. The columns of C
are the look vector a (response ``w^H a = 1``, distortionless) and, with
``derivatives=1`` or ``2``, the first and second azimuth derivatives of a at the look
direction held at zero response (a flatter look beam that tolerates pointing error;
derivative columns are scaled to the look vector's norm, which does not change the
constraint). Recursion, every trial at once (``y = w^H x``)::

    y(k) = w^H(k) x(k)
    w(k+1) = P [ w(k) - mu y^*(k) x(k) ] + F,
    P = I - C (C^H C)^-1 C^H,    F = C (C^H C)^-1 f

implemented as ``w - mu (P x) y^*`` (equal when ``C^H w = f``) with the reported weight
re-projected as ``P w + F``, so ``C^H w = f`` holds to rounding at every checkpoint. The
start weight is F (for the look constraint alone, a / N: the conventional beam).

Step-size convention: ``step`` is the unnormalised ``mu`` in inverse noise-power units.
The mean weight converges iff ``0 < mu < 2 / lambda_max(P R P)`` with R the training
covariance: the mean weight error obeys ``e(k+1) = (I - mu P R P) e(k)`` on the range of
P (Frost 1972; the bound as derived in this convention, where the instantaneous gradient
``x y^*`` carries no factor 2). The weight error of the projected recursion is the LMS
weight error of the projected data ``P x``, so the LMS mean-square analysis applies with
the eigenvalues of ``P R P`` on the range of P: the mean-square error stays bounded iff
``sum_i mu lambda_i(P R P) / (2 - mu lambda_i(P R P)) < 1`` (Widrow, McCool, Larimore &
Johnson 1976; Haykin, *Adaptive Filter Theory*; independent circular Gaussian snapshots).
Enforced: ``check`` refuses a step at which that sum reaches 1 in any trial, at every
checked moment of a changing scene. Default ``step=auto`` (or none):
``0.1 / tr(P R P)`` per trial, which keeps the sum below ``0.1 / 1.9``.

Checkable fact: the mean weight converges to the constrained optimum
``R^-1 C (C^H R^-1 C)^-1 f``, for the look constraint alone the MVDR weight
``R^-1 a / (a^H R^-1 a)`` (Frost 1972).

Tapped-delay-line form (``taps=L``, Frost 1972's own broadband setting): the weights act
on stacked snapshots ``[x_k; ...; x_{k-L+1}]`` (adapt.processors._taps) and the L
constraints ``C = [e_0 (x) a, ..., e_{L-1} (x) a]``, ``f = response`` fix the
look-direction response to the FIR filter ``response`` (``sum_n conj(a_n) w_{l,n} =
response_l``: a pre-steered look direction sees exactly that filter); default a pure
delay at the centre tap (L - 1) // 2. Checkable fact: ``C^H w = f`` to rounding at
every checkpoint. Derivative constraints apply to one tap only.

Cost per snapshot and trial: about (4 + 2M) N complex multiply-adds for M constraints.
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.processors._recursive import (
    AutoStep,
    Projector,
    bounded_steps,
    constrained_pass,
    local_marks,
    per_snapshot,
)
from adapt.processors._taps import TAPS, centre_tap
from adapt.processors.base import Context, Parameter, State
from adapt.scene.geometry import steering_derivatives


def look_constraints(look: np.ndarray, positions: np.ndarray,
                     look_direction: tuple[float, float] | None, derivatives: int
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Constraint matrix C (N, 1 + derivatives) and values f: unit response toward the
    look direction, zero first (and second) derivative of the response in azimuth.

    Raises SpecError when the derivative constraints are degenerate for this array and
    look direction (e.g. all elements on the line of sight) or leave no freedom to adapt.
    """
    a = np.asarray(look, dtype=complex)
    n = a.shape[0]
    cols = [a]
    if derivatives:
        if look_direction is None:
            raise SpecError("derivative constraints need the look direction", path="derivatives",
                            value=derivatives, allowed="0 when the look direction is unknown")
        extra = steering_derivatives(positions, look_direction[0], look_direction[1],
                                     derivatives, steering=a)
        for c in extra:
            size = np.linalg.norm(c)
            if size < 1e-9 * np.sqrt(n):
                raise SpecError("the azimuth derivative of the look response is zero for this "
                                "array and look direction", path="derivatives",
                                value=derivatives, allowed="0")
            cols.append(c * (np.sqrt(n) / size))
    c = np.stack(cols, axis=1)
    m = c.shape[1]
    if m >= n:
        raise SpecError(f"{m} constraints leave no freedom on {n} elements", path="derivatives",
                        value=derivatives, allowed=f"at most {n - 2}")
    sv = np.linalg.svd(c / np.sqrt(n), compute_uv=False)
    if sv[-1] < 1e-6:
        raise SpecError("the derivative constraints are linearly dependent on the look "
                        "constraint for this array", path="derivatives", value=derivatives,
                        allowed="0")
    f = np.zeros(m, dtype=complex)
    f[0] = 1.0
    return c, f


def response_taps(text: str | None, taps: int, where: str = "response") -> np.ndarray:
    """The look-direction FIR response (taps,) from comma-separated numbers (None: a pure
    delay at the centre tap)."""
    fir = np.zeros(taps, dtype=complex)
    if text is None:
        fir[centre_tap(taps)] = 1.0
        return fir
    try:
        values = [complex(v.strip().replace("i", "j")) for v in str(text).split(",")]
    except ValueError:
        raise SpecError("expected comma-separated numbers", path=where, value=text,
                        allowed=f"{taps} numbers, e.g. 0,1,0") from None
    if len(values) != taps or not all(np.isfinite(v) for v in values):
        raise SpecError(f"expected {taps} finite tap values, one per tap", path=where,
                        value=text, allowed=f"{taps} comma-separated numbers")
    fir[:] = values
    return fir


def delay_line_constraints(look: np.ndarray, taps: int, response: str | None
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Frost's (1972) tapped-delay-line constraints: C (N L, L) with column l the look
    vector a at tap l (a is read from the stacked look vector's centre tap), f the FIR
    response."""
    n = look.shape[0] // taps
    c0 = centre_tap(taps)
    a = np.asarray(look[c0 * n:(c0 + 1) * n], dtype=complex)
    c = np.zeros((n * taps, taps), dtype=complex)
    for l_ in range(taps):
        c[l_ * n:(l_ + 1) * n, l_] = a
    return c, response_taps(response, taps)


class FrostConstrainedLms(AutoStep):
    """Frost's linearly constrained LMS: minimum output power under ``C^H w = f``.

    Parameters
    ----------
    step : float or None
        Step size ``mu`` in inverse noise-power units; ``auto`` (or none):
        ``0.1 / tr(P R P)`` per trial. Refused where the mean-square sum
        ``sum_i mu lambda_i / (2 - mu lambda_i)`` over ``P R P`` reaches 1.
    derivatives : int
        Azimuth-derivative constraints added to the look constraint (0, 1 or 2; 0 with
        taps > 1).
    taps : int
        Delay-line length L behind each element (default 1): Frost's tapped-delay-line
        form with L look constraints (adapt.processors._taps).
    response : str or None
        With taps > 1, the look-direction FIR response, L comma-separated tap values
        (default: a pure delay at the centre tap).

    Returns
    -------
    weights : ndarray, (T, C, N)
        The re-projected weights ``P w + F`` at each checkpoint (``C^H w = f`` to
        rounding).

    Notes
    -----
    Checkable fact: the mean weight converges to ``R^-1 C (C^H R^-1 C)^-1 f``, for the
    look constraint alone the MVDR weight ``R^-1 a / (a^H R^-1 a)``.

    References
    ----------
    .. [1] O. L. Frost III, "An algorithm for linearly constrained adaptive array
       processing", Proc. IEEE 60 (1972).
    .. [2] B. Widrow, J. M. McCool, M. G. Larimore and C. R. Johnson, "Stationary and
       nonstationary learning characteristics of the LMS adaptive filter", Proc. IEEE 64
       (1976) (the mean-square bound; title from memory).
    """

    method = "frost"
    min_elements = 2
    summary = "Frost's constrained LMS: minimum output power with unit look response"
    parameters = {
        "step": Parameter("float", None,
                          "step size mu; auto (or none): 0.1 / tr(P R P) per trial; must keep "
                          "sum mu lambda_i/(2 - mu lambda_i) < 1 over P R P", unit="per noise power",
                          low=0.0, low_open=True, allow_none=True),
        "derivatives": Parameter("int", 0, "azimuth-derivative constraints added to the look "
                                 "constraint (1: zero slope, 2: also zero curvature)",
                                 low=0, high=2),
        "taps": TAPS,
        "response": Parameter("str", None, "look-direction FIR response of the delay line, "
                              "comma-separated tap values, one per tap (default: a pure "
                              "delay at the centre tap)", allow_none=True, omit_unset=True),
    }

    @classmethod
    def cross_check(cls, params: dict, where: str) -> None:
        taps = params.get("taps", 1)
        if taps > 1 and params["derivatives"]:
            raise SpecError("derivative constraints apply to one tap only",
                            path=f"{where}derivatives", value=params["derivatives"],
                            allowed="0 with taps > 1")
        if params.get("response") is not None:
            fir = response_taps(params["response"], taps, f"{where}response")
            if not np.any(fir):
                raise SpecError("the look-direction response is all zero",
                                path=f"{where}response", value=params["response"],
                                allowed="at least one non-zero tap")
        else:
            params.pop("response", None)     # unset: out of params (results read as before)

    def _projector(self, context: Context) -> Projector:
        taps = self.params.get("taps", 1)
        if taps > 1:
            c, f = delay_line_constraints(context.look, taps, self.params.get("response"))
        else:
            c, f = look_constraints(context.look, context.positions,
                                    getattr(context, "look_direction", None),
                                    self.params["derivatives"])
        return Projector(c, f)

    def _steps(self, context: Context, proj: Projector) -> np.ndarray:
        return bounded_steps(self.params["step"], context.training_covariance, context,
                             self.method, "training covariance",
                             "the projected training covariance P R P", basis=proj.basis())

    def check(self, context: Context) -> None:
        self._steps(context, self._projector(context))

    def initial_weights(self, context: Context) -> np.ndarray:
        quiescent = self._projector(context).quiescent
        return np.broadcast_to(quiescent, (context.trials, context.elements)).copy()

    def begin(self, context: Context) -> State:
        proj = self._projector(context)
        steps = self._steps(context, proj)
        wc = np.conj(np.broadcast_to(proj.quiescent, (context.trials, context.elements)))
        return State(context=context, proj=proj, steps=steps, wc=wc)

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        return constrained_pass(state.wc, per_snapshot(block.training),
                                local_marks(block, checkpoints), state.steps, state.proj)
