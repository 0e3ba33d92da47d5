"""The compiled loops (numba) behind :mod:`adapt.numerics.kernels`.

Importing this module imports numba; :mod:`adapt.numerics.kernels` imports it only
when a compiled path runs. Every kernel is a plain top-level function compiled with
``cache=True``: numba keys its on-disk cache on the function's bytecode and, for a
closure, on the pickled contents of its cells. Dispatchers pickle with a per-process
identity, so kernels defined inside a function and calling each other through closure
cells never found their cache entry in a new process (seen with ``NUMBA_DEBUG_CACHE=1``:
"index loaded", no matching entry, "data saved" on every run). Top-level functions
that call each other as module globals have no cells and load from the cache.

Sources: the recursions are those of :func:`adapt.numerics.kernels.lms_pass` (Widrow &
Hoff 1960) and :func:`adapt.numerics.kernels.rls_pass` (Haykin, *Adaptive Filter
Theory*); the counter-based normals and gamma variates those of
:mod:`adapt.streams.normals` (SplitMix64, Steele, Lea & Flood 2014; ziggurat and gamma
method of Marsaglia & Tsang 2000).
"""
from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

__all__ = ["lms_kernel", "lms_lined_kernel", "rls_kernel", "wishart_kernel", "cholesky_kernel", "mix_kernel",
           "normals_kernel", "noisy_sources_kernel", "envelope_column", "envelopes_kernel", "gamma_kernel", "fir_kernel",
           "tapped_powers_kernel", "rank_one_powers_kernel", "quadratic_kernel", "lag_sums_kernel", "KERNELS"]


@intrinsic
def fused_multiply_add(typingctx, a, b, c):
    """``a * b + c`` rounded once (LLVM's ``llvm.fma.f64``: the hardware instruction
    where there is one, else the correctly rounded library function)."""
    sig = types.float64(types.float64, types.float64, types.float64)

    def codegen(context, builder, signature, args):
        d = ir.DoubleType()
        fn = builder.module.declare_intrinsic("llvm.fma", [d], ir.FunctionType(d, [d, d, d]))
        return builder.call(fn, args)

    return sig, codegen


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
            # the output and (NLMS) the regressor's power in one loop: two independent
            # sums, each in its own order, so their additions overlap
            y = 0j
            pw = 0.0
            if gain_mode == 2:
                for i in range(m):
                    v = x[t, j, i]
                    y += wc[t, i] * v
                    pw += v.real * v.real + v.imag * v.imag
            else:
                for i in range(m):
                    y += wc[t, i] * x[t, j, i]
            e = (d[t, j] - y) if use_d else -y
            if gain_mode == 0:
                g = gain_t[t]
            elif gain_mode == 1:
                g = gain_tb[t, j]
            else:
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
def lms_lined_kernel(wc, xh, taps, d, gain_mode, gain_t, gain_tb, step, eps, marks, out):
    # lms_kernel on stacked regressors read in place: xh (T, B + taps - 1, N) holds a
    # block's snapshots after the taps - 1 before it, and the regressor of snapshot j
    # is u = [x_j; x_{j-1}; ...; x_{j-taps+1}] (entry l N + e = xh[t, j + taps - 1 - l,
    # e]); the operations and their order are lms_kernel's on u (no update direction)
    t_, bh, n = xh.shape
    b = bh - taps + 1
    use_d = d.shape[1] > 0
    nm = marks.shape[0]
    for t in range(t_):
        nxt = 0
        for j in range(b):
            y = 0j
            pw = 0.0                       # (the two sums in one loop, as lms_kernel)
            for l_ in range(taps):
                r = j + taps - 1 - l_
                if gain_mode == 2:
                    for e in range(n):
                        v = xh[t, r, e]
                        y += wc[t, l_ * n + e] * v
                        pw += v.real * v.real + v.imag * v.imag
                else:
                    for e in range(n):
                        y += wc[t, l_ * n + e] * xh[t, r, e]
            e_ = (d[t, j] - y) if use_d else -y
            if gain_mode == 0:
                g = gain_t[t]
            elif gain_mode == 1:
                g = gain_tb[t, j]
            else:
                g = step / (eps + pw)
            e_ = e_ * g
            for l_ in range(taps):
                r = j + taps - 1 - l_
                for e in range(n):
                    wc[t, l_ * n + e] += np.conj(xh[t, r, e]) * e_
            while nxt < nm and marks[nxt] == j:
                for i in range(n * taps):
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


