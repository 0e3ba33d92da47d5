"""The compiled kernels load from numba's on-disk cache in a new process, and the
commands that run no kernel import neither numba nor the heavy plotting and statistics
libraries.

Source of the cache check: numba's dispatcher statistics (``Dispatcher.stats``:
``cache_hits`` and ``cache_misses`` count, per signature, the overloads loaded from or
missing in the on-disk cache; numba documentation, "Notes on caching").
"""
from __future__ import annotations

import importlib.util
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

HAVE_NUMBA = importlib.util.find_spec("numba") is not None
ROOT = Path(__file__).resolve().parents[1]

_REPORT = """
import json
from adapt.numerics import kernels
kernels.warm_up()
stats = {f.__name__: [sum(f.stats.cache_hits.values()), sum(f.stats.cache_misses.values())]
         for f in kernels.loops().KERNELS}
print(json.dumps(stats))
"""


def _run(code: str, **env) -> subprocess.CompletedProcess:
    full = dict(os.environ, **env)
    full.pop("ADAPT_KERNELS", None)
    full.update(env)
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=ROOT, env=full, timeout=600)


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba not installed")
def test_a_second_process_loads_every_kernel_from_the_cache():
    # the first process compiles what the cache lacks (or loads it); the second must
    # find every kernel's every signature there and compile nothing
    first = _run(_REPORT)
    assert first.returncode == 0, first.stderr
    second = _run(_REPORT)
    assert second.returncode == 0, second.stderr
    stats = json.loads(second.stdout.strip().splitlines()[-1])
    assert len(stats) == 15
    for name, (hits, misses) in stats.items():
        assert misses == 0 and hits >= 1, (name, hits, misses)


_MODULES = """
import sys
from adapt.cli.main import main
try:
    code = main(ARGS)
except SystemExit as exc:
    code = exc.code
heavy = [m for m in ("numba", "matplotlib", "scipy.stats", "scipy.signal")
         if m in sys.modules]
sys.stderr.write(repr(heavy))
"""


@pytest.mark.parametrize("args", [["--help"], ["--version"],
                                  ["check", "scenes/jammer_rich.yaml"],
                                  ["check", "scenes/grid.yaml", "scenes/ring.yaml"]])
def test_quick_commands_import_no_heavy_library(args):
    # --help, --version and check run no kernel and draw nothing: numba, matplotlib
    # and scipy.stats stay unimported (they cost seconds of start-up)
    done = _run(_MODULES.replace("ARGS", repr(args)))
    assert done.returncode == 0, done.stderr
    assert done.stderr.strip().splitlines()[-1] == "[]", done.stderr


def test_report_modules_import_matplotlib_only_to_draw():
    # the report modules load without matplotlib; drawing a figure imports it
    code = ("import sys\n"
            "import adapt.report.figures as F, adapt.report.html, adapt.report.runfolder\n"
            "before = 'matplotlib' in sys.modules\n"
            "fig, ax = F.new_figure()\n"
            "print(before, 'matplotlib' in sys.modules, F.is_png(F.save_png(fig)))\n")
    done = _run(code)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split() == ["False", "True", "True"]


def test_preload_imports_in_the_background_and_swallows_failures():
    # compare and size import the plotting library while the trials run; a module that
    # cannot be imported is left for the place that uses it to report
    import threading

    from adapt.cli import _run
    sys.modules.pop("colorsys", None)
    _run.preload("adapt_no_such_module", "colorsys")
    for t in threading.enumerate():
        if t.name == "adapt-preload":
            t.join(timeout=60)
    assert "colorsys" not in sys.modules      # stopped at the first failure
    _run.preload("colorsys")
    for t in threading.enumerate():
        if t.name == "adapt-preload":
            t.join(timeout=60)
    assert "colorsys" in sys.modules


def test_a_numba_that_fails_to_import_counts_as_absent():
    # auto falls back to numpy (and the wrappers run their numpy twins); numba mode says
    # why it cannot run
    code = ("import sys, numpy as np\n"
            "sys.modules['numba'] = None\n"
            "from adapt.numerics import kernels\n"
            "ok = not kernels.compiled()\n"
            "x = np.ones((2, 3, 4), complex)\n"
            "w = kernels.lms_block(np.zeros((2, 4), complex), x, [2], gain=0.1)\n"
            "import os\n"
            "os.environ['ADAPT_KERNELS'] = 'numba'\n"
            "try:\n"
            "    kernels.compiled()\n"
            "    ok = False\n"
            "except RuntimeError as exc:\n"
            "    ok = ok and 'not installed' in str(exc)\n"
            "print(ok, w.shape)\n")
    done = _run(code)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "True (2, 1, 4)"


def test_a_command_sets_one_blas_thread_unless_the_user_chose():
    from adapt.cli.main import one_blas_thread_per_engine_thread
    env = {}
    assert one_blas_thread_per_engine_thread(env)
    assert env["OPENBLAS_NUM_THREADS"] == "1" and env["MKL_NUM_THREADS"] == "1"
    for chosen in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        env = {chosen: "4"}
        assert not one_blas_thread_per_engine_thread(env)
        assert env == {chosen: "4"}


