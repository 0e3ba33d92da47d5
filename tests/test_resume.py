"""Chunked runs: interruption (Ctrl-C, SIGTERM), resume, chunk-size independence.

The facts checked are exact: a resumed run must give the same numbers bit for bit as an
uninterrupted one (same seed), since every trial draws from its own seed and block
boundaries never depend on the chunking (adapt.engine.execute). Exit codes follow the shell
convention 128 + signal number (POSIX: SIGINT = 2 -> 130, SIGTERM = 15 -> 143).
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from conftest import without_timing

from adapt import io
from adapt.engine import execute
from adapt.engine.execute import part_arrays
from adapt.errors import InputError
from adapt.report.runfolder import MARKER, PARTIAL, RESUME_FILE
from adapt.scenefile import parse_scene
from adapt.studies.compare import compare
from adapt.studies.sizing import size

ROOT = Path(__file__).resolve().parents[1]

# small and quick (library tests)
QUICK = {
    "name": "resume quick",
    "array": {"layout": "line", "elements": 6, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 30, "power_db": 20}],
    "snapshots": 96, "trials": 10, "seed": 5,
    "processors": ["conventional", "smi loading_db=10", "nlms", "rls"],
}
# slow enough per trial that a signal lands between chunks (command-line tests)
SLOW = {
    "name": "resume slow",
    "array": {"layout": "line", "elements": 12, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0,
                 "waveform": "qpsk"},
                {"name": "jammer", "role": "interferer", "azimuth": 25, "power_db": 25}],
    "snapshots": 800, "trials": 12, "seed": 11,
    "processors": ["rls", "nlms", "smi loading_db=10"],
}


def _arrays(ev) -> dict:
    out = part_arrays(ev)
    return {k: v for k, v in out.items() if not k.endswith(".seconds")}   # timing differs


def _same(a, b) -> None:
    a, b = _arrays(a), _arrays(b)
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)       # bit-identical


def _no_temporaries(folder: Path) -> None:
    names = [p.name for p in folder.rglob("*")]
    assert not [n for n in names if n.startswith(".partial-")], names


# ------------------------------------------------------------------ library level
def test_results_do_not_depend_on_chunk_size():
    scene = parse_scene(QUICK)
    ref = compare(scene, checkpoints=[2, 6, 12, 24, 48, 96]).evaluation
    for chunk in (1, 3, 4, 10):
        got = compare(scene, checkpoints=[2, 6, 12, 24, 48, 96], chunk=chunk).evaluation
        _same(ref, got)


def test_interrupted_after_two_chunks_then_resumed_is_identical(tmp_path):
    scene = parse_scene(QUICK)
    store = tmp_path / "partial"
    seen = []

    def stop_after_two(first, count):
        seen.append((first, count))
        if len(seen) == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        compare(scene, chunk=3, store=store, on_chunk=stop_after_two)
    kept = execute.ChunkStore(store).finished()
    assert kept == [(0, 3), (3, 3)]
    _no_temporaries(tmp_path)
    # resume with a different requested chunk size: the stored plan's chunking wins
    done = []
    resumed = compare(scene, chunk=4, store=store, progress=done.append)
    plain = compare(scene)
    _same(plain.evaluation, resumed.evaluation)
    assert without_timing(plain.metrics) == without_timing(resumed.metrics)
    # progress still adds up to trials x (snapshots + tail): stored chunks counted once
    from adapt.studies.compare import TAIL
    assert sum(done) == 10 * (96 + TAIL)


def test_store_of_another_run_is_refused(tmp_path):
    scene = parse_scene(QUICK)
    compare(scene, chunk=5, store=tmp_path)
    with pytest.raises(InputError, match="different run"):
        compare(scene, seed=6, chunk=5, store=tmp_path)


def test_chunks_of_an_older_stream_definition_are_refused(tmp_path):
    # a plan written before the random streams were versioned (or under another
    # version) must not be finished with today's streams: its trials would mix two
    # realisations
    scene = parse_scene(QUICK)
    compare(scene, chunk=5, store=tmp_path)
    plan_file = tmp_path / "plan.json"
    plan = json.loads(plan_file.read_text())["plan"]       # stored with its digest
    assert plan["streams"] == "counter-normals-1"
    del plan["streams"]
    plan_file.write_text(json.dumps(plan))
    with pytest.raises(InputError, match="random streams are 'numpy-generator'.*start a new run"):
        compare(scene, chunk=5, store=tmp_path)
    # a worker (a Dask worker of another version, say) refuses such a plan too
    with pytest.raises(RuntimeError, match="same adapt version"):
        execute.run_chunk(plan, 0, 2)


def test_sizing_interrupted_and_resumed_is_identical(tmp_path):
    scene = parse_scene(QUICK)
    calls = []

    def stop(first, count):
        calls.append(first)
        if len(calls) == 1:
            raise KeyboardInterrupt

    args = dict(processors=["smi", "smi loading_db=10"], snapshots="6:96", trials=10)
    with pytest.raises(KeyboardInterrupt):
        size(scene, chunk=4, store=tmp_path, on_chunk=stop, **args)
    resumed = size(scene, chunk=4, store=tmp_path, **args)
    plain = size(scene, **args)
    _same(plain.evaluation, resumed.evaluation)
    assert without_timing(plain.record) == without_timing(resumed.record)


# ------------------------------------------------------------------ command line
#: the child: restores the default SIGINT action (a parent shell that started the
#: suite in the background leaves SIGINT ignored), then runs the command; after its
#: first chunk is stored it says READY and waits, so the signal lands at a known point
_CHILD = """
import signal, sys, time
signal.signal(signal.SIGINT, signal.default_int_handler)
from adapt.engine import chunks
save = chunks.ChunkStore.save
said = []
def save_then_wait(self, first, count, arrays):
    path = save(self, first, count, arrays)
    if not said:
        said.append(1)
        print("READY", flush=True)
        time.sleep(120)
    return path
