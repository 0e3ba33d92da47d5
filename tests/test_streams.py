"""Seeded sample streams: powers, covariance convergence, reproducibility, hardware
errors, pulsing, motion, quantisation and bounded memory on long streams."""
from __future__ import annotations

import math
import tracemalloc

import numpy as np
import pytest

from adapt.scene import geometry
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch, quantise


def make_scene(sources=None, elements=8, **extra):
    """A line-array scene; the first source is the desired one unless given."""
    if sources is None:
        sources = [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0}]
    data = {"array": dict({"layout": "line", "elements": elements, "spacing": 0.5},
                          **extra.pop("array", {})),
            "sources": sources, "trials": 4, "snapshots": 512, "seed": 3}
    data.update(extra)
    return parse_scene(data)


WANTED = {"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0, "waveform": "qpsk"}


def test_noise_is_unit_power_circular():
    # noise: circular complex Gaussian, unit power per element, half in each rail;
    # |n|^2 is exponential with mean 1 and standard deviation 1 (scipy.stats.expon), so
    # the tolerance is 5 / sqrt(M)
    scene = make_scene(trials=10, snapshots=4000)
    noise = TrialBatch(scene).samples().interference
    m = noise.size
    assert np.mean(np.abs(noise) ** 2) == pytest.approx(1.0, abs=5 / math.sqrt(m))
    # each rail: variance 1/2; its square has std sqrt(2) * 1/2
    for rail in (noise.real, noise.imag):
        assert np.mean(rail ** 2) == pytest.approx(0.5, abs=5 * math.sqrt(0.5) / math.sqrt(m))
    # no pseudo-covariance (circularity): E[n^2] = 0, std of n^2 is 1
    assert abs(np.mean(noise ** 2)) < 5 / math.sqrt(m)
    # elements uncorrelated: E[n_0 n_1^*] = 0, std 1
    assert abs(np.mean(noise[..., 0] * np.conj(noise[..., 1]))) < 5 / math.sqrt(noise[..., 0].size)


@pytest.mark.parametrize("kind", ["bpsk", "qpsk", "tone", "chirp"])
def test_constant_envelope_waveforms_have_exact_power(kind):
    # bpsk, qpsk, tone and chirp have unit modulus, so the per-element power is exactly
    # 10^(power_db/10) on every snapshot (definition of the scene's power_db)
    wf = {"bpsk": "bpsk", "qpsk": "qpsk", "tone": {"kind": "tone", "frequency": 0.1},
          "chirp": {"kind": "chirp", "start": -0.3, "stop": 0.4, "period": 100}}[kind]
    scene = make_scene([dict(WANTED, power_db=13.0, waveform=wf)])
    blk = TrialBatch(scene).samples()
    np.testing.assert_allclose(np.abs(blk.signal) ** 2, 10 ** 1.3, rtol=1e-12)
    np.testing.assert_allclose(np.abs(blk.reference) ** 2, 10 ** 1.3, rtol=1e-12)


def test_symbol_alphabets_and_tone_frequency():
    # bpsk symbols are +-1, qpsk (+-1 +-j)/sqrt 2, each symbol equally likely
    # (binomial standard error); the tone advances 2 pi f per snapshot
    scene = make_scene([dict(WANTED, waveform="bpsk"),
                        {"name": "q", "role": "interferer", "azimuth": 40, "power_db": 0,
                         "waveform": "qpsk"}], trials=5, snapshots=4000)
    s = TrialBatch(scene).samples().reference
    assert set(np.unique(s.real)) == {-1.0, 1.0} and np.all(s.imag == 0)
    share = np.mean(s.real > 0)
    assert share == pytest.approx(0.5, abs=5 * 0.5 / math.sqrt(s.size))
    tone = make_scene([dict(WANTED, waveform={"kind": "tone", "frequency": -0.15})])
    r = TrialBatch(tone).samples().reference
    np.testing.assert_allclose(r[:, 1:] / r[:, :-1], np.exp(-2j * np.pi * 0.15), atol=1e-12)


def test_gaussian_source_power_realised():
    # a gaussian source of power P: |s|^2 exponential with mean P and std P
    # (scipy.stats.expon); tolerance 5 standard errors over independent snapshots
    scene = make_scene([dict(WANTED, power_db=20.0, waveform="gaussian")],
                       trials=10, snapshots=4000)
    ref = TrialBatch(scene).samples().reference
    assert np.mean(np.abs(ref) ** 2) == pytest.approx(100.0, abs=5 * 100 / math.sqrt(ref.size))


@pytest.mark.parametrize("kind", ["gaussian", "bpsk", "tone", "chirp"])
def test_jammer_power_realised(kind):
    # the jammer's part (difference with and without it; the noise is unchanged) has
    # per-element power 10^(power_db/10): exact for constant-envelope kinds, within
    # 5 standard errors (std P, scipy.stats.expon) for gaussian
    wf = {"gaussian": "gaussian", "bpsk": "bpsk", "tone": {"kind": "tone", "frequency": 0.2},
          "chirp": {"kind": "chirp"}}[kind]
    jam = {"name": "jam", "role": "interferer", "azimuth": 35, "power_db": 30, "waveform": wf}
    base = make_scene([WANTED], trials=6, snapshots=3000)
    with_jam = make_scene([WANTED, jam], trials=6, snapshots=3000)
    part = (TrialBatch(with_jam).samples().interference
            - TrialBatch(base).samples().interference)
    power = np.abs(part[..., 0]) ** 2
    if kind == "gaussian":
        assert np.mean(power) == pytest.approx(1000.0, abs=5 * 1000 / math.sqrt(power.size))
    else:
        np.testing.assert_allclose(np.abs(part) ** 2, 1000.0, rtol=1e-9)


def test_sample_covariance_converges_at_one_over_root_k():
    # For K independent circular complex Gaussian snapshots with covariance R, the sample
    # covariance R^ = (1/K) sum x x^H has E|R^_ij - R_ij|^2 = (1/K) Var(x_i x_j^*) and, by
    # Isserlis' theorem for circular data (E[x_i x_j] = 0),
    #   E[|x_i|^2 |x_j|^2] = R_ii R_jj + |R_ij|^2  =>  Var(x_i x_j^*) = R_ii R_jj,
    # so E||R^ - R||_F^2 = sum_ij R_ii R_jj / K = (tr R)^2 / K exactly (derived here).
    # Hence K ||R^ - R||_F^2 / (tr R)^2 has mean 1 for every K: the Frobenius error falls
    # as 1/sqrt(K). Tolerance: 5 standard errors from the trial-to-trial spread.
    jams = [{"name": f"j{i}", "role": "interferer", "azimuth": az, "power_db": p,
             "waveform": "gaussian"} for i, (az, p) in enumerate(((-40, 10), (25, 5)))]
    scene = make_scene([WANTED] + jams, elements=4, trials=150)
    batch = TrialBatch(scene)
    r_true = batch.covariance()                                 # (T, N, N)
    tr = np.trace(r_true, axis1=1, axis2=2).real
    scaled = {}
    for k in (100, 1000, 10000):
        acc = np.zeros_like(r_true)
        for blk in batch.blocks(k, block=2500):
            x = blk.training
            acc += np.einsum("tbi,tbj->tij", x, np.conj(x))
        err2 = np.sum(np.abs(acc / k - r_true) ** 2, axis=(1, 2))
        z = k * err2 / tr ** 2
        se = np.std(z, ddof=1) / math.sqrt(len(z))
        assert np.mean(z) == pytest.approx(1.0, abs=5 * se), k
        scaled[k] = math.sqrt(np.mean(err2)) * math.sqrt(k)
    # Frobenius error times sqrt(K) roughly constant across K (within 15 %)
    values = np.array(list(scaled.values()))
    assert values.max() / values.min() < 1.15


def rich_scene(moving: bool = True, **extra):
    """Every waveform kind, pulsing and hardware errors; ``moving``: one interferer
    moves (the step-by-step path), else every source is fixed and the snapshots are
    formed in one compiled pass when the kernels are on."""
    sources = [
        dict(WANTED, waveform={"kind": "chirp", "start": -0.2, "stop": 0.1, "period": 50}),
        {"name": "g", "role": "interferer", "azimuth": -30, "power_db": 20},
        {"name": "t", "role": "interferer", "azimuth": 50, "power_db": 25,
         "waveform": {"kind": "tone", "frequency": 0.07}, "pulsing": {"period": 20, "on": 7}},
        {"name": "m", "role": "interferer", "azimuth": 10, "power_db": 15, "waveform": "qpsk"},
        {"name": "b", "role": "interferer", "azimuth": -55, "power_db": 18, "waveform": "bpsk"},
    ]
    if moving:
        sources[3]["motion"] = {"azimuth_rate": 0.01}
    return make_scene(sources, array={"errors": {"gain_db_rms": 0.5, "phase_deg_rms": 4,
                                                 "position_rms": 0.02}}, **extra)


FIXED_WITH_ADC = dict(moving=False, receiver={"bits": 10, "full_scale_db": 35},
                      training="interference")


@pytest.mark.parametrize("kind", [{}, FIXED_WITH_ADC], ids=["moving", "fixed-adc"])
def test_recycled_blocks_hold_the_same_values(kind):
    # recycle=True (the engine's way: buffers overwritten block after block) gives the
    # same numbers as fresh arrays, block by block, including a short last block
    scene = rich_scene(trials=3, snapshots=301, **kind)
    for size in (7, 100):
        fresh = list(TrialBatch(scene).blocks(block=size))
        for b, r in zip(fresh, TrialBatch(scene).blocks(block=size, recycle=True)):
            for name in ("data", "signal", "training", "reference"):
                assert np.array_equal(getattr(b, name), getattr(r, name)), (size, name)
    plain = make_scene([WANTED, {"name": "j", "role": "interferer", "azimuth": 30,
                                 "power_db": 30}], trials=4, snapshots=130)
    blocks = TrialBatch(plain).blocks(block=50, recycle=True)
    first = next(blocks)
    kept = first.data.copy()
    second = next(blocks)
    assert np.shares_memory(first.data, second.data)          # really recycled
    assert not np.array_equal(first.data, kept)               # overwritten by the next
    assert np.array_equal(second.data, TrialBatch(plain).samples().data[:, 50:100])


def test_same_seed_same_samples_different_seed_different():
    scene = rich_scene(trials=3, snapshots=300)
    a = TrialBatch(scene).samples()
    b = TrialBatch(scene).samples()
    for name in ("data", "signal", "training", "reference"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    c = TrialBatch(scene, seed=scene.seed + 1).samples()
    assert not np.any(a.data == c.data)
    assert not np.array_equal(TrialBatch(scene).element_gains,
                              TrialBatch(scene, seed=scene.seed + 1).element_gains)


@pytest.mark.parametrize("kind", [{}, FIXED_WITH_ADC], ids=["moving", "fixed-adc"])
def test_trials_do_not_depend_on_the_batch(kind):
    # trial i is drawn from its own seed: trials 3..5 drawn alone equal rows 3..5 of a
    # 10-trial batch, bit for bit (hardware errors, phases, noise and waveforms)
    scene = rich_scene(trials=10, snapshots=200, **kind)
    whole = TrialBatch(scene).samples()
    part_batch = TrialBatch(scene, trials=3, first_trial=3)
    part = part_batch.samples()
    for name in ("data", "signal", "training", "reference"):
        assert np.array_equal(getattr(part, name), getattr(whole, name)[3:6])
    assert np.array_equal(part_batch.covariance(), TrialBatch(scene).covariance()[3:6])


@pytest.mark.parametrize("kind", [{}, FIXED_WITH_ADC], ids=["moving", "fixed-adc"])
def test_blocks_concatenate_bit_identically(kind):
    scene = rich_scene(trials=3, snapshots=301, **kind)
    once = TrialBatch(scene).samples()
    for size in (1, 7, 1000):
        blocks = list(TrialBatch(scene).blocks(block=size))
        assert [b.start for b in blocks] == list(range(0, 301, size))
        for name in ("data", "signal", "training", "reference"):
            joined = np.concatenate([getattr(b, name) for b in blocks], axis=1)
            assert np.array_equal(joined, getattr(once, name)), (size, name)


@pytest.mark.parametrize("kind", [{}, FIXED_WITH_ADC], ids=["moving", "fixed-adc"])
@pytest.mark.parametrize("threads", [2, 3])
def test_blocks_made_ahead_on_threads_are_the_blocks(kind, threads):
    # alternate blocks made by several threads (each filling its two buffer sets in
    # turn, a set reused only once the consumer has asked past its block): the same blocks, in order, bit for bit, for a consumer that is done with a
    # block before asking for the next, however slowly it works (here it dawdles on
    # every third block before reading it, so the producers fill their lanes and wait)
    import time
    scene = rich_scene(trials=2, snapshots=301, **kind)
    for size in (7, 100, 400):
        plain = list(TrialBatch(scene).blocks(block=size))
        seen = []
        for n, a in enumerate(TrialBatch(scene).blocks_on_threads(block=size,
                                                                   threads=threads)):
            b = plain[n]
            seen.append((a.start, a.stop))
            if n % 3 == 0:
                time.sleep(0.002)
            for name in ("data", "signal", "training", "reference"):
                assert np.array_equal(getattr(b, name), getattr(a, name)), (size, name)
        assert seen == [(b.start, b.stop) for b in plain]


def test_blocks_made_ahead_stop_with_their_consumer():
    import threading
    scene = rich_scene(trials=2, snapshots=5000)
    before = threading.active_count()
    it = TrialBatch(scene).blocks_on_threads(block=10, threads=2)
    next(it)
    next(it)
    it.close()                                  # the producers end, none left waiting
    assert threading.active_count() == before


def test_a_generation_error_reaches_the_consumer(monkeypatch):
    scene = rich_scene(trials=2, snapshots=300)
    batch = TrialBatch(scene)
    real = TrialBatch.blocks

    def failing(self, *args, first=0, every=1, **kw):
        for blk in real(self, *args, first=first, every=every, **kw):
            if blk.start >= 150:
                raise RuntimeError("generator broke")
            yield blk

    monkeypatch.setattr(TrialBatch, "blocks", failing)
    with pytest.raises(RuntimeError, match="generator broke"):
        list(batch.blocks_on_threads(block=50, threads=2))
    with pytest.raises(ValueError, match="first < every"):
        next(TrialBatch(scene).blocks(first=2, every=2))


@pytest.mark.parametrize("kind", [{}, FIXED_WITH_ADC], ids=["moving", "fixed-adc"])
def test_compiled_and_numpy_streams_agree(kind, monkeypatch):
    # the one-pass compiled formation (fixed sources) and the step-by-step path (moving)
    # against the pure numpy path: the same numbers to rounding, and the parts add up
    pytest.importorskip("numba")
    scene = rich_scene(trials=3, snapshots=257, **kind)
    got = {}
    for mode in ("numba", "numpy"):
        monkeypatch.setenv("ADAPT_KERNELS", mode)
        got[mode] = TrialBatch(scene).samples()
    a, b = got["numba"], got["numpy"]
    for name in ("data", "signal", "training", "reference"):
        x, y = getattr(a, name), getattr(b, name)
        assert np.max(np.abs(x - y)) <= 1e-12 * np.max(np.abs(y)), name
    if scene.receiver.bits is None:
        np.testing.assert_allclose(a.signal + a.interference, a.data, rtol=0, atol=1e-12)


def test_adding_a_jammer_leaves_noise_and_others_unchanged():
    # common random numbers: the noise and other sources' waveforms are keyed by name,
    # so adding a jammer adds exactly its own rank-one part sqrt(P) s(k) a
    jam = {"name": "new", "role": "interferer", "azimuth": -55, "power_db": 10,
           "waveform": "qpsk"}
    one = make_scene([WANTED, {"name": "old", "role": "interferer", "azimuth": 20,
                               "power_db": 20}], trials=3, snapshots=400)
    two = make_scene([WANTED, {"name": "old", "role": "interferer", "azimuth": 20,
                               "power_db": 20}, jam], trials=3, snapshots=400)
    a, b = TrialBatch(one).samples(), TrialBatch(two).samples()
    assert np.array_equal(a.signal, b.signal) and np.array_equal(a.reference, b.reference)
    extra = b.interference - a.interference
    steer = geometry.steering_vector(two.array.positions, -55.0)
    envelope = extra / steer                                       # same on every element
    np.testing.assert_allclose(envelope, envelope[..., :1].repeat(8, -1), atol=1e-9)
    np.testing.assert_allclose(np.abs(envelope), math.sqrt(10), rtol=1e-9)


def test_hardware_errors_realised():
    # per-element gain (dB) and phase (degrees) errors are zero-mean Gaussian with the
    # given rms; a sample standard deviation of M draws has standard error
    # sigma / sqrt(2 (M - 1)) (scipy.stats.chi); tolerance 5 standard errors
    scene = make_scene(elements=16, trials=500,
                       array={"errors": {"gain_db_rms": 0.8, "phase_deg_rms": 5,
                                         "position_rms": 0.03}})
    batch = TrialBatch(scene)
    g = batch.element_gains
    m = g.size
    gain_db = 20 * np.log10(np.abs(g))
    phase = np.degrees(np.angle(g))
    for values, sigma in ((gain_db, 0.8), (phase, 5.0)):
        assert np.std(values, ddof=1) == pytest.approx(sigma, abs=5 * sigma / math.sqrt(2 * (m - 1)))
        assert abs(np.mean(values)) < 5 * sigma / math.sqrt(m)
    dpos = batch.positions - scene.array.positions
    assert np.std(dpos[..., 0], ddof=1) == pytest.approx(0.03, abs=5 * 0.03 / math.sqrt(2 * (m - 1)))
    assert np.all(dpos[..., 1:] == 0)                   # a line is perturbed along x only
    # the received wanted signal carries the errors: signal / reference = true steering
    blk = batch.samples(50)
    np.testing.assert_allclose(blk.signal / blk.reference[..., None],
                               np.broadcast_to(batch.desired_steering()[:, None, :],
                                               blk.signal.shape), rtol=1e-10)


def test_pulsing_gates_the_jammer():
    # on at k when start <= k < stop and (k - start) mod period < on; exactly zero when off
    pulse = {"start": 5, "stop": 230, "period": 20, "on": 7}
    jam = {"name": "p", "role": "interferer", "azimuth": 30, "power_db": 20,
           "waveform": "gaussian", "pulsing": pulse}
    with_jam = make_scene([WANTED, jam], trials=2, snapshots=300)
    without = make_scene([WANTED], trials=2, snapshots=300)
    part = (TrialBatch(with_jam).samples().interference
            - TrialBatch(without).samples().interference)
    k = np.arange(300)
    on = (k >= 5) & (k < 230) & ((k - 5) % 20 < 7)
    assert np.all(part[:, ~on, :] == 0)
    assert np.all(np.abs(part[:, on, :]) > 0)
    # the true covariance follows the gate
    r = TrialBatch(with_jam).covariance(k)
    assert np.allclose(r[:, ~on], np.eye(8)) and not np.allclose(r[:, on], np.eye(8))


def test_motion_changes_the_covariance():
    # a jammer moving at 0.01 degrees per snapshot sits at az0 + 0.01 k at snapshot k:
    # the covariance of the moment equals that of a still jammer there
    moving = {"name": "m", "role": "interferer", "azimuth": 20, "power_db": 20,
              "motion": {"azimuth_rate": 0.01}}
    scene = make_scene([WANTED, moving], trials=2, snapshots=2000)
    r = TrialBatch(scene).covariance(np.array([0, 1500]))
    assert not np.allclose(r[:, 0], r[:, 1])
    still = make_scene([WANTED, dict(moving, azimuth=35.0, motion=None)], trials=2)
    np.testing.assert_allclose(r[:, 1], TrialBatch(still).covariance(), atol=1e-9)
    # and in the samples: the jammer's part at snapshot k lies along a(az0 + 0.01 k)
    base = make_scene([WANTED], trials=2, snapshots=2000)
    part = (TrialBatch(scene).samples().interference
            - TrialBatch(base).samples().interference)
    for k in (0, 700, 1999):
        a = geometry.steering_vector(scene.array.positions, 20 + 0.01 * k)
        env = part[:, k, :] / a
        np.testing.assert_allclose(env, env[:, :1].repeat(8, -1), atol=1e-9)


def test_quantiser_levels_and_clipping():
    # uniform mid-rise quantiser (common practice): 2^b levels per rail at (i + 1/2) step,
    # step = 2 FS / 2^b; inputs beyond full scale clip to the outer level; the error of
    # in-range inputs is at most step / 2
    rng = np.random.default_rng(0)
    x = (rng.standard_normal(20000) + 1j * rng.standard_normal(20000)) * 3.0
    bits, fs = 4, 5.0
    q = quantise(x, bits, fs)
    step = 2 * fs / 2 ** bits
    levels = np.unique(np.concatenate([q.real, q.imag]))
    assert len(levels) == 2 ** bits
    np.testing.assert_allclose(levels, (np.arange(2 ** bits) - 2 ** (bits - 1) + 0.5) * step)
    inside = (np.abs(x.real) < fs)
    assert np.all(np.abs(q.real - x.real)[inside] <= step / 2 + 1e-12)
    top = fs - step / 2
    assert np.all(q.real[x.real >= fs] == top) and np.all(q.real[x.real <= -fs] == -top)


def test_quantisation_noise_power():
    # a busy signal quantised with a fine step: error uniform on [-step/2, step/2] per
    # rail, power step^2 / 12 (Widrow's quantisation noise model; Widrow & Kollar,
    # Quantization Noise, 2008; from memory); tolerance 5 standard errors from the data
    # (the receiver model does not touch the random streams, so the same scene without
    # it gives the unquantised samples)
    adc = make_scene([WANTED], trials=4, snapshots=4000,
                     receiver={"bits": 8, "full_scale_db": 20})
    ideal = make_scene([WANTED], trials=4, snapshots=4000)
    quantised = TrialBatch(adc).samples().data
    exact = TrialBatch(ideal).samples().data
    assert np.max(np.abs(exact.real)) < 10.0                  # no clipping at 20 dB
    err = (quantised - exact).real.ravel()
    step = 2 * 10.0 / 2 ** 8
    assert np.max(np.abs(err)) <= step / 2 + 1e-12
    e2 = err ** 2
    assert np.mean(e2) == pytest.approx(step ** 2 / 12,
                                        abs=5 * np.std(e2) / math.sqrt(e2.size))
    assert len(np.unique(quantised.real)) <= 2 ** 8


def test_long_stream_bounded_memory():
    # A 10,000,000-snapshot, 16-element stream processed block by block (a conventional
    # beam's output power accumulated). Memory: the peak traced allocation is set by the
    # block, not the stream length (2,000,000 vs 200,000 snapshots), and stays < 60 MB.
    scene = make_scene([dict(WANTED, power_db=-10),
                        {"name": "j", "role": "interferer", "azimuth": 30, "power_db": 30}],
                       elements=16, trials=1)
    batch = TrialBatch(scene)
    w = scene.look_steering() / 16

    def run(snapshots):
        total, count = 0.0, 0
        for blk in batch.blocks(snapshots, block=16384):
            total += float(np.sum(np.abs(blk.data @ np.conj(w)) ** 2))
            count += blk.size
        return total / count, count

    peaks = {}
    for k in (200_000, 2_000_000):
        tracemalloc.start()
        run(k)
        peaks[k] = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    assert peaks[2_000_000] < 60e6
    assert peaks[2_000_000] <= 1.1 * peaks[200_000]
    power, count = run(10_000_000)
    assert count == 10_000_000
    # expected output power: w^H R w plus the wanted signal's P |w^H a|^2 = 0.1 (exact
    # for the scene; no hardware errors). The output is a sum of independent terms whose
    # std is at most their mean, so 5 standard errors are within 5 / sqrt(K) relative.
    expected = float(np.real(np.conj(w) @ batch.covariance()[0] @ w)) + 0.1
    assert power == pytest.approx(expected, rel=5 / math.sqrt(10_000_000))


def _numpy_envelope(batch, keys, i, start, size):
    # the numpy steps of an envelope: the waveform, its amplitude, its gate
    src = batch.scene.sources[i]
    env = batch._waveform(keys, i, start, size)
    env *= np.sqrt(src.power)
    if src.pulsing is not None:
        env *= src.active(np.arange(start, start + size))
    return env


@pytest.mark.parametrize("start,size", [(0, 300), (12345, 257), (10**9 + 3, 64)])
def test_compiled_envelopes_equal_the_numpy_steps_to_the_last_bit(start, size):
    # every waveform kind the one-pass kernel forms (gaussian, bpsk, qpsk, tone, chirp;
    # pulsed and not), against TrialBatch._waveform and the scalings of the numpy path:
    # identical values and zero signs, at any start (the chirp's period wraps)
    pytest.importorskip("numba")
    from adapt.numerics import kernels
    from adapt.streams import normals as nm
    from adapt.streams.snapshots import _component_key, _envelope_params
    sources = [
        dict(WANTED, waveform={"kind": "chirp", "start": -0.2, "stop": 0.1, "period": 50}),
        {"name": "g", "role": "interferer", "azimuth": -30, "power_db": 20},
        {"name": "t", "role": "interferer", "azimuth": 50, "power_db": 25,
         "waveform": {"kind": "tone", "frequency": -0.37}, "pulsing": {"period": 20, "on": 7}},
        {"name": "m", "role": "interferer", "azimuth": 10, "power_db": 15, "waveform": "qpsk"},
        {"name": "b", "role": "interferer", "azimuth": -55, "power_db": 18, "waveform": "bpsk",
         "pulsing": {"start": 40, "stop": 12400}},
        {"name": "w", "role": "interferer", "azimuth": 5, "power_db": 7,
         "waveform": "gaussian", "pulsing": {"period": 9, "on": 4, "start": 3}},
        {"name": "c2", "role": "interferer", "azimuth": -5, "power_db": -3,
         "waveform": {"kind": "chirp", "start": 0.3, "stop": -0.45, "period": 77}}]
    scene = make_scene(sources, trials=3)
    batch = TrialBatch(scene)
    keys = [nm.stream_keys(scene.seed, batch.trial_indices, 1, _component_key(src.name))
            for src in scene.sources]
    plan = kernels.EnvelopePlan(
        [k if s.waveform.kind in ("gaussian", "bpsk", "qpsk") else None
         for k, s in zip(keys, scene.sources)],
        [s.waveform.kind for s in scene.sources],
        [_envelope_params(s.waveform) for s in scene.sources], batch.start_phases,
        [np.sqrt(s.power) for s in scene.sources], [s.pulsing is not None for s in scene.sources])
    kk = np.arange(start, start + size)
    gates = np.array([s.active(kk) for s in scene.sources], dtype=float)
    out = np.full((3, size, len(scene.sources)), np.nan + 0j)
    kernels.envelopes_fill(plan, start, gates, out)
    kinds = set()
    for i, src in enumerate(scene.sources):
        want = _numpy_envelope(batch, keys[i], i, start, size)
        got = out[:, :, i]
        assert np.array_equal(np.ascontiguousarray(got).view(np.uint64),
                              np.ascontiguousarray(want).view(np.uint64)), src.name
        kinds.add(src.waveform.kind)
    assert kinds == set(kernels.ENVELOPE_KINDS)


def test_blocks_made_ahead_hold_to_their_memory_budget(monkeypatch):
    # the threads' buffer sets are held to AHEAD_BYTES: fewer threads for large blocks,
    # and blocks in sequence (no thread) when one thread's two sets would not fit; the
    # values are the same either way
    import threading

    from adapt.streams import snapshots as snap
    scene = rich_scene(trials=2, snapshots=600)
    batch = TrialBatch(scene)
    per_set = batch.block_bytes(100)
    plain = [b.data.copy() for b in TrialBatch(scene).blocks(block=100)]
    for budget, threads in ((10 * 2 * per_set, 3), (2 * 2 * per_set, 2), (2 * per_set - 1, 0)):
        monkeypatch.setattr(snap, "AHEAD_BYTES", budget)
        before = threading.active_count()
        seen = 0
        for n, blk in enumerate(batch.blocks_on_threads(block=100, threads=3)):
            if n == 0:
                seen = threading.active_count() - before
            assert np.array_equal(blk.data, plain[n])
        assert seen == threads, budget
