"""File-system faults: unwritable output, a full disk, damaged reference sets.

Each gives one clear line naming the path and the reason, a non-zero exit (3 when the
file system refuses a write, 2 for a damaged reference set), and nothing half-written:
no ``.partial-`` temporaries left behind and no file under its final name with partial
content. The full disk is simulated by a file object whose ``write`` stores half the
data and then raises ``OSError(ENOSPC)``; an unwritable folder by ``chmod 0o500`` when
the tests do not run as root (root ignores permission bits), else by a write that
raises ``PermissionError``.
"""
from __future__ import annotations

import errno
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pytest

import adapt.io as aio
from adapt.cli.main import EXIT_FILE_SYSTEM

SCENE = """name: fault drill
array: {layout: line, elements: 4}
sources:
  - {name: w, role: desired, azimuth: 0, power_db: 0}
  - {name: j, role: interferer, azimuth: 40, power_db: 20}
snapshots: 32
trials: 2
seed: 4
processors: [smi, "smi loading_db=10"]
"""


@pytest.fixture
def scene(tmp_path):
    path = tmp_path / "scene.yaml"
    path.write_text(SCENE, encoding="utf-8")
    return path


def _one_line(code, out, err, expected_code):
    assert code == expected_code, (code, out, err)
    assert "Traceback" not in err and "Traceback" not in out
    lines = [line for line in err.splitlines() if line.startswith("adapt: error:")]
    assert len(lines) == 1, err
    return lines[0]


def _no_partials(root: Path):
    left = [p for p in Path(root).rglob("*") if p.name.startswith(".partial-")]
    assert not left, left


def _complete_files(root: Path):
    """Every file under its final name is whole: JSON parses, .npy loads, manifests
    match where present."""
    for p in Path(root).rglob("*"):
        if p.is_file() and p.suffix == ".json":
            json.loads(p.read_text(encoding="utf-8"))
        if p.is_file() and p.suffix == ".npy":
            np.load(p, allow_pickle=False)
        if p.name == "manifest.json":
            assert aio.check_manifest(p.parent) == []


def _commands(scene, out):
    return {
        "compare": ["compare", scene, "--no-progress", "--out", out / "runs"],
        "size": ["size", scene, "--no-progress", "--trials", "3", "--snapshots", "4:8",
                 "--out", out / "runs"],
        "record": ["record", scene, "--processor", "smi loading_db=10", "--trials", "2",
                   "--out", out / "ref"],
    }


# --------------------------------------------------------------------------- paths
@pytest.mark.parametrize("command", ["compare", "size", "record"])
def test_output_path_through_a_regular_file(command, scene, tmp_path, run_cli):
    blocker = tmp_path / "blocker"
    blocker.write_text("not a folder\n")
    argv = _commands(scene, blocker)[command]
    line = _one_line(*run_cli(argv), EXIT_FILE_SYSTEM)
    assert str(blocker) in line and "not a folder" in line
    assert blocker.read_text() == "not a folder\n"          # untouched


def test_junit_path_through_a_regular_file(scene, tmp_path, run_cli):
    ref = tmp_path / "ref"
    assert run_cli(["record", scene, "--processor", "smi", "--out", ref])[0] == 0
    blocker = tmp_path / "blocker"
    blocker.write_text("x")
    code, out, err = run_cli(["verify", ref, "--python",
                              "adapt.studies.reference:reference_implementation",
                              "--junit", blocker / "results.xml"])
    line = _one_line(code, out, err, EXIT_FILE_SYSTEM)
    assert f"{blocker / 'results.xml'}: Not a directory" in line      # the final name
    assert "PASS" in out                                      # the verdict was printed


