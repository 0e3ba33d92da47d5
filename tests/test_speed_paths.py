"""The speed paths: the drawn-covariance (complex-Wishart) fast path against the sample
path and the Reed-Mallett-Brennan law, its refusals and batch independence; the optional
compiled kernels against the pure numpy recursions (both ways); the benchmark's quick
mode on tiny sizes (no timing assertions)."""
from __future__ import annotations

import importlib.util
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import adapt.engine.scores  # noqa: F401  (import order: scores before evaluate)
from adapt.engine import drawn as wishart
from adapt.engine import execute
from adapt.engine.evaluate import evaluate_batch
from adapt.errors import InputError
from adapt.numerics import kernels as _kernels
from adapt.processors import Context, parse_specs, run_processors
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch

N = 4
WANTED = {"name": "s", "role": "desired", "azimuth": 0, "power_db": 0, "waveform": "qpsk"}
JAMMERS = [{"name": "j1", "role": "interferer", "azimuth": 40, "power_db": 20,
            "waveform": "gaussian"},
           {"name": "j2", "role": "interferer", "azimuth": -25, "power_db": 25,
            "waveform": "gaussian"}]
#: numba is an optional extra ('adapt[fast]'); without it the compiled paths must refuse
HAVE_NUMBA = importlib.util.find_spec("numba") is not None
#: KS p-values below this reject (a fixed-seed test: deterministic, never flaky)
ALPHA = 1e-3


def _scene(sources=None, **extra):
    data = {"name": "speed test", "array": {"layout": "line", "elements": N, "spacing": 0.5},
            "sources": sources or [WANTED, *JAMMERS], "snapshots": 64, "trials": 10,
            "seed": 5}
    data.update(extra)
    return parse_scene(data)


def _rho(scene, specs, checkpoints, trials, draw, seed=3, first=0):
    batch = TrialBatch(scene, trials=trials, seed=seed, first_trial=first)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ev = evaluate_batch(batch, parse_specs(specs), checkpoints, int(max(checkpoints)),
                            draw=draw)
    return ev


@pytest.fixture(scope="module")
def runs():
    sc = _scene()
    specs = ["smi", "smi loading_db=10", "smi window=sliding length=8"]
    cps = [2, 6, 12, 24]
    return {d: _rho(sc, specs, cps, 3000, d) for d in ("covariance", "samples")}


# ------------------------------------------------------------------ drawn covariance
def test_drawn_unloaded_smi_follows_rmb_beta(runs):
    # Reed, Mallett & Brennan 1974: rho ~ Beta(K - N + 2, N - 1) for Gaussian
    # interference-only training; checked by a one-sample KS test (scipy.stats.kstest)
    ev = runs["covariance"]
    smi = ev.by_label("smi").normalised
    for c, k in enumerate(ev.checkpoints):
        if k < N:
            continue
        p = stats.kstest(smi[:, c], stats.beta(k - N + 2, N - 1).cdf).pvalue
        assert p > ALPHA, (k, p)
    # the test has power: the law of a different K is rejected at these sample sizes
    c12 = list(ev.checkpoints).index(12)
    assert stats.kstest(smi[:, c12], stats.beta(12 - N + 4, N - 1).cdf).pvalue < ALPHA


def test_drawn_matches_sample_path_two_sample_ks(runs):
    # the drawn covariance is CW(K, R) exactly (Goodman 1963), so every processor's rho
    # has the sample path's distribution: two-sample KS (scipy.stats.ks_2samp), including
    # loaded SMI below N snapshots (rank-deficient Bartlett factor) and a sliding window
    cov, smp = runs["covariance"], runs["samples"]
    for label in ("smi", "smi loading_db=10", "smi window=sliding length=8"):
        a, b = cov.by_label(label).normalised, smp.by_label(label).normalised
        for c, k in enumerate(cov.checkpoints):
            if label == "smi" and k < N:
                continue          # min-norm weights: fine, but a tie-heavy law near 0
            p = stats.ks_2samp(a[:, c], b[:, c]).pvalue
            assert p > ALPHA, (label, k, p)


