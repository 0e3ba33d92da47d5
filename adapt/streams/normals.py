"""Counter-based standard normal streams: any stretch of a stream, computed directly.

The sample streams need hundreds of millions of Gaussian numbers per run; numpy's
``Generator.standard_normal`` draws them one after another through a function pointer
(about 9 ns each on the 2-core benchmark machine). Here a stream's j-th normal is a
pure function of the stream's key and of j, so a block of any stream is computed in one
compiled pass over all trials (about 1.5 ns a number), the numpy fallback computes the
same numbers vectorised, and a stretch never depends on what was computed before it
(block size, chunking and thread count cannot change a value).

A stream is keyed by two 64-bit words ``(start, gamma)`` from
``SeedSequence(seed, spawn_key=(trial, ...)).generate_state(2, np.uint64)``
(:func:`stream_keys`; gamma made odd and given enough bit transitions as SplitMix's
``mixGamma`` does). Its j-th normal (j = 0, 1, ...) comes from

* the word ``u_j = mix64(start + (j + 1) gamma)`` (mod 2**64): the j-th output of the
  SplitMix64 generator of that seed and gamma (Steele, Lea & Flood, "Fast splittable
  pseudorandom number generators", OOPSLA 2014; ``mix64`` is Stafford's variant 13 of
  the MurmurHash3 finaliser, as in that paper), turned into a normal by
* the ziggurat method with 256 layers (Marsaglia & Tsang, "The ziggurat method for
  generating random variables", J. Stat. Software 5(8), 2000; layer tables derived
  below for the standard normal, tail beyond r = 3.6541528853610088 by Marsaglia's
  1964 method): the low 8 bits pick the layer, bit 8 the sign, bits 9-60 the abscissa.
  About 98.5 % of words are accepted at once. A rejected word ``u`` is continued with
  the words ``mix64(u + m * 0x9e3779b97f4a7c15)``, m = 1, 2, ... (wedge uniforms, tail
  uniforms and fresh tries, in that order of need), so every normal uses exactly one
  word of the stream and the streams stay addressable by index.

Checkable facts (tests/test_normals.py): the values pass a Kolmogorov-Smirnov test
against ``scipy.stats.norm``; tail fractions beyond 2, 3 and 4 match ``norm.sf``
within binomial error; lag-1 correlations and cross-stream correlations are zero within
their standard errors; the compiled and numpy paths agree (identical words; values equal
except for last-place differences between two libraries' ``log``/``exp`` in the rare
tail and wedge branches).
"""
from __future__ import annotations

from typing import Sequence

import numpy as np

from adapt.numerics import kernels as _kernels
from adapt.numerics.tables import (  # noqa: F401 - LAYERS, GAMMA_STEP re-exported
    ACCEPT,
    DENSITY,
    GAMMA_STEP,
    GOLDEN,
    LAYERS,
    SCALE,
    TAIL_START,
)
from adapt.streams.seeding import seed_states

__all__ = ["stream_keys", "fill", "draw", "gamma_fill", "noisy_sources", "LAYERS", "TAIL_START"]

_M52 = (1 << 52) - 1
_LAST_INDEX = (1 << 63) - 1         # stream positions are signed 64-bit in the kernels
_M64 = (1 << 64) - 1
_ACCEPT_SIGNED = ACCEPT.view(np.int64)          # all below 2**52: same values


def _odd_gamma(g: np.ndarray) -> np.ndarray:
    """SplitMix's ``mixGamma`` fix-up: odd, and at least 24 bit transitions (else xor
    with 0xAAAA...; Steele, Lea & Flood 2014)."""
    g = g | np.uint64(1)
    flips = np.unpackbits((g ^ (g >> np.uint64(1))).view(np.uint8).reshape(len(g), 8),
                          axis=1).sum(axis=1)
    return np.where(flips < 24, g ^ np.uint64(0xAAAAAAAAAAAAAAAA), g)