@njit(cache=True, nogil=True, inline="always")
def times_real(xr, xi, g):
    # (xr + i xi) (g + 0i) as numpy multiplies a complex array by a real one cast to
    # complex: both products of the full complex rule, zero signs included
    return xr * g - xi * 0.0, xr * 0.0 + xi * g


@njit(cache=True, nogil=True)
def envelope_column(keys, start, kind, params, phi0, amp, gate, out, col, accept, table,
                    density, r):
    # out[t, b, col] <- amp x the unit-power waveform of one source at snapshot
    # start + b of trial t (x gate[b] when gate has entries), operation for operation
    # as adapt.streams.snapshots.TrialBatch._waveform then the envelope's scalings do
    # in numpy. kind: 0 gaussian (normals 2k, 2k + 1), 1 bpsk (sign of normal k),
    # 2 qpsk (signs of normals 2k, 2k + 1), 3 tone (params: 2 pi f), 4 chirp (params:
    # start, (stop - start) / 2, period, 2 pi; the period a whole number, so the
    # position in it, k mod period, is counted exactly instead of divided out)
    t_, b_ = out.shape[0], out.shape[1]
    gated = gate.shape[0] > 0
    half = np.sqrt(0.5)
    rails = 1 if kind == 1 else 2
    for t in range(t_):
        if kind <= 2:
            gamma = keys[t, 1]
            s = keys[t, 0] + np.uint64(start * rails + 1) * gamma
            for b in range(b_):
                u = mix64(s)
                s += gamma
                x = first_try(u, accept, table)
                z0 = x if x == x else resolve(u, accept, table, density, r)
                if kind == 1:
                    xr = 1.0 if z0 >= 0 else -1.0
                    xi = 0.0
                else:
                    u = mix64(s)
                    s += gamma
                    x = first_try(u, accept, table)
                    z1 = x if x == x else resolve(u, accept, table, density, r)
                    if kind == 2:
                        s0 = 1.0 if z0 >= 0 else -1.0
                        s1 = 1.0 if z1 >= 0 else -1.0
                        # s0 + 1j * s1: (0 + 1i)(s1 + 0i), then s0 + 0i added
                        z0 = s0 + (0.0 * s1 - 1.0 * 0.0)
                        z1 = 0.0 + (0.0 * 0.0 + 1.0 * s1)
                    xr, xi = times_real(z0, z1, half)
                xr, xi = times_real(xr, xi, amp)
                if gated:
                    xr, xi = times_real(xr, xi, gate[b])
                out[t, b, col] = complex(xr, xi)
        elif kind == 3:
            # (the normals are written out above: the same lines in a helper, inlined,
            # or called with the tone and chirp loops merged, ran the random kinds at
            # 95-103 ns a snapshot against 6, measured; tones and chirps keep loops of
            # their own)
            for b in range(b_):
                th = params[0] * float(start + b) + phi0[t]
                xr, xi = times_real(np.cos(th), np.sin(th), amp)
                if gated:
                    xr, xi = times_real(xr, xi, gate[b])
                out[t, b, col] = complex(xr, xi)
        else:
            period = np.int64(params[2])
            m_int = start % period
            for b in range(b_):
                m = float(m_int)
                cyc = params[0] * m + params[1] * m * m / params[2]
                th = params[3] * cyc + phi0[t]
                xr, xi = times_real(np.cos(th), np.sin(th), amp)
                if gated:
                    xr, xi = times_real(xr, xi, gate[b])
                out[t, b, col] = complex(xr, xi)
                m_int += 1
                if m_int == period:
                    m_int = 0


@njit(cache=True, nogil=True)
def envelopes_kernel(keys, start, kinds, params, phi0, amps, gates, gated, out, accept, table,
                     density, r):
    # envelope_column for sources j = 0 .. J - 1 into out[:, :, j]: keys (J, T, 2),
    # kinds (J,), params (J, 4), phi0 (J, T), amps (J,), gates (J, B) (row j used
    # when gated[j]), out (T, B, J); one call per block for all of them
    for j in range(kinds.shape[0]):
        gate = gates[j] if gated[j] else gates[j, :0]
        envelope_column(keys[j], start, kinds[j], params[j], phi0[j], amps[j], gate, out, j,
                        accept, table, density, r)


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


