"""The kernel operations, each behind one wrapper that runs compiled (numba) or in
numpy, shared by the streams, the processors and the drawn-covariance path.

The LMS-type recursion (LMS, NLMS) and RLS run one snapshot at a time; in numpy every
snapshot costs several small array operations for all trials, so the Python overhead
per snapshot dominates. The compiled kernels (:mod:`adapt.numerics.loops`) run the same
recursions, trial by trial, as compiled loops; the others add the sources into the
streams (:func:`add_sources`), combine drawn Wishart factors (:func:`wishart_spans`) and
solve small Hermitian systems (:func:`cholesky_solve`). Each kernel runs on one core and
releases the GIL, so the executor's threads run them side by side. They are an optional
extra (``pip install 'adapt[fast]'``). Each wrapper here decides for itself: without
numba, or with the environment variable ``ADAPT_KERNELS=numpy``, it runs its numpy twin
(defined here too), so callers never ask which path runs. Results agree with the numpy
path to rounding (tested to 1e-10 relative): the operations are the same, only the
summation order inside inner products may differ.

``ADAPT_KERNELS``: ``auto`` (default: compiled when numba imports), ``numpy`` (never
compiled), ``numba`` (compiled; an error if numba is missing). numba itself is imported
only when a compiled path first runs (so commands that run no kernel never load it).
Compiled functions are cached on disk (``cache=True``, next to the package's sources),
so the compile cost (several seconds) is paid once per machine and numba version, not
per process; :func:`warm_up` loads or compiles them ahead of time.

The normals, gamma variates and the one-pass noise-plus-sources formation have their
wrappers in :mod:`adapt.streams.normals`, next to their numpy twins; here are only their
compiled entry points (:func:`normals_fill`, :func:`gamma_fill`, :func:`noisy_sources`).

Sources: the LMS-type recursion (Widrow & Hoff 1960; Widrow & Stearns 1985), RLS
(Haykin, *Adaptive Filter Theory*, the exponentially weighted RLS table).
"""
from __future__ import annotations

import importlib
import importlib.util
import os
import threading
import time

import numpy as np

from adapt.numerics import numba_start
from adapt.numerics.tables import (
    ACCEPT,
    DENSITY,
    GAMMA_STEP,
    SCALE,
    SYMMETRISE_EVERY,
    TAIL_START,
)

__all__ = ["mode", "compiled", "loops", "lined", "lms_block", "lms_pass", "normalised_gain",
           "rls_block", "wishart_spans", "cholesky_solve", "add_sources", "quadratic_forms",
           "normals_fill", "noisy_sources", "EnvelopePlan", "envelopes_fill", "ENVELOPE_KINDS", "gamma_fill", "warm_up", "SYMMETRISE_EVERY"]

_CHOICES = ("auto", "numpy", "numba")
#: RLS numpy path: trials are processed in groups of about this many P-matrix entries
#: (cache-sized)
TRIAL_GROUP_VALUES = 1 << 16
_HAVE_NUMBA: bool | None = None
_LOOPS = None                      # adapt.numerics.loops, once imported


def mode() -> str:
    """The kernel choice from ``ADAPT_KERNELS`` (``auto`` when unset); ValueError for an
    unknown value."""
    value = os.environ.get("ADAPT_KERNELS", "auto").strip().lower() or "auto"
    if value not in _CHOICES:
        raise ValueError(f"ADAPT_KERNELS must be one of {', '.join(_CHOICES)}, got {value!r}")
    return value


_FIRST_LOAD = threading.Lock()


def _load():
    """:mod:`adapt.numerics.loops`, imported (with numba) on the first call, or None when
    numba is absent or fails to import (any failure of numba's own import counts as
    absent; a failure in the kernels' module is raised). Remembered; a lock makes
    concurrent first calls wait for the first."""
    global _HAVE_NUMBA, _LOOPS
    if _LOOPS is not None or _HAVE_NUMBA is False:
        return _LOOPS
    with _FIRST_LOAD:
        if _LOOPS is None and _HAVE_NUMBA is not False:
            try:
                _HAVE_NUMBA = importlib.util.find_spec("numba") is not None
                if _HAVE_NUMBA:
                    import numba  # noqa: F401 - the slow import, here and only here
            except Exception:              # noqa: BLE001 - a broken install is an absent one
                _HAVE_NUMBA = False
            if _HAVE_NUMBA:
                numba_start.set_up()
                _LOOPS = importlib.import_module("adapt.numerics.loops")
    return _LOOPS