def stream_keys(seed: int, trials: Sequence[int], *key: int) -> np.ndarray:
    """(len(trials), 2) uint64 keys ``(start, gamma)`` of the streams
    ``SeedSequence(seed, spawn_key=(i, *key))``, i in ``trials``."""
    words = seed_states(seed, trials, key, 2)
    out = np.empty((len(words), 2), dtype=np.uint64)
    out[:, 0] = words[:, 0]
    out[:, 1] = _odd_gamma(np.ascontiguousarray(words[:, 1]))
    return out


def _check(keys: np.ndarray, start: int, out: np.ndarray) -> None:
    if keys.ndim != 2 or keys.shape[1] != 2 or keys.dtype != np.uint64:
        raise ValueError(f"keys must be uint64 (T, 2), got {keys.dtype} {keys.shape}")
    if out.ndim != 2 or out.shape[0] != keys.shape[0] or out.dtype != np.float64 \
            or not out.flags.c_contiguous or not out.flags.writeable:
        raise ValueError(f"out must be a writable contiguous float64 (T, M) array with "
                         f"T = {keys.shape[0]}, got {out.dtype} {out.shape}")
    if int(start) < 0 or int(start) + out.shape[-1] > _LAST_INDEX:
        raise ValueError(f"start must be >= 0 and start + count at most 2**63 - 1, got "
                         f"start {start}, count {out.shape[-1]}")


def fill(keys: np.ndarray, start: int, out: np.ndarray) -> np.ndarray:
    """Normals ``start .. start + M - 1`` of each stream into ``out`` (T, M) float64
    (C-contiguous; any array viewable so, e.g. a (T, B, N, 2) block reshaped), returned.
    Compiled when the kernels are on (:mod:`adapt.numerics.kernels`), else numpy."""
    keys = np.asarray(keys)
    _check(keys, start, out)
    if out.size == 0:
        return out
    if _kernels.compiled():
        _kernels.normals_fill(keys, int(start), out)
    else:
        _fill_numpy(keys, int(start), out)
    return out


def draw(keys: np.ndarray, start: int, count: int) -> np.ndarray:
    """A new (T, count) array of normals ``start .. start + count - 1`` of each stream."""
    keys = np.asarray(keys)
    return fill(keys, start, np.empty((len(keys), int(count))))


def _check_shapes(shapes: np.ndarray, out: np.ndarray) -> np.ndarray:
    shapes = np.ascontiguousarray(shapes, dtype=np.float64).reshape(-1)
    if shapes.size != out.shape[1]:
        raise ValueError(f"need one shape per column of out ({out.shape[1]}), got {shapes.size}")
    if not np.all(np.isfinite(shapes)) or np.any((shapes != 0) & (shapes < 1)):
        raise ValueError("gamma shapes must be 0 or >= 1 (finite)")
    return shapes


