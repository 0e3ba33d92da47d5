"""Reference sets and candidates as untrusted input (adapt/studies/reference.py).

A green ``adapt verify`` must mean that every file the set uses was checked and every
case ran: tampered sets are refused (exit 2), a misbehaving candidate fails its own case
(exit 1) and the summary and JUnit file are always written. JUnit XML as CI servers
read it (common practice).
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
import time
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from adapt import io as aio
from adapt.errors import CorruptReferenceError
from adapt.scenefile import parse_scene
from adapt.studies.reference import (
    format_report,
    load_reference,
    record,
    reference_implementation,
    verify,
)

SCENE = {
    "name": "untrusted reference line",
    "array": {"layout": "line", "elements": 4, "spacing": 0.5},
    "sources": [
        {"name": "wanted", "role": "desired", "azimuth": 10, "power_db": 0, "waveform": "qpsk"},
        {"name": "jam", "role": "interferer", "azimuth": -40, "power_db": 30},
    ],
    "snapshots": 32, "trials": 2, "seed": 5,
}
IMPL = "adapt.studies.reference:reference_implementation"


@pytest.fixture(scope="module")
def genuine(tmp_path_factory):
    out = tmp_path_factory.mktemp("untrusted") / "set"
    return record(parse_scene(SCENE), "smi loading_db=10", 2, 32, [4, 8, 32], out)


@pytest.fixture
def copy(genuine, tmp_path):
    def make(name="set"):
        dst = tmp_path / name
        shutil.copytree(genuine, dst)
        return dst
    return make


def manifest(folder: Path) -> dict:
    return json.loads((folder / "manifest.json").read_text())


def save_manifest(folder: Path, doc: dict) -> None:
    (folder / "manifest.json").write_text(json.dumps(doc))


def reseal(folder: Path) -> None:
    doc = manifest(folder)
    aio.write_manifest(folder, {k: v for k, v in doc.items() if k != "files"})


def ones(case):
    return np.ones((len(case.checkpoints), case.samples.shape[1]), complex)


def refused(run_cli, folder, words):
    code, out, err = run_cli(["verify", folder, "--python", IMPL])
    assert code == 2, (code, out, err)
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1, err
    assert words in err, err
    return err


# ---------------------------------------------------------------------- item 1: manifest
def test_unlisted_tolerances_refused(copy, run_cli):
    bad = copy()
    assert not verify(load_reference(bad), ones).passed          # the genuine set fails it
    (bad / "tolerances.json").write_text(json.dumps(
        {"tolerances": {"sinr_db": 1000, "weight_error_db": 1000, "output_evm_db": 1000}}))
    doc = manifest(bad)
    del doc["files"]["tolerances.json"]
    save_manifest(bad, doc)
    with pytest.raises(CorruptReferenceError, match="tolerances.json: not listed"):
        load_reference(bad)
    refused(run_cli, bad, "tolerances.json: not listed in the manifest")


def test_empty_file_list_refused(copy, run_cli):
    bad = copy()
    doc = manifest(bad)
    doc["files"] = {}
    save_manifest(bad, doc)
    refused(run_cli, bad, "not listed in the manifest")


def test_changed_weights_with_entry_removed_refused(copy, run_cli):
    bad = copy()
    aio.write_npy(bad / "case-0000" / "weights.npy", np.ones((3, 4), complex))
    doc = manifest(bad)
    del doc["files"]["case-0000/weights.npy"]
    save_manifest(bad, doc)
    refused(run_cli, bad, "case-0000/weights.npy: not listed in the manifest")


def test_extra_listed_file_refused(copy, run_cli):
    bad = copy()
    (bad / "case-0001" / "notes.txt").write_text("hello\n")
    reseal(bad)                                           # listed and matching, but foreign
    refused(run_cli, bad, "case-0001/notes.txt is not part of a reference set")


def test_size_mismatch_refused_before_hashing(copy, run_cli):
    bad = copy()
    doc = manifest(bad)
    doc["files"]["case-0000/samples.npy"]["bytes"] += 1
    save_manifest(bad, doc)
    refused(run_cli, bad, "case-0000/samples.npy")


# ---------------------------------------------------------------------- item 7: paths
@pytest.mark.parametrize("entry", ["../../../../etc/passwd", "/etc/hostname",
                                   "case-0000/../../x", "a/b/c"])
def test_manifest_paths_outside_the_set_refused(copy, run_cli, entry):
    bad = copy()
    doc = manifest(bad)
    doc["files"][entry] = {"sha256": "0" * 64, "bytes": 1}
    save_manifest(bad, doc)
    refused(run_cli, bad, "not a file inside the set")


def test_symlinked_file_refused(copy, run_cli, tmp_path):
    bad = copy()
    outside = tmp_path / "outside.npy"
    shutil.copyfile(bad / "case-0000" / "weights.npy", outside)
    (bad / "case-0000" / "weights.npy").unlink()
    (bad / "case-0000" / "weights.npy").symlink_to(outside)   # same bytes, same digest
    refused(run_cli, bad, "case-0000/weights.npy: is not a regular file")


def test_symlinked_case_refused(copy, run_cli, tmp_path):
    bad = copy()
    shutil.move(bad / "case-0001", tmp_path / "elsewhere")
    (bad / "case-0001").symlink_to(tmp_path / "elsewhere")
    refused(run_cli, bad, "case-0001: is a symbolic link")


def test_fifo_does_not_hang(copy, run_cli):
    bad = copy()
    target = bad / "case-0000" / "outputs.npy"
    target.unlink()
    os.mkfifo(target)                                     # the manifest entry is kept
    refused(run_cli, bad, "outputs.npy: is not a regular file")


def test_npy_header_claiming_terabytes_refused(copy, run_cli):
    bad = copy()
    target = bad / "case-0000" / "weights.npy"
    header = {"descr": "<c16", "fortran_order": False, "shape": (3, 2 ** 38)}  # 11 TiB
    with open(target, "wb") as fh:
        np.lib.format.write_array_header_1_0(fh, header)
        fh.write(b"\0" * 192)
    reseal(bad)
    err = refused(run_cli, bad, "header describes")
    assert "weights.npy" in err


def test_random_bytes_are_not_called_pickled(copy, run_cli):
    bad = copy()
    (bad / "case-0000" / "weights.npy").write_bytes(np.random.default_rng(0).bytes(200))
    reseal(bad)
    err = refused(run_cli, bad, "does not start with the NumPy header")
    assert "pickled" not in err


# ---------------------------------------------------------------------- item 6 and 14: case names
def _rename_case(folder: Path, old: str, new: str) -> None:
    (folder / old).rename(folder / new)
    info = json.loads((folder / "reference.json").read_text())
    info["cases"] = [new if c == old else c for c in info["cases"]]
    (folder / "reference.json").write_text(json.dumps(info))
    reseal(folder)


def test_shell_injection_case_name_refused(copy, run_cli, tmp_path):
    bad = copy()
    _rename_case(bad, "case-0001", "c$(touch${IFS}PWNED)")
    code, out, err = run_cli(["verify", bad, "--command",
                              "sh -c 'cp {case}/../x {out}' {case} {out}"])
    assert code == 2 and "Traceback" not in err, err
    assert not (Path.cwd() / "PWNED").exists()
    info = json.loads((bad / "reference.json").read_text())
    (bad / "c$(touch${IFS}PWNED)").rename(bad / "case-0001")
    info["cases"] = ["case-0000", "case-0000"]
    (bad / "reference.json").write_text(json.dumps(info))
    reseal(bad)
    refused(run_cli, bad, "expected 'case-0001'")


def test_one_case_listed_twenty_thousand_times_refused(copy, run_cli):
    bad = copy()
    info = json.loads((bad / "reference.json").read_text())
    info["cases"] = ["case-0000"] * 20_000
    (bad / "reference.json").write_text(json.dumps(info))
    reseal(bad)
    refused(run_cli, bad, "lists 20,000 cases")


@pytest.mark.slow
def test_command_gets_paths_in_the_environment(genuine, tmp_path):
    # no shell: the template's words are passed as they are, the paths in ADAPT_CASE /
    # ADAPT_OUT for templates that run one
    prog = tmp_path / "cand.py"
    prog.write_text(textwrap.dedent("""
        import os, sys, numpy as np
        assert sys.argv[1] == os.environ["ADAPT_CASE"] and sys.argv[2] == os.environ["ADAPT_OUT"]
        c = np.load(os.path.join(sys.argv[1], "checkpoints.npy"))
        np.save(sys.argv[2], np.ones((len(c), 4), complex))
    """))
    rep = verify(genuine, f"{sys.executable} {prog} {{case}} {{out}}", timeout=60)
    assert [c.kind for c in rep.cases] == ["failure", "failure"], format_report(rep)


# ---------------------------------------------------------------------- item 2: python candidates
@pytest.mark.parametrize("exc", [SystemExit(0), KeyboardInterrupt(), GeneratorExit()])
def test_base_exceptions_are_the_case_error(genuine, exc):
    def bad(case):
        if case.name == "case-0001":
            raise exc
        return reference_implementation(case)
    rep = verify(genuine, bad)
    assert [c.kind for c in rep.cases] == ["pass", "error"]
    assert rep.exit_code == 1 and type(exc).__name__ in rep.cases[1].message


def test_sys_exit_in_function_and_at_import(genuine, tmp_path, run_cli):
    mod = tmp_path / "exits.py"
    mod.write_text("import sys\n\ndef f(case):\n    sys.exit(0)\n")
    junit = tmp_path / "a.xml"
    code, out, err = run_cli(["verify", genuine, "--python", f"{mod}:f", "--junit", junit])
    assert code == 1 and "FAIL" in out and "sys.exit(0)" in out, out + err
    suite = ET.parse(junit).getroot().find("testsuite")
    assert suite.get("errors") == "2"
    mod2 = tmp_path / "exits_at_import.py"
    mod2.write_text("import sys\nsys.exit(0)\n\ndef f(case):\n    return None\n")
    junit2 = tmp_path / "b.xml"
    code, out, err = run_cli(["verify", genuine, "--python", f"{mod2}:f", "--junit", junit2])
    assert code == 1 and "SystemExit" in out, out + err
    assert ET.parse(junit2).getroot().find("testsuite").get("errors") == "2"


@pytest.mark.slow
def test_hard_exit_leaves_a_failing_junit(genuine, tmp_path):
    mod = tmp_path / "hard.py"
    mod.write_text("import os\n\ndef f(case):\n    os._exit(0)\n")
    junit = tmp_path / "j.xml"
    subprocess.run([sys.executable, "-m", "adapt", "verify", str(genuine), "--python",
                    f"{mod}:f", "--junit", str(junit)], capture_output=True, timeout=120)
    suite = ET.parse(junit).getroot().find("testsuite")
    assert suite.get("errors") == "2" and "not run" in ET.tostring(suite).decode()


def test_malicious_array_like_is_a_failure(genuine):
    class Hostile:
        def __array__(self, *a, **k):
            raise SystemExit(0)
    rep = verify(genuine, lambda case: Hostile())
    assert all(c.kind == "failure" for c in rep.cases)


# ---------------------------------------------------------------------- item 8: commands
@pytest.mark.slow
def test_grandchild_in_new_session_is_killed_at_the_timeout(genuine, tmp_path):
    pidfile = tmp_path / "pid"
    prog = tmp_path / "escape.py"
    prog.write_text(textwrap.dedent(f"""
        import os, subprocess, sys, time
        p = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(300)"],
                             start_new_session=True)
        open({str(pidfile)!r}, "a").write(f"{{p.pid}}\\n")
        time.sleep(300)
    """))
    t0 = time.monotonic()
    rep = verify(genuine, f"{sys.executable} {prog} {{case}} {{out}}", timeout=2)
    spent = time.monotonic() - t0
    assert all(c.kind == "error" and "timed out" in c.message for c in rep.cases)
    assert spent < 30                   # two cases of 2 s, not the 300 s of the grandchild
    for line in pidfile.read_text().split():
        for _ in range(100):
            try:
                os.kill(int(line), 0)
            except ProcessLookupError:
                break
            # a killed process not yet reaped by its parent is a zombie: check its state
            try:
                if Path(f"/proc/{line}/stat").read_text().split()[2] == "Z":
                    break
            except OSError:
                break
            time.sleep(0.05)
        else:
            pytest.fail(f"grandchild {line} survived")


@pytest.mark.slow
def test_huge_stderr_is_capped(genuine, tmp_path):
    prog = tmp_path / "loud.py"
    prog.write_text("import sys\nfor _ in range(400):\n    sys.stderr.write('x' * 65535 + "
                    "'\\n')\nsys.stderr.write('\\x1b]0;pwned\\x07\\x1b[2Jlast words\\n')\n"
                    "sys.exit(3)\n")
    rep = verify(genuine, f"{sys.executable} {prog} {{case}} {{out}}", timeout=60)
    c = rep.cases[0]
    assert c.kind == "error" and "exited with code 3" in c.message
    assert "output of" in c.details and len(c.details) < 10_000
    text = format_report(rep)
    assert "\x1b" not in text and "\\x1b]0;pwned" in text and "last words" in text


# ---------------------------------------------------------------------- issue 18: messages
def test_every_failing_metric_is_named(genuine):
    rep = verify(genuine, lambda case: reference_implementation(case) + 1e-3,
                 tolerances=["sinr_db=10", "weight_error_db=-100", "output_evm_db=-100"])
    for c in rep.cases:
        assert "weight_error_db" in c.message and "output_evm_db" in c.message, c.message
        assert {f[0] for f in c.failing} == {"weight_error_db", "output_evm_db"}
    text = format_report(rep)
    # one "worst" line per metric: ranked within the metric, never across units
    worst = [line for line in text.splitlines() if line.startswith("worst:")]
    assert len(worst) == 3 and all(m in text for m in ("sinr_db =", "weight_error_db =",
                                                       "output_evm_db ="))
    assert "over the tolerance" in worst[0] and "within the tolerance" in worst[-1]


def test_scale_hint_and_scale_blind_option(genuine, run_cli):
    def scaled(case):
        return reference_implementation(case) * 1.017
    rep = verify(genuine, scaled)
    assert not rep.passed
    for c in rep.cases:
        assert [f[0] for f in c.failing] == ["output_evm_db"]
        assert "matches up to a scale of 1.017" in c.message, c.message
    assert verify(genuine, scaled, scale_blind=True).passed
    code, out, err = run_cli(["verify", genuine, "--python",
                              f"{Path(__file__).parent / 'reference_candidate.py'}:loaded_smi",
                              "--scale-blind"])
    assert code == 0 and "scale-blind" in out, out + err
    # complex scale: said with its phase
    rep = verify(genuine, lambda case: reference_implementation(case) * 2j)
    assert "at -90.0 degrees" in rep.cases[0].message or "at 90.0 degrees" in rep.cases[0].message


# ---------------------------------------------------------------------- space-time sets
@pytest.fixture(scope="module")
def genuine_space_time(tmp_path_factory):
    out = tmp_path_factory.mktemp("untrusted-st") / "set"
    return record(parse_scene(SCENE), "smi taps=2 loading_db=10", 2, 32, [4, 8, 32], out)


def _edit_json(folder: Path, rel: str, change) -> None:
    path = folder / rel
    doc = json.loads(path.read_text())
    change(doc)
    path.write_text(json.dumps(doc))
    reseal(folder)                                # listed and matching: only the content lies


def _set_weights(key, value):
    def change(doc):
        doc["weights"][key] = value
    return change


@pytest.mark.parametrize("change, words", [
    (_set_weights("taps", 10 ** 12), "'weights' must give shape"),
    (_set_weights("taps", "2"), "'weights' must give shape"),
    (_set_weights("taps", -1), "'weights' must give shape"),
    (_set_weights("taps", 2.0), "'weights' must give shape"),
    (_set_weights("elements", 3), "'weights' must give shape"),
    (_set_weights("shape", [3, 2 ** 40]), "'weights' must give shape"),
    (_set_weights("shape", "3 x 8"), "'weights' must give shape"),
    (_set_weights("column", "n*L + l"), "column order"),
    (lambda doc: doc.update(weights=[3, 8]), "'weights' must give shape"),
    (lambda doc: doc.pop("weights"), "'weights' must give shape"),
    (lambda doc: doc.update(format_version=1), "version 1 set holds spatial weights"),
    (lambda doc: doc.update(format_version=99), "format_version '99' is not one"),
    (lambda doc: doc.update(fractional_bandwidth="wide"), "fractional_bandwidth"),
])
def test_bogus_shape_header_refused(genuine_space_time, tmp_path, run_cli, change, words):
    bad = tmp_path / "set"
    shutil.copytree(genuine_space_time, bad)
    _edit_json(bad, "reference.json", change)
    with pytest.raises(CorruptReferenceError, match="reference.json"):
        load_reference(bad)
    refused(run_cli, bad, words)


def test_case_shape_header_and_arrays_must_agree(genuine_space_time, genuine, tmp_path,
                                                 run_cli):
    bad = tmp_path / "case"
    shutil.copytree(genuine_space_time, bad)
    _edit_json(bad, "case-0001/case.json", _set_weights("taps", 3))
    refused(run_cli, bad, "case-0001/case.json: its weights mapping must equal")
    # weights of the spatial shape in a space-time set
    bad = tmp_path / "arrays"
    shutil.copytree(genuine_space_time, bad)
    aio.write_npy(bad / "case-0000" / "weights.npy", np.ones((3, 4), complex))
    reseal(bad)
    refused(run_cli, bad, "has shape (3, 4), expected (3, 8)")
    # a spatial set claiming space-time weights: the truth of R_s is missing
    bad = tmp_path / "claim"
    shutil.copytree(genuine, bad)
    _edit_json(bad, "reference.json", lambda doc: doc.update(
        format_version=2, fractional_bandwidth=0.0,
        weights={"shape": [3, 4], "elements": 4, "taps": 1, "column": "l*N + n"}))
    refused(run_cli, bad, "truth_signal_covariance.npy: missing")
