"""One number formatter for the terminal table, report.html and curves.csv.

:func:`format_number` writes a value with a fixed number of decimals where that shows
it, and in scientific notation where the fixed form would hide it (a loss of 5.0e-10 dB
is not "0.00", and never "5.0117" cut from "5.011872336e-10"), or where it is too large
to read (1e6 and above). Undefined values (None, NaN) become the ``none`` text; a
result of -0 at the shown precision is written without its sign. With ``significant``
it writes that many significant digits instead (the machine-readable CSV form).
"""
from __future__ import annotations

import math

__all__ = ["format_number", "format_range"]


def format_number(value, decimals: int = 2, *, significant: int | None = None,
                  none: str = "n/a") -> str:
    """A number as text, the same way everywhere (see the module docstring).

    Parameters
    ----------
    value : float, int, None
        The number; None, NaN and values that are not numbers give ``none`` (text is
        returned unchanged).
    decimals : int
        Decimals of the fixed form (0: whole numbers).
    significant : int, optional
        Write ``significant`` significant digits (``format(v, ".{n}g")``) instead.
    none : str
        Text for an undefined value.

    Returns
    -------
    str
    """
    if value is None:
        return none
    if isinstance(value, str):
        return value
    try:
        f = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(f):
        return none
    if math.isinf(f):
        return "inf" if f > 0 else "-inf"
    if significant is not None:
        return format(f, f".{int(significant)}g")
    decimals = max(0, int(decimals))
    if f != 0 and (abs(f) >= 1e6 or abs(f) < 0.5 * 10.0 ** -decimals):
        text = f"{f:.{max(decimals, 1)}e}"
        mantissa, exponent = text.split("e")
        return f"{mantissa}e{int(exponent)}"
    text = f"{f:.{decimals}f}"
    # no "-0.00": a value of -1e-3 shown with 2 decimals is zero at that precision
    if text.startswith("-") and not any(ch in "123456789" for ch in text):
        text = text[1:]
    return text


def format_range(low, high, decimals: int = 2, none: str = "n/a") -> str:
    """``"low to high"`` with :func:`format_number` (``none`` if both are undefined)."""
    a, b = format_number(low, decimals, none=none), format_number(high, decimals, none=none)
    return none if a == b == none else f"{a} to {b}"
