"""Processors as immutable settings plus a run state; the registry table; capability
flags; the one spec serialiser and its exact round trip (adapt/processors/base.py)."""
from __future__ import annotations

import copy
import pkgutil
import re

import numpy as np
import pytest

import adapt.processors as processors_package
from adapt.engine import execute
from adapt.engine.drawn import covariance_draw_refusal
from adapt.errors import SpecError
from adapt.processors import (
    Context,
    Processor,
    State,
    parse_spec,
    parse_specs,
    registry,
    run_processors,
)
from adapt.processors.base import format_value
from adapt.processors.conventional import Conventional
from adapt.processors.nlms import NormalisedLms
from adapt.processors.smi import SampleMatrixInversion
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch
from adapt.studies import theory
from adapt.studies.reference import uses_reference

SCENE = {
    "name": "settings check",
    "array": {"layout": "line", "elements": 6, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 35, "power_db": 25,
                 "waveform": "gaussian"}],
    "snapshots": 64, "trials": 5, "seed": 3,
}

#: the values issue reports showed to be rounded or refused by a %g serialiser
AWKWARD = ["smi loading_db=10.123456789", "lms step=0.000123456789", "nlms step=1.999999",
           "rls forgetting=0.9999999"]


# ------------------------------------------------------------------ spec round trip
def _awkward_float(rng, p) -> float:
    """A float inside the declared range with all 17 significant digits in use."""
    lo = -1e3 if p.low is None else p.low
    hi = 1e3 if p.high is None else p.high
    if lo > 0 and hi / lo > 1e3:                       # spread over the decades
        x = float(np.exp(rng.uniform(np.log(lo), np.log(hi))))
    else:
        x = float(rng.uniform(lo, hi))
    return min(max(x, np.nextafter(lo, np.inf)), np.nextafter(hi, -np.inf))


def test_every_processor_round_trips_random_awkward_values_exactly():
    rng = np.random.default_rng(20261203)
    covered = set()
    for method, cls in registry().items():
        for name, p in cls.parameters.items():
            if p.kind != "float":
                continue
            for _ in range(25):
                value = _awkward_float(rng, p)
                given = {"method": method, name: value}
                if method == "lcmv":                    # angles go through their own text
                    given["nulls"] = [float(rng.uniform(20, 80)), float(rng.uniform(-80, -20))]
                proc = parse_spec(given)
                assert proc.params[name] == value          # exact: the double itself
                for text in (proc.spec(), proc.spec(defaults=False)):
                    again = parse_spec(text)
                    assert again == proc, text
                    assert again.params[name] == value     # the same double back
                covered.add((method, name))
    want = {(m, n) for m, c in registry().items()
            for n, p in c.parameters.items() if p.kind == "float"}
    assert covered == want


def test_lcmv_null_angles_keep_every_digit():
    proc = parse_spec({"method": "lcmv", "nulls": [20.123456789, -35.5]})
    assert proc.params["nulls"] == "20.123456789,-35.5"
    assert parse_spec(proc.spec()) == proc
    assert parse_spec("lcmv nulls=20,35.5").params["nulls"] == "20,35.5"   # short stays short


def test_format_value_keeps_short_text_where_it_is_exact():
    # the %g text where it parses back to the same double (existing labels unchanged),
    # repr (Python's shortest round-trip text) otherwise
    assert format_value(10.0) == "10" and format_value(1e-6) == "1e-06"
    assert format_value(0.000123456789) == "0.000123456789"
    assert format_value(1.999999) == "1.999999" and format_value(0.9999999) == "0.9999999"
    for x in (0.1, 1 / 3, 2 ** -40, 123456789.125, -7.0e-300):
        assert float(format_value(x)) == x
    assert format_value(None) == "none" and format_value(True) == "true"
    assert parse_spec("smi loading_db=10").label == "smi loading_db=10"