@njit(cache=True, nogil=True)
def fir_kernel(hr, hi, index, s, steer, gate, mode, out, ref):
    # The filter bank of adapt.numerics.fir: acc[t, b, u] = sum_{i=0..M-1} h[t, u, i]
    # s[t, b + M - 1 - i], i increasing, each product and sum the plain complex
    # arithmetic (re = hr sr - hi si, im = hr si + hi sr), for the U distinct filters,
    # taps held planar and transposed, hr, hi (T or 1, M, U) (1: shared by every
    # trial), s (T, B + M - 1); output d reads filter index[d] (D outputs; equal filters
    # are summed once, the same numbers). The U sums of one output snapshot run side
    # by side (vectorised over u); each is the same sequence of roundings as the
    # one-at-a-time loop.
    # mode 0: out (T, B, D) <- acc.
    # mode 1 and 2, the streams' source terms (adapt.numerics.fir.add_filtered): the
    # factor f = steer[t, d] * gate[b] (steer (T, N) complex, gate (B,) float, as numpy
    # multiplies a complex by a real: (sr g - si 0, sr 0 + si g)), the term p = acc * f
    # as numpy's contiguous complex multiply rounds it (re = fma(ar, fr, -(ai fi)),
    # im = fma(ar, fi, ai fr)); mode 1: out[t, b, d] <- p for d < N and, when D = N + 1,
    # ref[t, b] <- acc[t, b, index[N]] * gate[b] (complex times real); mode 2:
    # out[t, b, d] += p (N = D).
    t_, b_ = out.shape[0], out.shape[1]
    m = hr.shape[1]
    u_ = hr.shape[2]
    d_ = index.shape[0]
    n = steer.shape[1]
    shared = hr.shape[0] == 1
    ar = np.empty(u_)
    ai = np.empty(u_)
    for t in range(t_):
        th = 0 if shared else t
        for b in range(b_):
            for u in range(u_):
                ar[u] = 0.0
                ai[u] = 0.0
            for i in range(m):
                v = s[t, b + m - 1 - i]
                sr = v.real
                si = v.imag
                for u in range(u_):
                    pr = hr[th, i, u]
                    pi = hi[th, i, u]
                    ar[u] = ar[u] + (pr * sr - pi * si)
                    ai[u] = ai[u] + (pr * si + pi * sr)
            if mode == 0:
                for d in range(d_):
                    out[t, b, d] = complex(ar[index[d]], ai[index[d]])
                continue
            g = gate[b]
            for d in range(n):
                c = steer[t, d]
                fr = c.real * g - c.imag * 0.0
                fi = c.real * 0.0 + c.imag * g
                xr = ar[index[d]]
                xi = ai[index[d]]
                qr = fused_multiply_add(xr, fr, -(xi * fi))
                qi = fused_multiply_add(xr, fi, xi * fr)
                if mode == 1:
                    out[t, b, d] = complex(qr, qi)
                else:
                    o = out[t, b, d]
                    out[t, b, d] = complex(o.real + qr, o.imag + qi)
            if d_ > n:
                xr = ar[index[n]]
                xi = ai[index[n]]
                ref[t, b] = complex(xr * g - xi * 0.0, xr * 0.0 + xi * g)


@njit(cache=True, nogil=True)
def rank_one_powers_kernel(w, desired, reference, dat, lo, hi, ps, pr):
    # Output powers of a narrowband weight over snapshots lo .. hi - 1 of a block whose
    # wanted signal is rank one, reference[t, k] a (a = desired[t], or desired[0] for
    # every trial): ys = reference x (w^H a), yr = w^H x - ys; ps[t] += sum |ys|^2,
    # pr[t] += sum |yr|^2 (w (T, N), dat (T, B, N))
    t_, _, n = dat.shape
    for t in range(t_):
        ta = 0 if desired.shape[0] == 1 else t
        gr = 0.0
        gi = 0.0
        for e in range(n):
            c = w[t, e]
            a = desired[ta, e]
            gr += c.real * a.real + c.imag * a.imag
            gi += c.real * a.imag - c.imag * a.real
        accs = 0.0
        accr = 0.0
        for k in range(lo, hi):
            yr = 0.0
            yi = 0.0
            for e in range(n):
                c = w[t, e]
                x = dat[t, k, e]
                yr += c.real * x.real + c.imag * x.imag
                yi += c.real * x.imag - c.imag * x.real
            f = reference[t, k]
            sr = f.real * gr - f.imag * gi
            si = f.real * gi + f.imag * gr
            yr -= sr
            yi -= si
            accs += sr * sr + si * si
            accr += yr * yr + yi * yi
        ps[t] += accs
        pr[t] += accr


