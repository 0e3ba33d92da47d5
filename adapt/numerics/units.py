"""Units shared by every layer: power ratios in decibels."""
from __future__ import annotations

import numpy as np

__all__ = ["power_db"]


def power_db(x) -> np.ndarray:
    """10 log10 of power ratios; zero, negative, NaN or None become NaN (undefined, not
    -inf), so an off wanted source or an undefined ratio leaves a gap, not a spike.

    Parameters
    ----------
    x : array_like or iterable
        Power ratios (linear); ``None`` entries of a list, tuple or other iterable
        count as undefined.

    Returns
    -------
    ndarray of float
        The values in dB, NaN where undefined.
    """
    if not isinstance(x, np.ndarray) and not np.isscalar(x) and hasattr(x, "__iter__"):
        x = [np.nan if v is None else v for v in x]
    x = np.asarray(x, dtype=float)
    out = np.full(x.shape, np.nan)
    ok = np.isfinite(x) & (x > 0)
    out[ok] = 10.0 * np.log10(x[ok])
    return out
