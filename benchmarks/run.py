"""Speed benchmark of adapt: the product beside plain reference code, in one run.

    python benchmarks/run.py            # full sizes (about 6 minutes on 2 cores)
    python benchmarks/run.py --quick    # scaled-down smoke check (well under a minute)
    python benchmarks/run.py --only W1  # selected workloads only (repeatable; P: processes, S: the sweep study)
    python benchmarks/run.py --wideband # the wideband workload W4 (run_w4) alone
    python benchmarks/run.py --threads 1  # product and floors on one thread

Workloads (16-element half-wavelength line, six 40 dB noise-like jammers, wanted source
broadside at 0 dB, training on interference plus noise):

* W1 sizing: unloaded and 10 dB-loaded SMI, checkpoints 16..1024 snapshots (powers of
  two), 2000 trials. Product: ``evaluate(..., draw="covariance")`` (the drawn complex-
  Wishart window covariances; also timed: ``draw="samples"``). Reference: the plain
  per-trial loop (draw the samples, form each window's sample covariance, solve, score).
* W2 recursive: LMS, NLMS and RLS, 2000 trials x 4096 snapshots. Product: ``evaluate``
  with each processor alone and all three on one stream. Reference: a per-trial,
  per-snapshot Python loop, timed on 8 trials and scaled linearly to 2000.
* W3 long stream: one trial of 10,000,000 snapshots in blocks of 65,536 (``evaluate(...,
  block=65536)``; the executor's default block for one trial is 4096 snapshots, slower
  per snapshot), sliding-window SMI and NLMS: snapshots per second, and peak memory
  (tracemalloc peak of traced allocations, numpy's included, during the run; the
  process's maxrss is reported beside it). One trial is one chunk: one thread.
* P whole processes (``python -m adapt ...`` from the top folder; the command-line run
  includes it, :func:`run` only when asked): ``--help``, ``check``, ``compare`` of
  jammer_rich, ``size`` of W1's scene at 10,000 trials with default settings against
  the W1 reference as a plain numpy script process on one core, and a 10,000,000-
  snapshot NLMS stream through ``compare``. Cold: the first run with an empty numba
  cache (a fresh ``NUMBA_CACHE_DIR``, every kernel compiles); warm: the fastest of the
  later runs. Wall seconds and the process's peak resident memory (GNU time).
* W4 wideband (``--wideband``, alone: :func:`run_w4`): 16-element line, fractional
  bandwidth 0.2, three 40 dB full-band jammers, space-time ``smi taps=5 loading_db=10``
  and ``nlms taps=5 step=0.2``, 2000 trials x 4096 snapshots, scored at 13
  checkpoints. Reference: the same model written out in plain numpy, trial by trial
  (``np.convolve`` per element and source, stacked snapshots, the stacked covariance
  accumulated between checkpoints and a solve at each, or NLMS as a Python loop over
  snapshots; every checkpoint scored against the true space-time covariances worked
  out by hand), timed on 4 trials and scaled, in a process of its own on one core (its
  BLAS on one thread, as P's plain script). Floor: adapt's wideband stream (its
  filters are the model) and the bare computation by adapt's own parts without the
  engine (the lag sums and compiled solves, or the NLMS kernel). Then a 10,000,000-
  snapshot wideband NLMS stream through ``adapt compare`` as a process of its own:
  its peak resident memory (GNU time, as P measures its stream).
* Floors: the unavoidable work with the same libraries in the same run; the random
  numbers come from adapt's own counter-based generator (:mod:`adapt.streams.normals`, the
  fastest these libraries have; numpy's ``Generator.standard_normal`` is about 5x
  slower). W1: the samples' normals, one batched covariance accumulation and the batched
  solves. W2, per processor: the samples' normals, then the snapshots formed and the
  bare recursion (one LMS, NLMS or RLS step per snapshot, nothing recorded or scored),
  done two ways: a minimal compiled loop written in the benchmark (numba; without it,
  the draws only, labelled so), and adapt's own compiled kernels called directly,
  without the engine; the floor is the faster of the two in the run. The draws alone
  are printed too.

Threads: the product runs its trial chunks on every usable core by default (its
executor's default), so the floors run on the same number of threads (trials split
evenly), and both are also timed on one thread, for the per-core picture. The references
run on one thread, as the hand-written scripts they stand for would. ``--threads N``
sets the product's and the floors' thread count.

Targets (PASS/MISS printed): W1 >= 20x its reference; W2 >= 20x its reference and within
2x of its floor; W3 peak memory < 300 MB and NLMS >= 1,000,000 snapshots/s; P (warm)
``--help`` <= 0.3 s, ``check`` <= 0.5 s, ``compare`` <= 2 s, ``size`` >= 20x the plain
script, the stream >= 3,000,000 snapshots/s in < 300 MB; W4 >= 20x its reference and
within 2x of its floor, the wideband stream < 300 MB.

Timing: wall-clock seconds; every run keeps the fastest of its repeats (the least
disturbed by other work on a shared machine; every time is in the JSON): the W1
drawn-covariance product 9 on every core and 3 on one (it lasts a tenth of a second;
its repeats are spread before, between and after the two W1 reference runs, so that a
few seconds of load from elsewhere cannot catch them all), other products and floors
2-3, the references 2 (W1, in full) and 3 (W2, on 8 trials per processor, scaled
linearly, before, between and after the product's two runs; the median trial time is
recorded beside them).

The run starts by measuring how many cores' worth of plain Python work the machine
delivers with one process per core (``core_scaling``: 2.0 on an idle 2-core machine;
less on a shared virtual machine whose cores are busy elsewhere), context for every
threaded figure.

Figures are printed and written as JSON (``--json``, default ``runs/benchmark.json``).
On machines that set OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE (for old OpenBLAS builds), a
current numpy runs slower; to benchmark, unset both together for this command only:
``env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE python benchmarks/run.py``. The BLAS
kernel in use is reported (threadpoolctl when installed).
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
import tracemalloc
import warnings
from pathlib import Path

import numpy as np

N = 16
JAMMER_AZIMUTHS = (-60.0, -35.0, -15.0, 20.0, 40.0, 65.0)
JAMMER_DB = 40.0
SEED = 20240
FULL = {"w1_trials": 2000, "w2_trials": 2000, "w2_snapshots": 4096, "w2_reference_trials": 8,
        "w3_snapshots": 10_000_000, "w3_block": 65536, "p_size_trials": 10_000,
        "p_stream_snapshots": 10_000_000}
QUICK = {"w1_trials": 200, "w2_trials": 100, "w2_snapshots": 1024, "w2_reference_trials": 2,
         "w3_snapshots": 500_000, "w3_block": 65536, "p_size_trials": 400,
         "p_stream_snapshots": 500_000}
W1_CHECKPOINTS = tuple(2 ** k for k in range(4, 11))          # 16 .. 1024


# ----------------------------------------------------------------------------- scene
def scene(trials: int, snapshots: int):
    """The benchmark scene as an adapt Scene."""
    from adapt.scenefile import parse_scene
    sources = [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0,
                "waveform": "gaussian"}]
    sources += [{"name": f"jam-{i + 1}", "role": "interferer", "azimuth": az,
                 "power_db": JAMMER_DB, "waveform": "gaussian"}
                for i, az in enumerate(JAMMER_AZIMUTHS)]
    return parse_scene({"name": "benchmark", "array": {"layout": "line", "elements": N,
                                                       "spacing": 0.5},
                        "sources": sources, "snapshots": snapshots, "trials": trials,
                        "seed": SEED, "training": "interference"})


def _plain_truth():
    """Steering vectors and covariance of the scene, written out by hand (the reference
    code does not use adapt): a_n = exp(j 2 pi 0.5 n sin(az))."""
    n = np.arange(N)
    jam = np.exp(2j * np.pi * 0.5 * n[None, :] * np.sin(np.deg2rad(JAMMER_AZIMUTHS))[:, None])
    look = np.ones(N, dtype=complex)
    p = 10 ** (JAMMER_DB / 10)
    r_in = np.eye(N) + p * jam.T @ jam.conj()
    return jam, look, p, r_in


def usable_cores() -> int:
    """Cores this process may run on (the product's default thread count)."""
    from adapt.engine.execute import usable_cores as cores
    return cores()


def _split(trials: int, parts: int) -> list[tuple[int, int]]:
    """``parts`` contiguous (lo, hi) ranges covering 0..trials-1 (none empty)."""
    edges = np.linspace(0, trials, max(1, min(parts, trials)) + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]


def _on_threads(work, trials: int, threads: int) -> None:
    """Run ``work(lo, hi)`` over the trials split into ``threads`` ranges, one thread
    each (numpy's random fills, matrix products and solves release the GIL)."""
    ranges = _split(trials, threads)
    if len(ranges) == 1:
        work(*ranges[0])
        return
    from concurrent.futures import ThreadPoolExecutor
    with ThreadPoolExecutor(len(ranges)) as pool:
        for f in [pool.submit(work, lo, hi) for lo, hi in ranges]:
            f.result()


def _timed(fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return time.perf_counter() - t0, out


def _fastest(runs: list) -> dict:
    """The fastest of ``runs`` (dicts with ``seconds``: the least disturbed by other work
    on the machine), with every time listed."""
    return dict(min(runs, key=lambda r: r["seconds"]), all_seconds=[r["seconds"] for r in runs])


def _best(fn, repeats: int, *args, **kwargs) -> dict:
    """Run ``fn`` (returning a dict with ``seconds``) ``repeats`` times; the fastest run."""
    return _fastest([fn(*args, **kwargs) for _ in range(max(1, repeats))])


# ----------------------------------------------------------------------------- W1
def w1_product(trials: int, draw: str = "covariance", threads: int | None = None) -> dict:
    """Unloaded and 10 dB-loaded SMI through adapt's evaluate; mean rho per checkpoint.
    ``threads``: the executor's threads (None: its default, every usable core)."""
    import adapt.engine.scores  # noqa: F401  (import order: scores before evaluate)
    from adapt.engine.execute import run_trials as evaluate
    from adapt.processors import parse_specs
    sc = scene(trials, W1_CHECKPOINTS[-1])
    procs = parse_specs(["smi", "smi loading_db=10"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        seconds, ev = _timed(evaluate, sc, procs, list(W1_CHECKPOINTS), tail=0, draw=draw,
                             threads=threads)
    return {"seconds": seconds,
            "mean_rho": {p.label: p.normalised.mean(axis=0).tolist() for p in ev.processors}}


def w1_reference(trials: int) -> dict:
    """The straightforward per-trial loop: draw the samples, form each window's sample
    covariance, solve, score the normalised SINR against the true covariance."""
    jam, look, p, r_in = _plain_truth()
    opt = np.real(look.conj() @ np.linalg.solve(r_in, look))
    k_max = W1_CHECKPOINTS[-1]
    rho = np.empty((trials, 2, len(W1_CHECKPOINTS)))
    per_trial = np.empty(trials)
    t0 = time.perf_counter()
    for t in range(trials):
        t1 = time.perf_counter()
        rng = np.random.default_rng([SEED, t])
        noise = (rng.standard_normal((k_max, N)) + 1j * rng.standard_normal((k_max, N))) * np.sqrt(0.5)
        s = (rng.standard_normal((k_max, len(jam))) + 1j * rng.standard_normal((k_max, len(jam))))
        x = noise + (s * np.sqrt(p / 2)) @ jam
        for c, k in enumerate(W1_CHECKPOINTS):
            r = x[:k].T @ x[:k].conj() / k
            for j, load in enumerate((0.0, 10.0)):
                w = np.linalg.solve(r + load * np.eye(N), look)
                sinr = np.abs(w.conj() @ look) ** 2 / np.real(w.conj() @ r_in @ w)
                rho[t, j, c] = sinr / opt
        per_trial[t] = time.perf_counter() - t1
    seconds = time.perf_counter() - t0
    return {"seconds": seconds, "median_trial_seconds": float(np.median(per_trial)),
            "robust_seconds": float(np.median(per_trial)) * trials, "mean_rho": {"smi": rho[:, 0].mean(0).tolist(),
                                             "smi loading_db=10": rho[:, 1].mean(0).tolist()}}


def w1_floor(trials: int, group: int = 128, threads: int = 1) -> dict:
    """Unavoidable work of a sample-based W1 run: the samples' normals (adapt's own
    counter-based generator, :mod:`adapt.streams.normals`), one batched covariance accumulation (window sums at every
    checkpoint), the batched solves (two loadings x seven checkpoints per trial); on
    ``threads`` threads, as the product runs."""
    from adapt.streams import normals
    jam, look, p, _ = _plain_truth()
    k_max = W1_CHECKPOINTS[-1]
    cps = np.array(W1_CHECKPOINTS)
    edges = np.concatenate([[0], cps])

    def work(first: int, last: int) -> None:
        for lo in range(first, last, group):
            g_ = min(group, last - lo)
            z = np.empty((g_, k_max, N + len(jam), 2))
            normals.fill(normals.stream_keys(SEED, range(lo, lo + g_), 1), 0, z.reshape(g_, -1))
            zc = z.view(np.complex128)[..., 0]
            x = zc[..., :N] + zc[..., N:] @ (np.sqrt(p) * jam)
            # contiguous operands so that every product is a BLAS call
            xh = np.ascontiguousarray(np.swapaxes(x, 1, 2))              # (g, N, K)
            xc = np.conj(x)
            parts = np.stack([xh[:, :, a:b] @ xc[:, a:b]
                              for a, b in zip(edges[:-1], edges[1:])], axis=1)
            r = np.cumsum(parts, axis=1) / cps[None, :, None, None]
            r = np.concatenate([r, r + 10 * np.eye(N)], axis=1)
            np.linalg.solve(r, np.broadcast_to(look, r.shape[:-1])[..., None])

    t0 = time.perf_counter()
    _on_threads(work, trials, threads)
    return {"seconds": time.perf_counter() - t0, "threads": threads}


# ----------------------------------------------------------------------------- W2
W2_SPECS = ("lms", "nlms", "rls")


def w2_product(trials: int, snapshots: int, specs=W2_SPECS, threads: int | None = None) -> dict:
    """The recursive processors through adapt's evaluate (one stream for all given);
    ``threads`` as in :func:`w1_product`."""
    import adapt.engine.scores  # noqa: F401
    from adapt.engine.execute import run_trials as evaluate
    from adapt.processors import parse_specs
    sc = scene(trials, snapshots)
    cps = sorted({int(k) for k in np.geomspace(1, snapshots, 13).round()})
    seconds, ev = _timed(evaluate, sc, parse_specs(list(specs)), cps, tail=0, threads=threads)
    return {"seconds": seconds,
            "processor_seconds": {p.label: p.seconds for p in ev.processors},
            "final_mean_rho": {p.label: float(np.nanmean(p.normalised[:, -1]))
                               for p in ev.processors}}


def w2_reference(trials: int, snapshots: int, spec: str) -> dict:
    """Per-trial, per-snapshot Python loop with numpy vectors (LMS step 0.1/tr(R_xx)
    as adapt's automatic step, NLMS step 0.05, RLS lambda 1 and delta 1)."""
    jam, look, p, r_in = _plain_truth()
    r_xx = r_in + np.outer(look, look.conj())
    mu = 0.1 / np.real(np.trace(r_xx))
    t0 = time.perf_counter()
    final = []
    per_trial = []
    for t in range(trials):
        t1 = time.perf_counter()
        rng = np.random.default_rng([SEED, 1, t])
        z = (rng.standard_normal((snapshots, N + len(jam) + 1))
             + 1j * rng.standard_normal((snapshots, N + len(jam) + 1))) * np.sqrt(0.5)
        d = z[:, -1]
        x = z[:, :N] + (z[:, N:-1] * np.sqrt(p)) @ jam + d[:, None] * look
        w = look / N
        pm = np.eye(N, dtype=complex)
        for k in range(snapshots):
            u = x[k]
            e = d[k] - np.vdot(w, u)
            if spec == "lms":
                w = w + mu * u * np.conj(e)
            elif spec == "nlms":
                w = w + 0.05 / (1e-6 + np.vdot(u, u).real) * u * np.conj(e)
            else:
                pi = pm @ u
                den = 1.0 + np.vdot(u, pi).real
                w = w + pi / den * np.conj(e)
                pm = pm - np.outer(pi, pi.conj()) / den
        final.append(w)
        per_trial.append(time.perf_counter() - t1)
    return {"seconds": time.perf_counter() - t0, "trials": trials,
            "median_trial_seconds": float(np.median(per_trial))}


_FLOOR_KERNEL = None


def _floor_kernel():
    """The bare recursions of W2 as one compiled loop per trial (numba; None without
    it): form each snapshot from its normals (noise and seven sources), then one LMS,
    NLMS or RLS step, nothing else (no scores, no recorded weights)."""
    global _FLOOR_KERNEL
    if _FLOOR_KERNEL is not None:
        return _FLOOR_KERNEL
    try:
        import numba
    except ImportError:
        return None

    @numba.njit(nogil=True, cache=False)
    def recurse(z, s, amp, steer, kind, mu, w, pm):
        # z (G, K*N*2) noise normals, s (G, J+1, K*2) source normals (wanted last),
        # amp (J+1,) amplitudes, steer (J+1, N); w (G, N) and pm (G, N, N) states
        g_, j1, _ = s.shape
        n = steer.shape[1]
        k_ = z.shape[1] // (2 * n)
        x = np.empty(n, dtype=np.complex128)
        pi = np.empty(n, dtype=np.complex128)
        for t in range(g_):
            for k in range(k_):
                for i in range(n):
                    x[i] = complex(z[t, 2 * (k * n + i)], z[t, 2 * (k * n + i) + 1]) * 0.7071067811865476
                d = 0j
                for j in range(j1):
                    e = complex(s[t, j, 2 * k], s[t, j, 2 * k + 1]) * amp[j]
                    for i in range(n):
                        x[i] += e * steer[j, i]
                    d = e
                y = 0j
                for i in range(n):
                    y += w[t, i].conjugate() * x[i]
                err = (d - y).conjugate()
                if kind == 2:                                   # RLS, lambda 1
                    den = 1.0
                    for i in range(n):
                        acc = 0j
                        for m in range(n):
                            acc += pm[t, i, m] * x[m]
                        pi[i] = acc
                    for i in range(n):
                        den += (x[i].conjugate() * pi[i]).real
                    for i in range(n):
                        w[t, i] += pi[i] / den * err
                    for i in range(n):
                        for m in range(n):
                            pm[t, i, m] -= pi[i] * pi[m].conjugate() / den
                else:
                    step = mu
                    if kind == 1:                               # NLMS
                        p = 0.0
                        for i in range(n):
                            p += x[i].real ** 2 + x[i].imag ** 2
                        step = mu / (1e-6 + p)
                    for i in range(n):
                        w[t, i] += step * x[i] * err

    _FLOOR_KERNEL = recurse
    return recurse


def w2_floor(trials: int, snapshots: int, spec: str | None = None, threads: int = 1,
             group: int = 8) -> dict:
    """The unavoidable work of W2 on ``threads`` threads (trials split evenly): the
    samples' normals (noise and seven source waveforms per trial, from adapt's own
    counter-based generator, :mod:`adapt.streams.normals`, the fastest one these libraries
    have) and, with numba present and ``spec`` given, the bare recursion (the snapshots
    formed and one LMS, NLMS or RLS step each, in a minimal compiled loop written here);
    without numba, or ``spec`` None, the draws only."""
    from adapt.streams import normals
    jam, look, p, r_in = _plain_truth()
    steer = np.vstack([jam, look[None, :]])
    amp = np.array([np.sqrt(p)] * len(jam) + [1.0])
    mu = 0.1 / np.real(np.trace(r_in + np.outer(look, look.conj())))
    kernel = _floor_kernel() if spec else None
    kind = {"lms": 0, "nlms": 1, "rls": 2}.get(spec, 0)
    step = 0.05 if spec == "nlms" else mu
    if kernel is not None:          # compile outside the timing
        kernel(np.zeros((1, 2 * N)), np.zeros((1, len(amp), 2)), amp, steer, kind, step,
               np.zeros((1, N), complex), np.zeros((1, N, N), complex))

    def work(first: int, last: int) -> None:
        z = np.empty((group, snapshots * N * 2))
        s = np.empty((group, len(amp), snapshots * 2))
        for lo in range(first, last, group):
            g_ = min(group, last - lo)
            trials_ = range(lo, lo + g_)
            normals.fill(normals.stream_keys(SEED, trials_, 1, 0), 0, z[:g_])
            for j in range(len(amp)):
                s_j = np.empty((g_, snapshots * 2))
                normals.fill(normals.stream_keys(SEED, trials_, 1, j + 1), 0, s_j)
                s[:g_, j] = s_j
            if kernel is not None:
                w = np.tile(look / N, (g_, 1))
                pm = np.tile(np.eye(N, dtype=complex), (g_, 1, 1))
                kernel(z[:g_], s[:g_], amp, steer, kind, step, w, pm)

    t0 = time.perf_counter()
    _on_threads(work, trials, threads)
    return {"seconds": time.perf_counter() - t0, "threads": threads,
            "recursion": kernel is not None}


def w2_floor_kernels(trials: int, snapshots: int, spec: str, threads: int = 1,
                     group: int = 32, block: int = 512) -> dict | None:
    """The same unavoidable work done with adapt's own compiled kernels called directly,
    without the engine (no scene, scores, recorded weights or checkpoints): per block,
    the seven waveforms' normals, one pass forming noise, sources and data
    (``noisy_sources``), one recursion pass (``lms_block`` / ``rls_block``). None
    without the compiled kernels."""
    from adapt.numerics import kernels as _kernels
    from adapt.streams import normals
    if not _kernels.compiled():
        return None
    jam, look, p, r_in = _plain_truth()
    mu = 0.1 / np.real(np.trace(r_in + np.outer(look, look.conj())))
    jam_steer = np.ascontiguousarray(jam[None].astype(complex))
    look_steer = look[None, :].astype(complex)

    def work(first: int, last: int) -> None:
        for lo in range(first, last, group):
            g_ = min(group, last - lo)
            trials_ = range(lo, lo + g_)
            noise = normals.stream_keys(SEED, trials_, 1, 0)
            keys = [normals.stream_keys(SEED, trials_, 1, j + 1) for j in range(len(jam) + 1)]
            wc = np.tile(look / N, (g_, 1)).astype(complex)
            pm = np.tile(np.eye(N, dtype=complex), (g_, 1, 1))
            bufs: dict = {}
            for start in range(0, snapshots, block):
                b = min(block, snapshots - start)
                if b not in bufs:          # one set of buffers per block length
                    bufs[b] = (np.empty((g_, b, N), complex), np.empty((g_, b, N), complex),
                               np.empty((g_, b, len(jam)), complex), np.empty((g_, b, 2)))
                inter, x, env, s = bufs[b]
                for j in range(len(jam)):
                    normals.fill(keys[j], 2 * start, s.reshape(g_, -1))
                    env[:, :, j] = s.view(complex)[..., 0] * np.sqrt(p / 2)
                normals.fill(keys[-1], 2 * start, s.reshape(g_, -1))
                ref = s.view(complex)[..., 0] * np.sqrt(0.5)
                _kernels.noisy_sources(noise, start, np.sqrt(0.5), env, jam_steer, ref,
                                       look_steer, inter, x)
                marks = np.array([b - 1])
                if spec == "rls":
                    _kernels.rls_block(pm, wc, x, ref, 1.0, start, marks)
                elif spec == "nlms":
                    _kernels.lms_block(wc, x, marks, gain=None, desired=ref, step=0.05, eps=1e-6)
                else:
                    _kernels.lms_block(wc, x, marks, gain=mu, desired=ref)

    t0 = time.perf_counter()
    _on_threads(work, trials, threads)
    return {"seconds": time.perf_counter() - t0, "threads": threads}


def kernel_compile_seconds() -> float | None:
    """Seconds to compile the numba kernels from scratch (a fresh cache folder, in a
    subprocess); None when the kernels are off or numba is absent."""
    code = ("from adapt.numerics import kernels as _kernels; import sys; "
            "sys.stdout.write(repr(_kernels.warm_up() if _kernels.compiled() else -1.0))")
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                             text=True, check=True)
    value = float(out.stdout.strip())
    return None if value < 0 else value


# ----------------------------------------------------------------------------- W3
def w3_run(snapshots: int, specs, block: int, trace: bool = False) -> dict:
    """One trial of ``snapshots`` snapshots through evaluate in blocks of ``block``."""
    import adapt.engine.scores  # noqa: F401
    from adapt.engine.execute import run_trials as evaluate
    from adapt.processors import parse_specs
    sc = scene(1, snapshots)
    cps = sorted({int(k) for k in np.linspace(0, snapshots, 11)[1:].round()})
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    if trace:
        tracemalloc.start()
    seconds, ev = _timed(evaluate, sc, parse_specs(list(specs)), cps, tail=0, block=block)
    peak = None
    if trace:
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"seconds": seconds, "snapshots_per_second": snapshots / seconds,
            "tracemalloc_peak_mb": None if peak is None else peak / 2 ** 20,
            "maxrss_mb": rss1 / 1024, "maxrss_growth_mb": (rss1 - rss0) / 1024,
            "final_rho": {p.label: float(p.normalised[0, -1]) for p in ev.processors}}


W3_SMI = "smi window=sliding length=1024 loading_db=10"


# ----------------------------------------------------------------------------- machine
def core_scaling(count: int = 5_000_000) -> float:
    """How many cores' worth of plain Python work the machine delivers with one process
    per usable core, against one process alone (2.0 on an idle 2-core machine; less when
    a shared virtual machine's cores are busy elsewhere): context for every threaded
    figure of the run. Each process is a fresh interpreter (start-up included in both)."""
    cores = usable_cores()
    code = f"t = 0\nfor i in range({int(count)}):\n    t += i * i\n"

    def timed(k: int) -> float:
        t0 = time.perf_counter()
        procs = [subprocess.Popen([sys.executable, "-c", code]) for _ in range(k)]
        for proc in procs:
            proc.wait()
        return time.perf_counter() - t0

    if cores < 2:
        return 1.0
    one = timed(1)
    return cores * one / timed(cores)


def machine() -> dict:
    cpu = platform.processor() or "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    info = {"cpu": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "numpy": np.__version__,
            "OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
            "OPENBLAS_L2_SIZE": os.environ.get("OPENBLAS_L2_SIZE"),
            "ADAPT_KERNELS": os.environ.get("ADAPT_KERNELS", "auto")}
    try:
        import numba
        info["numba"] = numba.__version__
    except ImportError:
        info["numba"] = None
    try:
        from threadpoolctl import threadpool_info
        info["blas"] = [{k: d.get(k) for k in ("internal_api", "version", "architecture",
                                                "num_threads", "threading_layer")}
                        for d in threadpool_info() if d.get("user_api") == "blas"]
    except ImportError:
        cfg = np.show_config(mode="dicts")["Build Dependencies"]["blas"]
        info["blas"] = [{"name": cfg.get("name"), "version": cfg.get("version"),
                         "architecture": "unknown (install threadpoolctl to see the kernel)"}]
    return info


# ----------------------------------------------------------------------------- processes
ROOT = Path(__file__).resolve().parents[1]
#: targets of whole processes, warm (seconds; the stream: snapshots/s and MB)
P_TARGETS = {"help_seconds": 0.3, "check_seconds": 0.5, "compare_seconds": 2.0,
             "size_speedup": 20.0, "stream_rate": 3_000_000, "stream_peak_mb": 300}


#: GNU time reports its child's peak resident memory; the child of a fork of this
#: (large) process would carry this process's high-water mark in its own ru_maxrss
_GNU_TIME = "/usr/bin/time"


def run_process(args: list, env: dict | None = None) -> dict:
    """Run one command as a new process from the repository's top folder: wall seconds,
    the process's peak resident memory (through GNU time's ``%M`` when present, else the
    ``ru_maxrss`` of ``wait4``, an upper bound) and the exit code. The command's output
    is discarded (kept in ``tail`` when it fails)."""
    full = dict(os.environ, **(env or {}))
    with tempfile.TemporaryFile() as out, tempfile.NamedTemporaryFile("r") as mem:
        timed = os.access(_GNU_TIME, os.X_OK)
        cmd = ([_GNU_TIME, "-f", "%M", "-o", mem.name] if timed else []) + list(args)
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, cwd=ROOT, env=full, stdout=out, stderr=subprocess.STDOUT)
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - t0
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        tail = out.read()[-2000:].decode(errors="replace") if proc.returncode else ""
        words = mem.read().split() if timed else []
    kb = float(words[-1]) if words and words[-1].isdigit() else usage.ru_maxrss
    rec = {"seconds": seconds, "maxrss_mb": kb / 1024.0, "returncode": proc.returncode,
           "memory_from": "GNU time" if words else "wait4 (upper bound)"}
    if tail:
        rec["tail"] = tail
    return rec


