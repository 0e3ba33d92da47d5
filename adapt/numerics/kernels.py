"""Optional compiled kernels (numba), shared by the streams, the processors and the
drawn-covariance path.

The LMS-type recursion (LMS, NLMS) and RLS run one snapshot at a time; in numpy every
snapshot costs several small array operations for all trials, so the Python overhead
per snapshot dominates. These kernels run the same recursions, trial by trial, as
compiled loops; the others add the sources into the streams (:func:`add_sources`),
combine drawn Wishart factors (:func:`wishart_spans`) and solve small Hermitian systems
(:func:`cholesky_solve`). Each kernel runs on one core and releases the GIL, so the
executor's threads run them side by side. They are an optional extra
(``pip install 'adapt[fast]'``); without numba, or with the environment variable
``ADAPT_KERNELS=numpy``, the pure numpy path runs. Results agree with the numpy path to
rounding (tested to 1e-10 relative): the operations are the same, only the summation
order inside inner products may differ.

``ADAPT_KERNELS``: ``auto`` (default: compiled when numba imports), ``numpy`` (never
compiled), ``numba`` (compiled; an error if numba is missing). Compiled functions are
cached on disk (``cache=True``), so the compile cost (a few seconds) is paid once per
machine and numba version, not per run; :func:`warm_up` compiles them ahead of time.

Sources: the recursions are those of :mod:`adapt.processors._recursive` (Widrow & Hoff
1960; Haykin, *Adaptive Filter Theory*) and :mod:`adapt.processors.rls` (Haykin).
"""
from __future__ import annotations

import os
import threading
import time

import numpy as np

__all__ = ["mode", "compiled", "lms_block", "rls_block", "wishart_spans", "cholesky_solve",
           "add_sources", "normals_fill", "noisy_sources", "gamma_fill",
           "warm_up", "SYMMETRISE_EVERY"]

#: P is re-symmetrised after every this many snapshots (as in the numpy RLS path)
SYMMETRISE_EVERY = 256
_CHOICES = ("auto", "numpy", "numba")

try:                                       # pragma: no cover - depends on the machine
    import numba as _numba
except Exception:                          # noqa: BLE001 - any import failure means absent
    _numba = None


def mode() -> str:
    """The kernel choice from ``ADAPT_KERNELS`` (``auto`` when unset); ValueError for an
    unknown value."""
    value = os.environ.get("ADAPT_KERNELS", "auto").strip().lower() or "auto"
    if value not in _CHOICES:
        raise ValueError(f"ADAPT_KERNELS must be one of {', '.join(_CHOICES)}, got {value!r}")
    return value


def compiled() -> bool:
    """True when the compiled kernels will run (numba present and not switched off)."""
    m = mode()
    if m == "numpy":
        return False
    if _numba is None:
        if m == "numba":
            raise RuntimeError("ADAPT_KERNELS=numba but numba is not installed "
                               "(pip install 'adapt[fast]')")
        return False
    return True


_LMS = None
_RLS = None
_WISHART = None
_CHOLESKY = None
_MIX = None
_NORMALS = None
_NOISY = None
_GAMMA = None
_BUILDING = threading.Lock()


def _build():
    """Compile (or load from the on-disk cache) the kernels on first use; safe to call
    from several threads at once (the first defines them, the others wait)."""
    if _MIX is not None:
        return
    with _BUILDING:
        if _MIX is None:
            _define()


