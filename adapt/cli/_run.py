"""Shared command-line plumbing for chunked, resumable runs (``compare``, ``size``).

Options ``--threads N`` (threads of this process), ``--workers N`` / ``--scheduler
ADDRESS`` (Dask), ``--chunk TRIALS`` and ``--resume RUNDIR``; :func:`execute` runs the
work with SIGTERM turned into an interruption, and on Ctrl-C / SIGTERM prints what was
kept and how to resume, returning exit code 130 (SIGINT) or 143 (SIGTERM)
(:mod:`adapt.cli._signals`). The engine is :mod:`adapt.engine.execute`, the run-folder
life cycle :mod:`adapt.report.runfolder`.
"""
from __future__ import annotations

import contextlib
import shlex
import sys
import warnings
from pathlib import Path

from adapt.errors import InputError

DEFAULT_OUT = "runs"


def add_options(p, resumable: bool = True) -> None:
    g = p.add_argument_group("execution (results never depend on these)")
    add_threads(g)
    g.add_argument("--workers", metavar="N",
                   help="run the trials on N local Dask worker processes (loopback only; "
                        "needs pip install 'adapt[cluster]')")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the trials on an existing Dask cluster, e.g. tcp://host:8786 "
                        "(started with dask-scheduler and dask-worker)")
    g.add_argument("--chunk", metavar="TRIALS",
                   help="trials per chunk (default: about 0.5-2 s of work, at most 1000)")
    if resumable:
        g.add_argument("--resume", metavar="RUNDIR",
                       help="finish an interrupted run folder (all settings come from it)")


def add_threads(group) -> None:
    """The ``--threads N`` option (on ``group``, a parser or an argument group)."""
    group.add_argument("--threads", metavar="N",
                       help="threads on this machine; default: all usable cores; results "
                            "never depend on it")


def threads_option(args, remote: bool = False):
    """``--threads`` as an int or None (every usable core), checked (InputError naming
    the option; refused beside ``--workers`` / ``--scheduler``)."""
    from adapt.engine.executors import check_threads
    threads = whole_number(getattr(args, "threads", None), "--threads")
    if threads is not None:
        check_threads(threads, remote=remote, path="--threads")
    return threads


def whole_number(text, option: str):
    """An option's text as an int (None stays None); InputError naming the option."""
    if text is None:
        return None
    try:
        return int(str(text).strip().replace("_", ""))
    except ValueError:
        raise InputError("expected a whole number", path=option, value=text) from None


def real_number(text, option: str) -> float:
    """An option's text as a float; InputError naming the option."""
    try:
        return float(str(text).strip())
    except ValueError:
        raise InputError("expected a number", path=option, value=text) from None


def relocated(exc: InputError, options: dict, given_processors: bool = True,
              scene_file: str | None = None) -> InputError:
    """The library's error re-addressed to the command-line option it came from:
    ``options`` maps library argument names to option texts; ``processors[i]...``
    becomes ``--processor[i]...`` when the specs came from the command line
    (``given_processors``), else it stays the scene file's ``processors[i]``, naming
    ``scene_file`` when the error does not name a file yet (a processor's own check of
    the scene, raised when the run starts)."""
    path = exc.path or ""
    head = path.split(".")[0].split("[")[0]
    if head in options and path == head:
        return exc.__class__(exc.message, file=exc.file, path=options[head], value=exc.value,
                             allowed=exc.allowed)
    if head == "processors" and given_processors and not exc.file:
        return exc.__class__(exc.message, file=exc.file, path="--processor" + path[len(head):],
                             value=exc.value, allowed=exc.allowed)
    if head == "processors" and not given_processors and not exc.file and scene_file:
        return exc.__class__(exc.message, file=scene_file, path=exc.path, value=exc.value,
                             allowed=exc.allowed)
    return exc


def command_line(command: str, args, options: dict, fixed: dict) -> str:
    """The command as a canonical, shell-quoted line (recorded in manifests): the scene,
    each ``--processor``, every option in ``options`` (attribute -> option text) that
    was given, then ``fixed`` (option text -> value, always written)."""
    words = ["adapt", command, args.scene]
    for spec in args.processors or []:
        words += ["--processor", spec]
    for name, option in options.items():
        value = getattr(args, name, None)
        if value is not None:
            words += [option, str(value)]
    for option, value in fixed.items():
        words += [option, str(value)]
    return shlex.join(words)


