"""Trial chunks on a pool of threads (adapt.engine.execute.run_chunks with ``threads``).

The fact checked is exact: every trial draws from its own seed and the block boundaries
never depend on the chunking (adapt.engine.execute), and every chunk runs on its own copy of
the processors, so any number of threads and any chunk size give the same arrays bit
for bit as the serial run. Also checked: progress adds up and is never called by two
threads at once, side effects (stored chunks, on_chunk) happen in the calling thread,
errors and interruptions stop every thread, and bad --threads values exit 2.
"""
from __future__ import annotations

import json
import threading
import time

import numpy as np
import pytest
import yaml
from conftest import without_timing

from adapt.engine import execute
from adapt.engine.execute import part_arrays
from adapt.engine.execute import run_trials as evaluate
from adapt.errors import InputError
from adapt.processors import parse_specs
from adapt.processors.smi import SampleMatrixInversion
from adapt.report import runfolder
from adapt.scenefile import parse_scene
from adapt.studies.compare import TAIL, compare

SCENE = {
    "name": "threads check",
    "array": {"layout": "line", "elements": 8, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer 1", "role": "interferer", "azimuth": 30, "power_db": 20},
                {"name": "jammer 2", "role": "interferer", "azimuth": -45, "power_db": 25}],
    "snapshots": 300, "trials": 37, "seed": 3,
}
SPECS = ["smi", "smi loading_db=10", "lms", "nlms", "rls", "frost", "gsc", "eigenspace",
         "power_inversion"]
CHECKPOINTS = [4, 8, 16, 32, 64, 128, 300]


@pytest.fixture(scope="module")
def scene():
    return parse_scene(SCENE)


def _arrays(ev) -> dict:
    return {k: v for k, v in part_arrays(ev).items() if not k.endswith(".seconds")}


def _same(a, b) -> None:
    a, b = _arrays(a), _arrays(b)
    assert a.keys() == b.keys()
    for k in a:                                        # bit-identical, incl. final weights
        assert np.array_equal(a[k], b[k], equal_nan=True), k


def _chunk_threads() -> list:
    return [t for t in threading.enumerate() if t.name.startswith("adapt-chunk")]


@pytest.fixture(scope="module")
def serial(scene):
    return evaluate(scene, parse_specs(SPECS), CHECKPOINTS, threads=1)


@pytest.mark.filterwarnings("ignore:.*sample covariance is singular")
@pytest.mark.parametrize("threads, chunk", [(2, None), (2, 19), (3, 5), (2, 1), (3, 37)])
def test_threads_give_the_serial_arrays_bit_for_bit(scene, serial, threads, chunk):
    got = evaluate(scene, parse_specs(SPECS), CHECKPOINTS, threads=threads, chunk=chunk)
    assert [p.label for p in got.processors] == [p.label for p in serial.processors]
    assert [p.spec for p in got.processors] == [p.spec for p in serial.processors]
    _same(serial, got)
    assert not _chunk_threads()


@pytest.mark.filterwarnings("ignore:.*sample covariance is singular")
def test_drawn_covariances_on_threads_are_identical(scene):
    specs = ["smi", "smi loading_db=10"]
    one = evaluate(scene, parse_specs(specs), CHECKPOINTS, threads=1, draw="covariance")
    for threads, chunk in ((2, None), (3, 4)):
        _same(one, evaluate(scene, parse_specs(specs), CHECKPOINTS, threads=threads,
                            chunk=chunk, draw="covariance"))


def test_progress_adds_up_one_call_at_a_time_and_side_effects_stay_in_this_thread(scene):
    calls, inside, overlaps, chunk_threads = [], [0], [], []

    def progress(n):
        inside[0] += 1
        if inside[0] > 1:
            overlaps.append(n)
        time.sleep(0.0005)                 # widen the window a race would need
        calls.append(n)
        inside[0] -= 1

    def on_chunk(first, count):
        chunk_threads.append((first, threading.current_thread() is threading.main_thread()))

    evaluate(scene, parse_specs(["smi loading_db=10", "nlms"]), CHECKPOINTS, threads=3,
             chunk=4, progress=progress, on_chunk=on_chunk)
    assert sum(calls) == 37 * (300 + 256)              # trials x (snapshots + tail)
    assert not overlaps
    # handed back in the calling thread, in trial order (as a serial run would)
    assert chunk_threads == [(first, True) for first in range(0, 37, 4)]