_COMMAND_MODULES = """
import json, sys, tempfile
from adapt.cli.main import main
with tempfile.TemporaryDirectory() as out:
    code = main(ARGS + ["--out", out, "--no-progress"])
    heavy = [m for m in HEAVY if m in sys.modules]
sys.stderr.write(json.dumps([code, heavy]))
"""


@pytest.mark.parametrize("args,heavy", [
    # the tapers are computed in numpy (adapt.numerics.tapers): scipy.signal alone
    # costs most of a second of import
    (["compare", "scenes/jammer_rich.yaml", "--trials", "3", "--snapshots", "64"],
     ["scipy.signal", "scipy.stats"]),
    # the Beta law's quantiles and tail come from scipy.special (a quarter of
    # scipy.stats' import time), and nothing size preloads beside its trials imports
    # scipy.linalg, so size may skip numba's BLAS check like the other commands
    (["size", "scenes/single_jammer.yaml", "--trials", "20", "--snapshots", "8,16,32"],
     ["scipy.stats", "scipy.linalg"]),
], ids=["compare", "size"])
def test_a_command_leaves_the_heavy_scipy_modules_unimported(args, heavy):
    done = _run(_COMMAND_MODULES.replace("ARGS", repr(args)).replace("HEAVY", repr(heavy)))
    assert done.returncode == 0, done.stderr
    code, loaded = json.loads(done.stderr.strip().splitlines()[-1])
    assert code == 0 and loaded == []


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba not installed")
def test_a_command_sets_numba_up_without_scipy_blas_and_scipy_still_imports(tmp_path):
    # numba's first set-up imports scipy.linalg only to check for BLAS (a quarter of a
    # second); a command runs no numba code of its own, so it skips that import; scipy
    # imports normally afterwards, and the kernels' results are those of the library
    # default (which leaves numba's check alone: other numba code may need np.dot)
    code = ("import sys, json, numpy as np\n"
            "from adapt.cli.main import main\n"
            "code = main(ARGS)\n"
            "skipped = 'scipy.linalg' not in sys.modules\n"
            "import numba.np.arraymath as am\n"
            "from scipy import linalg\n"
            "ok = bool(np.isclose(linalg.cholesky([[4.0]])[0, 0], 2.0))\n"
            "print(json.dumps([code, skipped, bool(am._HAVE_BLAS), ok]))\n")
    args = ["compare", "scenes/single_jammer.yaml", "--trials", "3", "--snapshots", "64",
            "-p", "nlms", "-p", "rls", "--no-progress", "--out", str(tmp_path)]
    done = _run(code.replace("ARGS", repr(args)), ADAPT_KERNELS="numba")
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout.strip().splitlines()[-1]) == [0, True, False, True]
    lib = _run("from adapt.numerics import kernels\nkernels.warm_up()\n"
               "import numba.np.arraymath as am\nprint(am._HAVE_BLAS)\n")
    assert lib.returncode == 0, lib.stderr
    assert lib.stdout.strip().splitlines()[-1] == "True"


def test_only_commands_without_a_concurrent_scipy_import_skip_numbas_blas_check():
    # a command whose threads import scipy.linalg while the kernels first load must
    # never meet the mark; none does (size preloads scipy.special, which does not)
    from adapt.cli.main import build_parser
    parser = build_parser()
    skip = {}
    for words in (["compare", "x.yaml"], ["sweep", "x.yaml"], ["size", "x.yaml"],
                  ["record", "x.yaml", "--processor", "smi", "--out", "o"],
                  ["verify", "ref", "--command", "prog"]):
        args, _ = parser.parse_known_args(words)
        skip[words[0]] = getattr(args, "numba_without_blas", False)
    assert skip == {"compare": True, "sweep": True, "size": True, "record": True,
                    "verify": True}


def test_the_command_process_flushes_everything_and_keeps_exit_codes(tmp_path):
    # python -m adapt ends with os._exit after main returns (no interpreter teardown):
    # output piped to a file is complete, run folders are sealed, exit codes are kept
    run = [sys.executable, "-m", "adapt"]
    env = dict(os.environ, ADAPT_KERNELS="numpy")
    check = subprocess.run(run + ["check", "scenes/single_jammer.yaml"], cwd=ROOT, env=env,
                           capture_output=True, text=True, timeout=600)
    inline = _run("import sys\nfrom adapt.cli.main import main\n"
                  "sys.exit(main(['check', 'scenes/single_jammer.yaml']))")
    assert check.returncode == 0 and check.stdout == inline.stdout and check.stdout
    done = subprocess.run(run + ["compare", "scenes/single_jammer.yaml", "--trials", "2",
                                 "--snapshots", "64", "--no-progress", "--out", str(tmp_path)],
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    assert done.stdout.rstrip().splitlines()[-1].startswith("run folder:")
    (folder,) = list(tmp_path.iterdir())
    assert (folder / "manifest.json").is_file() and (folder / "report.html").is_file()
    for words, code in ((["--version"], 0), (["no-such-command"], 2),
                        (["check", str(tmp_path / "missing.yaml")], 2)):
        got = subprocess.run(run + words, cwd=ROOT, env=env, capture_output=True, text=True,
                             timeout=600)
        assert got.returncode == code, (words, got.stderr)
