"""Linearly constrained minimum variance (LCMV) on the sample covariance.

Source: Frost, "An algorithm for linearly constrained adaptive array processing", Proc.
IEEE 60, 1972; Van Trees, Optimum Array Processing (2002), sec. 6.7; derivative
constraints: Buckley & Griffiths, "An adaptive generalized sidelobe canceller with
derivative constraints", IEEE Trans. AP-34, 1986.

Weight: ``w = R^-1 C (C^H R^-1 C)^-1 f`` minimises ``w^H R w`` subject to ``C^H w = f``,
with R the growing-window sample covariance of the training data (optionally loaded
``loading_db`` above the noise floor) and the constraint columns:

* the assumed look steering ``a``, response 1;
* ``a(az_i, el_i)`` for each azimuth in ``nulls`` (degrees; elevation from
  ``null_elevations``, default 0 degrees for every null; one value applies to all),
  response 0;
* with ``derivative``: ``da/d(az)`` at the look direction (per radian), response 0, so
  the response is flat to first order in azimuth around the look direction (robustness
  to pointing error); with ``second_derivative`` also ``d^2 a/d(az)^2``, response 0.

Checkable facts: the constraints hold exactly, ``w^H a = 1``, ``|w^H a(null)| ~ 1e-15``,
``w^H da/d(az) = 0``; with no extra constraints LCMV is exactly the (growing-window)
SMI/MVDR weight.

The constraints must leave at least one adaptive degree of freedom (M <= N - 1) and be
linearly independent (a null too near the look direction is refused). Fewer snapshots
than elements without loading: minimum-norm solution on the data subspace, as for smi.

Cost per snapshot: O(N^2) accumulation; per checkpoint O(N^3 + N^2 M) (one Cholesky solve
with M right-hand sides and an M x M solve).
"""
from __future__ import annotations

import math

import numpy as np

from adapt.errors import SpecError
from adapt.numerics.linalg import solve_hermitian
from adapt.processors._covariance import SampleCovarianceProcessor, loading_parameters, solve_sample
from adapt.processors.base import Context, Parameter, State, format_value
from adapt.scene.geometry import steering_derivatives, steering_vector


def _angle_list(value) -> str | None:
    """Normalise a list of angles (YAML list, number or text "20,35.5") to "20,35.5"."""
    if value is None:
        return None
    if isinstance(value, (list, tuple)):
        items = list(value)
    elif isinstance(value, (int, float)) and not isinstance(value, bool):
        items = [value]
    elif isinstance(value, str):
        text = value.strip().strip("[]")
        if text.lower() in ("", "none", "null"):
            return None
        items = [p for p in (s.strip() for s in text.split(",")) if p]
    else:
        raise ValueError("not a list")
    out = []
    for item in items:
        if isinstance(item, bool):
            raise ValueError("not a number")
        x = float(item)
        if not math.isfinite(x) or not -180.0 <= x <= 180.0:
            raise ValueError("out of range")
        out.append(format_value(x))
    return ",".join(out) if out else None


def parse_angles(text: str | None) -> np.ndarray:
    """Angles (degrees) from normalised text "20,35.5"; empty for None."""
    return np.array([float(s) for s in text.split(",")]) if text else np.zeros(0)