class _FailsOnShortChunks(SampleMatrixInversion):
    """SMI that refuses, mid-stream, to run a chunk of two trials (a test double)."""

    def begin(self, context):
        state = super().begin(context)
        state.fail = context.trials == 2
        return state

    def update(self, state, block, stops):
        if state.fail and block.start > 0:
            raise InputError("no chunks of two trials here", path="processors[0]", value=2)
        return super().update(state, block, stops)


def test_an_error_in_a_chunk_reaches_the_caller_unchanged(scene):
    done = []
    with pytest.raises(InputError, match="no chunks of two trials") as info:
        # 37 trials in chunks of 5: the last chunk holds two trials
        evaluate(scene, [_FailsOnShortChunks(loading_db=10)], CHECKPOINTS, threads=2,
                 chunk=5, on_chunk=lambda f, c: done.append((f, c)))
    assert info.value.path == "processors[0]" and info.value.value == 2
    assert (35, 2) not in done
    assert not _chunk_threads()                        # every thread has ended


def test_warnings_raised_in_worker_threads_reach_the_caller(scene):
    # unloaded SMI below N snapshots warns that the sample covariance is singular
    with pytest.warns(RuntimeWarning, match="singular"):
        evaluate(scene, parse_specs(["smi"]), [4, 300], threads=2, chunk=5)


def test_interrupt_keeps_the_first_chunks_and_resume_is_identical(scene, tmp_path):
    store = tmp_path / "partial"
    seen, late = [], []
    stopped = threading.Event()

    def progress(n):
        if stopped.is_set():
            late.append(n)

    def stop_after_two(first, count):
        seen.append((first, count))
        if len(seen) == 2:
            stopped.set()
            raise KeyboardInterrupt

    specs = ["smi loading_db=10", "rls"]
    with pytest.raises(KeyboardInterrupt):
        compare(scene, specs, chunk=3, store=store, threads=2, on_chunk=stop_after_two,
                progress=progress)
    assert not _chunk_threads()                        # no thread outlives the run
    # running chunks end at their next block: at most one block per thread may slip in
    # between on_chunk's interrupt and the stop flag (without the flag: dozens)
    assert len(late) <= 2, late
    assert seen == [(0, 3), (3, 3)]                    # chunks are handed back in order
    assert execute.ChunkStore(store).finished() == seen
    resumed = compare(scene, specs, chunk=4, store=store, threads=3)
    plain = compare(scene, specs, threads=1)
    _same(plain.evaluation, resumed.evaluation)
    assert without_timing(plain.metrics) == without_timing(resumed.metrics)