@njit(cache=True, nogil=True)
def tapped_powers_kernel(w, sig_hist, sig, dat_hist, dat, lo, hi, ps, pr):
    # Output powers of a space-time weight over snapshots lo .. hi - 1 of a block:
    # w (T, L N) weights (entry l N + n), sig and dat (T, B, N) the block's wanted
    # signal and data, *_hist (T, L - 1, N) the L - 1 snapshots before the block
    # (zeros before the stream starts); ys = sum_{l, n} conj(w[l N + n]) s[k - l, n],
    # yr the same over dat - sig; ps[t] += sum |ys|^2, pr[t] += sum |yr|^2
    t_ = sig.shape[0]
    n = sig.shape[2]
    taps = w.shape[1] // n
    lag = taps - 1
    for t in range(t_):
        accs = 0.0
        accr = 0.0
        for k in range(lo, hi):
            ysr = 0.0
            ysi = 0.0
            yrr = 0.0
            yri = 0.0
            for l_ in range(taps):
                j = k - l_
                for e in range(n):
                    if j >= 0:
                        a = sig[t, j, e]
                        b = dat[t, j, e]
                    else:
                        a = sig_hist[t, lag + j, e]
                        b = dat_hist[t, lag + j, e]
                    c = w[t, l_ * n + e]
                    r = b - a
                    ysr += c.real * a.real + c.imag * a.imag
                    ysi += c.real * a.imag - c.imag * a.real
                    yrr += c.real * r.real + c.imag * r.imag
                    yri += c.real * r.imag - c.imag * r.real
            accs += ysr * ysr + ysi * ysi
            accr += yrr * yrr + yri * yri
        ps[t] += accs
        pr[t] += accr


@njit(cache=True, nogil=True)
def lag_sums_kernel(full, lo, hi, lags):
    # lags[t, q] += sum_{k = lo .. hi - 1} x_k x_{k-q}^H for q = 0 .. L - 1, x_k =
    # full[t, k] (T, K, N) (rows before lo: the snapshots before, zeros before the
    # stream), snapshot by snapshot in increasing k; held planar per trial so that the
    # inner loop runs over contiguous floats (vectorised)
    t_ = full.shape[0]
    n = full.shape[2]
    taps = lags.shape[1]
    lr = np.empty((taps, n, n))
    li = np.empty((taps, n, n))
    yr = np.empty(n)
    yi = np.empty(n)
    for t in range(t_):
        for q in range(taps):
            for a in range(n):
                for b in range(n):
                    v = lags[t, q, a, b]
                    lr[q, a, b] = v.real
                    li[q, a, b] = v.imag
        for k in range(lo, hi):
            for q in range(taps):
                for b in range(n):
                    v = full[t, k - q, b]
                    yr[b] = v.real
                    yi[b] = v.imag
                for a in range(n):
                    v = full[t, k, a]
                    xr = v.real
                    xi = v.imag
                    for b in range(n):
                        lr[q, a, b] += xr * yr[b] + xi * yi[b]
                        li[q, a, b] += xi * yr[b] - xr * yi[b]
        for q in range(taps):
            for a in range(n):
                for b in range(n):
                    lags[t, q, a, b] = complex(lr[q, a, b], li[q, a, b])


@njit(cache=True, nogil=True)
def quadratic_kernel(w, r, out):
    # out[i, j] = Re(w^H R w) for weights w (A, B, M) and matrices r (A or 1, B or 1,
    # M, M) (1: shared along that axis), as Re(w^H R^H w) (the same real part for
    # any R): R^H w accumulated row by row of R (rw[b] += conj(R[a, b]) w[a], a
    # increasing: contiguous rows), then the sum of Re(conj(w[b]) rw[b]), b increasing;
    # each form by itself, whatever the stack
    a_, b_, m = w.shape
    rr = np.empty(m)
    ri = np.empty(m)
    for i in range(a_):
        ia = 0 if r.shape[0] == 1 else i
        for j in range(b_):
            jb = 0 if r.shape[1] == 1 else j
            for b in range(m):
                rr[b] = 0.0
                ri[b] = 0.0
            for a in range(m):
                v = w[i, j, a]
                vr = v.real
                vi = v.imag
                for b in range(m):
                    c = r[ia, jb, a, b]
                    rr[b] += c.real * vr + c.imag * vi
                    ri[b] += c.real * vi - c.imag * vr
            acc = 0.0
            for b in range(m):
                v = w[i, j, b]
                acc += v.real * rr[b] + v.imag * ri[b]
            out[i, j] = acc


#: every compiled entry point (for :func:`adapt.numerics.kernels.warm_up` and the
#: cache test)
KERNELS = (lms_kernel, lms_lined_kernel, rls_kernel, wishart_kernel, cholesky_kernel, mix_kernel,
           normals_kernel, noisy_sources_kernel, envelopes_kernel, gamma_kernel, fir_kernel, tapped_powers_kernel,
           rank_one_powers_kernel, quadratic_kernel, lag_sums_kernel)
