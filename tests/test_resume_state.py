"""Resume state is untrusted input: every stored chunk is tied to its plan and checked;
the run-folder life cycle leaves a folder either complete or resumable, never neither."""
from __future__ import annotations

import errno
import hashlib
import io as _io
import json
import shutil

import numpy as np
import pytest
import yaml

from adapt import io
from adapt.engine.chunks import ChunkStore, expected_arrays
from adapt.engine.plan import Plan, scene_mapping
from adapt.errors import InputError
from adapt.report import runfolder
from adapt.report.runfolder import MARKER, PARTIAL, RESUME_FILE
from adapt.scenefile import parse_scene
from adapt.studies.compare import compare

QUICK = {
    "name": "resume state",
    "array": {"layout": "line", "elements": 4, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 30, "power_db": 20}],
    "snapshots": 32, "trials": 9, "seed": 3,
    "processors": ["conventional", "smi loading_db=10"],
}


@pytest.fixture()
def stored(tmp_path):
    """A store holding the first two of three chunks (3 trials each) of QUICK."""
    scene = parse_scene(QUICK)
    seen = []

    def stop_after_two(first, count):
        seen.append(first)
        if len(seen) == 2:
            raise KeyboardInterrupt

    store = tmp_path / "partial"
    with pytest.raises(KeyboardInterrupt):
        compare(scene, chunk=3, store=store, on_chunk=stop_after_two, threads=1)
    assert ChunkStore(store).finished() == [(0, 3), (3, 3)]
    return scene, store


def _resume(scene, store):
    return compare(scene, chunk=3, store=store, threads=1)


def _rewrite(path, arrays, fix_record: bool):
    """Replace a chunk's arrays; with ``fix_record`` also its record's sha256 (as a
    careful editor would), so only the content checks can catch it."""
    buf = _io.BytesIO()
    np.savez(buf, **arrays)
    path.write_bytes(buf.getvalue())
    if fix_record:
        rec_path = path.with_suffix(".json")
        rec = json.loads(rec_path.read_text())
        rec["sha256"] = hashlib.sha256(buf.getvalue()).hexdigest()
        rec_path.write_text(json.dumps(rec))


def _load(path):
    with np.load(path) as z:
        return {k: z[k] for k in z.files}


def test_untouched_store_resumes_identically(stored):
    scene, store = stored
    resumed = _resume(scene, store)
    plain = compare(scene, threads=1)
    for a, b in zip(resumed.evaluation.processors, plain.evaluation.processors):
        np.testing.assert_array_equal(a.sinr, b.sinr)


def test_changed_value_is_refused(stored):
    scene, store = stored
    path = store / "chunk-000000000-000003.npz"
    arrays = _load(path)
    arrays["p0.sinr"] = arrays["p0.sinr"] * (1 + 1e-12)
    _rewrite(path, arrays, fix_record=False)
    with pytest.raises(InputError, match="sha256 does not match") as info:
        _resume(scene, store)
    assert info.value.file == str(path) and info.value.exit_code == 2


def test_nan_written_in_is_refused(stored):
    scene, store = stored
    path = store / "chunk-000000003-000003.npz"
    arrays = _load(path)
    arrays["p1.normalised"][0, -1] = np.nan
    _rewrite(path, arrays, fix_record=False)
    with pytest.raises(InputError, match="sha256"):
        _resume(scene, store)


def test_one_chunk_copied_over_another_is_refused(stored):
    scene, store = stored
    a, b = store / "chunk-000000000-000003.npz", store / "chunk-000000003-000003.npz"
    shutil.copy(a, b)
    with pytest.raises(InputError, match="sha256") as info:
        _resume(scene, store)
    assert info.value.file == str(b)
    # the record copied along too: it names other trials
    shutil.copy(a.with_suffix(".json"), b.with_suffix(".json"))
    with pytest.raises(InputError, match="not the chunk it is named after") as info:
        _resume(scene, store)
    assert info.value.file == str(b.with_suffix(".json"))


def test_float16_is_refused_even_with_a_fixed_record(stored):
    scene, store = stored
    path = store / "chunk-000000000-000003.npz"
    arrays = _load(path)
    arrays["p0.sinr"] = arrays["p0.sinr"].astype(np.float16)
    _rewrite(path, arrays, fix_record=True)
    with pytest.raises(InputError, match=r"p0.sinr is float16") as info:
        _resume(scene, store)
    assert info.value.file == str(path)