def compiled() -> bool:
    """True when the compiled kernels will run (numba present and not switched off).
    Imports numba (and the kernels) on the first call that may use them: ask only
    where a compiled path is about to run."""
    m = mode()
    if m == "numpy":
        return False
    if _load() is None:
        if m == "numba":
            raise RuntimeError("ADAPT_KERNELS=numba but numba is not installed "
                               "(pip install 'adapt[fast]')")
        return False
    return True


def loops():
    """The module of compiled kernels, :mod:`adapt.numerics.loops` (see
    :func:`compiled`); RuntimeError when numba is missing."""
    module = _load()
    if module is None:
        raise RuntimeError("the compiled kernels need numba (pip install 'adapt[fast]')")
    return module


def per_snapshot(array: np.ndarray) -> np.ndarray:
    """(T, B, ...) block array -> contiguous (B, T, ...) copy, one snapshot per slice."""
    return np.ascontiguousarray(np.swapaxes(np.asarray(array), 0, 1))


def normalised_gain(x: np.ndarray, step: float, eps: float) -> np.ndarray:
    """NLMS gain ``step / (eps + |x|^2)`` for (B, T, M) vectors -> (B, T)."""
    power = (np.einsum("...m,...m->...", x.real, x.real)
             + np.einsum("...m,...m->...", x.imag, x.imag))
    return step / (eps + power)


def lms_pass(wc: np.ndarray, regressor: np.ndarray, marks: np.ndarray, gain,
             desired: np.ndarray | None = None, direction_conj: np.ndarray | None = None
             ) -> np.ndarray:
    """Run the LMS-type recursion over one block for every trial at once, in numpy.

    wc: (T, M) conjugated weights ``conj(w)``, updated in place (the recursion state);
    regressor: (B, T, M) vectors u(k), output ``y = w^H u``;
    marks: sorted in-block indices after whose update the weight is recorded;
    gain: scalar, (T,) per trial, or (B, T) per snapshot and trial (the step);
    desired: (B, T) desired samples d(k), or None for d = 0 (minimise output power);
    direction_conj: (B, T, M) ``conj(v(k))``, the update direction, or None for
    ``conj(u(k))``.

    Returns the weights w (not conjugated) after each mark, shape (T, len(marks), M).
    Cost per snapshot: about 4 T M complex multiply-adds, no allocation of (T, M) arrays.
    """
    b, t_, m = regressor.shape
    if wc.shape != (t_, m):
        raise ValueError(f"weight state {wc.shape} does not match regressor {(t_, m)}")
    if direction_conj is None:
        direction_conj = np.conj(regressor)
    gain = np.asarray(gain, dtype=float)
    per_step = gain.ndim == 2
    if per_step and gain.shape != (b, t_):
        raise ValueError(f"per-snapshot gain must be {(b, t_)}, got {gain.shape}")
    if gain.ndim == 1 and gain.shape != (t_,):
        raise ValueError(f"per-trial gain must be ({t_},), got {gain.shape}")
    out = np.empty((t_, len(marks), m), dtype=complex)
    tmp = np.empty((t_, m), dtype=complex)
    e = np.empty(t_, dtype=complex)
    mark_list = [int(j) for j in marks]
    nxt = 0
    for j in range(b):
        y = np.einsum("tm,tm->t", wc, regressor[j])
        if desired is None:
            np.negative(y, out=e)
        else:
            np.subtract(desired[j], y, out=e)
        e *= gain[j] if per_step else gain
        np.multiply(direction_conj[j], e[:, None], out=tmp)
        wc += tmp
        while nxt < len(mark_list) and mark_list[nxt] == j:
            np.conjugate(wc, out=out[:, nxt, :])
            nxt += 1
    return out


def lined(xh: np.ndarray, taps: int) -> np.ndarray:
    """Stacked snapshots (T, B, N taps) ``[x_j; x_{j-1}; ...; x_{j-taps+1}]`` from lined
    ones ``xh`` (T, B + taps - 1, N): a block after the taps - 1 snapshots before it."""
    t_, bh, n = xh.shape
    b = bh - taps + 1
    out = np.empty((t_, b, n * taps), dtype=np.result_type(xh, complex))
    for l_ in range(taps):
        out[:, :, l_ * n:(l_ + 1) * n] = xh[:, taps - 1 - l_:taps - 1 - l_ + b]
    return out


