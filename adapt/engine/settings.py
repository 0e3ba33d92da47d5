"""Run settings shared by every command: trials, snapshots, seed, checkpoints and the
processor list, checked against a scene once, in one place.

``prepare_scene`` gives the scene as it will be run (overrides applied and re-validated
through the scene loader) and its parsed processors; ``checkpoints_for`` and
``whole_count`` check single values. Every problem is an :class:`InputError` naming the
setting (exit code 2 on the command line).
"""
from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from adapt.engine.evaluate import default_checkpoints
from adapt.errors import InputError, SceneError, SpecError
from adapt.processors import Processor, parse_specs
from adapt.processors.base import normalised_checkpoints
from adapt.scene.model import Scene

__all__ = ["prepare_scene", "checkpoints_for", "whole_count", "MAX_TRIALS", "MAX_SNAPSHOTS",
           "check_scheduler_address", "check_specs_argument", "estimate_run",
           "estimate_samples", "available_memory", "RunEstimate"]

MAX_TRIALS = 1_000_000
MAX_SNAPSHOTS = 1_000_000_000


def whole_count(value, name: str, high: int, low: int = 1) -> int:
    """``value`` as an int in [low, high]; InputError naming ``name`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer, float, np.floating)):
        raise InputError(f"{name} must be a whole number", path=name, value=value,
                         allowed=f"an integer in [{low}, {high:,}]")
    if not math.isfinite(float(value)) or float(value) != int(value):
        raise InputError(f"{name} must be a whole number", path=name, value=value,
                         allowed=f"an integer in [{low}, {high:,}]")
    v = int(value)
    if not low <= v <= high:
        raise InputError(f"{name} out of range", path=name, value=v,
                         allowed=f"an integer in [{low}, {high:,}]")
    return v


def checkpoints_for(value, snapshots: int) -> np.ndarray:
    """Checkpoints from a list, a '1,2,4' text or an evenly spaced range
    'START:STOP:STEP' (START, START + STEP, ... and STOP itself; default: 4 per octave
    up to ``snapshots``); InputError naming ``checkpoints`` otherwise."""
    if value is None:
        return default_checkpoints(snapshots)
    if isinstance(value, str) and ":" in value:
        return _checkpoint_range(value, snapshots)
    if isinstance(value, str):
        parts = [p for p in value.replace(",", " ").split() if p]
        try:
            value = [int(p) for p in parts]
        except ValueError:
            raise InputError("checkpoints must be whole snapshot counts", path="checkpoints",
                             value=value.strip(), allowed="e.g. 1,2,4,8,16") from None
    try:
        arr = np.asarray(value)
        if arr.dtype == object or arr.dtype.kind not in "iuf":
            raise ValueError("checkpoints must be whole snapshot counts")
        return normalised_checkpoints(arr, snapshots)
    except ValueError as exc:
        raise InputError(str(exc), path="checkpoints", value=value,
                         allowed=f"whole numbers in [1, {snapshots}] (the snapshots)") from None


def _checkpoint_range(text: str, snapshots: int) -> np.ndarray:
    allowed = (f"START:STOP:STEP, whole numbers with 1 <= START <= STOP <= {snapshots} "
               "(the snapshots) and STEP >= 1, e.g. 100:4000:100")
    parts = [p.strip() for p in text.strip().split(":")]
    if len(parts) != 3 or not all(parts):
        raise InputError("a range of checkpoints is START:STOP:STEP", path="checkpoints",
                         value=text.strip(), allowed=allowed)
    try:
        start, stop, step = (int(p) for p in parts)
    except ValueError:
        raise InputError("checkpoints must be whole snapshot counts", path="checkpoints",
                         value=text.strip(), allowed=allowed) from None
    if not (1 <= start <= stop <= snapshots and step >= 1):
        raise InputError("checkpoint range out of bounds", path="checkpoints",
                         value=text.strip(), allowed=allowed)
    if (stop - start) // step + 2 > 100_000:
        raise InputError("too many checkpoints", path="checkpoints", value=text.strip(),
                         allowed="at most 100,000 checkpoints (a larger STEP)")
    return normalised_checkpoints(np.append(np.arange(start, stop + 1, step), stop), snapshots)


def prepare_scene(scene, processors=None, trials=None, snapshots=None, seed=None,
                  where: str = "processors") -> tuple[Scene, list[Processor]]:
    """The scene as it will be run (overrides applied and re-validated) and its parsed
    processors. ``scene`` may be a :class:`Scene` or a scene file path; ``processors``
    a list of specs (strings, mappings) or :class:`Processor` objects, default the
    scene's own list. InputError (exit code 2 on the command line) for bad values."""
    from adapt.scenefile import load_scene, parse_scene, scene_to_mapping
    if isinstance(scene, (str, Path)):
        scene = load_scene(scene)
    if not isinstance(scene, Scene):
        raise InputError("expected a scene or the path of a scene file",
                         value=type(scene).__name__)
    if processors is None:
        if not scene.processors:
            raise SpecError("the scene lists no processors and none were given",
                            file=scene.source_file, path="processors",
                            allowed="a 'processors:' list in the scene or --processor SPEC")
        try:
            procs = parse_specs(list(scene.processors), where="processors")
        except SpecError as exc:                 # the scene's own list: name its file
            raise exc.at(file=scene.source_file) from None
    else:
        check_specs_argument(processors, where)
        if isinstance(processors, (str, dict, Processor)):
            processors = [processors]
        processors = list(processors)
        if not processors:
            raise SpecError("no processors given", path=where,
                            allowed="one or more specs, e.g. 'smi loading_db=10'")
        specs = [p for p in processors if not isinstance(p, Processor)]
        parsed = iter(parse_specs(specs, where=where)) if specs else iter(())
        procs = [p if isinstance(p, Processor) else next(parsed) for p in processors]
        labels = [p.label for p in procs]
        for i, label in enumerate(labels):
            if label in labels[:i]:
                raise SpecError(f"two processors share the label '{label}'; add label=... to one",
                                path=f"{where}[{i}]", value=label)
    t_ = whole_count(scene.trials if trials is None else trials, "trials", MAX_TRIALS)
    k_ = whole_count(scene.snapshots if snapshots is None else snapshots, "snapshots", MAX_SNAPSHOTS)
    s_ = whole_count(scene.seed if seed is None else seed, "seed", 2 ** 63 - 1, low=0)
    if processors is None:
        given = list(scene.processors)
    else:
        # the specs as given (they rebuild the same processors); objects by their spec
        given = [p.spec() if isinstance(p, Processor) else p for p in processors]
    if scene.resolved and (t_, k_, s_) == (scene.trials, scene.snapshots, scene.seed) \
            and given == list(scene.processors):
        return scene, procs           # already the scene as run: it is parsed only once
    mapping = dict(scene.resolved) if scene.resolved else scene_to_mapping(scene)
    mapping.update(trials=t_, snapshots=k_, seed=s_, processors=given)
    try:
        used = parse_scene(mapping, file=scene.source_file)
    except SceneError as exc:
        raise SceneError(f"{exc.message} (with trials={t_}, snapshots={k_}, seed={s_})",
                         file=exc.file, path=exc.path, value=exc.value,
                         allowed=exc.allowed) from None
    return used, procs


