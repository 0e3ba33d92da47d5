"""The engine's parts: the plan (sizes, digest, validation), the chunk store, the
entry point run_trials, and the public API surface."""
from __future__ import annotations

import ast
import inspect
from pathlib import Path

import numpy as np
import pytest

import adapt
from adapt import api
from adapt.engine import chunks, execute, executors, plan
from adapt.engine.plan import Plan
from adapt.processors import parse_specs
from adapt.scenefile import parse_scene

ROOT = Path(adapt.__file__).resolve().parent

SCENE = {
    "name": "engine",
    "array": {"layout": "line", "elements": 4, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 35, "power_db": 20}],
    "snapshots": 24, "trials": 7, "seed": 2,
    "processors": ["smi loading_db=10", "rls"],
}


def _plan(**changes) -> Plan:
    scene = parse_scene(SCENE)
    base = dict(scene=plan.scene_mapping(scene), specs=("smi loading_db=10", "rls"),
                checkpoints=(4, 8, 24), snapshots=24, tail=0, trials=7, seed=2, chunk=3,
                block=24)
    base.update(changes)
    return Plan(**base)


def test_plan_round_trips_and_its_digest_names_the_work():
    p = _plan()
    again = Plan.from_dict(p.as_dict())
    assert again == p and again.digest() == p.digest() and len(p.digest()) == 64
    for change in ({"seed": 3}, {"trials": 8}, {"tail": 1}, {"checkpoints": (4, 24)},
                   {"specs": ("rls",)}, {"chunk": 2}):
        assert _plan(**change).digest() != p.digest(), change
    assert p.chunks() == [(0, 3), (3, 3), (6, 1)]
    assert p.same_work(_plan(chunk=2, block=8)) and not p.same_work(_plan(seed=9))


@pytest.mark.parametrize("key, value", [("trials", 0), ("chunk", -1), ("tail", 1.5),
                                        ("seed", True), ("specs", [3]), ("scene", [])])
def test_plan_from_dict_refuses_bad_values(key, value):
    d = _plan().as_dict()
    d[key] = value
    with pytest.raises(ValueError, match=key):
        Plan.from_dict(d)


def test_chunk_and_block_sizes_stay_in_range():
    for trials in (1, 7, 1000, 10 ** 6):
        for n in (2, 16, 256):
            size = plan.chunk_size(trials, n, 4096, 3)
            assert 1 <= size <= min(trials, plan.MAX_CHUNK)
            blk = plan.block_size(n, 4096)
            assert 1 <= blk <= 4096


def test_run_trials_is_the_engine_entry_point_and_chunking_never_matters(tmp_path):
    scene = parse_scene(SCENE)
    procs = parse_specs(SCENE["processors"])
    one = execute.run_trials(scene, procs, [4, 8, 24], tail=0, threads=1)
    store = tmp_path / "partial"
    two = execute.run_trials(scene, procs, [4, 8, 24], tail=0, chunk=2, threads=2,
                             store=store)
    for a, b in zip(one.processors, two.processors):
        np.testing.assert_array_equal(a.sinr, b.sinr)
        np.testing.assert_array_equal(a.final_weights, b.final_weights)
    finished = chunks.ChunkStore(store).finished()
    assert finished == [(0, 2), (2, 2), (4, 2), (6, 1)]
    assert all((store / f"chunk-{f:09d}-{c:06d}.json").is_file() for f, c in finished)


def test_processors_are_never_copied():
    # processors are immutable settings with their run state in begin()'s State
    # (adapt/processors/base.py): the engine shares them between chunks and threads
    hits = []
    for path in (ROOT / "engine").glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Attribute) and node.attr == "deepcopy":
                hits.append(path.name)
    assert hits == []
    assert "deepcopy" not in inspect.getsource(executors.run_threaded)


def test_no_module_imports_upward():
    # layers, bottom to top (DEVELOPERS.md); imports inside functions count too, and so
    # do importlib.import_module calls with a literal name
    order = ["errors", "io", "numerics", "scene", "streams", "processors", "scenefile",
             "report", "engine", "studies", "api", "cli"]
    rank = {name: i for i, name in enumerate(order)}

    def layer(module: str) -> str | None:
        parts = module.split(".")
        return parts[1] if len(parts) > 1 and parts[0] == "adapt" else None

    bad = []
    for path in ROOT.rglob("*.py"):
        rel = path.relative_to(ROOT).with_suffix("")
        own = rel.parts[0]
        assert own in rank or own in ("__init__", "__main__"), f"{rel}: no layer"
        if own not in rank:
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            names = []
            if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names = [node.module]
            elif isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif (isinstance(node, ast.Call) and getattr(node.func, "attr", "") == "import_module"
                  and node.args and isinstance(node.args[0], ast.Constant)):
                names = [str(node.args[0].value)]
            for name in names:
                other = layer(name)
                if other in rank and rank[other] > rank[own]:
                    bad.append(f"{rel}: {name}")
    assert bad == []


# ------------------------------------------------------------------ the API surface
def test_api_names_resolve_and_are_documented():
    for name in api.__all__:
        obj = getattr(api, name)
        if inspect.isfunction(obj) and obj.__module__ == "adapt.api":
            assert obj.__doc__ and obj.__doc__.strip(), name


def test_one_function_called_evaluate():
    # the engine's entry point is run_trials; adapt.api.evaluate is the public one
    assert not hasattr(execute, "evaluate")
    from adapt.engine import evaluate as engine_evaluate
    assert not hasattr(engine_evaluate, "evaluate")
    assert inspect.isfunction(api.evaluate)


def test_api_evaluate_compare_and_write_run(tmp_path):
    scene = api.parse_scene(SCENE)
    ev = api.evaluate(scene, trials=3, checkpoints=[4, 24], threads=1)
    assert isinstance(ev, api.Evaluation) and ev.trials == 3
    assert [p.label for p in ev.processors] == ["smi loading_db=10", "rls"]
    assert ev.by_label("rls").sinr.shape == (3, 2)
    result = api.compare(scene, trials=3, checkpoints=[4, 24], threads=1)
    assert isinstance(result, api.Comparison)
    folder = api.write_run(result, tmp_path)
    back = api.read_run(folder)
    assert back["problems"] == [] and back["metrics"]["trials"] == 3
    assert {"verdict", "interference_cost_db"} <= set(back["metrics"])