def _define():
    global _LMS, _RLS, _WISHART, _CHOLESKY, _MIX, _NORMALS, _NOISY, _GAMMA
    if _numba is None:
        raise RuntimeError("the compiled kernels need numba (pip install 'adapt[fast]')")
    njit = _numba.njit

    @njit(cache=True, nogil=True)
    def lms_kernel(wc, x, d, gain_mode, gain_t, gain_tb, step, eps, dirc, marks, out):
        # wc (T, M) conj(w), updated in place; x (T, B, M); d (T, B), or (T, 0) for d = 0;
        # gain_mode 0: gain_t (T,), 1: gain_tb (T, B), 2: NLMS step / (eps + |x|^2);
        # dirc (T, B, M) conj(v), or (T, 0, M) for conj(x)
        t_, b, m = x.shape
        use_dir = dirc.shape[1] > 0
        use_d = d.shape[1] > 0
        nm = marks.shape[0]
        for t in range(t_):
            nxt = 0
            for j in range(b):
                y = 0j
                for i in range(m):
                    y += wc[t, i] * x[t, j, i]
                e = (d[t, j] - y) if use_d else -y
                if gain_mode == 0:
                    g = gain_t[t]
                elif gain_mode == 1:
                    g = gain_tb[t, j]
                else:
                    pw = 0.0
                    for i in range(m):
                        v = x[t, j, i]
                        pw += v.real * v.real + v.imag * v.imag
                    g = step / (eps + pw)
                e = e * g
                if use_dir:
                    for i in range(m):
                        wc[t, i] += dirc[t, j, i] * e
                else:
                    for i in range(m):
                        wc[t, i] += np.conj(x[t, j, i]) * e
                while nxt < nm and marks[nxt] == j:
                    for i in range(m):
                        out[t, nxt, i] = np.conj(wc[t, i])
                    nxt += 1

    @njit(cache=True, nogil=True)
    def rls_kernel(p, wc, x, d, lam, start, every, marks, out):
        # p (T, N, N) and wc (T, N) updated in place; x (T, B, N); d (T, B).
        # Per trial, P is held as real and imaginary parts, column by column, so that
        # every inner loop runs over contiguous rows of plain floats (vectorised by LLVM);
        # the rank-one update of P and the product P x of the next snapshot are formed in
        # the same pass over P. Each element is computed with the operations, in the order,
        # of the complex form (the same sums over c = 0..N-1), so the results equal those
        # of the plain complex loops; q q^H keeps P exactly Hermitian between the
        # re-symmetrisations (which are then exact no-ops, kept as a guard).
        t_, b, n = x.shape
        nm = marks.shape[0]
        inv_lam = 1.0 / lam
        pr = np.empty((n, n))            # pr[c, r] = Re P[r, c] (column c contiguous)
        pm = np.empty((n, n))            # pm[c, r] = Im P[r, c]
        ar = np.empty(n)                 # P x, then the scaled gain direction q
        ai = np.empty(n)
        br = np.empty(n)                 # P x of the next snapshot, formed during the update
        bi = np.empty(n)
        wr = np.empty(n)
        wi = np.empty(n)
        for t in range(t_):
            for r in range(n):
                for c in range(n):
                    v = p[t, r, c]
                    pr[c, r] = v.real
                    pm[c, r] = v.imag
                v = wc[t, r]
                wr[r] = v.real
                wi[r] = v.imag
            nxt = 0
            ready = False                # ar, ai already hold P x for snapshot j
            for j in range(b):
                if not ready:
                    ar[:] = 0.0
                    ai[:] = 0.0
                    for c in range(n):
                        v = x[t, j, c]
                        u = v.real
                        s = v.imag
                        for r in range(n):
                            ar[r] += pr[c, r] * u - pm[c, r] * s
                            ai[r] += pr[c, r] * s + pm[c, r] * u
                xp = 0.0
                yr = 0.0
                yi = 0.0
                for r in range(n):
                    v = x[t, j, r]
                    xp += v.real * ar[r] + v.imag * ai[r]
                    yr += wr[r] * v.real - wi[r] * v.imag
                    yi += wr[r] * v.imag + wi[r] * v.real
                den = lam + xp
                v = d[t, j]
                er = (v.real - yr) / den
                ei = (v.imag - yi) / den
                scale = np.sqrt(1.0 / (den * lam))
                for r in range(n):
                    wr[r] += ar[r] * er + ai[r] * ei
                    wi[r] += ar[r] * ei - ai[r] * er
                    ar[r] *= scale
                    ai[r] *= scale
                sym = (start + j + 1) % every == 0
                ready = j + 1 < b and not sym
                if ready:
                    br[:] = 0.0
                    bi[:] = 0.0
                    for c in range(n):
                        v = x[t, j + 1, c]
                        u = v.real
                        s = v.imag
                        qr = ar[c]
                        qi = ai[c]
                        for r in range(n):     # (x 1.0 is exact: lambda 1 loses nothing)
                            hr = pr[c, r] * inv_lam - (ar[r] * qr + ai[r] * qi)
                            hi = pm[c, r] * inv_lam - (ai[r] * qr - ar[r] * qi)
                            pr[c, r] = hr
                            pm[c, r] = hi
                            br[r] += hr * u - hi * s
                            bi[r] += hr * s + hi * u
                else:
                    for c in range(n):
                        qr = ar[c]
                        qi = ai[c]
                        for r in range(n):
                            pr[c, r] = pr[c, r] * inv_lam - (ar[r] * qr + ai[r] * qi)
                            pm[c, r] = pm[c, r] * inv_lam - (ai[r] * qr - ar[r] * qi)
                if sym:
                    for c in range(n):
                        for r in range(c, n):
                            hr = (pr[c, r] + pr[r, c]) * 0.5
                            hi = (pm[c, r] - pm[r, c]) * 0.5
                            pr[c, r] = hr
                            pr[r, c] = hr
                            pm[c, r] = hi
                            pm[r, c] = -hi
                while nxt < nm and marks[nxt] == j:
                    for r in range(n):
                        out[t, nxt, r] = complex(wr[r], -wi[r])
                    nxt += 1
                if ready:
                    for r in range(n):
                        ar[r] = br[r]
                        ai[r] = bi[r]
            for r in range(n):
                for c in range(n):
                    p[t, r, c] = complex(pr[c, r], pm[c, r])
                wc[t, r] = complex(wr[r], wi[r])

    @njit(cache=True, nogil=True)
    def wishart_kernel(chol, gam, z, ii, jj, counts, cumulative, out):
        # chol (T or 1, N, N) lower (1: shared by every trial); gam (T, S, N);
        # z (T, E, 2) below-diagonal normals of all
        # spans in order, counts[s] of them for span s at rows ii, columns jj;
        # out (T, S, N, N) <- (L A)(L A)^H with A the Bartlett factor of each span, or
        # with cumulative the running totals out[s] = out[s - 1] + (L A)(L A)^H
        t_, s_, n = gam.shape
        shared = chol.shape[0] == 1
        a = np.zeros((n, n), dtype=np.complex128)
        g = np.zeros((n, n), dtype=np.complex128)
        half = np.sqrt(0.5)
        for t in range(t_):
            tc = 0 if shared else t
            pos = 0
            for s in range(s_):
                a[:, :] = 0j
                for e in range(pos, pos + counts[s]):
                    a[ii[e], jj[e]] = complex(z[t, e, 0] * half, z[t, e, 1] * half)
                pos += counts[s]
                for i in range(n):
                    a[i, i] = np.sqrt(gam[t, s, i])
                for i in range(n):                 # G = L A, both lower triangular
                    for j in range(n):
                        v = 0j
                        for k in range(j, i + 1):
                            v += chol[tc, i, k] * a[k, j]
                        g[i, j] = v
                for i in range(n):                 # G G^H, Hermitian by construction
                    for j in range(i + 1):
                        v = 0j
                        for k in range(j + 1):
                            v += g[i, k] * np.conj(g[j, k])
                        if cumulative and s > 0:
                            v = out[t, s - 1, i, j] + v
                        out[t, s, i, j] = v
                        out[t, s, j, i] = np.conj(v)

    @njit(cache=True, nogil=True)
    def cholesky_kernel(r, scale, load, b, x, ok):
        # R_m = r[m] * scale[m] + load[m] I, r (M, N, N): only the lower triangle and the
        # real diagonal are read (as LAPACK's zpotrf with uplo L); b (M or 1, N, K) (1:
        # the same right-hand side for every item); x (M, N, K) <- R^-1 b; ok[m] False
        # where the factorisation meets a pivot that is not positive (x left unset).
        # Complex arithmetic written out on real and imaginary parts (L in lr, li).
        m_, n, k_ = x.shape
        lr = np.zeros((n, n))
        li = np.zeros((n, n))
        d = np.zeros(n)
        yr = np.zeros(n)
        yi = np.zeros(n)
        for m in range(m_):
            good = True
            sc = scale[m]
            mb = 0 if b.shape[0] == 1 else m
            for j in range(n):
                s = r[m, j, j].real * sc + load[m]
                for k in range(j):
                    s -= lr[j, k] * lr[j, k] + li[j, k] * li[j, k]
                if not s > 0.0:              # also catches NaN
                    good = False
                    break
                dj = np.sqrt(s)
                lr[j, j] = dj
                li[j, j] = 0.0
                d[j] = 1.0 / dj
                for i in range(j + 1, n):
                    vr = r[m, i, j].real * sc
                    vi = r[m, i, j].imag * sc
                    for k in range(j):       # L_ij = (R_ij - sum_k L_ik conj(L_jk)) / L_jj
                        vr -= lr[i, k] * lr[j, k] + li[i, k] * li[j, k]
                        vi -= li[i, k] * lr[j, k] - lr[i, k] * li[j, k]
                    lr[i, j] = vr * d[j]
                    li[i, j] = vi * d[j]
            ok[m] = good
            if not good:
                continue
            for c in range(k_):
                for i in range(n):           # L y = b
                    vr = b[mb, i, c].real
                    vi = b[mb, i, c].imag
                    for k in range(i):
                        vr -= lr[i, k] * yr[k] - li[i, k] * yi[k]
                        vi -= lr[i, k] * yi[k] + li[i, k] * yr[k]
                    yr[i] = vr * d[i]
                    yi[i] = vi * d[i]
                for i in range(n - 1, -1, -1):   # L^H x = y
                    vr = yr[i]
                    vi = yi[i]
                    for k in range(i + 1, n):
                        vr -= lr[k, i] * yr[k] + li[k, i] * yi[k]
                        vi -= lr[k, i] * yi[k] - li[k, i] * yr[k]
                    yr[i] = vr * d[i]
                    yi[i] = vi * d[i]
                    x[m, i, c] = complex(yr[i], yi[i])

    @njit(cache=True, nogil=True)
    def mix_kernel(x, scale, env, steer, out):
        # out (T, B, N) <- x * scale + sum_j env[:, :, j] steer[:, j, :], sources added
        # in order j = 0, 1, ...; steer (T or 1, J, N) (1: shared by every trial); out
        # may be x itself
        t_, b_, n = x.shape
        j_ = env.shape[2]
        shared = steer.shape[0] == 1
        for t in range(t_):
            ts = 0 if shared else t
            for b in range(b_):
                for i in range(n):
                    out[t, b, i] = x[t, b, i] * scale
                for j in range(j_):
                    e = env[t, b, j]
                    for i in range(n):
                        out[t, b, i] = out[t, b, i] + e * steer[ts, j, i]

    @njit(cache=True, nogil=True, inline="always")
    def mix64(z):
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))

    @njit(cache=True, nogil=True, inline="always")
    def unit(u):
        return float((u >> np.uint64(11)) + np.uint64(1)) * (1.0 / 9007199254740992.0)

    @njit(cache=True, nogil=True)
    def resolve(u, accept, scale, density, r):
        # the ziggurat's slow path for a word u rejected by its first test; further
        # words mix64(u + m golden), m = 1, 2, ... (see adapt.streams.normals)
        golden = np.uint64(0x9E3779B97F4A7C15)
        m = np.uint64(1)
        cur = u
        first = True
        while True:
            idx = np.intp(cur & np.uint64(255))
            rabs = (cur >> np.uint64(9)) & np.uint64(0xFFFFFFFFFFFFF)
            x = float(rabs) * scale[idx]
            neg = ((cur >> np.uint64(8)) & np.uint64(1)) == np.uint64(1)
            if neg:
                x = -x
            if not first and rabs < accept[idx]:
                return x
            first = False
            if idx == 0:
                while True:
                    xx = -np.log(unit(mix64(u + m * golden))) / r
                    yy = -np.log(unit(mix64(u + (m + np.uint64(1)) * golden)))
                    m += np.uint64(2)
                    if yy + yy > xx * xx:
                        return -(r + xx) if neg else r + xx
            y = density[idx] + unit(mix64(u + m * golden)) * (density[idx + 1] - density[idx])
            m += np.uint64(1)
            if y < np.exp(-0.5 * x * x):
                return x
            cur = mix64(u + m * golden)
            m += np.uint64(1)

    @njit(cache=True, nogil=True, inline="always")
    def first_try(u, accept, table):
        # the ziggurat's first test for one word: the normal, or NaN when rejected
        # (the caller then runs resolve)
        idx = np.intp(u & np.uint64(255))
        rabs = (u >> np.uint64(9)) & np.uint64(0xFFFFFFFFFFFFF)
        if rabs < accept[idx]:
            x = float(rabs) * table[idx]
            return -x if (u >> np.uint64(8)) & np.uint64(1) else x
        return np.nan

    @njit(cache=True, nogil=True)
    def normals_kernel(keys, start, out, accept, scale, density, r):
        # out[t, i] <- normal (start + i) of stream t (adapt.streams.normals)
        t_, m_ = out.shape
        for t in range(t_):
            seed = keys[t, 0]
            gamma = keys[t, 1]
            s = seed + np.uint64(start + 1) * gamma
            for i in range(m_):
                u = mix64(s)
                s += gamma
                x = first_try(u, accept, scale)
                out[t, i] = x if x == x else resolve(u, accept, scale, density, r)

    @njit(cache=True, nogil=True)
    def noisy_sources_kernel(keys, start, scale, env, steer, env_d, steer_d, inter, data,
                             accept, table, density, r):
        # inter[t, b] <- scale * (noise normals 2(k n + e), 2(k n + e) + 1 of stream t,
        # k = start + b) + sum_j env[t, b, j] steer[., j]; data[t, b] <- inter[t, b] +
        # env_d[t, b] steer_d[.] (when env_d has a column). The arithmetic of
        # normals_kernel then mix_kernel twice, operation for operation, in planar
        # registers (vectorisable), one pass over the block.
        t_, b_, n = inter.shape
        j_ = env.shape[2]
        with_d = env_d.shape[1] > 0
        zs = np.empty(2 * n)
        ar = np.empty(n)
        ai = np.empty(n)
        sr = np.empty((j_, n))
        si = np.empty((j_, n))
        dr = np.empty(n)
        di = np.empty(n)
        for t in range(t_):
            ts = 0 if steer.shape[0] == 1 else t
            for j in range(j_):
                for i in range(n):
                    sr[j, i] = steer[ts, j, i].real
                    si[j, i] = steer[ts, j, i].imag
            if with_d:
                td = 0 if steer_d.shape[0] == 1 else t
                for i in range(n):
                    dr[i] = steer_d[td, i].real
                    di[i] = steer_d[td, i].imag
            gamma = keys[t, 1]
            s = keys[t, 0] + np.uint64(start * 2 * n + 1) * gamma
            for b in range(b_):
                for q in range(2 * n):
                    u = mix64(s)
                    s += gamma
                    x = first_try(u, accept, table)
                    zs[q] = x if x == x else resolve(u, accept, table, density, r)
                for i in range(n):
                    ar[i] = zs[2 * i] * scale
                    ai[i] = zs[2 * i + 1] * scale
                for j in range(j_):
                    er = env[t, b, j].real
                    ei = env[t, b, j].imag
                    for i in range(n):
                        ar[i] = ar[i] + (er * sr[j, i] - ei * si[j, i])
                        ai[i] = ai[i] + (er * si[j, i] + ei * sr[j, i])
                for i in range(n):
                    inter[t, b, i] = complex(ar[i], ai[i])
                if with_d:
                    er = env_d[t, b].real
                    ei = env_d[t, b].imag
                    for i in range(n):
                        data[t, b, i] = complex(ar[i] + (er * dr[i] - ei * di[i]),
                                                ai[i] + (er * di[i] + ei * dr[i]))

    @njit(cache=True, nogil=True)
    def gamma_kernel(keys, shapes, out, step, accept, table, density, r):
        # Marsaglia-Tsang gamma variates from counter-based words (adapt.streams.normals)
        t_, m_ = out.shape
        for t in range(t_):
            seed = keys[t, 0]
            gamma = keys[t, 1]
            for m in range(m_):
                a = shapes[m]
                if a == 0.0:
                    out[t, m] = 0.0
                    continue
                w = mix64(seed + np.uint64(m + 1) * gamma)
                d = a - 1.0 / 3.0
                c = 1.0 / np.sqrt(9.0 * d)
                attempt = np.uint64(0)
                while True:
                    un = mix64(w + (np.uint64(2) * attempt + np.uint64(1)) * step)
                    uu = mix64(w + (np.uint64(2) * attempt + np.uint64(2)) * step)
                    attempt += np.uint64(1)
                    x = first_try(un, accept, table)
                    if x != x:
                        x = resolve(un, accept, table, density, r)
                    v = 1.0 + c * x
                    if v <= 0.0:
                        continue
                    v = v * v * v
                    u = unit(uu)
                    sq = x * x
                    if u < 1.0 - 0.0331 * sq * sq or \
                            np.log(u) < 0.5 * sq + d * (1.0 - v + np.log(v)):
                        out[t, m] = d * v
                        break

    _LMS, _RLS, _WISHART = lms_kernel, rls_kernel, wishart_kernel
    _CHOLESKY, _NORMALS, _NOISY = cholesky_kernel, normals_kernel, noisy_sources_kernel
    _GAMMA = gamma_kernel
    _MIX = mix_kernel                   # last: _build() reads it as "all defined"