@pytest.mark.parametrize("command", ["compare", "record"])
def test_unwritable_output_folder(command, scene, tmp_path, run_cli, monkeypatch):
    locked = tmp_path / "locked"
    locked.mkdir()
    if os.geteuid() != 0:
        locked.chmod(0o500)                                   # r-x: no new entries
    else:                                                     # root ignores the bits
        real_open = open

        def refuse(path, mode="r", *args, **kwargs):
            if "w" in mode and str(locked) in str(path):
                raise PermissionError(errno.EACCES, "Permission denied", str(path))
            return real_open(path, mode, *args, **kwargs)

        monkeypatch.setattr(aio, "open", refuse, raising=False)
        real_mkdir = Path.mkdir

        def no_mkdir(self, *args, **kwargs):
            if str(locked) in str(self) and self != locked:
                raise PermissionError(errno.EACCES, "Permission denied", str(self))
            return real_mkdir(self, *args, **kwargs)

        monkeypatch.setattr(Path, "mkdir", no_mkdir)
    try:
        argv = _commands(scene, locked)[command]
        line = _one_line(*run_cli(argv), EXIT_FILE_SYSTEM)
        assert "Permission denied" in line and str(locked) in line
        assert "choose a folder you may write to" in line
    finally:
        locked.chmod(0o700)
    _no_partials(locked)
    _complete_files(locked)


