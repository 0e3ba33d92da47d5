"""``adapt verify DIR --python MODULE:FUNCTION`` or ``--command 'PROGRAM {case} {out}'``:
check another implementation against a reference set.

Delegates to :func:`adapt.studies.reference.verify`. Exit codes: 0 every case passes, 1 any case
fails or errors, 2 bad usage, a corrupt reference set (manifest mismatch, NaN) or a
candidate returning weights of the wrong shape (verify stops there; the JUnit file marks
that case an error and the later ones "not run").
"""
from __future__ import annotations

from adapt.errors import InputError

ORDER = 50


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "verify", help="check an implementation against a reference set",
        description="Run a candidate implementation on every case of a reference set "
                    "written by 'adapt record' and compare, per checkpoint, the SINR its "
                    "weights achieve, its weights (scale removed) and its output samples "
                    "with the reference. Exit 0 when all cases pass, 1 when any fails, 2 "
                    "for bad usage or a damaged reference set.")
    p.add_argument("folder", metavar="DIR", help="reference-set folder")
    how = p.add_mutually_exclusive_group(required=True)
    how.add_argument("--python", metavar="MODULE:FUNCTION",
                     help="a Python function f(case) -> weights (C, N), or (C, N L) in a "
                          "space-time set; MODULE may be a path/to/file.py")
    how.add_argument("--command", metavar="TEMPLATE",
                     help="a program run per case, e.g. 'python mine.py {case} {out}': "
                          "{case} is a folder with the input .npy files and case.json, "
                          "{out} the .npy file of weights (C, N), or (C, N L), to write")
    p.add_argument("--tolerance", action="extend", nargs="+", default=[], metavar="NAME=VALUE",
                   help="override the set's tolerances: sinr_db, weight_error_db, "
                        "output_evm_db (dB)")
    p.add_argument("--timeout", type=float, default=60.0, metavar="SECONDS",
                   help="time limit per case for --command (default 60 s)")
    p.add_argument("--scale-blind", action="store_true",
                   help="compare the output samples after removing the best complex scale "
                        "per checkpoint (for implementations whose weights carry an "
                        "arbitrary constant factor; SINR and weight error are scale-free)")
    p.add_argument("--junit", metavar="FILE",
                   help="also write JUnit XML for CI (written before the first case with "
                        "every case marked 'not run', then with the results)")
    p.set_defaults(func=run, numba_without_blas=True)   # see cli.main.main


def run(args) -> int:
    from adapt.studies.reference import (
        WeightShapeError,
        format_report,
        load_reference,
        not_run_report,
        verify,
        write_report_junit,
    )
    if args.timeout is not None and not args.timeout > 0:
        raise InputError("timeout must be a positive number of seconds", path="--timeout",
                         value=args.timeout)
    ref = load_reference(args.folder)
    impl = f"python:{args.python}" if args.python else args.command
    early: list = []

    def on_start(report):
        # a candidate that ends this process (os._exit in Python mode) must leave a
        # JUnit file that reads as a failure, never a missing file or a pass
        if args.junit:
            try:
                write_report_junit(not_run_report(report, ref), args.junit)
            except OSError as exc:      # reported after the verdict is printed
                early.append(exc)

    try:
        report = verify(ref, impl, tolerances=args.tolerance, timeout=args.timeout,
                        scale_blind=args.scale_blind, on_start=on_start)
    except WeightShapeError as exc:     # refused (exit 2): the JUnit file says which case
        if args.junit and exc.report is not None:
            write_report_junit(exc.report, args.junit)
        raise
    print(format_report(report))
    if args.junit:
        write_report_junit(report, args.junit)
        print(f"JUnit XML written to {args.junit}")
    return report.exit_code
