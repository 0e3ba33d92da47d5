"""``adapt check SCENE...``: validate scene files and print a one-screen summary of each.

Exit code 0 when every file is valid, 2 when any is not (each file is still checked and
reported). The summary and warnings come from :mod:`adapt.studies.check`.
"""
from __future__ import annotations

import sys

from adapt.errors import EXIT_USAGE, InputError

ORDER = 10


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "check", help="validate scene files and summarise them",
        description="Validate each scene file and print a summary: array, aperture, "
                    "beamwidth, degrees of freedom, run settings, processors, the sources "
                    "and warnings (grating lobes, too many interferers, an interferer in "
                    "the main lobe, pointing mismatch). Exit 0 if all are valid, 2 if any "
                    "is not.")
    p.add_argument("scenes", nargs="+", metavar="SCENE", help="scene YAML file(s)")
    p.set_defaults(func=run)


def run(args) -> int:
    from adapt.scenefile import load_scene
    from adapt.studies.check import check_processor_settings, summarise_scene
    bad = 0
    for i, path in enumerate(args.scenes):
        if i:
            print()
        try:
            scene = load_scene(path)
            check_processor_settings(scene)
            text = summarise_scene(scene)
        except InputError as exc:
            bad += 1
            sys.stdout.flush()
            print(f"adapt: error: {exc}", file=sys.stderr)
            sys.stderr.flush()
            continue
        print(text)
    if len(args.scenes) > 1:
        print()
        print(f"{len(args.scenes) - bad} of {len(args.scenes)} scene files valid")
    return EXIT_USAGE if bad else 0