# --------------------------------------------------------------------------- full disk
class _FullDisk:
    """Stands in for ``open`` in adapt.io: files whose name contains ``target`` take
    half of what is written, then the disk is full."""

    def __init__(self, target: str):
        self.target = target
        self.hits = 0
        self.real = open

    def __call__(self, path, mode="r", *args, **kwargs):
        fh = self.real(path, mode, *args, **kwargs)
        if "w" in mode and self.target in Path(path).name:
            self.hits += 1
            outer = self

            class Half:
                def __enter__(self):
                    return self

                def __exit__(self, *exc):
                    fh.close()
                    return False

                def write(self, data):
                    fh.write(data[: len(data) // 2])
                    fh.flush()
                    raise OSError(errno.ENOSPC, "No space left on device")

                def flush(self):
                    fh.flush()

                def fileno(self):
                    return fh.fileno()

            del outer
            return Half()
        return fh


@pytest.mark.parametrize("target", ["scene.yaml", "metrics.json", "curves.csv",
                                    "report.html", "manifest.json"])
def test_disk_full_during_compare(target, scene, tmp_path, run_cli, monkeypatch):
    full = _FullDisk(target)
    monkeypatch.setattr(aio, "open", full, raising=False)
    out = tmp_path / "out"
    code, stdout, err = run_cli(["compare", scene, "--no-progress", "--out", out / "runs"])
    line = _one_line(code, stdout, err, EXIT_FILE_SYSTEM)
    assert full.hits == 1
    assert "No space left on device" in line and "free some space" in line
    assert line.split(": ")[2].endswith(target)          # names the final file, not a temp
    _no_partials(out)
    _complete_files(out)
    # the file that could not be written is absent and the run is not marked complete:
    # the folder is kept, marked INCOMPLETE and resumable with its finished chunks, also
    # when the manifest failed (the resume state is removed only after the manifest
    # exists, adapt.report.runfolder)
    for folder in (out / "runs").iterdir():
        assert not (folder / target).exists()
        assert not (folder / "manifest.json").exists()
        assert (folder / "INCOMPLETE").exists() and (folder / "partial").is_dir()
    assert any((out / "runs").iterdir())


@pytest.mark.parametrize("target", ["samples.npy", "case.json", "samples.sigmf-data",
                                    "manifest.json"])
def test_disk_full_during_record(target, scene, tmp_path, run_cli, monkeypatch):
    full = _FullDisk(target)
    monkeypatch.setattr(aio, "open", full, raising=False)
    out = tmp_path / "out"
    line = _one_line(*run_cli(_commands(scene, out)["record"]), EXIT_FILE_SYSTEM)
    assert "No space left on device" in line
    # the set is built in a temporary sibling folder and removed on failure: nothing left
    assert not (out / "ref").exists()
    assert [p.name for p in out.iterdir()] == [] if out.exists() else True


def test_failed_write_keeps_the_previous_file(tmp_path, monkeypatch):
    # the library raises OSError naming the final path; the old content survives
    path = tmp_path / "keep.json"
    aio.write_json(path, {"old": 1})
    monkeypatch.setattr(aio, "open", _FullDisk("keep.json"), raising=False)
    with pytest.raises(OSError) as info:
        aio.write_json(path, {"new": 2})
    assert info.value.errno == errno.ENOSPC and info.value.filename == str(path)
    assert json.loads(path.read_text()) == {"old": 1}
    _no_partials(tmp_path)


# --------------------------------------------------------------------------- references
@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    from adapt.scenefile import parse_scene
    from adapt.studies.reference import record
    root = tmp_path_factory.mktemp("faultref")
    return record(parse_scene(SCENE), "smi loading_db=10", 2, 32, [4, 8, 32], root / "set")


def _damaged(reference, tmp_path, damage):
    folder = tmp_path / "set"
    shutil.copytree(reference, folder)
    damage(folder)
    return folder


def _reseal(folder):
    manifest = json.loads((folder / "manifest.json").read_text())
    aio.write_manifest(folder, {k: v for k, v in manifest.items() if k != "files"})


def _truncate(path):
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


DAMAGE = {
    "missing-file": (lambda f: (f / "case-0000" / "weights.npy").unlink(),
                     "case-0000/weights.npy: listed in the manifest but missing"),
    "missing-case": (lambda f: shutil.rmtree(f / "case-0001"),
                     "case-0001/case.json: listed in the manifest but missing"),
    "flipped-bytes": (lambda f: (f / "case-0000" / "samples.npy").write_bytes(
        (f / "case-0000" / "samples.npy").read_bytes()[:-8] + b"\xff" * 8),
        "case-0000/samples.npy: sha256 does not match"),
    "missing-manifest": (lambda f: (f / "manifest.json").unlink(), "manifest.json is missing"),
    "garbage-manifest": (lambda f: (f / "manifest.json").write_bytes(b"\x00\x01garbage"),
                         "is not a readable manifest"),
    "truncated-resealed": (lambda f: (_truncate(f / "case-0000" / "weights.npy"), _reseal(f)),
                           "weights.npy: not a readable .npy array"),
    "pickled-resealed": (lambda f: (np.save(f / "case-0000" / "steering.npy",
                                            np.array([{"x": 1}], dtype=object),
                                            allow_pickle=True), _reseal(f)),
                         "steering.npy: not a readable .npy array"),
    "wrong-shape-resealed": (lambda f: (np.save(f / "case-0001" / "weights.npy",
                                                np.zeros((2, 4), complex)), _reseal(f)),
                             "has shape (2, 4), expected (3, 4)"),
    "bad-json-resealed": (lambda f: ((f / "case-0000" / "case.json").write_text("{oops"),
                                     _reseal(f)), "case.json: not readable JSON"),
    "not-a-set": (lambda f: (shutil.rmtree(f), f.mkdir()), "manifest.json is missing"),
}


@pytest.mark.parametrize("name", list(DAMAGE))
def test_damaged_reference_set(name, reference, tmp_path, run_cli):
    damage, words = DAMAGE[name]
    folder = _damaged(reference, tmp_path, damage)
    code, out, err = run_cli(["verify", folder, "--python",
                              "adapt.studies.reference:reference_implementation"])
    line = _one_line(code, out, err, 2)
    assert words in line, line
    assert str(folder) in line


def test_missing_reference_folder(tmp_path, run_cli):
    line = _one_line(*run_cli(["verify", tmp_path / "nowhere", "--python",
                               "adapt.studies.reference:reference_implementation"]), 2)
    assert "no such reference-set folder" in line


def test_file_too_large_names_a_place_and_the_limit():
    # ulimit -f: numba's cache write raises EFBIG without a file name
    import errno

    from adapt.cli.main import file_system_message
    text = file_system_message(OSError(errno.EFBIG, "File too large"))
    assert "ulimit -f" in text and "cache" in text
    text = file_system_message(OSError(errno.EFBIG, "File too large", "/tmp/x/metrics.json"))
    assert text.startswith("/tmp/x/metrics.json: File too large")
