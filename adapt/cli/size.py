"""``adapt size SCENE``: how many training snapshots each processor needs.

Thin wrapper over :func:`adapt.studies.sizing.size` and :func:`adapt.studies.sizing.write_sizing_run`:
parses the options, shows a progress bar (trials x largest snapshot count
trial-snapshots, on stderr), prints the table, the recommendations and any disagreement
with theory, and the run folder path. Exit 0 on success, 2 on bad input, 130 when stopped by Ctrl-C (SIGINT) and 143
by SIGTERM: finished chunks are kept in the run folder (marked INCOMPLETE) and
``adapt size --resume RUNDIR`` finishes it with identical results. ``--threads N``
runs the trial chunks on N threads (default: every usable core); ``--workers N`` /
``--scheduler ADDRESS`` run them on a Dask cluster instead (:mod:`adapt.engine.execute`).
"""
from __future__ import annotations

from adapt.cli import _run

ORDER = 30

#: library argument names -> command-line options, for error messages
_OPTIONS = {"snapshots": "--snapshots", "trials": "--trials", "seed": "--seed",
            "target_loss_db": "--target-loss", "fraction": "--fraction", "draw": "--draw"}


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "size", help="snapshots needed for a target loss, simulation beside theory",
        description="Sweep the number of training snapshots in one Monte Carlo run, and "
                    "for each processor report the mean normalised SINR (SINR / optimum) "
                    "with its standard error, loss percentiles and the share of trials "
                    "within the target loss, beside the closed-form law where one applies "
                    "(Reed-Mallett-Brennan for unloaded SMI; the signal-present law when "
                    "the scene trains with the wanted signal) and the rules of thumb (2N "
                    "unloaded, 2J loaded). Answers: the snapshots for the target loss in "
                    "the mean (bootstrap range) and for a share of trials (Clopper-Pearson "
                    "range). Writes a new run folder (scene.yaml, sizing.json, sizing.png, "
                    "report.html, manifest.json). Simulation only.")
    p.add_argument("scene", metavar="SCENE", nargs="?",
                   help="scene YAML file (not with --resume)")
    p.add_argument("--processor", "-p", dest="processors", action="append", metavar="SPEC",
                   help="processor spec, e.g. 'smi loading_db=10' (repeatable; default: the "
                        "scene's processors list, or 'smi' and 'smi loading_db=10' if it "
                        "lists none)")
    p.add_argument("--snapshots", metavar="LIST|START:STOP",
                   help="snapshot counts: a list 8,12,16 or a geometric range START:STOP "
                        "(8 per octave; START:STOP:PER_OCTAVE to choose); default: from "
                        "the number of elements (from 1 when a loaded or non-SMI processor "
                        "is sized) to the scene's snapshots")
    p.add_argument("--trials", metavar="T", help="Monte Carlo trials (default: scene; >= 2)")
    p.add_argument("--seed", metavar="S", help="root random seed (default: scene)")
    p.add_argument("--target-loss", dest="target_loss", default=None, metavar="DB",
                   help="loss against the optimum to meet, dB (default 3)")
    p.add_argument("--fraction", default=None, metavar="F",
                   help="share of trials that must meet the target (default 0.9)")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="folder that receives the run folder (default: runs)")
    p.add_argument("--draw", choices=("auto", "samples", "covariance"), default=None,
                   help="auto (default): covariance where it is exact, else samples; "
                        "samples: simulate the snapshot streams; covariance: "
                        "draw each window's sample covariance directly from its complex-"
                        "Wishart law, the same statistics at a cost independent of the "
                        "snapshot count (Gaussian stationary scenes without quantisation, "
                        "covariance-based processors only; no measured SINR). The summary "
                        "and sizing.json say which was used and why")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    _run.add_options(p)
    p.set_defaults(func=run, numba_without_blas=True)   # see cli.main.main


def command_line(args) -> str:
    """The command as a canonical, shell-quoted line (recorded in the manifest)."""
    fixed = {"--target-loss": args.target_loss or "3", "--fraction": args.fraction or "0.9",
             "--out": args.out or _run.DEFAULT_OUT}
    if getattr(args, "draw", None) not in (None, "auto"):
        fixed["--draw"] = args.draw
    return _run.command_line("size", args, {"snapshots": "--snapshots", "trials": "--trials",
                                            "seed": "--seed"}, fixed)


def run(args) -> int:
    from adapt.scenefile import load_scene
    execution = _run.cluster_options(args)
    if args.resume is not None:
        return _resume(args, execution)
    _run.require_scene(args)
    settings = {"processors": args.processors, "snapshots": args.snapshots,
                "trials": _run.whole_number(args.trials, "--trials"),
                "seed": _run.whole_number(args.seed, "--seed"),
                "target_loss_db": _run.real_number(args.target_loss or "3", "--target-loss"),
                "fraction": _run.real_number(args.fraction or "0.9", "--fraction"),
                "chunk": execution["chunk"], "draw": args.draw or "auto"}
    scene = load_scene(args.scene)
    settings["scene"] = scene.resolved
    folder = _run.Folder("size", args.out, f"size-{scene.name}", settings, command_line(args))
    return _execute(args, folder, scene, settings, execution, command_line(args))


def _resume(args, execution) -> int:
    return _run.resume(args, "size", {"snapshots": "--snapshots", "trials": "--trials",
                                      "seed": "--seed", "target_loss": "--target-loss",
                                      "fraction": "--fraction", "draw": "--draw"},
                       execution, _execute,
                       needs=("processors", "snapshots", "trials", "seed", "target_loss_db",
                              "fraction"))


def _execute(args, folder, scene, settings, execution, line) -> int:
    from adapt.studies.sizing import size, sweep_points, write_sizing_run
    bars = []
    _run.preload("scipy.special", "matplotlib.figure", "matplotlib.backends.backend_agg")

    def work(store):
        if not args.no_progress:
            last = (scene.snapshots if settings["snapshots"] is None else
                    int(sweep_points(settings["snapshots"], scene.elements,
                                     scene.snapshots, where="--snapshots")[-1]))
            trials = settings["trials"]
            total = (scene.trials if trials is None else max(trials, 0)) * last
            bars.append(_run.progress_bar(args, total, "size"))
        bar = bars[0] if bars else None
        return size(scene, settings["processors"], snapshots=settings["snapshots"],
                    trials=settings["trials"], seed=settings["seed"],
                    target_loss_db=settings["target_loss_db"],
                    fraction=settings["fraction"],
                    progress=bar.update if bar is not None else None,
                    chunk=execution["chunk"], workers=execution["workers"],
                    scheduler=execution["scheduler"], store=store,
                    draw=settings.get("draw", "samples"), threads=execution["threads"])

    def close_bar():
        for bar in bars:
            bar.close()

    return _run.complete(folder, work, write_sizing_run, line, _OPTIONS, on_exit=close_bar)
