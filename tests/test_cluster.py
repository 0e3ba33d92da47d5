"""Scale-out on a real Dask cluster (two worker processes on 127.0.0.1).

The fact checked is exact: every trial draws from its own seed and the block boundaries
never depend on the chunking (adapt.engine.execute), so a run on any number of workers gives
the same arrays bit for bit as the serial run.
"""
from __future__ import annotations

import json
import logging
import sys

import numpy as np
import pytest
import yaml

from adapt import io
from adapt.engine import execute
from adapt.engine.execute import part_arrays
from adapt.errors import InputError
from adapt.scenefile import parse_scene
from adapt.studies.compare import TAIL, compare
from adapt.studies.sizing import size

pytestmark = pytest.mark.slow          # local Dask clusters: seconds to start each

SCENE = {
    "name": "cluster check",
    "array": {"layout": "line", "elements": 6, "spacing": 0.5,
              "errors": {"gain_db_rms": 0.3, "phase_deg_rms": 2.0}},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 35, "power_db": 25}],
    "snapshots": 128, "trials": 9, "seed": 21,
    "processors": ["conventional", "smi", "smi loading_db=10", "nlms", "rls", "gsc"],
}


def _same(a, b) -> None:
    a, b = part_arrays(a), part_arrays(b)
    assert a.keys() == b.keys()
    for k in a:
        if not k.endswith(".seconds"):                                   # timing differs
            np.testing.assert_array_equal(a[k], b[k], err_msg=k)         # bit-identical


@pytest.fixture(scope="module")
def scheduler():
    from dask.distributed import LocalCluster
    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                           host="127.0.0.1", dashboard_address=None,
                           silence_logs=logging.ERROR)
    yield cluster.scheduler_address
    cluster.close()


@pytest.fixture(scope="module")
def serial():
    return compare(parse_scene(SCENE))


def test_cluster_matches_serial_bit_for_bit(scheduler, serial):
    done = []
    remote = compare(parse_scene(SCENE), chunk=2, scheduler=scheduler, progress=done.append)
    _same(serial.evaluation, remote.evaluation)
    # progress: one call per chunk, adding up to trials x (snapshots + tail)
    assert len(done) == 5 and sum(done) == 9 * (128 + TAIL)
    # the serial run with the same chunking, and a sizing sweep, agree too
    sweep = dict(processors=["smi", "rls"], snapshots="6:128:2", trials=9)
    _same(size(parse_scene(SCENE), **sweep).evaluation,
          size(parse_scene(SCENE), chunk=4, scheduler=scheduler, **sweep).evaluation)


def test_cluster_run_is_resumable(scheduler, serial, tmp_path):
    calls = []

    def stop(first, count):
        calls.append(first)
        if len(calls) == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        compare(parse_scene(SCENE), chunk=2, scheduler=scheduler, store=tmp_path,
                on_chunk=stop)
    assert len(execute.ChunkStore(tmp_path).finished()) == 2
    resumed = compare(parse_scene(SCENE), scheduler=scheduler, store=tmp_path)
    _same(serial.evaluation, resumed.evaluation)


def test_command_line_with_local_workers(tmp_path, run_cli, serial):
    scene_file = tmp_path / "s.yaml"
    scene_file.write_text(yaml.safe_dump(SCENE), encoding="utf-8")
    code, out, err = run_cli(["compare", scene_file, "--workers", "2", "--chunk", "3",
                              "--out", tmp_path / "runs", "--no-progress"])
    assert code == 0, err
    folder = next((tmp_path / "runs").iterdir())
    assert io.check_manifest(folder) == []
    got = json.loads((folder / "metrics.json").read_text())
    want = json.loads(json.dumps(io.to_jsonable(serial.metrics)))
    for m in (got, want):
        m.pop("seconds")
        for p in m["processors"]:
            p.pop("seconds")
    assert got == want


def test_command_line_with_a_scheduler(tmp_path, run_cli, scheduler):
    scene_file = tmp_path / "s.yaml"
    scene_file.write_text(yaml.safe_dump(SCENE), encoding="utf-8")
    code, out, err = run_cli(["size", scene_file, "--processor", "smi loading_db=10",
                              "--snapshots", "6:128:2", "--scheduler", scheduler,
                              "--out", tmp_path / "runs", "--no-progress"])
    assert code == 0, err
    assert "run folder:" in out


