"""Chunked execution of Monte Carlo runs: :func:`run_trials` and :func:`run_chunks`.

A run's trials are split into chunks (:mod:`adapt.engine.plan`); each chunk is one
:class:`~adapt.streams.snapshots.TrialBatch` scored by
:func:`adapt.engine.evaluate.evaluate_batch`, in this process (one after another or on a
pool of threads) or on a Dask cluster (:mod:`adapt.engine.executors`); with a ``store``
every finished chunk is kept on disk and a later call with the same store computes only
the rest (:mod:`adapt.engine.chunks`). The parts are merged in trial order; results
never depend on the chunking, the threads or workers, or an interruption.

The run-folder life cycle around a resumable run (``INCOMPLETE``, ``resume.json``,
sealing) is :mod:`adapt.report.runfolder`; signals and exit codes are the command
line's (:mod:`adapt.cli._signals`).
"""
from __future__ import annotations

from typing import Callable, Sequence

from adapt.engine.chunks import (  # noqa: F401  (re-exported: the engine's one entry point)
    ChunkStore,
    expected_arrays,
    part_arrays,
    part_evaluation,
)
from adapt.engine.evaluate import Evaluation, default_checkpoints, evaluate_batch, merge
from adapt.engine.executors import (  # noqa: F401  (re-exported: the engine's one entry point)
    INSTALL_HINT,
    MAX_THREADS,
    MAX_WORKERS,
    check_cluster_options,
    check_threads,
    cluster_client,
    draw_option,
    reraise_warnings,
    run_chunk,
    run_on_threads,
    run_threaded,
    usable_cores,
)
from adapt.engine.plan import (  # noqa: F401  (re-exported: the engine's one entry point)
    CHUNK_WORK,
    MAX_CHUNK,
    THREAD_WORK,
    Plan,
    block_size,
    chunk_size,
    scene_mapping,
    shippable_specs,
)
from adapt.errors import InputError
from adapt.numerics.kernels import compiled as compiled_kernels
from adapt.processors import Processor
from adapt.processors.base import normalised_checkpoints
from adapt.scene.model import Scene
from adapt.streams.snapshots import TrialBatch

__all__ = ["run_trials", "run_chunks"]


def run_chunks(scene: Scene, processors: Sequence[Processor], checkpoints, *,
               trials: int, snapshots: int, seed: int, tail: int = 0,
               chunk: int | None = None, block: int | None = None,
               workers: int | None = None, scheduler: str | None = None, store=None,
               progress: Callable[[int], None] | None = None,
               on_chunk: Callable[[int, int], None] | None = None,
               draw: str = "samples", threads: int | None = None) -> Evaluation:
    """Score ``processors`` on ``trials`` trials of ``scene``, chunk by chunk.

    chunk, block: trials per chunk and snapshots per block (default :func:`chunk_size`,
    :func:`block_size`; a given ``block`` changes rounding, ``chunk`` never does);
    threads: run the chunks on this many threads of this process (default: every usable
    core; 1: one after another in the calling thread; see the module docstring);
    workers / scheduler: run the chunks on a Dask cluster instead (see
    :func:`cluster_client`; InputError if ``threads`` is given too);
    store: a folder (or a callable returning one, called once the work is about to
    start) keeping finished chunks for resuming; progress: called with trial-snapshots
    done (per block in this process - from the worker threads, one call at a time -
    per chunk on a cluster, at once for stored chunks); on_chunk: called in the calling
    thread with (first trial, count) after each chunk is finished and stored (on
    threads: in trial order);
    draw: passed to :func:`adapt.engine.evaluate.evaluate_batch`. Returns the merged
    :class:`Evaluation` in trial order. Each processor's ``seconds`` is summed over the
    chunks: with threads (or workers) that is the time summed over threads, not the
    elapsed wall time.
    """
    if not processors:
        raise ValueError("no processors to evaluate")
    remote = workers is not None or scheduler is not None
    checked = check_threads(threads, remote=remote)
    check_cluster_options(workers, scheduler)
    pool_threads = 1 if remote else checked
    checkpoints = normalised_checkpoints(checkpoints, snapshots)
    total = int(snapshots) + int(tail)
    n = scene.elements
    blk = block_size(n, total) if block is None else int(block)
    share = workers if workers is not None else (4 if scheduler is not None else 1)
    # a drawn covariance costs per trial about what streaming N snapshots per span does
    # (spans: at most two cuts per checkpoint), whatever the stream length
    work_length = total if draw != "covariance" else min(total, n * (2 * len(checkpoints) + 1))
    size = (chunk_size(trials, n, work_length, len(processors), blk, share, pool_threads)
            if chunk is None else int(chunk))
    if size < 1:
        raise InputError("a chunk must hold at least one trial", path="chunk", value=chunk)
    chunks_store = None
    if store is not None or remote:
        specs = shippable_specs(processors)
    else:
        specs = tuple(p.spec() for p in processors)
    plan = Plan(scene=scene_mapping(scene), specs=specs,
                checkpoints=tuple(int(c) for c in checkpoints), snapshots=int(snapshots),
                tail=int(tail), trials=int(trials), seed=int(seed), chunk=size, block=blk,
                draw=str(draw))
    if store is not None:
        folder = store() if callable(store) else store
        chunks_store = ChunkStore(folder)
        plan = chunks_store.adopt(plan)
    shapes = {}

    def expected(count: int) -> dict:
        if count not in shapes:
            shapes[count] = expected_arrays(len(processors), len(checkpoints), n,
                                            len(scene.interferers), count)
        return shapes[count]

    def build(arrays):
        return part_evaluation(arrays, scene, processors, checkpoints, snapshots, seed)

    parts: dict[tuple[int, int], Evaluation] = {}
    if chunks_store is not None:
        stored = set(chunks_store.finished())
        for key in plan.chunks():
            if key in stored:
                arrays = chunks_store.load(*key, expected=expected(key[1]))
                if arrays is not None:
                    parts[key] = build(arrays)
        if parts and progress is not None:
            progress(sum(c for _, c in parts) * total)
    todo = [key for key in plan.chunks() if key not in parts]

    def finished(key, ev, arrays):
        if chunks_store is not None:
            chunks_store.save(*key, arrays)
        parts[key] = ev
        if on_chunk is not None:
            on_chunk(*key)

    if todo and not remote and pool_threads > 1 and len(todo) > 1:
        run_threaded(todo, pool_threads, scene, processors, checkpoints, snapshots=int(snapshots),
                      seed=int(seed), tail=int(tail), block=blk, draw=draw,
                      progress=progress, keep_arrays=chunks_store is not None,
                      finished=finished)
    elif todo and not remote:
        # one chunk cannot fill the threads with its trials: its samples are generated
        # ahead instead (compiled, outside the interpreter lock; the same values), on
        # one thread more than the pool, since the engine's own thread is busy only
        # part of the time. Measured on 2 cores, one trial of 16 elements: a
        # narrowband nlms stream 3.8 M/s in sequence, 4.1-4.5 M/s with three
        # producers (3.5 with two); a wideband nlms taps=5 stream 0.70 M/s with two,
        # 0.76 with three.
        # (The numpy path keeps one sequence: its generation holds the lock, and a
        # 300,000-snapshot nlms stream ran 0.16 M/s ahead against 0.17 in sequence.)
        ahead = {"producers": pool_threads + 1} if pool_threads > 1 and len(todo) == 1 \
            and draw == "samples" and compiled_kernels() else {}
        for first, count in todo:
            ev = evaluate_batch(TrialBatch(scene, trials=count, seed=seed, first_trial=first),
                                processors, checkpoints, snapshots, tail=tail, block=blk,
                                progress=progress, **draw_option(draw), **ahead)
            finished((first, count), ev, part_arrays(ev) if chunks_store is not None else None)
    elif todo:
        from dask.distributed import as_completed
        with cluster_client(workers, scheduler) as client:
            shipped = plan.as_dict()
            futures = {client.submit(run_chunk, shipped, f, c, pure=False): (f, c)
                       for f, c in todo}
            try:
                for fut in as_completed(list(futures)):
                    key = futures[fut]
                    arrays = fut.result()
                    reraise_warnings(arrays)
                    arrays.pop("warnings", None)
                    finished(key, build(arrays), arrays)
                    if progress is not None:
                        progress(key[1] * total)
            finally:
                client.cancel(list(futures))
    return merge([parts[key] for key in plan.chunks()])