@pytest.mark.parametrize("trials", [1, 5])
def test_wrong_trial_count_under_a_chunk_name_is_refused(stored, trials):
    scene, store = stored
    path = store / "chunk-000000003-000003.npz"
    arrays = {k: (v if v.ndim == 0 else np.resize(v, (trials,) + v.shape[1:]))
              for k, v in _load(path).items()}
    _rewrite(path, arrays, fix_record=True)
    with pytest.raises(InputError, match=rf"\({trials}, "):
        _resume(scene, store)


def test_missing_or_extra_arrays_are_refused(stored):
    scene, store = stored
    path = store / "chunk-000000000-000003.npz"
    arrays = _load(path)
    del arrays["p1.loss_db"]
    arrays["note"] = np.array(["x"])
    _rewrite(path, arrays, fix_record=True)
    with pytest.raises(InputError, match="missing p1.loss_db.*unexpected note"):
        _resume(scene, store)


def test_truncated_chunk_is_refused_without_traceback(stored):
    scene, store = stored
    path = store / "chunk-000000000-000003.npz"
    path.write_bytes(path.read_bytes()[:100])
    with pytest.raises(InputError, match="sha256"):
        _resume(scene, store)
    # a chunk file without its record (a kill between the two writes) is computed again
    path.with_suffix(".json").unlink()
    _resume(scene, store)


def test_edited_plan_is_refused(stored):
    scene, store = stored
    plan_file = store / "plan.json"
    record = json.loads(plan_file.read_text())
    edited = parse_scene(dict(QUICK, sources=[QUICK["sources"][0],
                                              dict(QUICK["sources"][1], power_db=25)]))
    record["plan"]["scene"] = scene_mapping(edited)       # a jammer's power edited
    plan_file.write_text(json.dumps(record))
    with pytest.raises(InputError, match="changed after the run started") as info:
        _resume(edited, store)
    assert info.value.file == str(plan_file)
    # the digest recomputed as well: the stored chunks were made under the old plan
    plan = Plan.from_dict(record["plan"])
    plan_file.write_text(json.dumps({"plan": record["plan"], "digest": plan.digest()}))
    with pytest.raises(InputError, match="made under another plan"):
        _resume(edited, store)


@pytest.mark.parametrize("key, value", [("tail", -1), ("chunk", -3), ("tail", "x"),
                                        ("checkpoints", [])])
def test_bad_plan_values_are_refused(stored, key, value):
    scene, store = stored
    plan_file = store / "plan.json"
    record = json.loads(plan_file.read_text())
    record["plan"][key] = value
    plan_file.write_text(json.dumps(record))
    with pytest.raises(InputError, match=f"unreadable .*'{key}'"):
        _resume(scene, store)


def test_expected_arrays_match_what_the_engine_stores(stored):
    scene, store = stored
    chunks = ChunkStore(store)
    plan = chunks.adopt(Plan.from_dict(json.loads((store / "plan.json").read_text())["plan"]))
    arrays = chunks.load(0, 3)
    want = expected_arrays(2, len(plan.checkpoints), 4, 1, 3)
    assert {k: (str(v.dtype), v.shape) for k, v in arrays.items()} == want


# ------------------------------------------------------------------ run-folder life cycle
def _started(tmp_path):
    return runfolder.start_run_folder(tmp_path / "runs", "x", "compare", {"scene": {}})


def test_disk_full_at_folder_start_leaves_nothing(tmp_path, monkeypatch):
    real = io.atomic_write_bytes

    def full(path, data):
        if path.name in (RESUME_FILE, MARKER):
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return real(path, data)

    monkeypatch.setattr(io, "atomic_write_bytes", full)
    with pytest.raises(OSError):
        _started(tmp_path)
    assert list((tmp_path / "runs").iterdir()) == []


def test_seal_writes_the_manifest_before_removing_the_resume_state(tmp_path, monkeypatch):
    folder = _started(tmp_path)
    (folder / PARTIAL).mkdir()
    (folder / PARTIAL / "plan.json").write_text("{}")
    writer = runfolder.RunWriter(folder)
    writer.text("metrics.json", "{}")
    (folder / ".partial-report.html.123").write_text("half")     # a kill mid-write

    def killed(folder):
        raise KeyboardInterrupt                                   # between the two steps

    monkeypatch.setattr(runfolder, "finish_seal", killed)
    with pytest.raises(KeyboardInterrupt):
        writer.seal({"kind": "compare"})
    names = {p.name for p in folder.iterdir()}
    assert "manifest.json" in names and {MARKER, RESUME_FILE, PARTIAL} <= names
    assert not [n for n in names if n.startswith(".partial-")]
    manifest = json.loads((folder / "manifest.json").read_text())
    assert set(manifest["files"]) == {"metrics.json"}            # never the resume state
    monkeypatch.undo()
    # such a folder is complete: --resume finishes the sealing and says so
    assert runfolder.open_for_resume(folder, "compare") is None
    assert {p.name for p in folder.iterdir()} == {"metrics.json", "manifest.json"}
    assert io.check_manifest(folder) == []


