"""The notebook-facing API: everything the commands do, from Python, in the same words.

    from adapt.api import load_scene, generate, run, evaluate, compare, write_run
    scene = load_scene("scenes/single_jammer.yaml")
    batch, block = generate(scene, trials=4, snapshots=256)      # block.data: (4, 256, 8)
    results = run(scene, ["conventional", "smi loading_db=10"], trials=4, snapshots=256)
    results[1].weights.shape                                      # (4, checkpoints, 8)
    result = compare(scene, ["conventional", "smi loading_db=10"], trials=20)
    print(result.table())                                         # the terminal table
    result.evaluation.by_label("smi loading_db=10").loss_db       # (20, C) numpy array
    folder = write_run(result, "runs")                            # a new run folder

Every function accepts a :class:`~adapt.scene.model.Scene` or a scene file path, and processor
specs as text (``"smi loading_db=10"``), mappings (``{"method": "smi", ...}``) or
processor objects. Results are plain objects holding numpy arrays:
:class:`~adapt.streams.snapshots.TrialBatch` / :class:`~adapt.streams.snapshots.Block` (samples),
:class:`~adapt.processors.ProcessorResult` (weights, outputs),
:class:`~adapt.engine.evaluate.Evaluation` (scores per processor, checkpoint and trial) and
:class:`~adapt.studies.compare.Comparison` (evaluation + summary metrics + table). Bad input
raises :class:`adapt.errors.InputError` (SceneError, SpecError) with the same message
the command line prints.
"""
from __future__ import annotations

from pathlib import Path
from typing import Sequence

from adapt.engine import scores
from adapt.engine.evaluate import Evaluation, ProcessorScores
from adapt.engine.execute import run_trials
from adapt.engine.settings import (
    MAX_SNAPSHOTS,
    check_scheduler_address,
    check_specs_argument,
    checkpoints_for,
    estimate_run,
    estimate_samples,
    prepare_scene,
    whole_count,
)
from adapt.errors import InputError, SceneError, SpecError
from adapt.processors import Context, Processor, ProcessorResult, parse_spec, parse_specs, registry
from adapt.processors import run_processors as _run_processors
from adapt.report.runfolder import read_run as _read_run
from adapt.scene.model import Scene
from adapt.scenefile import dump_scene, load_scene, parse_scene
from adapt.streams.snapshots import Block, TrialBatch
from adapt.studies.compare import Comparison, compare, write_compare_run

__all__ = ["load_scene", "parse_scene", "dump_scene", "generate", "processors", "methods",
           "run", "evaluate", "compare", "write_run", "read_run", "size", "record", "verify",
           "scores",
           "Scene", "TrialBatch", "Block", "ProcessorResult", "Evaluation",
           "ProcessorScores", "Comparison", "InputError", "SceneError", "SpecError"]


def _scene(scene) -> Scene:
    if isinstance(scene, (str, Path)):
        return load_scene(scene)
    if isinstance(scene, Scene):
        return scene
    raise InputError("expected a Scene or the path of a scene file", value=type(scene).__name__)


def generate(scene, trials: int | None = None, snapshots: int | None = None,
             seed: int | None = None) -> tuple[TrialBatch, Block]:
    """Draw seeded sample streams: ``(batch, block)`` with ``block.data`` (T, K, N) the
    array snapshots, ``block.signal`` the wanted part, ``block.training`` what the
    processors train on, ``block.reference`` (T, K) the wanted waveform; ``batch`` gives
    the true steering vectors and covariances (``batch.covariance()``). Trial i is the
    same whatever ``trials`` is. Defaults come from the scene."""
    sc = _with(_scene(scene), trials, snapshots, seed)
    estimate_samples(sc.trials, sc.snapshots, sc.elements).check_fits(
        "fewer trials or snapshots, or TrialBatch(scene).blocks(...) to stream them in "
        "blocks", sc.trials)
    batch = TrialBatch(sc)
    return batch, batch.samples(sc.snapshots)


def _with(scene: Scene, trials, snapshots, seed) -> Scene:
    """The scene with run settings overridden and validated (processors untouched)."""
    used, _ = prepare_scene(scene, ["conventional"], trials, snapshots, seed)
    return scene.with_overrides(trials=used.trials, snapshots=used.snapshots, seed=used.seed)


def processors(specs=None, scene=None) -> list[Processor]:
    """Processor objects from specs (default: the scene's own list)."""
    check_specs_argument(specs)
    if specs is None:
        if scene is None:
            raise InputError("give processor specs or a scene that lists them")
        sc = _scene(scene)
        return parse_specs(list(sc.processors))
    if isinstance(specs, (str, dict)):
        specs = [specs]
    return [s if isinstance(s, Processor) else parse_spec(s, f"processors[{i}]")
            for i, s in enumerate(specs)]


def methods() -> dict[str, str]:
    """Every available method name with its one-line summary."""
    return {name: cls.summary for name, cls in registry().items()}


