"""Per-element FIR filtering of one white sequence, compiled when the kernels are on.

``out[t, b, d] = sum_{i=0..M-1} h[t, d, i] s[t, b + M - 1 - i]`` for taps h (T, D, M)
and a sequence s (T, B + M - 1): the wideband sources' fractional-delay and band filters
(:mod:`adapt.streams.wideband`). The sum runs over i in increasing order in both paths,
so each output is independent of the block it sits in. Cost: M complex multiply-adds
per output.

:func:`add_filtered` also weights the D outputs of a source by its steering entries and
on/off gate and adds them into the stream (or writes them), with the roundings of the
numpy operations it replaces (``part *= steer * gate``; ``out += part``), so the streams
are the same to the last bit whichever runs. The compiled path
(:func:`adapt.numerics.loops.fir_kernel`, :func:`adapt.numerics.kernels.compiled`) does
it in one pass, the sums of each output snapshot side by side and each distinct filter
summed once, from taps prepared once (:class:`FilterBank`); it equals the numpy path to
rounding (tested; numpy's complex products are not the same roundings for every memory
layout).
"""
from __future__ import annotations

import numpy as np

from adapt.numerics import kernels as _kernels

__all__ = ["filter_bank", "FilterBank", "add_filtered"]


class FilterBank:
    """Taps h (T or 1, D, M) (1: the same for every trial), kept as given for the numpy
    path and, on first use by the compiled path, reduced to the distinct filters (a
    source seen from broadside has the same filter at every element; so do the
    elements of a grid's column), planar and transposed (M, U), so that a stream of
    blocks prepares them once."""

    def __init__(self, h: np.ndarray):
        h = np.asarray(h)
        if h.ndim != 3 or h.shape[-1] < 1 or h.shape[1] < 1:
            raise ValueError(f"taps must be (T or 1, D, M) with D, M >= 1, got {h.shape}")
        self.h = np.ascontiguousarray(h, dtype=complex)
        self._planar: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    @property
    def length(self) -> int:
        return int(self.h.shape[-1])

    @property
    def outputs(self) -> int:
        return int(self.h.shape[1])

    def planar(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(hr, hi, index): the distinct filters' taps (T or 1, M, U), real and
        imaginary parts, and the filter of each output (D,) (equal bits only)."""
        if self._planar is None:
            rows = np.ascontiguousarray(np.swapaxes(self.h, 0, 1)).reshape(self.outputs, -1)
            keys = rows.view(np.dtype((np.void, rows.dtype.itemsize * rows.shape[1])))[:, 0]
            _, first, index = np.unique(keys, return_index=True, return_inverse=True)
            t = np.swapaxes(self.h[:, first], 1, 2)
            self._planar = (np.ascontiguousarray(t.real), np.ascontiguousarray(t.imag),
                            np.ascontiguousarray(index.reshape(-1), dtype=np.int64))
        return self._planar


def _numpy_bank(h: np.ndarray, s: np.ndarray, size: int) -> np.ndarray:
    t_ = s.shape[0]
    h = np.ascontiguousarray(np.broadcast_to(h, (t_,) + h.shape[1:]), dtype=complex)
    m = h.shape[-1]
    out = np.zeros((t_, size, h.shape[1]), dtype=complex)
    for i in range(m):
        out += h[:, None, :, i] * s[:, m - 1 - i: m - 1 - i + size, None]
    return out


def _check(bank: FilterBank, s: np.ndarray, size: int) -> np.ndarray:
    s = np.asarray(s)
    if s.ndim != 2 or s.shape[1] != size + bank.length - 1 \
            or bank.h.shape[0] not in (1, s.shape[0]):
        raise ValueError(f"need s (T, size + M - 1) = (T, {size + bank.length - 1}) for "
                         f"taps {bank.h.shape}, got {s.shape}")
    return np.ascontiguousarray(s, dtype=complex)


def filter_bank(h, s: np.ndarray, size: int) -> np.ndarray:
    """(T, size, D) outputs of the D filters h (T or 1, D, M), or a :class:`FilterBank`,
    over s (T, size + M - 1)."""
    bank = h if isinstance(h, FilterBank) else FilterBank(h)
    s = _check(bank, s, size)
    if not _kernels.compiled():
        return _numpy_bank(bank.h, s, size)
    out = np.empty((s.shape[0], size, bank.outputs), dtype=complex)
    hr, hi, index = bank.planar()
    _kernels.loops().fir_kernel(hr, hi, index, s, np.zeros((1, 0), dtype=complex),
                                np.zeros(0), 0, out, np.zeros((1, 0), dtype=complex))
    return out


def add_filtered(bank: FilterBank, s: np.ndarray, steer: np.ndarray, gate: np.ndarray,
                 out: np.ndarray, reference: np.ndarray | None = None,
                 accumulate: bool = True) -> None:
    """One source's term of a block of the streams, in place.

    bank: the source's filters (T or 1, D, M), D = N (one per element) or N + 1 (the
    last the reference filter, with ``reference``); s (T, B + M - 1) its white
    sequence; steer (T, N) its steering entries; gate (B,) its amplitude per snapshot.
    With ``part = filter_bank(bank[:N], s, B) * (steer * gate)``: ``out += part``
    (``accumulate``) or ``out[...] = part``, out (T, B, N) complex contiguous; and
    ``reference[...] = filter_bank(bank[N:], s, B)[..., 0] * gate`` (T, B) when given.
    """
    size = out.shape[1]
    s = _check(bank, s, size)
    t_, n = steer.shape
    extra = bank.outputs - n
    if out.shape != (t_, size, n) or out.dtype != np.complex128 or not out.flags.c_contiguous \
            or extra not in (0, 1) or (extra == 1) != (reference is not None) \
            or (accumulate and extra) or gate.shape != (size,) or s.shape[0] != t_:
        raise ValueError(f"add_filtered: need out (T, B, N) complex contiguous, steer (T, N), "
                         f"gate (B,), {n} or {n + 1} filters (the last for a reference, "
                         f"not accumulated); got out {out.dtype} {out.shape}, steer "
                         f"{steer.shape}, gate {gate.shape}, taps {bank.h.shape}")
    if reference is not None and (reference.shape != (t_, size)
                                  or reference.dtype != np.complex128
                                  or not reference.flags.c_contiguous):
        raise ValueError(f"reference must be complex contiguous {(t_, size)}")
    gate = np.ascontiguousarray(gate, dtype=float)
    if not _kernels.compiled():
        part = _numpy_bank(bank.h[:, :n], s, size)
        part *= steer[:, None, :] * gate[None, :, None]
        if accumulate:
            out += part
        else:
            out[...] = part
        if reference is not None:
            reference[...] = _numpy_bank(bank.h[:, n:], s, size)[..., 0] * gate[None, :]
        return
    hr, hi, index = bank.planar()
    ref = reference if reference is not None else np.zeros((1, 0), dtype=complex)
    _kernels.loops().fir_kernel(hr, hi, index, s, np.ascontiguousarray(steer, dtype=complex),
                                gate, 2 if accumulate else 1, out, ref)