# --------------------------------------------------------------------------- checks
def check_scheduler_address(address, path: str = "scheduler"):
    """``address`` of a Dask scheduler as ``tcp://HOST:PORT`` or ``HOST:PORT`` (None
    stays None); InputError for anything else (no port, or a transport this tool does
    not set up: ``tls://`` needs certificates, ``inproc://`` lives inside one process,
    ``ucx://`` needs its own library)."""
    if address is None:
        return None
    if not isinstance(address, str):
        raise InputError("a scheduler address is text", path=path,
                         value=type(address).__name__, allowed="e.g. tcp://10.1.2.3:8786")
    text = address.strip()
    scheme, sep, rest = text.partition("://")
    if not sep:
        scheme, rest = "tcp", text
    if scheme != "tcp":
        raise InputError(f"the '{scheme}://' transport is not supported", path=path,
                         value=address, allowed="tcp://HOST:PORT, e.g. tcp://10.1.2.3:8786")
    host, colon, port = rest.rstrip("/").rpartition(":")
    if not colon or not host or not port.isdigit() or not 1 <= int(port) <= 65535:
        raise InputError("a scheduler address needs a host and a port", path=path,
                         value=address, allowed="tcp://HOST:PORT, e.g. tcp://10.1.2.3:8786")
    return text


def check_specs_argument(processors, where: str = "processors") -> None:
    """InputError unless ``processors`` is None, one spec (text, mapping, Processor) or
    a list or tuple of them."""
    if processors is None or isinstance(processors, (str, dict, Processor)):
        return
    if not isinstance(processors, (list, tuple)):
        raise SpecError("processor specs are text, a mapping, a Processor or a list of them",
                        path=where, value=type(processors).__name__,
                        allowed="e.g. ['conventional', 'smi loading_db=10']")


# --------------------------------------------------------------------------- estimates
#: seconds per trial-snapshot and element^2 of a processor, and per element of the
#: stream (measured order of magnitude on 2 cores: see README, Speed; deliberately high)
_COST_PROCESSOR = 0.5e-9
_COST_STREAM = 10e-9
#: an estimate is printed beyond these
LONG_RUN_SECONDS = 30.0
LARGE_RUN_BYTES = 1 << 30