def run(scene, specs: Sequence | None = None, trials: int | None = None,
        snapshots: int | None = None, seed: int | None = None, checkpoints=None,
        outputs: bool = False) -> list[ProcessorResult]:
    """Run processors over one batch of trials and return their weights.

    Each :class:`ProcessorResult` has ``weights`` (T, C, N) at ``checkpoints`` (default:
    4 per octave up to the snapshots) and, with ``outputs=True``, the output samples
    ``y = w^H x`` (T, K) under the held-weight convention (see
    :mod:`adapt.processors.base`). Scores are not computed; use :func:`evaluate`.
    """
    if not isinstance(outputs, bool):
        raise InputError("outputs must be true or false", path="outputs", value=outputs)
    sc, procs = prepare_scene(_scene(scene), specs, trials, snapshots, seed)
    cps = checkpoints_for(checkpoints, sc.snapshots)
    est = estimate_run(sc, len(procs), len(cps), threads=1, what="this run")
    est.bytes += len(procs) * sc.trials * (len(cps) * sc.elements + (sc.snapshots if outputs
                                                                      else 0)) * 16.0
    est.check_fits("fewer trials, checkpoints or processors", sc.trials)
    batch = TrialBatch(sc)
    return _run_processors(procs, batch.blocks(sc.snapshots), Context.from_batch(batch), cps,
                           outputs=outputs, snapshots=sc.snapshots)


def evaluate(scene, specs: Sequence | None = None, trials: int | None = None,
             snapshots: int | None = None, seed: int | None = None, checkpoints=None,
             tail: int = 256, draw: str = "samples", block: int | None = None,
             workers: int | None = None, scheduler: str | None = None,
             threads: int | None = None) -> Evaluation:
    """Run and score processors (the Monte Carlo engine, :func:`adapt.engine.execute.run_trials`):
    per processor, arrays (T, C) of output SINR, normalised SINR, loss (dB), white-noise
    gain, measured SINR, and (T, C, J) null depths, plus the optimum SINR (T, C).
    ``draw="covariance"`` is the drawn-covariance fast path, ``block`` the snapshots per
    block of a long stream, ``threads`` the threads of this process the trial chunks run
    on (default: every usable core; 1: one after another), ``workers``/``scheduler`` a
    Dask cluster instead; results never depend on ``threads``, ``workers`` or
    ``scheduler`` (``block`` fixes the rounding of running sums). Processor ``seconds``
    are summed over chunks: with threads, time summed over the threads, not wall time."""
    sc, procs = prepare_scene(_scene(scene), specs, trials, snapshots, seed)
    cps = checkpoints_for(checkpoints, sc.snapshots)
    tail = whole_count(tail, "tail", MAX_SNAPSHOTS, low=0)
    if block is not None:
        block = whole_count(block, "block", MAX_SNAPSHOTS)
    check_scheduler_address(scheduler)
    estimate_run(sc, len(procs), len(cps), tail, threads,
                 samples=draw != "covariance").check_fits(
        "fewer trials, checkpoints, snapshots or processors", sc.trials)
    return run_trials(sc, procs, cps, tail=tail, draw=draw, block=block, workers=workers,
                      scheduler=scheduler, threads=threads)


def write_run(comparison: Comparison, out="runs", command_line: str | None = None) -> Path:
    """Write a comparison to a new run folder under ``out`` (as ``adapt compare`` does);
    returns the folder path."""
    if not isinstance(comparison, Comparison):
        raise InputError("write_run takes the result of compare()", path="comparison",
                         value=type(comparison).__name__)
    if not isinstance(out, (str, Path)):
        raise InputError("out is the path of a folder", path="out", value=type(out).__name__)
    if command_line is not None and not isinstance(command_line, str):
        raise InputError("command_line is text", path="command_line",
                         value=type(command_line).__name__)
    return write_compare_run(comparison, out, command_line=command_line)


def read_run(folder):
    """Read a run folder written by ``compare`` (see :func:`adapt.report.runfolder.read_run`)."""
    if not isinstance(folder, (str, Path)):
        raise InputError("expected the path of a run folder", value=type(folder).__name__)
    return _read_run(folder)


def size(scene, specs: Sequence | None = None, **options):
    """Snapshot sizing sweep (as ``adapt size``): see :func:`adapt.studies.sizing.size`. Returns
    a :class:`adapt.studies.sizing.Sizing` with per-processor points, the required snapshot
    counts with their uncertainty, and the theory beside the simulation. ``draw`` is
    ``auto`` unless given, as on the command line: drawn covariances where exact."""
    import inspect

    from adapt.errors import did_you_mean
    from adapt.studies.sizing import size as _size
    known = list(inspect.signature(_size).parameters)[2:]
    for name in options:
        if name not in known:
            raise InputError(f"size() has no option '{name}'" + did_you_mean(name, known),
                             allowed=", ".join(known))
    check_specs_argument(specs)
    check_scheduler_address(options.get("scheduler"))
    options.setdefault("draw", "auto")
    return _size(_scene(scene), specs, **options)


def record(scene, spec, out_dir, trials: int | None = None, snapshots: int | None = None,
           checkpoints=None, tolerances=None) -> Path:
    """Write a reference set (as ``adapt record``): see :func:`adapt.studies.reference.record`.
    Defaults: 3 cases, the scene's snapshots, checkpoints N, 2N, 4N, ... and K."""
    from adapt.studies.reference import record as _record
    return _record(_scene(scene), spec, trials, snapshots, checkpoints, out_dir,
                   tolerances=tolerances)


def verify(reference_dir, implementation, **options):
    """Check an implementation (a callable ``f(case) -> weights`` or a command template
    ``'PROGRAM {case} {out}'``) against a reference set (as ``adapt verify``): see
    :func:`adapt.studies.reference.verify`."""
    from adapt.studies.reference import load_reference
    from adapt.studies.reference import verify as _verify
    return _verify(load_reference(reference_dir), implementation, **options)
