"""``adapt record SCENE --processor SPEC --out DIR``: write a reference set (test vectors).

Delegates to :func:`adapt.studies.reference.record`; the folder layout is documented there.
Exit 0 when written, 2 for bad input (including an existing non-empty DIR: never
overwritten).
"""
from __future__ import annotations

import re

from adapt.cli._run import add_threads
from adapt.errors import InputError

ORDER = 40


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "record", help="record reference vectors of a processor on a scene",
        description="Run one processor on a few trials (cases) of a scene and write a "
                    "reference set: per case the snapshots it adapted on (.npy and SigMF), "
                    "the look steering vector, the reference waveform (LMS-type methods), "
                    "the checkpoints, the expected weights, outputs and SINR curve, and the "
                    "truth to score SINR; plus tolerances, a description and a sha256 "
                    "manifest. Wideband scenes, taps=L and subband give space-time weights "
                    "(checkpoints x N L, column l*N + n). Check other implementations "
                    "against it with 'adapt verify'.")
    p.add_argument("scene", metavar="SCENE", help="scene YAML file")
    p.add_argument("--processor", required=True, metavar="SPEC",
                   help="processor spec, e.g. 'smi loading_db=10' (quote it)")
    p.add_argument("--trials", type=int, default=3, metavar="T",
                   help="number of cases (trials 0 .. T-1; default 3)")
    p.add_argument("--snapshots", type=int, default=None, metavar="K",
                   help="snapshots per case (default: the scene's)")
    p.add_argument("--checkpoints", default=None, metavar="LIST",
                   help="snapshot counts at which weights are recorded, e.g. 8,16,64,256 "
                        "(default: N, 2N, 4N, ... and K)")
    p.add_argument("--tolerance", action="extend", nargs="+", default=[], metavar="NAME=VALUE",
                   help="default tolerances stored with the set: sinr_db (0.1), "
                        "weight_error_db (-40), output_evm_db (-40), in dB")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="new (or empty) folder for the reference set; never overwritten")
    p.add_argument("--workers", metavar="N",
                   help="compute the cases on N local Dask worker processes (needs pip "
                        "install 'adapt[cluster]'); the set is identical")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="compute the cases on an existing Dask cluster, e.g. tcp://host:8786")
    add_threads(p)
    p.set_defaults(func=run, numba_without_blas=True)   # see cli.main.main


def parse_checkpoints(text: str | None):
    """'8,16, 64' or '8 16 64' -> [8, 16, 64]; InputError otherwise."""
    if text is None:
        return None
    words = [w for w in re.split(r"[,\s]+", text.strip()) if w]
    try:
        values = [int(w) for w in words]
    except ValueError:
        raise InputError("checkpoints must be whole snapshot counts separated by commas",
                         path="--checkpoints", value=text) from None
    if not values:
        raise InputError("no checkpoints given", path="--checkpoints", value=text)
    return values


def run(args) -> int:
    import numpy as np

    from adapt.cli._run import library_warnings, threads_option, whole_number
    from adapt.engine.execute import check_cluster_options
    from adapt.engine.settings import check_scheduler_address
    from adapt.studies.reference import load_reference, record
    check_scheduler_address(args.scheduler, "--scheduler")
    workers = whole_number(args.workers, "--workers")
    threads = threads_option(args, remote=workers is not None or args.scheduler is not None)
    check_cluster_options(workers, args.scheduler)
    with library_warnings():
        out = record(args.scene, args.processor, args.trials, args.snapshots,
                     parse_checkpoints(args.checkpoints), args.out, tolerances=args.tolerance,
                     workers=workers, scheduler=args.scheduler, threads=threads)
    ref = load_reference(out)
    info = ref.info
    last = np.array([c.sinr_db[-1] for c in ref.cases])
    print(f"wrote reference set {out}")
    print(f"  processor  {info['processor']} ({'received data and reference waveform' if info['uses_reference'] else 'training data'})")
    print(f"  scene      {info['scene']} (seed {info['seed']}): {info['trials']} cases x "
          f"{info['snapshots']} snapshots x {info['elements']} elements")
    print(f"  checkpoints {', '.join(str(c) for c in info['checkpoints'])}")
    if "weights" in info:             # a space-time set (format version 2)
        lay = info["weights"]
        print(f"  weights    {lay['shape'][0]} x {lay['shape'][1]} per case: "
              f"{lay['elements']} elements x {lay['taps']} taps, column l*N + n "
              f"(element n delayed by l snapshots)"
              + (f"; fractional bandwidth {info['fractional_bandwidth']:g}"
                 if info["fractional_bandwidth"] else ""))
    print(f"  SINR at the last checkpoint: {', '.join(f'{v:.2f}' for v in last)} dB")
    print("  tolerances " + ", ".join(f"{k} {v:g} dB" for k, v in ref.tolerances.items()))
    return 0