def test_drawn_sliding_window_is_rmb_of_its_length(runs):
    # RMB 1974 for a window of L = 8 snapshots at K = 24: Beta(L - N + 2, N - 1)
    ev = runs["covariance"]
    rho = ev.by_label("smi window=sliding length=8").normalised
    c24 = list(ev.checkpoints).index(24)
    assert stats.kstest(rho[:, c24], stats.beta(8 - N + 2, N - 1).cdf).pvalue > ALPHA


def test_drawn_path_has_no_samples_to_measure(runs):
    assert np.all(np.isnan(runs["covariance"].by_label("smi").measured_sinr))


def test_span_sums_mean_is_n_times_covariance():
    # Goodman 1963: E[W] = n R for W ~ CW_N(n, R); per entry the standard error is
    # sqrt(n R_ii R_jj / trials) (the variance of a complex Wishart entry)
    rng = np.random.default_rng(1)
    m = rng.standard_normal((3, 3)) + 1j * rng.standard_normal((3, 3))
    r = m @ m.conj().T + np.eye(3)
    trials = 4000
    streams = wishart.DrawStreams(9, range(trials))
    lengths = np.array([2, 7])                      # one span below N = 3, one above
    s = wishart.span_sums(np.broadcast_to(r, (trials, 3, 3)), streams, lengths)
    for i, n in enumerate(lengths):
        se = np.sqrt(n * np.outer(np.diag(r).real, np.diag(r).real) / trials)
        assert np.all(np.abs(s[:, i].mean(0) - n * r) < 5 * se), n
        assert np.linalg.matrix_rank(s[0, i]) == min(n, 3)


def test_drawn_results_do_not_depend_on_the_batch():
    # trial i draws only from SeedSequence(seed, spawn_key=(i, 2, ...)): trials 5..9 of a
    # batch of ten equal a batch holding those five alone
    sc = _scene()
    specs = ["smi", "smi loading_db=10", "smi window=sliding length=6"]
    whole = _rho(sc, specs, [3, 8, 20], 10, "covariance")
    part = _rho(sc, specs, [3, 8, 20], 5, "covariance", first=5)
    for a, b in zip(whole.processors, part.processors):
        np.testing.assert_array_equal(a.normalised[5:], b.normalised)


def test_data_free_processors_ride_along():
    ev = _rho(_scene(), ["optimum", "conventional", "smi"], [4, 16], 6, "covariance")
    np.testing.assert_allclose(ev.by_label("optimum").normalised, 1.0, rtol=1e-9)
    assert np.all(ev.by_label("conventional").normalised < 1.0)


@pytest.mark.parametrize("change, specs, words", [
    ({"sources": [WANTED, {**JAMMERS[0], "waveform": "bpsk"}]}, ["smi"], "not Gaussian"),
    ({"sources": [WANTED, {**JAMMERS[0], "pulsing": {"start": 10}}]}, ["smi"], "stationary"),
    ({"receiver": {"bits": 8}}, ["smi"], "quantises"),
    ({"training": "signal"}, ["smi"], "s (qpsk)"),
    ({}, ["smi", "lms"], "need the samples"),
])
def test_drawn_covariance_refusals(change, specs, words):
    sc = _scene(**change)
    with pytest.raises(InputError, match="cannot draw the covariance") as err:
        _rho(sc, specs, [8], 3, "covariance")
    assert words in str(err.value)


def test_signal_present_gaussian_training_is_allowed():
    sc = _scene(sources=[{**WANTED, "waveform": "gaussian"}, *JAMMERS], training="signal")
    assert wishart.covariance_draw_refusal(sc, parse_specs(["smi"])) is None


def test_unknown_draw_is_an_input_error():
    with pytest.raises(InputError, match="unknown way"):
        _rho(_scene(), ["smi"], [8], 2, "wishart")


# ------------------------------------------------------------------ compiled kernels
def _recursive_weights(monkeypatch, mode, specs, scene, snapshots, block):
    monkeypatch.setenv("ADAPT_KERNELS", mode)
    batch = TrialBatch(scene, trials=6, seed=2)
    cps = np.unique(np.geomspace(1, snapshots, 9).round().astype(int))
    res = run_processors(parse_specs(specs), batch.blocks(snapshots, block),
                         Context.from_batch(batch), cps)
    return [r.weights for r in res]


