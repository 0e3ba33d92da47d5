"""Small batched linear-algebra kernels shared by the processors.

All functions work on stacks (..., N, N) without a Python loop over the stack: Cholesky
factorisation is batched by numpy, and the triangular solves loop over the N rows with
every stack item in each step. Inside :func:`compiled_solves` (used by the drawn-
covariance path, :mod:`adapt.engine.drawn`) and with the compiled kernels on
(:mod:`adapt.numerics.kernels`), :func:`cholesky_solve` factorises and solves each
item in one compiled loop instead: the same algorithm, equal to rounding, but rounding
differs by up to about cond(R) x 1e-16 relative, so the sample path keeps the numpy
solves and stays bit-for-bit reproducible across versions.
"""
from __future__ import annotations

import contextvars
from contextlib import contextmanager

import numpy as np

from adapt.numerics import kernels as _kernels

_COMPILED_SOLVES = contextvars.ContextVar("adapt_compiled_solves", default=False)


@contextmanager
def compiled_solves():
    """Within this block :func:`cholesky_solve` (and so :func:`solve_hermitian` and
    :func:`mvdr`) use the compiled batched Cholesky solve when the kernels are on."""
    token = _COMPILED_SOLVES.set(True)
    try:
        yield
    finally:
        _COMPILED_SOLVES.reset(token)

__all__ = ["mvdr", "solve_hermitian", "distortionless", "cholesky_solve", "compiled_solves",
           "compiled_solves_active"]


def compiled_solves_active() -> bool:
    """True inside :func:`compiled_solves` with the compiled kernels on."""
    return _COMPILED_SOLVES.get() and _kernels.compiled()


def _forward(l_: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve L y = b, L lower triangular (..., N, N), b (..., N, M)."""
    n = l_.shape[-1]
    y = np.empty(np.broadcast_shapes(l_.shape[:-2], b.shape[:-2]) + b.shape[-2:],
                 dtype=np.result_type(l_, b))
    for i in range(n):
        acc = b[..., i, :]
        if i:
            acc = acc - np.einsum("...k,...km->...m", l_[..., i, :i], y[..., :i, :])
        y[..., i, :] = acc / l_[..., i, i, None]
    return y


def _backward_conj(l_: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Solve L^H x = y, L lower triangular."""
    n = l_.shape[-1]
    x = np.empty_like(y)
    for i in range(n - 1, -1, -1):
        acc = y[..., i, :]
        if i < n - 1:
            acc = acc - np.einsum("...k,...km->...m", np.conj(l_[..., i + 1:, i]), x[..., i + 1:, :])
        x[..., i, :] = acc / np.conj(l_[..., i, i, None])
    return x


def cholesky_solve(r: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``R x = b`` by Cholesky for Hermitian positive-definite ``R`` (..., N, N);
    ``b`` (..., N, M). Raises ``np.linalg.LinAlgError`` if any item is not PD."""
    if compiled_solves_active():
        r, b = np.asarray(r), np.asarray(b)
        shape = np.broadcast_shapes(r.shape[:-2], b.shape[:-2])
        return _kernels.cholesky_solve(np.broadcast_to(r, shape + r.shape[-2:]),
                                       np.broadcast_to(b, shape + b.shape[-2:]))
    l_ = np.linalg.cholesky(r)
    return _backward_conj(l_, _forward(l_, b))


def solve_hermitian(r: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``R x = b`` for stacked Hermitian ``R`` (..., N, N) and ``b`` (..., N) or
    (..., N, M).

    Cholesky for positive-definite items; items where Cholesky fails (singular or
    indefinite ``R``, e.g. fewer snapshots than elements without loading) get the
    minimum-norm pseudo-inverse solution instead. Each item's result depends only on
    that item, so a stack and its items one by one agree exactly.
    """
    r = np.asarray(r)
    vec = np.ndim(b) == r.ndim - 1
    rhs = np.asarray(b)[..., None] if vec else np.asarray(b)
    shape = np.broadcast_shapes(r.shape[:-2], rhs.shape[:-2])
    r_b = np.broadcast_to(r, shape + r.shape[-2:])
    rhs = np.broadcast_to(rhs, shape + rhs.shape[-2:])
    try:
        x = cholesky_solve(r_b, rhs)
    except np.linalg.LinAlgError:
        flat_r = r_b.reshape((-1,) + r.shape[-2:])
        flat_b = rhs.reshape((-1,) + rhs.shape[-2:])
        x = np.empty(flat_b.shape, dtype=np.result_type(flat_r, flat_b, complex))
        ok = np.ones(len(flat_r), dtype=bool)
        for i in range(len(flat_r)):          # failure path only: find the bad items
            try:
                np.linalg.cholesky(flat_r[i])
            except np.linalg.LinAlgError:
                ok[i] = False
        if ok.any():
            x[ok] = cholesky_solve(flat_r[ok], flat_b[ok])
        if (~ok).any():
            x[~ok] = np.linalg.pinv(flat_r[~ok], hermitian=True) @ flat_b[~ok]
        x = x.reshape(shape + rhs.shape[-2:])
    return x[..., 0] if vec else x


def distortionless(w_unnorm: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Scale ``w`` (..., N) so that ``w^H a = 1``."""
    resp = np.einsum("...n,...n->...", np.conj(w_unnorm), a)
    return w_unnorm / np.conj(resp)[..., None]


def mvdr(r: np.ndarray, a: np.ndarray) -> np.ndarray:
    """MVDR weight ``R^-1 a / (a^H R^-1 a)`` for stacked ``R`` (..., N, N) and steering
    ``a`` (..., N) (broadcast against the stack)."""
    a_b = np.broadcast_to(a, r.shape[:-1])
    return distortionless(solve_hermitian(r, a_b), a_b)