chunks.ChunkStore.save = save_then_wait
from adapt.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


def _start(argv, tmp_path) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-c", _CHILD, *map(str, argv)], cwd=tmp_path,
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _stop_after_first_chunk(proc, out_root: Path, sig) -> tuple[int, str, Path]:
    line = proc.stdout.readline()           # blocks until the child is ready (or ends)
    if line.strip() != "READY":
        out, err = proc.communicate(timeout=60)
        raise AssertionError(f"the child ended before its first chunk: {line}{out}{err}")
    (chunk,) = out_root.glob(f"*/{PARTIAL}/chunk-*.npz")
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=60)
    return proc.returncode, err, chunk.parent.parent


def _check_incomplete(folder: Path, kind: str, err: str) -> None:
    names = {p.name for p in folder.iterdir()}
    assert MARKER in names and RESUME_FILE in names and PARTIAL in names
    assert "manifest.json" not in names
    assert json.loads((folder / RESUME_FILE).read_text())["status"] == "incomplete"
    _no_temporaries(folder)
    assert f"adapt {kind} --resume {folder.name}" in err.replace(str(folder), folder.name)
    assert "Traceback" not in err


@pytest.mark.slow
def test_ctrl_c_during_compare_then_resume(tmp_path, run_cli):
    scene_file = tmp_path / "slow.yaml"
    scene_file.write_text(yaml.safe_dump(SLOW), encoding="utf-8")
    out = tmp_path / "runs"
    proc = _start(["compare", scene_file, "--chunk", "2", "--out", out, "--no-progress"],
                  tmp_path)
    code, err, folder = _stop_after_first_chunk(proc, out, signal.SIGINT)
    assert code == 130, err
    _check_incomplete(folder, "compare", err)

    # conflicting settings are refused; an unfinished folder of another kind too
    code, _, msg = run_cli(["compare", "--resume", folder, "--trials", "3"])
    assert code == 2 and "--trials" in msg
    code, _, msg = run_cli(["size", "--resume", folder])
    assert code == 2 and "adapt compare --resume" in msg

    code, stdout, msg = run_cli(["compare", "--resume", folder, "--no-progress"])
    assert code == 0, msg
    names = {p.name for p in folder.iterdir()}
    assert not names & {MARKER, RESUME_FILE, PARTIAL}
    assert io.check_manifest(folder) == []
    _no_temporaries(folder)

    plain = compare(parse_scene(SLOW))
    got = json.loads((folder / "metrics.json").read_text())
    assert without_timing(got) == without_timing(plain.metrics)
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["command_line"].startswith("adapt compare ")

    # a finished folder is not resumed
    code, _, msg = run_cli(["compare", "--resume", folder])
    assert code == 2 and "already complete" in msg


@pytest.mark.slow
def test_sigterm_during_size_then_resume(tmp_path, run_cli):
    scene_file = tmp_path / "slow.yaml"
    scene_file.write_text(yaml.safe_dump(SLOW), encoding="utf-8")
    out = tmp_path / "runs"
    argv = ["size", scene_file, "--processor", "rls", "--processor", "smi loading_db=10",
            "--snapshots", "12:800:2", "--chunk", "2", "--out", out, "--no-progress"]
    proc = _start(argv, tmp_path)
    code, err, folder = _stop_after_first_chunk(proc, out, signal.SIGTERM)
    assert code == 143, err
    _check_incomplete(folder, "size", err)

    code, _, msg = run_cli(["size", "--resume", folder, "--no-progress"])
    assert code == 0, msg
    assert io.check_manifest(folder) == []
    _no_temporaries(folder)
    # draw="auto": the command's default (the record says how the data were drawn, and why)
    plain = size(parse_scene(SLOW), ["rls", "smi loading_db=10"], snapshots="12:800:2",
                 draw="auto")
    got = json.loads((folder / "sizing.json").read_text())
    assert without_timing(got) == without_timing(plain.record)


def test_resume_refusals(tmp_path, run_cli):
    code, _, msg = run_cli(["compare", "--resume", tmp_path / "missing"])
    assert code == 2 and "no such run folder" in msg
    code, _, msg = run_cli(["compare", "--resume", tmp_path])
    assert code == 2 and "not a resumable run folder" in msg
    code, _, msg = run_cli(["compare"])
    assert code == 2 and "--resume" in msg
    code, _, msg = run_cli(["size", "--chunk", "0", ROOT / "scenes" / "single_jammer.yaml"])
    assert code == 2 and "--chunk" in msg


def test_failed_run_leaves_no_folder(tmp_path, run_cli):
    # a processor whose settings fail its check on the scene fails before any chunk is
    # kept: nothing is left behind (LMS step beyond the 2/tr(R) bound, Widrow & Stearns
    # 1985, ch. 6: refused by the processor's own check)
    scene_file = tmp_path / "q.yaml"
    scene_file.write_text(yaml.safe_dump(QUICK), encoding="utf-8")
    code, _, msg = run_cli(["compare", scene_file, "--processor", "lms step=10",
                            "--out", tmp_path / "runs", "--no-progress"])
    assert code == 2, msg
    runs = tmp_path / "runs"
    assert not runs.exists() or not any(runs.iterdir())
