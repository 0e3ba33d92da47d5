"""Wrong types through the Python API, scheduler addresses and size estimates.

Every public function of adapt.api answers a wrong argument with InputError (the
message the command line prints), never a raw TypeError, ValueError or MemoryError, and
before any computing; runs that cannot fit in memory are refused with the number and
how to shrink them.
"""
from __future__ import annotations

from pathlib import Path

import pytest
from conftest import SCENES

from adapt import api
from adapt.engine import settings
from adapt.errors import InputError

SCENE = SCENES / "single_jammer.yaml"


@pytest.fixture(scope="module")
def scene():
    return api.load_scene(SCENE)


CALLS = {
    "load_scene(None)": lambda sc: api.load_scene(None),
    "load_scene(5)": lambda sc: api.load_scene(5),
    "dump_scene(None)": lambda sc: api.dump_scene(None),
    "run(scene, 5)": lambda sc: api.run(sc, 5, trials=2, snapshots=16),
    "run(outputs='x')": lambda sc: api.run(sc, ["smi"], trials=2, snapshots=16, outputs="x"),
    "compare(scene, object())": lambda sc: api.compare(sc, object(), trials=2, snapshots=16),
    "evaluate(tail=-1)": lambda sc: api.evaluate(sc, ["smi"], trials=2, snapshots=16, tail=-1),
    "evaluate(tail='a')": lambda sc: api.evaluate(sc, ["smi"], trials=2, snapshots=16,
                                                  tail="a"),
    "evaluate(block=0)": lambda sc: api.evaluate(sc, ["smi"], trials=2, snapshots=16, block=0),
    "evaluate(scheduler=5)": lambda sc: api.evaluate(sc, ["smi"], trials=2, scheduler=5),
    "write_run(None)": lambda sc: api.write_run(None),
    "verify(None, f)": lambda sc: api.verify(None, lambda case: None),
    "processors(3)": lambda sc: api.processors(3),
    "size(scene, 5)": lambda sc: api.size(sc, 5),
    "size(bogus=1)": lambda sc: api.size(sc, ["smi"], bogus=1),
    "record(trials='a')": lambda sc: api.record(sc, "smi", "/nonexistent/x", trials="a"),
    "read_run(None)": lambda sc: api.read_run(None),
}


@pytest.mark.parametrize("name", list(CALLS))
def test_wrong_types_are_input_errors(name, scene):
    with pytest.raises(InputError):
        CALLS[name](scene)


@pytest.mark.parametrize("address, words", [
    ("127.0.0.1", "needs a host and a port"), ("inproc://x", "'inproc://' transport"),
    ("tls://h:8786", "'tls://' transport"), ("ucx://h:1", "'ucx://'"),
    ("tcp://h:99999", "needs a host and a port"),
])
def test_scheduler_addresses(address, words, run_cli):
    with pytest.raises(InputError, match=words):
        settings.check_scheduler_address(address)
    code, out, err = run_cli(["compare", SCENE, "--scheduler", address, "--no-progress"])
    assert code == 2 and words in err and "Traceback" not in err
    assert settings.check_scheduler_address("tcp://10.1.2.3:8786") == "tcp://10.1.2.3:8786"
    assert settings.check_scheduler_address("host:8786") == "host:8786"


def test_generate_too_big_is_refused_before_allocating(scene, monkeypatch):
    monkeypatch.setattr(settings, "available_memory", lambda: 8 << 30)
    with pytest.raises(InputError, match="needs about .* TB of memory") as err:
        api.generate(scene, trials=1_000_000, snapshots=100_000)
    assert "trials would fit" in str(err.value)


def test_long_run_refused_with_the_number_and_the_way_out(run_cli, monkeypatch, tmp_path):
    monkeypatch.setattr(settings, "available_memory", lambda: 8 << 30)
    code, out, err = run_cli(["compare", SCENE, "--trials", "1000000", "--snapshots",
                              "100000000", "--no-progress", "--out", tmp_path])
    assert code == 2 and "GB of memory" in err and "fewer --trials" in err, err
    assert not list(tmp_path.iterdir())                      # nothing started
    sc = api.load_scene(SCENE)
    with pytest.raises(InputError, match="of memory"):
        api.evaluate(sc, ["smi"], trials=1000, snapshots=100_000,
                     checkpoints=list(range(1, 100_001)))


def test_estimate_is_printed_on_long_runs(run_cli, monkeypatch, tmp_path):
    monkeypatch.setattr(settings, "LONG_RUN_SECONDS", 0.0)
    code, out, err = run_cli(["compare", SCENE, "--trials", "2", "--snapshots", "32",
                              "--no-progress", "--out", tmp_path])
    assert code == 0 and "needs about" in err and "of memory" in err, err


def test_estimate_grows_with_the_run(scene):
    small = settings.estimate_run(scene.with_overrides(trials=10), 2, 10)
    large = settings.estimate_run(scene.with_overrides(trials=10_000), 2, 10)
    assert large.bytes > 100 * small.bytes / 10 and large.seconds > small.seconds


def test_scene_processor_error_names_the_scene_not_an_option(tmp_path, run_cli):
    path = tmp_path / "s.yaml"
    path.write_text("array: {layout: line, elements: 4}\nsources:\n"
                    "  - {name: s, role: desired, azimuth: 0, power_db: 0}\n"
                    "processors: ['smi loading_db=abc']\n")
    code, out, err = run_cli(["compare", path, "--no-progress", "--out", tmp_path])
    assert code == 2 and "--processor" not in err and "processors[0]" in err, err
    assert str(path) in err


def test_api_edges_found_while_documenting(tmp_path):
    # one processor object, target and share checked before any work, a folder that
    # is not a run folder, and an option verify does not take: all InputErrors
    import pytest as _pytest

    from adapt import api
    from adapt.errors import InputError as _InputError
    p = api.processors("smi loading_db=10")[0]
    assert api.processors(p) == [p]
    scene = api.load_scene(str(Path(__file__).resolve().parents[1] / "scenes" / "single_jammer.yaml"))
    with _pytest.raises(_InputError, match="target loss"):
        api.compare(scene, ["conventional"], trials=1, snapshots=8, target_db=float("nan"))
    with _pytest.raises(_InputError, match="share of trials"):
        api.compare(scene, ["conventional"], trials=1, snapshots=8, fraction=1.5)
    with _pytest.raises(_InputError, match="not a run folder"):
        api.read_run(tmp_path)
    with _pytest.raises(_InputError, match="no option"):
        api.verify(tmp_path, "x:y", timout=5)