def _adapt(*words) -> list:
    return [sys.executable, "-m", "adapt", *words]


#: the plain script runs on one core, as every reference here does (and its BLAS on
#: one thread: on a shared 2-core machine, BLAS threads waiting for each other over
#: 16 x 16 products made it many times slower, which would flatter adapt)
_ONE_CORE = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def _plain_w1_process(trials: int) -> dict:
    """The W1 reference (:func:`w1_reference`, numpy only, no adapt) as a process of its
    own, for ``trials`` trials, on one core."""
    return run_process([sys.executable, str(Path(__file__).resolve()), "--plain-w1",
                        str(trials)], _ONE_CORE)


def process_commands(z: dict, folder: Path) -> dict:
    """The commands timed as whole processes: name -> argument list."""
    from adapt.scenefile import dump_scene
    size_scene = folder / "w1.yaml"
    sc = scene(int(z["p_size_trials"]), W1_CHECKPOINTS[-1])
    size_scene.write_text(dump_scene(sc))
    out = str(folder / "runs")
    checkpoints = ",".join(str(k) for k in W1_CHECKPOINTS)
    return {
        "help": _adapt("--help"),
        "check": _adapt("check", "scenes/jammer_rich.yaml"),
        "compare": _adapt("compare", "scenes/jammer_rich.yaml", "--no-progress", "--out", out),
        "size": _adapt("size", str(size_scene), "-p", "smi", "-p", "smi loading_db=10",
                       "--snapshots", checkpoints, "--no-progress", "--out", out),
        "stream": _adapt("compare", "scenes/jammer_rich.yaml", "-p", "nlms", "--trials", "1",
                         "--snapshots", str(int(z["p_stream_snapshots"])), "--no-progress",
                         "--out", out),
    }