def test_manifest_failure_keeps_the_folder_resumable(tmp_path, monkeypatch):
    folder = _started(tmp_path)
    writer = runfolder.RunWriter(folder)
    writer.text("metrics.json", "{}")

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device", str(folder / "manifest.json"))

    monkeypatch.setattr(io, "write_manifest", full)
    with pytest.raises(OSError):
        writer.seal({"kind": "compare"})
    assert (folder / MARKER).exists() and (folder / RESUME_FILE).exists()
    assert runfolder.open_for_resume(folder, "compare")["settings"] == {"scene": {}}


@pytest.mark.parametrize("record, match", [
    ({"kind": "compare", "settings": {}}, "no scene"),
    ({"kind": "compare"}, "no settings"),
    ([1, 2], "no settings"),
])
def test_bad_resume_records_are_refused(tmp_path, record, match):
    folder = _started(tmp_path)
    (folder / RESUME_FILE).write_text(json.dumps(record))
    with pytest.raises(InputError, match=match) as info:
        runfolder.open_for_resume(folder, "compare")
    assert info.value.file == str(folder / RESUME_FILE)


def test_cli_resume_record_without_checkpoints_is_refused(tmp_path, run_cli):
    scene_file = tmp_path / "s.yaml"
    scene_file.write_text(yaml.safe_dump(QUICK))
    folder = runfolder.start_run_folder(tmp_path / "runs", "x", "compare",
                                        {"scene": parse_scene(QUICK).resolved})
    code, _, err = run_cli(["compare", "--resume", folder, "--no-progress"])
    assert code == 2 and "settings.checkpoints" in err and "Traceback" not in err
    assert str(folder / RESUME_FILE) in err


def test_cli_tampered_chunk_is_refused_with_exit_2(tmp_path, run_cli, monkeypatch):
    from adapt.engine import chunks
    save = chunks.ChunkStore.save

    def save_then_stop(self, first, count, arrays):
        save(self, first, count, arrays)
        raise KeyboardInterrupt

    monkeypatch.setattr(chunks.ChunkStore, "save", save_then_stop)
    scene_file = tmp_path / "s.yaml"
    scene_file.write_text(yaml.safe_dump(QUICK))
    code, _, err = run_cli(["compare", scene_file, "--chunk", "3", "--threads", "1",
                            "--out", tmp_path / "runs", "--no-progress"])
    assert code == 130, err
    monkeypatch.setattr(chunks.ChunkStore, "save", save)
    (folder,) = (tmp_path / "runs").iterdir()
    (chunk,) = folder.glob("partial/chunk-*.npz")
    data = bytearray(chunk.read_bytes())
    data[-40] ^= 1
    chunk.write_bytes(bytes(data))
    code, _, err = run_cli(["compare", "--resume", folder, "--no-progress"])
    assert code == 2 and str(chunk) in err and "Traceback" not in err, err


def test_staged_folder_is_absent_or_complete(tmp_path):
    out = tmp_path / "set"
    stage = runfolder.StagedFolder(out)
    (stage.path / "a.txt").write_text("a")
    assert not out.exists() and stage.path.name.startswith(".partial-set-")
    assert stage.commit() == out and (out / "a.txt").read_text() == "a"
    assert not stage.path.exists()
    again = runfolder.StagedFolder(out)                   # the target is not empty
    with pytest.raises(InputError, match="cannot move the finished set into place"):
        again.commit()
    again.discard()
    assert not again.path.exists() and (out / "a.txt").exists()


@pytest.mark.parametrize("change, where", [({"processors": 5}, "settings.processors"),
                                           ({"chunk": -2}, "settings.chunk"),
                                           ({"chunk": "x"}, "settings.chunk")])
def test_cli_bad_size_resume_settings_are_refused(tmp_path, run_cli, change, where):
    settings = {"processors": ["smi"], "snapshots": "4:16", "trials": 4, "seed": 1,
                "target_loss_db": 3.0, "fraction": 0.9, "chunk": None, "draw": "samples",
                "scene": parse_scene(QUICK).resolved}
    folder = runfolder.start_run_folder(tmp_path / "runs", "x", "size",
                                        dict(settings, **change))
    code, _, err = run_cli(["size", "--resume", folder, "--no-progress"])
    assert code == 2 and where in err and "Traceback" not in err, err