def _refuses_numba(monkeypatch):
    monkeypatch.setenv("ADAPT_KERNELS", "numba")
    with pytest.raises(RuntimeError, match="numba is not installed"):
        _kernels.compiled()
    monkeypatch.setenv("ADAPT_KERNELS", "auto")
    assert not _kernels.compiled()


def test_kernels_match_numpy_path(monkeypatch):
    # the compiled recursions are the numpy ones (Widrow & Hoff 1960; Haykin's RLS):
    # identical to 1e-10 relative to the weight norm, at every checkpoint, whatever block
    sc = _scene()
    specs = ["lms", "lms step=0.0003 initial=zero", "nlms", "nlms step=0.5", "rls",
             "rls forgetting=0.98 loading_db=10"]
    if not HAVE_NUMBA:
        _refuses_numba(monkeypatch)
        return
    fast = _recursive_weights(monkeypatch, "numba", specs, sc, 700, 97)
    assert _kernels.compiled()
    slow = _recursive_weights(monkeypatch, "numpy", specs, sc, 700, 256)
    assert not _kernels.compiled()
    for spec, a, b in zip(specs, fast, slow):
        scale = np.linalg.norm(b, axis=-1, keepdims=True)
        assert np.max(np.abs(a - b) / scale) < 1e-10, spec



def test_compiled_output_powers_match_numpy(monkeypatch):
    # the measured SINR from output samples, sum |w^H s|^2 / sum |w^H (x - s)|^2 per
    # checkpoint span, with a fixed (rank-one) wanted source: the compiled one-pass
    # sums equal numpy's to 1e-12 relative, at any block size and for held and
    # adapted weights alike
    sc = _scene()
    if not HAVE_NUMBA:
        _refuses_numba(monkeypatch)
        return
    cps = np.array([1, 5, 40, 300, 700])
    specs = parse_specs(["conventional", "smi loading_db=10", "nlms step=0.5"])
    got = {}
    for mode, block in (("numba", 97), ("numba", 700), ("numpy", 256)):
        monkeypatch.setenv("ADAPT_KERNELS", mode)
        ev = evaluate_batch(TrialBatch(sc, trials=5, seed=4), specs, cps, 700, tail=60,
                            block=block)
        got[(mode, block)] = np.array([p.measured_sinr for p in ev.processors])
    want = got[("numpy", 256)]
    assert np.all(np.isfinite(want)) and want.shape == (3, 5, len(cps))
    for key in (("numba", 97), ("numba", 700)):
        assert np.max(np.abs(got[key] / want - 1)) < 1e-12, key

def test_kernel_choice_from_environment(monkeypatch):
    monkeypatch.setenv("ADAPT_KERNELS", "numpy")
    assert _kernels.mode() == "numpy" and not _kernels.compiled()
    assert _kernels.warm_up() == 0.0
    monkeypatch.setenv("ADAPT_KERNELS", "fortran")
    with pytest.raises(ValueError, match="ADAPT_KERNELS"):
        _kernels.compiled()
    monkeypatch.delenv("ADAPT_KERNELS")
    assert _kernels.mode() == "auto"


def test_kernel_input_guards():
    x = np.zeros((2, 3, 4), complex)
    with pytest.raises(ValueError, match="weight state"):
        _kernels.lms_block(np.zeros((2, 5), complex), x, [0], gain=0.1)
    with pytest.raises(ValueError, match="per-snapshot gain"):
        _kernels.lms_block(np.zeros((2, 4), complex), x, [0], gain=np.ones((2, 2)))


# ------------------------------------------------------------------ benchmark smoke
def test_benchmark_quick_functions_run_on_tiny_sizes():
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "run.py"
    spec = importlib.util.spec_from_file_location("adapt_benchmark", path)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    lines = []
    out = bench.run(quick=True, say=lines.append,
                    sizes={"w1_trials": 12, "w2_trials": 3, "w2_snapshots": 48,
                           "w2_reference_trials": 1, "w3_snapshots": 3000, "w3_block": 512})
    assert set(out["targets"]) >= {"w1_speedup_20x", "w3_nlms_1M_per_s"}
    assert out["w1"]["product_covariance"]["seconds"] > 0
    assert out["w3"]["peak_mb"] is not None and out["w3"]["peak_mb"] > 0
    assert any("W2 recursive" in line for line in lines)