def lms_block(wc: np.ndarray, x: np.ndarray, marks, gain=None, desired=None,
              direction_conj=None, step: float = 0.0, eps: float = 0.0) -> np.ndarray:
    """The LMS-type recursion of :func:`adapt.processors._recursive.lms_pass`, compiled.

    wc: (T, M) complex ``conj(w)``, updated in place; x: (T, B, M) regressors (the block
    layout, no copy); marks: in-block indices after which weights are recorded;
    gain: scalar or (T,) per-trial step, (T, B) per snapshot, or None for the NLMS gain
    ``step / (eps + |x|^2)`` computed in the kernel; desired: (T, B) or None (d = 0);
    direction_conj: (T, B, M) ``conj(v)`` or None for ``conj(x)``.
    Returns the weights w after each mark, (T, len(marks), M).
    """
    t_, b, m = x.shape
    if wc.shape != (t_, m) or wc.dtype != np.complex128 or not wc.flags.writeable:
        raise ValueError(f"weight state must be a writable complex (T, M) = {(t_, m)} array")
    marks = np.ascontiguousarray(marks, dtype=np.int64)
    out = np.empty((t_, len(marks), m), dtype=complex)
    gain_t = np.zeros(t_)
    gain_tb = np.zeros((t_, 0))
    if gain is None:
        gmode = 2
    else:
        g = np.asarray(gain, dtype=float)
        if g.ndim == 2:
            if g.shape != (t_, b):
                raise ValueError(f"per-snapshot gain must be {(t_, b)}, got {g.shape}")
            gmode, gain_tb = 1, np.ascontiguousarray(g)
        else:
            gmode = 0
            gain_t = np.empty(t_)
            gain_t[:] = g          # a fresh writable array: one compiled signature
    d = (np.zeros((t_, 0), dtype=complex) if desired is None
         else np.asarray(desired, dtype=complex))
    dirc = (np.zeros((t_, 0, m), dtype=complex) if direction_conj is None
            else np.asarray(direction_conj, dtype=complex))
    _build()
    _LMS(wc, np.asarray(x, dtype=complex), d, gmode, gain_t, gain_tb, float(step),
         float(eps), dirc, marks, out)
    return out


