"""The notebook-facing API: everything the commands do, from Python, in the same words.

    from adapt.api import load_scene, generate, run, evaluate, compare, write_run, read_run
    scene = load_scene("scenes/single_jammer.yaml")
    batch, block = generate(scene, trials=4, snapshots=256)      # block.data: (4, 256, 8)
    results = run(scene, ["conventional", "smi loading_db=10"], trials=4, snapshots=256)
    results[1].weights.shape                                      # (4, checkpoints, 8)
    result = compare(scene, ["conventional", "smi loading_db=10"], trials=20)
    print(result.table())                                         # the terminal table
    result.summary.processor("smi loading_db=10").final.loss_db_mean   # a typed summary
    result.evaluation.by_label("smi loading_db=10").loss_db       # (20, C) numpy array
    folder = write_run(result, "runs")                            # a new run folder
    read_run(folder)["summary"]                                   # the summary read back

Every function accepts a :class:`~adapt.scene.model.Scene` or a scene file path, and processor
specs as text (``"smi loading_db=10"``), mappings (``{"method": "smi", ...}``) or
processor objects. Results are plain objects holding numpy arrays:
:class:`~adapt.streams.snapshots.TrialBatch` / :class:`~adapt.streams.snapshots.Block` (samples),
:class:`~adapt.processors.ProcessorResult` (weights, outputs),
:class:`~adapt.engine.evaluate.Evaluation` (scores per processor, checkpoint and trial),
:class:`~adapt.studies.compare.Comparison` (evaluation + its typed summary
:class:`~adapt.studies.summaries.CompareSummary` + table) and
:class:`~adapt.studies.sizing.Sizing` (with :class:`~adapt.studies.summaries.SizingSummary`);
a summary's ``to_json()`` is the run folder's ``metrics.json`` / ``sizing.json`` and
``from_mapping()`` reads it back. Bad input
raises :class:`adapt.errors.InputError` (SceneError, SpecError) with the same message
the command line prints.
"""
from __future__ import annotations

from pathlib import Path
from typing import Callable, Sequence

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
from adapt.scenefile import dump_scene as _dump_scene
from adapt.scenefile import load_scene as _load_scene
from adapt.scenefile import parse_scene as _parse_scene
from adapt.streams.snapshots import Block, TrialBatch
from adapt.studies.compare import TAIL, Comparison, write_compare_run
from adapt.studies.compare import compare as _compare
from adapt.studies.summaries import CompareSummary, SizingSummary

__all__ = ["load_scene", "parse_scene", "dump_scene", "generate", "processors", "methods",
           "run", "evaluate", "compare", "write_run", "read_run", "size", "record", "verify",
           "scores",
           "Scene", "TrialBatch", "Block", "ProcessorResult", "Evaluation",
           "ProcessorScores", "Comparison", "CompareSummary", "SizingSummary", "InputError",
           "SceneError", "SpecError"]


def load_scene(path) -> Scene:
    """Read and validate a scene file (as every command does with its SCENE argument).

    Parameters
    ----------
    path : str or os.PathLike
        The path of a UTF-8 YAML scene file (a byte-order mark is allowed), at most
        :data:`adapt.scenefile.MAX_FILE_BYTES` bytes. The keys, their units and limits
        are listed in :mod:`adapt.scenefile`; the scene's default name is the file name
        without its extension.

    Returns
    -------
    Scene
        The validated scene, every default filled in; ``scene.resolved`` holds the
        resolved mapping (what ``scene.yaml`` of a run folder contains).

    Raises
    ------
    InputError
        :class:`~adapt.errors.SceneError` when the path is not text or a path, the file is
        missing, a directory, too large, unreadable or not UTF-8, the YAML is malformed
        or uses refused features (object tags, duplicate keys, tab indentation), or a
        value is out of its allowed range (the message names the file, key path and
        value); :class:`~adapt.errors.SpecError` for a bad processor spec in the file.

    References
    ----------
    YAML Ain't Markup Language, version 1.2 (yaml.org, 2009/2021): the file syntax, read
    by safe loading with 1.2-style core scalars (only ``true``/``false`` are booleans).
    """
    return _load_scene(path)


