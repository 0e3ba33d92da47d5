"""The compiled RLS kernel against the textbook recursion, at array sizes that exercise
the vectorised loops (N of 8 and more, and N that are not multiples of the vector width).

Source of the recursion: Haykin, *Adaptive Filter Theory*, the exponentially weighted
RLS algorithm (gain vector, a priori error, Riccati update of P). The reference below is
a plain per-trial complex loop written from that table, independent of the package.
"""
from __future__ import annotations

import importlib.util

import numpy as np
import pytest

from adapt.numerics import kernels as _kernels

HAVE_NUMBA = importlib.util.find_spec("numba") is not None


@pytest.fixture(autouse=True)
def _compiled_kernels(monkeypatch):
    # these tests are of the compiled kernel: rls_block runs its numpy twin otherwise
    monkeypatch.setenv("ADAPT_KERNELS", "numba")


def _textbook(p0, w0c, x, d, lam):
    """Haykin's RLS table, one trial at a time: pi = P x, k = pi / (lam + x^H pi),
    e = d - w^H x, w += k e^*, P = (P - k pi^H) / lam. Returns the weights after every
    snapshot (T, B, N) and the final P."""
    t_, b, n = x.shape
    ws = np.empty((t_, b, n), dtype=complex)
    ps = np.empty_like(p0)
    for t in range(t_):
        p = p0[t].copy()
        w = np.conj(w0c[t])
        for j in range(b):
            u = x[t, j]
            pi = p @ u
            k = pi / (lam + np.vdot(u, pi).real)
            e = d[t, j] - np.vdot(w, u)
            w = w + k * np.conj(e)
            p = (p - np.outer(k, np.conj(pi))) / lam
            ws[t, j] = w
        ps[t] = p
    return ws, ps


def _data(n, t_=3, b=300, seed=11):
    rng = np.random.default_rng(seed)
    mix = rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n))
    x = (rng.standard_normal((t_, b, n)) + 1j * rng.standard_normal((t_, b, n))) @ mix.T
    d = x[:, :, 0] * 0.5 + rng.standard_normal((t_, b)) + 1j * rng.standard_normal((t_, b))
    return x / np.sqrt(2 * n), d


@pytest.mark.parametrize("n", [1, 3, 8, 16, 19])
@pytest.mark.parametrize("lam", [1.0, 0.97])
def test_compiled_rls_follows_the_textbook_recursion(n, lam):
    # Haykin's RLS table; the kernel runs in blocks (97 snapshots, so the every-256
    # re-symmetrisation falls inside a block) and must give the same weights at every
    # snapshot to rounding (1e-10 relative to the weight norm, common practice)
    t_, b, blk = 3, 300, 97
    x, d = _data(n, t_, b)
    delta = 0.3
    p0 = np.broadcast_to(np.eye(n, dtype=complex) / delta, (t_, n, n)).copy()
    w0c = np.full((t_, n), 1.0 / n, dtype=complex)
    if not HAVE_NUMBA:
        with pytest.raises(RuntimeError, match="numba"):
            _kernels.rls_block(p0, w0c, x[:, :blk], d[:, :blk], lam, 0, [0])
        return
    want, p_want = _textbook(p0, w0c, x, d, lam)
    p, wc = p0.copy(), w0c.copy()
    got = []
    for lo in range(0, b, blk):
        hi = min(b, lo + blk)
        got.append(_kernels.rls_block(p, wc, x[:, lo:hi], d[:, lo:hi], lam, lo,
                                      np.arange(hi - lo)))
    got = np.concatenate(got, axis=1)
    scale = np.linalg.norm(want, axis=-1, keepdims=True)
    assert np.max(np.abs(got - want) / scale) < 1e-10
    assert np.max(np.abs(p - p_want)) < 1e-10 * np.max(np.abs(p_want))
    # q q^H keeps the held P exactly Hermitian (the update's two triangles are formed
    # from the same products), and positive definite (an inverse correlation matrix)
    assert np.array_equal(p, np.conj(np.swapaxes(p, 1, 2)))
    assert np.all(np.linalg.eigvalsh(p) > 0)


def test_compiled_rls_leaves_other_trials_alone():
    # trials are independent (each has its own P and w): a batch equals its trials run
    # one by one, bit for bit (the package's reproducibility rule)
    if not HAVE_NUMBA:
        return
    n, t_, b = 16, 4, 60
    x, d = _data(n, t_, b, seed=3)
    p0 = np.broadcast_to(np.eye(n, dtype=complex), (t_, n, n)).copy()
    w0c = np.zeros((t_, n), dtype=complex)
    p, wc = p0.copy(), w0c.copy()
    whole = _kernels.rls_block(p, wc, x, d, 0.99, 0, [9, 59])
    for t in range(t_):
        pt, wt = p0[t:t + 1].copy(), w0c[t:t + 1].copy()
        one = _kernels.rls_block(pt, wt, x[t:t + 1], d[t:t + 1], 0.99, 0, [9, 59])
        assert np.array_equal(one[0], whole[t])
        assert np.array_equal(pt[0], p[t])