def rls_block(p: np.ndarray, wc: np.ndarray, x: np.ndarray, d: np.ndarray, lam: float,
              start: int, marks) -> np.ndarray:
    """The RLS recursion of :mod:`adapt.processors.rls` over one block, compiled.

    p: (T, N, N) inverse-correlation matrices and wc: (T, N) ``conj(w)``, updated in
    place; x: (T, B, N) data; d: (T, B) reference; lam: forgetting factor; start: the
    block's first snapshot (P is re-symmetrised after every :data:`SYMMETRISE_EVERY`
    snapshots counted from the stream start). Returns weights (T, len(marks), N)."""
    _build()
    t_, b, n = x.shape
    marks = np.ascontiguousarray(marks, dtype=np.int64)
    out = np.empty((t_, len(marks), n), dtype=complex)
    _RLS(p, wc, np.asarray(x, dtype=complex), np.asarray(d, dtype=complex), float(lam),
         int(start), SYMMETRISE_EVERY, marks, out)
    return out


def wishart_spans(chol: np.ndarray, gam: np.ndarray, z: np.ndarray, rows: np.ndarray,
                  cols: np.ndarray, counts: np.ndarray, cumulative: bool = False,
                  out: np.ndarray | None = None) -> np.ndarray:
    """Span sums ``(L A)(L A)^H`` (T, S, N, N) of :func:`adapt.engine.drawn.span_sums`,
    compiled: chol (T, N, N) Cholesky factors (or (1, N, N), shared by all trials),
    gam (T, S, N) the diagonal's gamma
    variates, z (T, E, 2) the below-diagonal normals of all spans in order (``counts[s]``
    of them for span s, at ``rows``/``cols``). Both triangular products skip the zeros.
    ``cumulative``: the running totals over the spans instead (entry s holds spans
    0..s, added in order as ``np.cumsum`` does); exactly Hermitian either way. ``out``:
    where to write (every element is written), else a new array."""
    _build()
    t_, s_, n = gam.shape
    if out is None:
        out = np.empty((t_, s_, n, n), dtype=complex)
    elif out.shape != (t_, s_, n, n) or out.dtype != np.complex128 \
            or not out.flags.c_contiguous:
        raise ValueError(f"out must be contiguous complex {(t_, s_, n, n)}, got "
                         f"{out.dtype} {out.shape}")
    _WISHART(np.ascontiguousarray(chol, dtype=complex), np.ascontiguousarray(gam),
             np.ascontiguousarray(z), np.ascontiguousarray(rows, dtype=np.int64),
             np.ascontiguousarray(cols, dtype=np.int64),
             np.ascontiguousarray(counts, dtype=np.int64), bool(cumulative), out)
    return out