def test_awkward_values_are_shippable_and_rebuild_the_same_processors():
    # nlms step=1.999999 and rls forgetting=0.9999999 used to be written as 2 and 1 and
    # refused ("cannot be rebuilt from its spec")
    procs = parse_specs(AWKWARD)
    specs = execute.shippable_specs(procs)
    assert [parse_spec(s) for s in specs] == procs
    assert [p.params for p in parse_specs(specs)] == [p.params for p in procs]


def test_awkward_values_give_the_same_arrays_on_one_thread_and_on_several(tmp_path):
    scene = parse_scene(SCENE)
    one = execute.run_trials(scene, parse_specs(AWKWARD), [8, 64], threads=1, tail=16)
    many = execute.run_trials(scene, parse_specs(AWKWARD), [8, 64], threads=2, chunk=2,
                            tail=16, store=tmp_path / "chunks")       # through the specs
    a, b = execute.part_arrays(one), execute.part_arrays(many)
    for k in a:
        if not k.endswith(".seconds"):
            np.testing.assert_array_equal(a[k], b[k], err_msg=k)


# ------------------------------------------------------------------ settings plus state
def test_a_processor_is_immutable_and_built_by_its_constructor():
    proc = SampleMatrixInversion(loading_db=10)
    assert proc == parse_spec("smi loading_db=10") and proc.label == "smi loading_db=10"
    with pytest.raises(AttributeError):
        proc.label = "other"
    with pytest.raises(AttributeError):
        proc._anything = 1
    with pytest.raises(TypeError):
        proc.params["loading_db"] = 20
    assert copy.deepcopy(proc) is proc and copy.copy(proc) is proc
    with pytest.raises(SpecError) as info:
        SampleMatrixInversion(loading_db=1000)
    assert info.value.path == "loading_db"
    with pytest.raises(SpecError) as info:               # parse_spec locates the same error
        parse_spec("smi loading_db=1000", "processors[3]")
    assert info.value.path == "processors[3].loading_db"
    with pytest.raises(SpecError) as info:
        parse_spec({"method": "nlms", "label": " "}, "processors[1]")
    assert info.value.path == "processors[1].label"


def test_a_processor_pickles_to_an_equal_one():
    import pickle
    proc = parse_spec("rls forgetting=0.9999999 label=slow")
    again = pickle.loads(pickle.dumps(proc))
    assert again == proc and again.params["forgetting"] == 0.9999999


@pytest.mark.parametrize("spec", ["smi window=sliding length=3", "lms step=1",
                                  "frost step=5", "eigenspace rank=6",
                                  "power_inversion reference_element=6",
                                  "lcmv nulls=10,20,30,40,50"])
def test_begin_refuses_what_check_refuses(spec):
    # the engine calls begin only (its error located at processors[i]); adapt check calls
    # check: both must say no
    batch = TrialBatch(parse_scene(SCENE), trials=2)
    ctx = Context.from_batch(batch)
    proc = parse_spec(spec)
    with pytest.raises(SpecError):
        proc.check(ctx)
    with pytest.raises(SpecError):
        proc.begin(ctx)
    with pytest.raises(SpecError) as info:
        run_processors([parse_spec("conventional"), proc], batch.blocks(64), ctx, [64])
    assert info.value.path.startswith("processors[1]")


def test_parameter_names_that_mean_something_else_are_refused():
    from adapt.processors import Parameter
    with pytest.raises(TypeError, match="reserved"):
        type("Bad", (Processor,), {"method": "bad",
                                   "parameters": {"label": Parameter("str", "x", "clash")}})


