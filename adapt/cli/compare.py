"""``adapt compare SCENE``: score processors on a scene and write a run folder.

Thin wrapper over :func:`adapt.studies.compare.compare` and
:func:`adapt.studies.compare.write_compare_run`: parses the options, shows a progress bar over
the Monte Carlo work (trials x (snapshots + tail) trial-snapshots, on stderr), prints the
summary table and the run folder path. Exit 0 on success, 2 on bad input, 130 when stopped by Ctrl-C (SIGINT) and 143
by SIGTERM: finished chunks are kept in the run folder (marked INCOMPLETE) and
``adapt compare --resume RUNDIR`` finishes it with identical results. ``--threads N``
runs the trial chunks on N threads (default: every usable core); ``--workers N`` /
``--scheduler ADDRESS`` run them on a Dask cluster instead (:mod:`adapt.engine.execute`).
"""
from __future__ import annotations

from adapt.cli import _run

ORDER = 20


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "compare", help="score processors on a scene, write a run folder",
        description="Run Monte Carlo trials of a scene through adaptive processors, score "
                    "output SINR against the clairvoyant optimum, convergence, null depths "
                    "and white-noise gain, print a summary table and write a new run folder "
                    "(scene.yaml, metrics.json, curves.csv, figures, report.html, "
                    "manifest.json). Simulation only.")
    p.add_argument("scene", metavar="SCENE", nargs="?",
                   help="scene YAML file (not with --resume)")
    p.add_argument("--processor", "-p", dest="processors", action="append", metavar="SPEC",
                   help="processor spec, e.g. 'smi loading_db=10' (repeatable; default: the "
                        "scene's processors list)")
    p.add_argument("--trials", type=str, metavar="T", help="Monte Carlo trials (default: scene)")
    p.add_argument("--snapshots", type=str, metavar="K", help="snapshots per trial (default: scene)")
    p.add_argument("--seed", type=str, metavar="S", help="root random seed (default: scene)")
    p.add_argument("--checkpoints", metavar="LIST|START:STOP:STEP",
                   help="snapshot counts to score, e.g. 1,2,4,8,16, or every STEP snapshots "
                        "from START to STOP, e.g. 100:4000:100 (STOP always included; "
                        "default: 4 per octave)")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="folder that receives the run folder (default: runs)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    _run.add_options(p)
    p.set_defaults(func=run, numba_without_blas=True)   # see cli.main.main


#: library argument names -> command-line options, for error messages
_OPTIONS = {"trials": "--trials", "snapshots": "--snapshots", "seed": "--seed",
            "checkpoints": "--checkpoints"}


def command_line(args) -> str:
    """The command as a canonical, shell-quoted line (recorded in the manifest)."""
    return _run.command_line("compare", args, {name: f"--{name}" for name in _OPTIONS},
                             {"--out": args.out or _run.DEFAULT_OUT})


def run(args) -> int:
    from adapt.engine.settings import checkpoints_for, estimate_run, prepare_scene
    from adapt.errors import InputError
    from adapt.studies.compare import TAIL
    execution = _run.cluster_options(args)
    if args.resume is not None:
        return _resume(args, execution)
    _run.require_scene(args)
    trials = _run.whole_number(args.trials, "--trials")
    snapshots = _run.whole_number(args.snapshots, "--snapshots")
    seed = _run.whole_number(args.seed, "--seed")
    try:
        used, procs = prepare_scene(args.scene, args.processors, trials, snapshots, seed,
                                    where="--processor")
        cps = checkpoints_for(args.checkpoints, used.snapshots)
        est = estimate_run(used, len(procs), len(cps), TAIL, execution["threads"])
        est.check_fits("fewer --trials, --checkpoints, --snapshots or processors",
                       used.trials)
    except InputError as exc:
        raise _run.relocated(exc, _OPTIONS, args.processors is not None) from None
    _run.announce(est)
    settings = {"scene": used.resolved, "checkpoints": [int(c) for c in cps],
                "chunk": execution["chunk"], "tail": TAIL}
    folder = _run.Folder("compare", args.out, used.name, settings, command_line(args))
    return _execute(args, folder, used, settings, execution, command_line(args))


def _resume(args, execution) -> int:
    return _run.resume(args, "compare", {name: f"--{name}" for name in _OPTIONS}, execution,
                       _execute, needs=("checkpoints",))


def _execute(args, folder, used, settings, execution, line) -> int:
    from adapt.studies.compare import compare, write_compare_run
    tail = settings.get("tail", 256)
    if isinstance(tail, bool) or not isinstance(tail, int) or tail < 0:
        from adapt.errors import InputError
        raise InputError("not a tail length", file=str(folder.path or "") + "/resume.json",
                         path="settings.tail", value=tail, allowed="an integer >= 0")
    bar = _run.progress_bar(args, used.trials * (used.snapshots + tail), "compare")
    _run.preload("matplotlib.figure", "matplotlib.backends.backend_agg")

    def work(store):
        return compare(used, None, checkpoints=settings["checkpoints"], tail=tail,
                       progress=bar.update if bar is not None else None,
                       chunk=execution["chunk"], workers=execution["workers"],
                       scheduler=execution["scheduler"], store=store,
                       threads=execution["threads"])

    return _run.complete(folder, work, write_compare_run, line, _OPTIONS,
                         on_exit=bar.close if bar is not None else None,
                         given_processors=getattr(args, "processors", None) is not None,
                         scene_file=used.source_file)
