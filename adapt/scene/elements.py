"""Element patterns and mutual coupling: what turns an array of isotropic points into an
array of real antennas.

* An element pattern is a real amplitude gain ``f(u)`` toward direction u, the same for
  every element (all elements face one way, along their ``normal``), a function of the
  angle theta between u and the normal. ``cosine``: power gain ``cos(theta)^q`` in the
  front half-space, never below the back-lobe level ``10^(back_db/10)``, which it is
  everywhere behind the element (common practice for patch and dipole-over-ground
  elements). ``table``: power gain in dB given on a grid of angles from 0 to 180
  degrees, linearly interpolated in dB.
* Mutual coupling is a matrix C (N x N) acting on the steering vector, ``a -> C a``: a
  banded symmetric Toeplitz matrix with unit diagonal and coupling coefficient c_m
  between elements m apart (circulant on a ring), or a matrix given whole (Friedlander
  and Weiss, "Direction finding in the presence of mutual coupling", IEEE Trans. AP-39,
  1991, use the banded symmetric Toeplitz form for a uniform line; from memory).

The true steering of a source from u is ``f(u) C (g * exp(j 2 pi p . u))`` (g, p the
trial's element gains and positions); the assumed look steering is
``f(look) a_nominal(look)``, times C only when the array is calibrated.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ElementPattern", "Coupling", "pattern_gain", "coupling_matrix",
           "default_normal", "apply_coupling"]

PATTERNS = ("isotropic", "cosine", "table")


@dataclass(frozen=True)
class ElementPattern:
    """An element pattern (see the module docstring). ``angles_deg``/``gains_db`` for
    ``table``; ``exponent`` (q) and ``back_db`` for ``cosine``; ``normal`` a unit
    vector (3,) the elements face."""
    pattern: str = "isotropic"
    exponent: float = 1.0
    back_db: float = -30.0
    angles_deg: tuple = ()
    gains_db: tuple = ()
    normal: tuple = (0.0, 1.0, 0.0)

    @property
    def isotropic(self) -> bool:
        return self.pattern == "isotropic"


@dataclass(frozen=True)
class Coupling:
    """Mutual coupling: ``coefficients`` (c_1, c_2, ...) complex, or ``matrix`` (N x N)
    complex, as nested tuples; ``calibrated``: the processors' assumed steering includes
    it too."""
    coefficients: tuple = ()
    matrix: tuple | None = None
    calibrated: bool = False
    #: circulant (ring) rather than Toeplitz (line)
    circular: bool = False


def default_normal(layout: str) -> tuple:
    """The direction elements face by default: +z for a ring (elements looking up, as on
    a navigation antenna), +y (broadside) for the other layouts."""
    return (0.0, 0.0, 1.0) if layout == "ring" else (0.0, 1.0, 0.0)


def pattern_gain(element: ElementPattern | None, u: np.ndarray) -> np.ndarray:
    """Amplitude gain (...,) of the element pattern toward unit vectors u (..., 3)."""
    u = np.asarray(u, float)
    if element is None or element.isotropic:
        return np.ones(u.shape[:-1])
    cos = np.clip(u @ np.asarray(element.normal, float), -1.0, 1.0)
    if element.pattern == "cosine":
        back = 10.0 ** (element.back_db / 10.0)
        power = np.where(cos > 0, np.abs(cos) ** element.exponent, 0.0)
        return np.sqrt(np.maximum(power, back))
    theta = np.degrees(np.arccos(cos))
    db = np.interp(theta, np.asarray(element.angles_deg, float),
                   np.asarray(element.gains_db, float))
    return 10.0 ** (db / 20.0)


def coupling_matrix(coupling: Coupling | None, n: int) -> np.ndarray | None:
    """The coupling matrix C (N, N), or None without coupling."""
    if coupling is None:
        return None
    if coupling.matrix is not None:
        return np.array([[complex(*v) if isinstance(v, tuple) else complex(v) for v in row]
                         for row in coupling.matrix])
    c = np.eye(n, dtype=complex)
    idx = np.arange(n)
    gap = np.abs(idx[:, None] - idx[None, :])
    if coupling.circular:
        gap = np.minimum(gap, n - gap)
    for m, value in enumerate(coupling.coefficients, start=1):
        c[gap == m] = complex(*value) if isinstance(value, tuple) else complex(value)
    return c


def apply_coupling(c: np.ndarray, a: np.ndarray) -> np.ndarray:
    """``C a`` for steering vectors a (..., N), column by column (elementwise products,
    so the result does not depend on the batch shape as a matrix product's may)."""
    out = np.zeros(np.broadcast_shapes(a.shape), dtype=complex)
    for col in range(c.shape[1]):
        out += c[:, col] * a[..., col, None]
    return out