def cholesky_solve(r: np.ndarray, b: np.ndarray, scale=None, load=None) -> np.ndarray:
    """``R^-1 b`` by Cholesky factorisation for a stack of Hermitian positive-definite
    ``R = r * scale + load I``: r (..., N, N) (lower triangle and real diagonal read, as
    LAPACK's ``zpotrf``), ``scale`` and ``load`` (...) per item (default 1 and 0; folded
    into the factorisation, so no scaled copy of the stack is made, and rounded exactly
    as ``r * scale`` then ``+ load`` on the diagonal), b (..., N, K) or (N, K), one
    right-hand side for every item; compiled: factorisation and both triangular solves
    per item in one loop (no LAPACK call per small matrix). Raises
    ``np.linalg.LinAlgError`` if any item is not positive definite, like
    ``np.linalg.cholesky``."""
    r = np.asarray(r)
    b = np.asarray(b)
    shared_b = b.ndim == 2 and r.ndim > 2
    if r.ndim < 2 or r.shape[-1] != r.shape[-2] or b.shape[-2] != r.shape[-1] \
            or (not shared_b and (b.ndim != r.ndim or b.shape[:-1] != r.shape[:-1])):
        raise ValueError(f"need r (..., N, N) and b (..., N, K) with equal stacks, or b "
                         f"(N, K), got {r.shape} and {b.shape}")
    _build()
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
    _CHOLESKY(rf, sf, lf, bf, x, ok)
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
        _build()
        _MIX(x, float(scale), np.ascontiguousarray(env, dtype=np.complex128),
             np.ascontiguousarray(steer, dtype=np.complex128), out)
        return out
    np.multiply(x, scale, out=out)
    for j in range(env.shape[2]):
        out += env[:, :, j, None] * steer[:, None, j, :]
    return out