def lms_block(wc: np.ndarray, x: np.ndarray, marks, gain=None, desired=None,
              direction_conj=None, step: float = 0.0, eps: float = 0.0,
              taps: int = 1) -> np.ndarray:
    """The LMS-type recursion of :func:`lms_pass` over one block: compiled when the
    kernels are on, else :func:`lms_pass` itself.

    wc: (T, M) complex ``conj(w)``, updated in place; x: (T, B, M) regressors (the block
    layout, no copy); marks: in-block indices after which weights are recorded;
    gain: scalar or (T,) per-trial step, (T, B) per snapshot, or None for the NLMS gain
    ``step / (eps + |x|^2)`` (:func:`normalised_gain`); desired: (T, B) or None (d = 0);
    direction_conj: (T, B, M) ``conj(v)`` or None for ``conj(x)``.
    taps > 1: x is (T, B + taps - 1, N), a block's snapshots after the taps - 1 before
    it, and the regressor of snapshot j the stacked ``[x_j; x_{j-1}; ...]`` (M = N
    taps, the order of :class:`adapt.streams.wideband.TapLine`), read in place by the
    compiled kernel (no direction_conj then); the same numbers as stacking first.
    Returns the weights w after each mark, (T, len(marks), M).
    """
    taps = int(taps)
    if taps > 1:
        if direction_conj is not None or x.ndim != 3 or x.shape[1] < taps:
            raise ValueError("lined regressors need x (T, B + taps - 1, N) and no "
                             "direction_conj")
        if not compiled():
            x = lined(x, taps)
    t_, b, m = x.shape
    if taps > 1 and compiled():
        b, m = b - taps + 1, m * taps
    if wc.shape != (t_, m) or wc.dtype != np.complex128 or not wc.flags.writeable:
        raise ValueError(f"weight state must be a writable complex (T, M) = {(t_, m)} array")
    marks = np.ascontiguousarray(marks, dtype=np.int64)
    if gain is not None and np.ndim(gain) == 2 and np.shape(gain) != (t_, b):
        raise ValueError(f"per-snapshot gain must be {(t_, b)}, got {np.shape(gain)}")
    if not compiled():
        xs = per_snapshot(x)
        if gain is None:
            g = normalised_gain(xs, step, eps)
        else:
            g = np.asarray(gain, dtype=float)
            g = per_snapshot(g) if g.ndim == 2 else g
        return lms_pass(wc, xs, marks, g,
                        desired=None if desired is None else per_snapshot(desired),
                        direction_conj=(None if direction_conj is None
                                        else per_snapshot(direction_conj)))
    out = np.empty((t_, len(marks), m), dtype=complex)
    gain_t = np.zeros(t_)
    gain_tb = np.zeros((t_, 0))
    if gain is None:
        gmode = 2
    else:
        g = np.asarray(gain, dtype=float)
        if g.ndim == 2:
            gmode, gain_tb = 1, np.ascontiguousarray(g)
        else:
            gmode = 0
            gain_t = np.empty(t_)
            gain_t[:] = g          # a fresh writable array: one compiled signature
    d = (np.zeros((t_, 0), dtype=complex) if desired is None
         else np.asarray(desired, dtype=complex))
    if taps > 1:
        loops().lms_lined_kernel(wc, np.ascontiguousarray(x, dtype=complex), taps, d, gmode,
                                 gain_t, gain_tb, float(step), float(eps), marks, out)
        return out
    dirc = (np.zeros((t_, 0, m), dtype=complex) if direction_conj is None
            else np.asarray(direction_conj, dtype=complex))
    loops().lms_kernel(wc, np.asarray(x, dtype=complex), d, gmode, gain_t, gain_tb,
                       float(step), float(eps), dirc, marks, out)
    return out


def rls_block(p: np.ndarray, wc: np.ndarray, x: np.ndarray, d: np.ndarray, lam: float,
              start: int, marks) -> np.ndarray:
    """The exponentially weighted RLS recursion (Haykin's table) over one block:
    compiled when the kernels are on, else in numpy (:func:`rls_pass`).

    p: (T, N, N) inverse-correlation matrices and wc: (T, N) ``conj(w)``, updated in
    place; x: (T, B, N) data; d: (T, B) reference; lam: forgetting factor; start: the
    block's first snapshot (P is re-symmetrised after every :data:`SYMMETRISE_EVERY`
    snapshots counted from the stream start); marks: in-block indices after which the
    weights are recorded. Returns weights (T, len(marks), N)."""
    t_, b, n = x.shape
    if not compiled():
        return rls_pass(p, wc, x, d, lam, start, marks)
    marks = np.ascontiguousarray(marks, dtype=np.int64)
    out = np.empty((t_, len(marks), n), dtype=complex)
    loops().rls_kernel(p, wc, np.asarray(x, dtype=complex), np.asarray(d, dtype=complex),
                       float(lam), int(start), SYMMETRISE_EVERY, marks, out)
    return out