def processes(z: dict, say=print) -> dict:
    """Whole processes, side by side in one run: cold (the first run after numba's cache
    is emptied: a fresh ``NUMBA_CACHE_DIR``, so every kernel compiles) and warm (the
    fastest of the runs after it, cache filled), and the plain numpy W1 script as a
    process (its fastest of two runs, one before and one after adapt's)."""
    out = {"cold": {}, "warm": {}}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        cmds = process_commands(z, folder)
        env = {"NUMBA_CACHE_DIR": str(folder / "numba-cache")}
        plain = [_plain_w1_process(int(z["p_size_trials"]))]
        for name, args in cmds.items():
            out["cold"][name] = run_process(args, env)
        for name, args in cmds.items():
            repeats = 1 if name == "stream" else 3
            out["warm"][name] = _fastest([run_process(args, env) for _ in range(repeats)])
        plain.append(_plain_w1_process(int(z["p_size_trials"])))
    out["plain_w1"] = _fastest(plain)
    for phase in ("cold", "warm"):
        rec = out[phase]
        rec["size_speedup"] = out["plain_w1"]["seconds"] / rec["size"]["seconds"]
        rec["stream_rate"] = z["p_stream_snapshots"] / rec["stream"]["seconds"]
    w = out["warm"]
    out["targets"] = {
        "p_help_0.3s": w["help"]["seconds"] <= P_TARGETS["help_seconds"],
        "p_check_0.5s": w["check"]["seconds"] <= P_TARGETS["check_seconds"],
        "p_compare_2s": w["compare"]["seconds"] <= P_TARGETS["compare_seconds"],
        "p_size_20x_plain": w["size_speedup"] >= P_TARGETS["size_speedup"],
        "p_stream_3M_per_s": w["stream_rate"] >= P_TARGETS["stream_rate"],
        "p_stream_under_300mb": w["stream"]["maxrss_mb"] < P_TARGETS["stream_peak_mb"],
    }
    bad = {f"{phase} {name}": r.get("tail", "") for phase in ("cold", "warm")
           for name, r in out[phase].items() if isinstance(r, dict) and r.get("returncode")}
    if bad:
        raise RuntimeError("commands failed:\n" + "\n".join(f"{k}: {v}" for k, v in bad.items()))
    return out