def available_memory() -> int | None:
    """Bytes of memory this process may still use: the smaller of the system's
    available memory (Linux ``MemAvailable``) and the cgroup limit; None if unknown."""
    found = []
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    found.append(int(line.split()[1]) * 1024)
    except (OSError, ValueError):
        pass
    try:
        text = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        if text.isdigit():
            found.append(int(text))
    except OSError:
        pass
    return min(found) if found else None


def _size_text(n: float) -> str:
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if n >= scale:
            return f"{n / scale:.3g} {unit}"
    return f"{n / 1e3:.3g} kB"


def _time_text(s: float) -> str:
    for unit, scale in (("years", 3.156e7), ("days", 86400), ("h", 3600), ("min", 60)):
        if s >= scale:
            return f"{s / scale:.2g} {unit}"
    return f"{s:.2g} s"


class RunEstimate:
    """Memory (bytes, peak, about) and time (seconds, about) of a run, with the terms
    that dominate; ``text()`` says both in one line."""

    def __init__(self, bytes_: float, seconds: float, threads: int, what: str):
        self.bytes, self.seconds, self.threads, self.what = float(bytes_), float(seconds), \
            int(threads), what

    def text(self) -> str:
        return (f"{self.what} needs about {_size_text(self.bytes)} of memory and about "
                f"{_time_text(self.seconds)} on {self.threads} thread(s)")

    @property
    def long(self) -> bool:
        return self.seconds > LONG_RUN_SECONDS or self.bytes > LARGE_RUN_BYTES

    def check_fits(self, shrink: str, trials: int | None = None) -> None:
        """InputError when the run cannot fit in the memory available (saying how
        much it needs and how to shrink it)."""
        avail = available_memory()
        if avail is None or self.bytes <= 0.8 * avail:
            return
        hint = shrink
        if trials:
            fits = int(trials * 0.8 * avail / self.bytes)
            hint += f" (about {fits:,} trials would fit)" if fits >= 1 else ""
        raise InputError(f"{self.text()}: more than the {_size_text(avail)} of memory "
                         "available", allowed=hint)


def _threads(threads) -> int:
    if threads:
        return int(threads)
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def estimate_run(scene: Scene, processors: int, checkpoints: int, tail: int = 0,
                 threads: int | None = None, samples: bool = True,
                 what: str = "this run") -> RunEstimate:
    """Memory and time of scoring ``processors`` processors at ``checkpoints``
    checkpoints over ``scene.trials`` trials of ``scene.snapshots`` snapshots.

    Parameters
    ----------
    scene : the scene as run (trials, snapshots, elements, interferers).
    processors, checkpoints : how many.
    tail : extra snapshots streamed after the last checkpoint.
    threads : threads running chunks (default: every usable core).
    samples : False for the drawn-covariance path (time independent of snapshots).

    Returns
    -------
    RunEstimate
        Memory: the scores kept per trial, checkpoint and processor (five arrays plus a
        null depth per interferer, merged from the chunks: twice), plus per running
        chunk its blocks of snapshots, weights, (for a changing scene) the true
        covariance at every checkpoint and (a wideband diffuse noise field) its filter. Time: a deliberately high order of magnitude.
    """
    from adapt.engine.execute import block_size, chunk_size
    t, k, n = int(scene.trials), int(scene.snapshots), int(scene.elements)
    p, c = max(1, int(processors)), max(1, int(checkpoints))
    j = len(scene.interferer_indices)
    th = _threads(threads)
    total = k + int(tail)
    results = 2.0 * t * c * 8 * (p * (5 + j) + 1) + p * t * n * 16
    blk = block_size(n, total)
    ch = min(t, chunk_size(t, n, total, p))
    working = ch * blk * n * 16 * 6 + p * ch * c * n * 16 + 2 * p * ch * c * 8
    if not scene.stationary:
        working += ch * c * n * n * 16 * 2
    if scene.wideband and scene.noise.diffuse and scene.noise.field != "white":
        # the dispersive field's filter (one per trial with position errors) and its copy
        # per filtering call (adapt.streams.wideband.diffuse_filters)
        from adapt.streams.wideband import HALF
        rows = ch if scene.array.errors.position_rms else 1
        working += (rows * n + ch) * n * (2 * HALF + 1) * 16
    seconds = t * (total if samples else c) * (p * n * n * _COST_PROCESSOR + n * _COST_STREAM)
    return RunEstimate(results + min(th, max(1, t // ch)) * working, seconds / th, th, what)


def estimate_samples(trials: int, snapshots: int, elements: int) -> RunEstimate:
    """Memory and time of drawing every snapshot of ``trials`` trials at once (the
    data, wanted-signal and training arrays, complex, and the reference waveform)."""
    t, k, n = int(trials), int(snapshots), int(elements)
    return RunEstimate(t * k * (3 * n + 1) * 16.0, t * k * n * _COST_STREAM, 1,
                       f"{t:,} trials x {k:,} snapshots x {n} elements")
