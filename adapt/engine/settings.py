"""Run settings shared by every command: trials, snapshots, seed, checkpoints and the
processor list, checked against a scene once, in one place.

``prepare_scene`` gives the scene as it will be run (overrides applied and re-validated
through the scene loader) and its parsed processors; ``checkpoints_for`` and
``whole_count`` check single values. Every problem is an :class:`InputError` naming the
setting (exit code 2 on the command line).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from adapt.engine.evaluate import default_checkpoints
from adapt.errors import InputError, SceneError, SpecError
from adapt.processors import Processor, parse_specs
from adapt.processors.base import normalised_checkpoints
from adapt.scene.model import Scene

__all__ = ["prepare_scene", "checkpoints_for", "whole_count", "MAX_TRIALS", "MAX_SNAPSHOTS"]

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
    from adapt.scene.files import load_scene, parse_scene, scene_to_mapping
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
        procs = parse_specs(list(scene.processors), where="processors")
    else:
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