def _run_p(z: dict, out: dict, say) -> None:
    say(f"\nP whole processes (python -m adapt ..., from the repository's top folder; "
        f"size: W1's scene at {z['p_size_trials']:,} trials, default settings; stream: "
        f"{z['p_stream_snapshots']:,} snapshots of NLMS through compare)")
    p = processes(z, say)
    out["processes"] = p
    say(f"  {'command':10s} {'cold s':>8s} {'warm s':>8s} {'warm MB':>8s}  target (warm)")
    notes = {"help": f"<= {P_TARGETS['help_seconds']} s {_verdict(p['targets']['p_help_0.3s'])}",
             "check": f"<= {P_TARGETS['check_seconds']} s "
                      f"{_verdict(p['targets']['p_check_0.5s'])}",
             "compare": f"<= {P_TARGETS['compare_seconds']} s "
                        f"{_verdict(p['targets']['p_compare_2s'])}",
             "size": f"{p['warm']['size_speedup']:.1f}x the plain script (cold "
                     f"{p['cold']['size_speedup']:.1f}x); >= 20x "
                     f"{_verdict(p['targets']['p_size_20x_plain'])}",
             "stream": f"{p['warm']['stream_rate'] / 1e6:.2f} M snapshots/s (cold "
                       f"{p['cold']['stream_rate'] / 1e6:.2f}); >= 3 M/s "
                       f"{_verdict(p['targets']['p_stream_3M_per_s'])}; peak "
                       f"{p['warm']['stream']['maxrss_mb']:.0f} MB < 300 MB "
                       f"{_verdict(p['targets']['p_stream_under_300mb'])}"}
    for name in ("help", "check", "compare", "size", "stream"):
        say(f"  {name:10s} {p['cold'][name]['seconds']:8.2f} {p['warm'][name]['seconds']:8.2f} "
            f"{p['warm'][name]['maxrss_mb']:8.0f}  {notes[name]}")
    say(f"  {'plain W1':10s} {'':8s} {p['plain_w1']['seconds']:8.2f} "
        f"{p['plain_w1']['maxrss_mb']:8.0f}  numpy script, one process, same trials")
    out["targets"].update(p["targets"])


