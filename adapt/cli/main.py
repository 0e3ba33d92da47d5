"""Command-line entry point: parses arguments and delegates to the library.

Each command is one module in this package exposing ``register(subparsers)``, which adds
its sub-parser and sets ``func`` (a callable taking the parsed namespace and returning
an exit code). The CLI holds no logic of its own.

Exit codes: 0 success, 1 a check failed (verify), 2 bad input or usage,
3 the file system refused to write (or read) a file: disk full, permission denied, a
path through a file, 130 interrupted (Ctrl-C), 143 stopped (SIGTERM).
"""
from __future__ import annotations

import argparse
import importlib
import os
import pkgutil
import sys

from adapt import __version__
from adapt.errors import EXIT_USAGE, InputError


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own usage errors: exit code 2, no traceback
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"adapt: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="adapt", description=(
        "Adaptive beamforming sandbox: describe an array and a jammer scene in YAML, "
        "generate seeded snapshot streams, run adaptive processors, score SINR and "
        "convergence, record and verify reference vectors. Simulation only: validate "
        "against measured hardware before fielding anything, and note that transmitting "
        "interference is unlawful in most places."))
    parser.add_argument("--version", action="version", version=f"adapt {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    from adapt.cli import __path__ as here
    modules = []
    for info in pkgutil.iter_modules(here):
        if info.name in ("main",) or info.name.startswith("_"):
            continue
        modules.append(importlib.import_module(f"{__package__}.{info.name}"))
    for module in sorted(modules, key=lambda m: getattr(m, "ORDER", 100)):
        module.register(sub)
    return parser


#: environment variables that set a BLAS library's thread count; when the user sets none
#: of them, a command runs BLAS on one thread per engine thread (see
#: :func:`one_blas_thread_per_engine_thread`)
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "OMP_NUM_THREADS",
                         "BLIS_NUM_THREADS")


def one_blas_thread_per_engine_thread(environ=os.environ) -> bool:
    """The engine spreads trials over its own threads (one per core); a BLAS library
    that also starts a thread per core inside each of their small matrix products
    oversubscribes the cores (on a busy two-core machine the README comparison took
    3.2-3.7 s against 2.8 s with one BLAS thread; the numbers are identical either way).
    Unless the user chose a BLAS thread count, this sets one, for this process and the
    worker processes it starts. Takes effect only before numpy is first imported, as
    it is in a command. Returns True when it set the variables."""
    if any(v in environ for v in BLAS_THREAD_VARIABLES):
        return False
    for v in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS"):
        environ[v] = "1"
    return True


def main(argv=None) -> int:
    one_blas_thread_per_engine_thread()
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "numba_without_blas", False):
        # this process runs no numba code but adapt's, and the command imports no
        # scipy.linalg while its kernels load (size preloads scipy.special, which
        # does not import it)
        from adapt.numerics.numba_start import start_without_blas
        start_without_blas()
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    try:
        return int(args.func(args) or 0)
    except InputError as exc:
        print(f"adapt: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("adapt: interrupted", file=sys.stderr)
        return 130
    except OSError as exc:          # the file system refused: disk full, permissions...
        print(f"adapt: error: {file_system_message(exc)}", file=sys.stderr)
        return EXIT_FILE_SYSTEM


#: exit code when a file could not be written (or read) by the file system
EXIT_FILE_SYSTEM = 3


def run_as_process(argv=None) -> None:
    """The ``adapt`` command as a process (the console script and ``python -m adapt``):
    :func:`main`, then the exit without tearing the interpreter down.

    When a command has returned, every output is written, sealed and closed, so what
    the interpreter still does on the way out (clearing every module and freeing numba's
    compiled code, matplotlib's objects and the run's arrays one by one) changes
    nothing, yet took 0.2-0.25 s of a 2 s ``adapt compare``. So the standard streams are
    flushed, the ``atexit`` handlers run (as they would), and the process ends with
    ``os._exit``. A ``SystemExit`` (``--help``, ``--version``, argparse's usage errors)
    ends the same way with its code; any other exception propagates and Python reports
    it as usual. :func:`main` itself returns normally, for callers in Python."""
    try:
        code = main(argv)
    except SystemExit as exc:
        code = exc.code
    if code is None:
        code = 0
    elif not isinstance(code, int):           # SystemExit("message"): print it, exit 1
        print(code, file=sys.stderr)
        code = 1
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):        # a closed pipe (| head) or stream
            pass
    import atexit
    run_handlers = getattr(atexit, "_run_exitfuncs", None)
    if run_handlers is not None:
        run_handlers()
    os._exit(code)


def file_system_message(exc: OSError) -> str:
    """One line for an OSError: the path, the system's reason and a hint."""
    import errno
    where = exc.filename if exc.filename is not None else ""
    reason = exc.strerror or str(exc) or type(exc).__name__
    hint = {errno.ENOSPC: "free some space or choose another --out",
            errno.EDQUOT: "free some space or choose another --out",
            errno.EACCES: "choose a folder you may write to",
            errno.EPERM: "choose a folder you may write to",
            errno.EROFS: "choose a folder on a writable file system",
            errno.ENOTDIR: "a part of the path is a file, not a folder",
            errno.EEXIST: "a part of the path is a file, not a folder",
            errno.EFBIG: "a file passed the size limit of this shell (ulimit -f)"}.get(exc.errno)
    if not where and exc.errno == errno.EFBIG:
        # numba's kernel cache writes without naming its file
        import os
        where = os.environ.get("NUMBA_CACHE_DIR") or "the compiled-kernel cache (adapt/numerics/__pycache__)"
    text = f"{where}: {reason}" if where else reason
    return text + (f" ({hint}); nothing was written under that name" if hint else
                   "; nothing was written under that name")


if __name__ == "__main__":  # pragma: no cover
    run_as_process()
