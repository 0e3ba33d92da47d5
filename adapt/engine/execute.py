"""Chunked execution of Monte Carlo runs: on threads, on a Dask cluster, resumable.

A run's trials are split into chunks (consecutive trial ranges). Each chunk is one
:class:`~adapt.streams.snapshots.TrialBatch` scored by :func:`adapt.engine.evaluate.evaluate_batch`; the
parts are merged in trial order. One executor, :func:`run_chunks`, serves three cases:

* in this process: with ``threads=1`` chunks run one after another; with more
  (default: every usable core, :func:`usable_cores`) they run on a pool of threads
  (:func:`run_on_threads`). The heavy work inside a chunk (the random fills, batched
  matrix products and factorisations, the numba kernels compiled ``nogil``) releases
  the GIL, so the threads use the cores. Processors keep per-batch state on themselves,
  so every chunk runs on its own fresh copy (``copy.deepcopy`` of the given processors,
  taken before any chunk starts them: same labels and specs; ``begin()`` resets any
  state). Side effects stay on the calling thread: storing
  a chunk and ``on_chunk`` happen there in trial order, as soon as a chunk and all
  before it are finished (so the stored chunks are always the first ones, as in a
  serial run); the ``progress`` callback is called per block from the worker threads,
  one call at a time (a lock). Ctrl-C / SIGTERM in the calling thread stop the run:
  chunks not yet started are cancelled, running ones end at their next block, chunks
  already handed back stay stored; the first error raised in a chunk is re-raised
  unchanged;
* scale-out: chunks run on a Dask cluster, either ``workers`` local worker processes
  (``dask.distributed.LocalCluster`` on 127.0.0.1, one thread each) or an existing
  scheduler at ``scheduler`` (``tcp://host:8786``). A worker receives plain data only
  (the resolved scene mapping and processor spec strings, see :class:`Plan`) and
  rebuilds the scene and processors with :func:`adapt.scene.files.parse_scene` and
  :func:`adapt.processors.parse_spec`; it returns numpy arrays;
* resume: with ``store`` (a folder), every finished chunk is written there at once as
  an ``.npz`` file (atomically, never pickled, :data:`adapt.io` conventions); a later
  call with the same store loads the finished chunks and computes only the rest.

Why the results never depend on the partitioning: trial i draws from its own seed
(``SeedSequence(seed, spawn_key=(i, ...))``, :mod:`adapt.streams.snapshots`), every computation is
vectorised along the trial axis with no cross-trial sums, and the block boundaries
(which do change floating-point rounding of running sums) are fixed by
:func:`block_size` from the element count and stream length alone, never from the chunk.
So any chunk size, thread or worker count or interruption gives bit-identical arrays.

Chunk size (:func:`chunk_size`, documented in README): about ``CHUNK_WORK`` units of
``trials x (snapshots + tail) x N^2 x processors`` (measured at roughly 0.5-2 s of
one core on the example scenes), at most ``MAX_CHUNK`` trials and bounded memory; on a
cluster at most a quarter of an even share per worker so the load balances; on threads
one part per thread as long as each holds at least ``THREAD_WORK`` (smaller runs stay
in one chunk: splitting them costs more than the second core gains), the number of
chunks a multiple of the parts. A drawn
covariance run (``draw="covariance"``) costs per trial what streaming N snapshots per
span would, so its stream length counts as at most ``N x (2 x checkpoints + 1)``.

Run folders of ``adapt compare`` / ``adapt size`` are resumable: :func:`start_run_folder`
writes ``resume.json`` (the resolved scene and the command's settings) and an
``INCOMPLETE`` marker before the work starts; chunks go to ``partial/``; on completion
:func:`seal` removes all three just before the manifest is written, so a finished folder
holds exactly the usual outputs. A folder without ``manifest.json`` is incomplete.
"""
from __future__ import annotations