def test_benchmark_times_whole_processes(tmp_path):
    # workload P runs commands as processes of their own: wall time, peak memory and
    # exit code of each (the full timings are the benchmark's, not a test's)
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "run.py"
    spec = importlib.util.spec_from_file_location("adapt_benchmark_p", path)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    rec = bench.run_process(bench._adapt("--version"))
    assert rec["returncode"] == 0 and rec["seconds"] > 0 and rec["maxrss_mb"] > 0
    assert bench.run_process(bench._adapt("check", "no-such-scene.yaml"))["returncode"] == 2
    cmds = bench.process_commands(bench.QUICK, tmp_path)
    assert set(cmds) == {"help", "check", "compare", "size", "stream"}
    assert (tmp_path / "w1.yaml").exists()


def test_compiled_wishart_spans_match_numpy(monkeypatch):
    # the same draws combined by the compiled loop and by numpy matmuls agree to rounding
    rng = np.random.default_rng(4)
    m = rng.standard_normal((5, 5)) + 1j * rng.standard_normal((5, 5))
    r = np.broadcast_to(m @ m.conj().T + np.eye(5), (7, 5, 5))
    lengths = np.array([1, 3, 5, 40])
    if not HAVE_NUMBA:
        _refuses_numba(monkeypatch)
        return
    out = {}
    for mode in ("numba", "numpy"):
        monkeypatch.setenv("ADAPT_KERNELS", mode)
        out[mode] = wishart.span_sums(r, wishart.DrawStreams(2, range(7)), lengths)
    scale = np.abs(out["numpy"]).max(axis=(-1, -2), keepdims=True)
    assert np.max(np.abs(out["numba"] - out["numpy"]) / scale) < 1e-12


def test_add_sources_matches_numpy_and_ignores_block_shape(monkeypatch):
    # the streams' source mixing: compiled and numpy agree to rounding, each is the same
    # element by element whatever the block length (a batched matmul is not), and the
    # result is x * scale + env @ steer (checked against numpy's einsum)
    rng = np.random.default_rng(8)

    def cplx(*shape):
        return rng.standard_normal(shape) + 1j * rng.standard_normal(shape)

    x0, env, steer = cplx(3, 50, 6), cplx(3, 50, 4), cplx(3, 4, 6)
    expect = x0 * 0.7 + np.einsum("tbj,tjn->tbn", env, steer)
    modes = ("numba", "numpy") if HAVE_NUMBA else ("numpy",)
    got = {}
    for mode in modes:
        monkeypatch.setenv("ADAPT_KERNELS", mode)
        whole = x0.copy()
        _kernels.add_sources(whole, 0.7, env, steer)
        pieces = [x0[:, a:a + 7].copy() for a in range(0, 50, 7)]
        for a, piece in zip(range(0, 50, 7), pieces):
            _kernels.add_sources(piece, 0.7, env[:, a:a + 7], steer)
        assert np.array_equal(np.concatenate(pieces, axis=1), whole), mode
        assert np.max(np.abs(whole - expect)) < 1e-12 * np.abs(expect).max(), mode
        shared = x0.copy()
        _kernels.add_sources(shared, 0.7, env, np.broadcast_to(steer[:1], steer.shape).copy())
        one = x0.copy()
        _kernels.add_sources(one, 0.7, env, steer[:1])
        assert np.array_equal(one, shared), mode
        into = np.empty_like(x0)
        kept = x0.copy()
        assert _kernels.add_sources(kept, 0.7, env, steer, out=into) is into
        assert np.array_equal(into, whole) and np.array_equal(kept, x0), mode
        got[mode] = whole
    if HAVE_NUMBA:
        assert np.max(np.abs(got["numba"] - got["numpy"])) < 1e-12 * np.abs(expect).max()
    with pytest.raises(ValueError, match="steer"):
        _kernels.add_sources(x0.copy(), 1.0, env, steer[:, :3])