# ----------------------------------------------------------------------------- sweep
#: the design study timed against a shell loop of ``adapt compare`` over its points
SWEEP_STUDY = "scenes/study_jammer_walk.yaml"


def sweep_against_loop(trials: int | None = None) -> dict:
    """``adapt sweep`` of :data:`SWEEP_STUDY` as one process against the same points run
    as a loop of ``adapt compare`` processes (one scene file per point, written from the
    study's own point scenes), warm (kernels cached), fastest of two each. The loop also
    draws every point's figures and pattern scores, which a sweep leaves out: the ratio
    is what a user saves, not a like-for-like compute ratio."""
    from adapt.scenefile import dump_scene
    from adapt.studies.sweep import prepare
    extra = [] if trials is None else ["--trials", str(trials)]
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        study = prepare(str(ROOT / SWEEP_STUDY), [], trials=trials)
        files = []
        for i, (_, sc, procs) in enumerate(study.points):
            f = folder / f"point-{i:03d}.yaml"
            f.write_text(dump_scene(sc.with_overrides(processors=[p.spec() for p in procs])))
            files.append(f)
        out = str(folder / "runs")
        run_process(_adapt("sweep", SWEEP_STUDY, "--no-progress", "--out", out, *extra))
        sweeps, loops = [], []
        for _ in range(2):
            sweeps.append(run_process(_adapt("sweep", SWEEP_STUDY, "--no-progress",
                                             "--out", out, *extra)))
            t0 = time.perf_counter()
            for f in files:
                r = run_process(_adapt("compare", str(f), "--no-progress", "--out", out))
                if r["returncode"]:
                    raise RuntimeError(f"compare {f.name} failed: {r.get('tail')}")
            loops.append({"seconds": time.perf_counter() - t0})
    best_sweep, best_loop = _fastest(sweeps), _fastest(loops)
    return {"points": len(files), "sweep": best_sweep, "loop_seconds": best_loop["seconds"],
            "ratio": best_loop["seconds"] / best_sweep["seconds"]}


def _run_s(z: dict, out: dict, say) -> None:
    trials = 10 if z.get("quick") else None
    s = sweep_against_loop(trials)
    out["sweep"] = s
    say(f"\nS design study ({SWEEP_STUDY}, {s['points']} points): adapt sweep "
        f"{s['sweep']['seconds']:.2f} s (peak {s['sweep']['maxrss_mb']:.0f} MB) against a "
        f"loop of {s['points']} adapt compare processes {s['loop_seconds']:.2f} s: "
        f"{s['ratio']:.1f}x; a sweep costs no more than the loop "
        f"{_verdict(s['ratio'] >= 1.0)}")
    out["targets"]["s_sweep_not_slower_than_loop"] = s["ratio"] >= 1.0


# ----------------------------------------------------------------------------- driver
def _verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


WORKLOADS = ("W1", "W2", "W3", "P", "S")
#: the workloads timed inside this process (the default of :func:`run`; the command
#: line runs P, the whole processes, too)
IN_PROCESS = ("W1", "W2", "W3")


def run(quick: bool = False, sizes: dict | None = None, say=print,
        only: tuple = IN_PROCESS, threads: int | None = None) -> dict:
    """Run the workloads in ``only`` (default W1-W3) with the product and the floors on
    ``threads`` threads (default: every usable core, the product's default); returns the
    figures (also printed through ``say``)."""
    from adapt.numerics import kernels as _kernels
    only = tuple(w.upper() for w in only)
    bad = [w for w in only if w not in WORKLOADS]
    if bad:
        raise ValueError(f"unknown workloads {bad}; choose from {', '.join(WORKLOADS)}")
    z = dict(QUICK if quick else FULL)
    if sizes:
        z.update(sizes)
    threads = usable_cores() if threads is None else int(threads)
    if threads < 1:
        raise ValueError(f"threads must be >= 1, got {threads}")
    z["threads"] = threads
    out = {"mode": "quick" if quick else "full", "sizes": z, "machine": machine()}
    out["machine"]["core_scaling"] = core_scaling(500_000 if quick else 5_000_000)
    say(f"machine: {out['machine']}")
    say(f"cores delivered (plain Python, one process per core, against one alone): "
        f"{out['machine']['core_scaling']:.2f} of {usable_cores()}")
    say(f"sizes: {z} (product and floors on {threads} thread(s); the references on one, "
        "as a hand-written script runs)")

    # kernels: compile from scratch (subprocess), then load for this process
    out["kernels_compiled"] = _kernels.compiled()
    out["kernel_compile_seconds"] = kernel_compile_seconds() if not quick else None
    out["kernel_load_seconds"] = _kernels.warm_up()
    say(f"kernels: compiled={out['kernels_compiled']} compile from scratch "
        f"{out['kernel_compile_seconds']} s, load {out['kernel_load_seconds']:.2f} s "
        "(not included in the timings below)")

    out["workloads"] = list(only)
    out["targets"] = {}
    if "W1" in only:
        _run_w1(z, out, say)
    if "W2" in only:
        _run_w2(z, out, say)
    if "W3" in only:
        _run_w3(z, out, say)
    if "P" in only:
        _run_p(z, out, say)
    if "S" in only:
        _run_s(dict(z, quick=quick), out, say)
    say("\ntargets: " + ", ".join(f"{k} {_verdict(v)}" for k, v in out["targets"].items()))
    return out


def _run_w1(z: dict, out: dict, say) -> None:
    t1, th = z["w1_trials"], z["threads"]
    # the drawn-covariance product lasts a tenth of a second: its repeats are spread
    # over the references' seconds (before, between and after them), so that a few
    # seconds of other load on the shared machine cannot catch all of them
    runs = {"cov": [], "cov1": [], "ref": []}
    for i in range(3):
        runs["cov"] += [w1_product(t1, "covariance", th) for _ in range(3)]
        runs["cov1"].append(w1_product(t1, "covariance", 1))
        if i < 2:
            runs["ref"].append(w1_reference(t1))
    w1 = {"product_covariance": _fastest(runs["cov"]),
          "product_covariance_1thread": _fastest(runs["cov1"]),
          "product_samples": _best(w1_product, 2, t1, "samples", th),
          "reference": _fastest(runs["ref"]), "floor": _best(w1_floor, 2, t1, 128, th),
          "floor_1thread": _best(w1_floor, 2, t1, 128, 1)}
    ref1 = w1["reference"]["seconds"]
    w1["speedup"] = ref1 / w1["product_covariance"]["seconds"]
    w1["speedup_1thread"] = ref1 / w1["product_covariance_1thread"]["seconds"]
    w1["speedup_samples"] = ref1 / w1["product_samples"]["seconds"]
    w1["reference_over_floor"] = ref1 / w1["floor"]["seconds"]
    w1["over_floor"] = w1["product_covariance"]["seconds"] / w1["floor"]["seconds"]
    w1["samples_over_floor"] = w1["product_samples"]["seconds"] / w1["floor"]["seconds"]
    w1["target_speedup_met"] = w1["speedup"] >= 20
    out["w1"] = w1
    say(f"\nW1 sizing ({t1} trials, checkpoints {W1_CHECKPOINTS[0]}..{W1_CHECKPOINTS[-1]}, "
        f"smi and smi loading_db=10; product and floor on {th} thread(s))")
    say(f"  product draw=covariance  {w1['product_covariance']['seconds']:9.3f} s "
        f"(1 thread {w1['product_covariance_1thread']['seconds']:.3f} s)")
    say(f"  product draw=samples     {w1['product_samples']['seconds']:9.3f} s")
    say(f"  reference (per trial)    {ref1:9.3f} s  (median trial x {t1}: "
        f"{w1['reference']['robust_seconds']:.3f} s)")
    say(f"  floor (draws+accumulate+solve) {w1['floor']['seconds']:9.3f} s "
        f"(1 thread {w1['floor_1thread']['seconds']:.3f} s)")
    say(f"  speedup covariance {w1['speedup']:.1f}x (1 thread {w1['speedup_1thread']:.1f}x), "
        f"samples {w1['speedup_samples']:.1f}x; product/floor covariance "
        f"{w1['over_floor']:.2f}, samples {w1['samples_over_floor']:.2f}; reference/floor "
        f"{w1['reference_over_floor']:.2f}")
    for label in ("smi", "smi loading_db=10"):
        say(f"  mean rho {label:18s} covariance "
            + " ".join(f"{v:.3f}" for v in w1["product_covariance"]["mean_rho"][label])
            + " | reference " + " ".join(f"{v:.3f}" for v in w1["reference"]["mean_rho"][label]))
    say(f"  target >= 20x reference: {_verdict(w1['target_speedup_met'])}")
    out["targets"]["w1_speedup_20x"] = w1["target_speedup_met"]


