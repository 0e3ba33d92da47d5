"""Constants and tables shared by the compiled kernels (:mod:`adapt.numerics.loops`)
and their numpy twins (:mod:`adapt.numerics.kernels`, :mod:`adapt.streams.normals`).

The ziggurat tables of the counter-based normal streams: 256 layers for the standard
normal, derived here (Marsaglia & Tsang, "The ziggurat method for generating random
variables", J. Stat. Software 5(8), 2000; the tail beyond :data:`TAIL_START` by
Marsaglia's 1964 method). See :mod:`adapt.streams.normals` for how a word becomes a
normal.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["LAYERS", "TAIL_START", "GOLDEN", "GAMMA_STEP", "ACCEPT", "SCALE", "DENSITY",
           "SYMMETRISE_EVERY"]

#: number of ziggurat layers
LAYERS = 256
#: r: where the tail of the ziggurat's base layer starts (the standard-normal value for
#: 256 layers, Marsaglia & Tsang 2000 give the 128-layer one, 3.442619855899)
TAIL_START = 3.6541528853610088
#: SplitMix64's golden gamma: a rejected word u continues with mix64(u + m GOLDEN)
GOLDEN = 0x9E3779B97F4A7C15
#: odd multiplier of a gamma variate's attempt words (any odd 64-bit constant with well
#: mixed bits serves; this one differs from the golden gamma so the two word families
#: of one word never meet)
GAMMA_STEP = 0xD1B54A32D192ED03
#: the RLS inverse-correlation matrix P is re-symmetrised after every this many
#: snapshots (counted from the stream start), compiled and numpy alike
SYMMETRISE_EVERY = 256


def _tables(n: int = LAYERS, r: float = TAIL_START):
    """Ziggurat tables for f(x) = exp(-x^2/2): every layer (and the base with its tail)
    has the area v = r f(r) + int_r^inf f. Returns (k, w, f): uint64 (n,) acceptance
    bounds ``floor(2^52 x_{i+1} / x_i)``, float (n,) scales ``x_i / 2^52`` and float
    (n + 1,) ``f(x_i)`` with x_0 = v / f(r) (the base's pseudo-width), x_1 = r, ...,
    x_n = 0 (so f[n] = 1)."""
    def f(x):
        return math.exp(-0.5 * x * x)

    v = r * f(r) + math.sqrt(math.pi / 2.0) * math.erfc(r / math.sqrt(2.0))
    x = [v / f(r), r]
    for _ in range(2, n):
        x.append(math.sqrt(-2.0 * math.log(v / x[-1] + f(x[-1]))))
    x.append(0.0)
    scale = float(1 << 52)
    k = np.array([int(scale * r * f(r) / v)] + [int(scale * x[i + 1] / x[i]) for i in range(1, n)],
                 dtype=np.uint64)
    w = np.array([xi / scale for xi in x[:n]])
    fx = np.array([f(xi) for xi in x])
    return k, w, fx


#: acceptance bounds (uint64), layer scales and densities f(x_i) of the ziggurat
ACCEPT, SCALE, DENSITY = _tables()