def rls_pass(p: np.ndarray, wc: np.ndarray, x: np.ndarray, d: np.ndarray, lam: float,
             start: int, marks) -> np.ndarray:
    """:func:`rls_block` in numpy: every trial of a cache-sized group in each step, the
    groups one after another (each through the whole block, to keep P in cache)."""
    marks = [int(j) for j in marks]
    xs = per_snapshot(x)                          # (B, T, N)
    ds = per_snapshot(d)                          # (B, T)
    t_, n = wc.shape
    out = np.empty((t_, len(marks), n), dtype=complex)
    group = max(8, TRIAL_GROUP_VALUES // (n * n))
    for lo in range(0, t_, group):
        hi = min(t_, lo + group)
        _rls_group(xs[:, lo:hi], ds[:, lo:hi], p[lo:hi], wc[lo:hi], marks, out[lo:hi],
                   float(lam), int(start))
    return out


def _rls_group(x, d, p, wc, marks, out, lam, start) -> None:
    """The recursion over one block for a group of trials; p, wc, out are views
    updated in place."""
    xc = np.conj(x)
    outer = np.empty_like(p)
    tmp = np.empty_like(wc)
    nxt = 0
    for j in range(x.shape[0]):
        u = x[j]
        pi = np.matmul(p, u[:, :, None])[:, :, 0]                   # P x
        den = lam + np.einsum("tn,tn->t", xc[j], pi).real
        e = d[j] - np.einsum("tn,tn->t", wc, u)                     # a priori error
        # w += g e^*  <=>  conj(w) += conj(g) e, g = pi / den
        np.multiply(np.conj(pi), (e / den)[:, None], out=tmp)
        wc += tmp
        # P <- (P - pi pi^H / den) / lambda, as a Hermitian outer product q q^H
        q = pi * np.sqrt(1.0 / (den * lam))[:, None]
        np.multiply(q[:, :, None], np.conj(q)[:, None, :], out=outer)
        if lam != 1.0:
            p *= 1.0 / lam
        p -= outer
        if (start + j + 1) % SYMMETRISE_EVERY == 0:
            p += np.conj(np.swapaxes(p, 1, 2))
            p *= 0.5
        while nxt < len(marks) and marks[nxt] == j:
            np.conjugate(wc, out=out[:, nxt, :])
            nxt += 1


def wishart_spans(chol: np.ndarray, gam: np.ndarray, z: np.ndarray, rows: np.ndarray,
                  cols: np.ndarray, counts: np.ndarray, cumulative: bool = False,
                  out: np.ndarray | None = None) -> np.ndarray:
    """Span sums ``(L A)(L A)^H`` (T, S, N, N) of :func:`adapt.engine.drawn.span_sums`:
    chol (T, N, N) Cholesky factors (or (1, N, N), shared by all trials),
    gam (T, S, N) the diagonal's gamma
    variates, z (T, E, 2) the below-diagonal normals of all spans in order (``counts[s]``
    of them for span s, at ``rows``/``cols``), A the Bartlett factor of each span
    (diagonal ``sqrt(gam)``, below it ``(z0 + j z1) / sqrt(2)``). Compiled: both
    triangular products skip the zeros, and the sums are exactly Hermitian; in numpy:
    batched matrix products (equal to rounding). ``cumulative``: the running totals over
    the spans instead (entry s holds spans 0..s, added in order as ``np.cumsum`` does).
    ``out``: where to write (every element is written), else a new array."""
    t_, s_, n = gam.shape
    if out is None:
        out = np.empty((t_, s_, n, n), dtype=complex)
    elif out.shape != (t_, s_, n, n) or out.dtype != np.complex128 \
            or not out.flags.c_contiguous:
        raise ValueError(f"out must be contiguous complex {(t_, s_, n, n)}, got "
                         f"{out.dtype} {out.shape}")
    if not compiled():
        a = np.zeros((t_, s_, n, n), dtype=complex)
        spans = np.repeat(np.arange(s_), np.asarray(counts, dtype=np.int64))
        a[:, spans, rows, cols] = (z * np.sqrt(0.5)).view(np.complex128)[..., 0]
        idx = np.arange(n)
        a[..., idx, idx] = np.sqrt(gam)
        g = np.asarray(chol)[:, None] @ a
        sums = g @ np.conj(np.swapaxes(g, -1, -2))
        if cumulative:
            np.cumsum(sums, axis=1, out=out)
        else:
            out[...] = sums
        return out
    loops().wishart_kernel(np.ascontiguousarray(chol, dtype=complex),
                           np.ascontiguousarray(gam), np.ascontiguousarray(z),
                           np.ascontiguousarray(rows, dtype=np.int64),
                           np.ascontiguousarray(cols, dtype=np.int64),
                           np.ascontiguousarray(counts, dtype=np.int64), bool(cumulative),
                           out)
    return out


def cholesky_solve(r: np.ndarray, b: np.ndarray, scale=None, load=None) -> np.ndarray:
    """``R^-1 b`` by Cholesky factorisation for a stack of Hermitian positive-definite
    ``R = r * scale + load I``: r (..., N, N) (lower triangle and real diagonal read, as
    LAPACK's ``zpotrf``), ``scale`` and ``load`` (...) per item (default 1 and 0; folded
    into the factorisation, so no scaled copy of the stack is made, and rounded exactly
    as ``r * scale`` then ``+ load`` on the diagonal), b (..., N, K) or (N, K), one
    right-hand side for every item; compiled: factorisation and both triangular solves
    per item in one loop (no LAPACK call per small matrix); in numpy: the scaled,
    loaded copy through ``np.linalg.cholesky`` and two solves (equal to rounding). Raises
    ``np.linalg.LinAlgError`` if any item is not positive definite, like
    ``np.linalg.cholesky``."""
    r = np.asarray(r)
    b = np.asarray(b)
    shared_b = b.ndim == 2 and r.ndim > 2
    if r.ndim < 2 or r.shape[-1] != r.shape[-2] or b.shape[-2] != r.shape[-1] \
            or (not shared_b and (b.ndim != r.ndim or b.shape[:-1] != r.shape[:-1])):
        raise ValueError(f"need r (..., N, N) and b (..., N, K) with equal stacks, or b "
                         f"(N, K), got {r.shape} and {b.shape}")
    if not compiled():
        stack = r.shape[:-2]
        n = r.shape[-1]
        sc = np.ones(stack) if scale is None else np.broadcast_to(scale, stack)
        ld = np.zeros(stack) if load is None else np.broadcast_to(load, stack)
        rr = r * sc[..., None, None] + ld[..., None, None] * np.eye(n)
        low = np.linalg.cholesky(rr)
        bb = np.broadcast_to(b, stack + b.shape[-2:])
        y = np.linalg.solve(low, bb)
        return np.linalg.solve(np.conj(np.swapaxes(low, -1, -2)), y)
    n, k = r.shape[-1], b.shape[-1]
    stack = r.shape[:-2]
    rf = np.ascontiguousarray(r.reshape((-1, n, n)), dtype=np.complex128)
    bf = np.ascontiguousarray(b.reshape((-1, n, k)), dtype=np.complex128)
    m = len(rf)
    sf = np.ones(m) if scale is None else \
        np.ascontiguousarray(np.broadcast_to(scale, stack), dtype=float).reshape(-1)
    lf = np.zeros(m) if load is None else \
        np.ascontiguousarray(np.broadcast_to(load, stack), dtype=float).reshape(-1)
    x = np.empty((m, n, k), dtype=np.complex128)
    ok = np.empty(m, dtype=np.bool_)
    loops().cholesky_kernel(rf, sf, lf, bf, x, ok)
    if not ok.all():
        raise np.linalg.LinAlgError("Matrix is not positive definite")
    return x.reshape(stack + (n, k))


def add_sources(x: np.ndarray, scale: float, env: np.ndarray, steer: np.ndarray,
                out: np.ndarray | None = None) -> np.ndarray:
    """``x * scale + sum_j env[..., j, None] * steer[:, None, j, :]`` into ``out`` (x
    itself when None, in place; else a (T, B, N) complex array the size of x), returned:
    x (T, B, N) complex, env (T, B, J) the sources' envelopes, steer (T or 1, J, N) their
    steering vectors. Every element is computed the same way whatever B (a batched
    matrix product is not: BLAS rounds differently for different block shapes), so
    streams do not depend on the block size. Compiled when the kernels are on, else
    an element-wise numpy loop over the sources (equal to rounding)."""
    if x.ndim != 3 or env.ndim != 3 or steer.ndim != 3 or env.shape[:2] != x.shape[:2] \
            or steer.shape[1:] != (env.shape[2], x.shape[2]) \
            or steer.shape[0] not in (1, x.shape[0]):
        raise ValueError(f"need x (T, B, N), env (T, B, J), steer (T or 1, J, N); got "
                         f"{x.shape}, {env.shape}, {steer.shape}")
    out = x if out is None else out
    if out.shape != x.shape or out.dtype != np.complex128:
        raise ValueError(f"out must be complex (T, B, N) like x, got {out.dtype} {out.shape}")
    if compiled() and x.dtype == np.complex128 and x.flags.c_contiguous \
            and out.flags.c_contiguous:
        loops().mix_kernel(x, float(scale), np.ascontiguousarray(env, dtype=np.complex128),
                           np.ascontiguousarray(steer, dtype=np.complex128), out)
        return out
    np.multiply(x, scale, out=out)
    for j in range(env.shape[2]):
        out += env[:, :, j, None] * steer[:, None, j, :]
    return out


def quadratic_forms(w: np.ndarray, r: np.ndarray) -> np.ndarray:
    """``Re(w^H R w)`` (A, B) for weights w (A, B, M) and Hermitian matrices r (A or 1,
    B or 1, M, M) (broadcast along an axis of length 1 or stride 0): compiled, each
    form by itself in a fixed order of sums whatever the stack (a stack and its items
    one by one agree exactly); else numpy's element-wise sum (equal to rounding)."""
    w = np.asarray(w)
    r = np.asarray(r)
    if w.ndim != 3 or r.ndim != 4 or r.shape[-2:] != (w.shape[-1],) * 2 \
            or any(r.shape[k] not in (1, w.shape[k]) for k in (0, 1)):
        raise ValueError(f"need w (A, B, M) and r (A or 1, B or 1, M, M), got {w.shape} "
                         f"and {r.shape}")
    if not compiled():
        return np.real(np.einsum("...n,...nm,...m->...", np.conj(w), r, w))
    for k in (0, 1):                       # a broadcast axis: its one matrix
        if r.shape[k] > 1 and r.strides[k] == 0:
            r = r[:1] if k == 0 else r[:, :1]
    out = np.empty(w.shape[:2])
    loops().quadratic_kernel(np.ascontiguousarray(w, dtype=complex),
                             np.ascontiguousarray(r, dtype=complex), out)
    return out


def normals_fill(keys: np.ndarray, start: int, out: np.ndarray) -> np.ndarray:
    """Normals ``start ..`` of each counter-based stream, compiled (the wrapper that
    checks the arguments and falls back to numpy is :func:`adapt.streams.normals.fill`):
    keys (T, 2) uint64, out (T, M) float64. RuntimeError without numba."""
    loops().normals_kernel(keys, int(start), out, ACCEPT, SCALE, DENSITY, TAIL_START)
    return out


def gamma_fill(keys: np.ndarray, shapes: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Gamma variates of :func:`adapt.streams.normals.gamma_fill` (the wrapper, which
    checks the arguments and falls back to numpy), compiled: keys (T, 2) uint64, shapes
    (M,) float64, out (T, M) float64. RuntimeError without numba."""
    loops().gamma_kernel(keys, shapes, out, np.uint64(GAMMA_STEP), ACCEPT, SCALE, DENSITY,
                         TAIL_START)
    return out


def noisy_sources(keys: np.ndarray, start: int, scale: float, env: np.ndarray,
                  steer: np.ndarray, env_d: np.ndarray | None, steer_d: np.ndarray | None,
                  inter: np.ndarray, data: np.ndarray | None) -> None:
    """Compiled, one pass (the wrapper that falls back to numpy is
    :func:`adapt.streams.normals.noisy_sources`): ``inter`` (T, B, N) <- ``scale`` x the
    noise (normals of the counter-based streams ``keys`` (T, 2) for snapshots ``start ..``, element e of
    snapshot k from normals 2(k N + e) and 2(k N + e) + 1) plus the fixed sources
    ``env`` (T, B, J) x ``steer`` (T or 1, J, N); and, when ``env_d`` (T, B) is given,
    ``data`` <- ``inter + env_d x steer_d`` (T or 1, N). Values equal to
    :func:`adapt.streams.normals.fill` followed by :func:`add_sources` (twice), to the last bit
    (the same operations in the same order). RuntimeError without numba."""
    t_, b_, n = inter.shape
    if env_d is None:
        env_d = np.zeros((t_, 0), dtype=complex)
        steer_d = np.zeros((1, n), dtype=complex)
        data = inter
    for name, a in (("inter", inter), ("data", data)):
        if a.shape != (t_, b_, n) or a.dtype != np.complex128 or not a.flags.c_contiguous \
                or not a.flags.writeable:
            raise ValueError(f"{name} must be a writable contiguous complex (T, B, N) array "
                             f"{(t_, b_, n)}, got {a.dtype} {a.shape}")
    if env.ndim != 3 or env.shape[:2] != (t_, b_) or steer.ndim != 3 \
            or steer.shape[0] not in (1, t_) or steer.shape[1:] != (env.shape[2], n) \
            or env_d.ndim != 2 or env_d.shape[0] != t_ or env_d.shape[1] not in (0, b_) \
            or steer_d.ndim != 2 or steer_d.shape[0] not in (1, t_) or steer_d.shape[1] != n \
            or keys.shape != (t_, 2) or keys.dtype != np.uint64:
        raise ValueError(f"noisy_sources: need keys (T, 2) uint64, env (T, B, J), steer "
                         f"(T or 1, J, N), env_d (T, B), steer_d (T or 1, N) for (T, B, N) = "
                         f"{(t_, b_, n)}; got {keys.shape}, {env.shape}, {steer.shape}, "
                         f"{env_d.shape}, {steer_d.shape}")
    loops().noisy_sources_kernel(
        keys, int(start), float(scale), np.ascontiguousarray(env, dtype=complex),
        np.ascontiguousarray(steer, dtype=complex), np.ascontiguousarray(env_d, dtype=complex),
        np.ascontiguousarray(steer_d, dtype=complex), inter, data, ACCEPT, SCALE, DENSITY,
        TAIL_START)


#: waveform kinds the compiled envelope kernel forms, and their codes
ENVELOPE_KINDS = {"gaussian": 0, "bpsk": 1, "qpsk": 2, "tone": 3, "chirp": 4}


class EnvelopePlan:
    """What :func:`envelopes_fill` needs of J sources, checked and laid out once per
    run: ``keys`` (J, T, 2) uint64 (each source's normal streams; zeros for the tone
    and chirp), ``kinds`` (J,) codes of :data:`ENVELOPE_KINDS`, ``params`` (J, 4)
    (tone ``2 pi f``; chirp ``start, (stop - start) / 2, period, 2 pi``), ``phi0``
    (J, T) start phases, ``amps`` (J,) amplitudes, ``gated`` (J,) which sources pulse."""

    def __init__(self, keys, kinds, params, phi0, amps, gated):
        j_ = len(kinds)
        if not all(k in ENVELOPE_KINDS for k in kinds):
            raise ValueError(f"kinds must be among {', '.join(ENVELOPE_KINDS)}, got {kinds}")
        phi0 = np.ascontiguousarray(np.asarray(phi0, dtype=float).T)        # (J, T)
        t_ = phi0.shape[1]
        self.keys = np.zeros((j_, t_, 2), dtype=np.uint64)
        for j, k in enumerate(keys):
            if k is not None:
                if k.shape != (t_, 2) or k.dtype != np.uint64:
                    raise ValueError(f"keys of source {j} must be uint64 ({t_}, 2), got "
                                     f"{k.dtype} {k.shape}")
                self.keys[j] = k
        self.kinds = np.array([ENVELOPE_KINDS[k] for k in kinds], dtype=np.int64)
        self.params = np.zeros((j_, 4))
        for j, p in enumerate(params):
            self.params[j, :len(p)] = p
        self.phi0 = phi0
        self.amps = np.asarray(amps, dtype=float).reshape(j_)
        self.gated = np.asarray(gated, dtype=bool).reshape(j_)
        self.trials = t_


def envelopes_fill(plan: EnvelopePlan, start: int, gates: np.ndarray | None,
                   out: np.ndarray) -> None:
    """Compiled, one pass per source (the numpy twin is
    :meth:`adapt.streams.snapshots.TrialBatch._waveform` and the envelope's scalings):
    ``out[:, :, j]`` (out (T, B, J) complex, C-contiguous) <- the amplitude x the
    unit-power waveform of source j of ``plan`` at snapshots ``start ..``, x its row of
    ``gates`` (J, B) 0/1 when it pulses. The same operations in the same order as numpy,
    so the values are equal to the last bit (tested). RuntimeError without numba."""
    t_, b_, j_ = out.shape
    if out.dtype != np.complex128 or not out.flags.c_contiguous or not out.flags.writeable \
            or j_ != len(plan.kinds) or t_ != plan.trials:
        raise ValueError(f"out must be a writable contiguous complex (T, B, J) array with "
                         f"(T, J) = {(plan.trials, len(plan.kinds))}, got {out.dtype} "
                         f"{out.shape}")
    if gates is None:
        if plan.gated.any():
            raise ValueError("gates are needed: a source pulses")
        gates = np.zeros((j_, 0))
    elif gates.shape != (j_, b_) or gates.dtype != np.float64 or not gates.flags.c_contiguous:
        raise ValueError(f"gates must be contiguous float64 {(j_, b_)}, got "
                         f"{gates.dtype} {gates.shape}")
    loops().envelopes_kernel(plan.keys, int(start), plan.kinds, plan.params, plan.phi0,
                             plan.amps, gates, plan.gated, out, ACCEPT, SCALE, DENSITY,
                             TAIL_START)


def warm_up() -> float:
    """Compile (or load from cache) the kernels for the block layouts the processors
    use; returns the seconds it took (0 when the kernels are off)."""
    if not compiled():
        return 0.0
    t0 = time.perf_counter()
    rng = np.random.default_rng(0)
    x = rng.standard_normal((2, 4, 3)) + 1j * rng.standard_normal((2, 4, 3))
    d = x[:, :, 0].copy()
    marks = np.array([3])
    lms_block(np.zeros((2, 3), complex), x, marks, gain=0.01, desired=d)
    lms_block(np.zeros((2, 3), complex), x, marks, gain=None, desired=d, step=0.1, eps=1e-6)
    lms_block(np.zeros((2, 6), complex), x, np.array([1]), gain=None, desired=d[:, :3],
              step=0.1, eps=1e-6, taps=2)              # lined regressors (tapped LMS-type)
    p = np.broadcast_to(np.eye(3, dtype=complex), (2, 3, 3)).copy()
    rls_block(p, np.zeros((2, 3), complex), x, d, 1.0, 0, marks)
    wishart_spans(p, np.ones((2, 1, 3)), np.zeros((2, 3, 2)), np.array([1, 2, 2]),
                  np.array([0, 0, 1]), np.array([3]))
    cholesky_solve(p, x[:, :3, :1])
    cholesky_solve(p, x[0, :3, :1], scale=np.ones(2), load=np.zeros(2))
    add_sources(x.copy(), 1.0, x[:, :, :2], x[:, :2, :])
    normals_fill(np.ones((2, 2), dtype=np.uint64), 0, np.empty((2, 3)))
    gamma_fill(np.ones((2, 2), dtype=np.uint64), np.array([0.0, 1.0, 5.0]), np.empty((2, 3)))
    noisy_sources(np.ones((2, 2), dtype=np.uint64), 0, 1.0, x[:, :, :2], x[:1, :2, :],
                  x[:, :, 0], x[:1, 0, :], np.empty_like(x), np.empty_like(x))
    quadratic_forms(x[:, :2], p[:, None])
    loops().rank_one_powers_kernel(x[:, 0, :].copy(), x[:1, 0, :].copy(), x[:, :, 0].copy(), x.copy(),
                                   0, 4, np.zeros(2), np.zeros(2))
    plan = EnvelopePlan([np.ones((2, 2), dtype=np.uint64), None], ["qpsk", "tone"],
                        [(), (0.5,)], np.zeros((2, 2)), [1.0, 2.0], [False, True])
    envelopes_fill(plan, 0, np.ones((2, 4)), np.empty((2, 4, 2), complex))
    loops().lag_sums_kernel(x.copy(), 1, 4, np.zeros((2, 2, 3, 3), complex))
    # the wideband sources' filter bank, and the space-time output powers
    from adapt.numerics import fir
    bank = fir.FilterBank(x[:, :2, :3])
    fir.filter_bank(bank, x[:, :, 0], 2)
    fir.add_filtered(bank, x[:, :, 0], x[:, 0, :2], np.ones(2), np.zeros((2, 2, 2), complex))
    loops().tapped_powers_kernel(np.ones((2, 6), complex), x[:, :1, :].copy(), x.copy(),
                                 x[:, :1, :].copy(), x.copy(), 0, 4, np.zeros(2), np.zeros(2))
    return time.perf_counter() - t0