import copy
import json
import logging
import math
import os
import re
import shutil
import signal
import threading
import warnings
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from adapt import io
from adapt.engine.evaluate import (
    Evaluation,
    ProcessorScores,
    default_checkpoints,
    evaluate_batch,
    merge,
    trial_chunks,
)
from adapt.errors import InputError
from adapt.processors import Processor
from adapt.processors.base import normalised_checkpoints
from adapt.scene.model import Scene
from adapt.streams.snapshots import TrialBatch

__all__ = ["evaluate", "Plan", "ChunkStore", "Terminated", "run_chunks", "run_chunk", "block_size",
           "chunk_size", "part_arrays", "part_evaluation", "check_cluster_options",
           "cluster_client", "start_run_folder", "open_for_resume", "seal", "kept_chunks",
           "remove_if_empty", "interrupted_message",
           "stop_on_signals", "exit_code", "CHUNK_WORK", "MAX_CHUNK", "RESUME_FILE",
           "MARKER", "PARTIAL", "INSTALL_HINT", "MAX_WORKERS", "MAX_THREADS", "THREAD_WORK",
           "usable_cores", "check_threads", "run_on_threads"]

#: work per chunk in trials x (snapshots + tail) x N^2 x processors (about 0.5-2 s on
#: one core for the example scenes, measured; common practice: seconds-sized tasks)
CHUNK_WORK = 2.0e8
#: largest chunk, trials
MAX_CHUNK = 1000
#: least work worth a thread of its own, in CHUNK_WORK units (measured on 2 cores with
#: the example scenes: runs with less work per thread were slower split than serial,
#: the per-block overhead of small chunks and the GIL held between the numpy calls
#: outweighing the second core)
THREAD_WORK = CHUNK_WORK / 4
#: (snapshots x elements) per trial in one block; fixes the block boundaries
_BLOCK_VALUES = 1 << 16
#: blocks per stream, about (measured on 2 cores, 16 elements, 1000 trials x 4096
#: snapshots of RLS: 10 blocks ran 9 % faster than 20, 5 no faster than 10)
BLOCKS_PER_STREAM = 10
#: complex values of one (trials, block, elements) array
_CHUNK_VALUES = 1 << 21
#: most local worker processes
MAX_WORKERS = 256
#: most threads in this process
MAX_THREADS = 256
INSTALL_HINT = "pip install 'adapt[cluster]'  (installs dask[distributed])"

RESUME_FILE = "resume.json"
MARKER = "INCOMPLETE"
PARTIAL = "partial"
_PLAN_FILE = "plan.json"
_FIELDS = ("sinr", "normalised", "loss_db", "white_noise_gain", "null_depth_db",
           "measured_sinr", "final_weights")
_CHUNK_NAME = re.compile(r"^chunk-(\d{9})-(\d{6})\.npz$")