@pytest.mark.parametrize("method", sorted(registry()))
def test_begin_gives_fresh_state_and_one_object_serves_two_runs_at_once(method):
    # the same processor object twice in one pass: each run advances its own state, so
    # both give exactly what one run alone gives (state kept on the object would be
    # advanced twice per block)
    sc = parse_scene(SCENE)
    batch = TrialBatch(sc, trials=3)
    ctx = Context.from_batch(batch)
    proc = parse_spec(method)
    first, second = proc.begin(ctx), proc.begin(ctx)
    assert isinstance(first, State) and first is not second and first.context is ctx
    alone = run_processors([proc], batch.blocks(64, 16), ctx, [8, 17, 64])[0]
    twice = run_processors([proc, proc], batch.blocks(64, 16), ctx, [8, 17, 64])
    for res in twice:
        np.testing.assert_array_equal(res.weights, alone.weights)


def test_lms_steps_live_in_the_state_and_are_worked_out_once_per_begin(monkeypatch):
    from adapt.processors import lms as lms_module
    calls = []
    real = lms_module.bounded_steps
    monkeypatch.setattr(lms_module, "bounded_steps",
                        lambda *a, **k: calls.append(1) or real(*a, **k))
    batch = TrialBatch(parse_scene(SCENE), trials=2)
    run_processors([parse_spec("lms")], batch.blocks(64), Context.from_batch(batch), [64])
    assert len(calls) == 1


# ------------------------------------------------------------------ registry and flags
def test_the_registry_table_lists_every_processor_module():
    table = registry()
    assert list(table) == sorted(table)
    assert all(cls.method == name for name, cls in table.items())
    found = set()
    for info in pkgutil.iter_modules(processors_package.__path__):
        if info.name.startswith("_") or info.name == "base":
            continue
        module = __import__(f"adapt.processors.{info.name}", fromlist=["x"])
        found |= {obj for obj in vars(module).values()
                  if isinstance(obj, type) and issubclass(obj, Processor) and obj.method
                  and obj.__module__ == module.__name__}
    assert found == set(table.values())      # a new module needs its line in the table


def test_capability_flags_of_the_registered_methods():
    table = registry()

    def having(flag):
        return {m for m, c in table.items() if getattr(c, flag)}

    assert having("reference_trained") == {"lms", "nlms", "rls"}
    assert having("covariance_based") == {"smi", "eigenspace", "lcmv", "power_inversion"}
    assert having("data_free") == {"optimum", "conventional"}
    assert having("clairvoyant") == {"optimum"}
    assert having("sample_mvdr") == {"smi"}
    for cls in table.values():
        assert cls.drawn_covariance == (cls.covariance_based or cls.data_free)


class _FixedBeam(Conventional):
    method = "fixed_beam"


class _RenamedSmi(SampleMatrixInversion):
    method = "renamed_smi"


class _RenamedNlms(NormalisedLms):
    method = "renamed_nlms"


def test_the_studies_and_the_drawn_path_read_flags_not_method_names():
    scene = parse_scene(SCENE)
    # a data-free processor under another name may run on drawn covariances
    assert covariance_draw_refusal(scene, [_FixedBeam(), _RenamedSmi()]) is None
    why = covariance_draw_refusal(scene, [_RenamedNlms()])
    assert why is not None and "renamed_nlms" in why and "smi" in why
    assert uses_reference(_RenamedNlms()) and not uses_reference(_RenamedSmi())
    facts = {"elements": 6, "training": "interference", "optimum_sinr": 1.0}
    assert theory.theory_for(_RenamedSmi(), facts).name == "rmb"
    assert theory.theory_for(_RenamedSmi(loading_db=10), facts) is None


# ------------------------------------------------------------------ docstrings
@pytest.mark.parametrize("method", sorted(registry()))
def test_each_processor_class_has_numpydoc_sections(method):
    doc = registry()[method].__doc__ or ""
    for section in ("Parameters", "Returns", "Notes", "References"):
        assert re.search(rf"^\s*{section}\n\s*-{{{len(section)}}}$", doc, re.M), section
    assert "Checkable fact" in doc
    params = doc.split("Returns")[0]
    for name in registry()[method].parameters:
        assert re.search(rf"^\s*{name} :", params, re.M), name