def normals_fill(keys: np.ndarray, start: int, out: np.ndarray) -> np.ndarray:
    """Normals ``start ..`` of each counter-based stream (:func:`adapt.streams.normals.fill`,
    which checks the arguments), compiled: keys (T, 2) uint64, out (T, M) float64."""
    from adapt.streams.normals import ACCEPT, DENSITY, SCALE, TAIL_START
    _build()
    _NORMALS(keys, int(start), out, ACCEPT, SCALE, DENSITY, TAIL_START)
    return out


def gamma_fill(keys: np.ndarray, shapes: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Gamma variates of :func:`adapt.streams.normals.gamma_fill` (which checks the arguments),
    compiled: keys (T, 2) uint64, shapes (M,) float64, out (T, M) float64."""
    from adapt.streams.normals import ACCEPT, DENSITY, GAMMA_STEP, SCALE, TAIL_START
    _build()
    _GAMMA(keys, shapes, out, np.uint64(GAMMA_STEP), ACCEPT, SCALE, DENSITY, TAIL_START)
    return out


def noisy_sources(keys: np.ndarray, start: int, scale: float, env: np.ndarray,
                  steer: np.ndarray, env_d: np.ndarray | None, steer_d: np.ndarray | None,
                  inter: np.ndarray, data: np.ndarray | None) -> None:
    """Compiled, one pass: ``inter`` (T, B, N) <- ``scale`` x the noise (normals of the
    counter-based streams ``keys`` (T, 2) for snapshots ``start ..``, element e of
    snapshot k from normals 2(k N + e) and 2(k N + e) + 1) plus the fixed sources
    ``env`` (T, B, J) x ``steer`` (T or 1, J, N); and, when ``env_d`` (T, B) is given,
    ``data`` <- ``inter + env_d x steer_d`` (T or 1, N). Values equal to
    :func:`adapt.streams.normals.fill` followed by :func:`add_sources` (twice), to the last bit
    (the same operations in the same order)."""
    from adapt.streams.normals import ACCEPT, DENSITY, SCALE, TAIL_START
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
    _build()
    _NOISY(keys, int(start), float(scale), np.ascontiguousarray(env, dtype=complex),
           np.ascontiguousarray(steer, dtype=complex), np.ascontiguousarray(env_d, dtype=complex),
           np.ascontiguousarray(steer_d, dtype=complex), inter, data, ACCEPT, SCALE, DENSITY,
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
    return time.perf_counter() - t0