# --------------------------------------------------------------------------- sizes
def block_size(elements: int, total: int) -> int:
    """Snapshots per block: about ``BLOCKS_PER_STREAM`` blocks per stream (progress
    steps; fewer, longer blocks mean less Python work per snapshot, which holds the
    GIL, so threads scale better), at least 64, at most ``2**16 / N`` (memory) and the
    stream length. Depends on nothing else, so the block boundaries - and hence every
    rounding - are the same for any chunking."""
    if elements < 1 or total < 1:
        raise ValueError("elements and total snapshots must be >= 1")
    return int(max(1, min(total, max(64, -(-total // BLOCKS_PER_STREAM)),
                          max(1, _BLOCK_VALUES // elements))))


def chunk_size(trials: int, elements: int, total: int, processors: int = 1,
               block: int | None = None, workers: int = 1, threads: int = 1) -> int:
    """Trials per chunk (see the module docstring); the answer never changes results.

    workers: Dask workers (at most a quarter of an even share each); threads: threads
    in this process: the run is split into one part per thread, as far as each part
    holds at least ``THREAD_WORK``, and the number of chunks is made a multiple of
    the parts, so the threads finish together."""
    if trials < 1 or elements < 1 or total < 1:
        raise ValueError("trials, elements and total snapshots must be >= 1")
    block = block_size(elements, total) if block is None else int(block)
    work = float(total) * elements ** 2 * max(1, int(processors))
    size = min(trials, MAX_CHUNK, int(CHUNK_WORK // work),
               _CHUNK_VALUES // max(1, block * elements))
    size = max(1, size)
    if workers > 1:
        size = min(size, math.ceil(trials / (4 * workers)))
    elif threads > 1:
        parts = min(int(threads), int(trials * work // THREAD_WORK), trials)
        if parts >= 2:
            count = math.ceil(max(math.ceil(trials / size), parts) / parts) * parts
            size = math.ceil(trials / count)
    return int(max(1, size))


# --------------------------------------------------------------------------- plan
@dataclass(frozen=True)
class Plan:
    """Everything a worker needs, as plain data (JSON-safe): the resolved scene
    mapping, processor spec strings and the run settings."""
    scene: dict
    specs: tuple
    checkpoints: tuple
    snapshots: int
    tail: int
    trials: int
    seed: int
    chunk: int
    block: int
    draw: str = "samples"
    #: how the random numbers are made (:data:`adapt.streams.snapshots.STREAMS`): chunks made
    #: under another definition are not resumed into this run
    streams: str = ""

    def __post_init__(self):
        if not self.streams:
            from adapt.streams.snapshots import STREAMS
            object.__setattr__(self, "streams", STREAMS)

    def chunks(self) -> list[tuple[int, int]]:
        return trial_chunks(self.trials, self.chunk)

    def as_dict(self) -> dict:
        d = asdict(self)
        d["specs"], d["checkpoints"] = list(self.specs), list(self.checkpoints)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "Plan":
        return cls(scene=d["scene"], specs=tuple(d["specs"]),
                   checkpoints=tuple(int(c) for c in d["checkpoints"]),
                   snapshots=int(d["snapshots"]), tail=int(d["tail"]), trials=int(d["trials"]),
                   seed=int(d["seed"]), chunk=int(d["chunk"]), block=int(d["block"]),
                   draw=str(d.get("draw", "samples")),
                   streams=str(d.get("streams", "numpy-generator")))

    def same_work(self, other: "Plan") -> bool:
        """True when both plans compute the same trials (chunking aside)."""
        a, b = self.as_dict(), other.as_dict()
        for d in (a, b):
            d.pop("chunk"), d.pop("block")
        return json.dumps(io.to_jsonable(a), sort_keys=True) == \
            json.dumps(io.to_jsonable(b), sort_keys=True)


def scene_mapping(scene: Scene) -> dict:
    """The scene as plain JSON-able data (its resolved mapping), for workers and run
    folders."""
    from adapt.scene.files import scene_to_mapping
    m = dict(scene.resolved) if getattr(scene, "resolved", None) else scene_to_mapping(scene)
    return io.to_jsonable(m)


def shippable_specs(processors: Sequence[Processor]) -> tuple:
    """Spec strings that rebuild each processor exactly (InputError otherwise)."""
    from adapt.processors import parse_spec
    out = []
    for p in processors:
        spec = p.spec()
        try:
            again = parse_spec(spec)
        except InputError:
            again = None
        if again is None or again.spec() != spec or again.label != p.label:
            raise InputError(f"processor '{p.label}' cannot be rebuilt from its spec, so it "
                             "cannot be sent to workers or resumed", value=spec,
                             allowed="processors of the registry given as specs")
        out.append(spec)
    return tuple(out)


# --------------------------------------------------------------------------- parts
def part_arrays(ev: Evaluation) -> dict[str, np.ndarray]:
    """An evaluated chunk as flat numpy arrays (what workers return and ``.npz`` keeps)."""
    out = {"optimum_sinr": np.array(ev.optimum_sinr),
           "positions": np.asarray(ev.positions), "element_gains": np.asarray(ev.element_gains)}
    for i, p in enumerate(ev.processors):
        for name in _FIELDS:
            out[f"p{i}.{name}"] = np.asarray(getattr(p, name))
        out[f"p{i}.seconds"] = np.float64(p.seconds)
    return out


def part_evaluation(arrays: dict, scene: Scene, processors: Sequence[Processor],
                    checkpoints, snapshots: int, seed: int) -> Evaluation:
    """Rebuild an :class:`Evaluation` of one chunk from :func:`part_arrays` output."""
    cps = np.asarray(checkpoints, dtype=np.int64)
    procs = []
    for i, p in enumerate(processors):
        procs.append(ProcessorScores(label=p.label, method=p.method, params=dict(p.params),
                                     spec=p.spec(), checkpoints=cps,
                                     seconds=float(arrays[f"p{i}.seconds"]),
                                     **{n: np.asarray(arrays[f"p{i}.{n}"]) for n in _FIELDS}))
    opt = np.asarray(arrays["optimum_sinr"])
    return Evaluation(scene=scene, trials=int(opt.shape[0]), seed=int(seed),
                      snapshots=int(snapshots), checkpoints=cps, optimum_sinr=opt,
                      processors=procs, interferers=tuple(s.name for s in scene.interferers),
                      positions=np.asarray(arrays["positions"]),
                      element_gains=np.asarray(arrays["element_gains"]))


def run_chunk(plan: dict, first: int, count: int) -> dict[str, np.ndarray]:
    """Worker entry point: rebuild the scene and processors from ``plan`` (plain data,
    :meth:`Plan.as_dict`) and score trials ``first .. first + count - 1``. Returns
    :func:`part_arrays` plus ``"warnings"`` (the library warnings raised, as text)."""
    from adapt.processors import parse_spec
    from adapt.scene.files import parse_scene
    from adapt.streams.snapshots import STREAMS
    made = plan.get("streams", "numpy-generator")
    if made != STREAMS:           # e.g. a cluster worker of another adapt version
        raise RuntimeError(f"this plan's random streams are {made!r}; this adapt makes "
                           f"{STREAMS!r}: run every worker on the same adapt version")
    scene = parse_scene(plan["scene"])
    procs = [parse_spec(s) for s in plan["specs"]]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ev = evaluate_batch(TrialBatch(scene, trials=int(count), seed=int(plan["seed"]),
                                       first_trial=int(first)),
                            procs, np.asarray(plan["checkpoints"], dtype=np.int64),
                            int(plan["snapshots"]), tail=int(plan["tail"]),
                            block=int(plan["block"]), **_draw(plan.get("draw", "samples")))
    out = part_arrays(ev)
    texts = list(dict.fromkeys(f"{w.category.__name__}:{w.message}" for w in caught))
    out["warnings"] = np.array(texts, dtype=str) if texts else np.zeros(0, dtype="<U1")
    return out


def _draw(draw: str) -> dict:
    # only pass the option when it differs from the default (older evaluate_batch)
    return {} if draw == "samples" else {"draw": draw}


def _reraise_warnings(arrays: dict) -> None:
    import builtins
    for text in np.asarray(arrays.get("warnings", ())).tolist():
        name, _, message = str(text).partition(":")
        category = getattr(builtins, name, None)
        if not (isinstance(category, type) and issubclass(category, Warning)):
            category = UserWarning
        warnings.warn(message, category, stacklevel=3)


# --------------------------------------------------------------------------- store
class ChunkStore:
    """A folder of finished chunks: ``plan.json`` and ``chunk-FFFFFFFFF-CCCCCC.npz``
    (first trial, trial count), each written atomically, arrays without pickling."""

    def __init__(self, folder):
        self.folder = Path(folder)

    def adopt(self, plan: Plan) -> Plan:
        """The plan to run: a stored plan's chunking wins (so finished chunks fit);
        InputError if the stored plan computes different trials."""
        path = self.folder / _PLAN_FILE
        self.folder.mkdir(parents=True, exist_ok=True)
        if path.is_file():
            try:
                stored = Plan.from_dict(json.loads(path.read_text(encoding="utf-8")))
            except (ValueError, KeyError, TypeError) as exc:
                raise InputError(f"the stored plan is unreadable ({exc})", file=str(path)) from None
            if stored.streams != plan.streams:
                raise InputError(f"the finished chunks here were made by an adapt version "
                                 f"whose random streams are {stored.streams!r}; this one "
                                 f"makes {plan.streams!r}, so the run cannot be finished "
                                 f"here: start a new run", file=str(self.folder))
            if not stored.same_work(plan):
                raise InputError("the finished chunks here belong to a different run (scene, "
                                 "processors, checkpoints, trials or seed differ)",
                                 file=str(self.folder))
            return stored
        io.write_json(path, plan.as_dict())
        return plan

    def path(self, first: int, count: int) -> Path:
        return self.folder / f"chunk-{first:09d}-{count:06d}.npz"

    def finished(self) -> list[tuple[int, int]]:
        if not self.folder.is_dir():
            return []
        out = []
        for p in self.folder.iterdir():
            m = _CHUNK_NAME.match(p.name)
            if m:
                out.append((int(m.group(1)), int(m.group(2))))
        return sorted(out)

    def save(self, first: int, count: int, arrays: dict) -> Path:
        import io as _io
        for k, v in arrays.items():
            if np.asarray(v).dtype == object:
                raise ValueError(f"refusing to store an object array ({k})")
        buf = _io.BytesIO()
        np.savez(buf, **{k: np.asarray(v) for k, v in arrays.items()})
        return io.atomic_write_bytes(self.path(first, count), buf.getvalue())

    def load(self, first: int, count: int) -> dict | None:
        """The stored arrays, or None when the file is missing or unreadable."""
        try:
            with np.load(self.path(first, count), allow_pickle=False) as z:
                return {k: z[k] for k in z.files}
        except (OSError, ValueError, KeyError, EOFError):
            return None


# --------------------------------------------------------------------------- threads
def usable_cores() -> int:
    """The cores this process may run on (its CPU affinity where the system reports it,
    else ``os.cpu_count()``), at least 1."""
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n = os.cpu_count() or 1
    return max(1, min(int(n), MAX_THREADS))


def check_threads(threads=None, remote: bool = False, path: str = "threads") -> int:
    """The number of threads to run chunks on: ``None`` means :func:`usable_cores`;
    InputError (at ``path``) unless a whole number in [1, MAX_THREADS], and when given
    together with a Dask cluster (``remote``: its workers decide the parallelism)."""
    if threads is None:
        return usable_cores()
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) \
            or not 1 <= int(threads) <= MAX_THREADS:
        raise InputError("the number of threads is out of range", path=path, value=threads,
                         allowed=f"an integer in [1, {MAX_THREADS}]")
    if remote:
        raise InputError("threads are for runs in this process; on a Dask cluster "
                         "(--workers or --scheduler) the workers decide the parallelism",
                         path=path, value=threads,
                         allowed="either threads or --workers / --scheduler")
    return int(threads)


class _Stopped(BaseException):
    """Raised in a worker thread at its next check once the run is stopping (an
    interruption or another chunk's error); never reaches the caller."""


def run_on_threads(keys: Sequence, threads: int, work: Callable, done: Callable) -> None:
    """Run ``work(key, check)`` for every key on a pool of ``threads`` threads and call
    ``done(key, result)`` in the calling thread, in the order of ``keys``, as soon as a
    key and every key before it have finished (a key finishing early waits for the
    earlier ones, so what ``done`` has seen is always a prefix of ``keys``, as in a
    serial run). ``work`` should call ``check()`` now and then (e.g. between blocks): it
    raises a private exception once the run stops.

    The run stops at the first exception, in a worker (re-raised unchanged) or in the
    calling thread (KeyboardInterrupt, :class:`Terminated`, an error in ``done``): work
    not yet started is cancelled, running work ends at its next ``check()``, and the
    threads are joined before the exception propagates; finished work not yet handed to
    ``done`` is dropped. Do not use ``warnings.catch_warnings`` inside ``work`` (the
    warnings state is process-wide and not thread-safe); warnings raised there go
    through the process's filters as usual."""
    stop = threading.Event()

    def check() -> None:
        if stop.is_set():
            raise _Stopped()

    def task(key):
        check()
        return work(key, check)

    keys = list(keys)
    pool = ThreadPoolExecutor(max_workers=max(1, min(int(threads), len(keys))),
                              thread_name_prefix="adapt-chunk")
    try:
        futures = {}
        for key in keys:
            futures[pool.submit(task, key)] = key
        order = {key: i for i, key in enumerate(keys)}
        pending = set(futures)
        results: dict = {}
        handed = 0
        while pending:
            # a timed wait, so signal handlers (Ctrl-C, SIGTERM) run promptly here
            ready, pending = wait(pending, timeout=0.25, return_when=FIRST_COMPLETED)
            for fut in sorted(ready, key=lambda f: order[futures[f]]):
                results[order[futures[fut]]] = fut.result()     # the first error wins
            while handed in results:
                done(keys[handed], results.pop(handed))
                handed += 1
    finally:
        stop.set()
        pool.shutdown(wait=True, cancel_futures=True)


# --------------------------------------------------------------------------- cluster
def check_cluster_options(workers=None, scheduler=None) -> None:
    """InputError for bad ``workers`` / ``scheduler`` values or a missing dask."""
    if workers is not None and scheduler is not None:
        raise InputError("give either --workers or --scheduler, not both", path="--workers",
                         value=workers)
    if workers is not None:
        if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) \
                or not 1 <= int(workers) <= MAX_WORKERS:
            raise InputError("the number of local worker processes is out of range",
                             path="--workers", value=workers,
                             allowed=f"an integer in [1, {MAX_WORKERS}]")
    if scheduler is not None:
        text = str(scheduler).strip()
        if not re.match(r"^([a-z]+://)?[^\s/:]+(:\d+)?/?$", text):
            raise InputError("not a scheduler address", path="--scheduler", value=scheduler,
                             allowed="e.g. tcp://10.1.2.3:8786 or host:8786")
    if workers is not None or scheduler is not None:
        try:
            import dask.distributed  # noqa: F401
        except ImportError:
            raise InputError("running on a Dask cluster needs the optional dependency "
                             "dask[distributed], which is not installed",
                             path="--scheduler" if scheduler is not None else "--workers",
                             allowed=f"install it with: {INSTALL_HINT}") from None


@contextmanager
def cluster_client(workers: int | None = None, scheduler: str | None = None,
                   timeout: float = 20.0):
    """A ``dask.distributed.Client``: on ``workers`` new local processes (loopback only,
    one thread each, closed afterwards) or connected to ``scheduler``."""
    check_cluster_options(workers, scheduler)
    from dask.distributed import Client, LocalCluster
    cluster = None
    try:
        if scheduler is not None:
            try:
                client = Client(str(scheduler).strip(), timeout=timeout)
            except (OSError, TimeoutError) as exc:
                raise InputError(f"cannot reach the Dask scheduler ({exc})", path="--scheduler",
                                 value=scheduler,
                                 allowed="the address a running dask-scheduler prints") from None
        else:
            # the worker processes inherit an ignored SIGINT, so Ctrl-C in a terminal
            # (sent to the whole process group) stops only this process, which then
            # closes the cluster cleanly
            import threading
            main = threading.current_thread() is threading.main_thread()
            previous = signal.signal(signal.SIGINT, signal.SIG_IGN) if main else None
            try:
                cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1,
                                       processes=True, host="127.0.0.1",
                                       dashboard_address=None, silence_logs=logging.ERROR)
            finally:
                if previous is not None:
                    signal.signal(signal.SIGINT, previous)
            client = Client(cluster, timeout=timeout)
        try:
            yield client
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()


# --------------------------------------------------------------------------- executor
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
    cps = normalised_checkpoints(checkpoints, snapshots)
    total = int(snapshots) + int(tail)
    n = scene.elements
    blk = block_size(n, total) if block is None else int(block)
    share = workers if workers is not None else (4 if scheduler is not None else 1)
    # a drawn covariance costs per trial about what streaming N snapshots per span does
    # (spans: at most two cuts per checkpoint), whatever the stream length
    work_length = total if draw != "covariance" else min(total, n * (2 * len(cps) + 1))
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
                checkpoints=tuple(int(c) for c in cps), snapshots=int(snapshots),
                tail=int(tail), trials=int(trials), seed=int(seed), chunk=size, block=blk,
                draw=str(draw))
    if store is not None:
        folder = store() if callable(store) else store
        chunks_store = ChunkStore(folder)
        plan = chunks_store.adopt(plan)

    def build(arrays):
        return part_evaluation(arrays, scene, processors, cps, snapshots, seed)

    parts: dict[tuple[int, int], Evaluation] = {}
    if chunks_store is not None:
        stored = set(chunks_store.finished())
        for key in plan.chunks():
            if key in stored:
                arrays = chunks_store.load(*key)
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
        _run_threaded(todo, pool_threads, scene, processors, cps, snapshots=int(snapshots),
                      seed=int(seed), tail=int(tail), block=blk, draw=draw,
                      progress=progress, keep_arrays=chunks_store is not None,
                      finished=finished)
    elif todo and not remote:
        for first, count in todo:
            ev = evaluate_batch(TrialBatch(scene, trials=count, seed=seed, first_trial=first),
                                processors, cps, snapshots, tail=tail, block=blk,
                                progress=progress, **_draw(draw))
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
                    _reraise_warnings(arrays)
                    arrays.pop("warnings", None)
                    finished(key, build(arrays), arrays)
                    if progress is not None:
                        progress(key[1] * total)
            finally:
                client.cancel(list(futures))
    return merge([parts[key] for key in plan.chunks()])


def _run_threaded(todo, threads: int, scene: Scene, processors: Sequence[Processor], cps, *,
                  snapshots: int, seed: int, tail: int, block: int, draw: str, progress,
                  keep_arrays: bool, finished) -> None:
    """The chunks ``todo`` on a pool of threads (see :func:`run_on_threads`): each on
    fresh copies of ``processors``; ``finished(key, evaluation, arrays)`` in the calling
    thread."""
    templates = list(processors)
    lock = threading.Lock()

    def work(key, check):
        first, count = key

        def tick(done: int) -> None:
            check()                                   # a stopping run ends here
            if progress is not None:
                with lock:
                    progress(done)

        procs = copy.deepcopy(templates)
        ev = evaluate_batch(TrialBatch(scene, trials=count, seed=seed, first_trial=first),
                            procs, cps, snapshots, tail=tail, block=block, progress=tick,
                            **_draw(draw))
        return ev, (part_arrays(ev) if keep_arrays else None)

    run_on_threads(todo, threads, work, lambda key, result: finished(key, *result))


# --------------------------------------------------------------------------- run folders
def start_run_folder(out_root, name: str, kind: str, settings: dict,
                     command_line: str | None = None) -> Path:
    """A new run folder marked incomplete: ``INCOMPLETE`` (how to resume) and
    ``resume.json`` (kind, settings - the resolved scene and the command's parameters -
    and command line). Nothing else is in it yet."""
    folder = io.new_run_folder(out_root, name)
    io.atomic_write_text(folder / MARKER, _marker_text(folder, kind))
    io.write_json(folder / RESUME_FILE, {"kind": kind, "status": "incomplete",
                                         "settings": settings, "command_line": command_line})
    return folder


def _marker_text(folder: Path, kind: str) -> str:
    return (f"This run has not finished (it was interrupted, or is still running).\n"
            f"Finished chunks are kept in {PARTIAL}/. Finish it with:\n"
            f"  adapt {kind} --resume {folder}\n")


def open_for_resume(folder, kind: str) -> dict:
    """The ``resume.json`` record of an incomplete run folder of ``kind``; InputError if
    the folder is complete, not a run folder, or of another command."""
    path = Path(folder)
    if not path.is_dir():
        raise InputError("no such run folder", path="--resume", value=str(folder))
    if (path / "manifest.json").is_file():
        raise InputError("this run folder is already complete (it has a manifest); there "
                         "is nothing to resume", path="--resume", value=str(folder),
                         allowed="the folder of an interrupted run (marked INCOMPLETE)")
    try:
        record = json.loads((path / RESUME_FILE).read_text(encoding="utf-8"))
        if not isinstance(record, dict) or not isinstance(record.get("settings"), dict):
            raise ValueError
    except FileNotFoundError:
        raise InputError(f"not a resumable run folder (no {RESUME_FILE})", path="--resume",
                         value=str(folder),
                         allowed="the folder of an interrupted run (marked INCOMPLETE)") from None
    except (ValueError, UnicodeDecodeError):
        raise InputError(f"{RESUME_FILE} is unreadable", path="--resume",
                         value=str(folder)) from None
    if record.get("kind") != kind:
        raise InputError(f"this folder is an interrupted 'adapt {record.get('kind')}' run",
                         path="--resume", value=str(folder),
                         allowed=f"adapt {record.get('kind')} --resume {folder}")
    return record


def kept_chunks(folder) -> tuple[int, int | None]:
    """(finished chunks, planned chunks or None) of a run folder."""
    store = ChunkStore(Path(folder) / PARTIAL)
    done = len(store.finished())
    try:
        plan = Plan.from_dict(json.loads((store.folder / _PLAN_FILE).read_text(encoding="utf-8")))
        return done, len(plan.chunks())
    except (OSError, ValueError, KeyError, TypeError):
        return done, None


def seal(folder) -> None:
    """Remove the resume state (``partial/``, ``resume.json``, ``INCOMPLETE``) of a run
    folder whose outputs are written; the caller writes the manifest next."""
    folder = Path(folder)
    shutil.rmtree(folder / PARTIAL, ignore_errors=True)
    for name in (RESUME_FILE, MARKER):
        try:
            (folder / name).unlink()
        except FileNotFoundError:
            pass


# --------------------------------------------------------------------------- signals
class Terminated(KeyboardInterrupt):
    """Raised in the main thread when the process receives SIGTERM (see
    :func:`stop_on_signals`); a KeyboardInterrupt so the same clean-up runs."""


def exit_code(exc: BaseException) -> int:
    """Shell convention 128 + signal number: 143 for SIGTERM, 130 for SIGINT."""
    return 128 + (signal.SIGTERM if isinstance(exc, Terminated) else signal.SIGINT)


@contextmanager
def stop_on_signals():
    """Turn SIGTERM into :class:`Terminated` inside the block (main thread only;
    SIGINT already raises KeyboardInterrupt). The previous handler is restored."""
    import threading
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        raise Terminated()

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def remove_if_empty(folder) -> bool:
    """Delete a run folder that was started but holds no finished chunk (the run
    failed before any work was kept); True if removed."""
    folder = Path(folder)
    if folder.is_dir() and not (folder / "manifest.json").exists() \
            and not ChunkStore(folder / PARTIAL).finished():
        shutil.rmtree(folder, ignore_errors=True)
        return True
    return False


def interrupted_message(folder, kind: str, exc: BaseException) -> str:
    """What the command prints when stopped: what was kept and how to resume."""
    done, planned = kept_chunks(folder)
    what = "SIGTERM" if isinstance(exc, Terminated) else "interrupt (SIGINT)"
    of = f" of {planned}" if planned is not None else ""
    return (f"adapt: stopped by {what}: kept {done}{of} finished chunks in {folder} "
            f"(marked {MARKER}, no manifest).\n"
            f"adapt: finish it with: adapt {kind} --resume {folder}")


def evaluate(scene: Scene, processors: Sequence[Processor], checkpoints=None, *,
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
    finished chunks so an interrupted run can be resumed (see this module);
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
    cps = default_checkpoints(k_) if checkpoints is None else checkpoints
    return run_chunks(scene, processors, cps, trials=t_, snapshots=k_, seed=s_, tail=tail,
                      chunk=chunk, block=block, workers=workers, scheduler=scheduler,
                      store=store, progress=progress, on_chunk=on_chunk, draw=draw,
                      threads=threads)