def _run_w2(z: dict, out: dict, say) -> None:
    t2, k2, tr, th = z["w2_trials"], z["w2_snapshots"], z["w2_reference_trials"], z["threads"]
    from adapt.numerics import kernels as _kernels
    compiled = _kernels.compiled()         # else adapt's kernels cannot serve as a floor
    w2 = {"draws": _best(w2_floor, 2, t2, k2, None, th), "processors": {}}
    say(f"\nW2 recursive ({t2} trials x {k2} snapshots; product and floor on {th} "
        f"thread(s)); reference timed on {tr} trials and scaled x{t2 / tr:g}")
    say(f"  random draws alone        {w2['draws']['seconds']:9.3f} s")
    for spec in W2_SPECS:
        loop = _best(w2_floor, 2, t2, k2, spec, th)
        loop1 = _best(w2_floor, 2, t2, k2, spec, 1)
        kern = _best(w2_floor_kernels, 2, t2, k2, spec, th) if compiled else None
        kern1 = _best(w2_floor_kernels, 2, t2, k2, spec, 1) if compiled else None
        # the floor: the faster way of doing the unavoidable work in this run
        fl = min([loop] + ([kern] if kern else []), key=lambda r: r["seconds"])
        fl1 = min([loop1] + ([kern1] if kern1 else []), key=lambda r: r["seconds"])
        floor, floor1 = fl["seconds"], fl1["seconds"]
        # reference repeats (a tenth of a second each) spread around the product's runs
        refs, prods = [w2_reference(tr, k2, spec)], []
        for _ in range(2):
            prods.append(w2_product(t2, k2, [spec], th))
            refs.append(w2_reference(tr, k2, spec))
        prod, ref = _fastest(prods), _fastest(refs)
        prod1 = w2_product(t2, k2, [spec], 1)
        ref_scaled = ref["seconds"] * t2 / tr
        rec = {"floor": fl, "floor_1thread": fl1, "floor_loop": loop, "floor_loop_1thread": loop1,
               "floor_kernels": kern, "floor_kernels_1thread": kern1,
               "product": prod, "product_1thread": prod1, "reference_measured": ref,
               "reference_scaled_seconds": ref_scaled,
               "speedup": ref_scaled / prod["seconds"],
               "speedup_1thread": ref_scaled / prod1["seconds"],
               "over_floor": prod["seconds"] / floor,
               "over_floor_1thread": prod1["seconds"] / floor1,
               "reference_over_floor": ref_scaled / floor}
        rec["target_speedup_met"] = rec["speedup"] >= 20
        rec["target_floor_met"] = rec["over_floor"] <= 2
        w2["processors"][spec] = rec
        say(f"  {spec:5s} product {prod['seconds']:7.3f} s (1 thread {prod1['seconds']:.3f} s; "
            f"processor's own {prod['processor_seconds'][spec]:.3f} s) | reference "
            f"{ref_scaled:7.1f} s (measured {ref['seconds']:.2f} s) | speedup "
            f"{rec['speedup']:5.1f}x {_verdict(rec['target_speedup_met'])} (1 thread "
            f"{rec['speedup_1thread']:.1f}x) | floor {floor:.3f} s (1 thread {floor1:.3f} s; "
            f"plain loop {loop['seconds']:.3f} s{'' if loop['recursion'] else ' draws only'}, "
            f"adapt's kernels alone {kern['seconds'] if kern else float('nan'):.3f} s) | "
            f"product/floor {rec['over_floor']:.2f} "
            f"{_verdict(rec['target_floor_met'])} (1 thread {rec['over_floor_1thread']:.2f}) "
            f"| reference/floor {rec['reference_over_floor']:.1f}")
    both = w2_product(t2, k2, W2_SPECS, th)
    w2["all_three"] = both
    say(f"  all three on one stream {both['seconds']:8.3f} s, processors' own "
        + ", ".join(f"{k} {v:.2f} s" for k, v in both["processor_seconds"].items()))
    out["w2"] = w2
    out["targets"].update(
        {**{f"w2_{s}_speedup_20x": w2["processors"][s]["target_speedup_met"] for s in W2_SPECS},
         **{f"w2_{s}_within_2x_floor": w2["processors"][s]["target_floor_met"] for s in W2_SPECS}})


def _run_w3(z: dict, out: dict, say) -> None:
    k3, b3 = z["w3_snapshots"], z["w3_block"]
    say(f"\nW3 long stream (1 trial x {k3:,} snapshots, blocks of {b3})")
    w3 = {"nlms": _best(w3_run, 2, k3, ["nlms"], b3), "smi_sliding": w3_run(k3, [W3_SMI], b3)}
    w3["both_traced"] = w3_run(k3, ["nlms", W3_SMI], b3, trace=True)
    w3["peak_mb"] = w3["both_traced"]["tracemalloc_peak_mb"]
    w3["target_memory_met"] = w3["peak_mb"] < 300
    w3["target_rate_met"] = w3["nlms"]["snapshots_per_second"] >= 1_000_000
    out["w3"] = w3
    say(f"  nlms          {w3['nlms']['seconds']:8.2f} s  "
        f"{w3['nlms']['snapshots_per_second']:12,.0f} snapshots/s "
        f"{_verdict(w3['target_rate_met'])} (target 1,000,000)")
    say(f"  sliding SMI   {w3['smi_sliding']['seconds']:8.2f} s  "
        f"{w3['smi_sliding']['snapshots_per_second']:12,.0f} snapshots/s ({W3_SMI})")
    say(f"  both, traced  {w3['both_traced']['seconds']:8.2f} s  peak traced memory "
        f"{w3['peak_mb']:.1f} MB {_verdict(w3['target_memory_met'])} (target < 300 MB); "
        f"process maxrss {w3['both_traced']['maxrss_mb']:.0f} MB")

    out["targets"].update({"w3_peak_under_300mb": w3["target_memory_met"],
                           "w3_nlms_1M_per_s": w3["target_rate_met"]})


# ----------------------------------------------------------------------------- W4
W4_TAPS = 5
W4_SPECS = (f"smi taps={W4_TAPS} loading_db=10", f"nlms taps={W4_TAPS} step=0.2")
W4_FULL = {"w4_trials": 2000, "w4_snapshots": 4096, "w4_reference_trials": 4,
           "w4_stream_snapshots": 10_000_000}
W4_QUICK = {"w4_trials": 50, "w4_snapshots": 1024, "w4_reference_trials": 2,
            "w4_stream_snapshots": 500_000}
W4_JAMMERS = (-35.0, 20.0, 50.0)
W4_BANDWIDTH = 0.2
#: the 10M-snapshot wideband stream: a whole process, peak resident memory target (MB)
W4_STREAM_SPEC = f"nlms taps={W4_TAPS} step=0.2"
W4_STREAM_PEAK_MB = 300


def w4_scene(trials: int, snapshots: int):
    """The wideband benchmark scene: 16-element line, fractional bandwidth 0.2, three
    40 dB noise jammers filling the band, the wanted source broadside at 0 dB."""
    from adapt.scenefile import parse_scene
    sources = [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0}]
    sources += [{"name": f"jam-{i + 1}", "role": "interferer", "azimuth": az,
                 "power_db": JAMMER_DB} for i, az in enumerate(W4_JAMMERS)]
    return parse_scene({"name": "wideband benchmark",
                        "array": {"layout": "line", "elements": N, "spacing": 0.5},
                        "receiver": {"fractional_bandwidth": W4_BANDWIDTH},
                        "sources": sources, "snapshots": snapshots, "trials": trials,
                        "seed": SEED})