def test_chunks_on_threads_split_only_work_worth_a_thread():
    # work per trial: (snapshots + tail) x N^2 x processors (adapt.engine.execute.chunk_size)
    assert execute.chunk_size(400, 16, 1280, 1, threads=1) == 400
    assert execute.chunk_size(400, 16, 1280, 1, threads=2) == 200     # one part per thread
    assert 400 * 1280 * 16 ** 2 < 3 * execute.THREAD_WORK              # work for two only
    assert execute.chunk_size(400, 16, 1280, 1, threads=3) == 200
    assert execute.chunk_size(800, 16, 1280, 1, threads=3) == 267
    # too little work for a second thread: one chunk, run in the calling thread
    assert 37 * 556 * 8 ** 2 * 9 < 2 * execute.THREAD_WORK
    assert execute.chunk_size(37, 8, 556, 9, threads=2) == 37
    # long runs: chunks of about CHUNK_WORK, their number a multiple of the threads
    for threads in (2, 3, 4):
        size = execute.chunk_size(1000, 16, 1280, 11, threads=threads)
        assert size <= execute.chunk_size(1000, 16, 1280, 11, threads=1)
        assert -(-1000 // size) % threads == 0
    # a cluster keeps its own rule (a quarter of an even share per worker)
    assert execute.chunk_size(400, 16, 1280, 1, workers=2) == 50


def test_bad_thread_counts_are_input_errors(scene):
    for bad in (0, -1, 1000, 2.0, True, "2"):
        with pytest.raises(InputError, match="threads") as info:
            evaluate(scene, parse_specs(["smi"]), [300], threads=bad)
        assert info.value.path == "threads"
    assert execute.check_threads(None) == execute.usable_cores() >= 1


def test_record_on_threads_writes_the_same_set(scene, tmp_path):
    from adapt.studies.reference import load_reference, record
    for i, spec in enumerate(("smi loading_db=10", "nlms", "smi taps=2 loading_db=10",
                              "subband bins=4")):          # spatial and space-time sets
        one = load_reference(record(scene, spec, 5, 64, None, tmp_path / f"1-{i}",
                                    threads=1))
        three = load_reference(record(scene, spec, 5, 64, None, tmp_path / f"3-{i}",
                                      threads=3))
        assert len(one.cases) == len(three.cases) == 5
        for a, b in zip(one.cases, three.cases):
            np.testing.assert_array_equal(a.weights, b.weights)      # bit-identical
            np.testing.assert_array_equal(a.outputs, b.outputs)


# ------------------------------------------------------------------ command line
@pytest.fixture
def scene_file(tmp_path):
    small = dict(SCENE, trials=6, snapshots=64, processors=["smi loading_db=10", "nlms"])
    path = tmp_path / "threads.yaml"
    path.write_text(yaml.safe_dump(small), encoding="utf-8")
    return path


@pytest.mark.parametrize("value", ["0", "-2", "two", "1.5", "100000"])
@pytest.mark.parametrize("command", ["compare", "size", "record"])
def test_bad_threads_option_exits_2_with_one_line(command, value, scene_file, tmp_path,
                                                  run_cli):
    argv = [command, scene_file, "--threads", value, "--out", tmp_path / "out"]
    if command == "record":
        argv += ["--processor", "smi"]
    code, _, err = run_cli(argv)
    assert code == 2, err
    assert err.startswith("adapt: error: ") and err.count("\n") == 1 and "--threads" in err
    assert not (tmp_path / "out").exists()


def test_threads_with_workers_is_refused(scene_file, tmp_path, run_cli):
    code, _, err = run_cli(["compare", scene_file, "--threads", "2", "--workers", "2",
                            "--out", tmp_path / "out"])
    assert code == 2 and err.count("\n") == 1 and "--threads" in err


def test_cli_resume_on_threads_is_identical(scene_file, tmp_path, run_cli, monkeypatch):
    # the first stored chunk is followed by an interruption (as Ctrl-C would be)
    save = execute.ChunkStore.save

    def save_then_stop(self, first, count, arrays):
        save(self, first, count, arrays)
        raise KeyboardInterrupt

    monkeypatch.setattr(execute.ChunkStore, "save", save_then_stop)
    out = tmp_path / "runs"
    code, _, err = run_cli(["compare", scene_file, "--chunk", "2", "--threads", "2",
                            "--out", out, "--no-progress"])
    assert code == 130, err
    (folder,) = out.iterdir()
    assert (folder / runfolder.MARKER).exists() and len(list(folder.glob("partial/chunk-*.npz"))) == 1
    monkeypatch.setattr(execute.ChunkStore, "save", save)
    code, _, err = run_cli(["compare", "--resume", folder, "--threads", "3", "--no-progress"])
    assert code == 0, err
    got = json.loads((folder / "metrics.json").read_text())
    plain = compare(parse_scene(yaml.safe_load(scene_file.read_text())), tail=TAIL,
                    threads=1)
    assert without_timing(got) == without_timing(plain.metrics)