def parse_scene(mapping_or_text, file: str | None = None) -> Scene:
    """Build a validated scene from YAML text or from an already-loaded mapping.

    Parameters
    ----------
    mapping_or_text : str, bytes or dict
        YAML text (``bytes`` are decoded as UTF-8, a byte-order mark allowed) or a
        mapping with the scene-file keys of :mod:`adapt.scenefile`.
    file : str, optional
        Only names the origin in error messages and gives the default scene name (its
        stem); default None: the name ``scene``.

    Returns
    -------
    Scene
        The validated scene, every default filled in (``scene.resolved`` as in
        :func:`load_scene`).

    Raises
    ------
    InputError
        :class:`~adapt.errors.SceneError` for undecodable bytes, text beyond the size
        limit, malformed YAML, an empty scene, a top level that is not a mapping or any
        bad key or value; :class:`~adapt.errors.SpecError` for a bad processor spec.

    References
    ----------
    YAML Ain't Markup Language, version 1.2 (yaml.org): the text syntax, read by safe
    loading with 1.2-style core scalars.
    """
    return _parse_scene(mapping_or_text, file)


def dump_scene(scene: Scene) -> str:
    """The resolved scene as YAML text, keys in the documented order.

    Parameters
    ----------
    scene : Scene
        A scene (from :func:`load_scene`, :func:`parse_scene` or built in code).

    Returns
    -------
    str
        YAML text of the resolved mapping (:func:`adapt.scenefile.scene_to_mapping`,
        every default filled in), which re-parses to an equal scene.

    Raises
    ------
    InputError
        :class:`~adapt.errors.SceneError` when ``scene`` is not a :class:`Scene`.

    References
    ----------
    YAML Ain't Markup Language, version 1.2 (yaml.org): plain mappings, lists, text and
    numbers written by PyYAML's safe dumper (no Python-specific tags), read back by
    :func:`parse_scene`.
    """
    return _dump_scene(scene)


def _scene(scene) -> Scene:
    if isinstance(scene, (str, Path)):
        return load_scene(scene)
    if isinstance(scene, Scene):
        return scene
    raise InputError("expected a Scene or the path of a scene file", value=type(scene).__name__)


def generate(scene, trials: int | None = None, snapshots: int | None = None,
             seed: int | None = None) -> tuple[TrialBatch, Block]:
    """Draw the seeded sample streams of a scene.

    Parameters
    ----------
    scene : Scene, str or os.PathLike
        A scene or the path of a scene file.
    trials : int, optional
        Number of trials T (default: the scene's ``trials``).
    snapshots : int, optional
        Number of snapshots K per trial (default: the scene's ``snapshots``).
    seed : int, optional
        Seed of the random streams (default: the scene's ``seed``). Trial i is the same
        whatever ``trials`` is.

    Returns
    -------
    batch : TrialBatch
        The trials' true steering vectors and covariances (``batch.covariance()``).
    block : Block
        ``block.data`` (T, K, N) complex array snapshots, ``block.signal`` (T, K, N) the
        wanted part, ``block.training`` what the processors train on, ``block.reference``
        (T, K) the wanted waveform. Powers are relative to the unit per-element thermal
        noise.

    Raises
    ------
    InputError
        For a bad scene or path, for trials, snapshots or seed out of range, and when
        the T x K x N samples would not fit in memory.

    References
    ----------
    Counter-based normal streams (:mod:`adapt.streams.normals`): SplitMix64 (Steele, Lea
    and Flood, OOPSLA 2014) and the ziggurat method (Marsaglia and Tsang, J. Stat.
    Software 5(8), 2000), keyed by numpy's ``SeedSequence``.
    """
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
    """Processor objects from specs, or from the scene's own list.

    Parameters
    ----------
    specs : str, dict, Processor or list, optional
        One spec as text (``"smi loading_db=10"``), a mapping (``{"method": "smi",
        ...}``) or a processor object, or a list or tuple of such specs and processor
        objects (objects are passed through). Default None: the ``processors`` list of ``scene``.
    scene : Scene, str or os.PathLike, optional
        Used only when ``specs`` is None: a scene or a scene file path.

    Returns
    -------
    list of Processor
        One validated processor per spec, in order.

    Raises
    ------
    InputError
        :class:`~adapt.errors.SpecError` for an unknown method or a bad parameter (the
        message names ``processors[i]``) or specs of the wrong type; InputError when
        neither specs nor a scene are given, or for a bad scene.

    References
    ----------
    None for the parsing itself; each processor's docstring cites the method it
    implements (e.g. Reed, Mallett and Brennan 1974 for ``smi``).
    """
    check_specs_argument(specs)
    if specs is None:
        if scene is None:
            raise InputError("give processor specs or a scene that lists them")
        sc = _scene(scene)
        return parse_specs(list(sc.processors))
    if isinstance(specs, (str, dict, Processor)):
        specs = [specs]
    return [s if isinstance(s, Processor) else parse_spec(s, f"processors[{i}]")
            for i, s in enumerate(specs)]