class LinearlyConstrained(SampleCovarianceProcessor):
    """Linearly constrained minimum variance on the growing-window sample covariance:
    look, null and azimuth-derivative constraints.

    Parameters
    ----------
    nulls : str or None
        Azimuths forced to zero response, degrees, e.g. ``20,35.5``.
    null_elevations : str or None
        Elevation of each null, degrees (one value: all; default 0).
    derivative : bool
        Zero first derivative of the response in azimuth at the look direction.
    second_derivative : bool
        Also zero the second derivative (needs ``derivative``).
    loading_db : float or None
        Diagonal load above the noise floor, dB, in [-60, 100].

    Returns
    -------
    weights : ndarray, (T, C, N)
        ``w = R^-1 C (C^H R^-1 C)^-1 f`` at each checkpoint.

    Notes
    -----
    Checkable facts: the constraints hold exactly (``w^H a = 1``, ``|w^H a(null)|`` about
    1e-15, ``w^H da/d(az) = 0``); with no extra constraint LCMV is exactly SMI/MVDR.

    References
    ----------
    .. [1] O. L. Frost III, "An algorithm for linearly constrained adaptive array
       processing", Proc. IEEE 60 (1972).
    .. [2] K. M. Buckley and L. J. Griffiths, "An adaptive generalized sidelobe canceller
       with derivative constraints", IEEE Trans. Antennas Propag. 34 (1986).
    .. [3] H. L. Van Trees, *Optimum Array Processing* (2002), sec. 6.7.
    """

    method = "lcmv"
    min_elements = 2
    summary = "minimum variance with look, null and derivative constraints (Frost)"
    parameters = {
        "nulls": Parameter("str", None, "azimuths forced to zero response, e.g. 20,35.5",
                           unit="degrees", allow_none=True),
        "null_elevations": Parameter("str", None, "elevation of each null (one value: all; "
                                     "default 0)", unit="degrees", allow_none=True),
        "derivative": Parameter("bool", False, "zero first derivative of the response in "
                                "azimuth at the look direction"),
        "second_derivative": Parameter("bool", False, "also zero the second derivative"),
        **loading_parameters(auto=False),
    }

    @classmethod
    def validate(cls, given: dict, where: str = "") -> dict:
        given = dict(given)
        for key in ("nulls", "null_elevations"):
            if key in given:
                try:
                    given[key] = _angle_list(given[key])
                except (ValueError, TypeError, OverflowError):
                    raise SpecError("expected a list of angles", path=f"{where}{key}",
                                    value=given[key], allowed="degrees in [-180, 180], "
                                    "comma-separated text or a list, e.g. 20,35.5") from None
        return super().validate(given, where)

    @classmethod
    def cross_check(cls, params: dict, where: str) -> None:
        nulls = parse_angles(params["nulls"])
        elev = parse_angles(params["null_elevations"])
        if elev.size and not nulls.size:
            raise SpecError("null_elevations given without nulls", path=f"{where}null_elevations",
                            value=params["null_elevations"],
                            allowed="null_elevations together with nulls")
        if elev.size not in (0, 1, nulls.size):
            raise SpecError(f"{elev.size} null elevations for {nulls.size} nulls",
                            path=f"{where}null_elevations", value=params["null_elevations"],
                            allowed="one elevation per null, or a single one for all")
        if np.any(np.abs(elev) > 90):
            raise SpecError("elevations must be within [-90, 90] degrees",
                            path=f"{where}null_elevations", value=params["null_elevations"],
                            allowed="degrees in [-90, 90]")
        if params["second_derivative"] and not params["derivative"]:
            raise SpecError("second_derivative needs derivative=true",
                            path=f"{where}second_derivative", value=True,
                            allowed="second_derivative=true together with derivative=true")

    def constraints(self, context: Context) -> tuple[np.ndarray, np.ndarray]:
        """Constraint matrix C (N, M) and responses f (M,); SpecError if unusable."""
        n = context.elements
        nulls = parse_angles(self.params["nulls"])
        elev = parse_angles(self.params["null_elevations"])
        elev = np.broadcast_to(elev if elev.size else np.zeros(1), nulls.shape)
        cols = [context.look]
        if nulls.size:
            cols += list(np.atleast_2d(steering_vector(context.positions, nulls, elev)))
        if self.params["derivative"]:
            if context.look_direction is None:
                raise SpecError("derivative constraints need the look direction",
                                path="derivative", value=True)
            az, el = context.look_direction
            cols += steering_derivatives(context.positions, az, el,
                                         2 if self.params["second_derivative"] else 1)
        c = np.stack(cols, axis=1)
        m = c.shape[1]
        if m > n - 1:
            raise SpecError(f"{m} constraints leave no adaptive degree of freedom for "
                            f"{n} elements", path="nulls", value=self.params["nulls"],
                            allowed=f"at most {n - 1} constraints in all")
        s = np.linalg.svd(c / np.linalg.norm(c, axis=0), compute_uv=False)
        if s[-1] < 1e-6 * s[0]:
            raise SpecError("the constraints are (nearly) linearly dependent: a null at or "
                            "next to the look direction or another null?", path="nulls",
                            value=self.params["nulls"])
        f = np.zeros(m, dtype=complex)
        f[0] = 1.0
        return c, f

    def check(self, context: Context) -> None:
        self.constraints(context)

    def begin(self, context: Context) -> State:
        state = super().begin(context)
        state.c, state.f = self.constraints(context)
        return state

    def initial_weights(self, context: Context) -> np.ndarray:
        """The quiescent weight ``C (C^H C)^-1 f`` (white noise)."""
        c, f = self.constraints(context)
        w = c @ np.linalg.solve(np.conj(c.T) @ c, f)
        return np.broadcast_to(w, (context.trials, context.elements)).copy()

    def weights_from(self, state, r, counts, exact):
        c = np.broadcast_to(state.c, r.shape[:-2] + state.c.shape)
        ric = solve_sample(r, c, counts, exact)                   # R^-1 C, (T, C, N, M)
        g = np.conj(np.swapaxes(c, -1, -2)) @ ric                 # C^H R^-1 C
        g = 0.5 * (g + np.conj(np.swapaxes(g, -1, -2)))
        lam = solve_hermitian(g, np.broadcast_to(state.f, g.shape[:-1]))
        return np.einsum("...nm,...m->...n", ric, lam)