def run_trials(scene: Scene, processors: Sequence[Processor], checkpoints=None, *,
             trials: int | None = None, snapshots: int | None = None,
             seed: int | None = None, chunk: int | None = None, tail: int = 256,
             block: int | None = None,
             progress: Callable[[int], None] | None = None,
             draw: str = "samples", workers: int | None = None,
             scheduler: str | None = None, store=None,
             on_chunk: Callable[[int, int], None] | None = None,
             threads: int | None = None) -> Evaluation:
    """Run and score ``processors`` over ``trials`` Monte Carlo trials of ``scene``.

    checkpoints: snapshot counts to score (default :func:`default_checkpoints`);
    chunk: trials per batch (default :func:`chunk_size`; results do not depend on it);
    block: snapshots per block (default :func:`block_size`, fixed by the elements and
    stream length);
    threads: run the chunks on this many threads (default: every usable core; 1: one
    after another; results never depend on it; see :func:`run_chunks`);
    workers / scheduler: run the chunks on a Dask cluster; store: a folder keeping
    finished chunks so an interrupted run can be resumed (:mod:`adapt.engine.chunks`);
    on_chunk: called with (first trial, count) after each finished chunk;
    tail: extra snapshots after the last checkpoint, used only to measure the final
    weights' output SINR from samples; progress: called with the number of
    trial-snapshots done after each block; draw: ``samples`` (default) or
    ``covariance``, the drawn-covariance fast path (see
    :func:`adapt.engine.evaluate.evaluate_batch`). Processor ``seconds`` are summed over
    chunks (with threads: time summed over the threads, not wall time).
    """
    t_ = int(scene.trials if trials is None else trials)
    k_ = int(scene.snapshots if snapshots is None else snapshots)
    s_ = int(scene.seed if seed is None else seed)
    if tail < 0:
        raise ValueError(f"tail must be >= 0 snapshots, got {tail}")
    if not processors:
        raise ValueError("no processors to evaluate")
    checkpoints = default_checkpoints(k_) if checkpoints is None else checkpoints
    return run_chunks(scene, processors, checkpoints, trials=t_, snapshots=k_, seed=s_, tail=tail,
                      chunk=chunk, block=block, workers=workers, scheduler=scheduler,
                      store=store, progress=progress, on_chunk=on_chunk, draw=draw,
                      threads=threads)