def methods() -> dict[str, str]:
    """Every available processor method with its one-line summary.

    Parameters
    ----------
    None.

    Returns
    -------
    dict of str to str
        Method name (as used in specs) to its summary, in registry order.

    References
    ----------
    None for the listing; each summary names the method's source (the processor
    classes in :mod:`adapt.processors` cite the papers).
    """
    return {name: cls.summary for name, cls in registry().items()}


def run(scene, specs: Sequence | None = None, trials: int | None = None,
        snapshots: int | None = None, seed: int | None = None, checkpoints=None,
        outputs: bool = False) -> list[ProcessorResult]:
    """Run processors over one batch of trials and return their weights.

    Scores are not computed; use :func:`evaluate`.

    Parameters
    ----------
    scene : Scene, str or os.PathLike
        A scene or the path of a scene file.
    specs : str, dict, Processor or list of them, optional
        Processor specs (default: the scene's ``processors`` list).
    trials : int, optional
        Number of trials T (default: the scene's).
    snapshots : int, optional
        Snapshots K per trial (default: the scene's).
    seed : int, optional
        Seed of the random streams (default: the scene's).
    checkpoints : list of int or str, optional
        Snapshot counts at which weights are kept: a list, ``"1,2,4"`` text or a
        ``"START:STOP:STEP"`` range, each in [1, K] (default: geometric, 4 per octave,
        from 1 to K).
    outputs : bool, default False
        Also keep the output samples.

    Returns
    -------
    list of ProcessorResult
        One per processor: ``weights`` (T, C, N) complex at ``checkpoints`` (C,) and,
        with ``outputs=True``, ``outputs`` (T, K) the samples ``y = w^H x`` under the
        held-weight convention (see :mod:`adapt.processors.base`), else None.

    Raises
    ------
    InputError
        For a non-boolean ``outputs``, a bad scene, spec, count or checkpoint, or a run
        that would not fit in memory.

    References
    ----------
    None for the driver itself; the weights are each processor's own method (its
    docstring cites the source, e.g. Capon 1969 / Van Trees 2002 for ``optimum``).
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
    """Run and score processors: the Monte Carlo engine
    (:func:`adapt.engine.execute.run_trials`).

    Results never depend on ``threads``, ``workers`` or ``scheduler`` (``block`` fixes
    the rounding of running sums).

    Parameters
    ----------
    scene : Scene, str or os.PathLike
        A scene or the path of a scene file.
    specs : str, dict, Processor or list of them, optional
        Processor specs (default: the scene's ``processors`` list).
    trials : int, optional
        Number of trials T (default: the scene's).
    snapshots : int, optional
        Snapshots K per trial (default: the scene's).
    seed : int, optional
        Seed of the random streams (default: the scene's).
    checkpoints : list of int or str, optional
        Snapshot counts to score, as in :func:`run` (default: geometric, 4 per octave,
        from 1 to K).
    tail : int, default 256
        Extra snapshots after the last checkpoint, used only to measure the final
        weights' output SINR from their output samples (an integer in
        [0, ``MAX_SNAPSHOTS``]).
    draw : {"samples", "covariance"}, default "samples"
        ``"covariance"``: the drawn-covariance fast path (window covariances drawn from
        the complex-Wishart law; Gaussian stationary scenes, covariance processors).
    block : int, optional
        Snapshots per block of a long stream (default:
        :func:`adapt.engine.plan.block_size`).
    workers : int, optional
        Run on this many local Dask worker processes.
    scheduler : str, optional
        Run on an existing Dask cluster, ``tcp://HOST:PORT`` or ``HOST:PORT``.
    threads : int, optional
        Threads of this process the trial chunks run on (default: every usable core;
        1: one after another).

    Returns
    -------
    Evaluation
        ``optimum_sinr`` (T, C) linear; per processor (``evaluation.by_label(label)``)
        arrays (T, C) of output ``sinr`` (linear), ``normalised`` SINR (SINR over the
        optimum), ``loss_db`` (dB), ``white_noise_gain`` and ``measured_sinr`` (from the
        output samples; NaN where there were none),
        ``null_depth_db`` (T, C, J) toward the J interferers, ``final_weights`` (T, N).
        Processor ``seconds`` are summed over chunks (with threads: summed over the
        threads, not wall time).

    Raises
    ------
    InputError
        For a bad scene, spec, count, checkpoint, ``tail``, ``block``, ``draw`` or
        scheduler address, or a run that would not fit in memory.

    References
    ----------
    Output and optimum SINR: Capon (1969), Proc. IEEE 57(8); Van Trees, *Optimum Array
    Processing* (2002), ch. 6. Normalised SINR and loss: Reed, Mallett and Brennan,
    IEEE Trans. AES-10(6), 1974. White-noise gain: Cox, Zeskind and Kooij, IEEE Trans.
    ASSP-35(10), 1987. Drawn covariances: the complex Wishart law (Goodman, Ann. Math.
    Stat. 34, 1963).
    """
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


def compare(scene, processors: Sequence | None = None, trials: int | None = None,
            snapshots: int | None = None, seed: int | None = None, checkpoints=None,
            progress: Callable[[int], None] | None = None, *, target_db: float = 3.0,
            fraction: float = 0.9, tail: int = TAIL, chunk: int | None = None,
            workers: int | None = None, scheduler: str | None = None, store=None,
            on_chunk: Callable[[int, int], None] | None = None,
            threads: int | None = None, patterns: bool = True) -> Comparison:
    """Run, score and summarise processors on a scene (as ``adapt compare``).

    Results are bit-identical whatever the chunking, the number of threads or workers
    or any interruption and resume.

    Parameters
    ----------
    scene : Scene, str or os.PathLike
        A scene or the path of a scene file.
    processors : str, dict, Processor or list of them, optional
        Processor specs (default: the scene's ``processors`` list; SpecError if it has
        none).
    trials : int, optional
        Number of trials T (default: the scene's).
    snapshots : int, optional
        Snapshots K per trial (default: the scene's).
    seed : int, optional
        Seed of the random streams (default: the scene's).
    checkpoints : list of int or str, optional
        Snapshot counts to score, as in :func:`run` (default: geometric, 4 per octave).
    progress : callable, optional
        Called with the number of trial-snapshots done after each block (the total is
        ``trials * (snapshots + tail)``).
    target_db : float, default 3.0
        The loss in dB that ``snapshots_to_3db`` and the verdict measure against.
    fraction : float, default 0.9
        Share of trials, in (0, 1], that must meet ``target_db`` for
        ``snapshots_to_3db_fraction``.
    tail : int, default 256
        Extra snapshots after the last checkpoint, used only for the measured SINR of
        the final weights (an integer >= 0).
    chunk : int, optional
        Trials per chunk (default :func:`adapt.engine.plan.chunk_size`).
    workers : int, optional
        Run on this many local Dask worker processes (not with ``threads``).
    scheduler : str, optional
        Run on an existing Dask cluster, ``tcp://HOST:PORT`` or ``HOST:PORT`` (not with
        ``threads``).
    store : str, os.PathLike or callable, optional
        A folder keeping finished chunks, so an interrupted run resumes where it
        stopped (a callable returning the folder is called once the work starts).
    on_chunk : callable, optional
        Called with (first trial, count) after each finished chunk.
    threads : int, optional
        Threads of this process the chunks run on (default: every usable core; 1: one
        after another).
    patterns : bool, default True
        False leaves out the pattern scores (pointing error, peak sidelobe), the
        costliest part of the summary.

    Returns
    -------
    Comparison
        ``evaluation`` (the :class:`Evaluation` of :func:`evaluate`: arrays (T, C) per
        processor), ``summary`` (a :class:`CompareSummary`, every statistic the table,
        CSV, figures and report show: run facts, one entry per processor with its
        final statistics, per-checkpoint curve and floored null depths, the verdict;
        ``summary.processor(label)`` one entry), ``metrics`` (``summary.to_json()``,
        the ``metrics.json`` mapping; schema in :mod:`adapt.studies.compare`),
        ``scene`` as run, ``processors`` and ``seconds`` (wall time); ``table()`` is
        the terminal summary.

    Raises
    ------
    InputError
        For a bad scene, spec, count, checkpoint, ``tail``, ``chunk``, thread or cluster
        option or scheduler address, a non-finite ``target_db``, a ``fraction`` outside
        (0, 1], or a run that would not fit in memory (all before any work).

    References
    ----------
    Optimum (clairvoyant MVDR) and output SINR: Capon (1969), Proc. IEEE 57(8); Van
    Trees, *Optimum Array Processing* (2002), ch. 6. Loss of the mean normalised SINR
    and snapshots to 3 dB: Reed, Mallett and Brennan, IEEE Trans. AES-10(6), 1974.
    Bootstrap of the robustness margin: Efron and Tibshirani (1993).
    """
    return _compare(scene, processors, trials, snapshots, seed, checkpoints, progress,
                    target_db=target_db, fraction=fraction, tail=tail, chunk=chunk,
                    workers=workers, scheduler=scheduler, store=store, on_chunk=on_chunk,
                    threads=threads, patterns=patterns)


def write_run(comparison: Comparison, out="runs", command_line: str | None = None) -> Path:
    """Write a comparison to a new run folder (as ``adapt compare`` does).

    Every file is written atomically; an existing folder is never touched.

    Parameters
    ----------
    comparison : Comparison
        The result of :func:`compare`.
    out : str or os.PathLike, default "runs"
        The folder under which the new run folder is made.
    command_line : str, optional
        The command line to record with the run (default None: none).

    Returns
    -------
    pathlib.Path
        The new run folder, holding ``scene.yaml``, ``metrics.json``, ``curves.csv``,
        the figures, ``report.html`` and ``manifest.json`` (versions, seed, command
        line, sha256 of every file).

    Raises
    ------
    InputError
        When ``comparison`` is not a :class:`Comparison`, ``out`` is not a path or
        ``command_line`` is not text.

    References
    ----------
    SHA-256 of the manifest: FIPS 180-4 (NIST, 2015); JSON: RFC 8259; CSV: RFC 4180.
    """
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
    """Read a run folder written by :func:`write_run`, ``adapt compare`` or ``adapt size``.

    Parameters
    ----------
    folder : str or os.PathLike
        The run folder.

    Returns
    -------
    dict
        A comparison: ``{"summary": CompareSummary, "metrics": dict, "manifest": dict,
        "curves": list of row dicts (text values), "problems": list}``; a sizing run:
        ``{"summary": SizingSummary, "sizing": dict, "manifest": dict, "problems":
        list}``. ``summary`` is the typed summary read back from ``metrics.json`` /
        ``sizing.json`` (its ``to_json()`` gives the file's mapping again; undefined
        values, ``null`` in the file, read as None), ``metrics`` / ``sizing`` that
        mapping; ``manifest`` is empty when the folder has no ``manifest.json``,
        ``curves`` when it has no ``curves.csv``; ``problems`` lists manifest mismatches
        (empty: intact).

    Raises
    ------
    InputError
        When ``folder`` is not a path, not a run folder (neither ``metrics.json`` nor
        ``sizing.json``), or its summary is unreadable or lacks a key.

    References
    ----------
    SHA-256 (FIPS 180-4) for the manifest check; JSON: RFC 8259; CSV: RFC 4180.
    """
    if not isinstance(folder, (str, Path)):
        raise InputError("expected the path of a run folder", value=type(folder).__name__)
    if not any((Path(folder) / name).is_file() for name in ("metrics.json", "sizing.json")):
        raise InputError("not a run folder (no metrics.json or sizing.json)", value=str(folder),
                         allowed="a folder written by adapt compare, adapt size or write_run")
    try:
        out = _read_run(folder)
        if "metrics" in out:
            summary = CompareSummary.from_mapping(out["metrics"])
        else:
            summary = SizingSummary.from_mapping(out["sizing"])
    except (ValueError, UnicodeDecodeError) as exc:
        # json.JSONDecodeError is a ValueError; so is a summary lacking a key
        raise InputError(f"the run folder's summary is unreadable ({exc})",
                         file=str(folder)) from None
    return {"summary": summary, **out}


def size(scene, specs: Sequence | None = None, **options):
    """Snapshot sizing sweep (as ``adapt size``): how many training snapshots each
    processor needs to come within a target loss (:func:`adapt.studies.sizing.size`).

    Parameters
    ----------
    scene : Scene, str or os.PathLike
        A scene or the path of a scene file.
    specs : str, dict, Processor or list of them, optional
        Processor specs (default: the scene's ``processors`` list, or unloaded and
        10 dB-loaded SMI when it lists none).
    **options
        Keyword options of :func:`adapt.studies.sizing.size`: ``snapshots`` (the sweep;
        default geometric, 8 per octave, up to the scene's snapshots), ``trials`` (at
        least 2), ``seed``, ``target_loss_db`` (in (0, 100], default 3.0), ``fraction``
        (in (0, 1], default 0.9), ``progress``, ``chunk``, ``workers``, ``scheduler``,
        ``store``, ``on_chunk``, ``threads`` (as in :func:`compare`) and ``draw``:
        ``"auto"`` here unless given, as on the command line (drawn covariances where
        exact), ``"samples"`` or ``"covariance"``.

    Returns
    -------
    Sizing
        ``summary`` (a :class:`SizingSummary`: per processor and sweep point the mean
        normalised SINR and its standard error, loss percentiles in dB, the share of
        trials within the target, the closed-form mean where one applies; the required
        snapshot counts in the mean and per trial with their ranges), ``record``
        (``summary.to_json()``, the ``sizing.json`` mapping), ``evaluation`` (per-trial
        arrays (T, C), C the sweep points), ``scene``, ``processors``, ``seconds``;
        ``table()`` is the terminal summary.

    Raises
    ------
    InputError
        For an unknown option (naming the allowed ones), bad specs or scheduler address,
        fewer than 2 trials, and every bad scene or option value.

    References
    ----------
    Reed, Mallett and Brennan, "Rapid convergence rate in adaptive arrays", IEEE Trans.
    AES-10(6), 1974 (rho ~ Beta(K-N+2, N-1), the 3 dB criterion); bootstrap ranges:
    Efron and Tibshirani, *An Introduction to the Bootstrap* (1993); per-trial ranges:
    Clopper and Pearson, Biometrika 26 (1934); drawn covariances: the complex Wishart
    law (Goodman 1963).
    """
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
    """Write a reference set of a processor's inputs and outputs (as ``adapt record``).

    The set is built in a temporary sibling folder and renamed into place when complete
    (see :func:`adapt.studies.reference.record` for its layout).

    Parameters
    ----------
    scene : Scene, str or os.PathLike
        A scene or the path of a scene file.
    spec : str, dict or Processor
        The processor to record (specs that need the true covariance are refused).
    out_dir : str or os.PathLike
        A new or empty folder (anything else is refused, never overwritten).
    trials : int, optional
        Number of cases (default 3).
    snapshots : int, optional
        Snapshots K per case (default: the scene's).
    checkpoints : list of int or str, optional
        Snapshot counts at which weights are recorded (default N, 2N, 4N, ... and K,
        N the elements).
    tolerances : dict or list of str, optional
        Overrides of the default tolerances (a mapping or ``NAME=VALUE`` strings),
        written to ``tolerances.json``.

    Returns
    -------
    pathlib.Path
        The reference-set folder: per case ``samples.npy`` (K, N), ``weights.npy``
        (C, N), ``outputs.npy`` (K,), ``sinr_db.npy`` (C,), the truth, a SigMF copy
        of the samples, and ``manifest.json``. A wideband scene, ``taps=L`` or
        ``subband`` makes a space-time set: ``weights.npy`` (C, N L), column ``l N +
        n`` for element n delayed by l snapshots (tap 0 the newest), the shape in the
        ``weights`` mapping of ``reference.json`` and ``case.json``.

    Raises
    ------
    InputError
        For a bad scene, spec, count, checkpoint, tolerance or output folder, or a set
        too big to keep as test vectors.

    References
    ----------
    SigMF, the Signal Metadata Format specification 1.2 (sigmf.org) for the sample
    copies; the expected SINR: Van Trees, *Optimum Array Processing* (2002), ch. 6
    (space-time weights: the broadband chapter).
    """
    from adapt.studies.reference import record as _record
    return _record(_scene(scene), spec, trials, snapshots, checkpoints, out_dir,
                   tolerances=tolerances)


def verify(reference_dir, implementation, **options):
    """Check an implementation against a reference set (as ``adapt verify``).

    Parameters
    ----------
    reference_dir : str or os.PathLike
        A reference set written by :func:`record` (checked against its manifest).
    implementation : callable or str
        A callable ``f(case) -> weights (C, N)`` ((C, N L) in a space-time set), a
        ``"python:MODULE:FUNCTION"`` or ``"python:file.py:FUNCTION"`` text, or a
        command template containing ``{case}`` and ``{out}``, e.g. ``"PROGRAM {case}
        {out}"``.
    **options
        Keyword options of :func:`adapt.studies.reference.verify`: ``tolerances``
        (overrides, mapping or ``NAME=VALUE``), ``timeout`` (seconds per case for
        commands, default 60), ``scale_blind`` (default False: compare output samples
        after removing the best complex scale per checkpoint) and ``on_start``
        (called with the empty report before the first case).

    Returns
    -------
    VerifyReport
        One result per case (``cases``) and ``passed``: crashes, timeouts and missing
        output are errors; NaN or a metric (SINR difference, weight error, output
        EVM, in dB) beyond tolerance are failures.

    Raises
    ------
    InputError
        When ``reference_dir`` is not a path; :class:`~adapt.errors.CorruptReferenceError`
        (an InputError) when the set is missing, damaged or does not match its
        manifest; InputError for a bad tolerance, timeout or ``scale_blind``;
        :class:`~adapt.studies.reference.WeightShapeError` (an InputError) at the first
        case whose weights have the wrong shape (its ``report`` says which). TypeError for an option that :func:`adapt.studies.reference.verify` does not
        take.

    References
    ----------
    SINR on the true covariance: Van Trees, *Optimum Array Processing* (2002), ch. 6;
    the report is what ``adapt verify`` writes as JUnit XML (the JUnit/Ant XML report
    format, as read by CI servers).
    """
    import inspect

    from adapt.errors import did_you_mean
    from adapt.studies.reference import load_reference
    from adapt.studies.reference import verify as _verify
    known = list(inspect.signature(_verify).parameters)[2:]
    for name in options:
        if name not in known:
            raise InputError(f"verify() has no option '{name}'" + did_you_mean(name, known),
                             allowed=", ".join(known))
    return _verify(load_reference(reference_dir), implementation, **options)