def gamma_fill(keys: np.ndarray, shapes: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Gamma(shapes[m], 1) variates into ``out`` (T, M) float64, m = 0..M-1, one
    counter-based stream per row (``keys`` (T, 2) as from :func:`stream_keys`),
    returned. ``shapes`` (M,): 0 (giving 0) or >= 1.

    Variate m uses the stream's word ``w = mix64(start + (m + 1) gamma)``; its attempt
    i (i = 0, 1, ...) takes a normal from the word ``mix64(w + (2i + 1) s)`` (the
    ziggurat rule of this module) and a uniform in (0, 1] from ``mix64(w + (2i + 2) s)``,
    s = :data:`GAMMA_STEP`, and applies Marsaglia & Tsang's test ("A simple method for
    generating gamma variables", ACM TOMS 26(3), 2000): with d = a - 1/3,
    c = 1/sqrt(9d), v = (1 + c x)^3 > 0, accept d v if u < 1 - 0.0331 x^4 or
    log u < x^2/2 + d (1 - v + log v). Checkable fact (tested): the variates pass a
    Kolmogorov-Smirnov test against ``scipy.stats.gamma`` for each shape."""
    keys = np.asarray(keys)
    _check(keys, 0, out)
    shapes = _check_shapes(shapes, out)
    if out.size == 0:
        return out
    if _kernels.compiled():
        _kernels.gamma_fill(keys, shapes, out)
    else:
        _gamma_numpy(keys, shapes, out)
    return out


def noisy_sources(keys: np.ndarray, start: int, scale: float, env: np.ndarray,
                  steer: np.ndarray, env_d: np.ndarray, steer_d: np.ndarray,
                  inter: np.ndarray, data: np.ndarray) -> None:
    """Noise and fixed sources of a block, and the data with the wanted source added:
    ``inter`` (T, B, N) <- ``scale`` x the noise (normals ``2(k N + e)`` and
    ``2(k N + e) + 1`` of the streams ``keys`` (T, 2) for element e of snapshot k =
    ``start ..``) plus ``env`` (T, B, J) x ``steer`` (T or 1, J, N); ``data`` (T, B, N)
    <- ``inter + env_d`` (T, B) x ``steer_d`` (T or 1, N). Compiled in one pass when
    the kernels are on (:func:`adapt.numerics.kernels.noisy_sources`), else
    :func:`fill` and :func:`adapt.numerics.kernels.add_sources` twice: the same
    operations in the same order, so the same values."""
    if _kernels.compiled():
        _kernels.noisy_sources(keys, start, scale, env, steer, env_d, steer_d, inter, data)
        return
    t_, b_, n = inter.shape
    fill(keys, int(start) * n * 2, inter.view(np.float64).reshape(t_, b_ * n * 2))
    _kernels.add_sources(inter, scale, env, steer)
    _kernels.add_sources(inter, 1.0, env_d[..., None], steer_d[:, None, :], out=data)


# --------------------------------------------------------------------------- numpy path
def _mix64(z: np.ndarray) -> np.ndarray:
    """Stafford's variant 13 finaliser, in place on a uint64 array (wrapping)."""
    z ^= z >> np.uint64(30)
    z *= np.uint64(0xBF58476D1CE4E5B9)
    z ^= z >> np.uint64(27)
    z *= np.uint64(0x94D049BB133111EB)
    z ^= z >> np.uint64(31)
    return z


def _unit(u: np.ndarray) -> np.ndarray:
    """Uniform in (0, 1] from the top 53 bits of a word."""
    return ((u >> np.uint64(11)) + np.uint64(1)).astype(np.float64) * (1.0 / (1 << 53))


def _aux(u: np.ndarray, m: np.ndarray) -> np.ndarray:
    return _mix64(u + m * np.uint64(GOLDEN))


def _fast(u: np.ndarray):
    """(x, accepted, layer, negative) of the ziggurat's first test for words u.
    (uint64 -> int64 by view: numpy's casting of uint64 is slow, the bits are equal.)"""
    idx = (u & np.uint64(0xFF)).view(np.int64)
    rabs = ((u >> np.uint64(9)) & np.uint64(_M52)).view(np.int64)
    x = rabs.astype(np.float64)
    x *= SCALE.take(idx)
    sign = (u & np.uint64(0x100)) << np.uint64(55)              # bit 8 -> sign bit
    x.view(np.uint64)[...] ^= sign                                 # exact negation
    return x, rabs < _ACCEPT_SIGNED.take(idx), idx, sign != 0


def _resolve(u: np.ndarray) -> np.ndarray:
    """Normals for words rejected by the first test: the sequential rule of the
    compiled kernel, run for all of them at once (one round = one try each)."""
    out = np.empty(len(u))
    cur = u.copy()
    m = np.ones(len(u), dtype=np.uint64)
    tail = np.zeros(len(u), dtype=bool)
    todo = np.arange(len(u))
    first = True
    while todo.size:
        uu, cc, mm, tt = u[todo], cur[todo], m[todo], tail[todo]
        x, ok, idx, neg = _fast(cc)
        if first:                     # the first try was the caller's, and failed
            ok[:] = False
            first = False
        ok &= ~tt
        done = ok.copy()
        out[todo[ok]] = x[ok]
        # base layer rejected (or already in the tail): one tail attempt
        go_tail = ~ok & (tt | (idx == 0))
        if go_tail.any():
            a = _unit(_aux(uu[go_tail], mm[go_tail]))
            b = _unit(_aux(uu[go_tail], mm[go_tail] + np.uint64(1)))
            mm[go_tail] += np.uint64(2)
            xx = -np.log(a) / TAIL_START
            yy = -np.log(b)
            acc = yy + yy > xx * xx
            value = np.where(neg[go_tail], -(TAIL_START + xx), TAIL_START + xx)
            rows = np.flatnonzero(go_tail)
            out[todo[rows[acc]]] = value[acc]
            done[rows[acc]] = True
            tt[go_tail] = True
        wedge = ~ok & ~go_tail
        if wedge.any():
            rows = np.flatnonzero(wedge)
            i = idx[rows]
            y = DENSITY[i] + _unit(_aux(uu[rows], mm[rows])) * (DENSITY[i + 1] - DENSITY[i])
            mm[rows] += np.uint64(1)
            xr = x[rows]
            acc = y < np.exp(-0.5 * xr * xr)
            out[todo[rows[acc]]] = xr[acc]
            done[rows[acc]] = True
            again = rows[~acc]
            cc[again] = _aux(uu[again], mm[again])
            mm[again] += np.uint64(1)
        cur[todo], m[todo], tail[todo] = cc, mm, tt
        todo = todo[~done]
    return out


_CHUNK = 1 << 15          # values per numpy pass (temporaries stay small and in cache)


def _fill_numpy(keys: np.ndarray, start: int, out: np.ndarray) -> None:
    t_, m_ = out.shape
    seeds = keys[:, 0:1]
    gammas = keys[:, 1:2]
    step = max(1, _CHUNK // max(1, t_))
    rejected_at, rejected = [], []
    with np.errstate(over="ignore"):
        for lo in range(0, m_, step):
            hi = min(m_, lo + step)
            u = np.arange(start + lo + 1, start + hi + 1, dtype=np.uint64)[None, :] * gammas
            u += seeds
            x, ok, _, _ = _fast(_mix64(u))                             # (T, hi - lo)
            out[:, lo:hi] = x
            if not ok.all():
                rows, cols = np.nonzero(~ok)
                rejected_at.append((rows, cols + lo))
                rejected.append(u[rows, cols])
        if rejected:                      # the few slow-path words, all at once
            values = _resolve(np.concatenate(rejected))
            rows = np.concatenate([r for r, _ in rejected_at])
            cols = np.concatenate([c for _, c in rejected_at])
            out[rows, cols] = values


def _normals_of(words: np.ndarray) -> np.ndarray:
    """The ziggurat rule applied to each word (first test, then the slow path)."""
    x, ok, _, _ = _fast(words)
    if not ok.all():
        x[~ok] = _resolve(words[~ok])
    return x


def _gamma_numpy(keys: np.ndarray, shapes: np.ndarray, out: np.ndarray) -> None:
    t_, m_ = out.shape
    a = np.broadcast_to(shapes, (t_, m_))
    out[:] = 0.0
    rows, cols = np.nonzero(a > 0)
    with np.errstate(over="ignore"):
        w = keys[rows, 0] + (cols + 1).astype(np.uint64) * keys[rows, 1]
        w = _mix64(w)
        d = a[rows, cols] - 1.0 / 3.0
        c = 1.0 / np.sqrt(9.0 * d)
        attempt = np.uint64(0)
        todo = np.arange(len(rows))
        step = np.uint64(GAMMA_STEP)
        while todo.size:
            ww, dd, cc = w[todo], d[todo], c[todo]
            x = _normals_of(_mix64(ww + (np.uint64(2) * attempt + np.uint64(1)) * step))
            u = _unit(_mix64(ww + (np.uint64(2) * attempt + np.uint64(2)) * step))
            attempt += np.uint64(1)
            v = 1.0 + cc * x
            live = v > 0
            v = np.where(live, v, 1.0)
            v = v * v * v
            sq = x * x
            ok = live & (u < 1.0 - 0.0331 * sq * sq)
            slow = live & ~ok
            if slow.any():
                ok[slow] = np.log(u[slow]) < 0.5 * sq[slow] + dd[slow] * (
                    1.0 - v[slow] + np.log(v[slow]))
            out[rows[todo[ok]], cols[todo[ok]]] = dd[ok] * v[ok]
            todo = todo[~ok]