def test_option_errors(run_cli, tmp_path, monkeypatch):
    scene = tmp_path / "s.yaml"
    scene.write_text(yaml.safe_dump(SCENE), encoding="utf-8")
    code, _, err = run_cli(["compare", scene, "--workers", "0"])
    assert code == 2 and "--workers" in err
    code, _, err = run_cli(["compare", scene, "--workers", "two"])
    assert code == 2 and "--workers" in err
    code, _, err = run_cli(["compare", scene, "--workers", "2", "--scheduler",
                            "tcp://127.0.0.1:8786"])
    assert code == 2 and "not both" in err
    code, _, err = run_cli(["size", scene, "--scheduler", "not an address"])
    assert code == 2 and "--scheduler" in err
    code, _, err = run_cli(["record", scene, "--processor", "smi", "--workers", "0",
                            "--out", tmp_path / "ref"])
    assert code == 2 and "--workers" in err and not (tmp_path / "ref").exists()
    # without the optional dependency: a clear message saying how to install it
    monkeypatch.setitem(sys.modules, "dask.distributed", None)
    code, _, err = run_cli(["compare", scene, "--workers", "2", "--out", tmp_path / "r"])
    assert code == 2 and "pip install 'adapt[cluster]'" in err
    assert not (tmp_path / "r").exists()


def test_unreachable_scheduler_is_an_input_error():
    # nothing listens on this loopback port: refused quickly, reported as bad input
    with pytest.raises(InputError, match="cannot reach"):
        with execute.cluster_client(scheduler="tcp://127.0.0.1:9", timeout=0.5):
            pass


def test_record_on_a_cluster_writes_the_same_set(scheduler, tmp_path):
    from adapt.studies.reference import load_reference, record
    scene = parse_scene(SCENE)
    for i, spec in enumerate(("smi loading_db=10", "rls", "subband bins=4")):
        here = record(scene, spec, 5, 64, None, tmp_path / f"here-{i}")
        there = record(scene, spec, 5, 64, None, tmp_path / f"there-{i}",
                       scheduler=scheduler)
        a, b = load_reference(here), load_reference(there)
        assert len(a.cases) == len(b.cases) == 5
        for ca, cb in zip(a.cases, b.cases):
            np.testing.assert_array_equal(ca.weights, cb.weights)      # bit-identical
            np.testing.assert_array_equal(ca.outputs, cb.outputs)


#: floats a %g spec text used to round (issue: workers then ran other parameters) or
#: refuse ("cannot be rebuilt from its spec")
AWKWARD = ["smi loading_db=10.123456789", "lms step=0.000123456789", "nlms step=1.999999",
           "rls forgetting=0.9999999"]


def test_awkward_float_parameters_give_the_same_arrays_on_threads_and_workers(scheduler):
    # workers rebuild processors from spec text: every float must come back the same double
    from adapt.processors import parse_specs
    scene = parse_scene({**SCENE, "processors": AWKWARD})
    threads = execute.run_trials(scene, parse_specs(AWKWARD), [8, 64, 128], threads=2, chunk=2)
    workers = execute.run_trials(scene, parse_specs(AWKWARD), [8, 64, 128], chunk=2,
                               scheduler=scheduler)
    _same(threads, workers)
    assert [p.spec for p in workers.processors] == [p.spec for p in threads.processors]
    assert workers.processors[1].params["step"] == 0.000123456789


def test_record_with_an_awkward_step_writes_the_same_set_on_a_cluster(scheduler, tmp_path):
    from adapt.studies.reference import load_reference, record
    scene = parse_scene(SCENE)
    spec = "lms step=0.000123456789"
    here = record(scene, spec, 4, 64, None, tmp_path / "here", threads=1)
    there = record(scene, spec, 4, 64, None, tmp_path / "there", scheduler=scheduler)
    a, b = load_reference(here), load_reference(there)
    for ca, cb in zip(a.cases, b.cases):
        np.testing.assert_array_equal(ca.weights, cb.weights)          # bit-identical
    assert json.loads((there / "reference.json").read_text())["processor"] == spec