def preload(*modules: str) -> None:
    """Import ``modules`` on a background thread while the trials run (the report's
    plotting library takes most of a second to import, and the trials' threads spend
    their time in compiled code and numpy, which release the GIL); an import that fails
    there fails again, with its message, where the module is used."""
    import importlib
    import threading

    def load():
        for name in modules:
            try:
                importlib.import_module(name)
            except Exception:            # noqa: BLE001 - reported where it is used
                return

    threading.Thread(target=load, name="adapt-preload", daemon=True).start()


def progress_bar(args, total: int, desc: str):
    """A tqdm bar on stderr counting trial-snapshots (None with --no-progress; drawn
    only on a terminal)."""
    if args.no_progress:
        return None
    from tqdm import tqdm
    # no monitor thread (it only tunes the refresh of stalled bars): a command keeps
    # one thread after its trials, so its figures can be drawn in a forked process
    tqdm.monitor_interval = 0
    return tqdm(total=total, unit=" trial-snapshots", unit_scale=True, file=sys.stderr,
                disable=None, leave=False, desc=desc)


def complete(folder: "Folder", work, write, line, options: dict, on_exit=None,
             given_processors: bool = True, scene_file: str | None = None) -> int:
    """Run ``work(store)`` in ``folder`` (library InputErrors re-addressed to the
    command-line ``options``; ``on_exit`` called however it ends, e.g. to close the
    progress bar), write the run with ``write(result, command_line=line, folder=path)``
    and print the outcome; returns the exit code."""
    def guarded(store):
        try:
            return work(store)
        except InputError as exc:
            raise relocated(exc, options, given_processors, scene_file) from None
        finally:
            if on_exit is not None:
                on_exit()

    def finish(result, path):
        return write(result, command_line=line, folder=path)

    from adapt.report.figures import load_drawing_library_in_background
    load_drawing_library_in_background()     # while the trials run

    return print_outcome(*execute(folder, guarded, finish))


def announce(estimate) -> None:
    """Print a run's memory and time estimate on stderr when the run is long or large."""
    if estimate.long:
        print(f"adapt: {estimate.text()}", file=sys.stderr)


def print_outcome(result, written, code) -> int:
    """Print the table and the run folder of a finished run; pass an interruption's
    exit code through."""
    if code is not None:
        return code
    print(result.table())
    print()
    print(f"run folder: {written}")
    return 0


def cluster_options(args) -> dict:
    """``{"workers": .., "scheduler": .., "chunk": .., "threads": ..}`` checked
    (InputError)."""
    from adapt.engine.executors import check_cluster_options
    workers = whole_number(args.workers, "--workers")
    from adapt.engine.settings import check_scheduler_address
    scheduler = check_scheduler_address(args.scheduler, "--scheduler")
    threads = threads_option(args, remote=workers is not None or scheduler is not None)
    check_cluster_options(workers, scheduler)
    chunk = whole_number(args.chunk, "--chunk")
    if chunk is not None and chunk < 1:
        raise InputError("a chunk must hold at least one trial", path="--chunk", value=chunk,
                         allowed="an integer >= 1")
    return {"workers": workers, "scheduler": scheduler, "chunk": chunk, "threads": threads}


def require_scene(args) -> None:
    """A fresh run needs a scene file (only ``--resume`` goes without one)."""
    if args.scene is None:
        raise InputError("give a scene file, or --resume RUNDIR to finish an interrupted run",
                         path="SCENE")


def refuse_with_resume(args, options: dict) -> None:
    """InputError if any run setting is given beside ``--resume`` (they come from the
    folder). ``options``: attribute name -> option text; unset means None or []."""
    given = [opt for name, opt in options.items() if getattr(args, name, None) not in (None, [])]
    if given:
        raise InputError("--resume takes every setting from the run folder; do not give "
                         + ", ".join(given), path="--resume", value=args.resume,
                         allowed="--resume RUNDIR alone, optionally with --threads, "
                                 "--workers, --scheduler or --no-progress")