def test_compiled_solve_folds_scale_and_load():
    # cholesky_solve(r, b, scale, load) solves (r * scale + load I) x = b, the same
    # numbers as scaling and loading a copy first; one shared right-hand side allowed
    if not HAVE_NUMBA:
        return
    rng = np.random.default_rng(6)
    m = rng.standard_normal((4, 3, 6, 6)) + 1j * rng.standard_normal((4, 3, 6, 6))
    r = m @ np.conj(np.swapaxes(m, -1, -2))
    scale = 1.0 / np.array([5.0, 7.0, 40.0])[None, :]
    load = rng.uniform(0.0, 3.0, (4, 3))
    b = rng.standard_normal((6, 1)) + 1j * rng.standard_normal((6, 1))
    got = _kernels.cholesky_solve(r, b, scale=scale, load=load)
    loaded = r * scale[..., None, None] + load[..., None, None] * np.eye(6)
    same = _kernels.cholesky_solve(loaded, np.broadcast_to(b, (4, 3, 6, 1)))
    assert np.array_equal(got, same)
    expect = np.linalg.solve(loaded, np.broadcast_to(b, (4, 3, 6, 1)))
    assert np.max(np.abs(got - expect)) < 1e-10 * np.abs(expect).max()
    with pytest.raises(np.linalg.LinAlgError):
        _kernels.cholesky_solve(r, b, scale=scale, load=-1e9 * np.ones((4, 3)))


def test_smi_fast_solve_equals_general_path(monkeypatch):
    # the drawn path's SMI solve with scale and load folded in gives exactly the weights
    # of the general path (scaled, loaded copy; then the same compiled solve)
    from adapt.processors._covariance import SampleCovarianceProcessor
    sc = _scene()
    specs = ["smi", "smi loading_db=10", "smi loading=auto"]
    fast = execute.run_trials(sc, parse_specs(specs), [4, 8, 16, 64], trials=30, tail=0,
                            draw="covariance", threads=1)
    monkeypatch.setattr(SampleCovarianceProcessor, "weights_from_scaled",
                        lambda self, state, table, counts, load: None)
    slow = execute.run_trials(sc, parse_specs(specs), [4, 8, 16, 64], trials=30, tail=0,
                            draw="covariance", threads=1)
    for a, b in zip(fast.processors, slow.processors):
        assert np.array_equal(a.final_weights, b.final_weights), a.label
        assert np.array_equal(a.sinr, b.sinr), a.label


def test_size_command_draws_covariance(tmp_path, capsys):
    # adapt size --draw covariance: recorded in sizing.json; refused (exit 2) for LMS
    from adapt.cli.main import main
    from adapt.scenefile import dump_scene
    scene_file = tmp_path / "scene.yaml"
    scene_file.write_text(dump_scene(_scene(trials=40, snapshots=32)))
    out = tmp_path / "runs"
    code = main(["size", str(scene_file), "-p", "smi loading_db=10", "--draw", "covariance",
                 "--no-progress", "--out", str(out)])
    assert code == 0
    (folder,) = out.iterdir()
    assert '"draw": "covariance"' in (folder / "sizing.json").read_text()
    code = main(["size", str(scene_file), "-p", "lms", "--draw", "covariance",
                 "--no-progress", "--out", str(out)])
    assert code == 2
    assert "--draw" in capsys.readouterr().err


def test_noisy_sources_refuses_mismatched_arrays():
    # the compiled one-pass formation reads without bounds checks: every shape is
    # checked first (a short wanted-source envelope once read past its end)
    from adapt.numerics import kernels as _kernels
    from adapt.streams import normals
    t_, b_, n = 2, 5, 3
    keys = normals.stream_keys(1, range(t_))
    env = np.zeros((t_, b_, 2), complex)
    steer = np.zeros((1, 2, n), complex)
    good = dict(env_d=np.zeros((t_, b_), complex), steer_d=np.zeros((1, n), complex),
                inter=np.empty((t_, b_, n), complex), data=np.empty((t_, b_, n), complex))
    for name, bad in [("env_d", np.zeros((t_, b_ - 1), complex)),
                      ("steer_d", np.zeros((1, n + 1), complex)),
                      ("data", np.empty((t_, b_ + 1, n), complex)),
                      ("inter", np.empty((t_, b_, n)))]:
        args = dict(good, **{name: bad})
        with pytest.raises(ValueError):
            _kernels.noisy_sources(keys, 0, 1.0, env, steer, args["env_d"], args["steer_d"],
                                   args["inter"], args["data"])