def _w4_checkpoints(snapshots: int) -> list:
    return sorted({int(k) for k in np.geomspace(1, snapshots, 13).round()})


def w4_product(trials: int, snapshots: int, spec: str, threads: int | None = None) -> dict:
    """One space-time processor through adapt's evaluate, scored at 13 checkpoints."""
    from adapt.engine.execute import run_trials as evaluate
    from adapt.processors import parse_specs
    sc = w4_scene(trials, snapshots)
    seconds, ev = _timed(evaluate, sc, parse_specs([spec]), _w4_checkpoints(snapshots),
                         tail=0, threads=threads)
    return {"seconds": seconds, "processor_seconds": ev.processors[0].seconds,
            "final_mean_rho": float(np.nanmean(ev.processors[0].normalised[:, -1]))}


def w4_floor(trials: int, snapshots: int, spec: str, threads: int = 1,
             group: int = 167) -> dict:
    """The unavoidable work with the same libraries, on ``threads`` threads (trials
    split evenly, in groups of ``group``, blocks of the engine's size): the wideband
    stream (adapt's generator: its filters are the model; the data and the training
    both, as the scene defines them) and the bare computation by adapt's own parts
    called directly, without the engine, the processor adapter, scores or measured
    SINR: for SMI the stacked sums from the lag sums at the 13 checkpoints and one
    loaded Cholesky solve each (``LaggedSums``, the compiled solve), for NLMS the
    recursion on the stacked regressors read in place (``lms_block`` with ``taps``)."""
    from adapt.engine.plan import block_size
    from adapt.numerics import kernels as _kernels
    from adapt.processors._covariance import LaggedSums
    from adapt.streams.snapshots import TrialBatch
    taps, dim = W4_TAPS, N * W4_TAPS
    cps = np.array(_w4_checkpoints(snapshots))
    look = np.zeros(dim, complex)
    look[(taps - 1) // 2 * N:((taps - 1) // 2 + 1) * N] = 1.0
    blk = block_size(N, snapshots)
    smi = spec.startswith("smi")

    def work(first: int, last: int) -> None:
        for lo in range(first, last, group):
            g_ = min(group, last - lo)
            batch = TrialBatch(w4_scene(g_, snapshots), first_trial=lo)
            sums = LaggedSums(g_, N, taps)
            wc = np.broadcast_to(np.conj(look) / N, (g_, dim)).copy()
            data_hist = np.zeros((g_, taps - 1, N), complex)
            ref_hist = np.zeros((g_, (taps - 1) // 2), complex)
            for block in batch.blocks(snapshots, blk, recycle=True):
                inside = cps[(cps > block.start) & (cps <= block.stop)]
                if smi:
                    at = block.start
                    for c in inside:
                        s_ = sums.advance(block.training[:, at - block.start:c - block.start],
                                          at, [c])
                        _kernels.cholesky_solve(s_, look[:, None], scale=np.array([[1 / c]]),
                                                load=np.full((g_, 1), 10.0))
                        at = int(c)
                    sums.advance(block.training[:, at - block.start:], at, [])
                    continue
                lined = np.concatenate([data_hist, block.data], axis=1)
                data_hist = lined[:, lined.shape[1] - (taps - 1):].copy()
                ref = np.concatenate([ref_hist, block.reference], axis=1)  # delayed by c
                ref_hist = ref[:, ref.shape[1] - ref_hist.shape[1]:].copy()
                _kernels.lms_block(wc, lined, inside - block.start - 1, gain=None,
                                   desired=ref[:, :block.size], step=0.2, eps=1e-6,
                                   taps=taps)

    t0 = time.perf_counter()
    _on_threads(work, trials, threads)
    return {"seconds": time.perf_counter() - t0, "threads": threads}


def _w4_truth(n, jam_filters, jam_steer, want_filters, want_steer, p_jam, taps):
    """True space-time covariances by hand: R[lN+n, mN+n'] = P a_n conj(a_n')
    sum_i h_n[i] conj(h_n'[i + l - m]) per source (white sequence through the filters
    h), plus the noise (identity) for the interference."""
    def source(h, a, p):
        m_ = h.shape[1]
        lags = [h[:, :m_ - q] @ np.conj(h[:, q:]).T for q in range(taps)]
        r = np.empty((n * taps, n * taps), complex)
        for l_ in range(taps):
            for m in range(taps):
                q = l_ - m
                r[l_ * n:(l_ + 1) * n, m * n:(m + 1) * n] = \
                    lags[q] if q >= 0 else np.conj(lags[-q]).T
        st = np.tile(a, taps)
        return p * r * st[:, None] * np.conj(st)[None, :]
    r_in = np.eye(n * taps, dtype=complex)
    for h, a in zip(jam_filters, jam_steer):
        r_in += source(h, a, p_jam)
    r_s = source(want_filters, want_steer, 1.0)
    c = np.linalg.cholesky(r_in)
    x = np.linalg.solve(c, r_s)
    y = np.linalg.solve(c, np.conj(x).T)
    opt = np.linalg.eigvalsh(0.5 * (y + np.conj(y).T))[-1]
    return r_in, r_s, opt


def w4_reference(trials: int, snapshots: int, spec: str) -> dict:
    """Plain numpy, trial by trial: the same wideband model written out (each source a
    white sequence through a windowed-sinc fractional delay per element, numpy's
    ``convolve``; the wanted source broadside, so one filtered sequence serves every
    element and is also the reference), stacked snapshots, then SMI (the stacked
    covariance accumulated between checkpoints, a loaded solve at each) or NLMS (a
    Python loop over snapshots, the reference delayed to the centre tap), each
    checkpoint's weight scored against the true space-time covariances (worked out by
    hand once, before the trials)."""
    from adapt.streams.wideband import filter_taps
    t0 = time.perf_counter()
    taps, dim = W4_TAPS, N * W4_TAPS
    n = np.arange(N)
    cps = _w4_checkpoints(snapshots)
    p_jam = 10 ** (JAMMER_DB / 10)
    pus = [0.5 * (n - (N - 1) / 2) * np.sin(np.deg2rad(az)) for az in W4_JAMMERS]
    jam_h = [filter_taps(W4_BANDWIDTH * pu, None, 0.0, 33) for pu in pus]     # (N, 67)
    jam_a = [np.exp(2j * np.pi * pu) for pu in pus]
    want_h = filter_taps(np.zeros(1), None, 0.0, 33)[0]                        # (67,)
    r_in, r_s, opt = _w4_truth(N, jam_h, jam_a, np.tile(want_h, (N, 1)), np.ones(N),
                               p_jam, taps)
    look = np.zeros(dim, complex)
    look[2 * N:3 * N] = 1.0
    rho = np.empty((trials, len(cps)))
    smi = spec.startswith("smi")
    for t in range(trials):
        rng = np.random.default_rng([SEED, 4, t])
        x = (rng.standard_normal((snapshots, N)) + 1j * rng.standard_normal((snapshots, N))) \
            * np.sqrt(0.5)
        for h, a in zip(jam_h, jam_a):
            s = (rng.standard_normal(snapshots + 66) + 1j * rng.standard_normal(snapshots + 66)) \
                * np.sqrt(0.5 * p_jam)
            for e in range(N):
                x[:, e] += a[e] * np.convolve(s, h[e], mode="valid")
        if not smi:                  # the wanted signal (training is interference only)
            s = (rng.standard_normal(snapshots + 66) + 1j * rng.standard_normal(snapshots + 66)) \
                * np.sqrt(0.5)
            d = np.convolve(s, want_h, mode="valid")
            x += d[:, None]
        z = np.zeros((snapshots, dim), complex)
        for l_ in range(taps):
            z[l_:, l_ * N:(l_ + 1) * N] = x[:snapshots - l_]
        weights = []
        if smi:
            r = np.zeros((dim, dim), complex)
            prev = 0
            for c in cps:
                r += z[prev:c].T @ np.conj(z[prev:c])
                prev = c
                weights.append(np.linalg.solve(r / c + 10 * np.eye(dim), look))
        else:
            w = look / dim           # adapt's quiescent start: the look vector / (N L)
            dd = np.concatenate([np.zeros(2, complex), d[:-2]])      # centre tap: 2 late
            marks = set(cps)
            for k in range(snapshots):
                u = z[k]
                e_ = dd[k] - np.vdot(w, u)
                w = w + 0.2 / (1e-6 + np.vdot(u, u).real) * u * np.conj(e_)
                if k + 1 in marks:
                    weights.append(w)
        w_ = np.array(weights)
        sinr = np.real(np.einsum("cn,nm,cm->c", np.conj(w_), r_s, w_)) \
            / np.real(np.einsum("cn,nm,cm->c", np.conj(w_), r_in, w_))
        rho[t] = sinr / opt
    return {"seconds": time.perf_counter() - t0, "trials": trials,
            "final_mean_rho": float(rho[:, -1].mean())}


def w4_reference_process(trials: int, snapshots: int, spec: str) -> dict:
    """:func:`w4_reference` in a process of its own on one core (its BLAS on one
    thread, as :func:`_plain_w1_process`: BLAS threads waiting for each other on a
    shared 2-core machine made it many times slower, which would flatter adapt); the
    time is measured inside the process (its start-up not included)."""
    out = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--plain-w4", spec,
                          str(int(trials)), str(int(snapshots))], cwd=ROOT,
                         env=dict(os.environ, **_ONE_CORE), capture_output=True, text=True,
                         check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def w4_stream(snapshots: int, folder: Path) -> dict:
    """A ``snapshots``-snapshot wideband stream (one trial of the W4 scene) of
    :data:`W4_STREAM_SPEC` through ``adapt compare``, as a process of its own (warm
    kernels): wall seconds and peak resident memory (:func:`run_process`)."""
    from adapt.scenefile import dump_scene
    scene_file = folder / "w4.yaml"
    scene_file.write_text(dump_scene(w4_scene(1, 4096)))
    rec = run_process(_adapt("compare", str(scene_file), "-p", W4_STREAM_SPEC, "--trials", "1",
                             "--snapshots", str(int(snapshots)), "--no-progress",
                             "--out", str(folder / "runs")))
    if rec["returncode"]:
        raise RuntimeError(f"the wideband stream failed: {rec.get('tail')}")
    rec["snapshots_per_second"] = snapshots / rec["seconds"]
    return rec


def run_w4(quick: bool = False, say=print, threads: int | None = None) -> dict:
    """W4, the wideband workload (16 elements, 5 taps, space-time SMI and NLMS):
    product and floor on ``threads`` threads (and on one), the plain per-trial
    reference on one core in a process of its own (a few trials, scaled; its repeats
    spread around the product's runs); targets 20x the reference and within 2x of the
    floor. Then the long wideband stream as a whole process: peak memory below 300 MB."""
    from adapt.numerics import kernels as _kernels
    z = dict(W4_QUICK if quick else W4_FULL)
    t4, k4, tr = z["w4_trials"], z["w4_snapshots"], z["w4_reference_trials"]
    th = usable_cores() if threads is None else int(threads)
    out = {"sizes": z, "threads": th, "processors": {},
           "kernel_load_seconds": _kernels.warm_up()}
    say(f"\nW4 wideband ({t4} trials x {k4} snapshots, {N} elements x {W4_TAPS} taps; "
        f"product and floor on {th} thread(s), 1 thread in brackets; reference on {tr} "
        f"trials, one thread, scaled x{t4 / tr:g})")
    for spec in W4_SPECS:
        refs, prods = [w4_reference_process(tr, k4, spec)], []
        for _ in range(2):
            prods.append(w4_product(t4, k4, spec, th))
            refs.append(w4_reference_process(tr, k4, spec))
        prod, ref = _fastest(prods), _fastest(refs)
        prod1 = w4_product(t4, k4, spec, 1)
        floor = _best(w4_floor, 2, t4, k4, spec, th)
        floor1 = w4_floor(t4, k4, spec, 1)
        ref_scaled = ref["seconds"] * t4 / tr
        rec = {"product": prod, "product_1thread": prod1, "floor": floor,
               "floor_1thread": floor1, "reference_measured": ref,
               "reference_scaled_seconds": ref_scaled,
               "speedup": ref_scaled / prod["seconds"],
               "speedup_1thread": ref_scaled / prod1["seconds"],
               "over_floor": prod["seconds"] / floor["seconds"],
               "over_floor_1thread": prod1["seconds"] / floor1["seconds"],
               "reference_over_floor": ref_scaled / floor["seconds"]}
        rec["target_speedup_met"] = rec["speedup"] >= 20
        rec["target_floor_met"] = rec["over_floor"] <= 2
        out["processors"][spec] = rec
        say(f"  {spec:24s} product {prod['seconds']:7.2f} s ({prod1['seconds']:.2f} s; "
            f"processor's own {prod['processor_seconds']:.2f} s) | reference "
            f"{ref_scaled:7.1f} s (measured {ref['seconds']:.2f} s) | speedup "
            f"{rec['speedup']:5.1f}x {_verdict(rec['target_speedup_met'])} "
            f"({rec['speedup_1thread']:.1f}x) | floor {floor['seconds']:.2f} s "
            f"({floor1['seconds']:.2f} s) | product/floor {rec['over_floor']:.2f} "
            f"{_verdict(rec['target_floor_met'])} ({rec['over_floor_1thread']:.2f}) | "
            f"reference/floor {rec['reference_over_floor']:.1f} | final mean rho "
            f"{prod['final_mean_rho']:.3f}, reference {ref['final_mean_rho']:.3f}")
    k_s = z["w4_stream_snapshots"]
    with tempfile.TemporaryDirectory() as tmp:
        stream = w4_stream(k_s, Path(tmp))
    stream["target_memory_met"] = stream["maxrss_mb"] < W4_STREAM_PEAK_MB
    out["stream"] = stream
    say(f"  stream: {k_s:,} snapshots of '{W4_STREAM_SPEC}' through adapt compare (one "
        f"process, 1 trial): {stream['seconds']:.1f} s, "
        f"{stream['snapshots_per_second'] / 1e6:.2f} M snapshots/s; peak "
        f"{stream['maxrss_mb']:.0f} MB ({stream['memory_from']}) < {W4_STREAM_PEAK_MB} MB "
        f"{_verdict(stream['target_memory_met'])}")
    out["targets"] = {
        **{f"w4_{s.split()[0]}_speedup_20x": r["target_speedup_met"]
           for s, r in out["processors"].items()},
        **{f"w4_{s.split()[0]}_within_2x_floor": r["target_floor_met"]
           for s, r in out["processors"].items()},
        "w4_stream_under_300mb": stream["target_memory_met"]}
    say("  targets: " + ", ".join(f"{k} {_verdict(v)}" for k, v in out["targets"].items()))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="adapt speed benchmark (see module docstring)")
    ap.add_argument("--quick", action="store_true", help="scaled-down smoke check")
    ap.add_argument("--json", default="runs/benchmark.json", help="where to write the figures")
    ap.add_argument("--only", action="append", choices=WORKLOADS, metavar="W",
                    help="run only this workload (W1, W2, W3, P or S; repeatable)")
    ap.add_argument("--threads", type=int, default=None,
                    help="threads for the product and the floors (default: every usable core)")
    ap.add_argument("--plain-w1", type=int, default=None, metavar="TRIALS",
                    help=argparse.SUPPRESS)     # the W1 reference as a process (P)
    ap.add_argument("--plain-w4", nargs=3, default=None, metavar=("SPEC", "TRIALS", "SNAPSHOTS"),
                    help=argparse.SUPPRESS)     # the W4 reference as a process
    ap.add_argument("--wideband", action="store_true",
                    help="run the wideband workload W4 alone (space-time SMI and NLMS)")
    args = ap.parse_args(argv)
    if args.plain_w1 is not None:
        print(json.dumps(w1_reference(args.plain_w1)["mean_rho"]))
        return 0
    if args.plain_w4 is not None:
        spec, trials, snapshots = args.plain_w4
        print(json.dumps(w4_reference(int(trials), int(snapshots), spec)))
        return 0
    if args.wideband:
        info = dict(machine(), core_scaling=core_scaling(500_000 if args.quick else 5_000_000),
                    load_average=list(os.getloadavg()))
        print(f"machine: {info}")
        figures = {"mode": "quick" if args.quick else "full", "machine": info,
                   "w4": run_w4(quick=args.quick, threads=args.threads)}
        figures["load_average_after"] = list(os.getloadavg())
        print(f"load average before {info['load_average']}, after "
              f"{figures['load_average_after']}")
    else:
        figures = run(quick=args.quick, only=tuple(args.only) if args.only else WORKLOADS,
                      threads=args.threads)
    path = Path(args.json)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(figures, indent=2, default=float))
    print(f"\nfigures written to {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
