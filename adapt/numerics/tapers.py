"""Amplitude tapers for sidelobe control: Dolph-Chebyshev and Taylor, in numpy alone.

The formulas are the textbook ones; the order of operations follows the long-standing
open-source implementation in ``scipy.signal.windows`` (BSD licence) so the values agree
with it to the last bit on the same numpy (checked in ``tests/test_tapers.py`` against
``scipy.signal.windows.chebwin`` and ``.taylor``). They live here because importing
``scipy.signal`` costs most of a second, more than a whole small comparison.

* :func:`chebyshev_taper` -- Dolph (1946): every sidelobe of the array factor sits at
  exactly ``-sidelobe_db`` relative to the main lobe (equiripple), the narrowest main
  lobe for that level. Samples are taken from the Chebyshev polynomial
  ``T_{M-1}(beta cos(pi k / M))`` with ``beta = cosh(acosh(10^(SLL/20)) / (M-1))`` and
  transformed by a DFT.
* :func:`taylor_taper` -- Taylor (1955), in the discrete form of Doerry (2017,
  Sandia report SAND2017-4042): the first ``nbar - 1`` sidelobes sit near ``-sidelobe_db``
  and the rest decay like those of a uniform aperture; peak value is not normalised
  to one (the array's response is normalised elsewhere).
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["chebyshev_taper", "taylor_taper"]


def _length(m) -> int:
    if isinstance(m, bool) or int(m) != m or m < 0:
        raise ValueError(f"taper length must be a whole number >= 0, got {m!r}")
    return int(m)


def _level(sidelobe_db) -> float:
    v = float(sidelobe_db)
    if not math.isfinite(v) or v <= 0:
        raise ValueError(f"sidelobe level must be a finite number of dB > 0, got {sidelobe_db!r}")
    return v


def chebyshev_taper(m: int, sidelobe_db: float) -> np.ndarray:
    """Symmetric Dolph-Chebyshev taper of ``m`` samples, peak 1, sidelobes at
    ``-sidelobe_db`` dB (equiripple; Dolph 1946).

    Raises ValueError for a length that is not a whole number >= 0 or a level that is
    not a positive finite number of dB.
    """
    m = _length(m)
    at = _level(sidelobe_db)
    if m <= 1:
        return np.ones(m)
    order = m - 1.0
    beta = np.cosh(1.0 / order * np.arccosh(np.float64(10 ** (abs(at) / 20.))))
    k = np.arange(m, dtype=np.float64)
    x = beta * np.cos(np.pi * k / m)
    p = np.zeros_like(x)
    p[x > 1] = np.cosh(order * np.arccosh(x[x > 1]))
    p[x < -1] = (2 * (m % 2) - 1) * np.cosh(order * np.arccosh(-x[x < -1]))
    p[abs(x) <= 1] = np.cos(order * np.arccos(x[abs(x) <= 1]))
    if m % 2:
        n = (m + 1) // 2
        w = np.real(np.fft.rfft(p))[:n]     # real input: the half spectrum, as scipy.fft
        w = np.concatenate((np.flip(w[1:n]), w))
    else:
        p = p * np.exp(1j * np.pi / m * np.arange(m, dtype=np.float64))
        w = np.real(np.fft.fft(p))
        n = m // 2 + 1
        w = np.concatenate((np.flip(w[1:n]), w[1:n]))
    return w / np.max(w)


def taylor_taper(m: int, nbar: int, sidelobe_db: float) -> np.ndarray:
    """Symmetric Taylor taper of ``m`` samples with ``nbar`` nearly constant sidelobes
    at about ``-sidelobe_db`` dB (Taylor 1955; discrete form after Doerry 2017), not
    normalised to a unit peak.

    Raises ValueError for a length that is not a whole number >= 0, ``nbar`` < 1 or a
    level that is not a positive finite number of dB.
    """
    m = _length(m)
    sll = _level(sidelobe_db)
    if isinstance(nbar, bool) or int(nbar) != nbar or nbar < 1:
        raise ValueError(f"nbar must be a whole number >= 1, got {nbar!r}")
    nbar = int(nbar)
    if m <= 1:
        return np.ones(m)
    b = np.asarray(10 ** (sll / 20))
    a = np.arccosh(b) / np.pi
    s2 = nbar ** 2 / (a ** 2 + (nbar - 0.5) ** 2)
    ma = np.arange(1, nbar, dtype=np.float64)
    fm = np.empty(nbar - 1, dtype=np.float64)
    signs = np.empty_like(ma)
    signs[::2] = 1
    signs[1::2] = -1
    m2 = ma * ma
    for mi in range(len(ma)):
        numer = signs[mi] * np.prod(1 - m2[mi] / s2 / (a ** 2 + (ma - 0.5) ** 2))
        denom = 2 * np.prod(1 - m2[mi] / m2[:mi]) * np.prod(1 - m2[mi] / m2[mi + 1:])
        fm[mi] = numer / denom
    n = np.arange(m, dtype=np.float64)
    return 1 + 2 * np.matmul(fm, np.cos(2 * np.pi * ma[:, np.newaxis] * (n - m / 2. + 0.5) / m))
