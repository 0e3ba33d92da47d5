"""Per-element FIR filtering of one white sequence, compiled when the kernels are on.

``out[t, b, d] = sum_{i=0..M-1} h[t, d, i] s[t, b + M - 1 - i]`` for taps h (T, D, M)
and a sequence s (T, B + M - 1): the wideband sources' fractional-delay and band filters
(:mod:`adapt.streams.wideband`). The sum runs over i in increasing order in both paths,
so each output is independent of the block it sits in; the compiled path (numba,
parallel over trials, :func:`adapt.numerics.kernels.compiled`) equals the numpy path to
rounding (tested). Cost: M complex multiply-adds per output.
"""
from __future__ import annotations

import threading

import numpy as np

from adapt.numerics import kernels as _kernels

__all__ = ["filter_bank"]

_KERNEL = None
_LOCK = threading.Lock()


def _compiled():
    global _KERNEL
    with _LOCK:
        if _KERNEL is None:
            import numba

            @numba.njit(parallel=True, cache=True, nogil=True)
            def kernel(h, s, out):                                    # pragma: no cover
                t_, d_, m = h.shape
                b_ = out.shape[1]
                for t in numba.prange(t_):
                    for b in range(b_):
                        for d in range(d_):
                            acc = 0j
                            for i in range(m):
                                acc += h[t, d, i] * s[t, b + m - 1 - i]
                            out[t, b, d] = acc
            _KERNEL = kernel
    return _KERNEL


def filter_bank(h: np.ndarray, s: np.ndarray, size: int) -> np.ndarray:
    """(T, size, D) outputs of the D filters h (T or 1, D, M) over s (T, size + M - 1)."""
    t_ = s.shape[0]
    h = np.ascontiguousarray(np.broadcast_to(h, (t_,) + h.shape[1:]), dtype=complex)
    m = h.shape[-1]
    out = np.zeros((t_, size, h.shape[1]), dtype=complex)
    if _kernels.compiled():
        _compiled()(h, np.ascontiguousarray(s, dtype=complex), out)
        return out
    for i in range(m):
        out += h[:, None, :, i] * s[:, m - 1 - i: m - 1 - i + size, None]
    return out
