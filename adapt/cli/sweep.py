"""``adapt sweep SCENE --vary KEY=VALUES``: a design study over one or two settings.

Thin wrapper over :func:`adapt.studies.sweep.sweep` and
:func:`adapt.studies.sweep.write_sweep_run`: parses the options, shows one progress bar
over every point's Monte Carlo work, prints the table and the recommendations and the
run folder path. Exit 0 on success, 2 on bad input, 130/143 when stopped by Ctrl-C or
SIGTERM (finished chunks of every point are kept; ``adapt sweep --resume RUNDIR``
finishes the study with identical results).
"""
from __future__ import annotations

from adapt.cli import _run

ORDER = 35

_OPTIONS = {"vary": "--vary", "trials": "--trials", "snapshots": "--snapshots",
            "seed": "--seed", "target_loss": "--target-loss", "max_points": "--max-points"}


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "sweep", help="vary a scene or processor setting, find the best and the robust range",
        description="Run the scene at every point of one axis (a line study) or two (a "
                    "grid) with the same seed at every point (common random numbers), score "
                    "each point as compare does, print the loss per point and what the "
                    "numbers recommend (each processor's best setting and the values within "
                    "0.5 dB of it; for a scene setting, where each processor stays within "
                    "the target loss of the optimum), and write a new run folder "
                    "(sweep.json, sweep.csv, sweep.png, report.html, manifest.json). "
                    "Simulation only.")
    p.add_argument("scene", metavar="SCENE", nargs="?",
                   help="scene YAML file (not with --resume)")
    p.add_argument("--vary", action="append", metavar="KEY=VALUES",
                   help="a scene key path (sources[jam-1].azimuth, array.spacing, "
                        "receiver.bits, ...) or METHOD_OR_LABEL.PARAM (smi.loading_db), "
                        "= START:STOP:STEP, log:START:STOP:COUNT or a comma list; give it "
                        "twice for a grid (default: the scene's sweep: section)")
    p.add_argument("--processor", "-p", dest="processors", action="append", metavar="SPEC",
                   help="processor spec (repeatable; default: the scene's processors list)")
    p.add_argument("--trials", type=str, metavar="T", help="Monte Carlo trials per point")
    p.add_argument("--snapshots", type=str, metavar="K", help="snapshots per trial")
    p.add_argument("--seed", type=str, metavar="S", help="root random seed (every point)")
    p.add_argument("--target-loss", dest="target_loss", metavar="DB",
                   help="loss against the optimum that counts as holding (default: the "
                        "scene's sweep.target_loss_db, else 3)")
    p.add_argument("--max-points", dest="max_points", metavar="N",
                   help="allow more than 400 points")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="folder that receives the run folder (default: runs)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    _run.add_options(p)
    p.set_defaults(func=run, numba_without_blas=True)   # see cli.main.main


def command_line(args) -> str:
    """The command as a canonical, shell-quoted line (recorded in the manifest)."""
    import shlex
    line = _run.command_line("sweep", args, {k: v for k, v in _OPTIONS.items()
                                             if k != "vary"},
                             {"--out": args.out or _run.DEFAULT_OUT})
    return line + "".join(f" --vary {shlex.quote(v)}" for v in args.vary or [])


def run(args) -> int:
    from adapt.scenefile import load_scene, read_yaml
    execution = _run.cluster_options(args)
    if args.resume is not None:
        return _run.resume(args, "sweep", dict(_OPTIONS), execution, _execute)
    _run.require_scene(args)
    scene = load_scene(args.scene)
    with open(args.scene, encoding="utf-8") as fh:
        raw = read_yaml(fh.read(), args.scene)
    settings = {"scene": scene.resolved, "raw": raw, "vary": args.vary or [],
                "processors": args.processors,
                "trials": _run.whole_number(args.trials, "--trials"),
                "snapshots": _run.whole_number(args.snapshots, "--snapshots"),
                "seed": _run.whole_number(args.seed, "--seed"),
                "target_loss_db": (None if args.target_loss is None else
                                   _run.real_number(args.target_loss, "--target-loss")),
                "max_points": _run.whole_number(args.max_points, "--max-points"),
                "chunk": execution["chunk"]}
    # every point is checked before the folder is made
    from adapt.studies.compare import TAIL
    from adapt.studies.sweep import prepare
    study = prepare(scene, settings["vary"], settings["processors"], settings["trials"],
                    settings["snapshots"], settings["seed"], settings["target_loss_db"],
                    settings["max_points"], raw)
    settings["work"] = study.work(TAIL)
    folder = _run.Folder("sweep", args.out, f"sweep-{scene.name}", settings,
                         command_line(args))
    return _execute(args, folder, scene, settings, execution, command_line(args))


def _execute(args, folder, scene, settings, execution, line) -> int:
    from adapt.studies.sweep import sweep, write_sweep_run
    bar = _run.progress_bar(args, settings.get("work", 0), "sweep")

    def work(store):
        return sweep(scene, settings["vary"], settings["processors"],
                     trials=settings["trials"], snapshots=settings["snapshots"],
                     seed=settings["seed"], target_db=settings["target_loss_db"],
                     max_points=settings["max_points"],
                     progress=bar.update if bar is not None else None,
                     threads=execution["threads"], workers=execution["workers"],
                     scheduler=execution["scheduler"], chunk=execution["chunk"],
                     store=store, raw=settings["raw"])

    return _run.complete(folder, work, write_sweep_run, line, _OPTIONS,
                         on_exit=bar.close if bar is not None else None)