def resume(args, kind: str, refused: dict, execution: dict, execute_run, needs=()):
    """Finish the interrupted run folder ``args.resume`` of command ``kind``: refuse the
    scene, ``--processor``, ``--out``, ``--chunk`` and the command's own run settings
    (``refused``: attribute -> option text), rebuild the scene from the folder and call
    ``execute_run(args, folder, scene, settings, execution, command_line)``; ``needs``:
    the settings the command reads (InputError naming ``resume.json`` when one is
    missing)."""
    from adapt.report.runfolder import open_for_resume
    from adapt.scenefile import parse_scene
    refuse_with_resume(args, {"scene": "SCENE", "processors": "--processor", **refused,
                              "out": "--out", "chunk": "--chunk"})
    record = open_for_resume(args.resume, kind)
    if record is None:
        print(f"adapt: {args.resume} had finished (it was stopped while sealing); its "
              "leftover resume state is now removed and the folder is complete")
        return 0
    settings = record["settings"]
    where = str(Path(args.resume) / "resume.json")
    for key in needs:
        if key not in settings:
            raise InputError("the resume record lacks a setting this command needs",
                             file=where, path=f"settings.{key}")
    procs = settings.get("processors")
    if procs is not None and not (isinstance(procs, list)
                                  and all(isinstance(p, (str, dict)) for p in procs)):
        raise InputError("not a list of processor specs", file=where,
                         path="settings.processors", value=procs,
                         allowed="null or a list of specs")
    chunk = settings.get("chunk")
    if chunk is not None and (isinstance(chunk, bool) or not isinstance(chunk, int)
                              or chunk < 1):
        raise InputError("not a chunk size", file=where, path="settings.chunk", value=chunk,
                         allowed="null or an integer >= 1")
    scene = parse_scene(settings["scene"])
    execution = dict(execution, chunk=chunk)
    return execute_run(args, Folder(kind, existing=args.resume), scene, settings, execution,
                       record.get("command_line"))


class Folder:
    """The run folder of this command: created when the work starts (fresh run) or the
    folder being resumed. Calling it returns the chunk store path."""

    def __init__(self, kind: str, out=None, name=None, settings=None, command_line=None,
                 existing=None):
        self.kind, self.out, self.name = kind, out, name
        self.settings, self.command_line = settings, command_line
        self.path = Path(existing) if existing is not None else None
        self.new = existing is None

    def __call__(self) -> Path:
        from adapt.report.runfolder import PARTIAL, start_run_folder
        if self.path is None:
            self.path = start_run_folder(self.out or DEFAULT_OUT, self.name, self.kind,
                                         self.settings, self.command_line)
        return self.path / PARTIAL


@contextlib.contextmanager
def library_warnings():
    """Show the library's own warnings (e.g. a singular sample covariance) once each,
    as one ``adapt: warning:`` line, when the block ends."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        finally:
            for text in dict.fromkeys(str(w.message) for w in caught
                                      if issubclass(w.category, UserWarning)
                                      or "adapt" in Path(w.filename).parts):
                print(f"adapt: warning: {text}", file=sys.stderr)


def execute(folder: Folder, work, finish):
    """Run ``work(store)`` then ``finish(result, folder_path)``; returns ``(result,
    written folder, None)`` or ``(None, None, exit code)`` when interrupted; library
    warnings as in :func:`library_warnings`."""
    with library_warnings():
        return _execute(folder, work, finish)


def _execute(folder: Folder, work, finish):
    from adapt.cli._signals import exit_code, interrupted_message, stop_on_signals
    from adapt.engine.chunks import has_finished_chunks
    from adapt.report.runfolder import remove_if_empty
    with stop_on_signals():
        try:
            result = work(folder)
            written = finish(result, folder.path)
            return result, written, None
        except KeyboardInterrupt as exc:
            if folder.path is None:
                print("adapt: interrupted before any work was kept", file=sys.stderr)
            else:
                print(interrupted_message(folder.path, folder.kind, exc), file=sys.stderr)
            return None, None, exit_code(exc)
        except BaseException:
            if folder.path is not None and folder.new:
                remove_if_empty(folder.path, has_finished_chunks)
            raise
