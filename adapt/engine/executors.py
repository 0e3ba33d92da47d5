"""Where chunks run: a pool of threads in this process, or a Dask cluster.

* threads (:func:`run_on_threads`, :func:`run_threaded`): with ``threads=1`` chunks run
  one after another; with more (default: every usable core, :func:`usable_cores`) on a
  pool of threads. The heavy work inside a chunk (the random fills, batched matrix
  products and factorisations, the numba kernels compiled ``nogil``) releases the GIL,
  so the threads use the cores. Processors are immutable settings (each run's state is
  the object ``begin()`` returns), so every chunk shares them and nothing is copied.
  Side effects stay on the calling thread, in trial order; the ``progress`` callback is
  called per block from the worker threads, one call at a time (a lock). An
  interruption in the calling thread stops the run: chunks not yet started are
  cancelled, running ones end at their next block; the first error raised in a chunk
  is re-raised unchanged;
* a Dask cluster (:func:`cluster_client`): ``workers`` local worker processes
  (``dask.distributed.LocalCluster`` on 127.0.0.1, one thread each) or an existing
  scheduler at ``scheduler`` (``tcp://host:8786``). A worker receives plain data only
  (:class:`adapt.engine.plan.Plan`) and runs :func:`run_chunk`, which rebuilds the scene
  and processors with :func:`adapt.scenefile.parse_scene` and
  :func:`adapt.processors.parse_spec` and returns numpy arrays.
"""
from __future__ import annotations

import logging
import os
import re
import signal
import threading
import warnings
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait
from contextlib import contextmanager
from typing import Callable, Sequence

import numpy as np

from adapt.engine.chunks import part_arrays
from adapt.engine.evaluate import evaluate_batch
from adapt.errors import InputError
from adapt.processors import Processor
from adapt.scene.model import Scene
from adapt.streams.snapshots import TrialBatch

__all__ = ["usable_cores", "check_threads", "run_on_threads", "run_threaded", "run_chunk",
           "check_cluster_options", "cluster_client", "draw_option", "reraise_warnings",
           "MAX_WORKERS", "MAX_THREADS", "INSTALL_HINT"]

#: most local worker processes
MAX_WORKERS = 256
#: most threads in this process
MAX_THREADS = 256
INSTALL_HINT = "pip install 'adapt[cluster]'  (installs dask[distributed])"



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
    calling thread (KeyboardInterrupt, SIGTERM turned into one by the command line, an error in ``done``): work
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
            # a heartbeat caught between the client's and the cluster's closing logs a
            # traceback through "distributed" although nothing failed: closing is quiet
            quiet = logging.getLogger("distributed")
            level = quiet.level
            quiet.setLevel(logging.CRITICAL)
            try:
                client.close()
                if cluster is not None:
                    cluster.close()
                    cluster = None
            finally:
                quiet.setLevel(level)
    finally:
        if cluster is not None:
            cluster.close()


def run_threaded(todo, threads: int, scene: Scene, processors: Sequence[Processor], checkpoints, *,
                  snapshots: int, seed: int, tail: int, block: int, draw: str, progress,
                  keep_arrays: bool, finished) -> None:
    """The chunks ``todo`` on a pool of threads (see :func:`run_on_threads`), all sharing
    ``processors`` (immutable; each chunk's run state is its own);
    ``finished(key, evaluation, arrays)`` in the calling thread."""
    templates = list(processors)
    lock = threading.Lock()

    def work(key, check):
        first, count = key

        def tick(done: int) -> None:
            check()                                   # a stopping run ends here
            if progress is not None:
                with lock:
                    progress(done)

        ev = evaluate_batch(TrialBatch(scene, trials=count, seed=seed, first_trial=first),
                            templates, checkpoints, snapshots, tail=tail, block=block, progress=tick,
                            **draw_option(draw))
        return ev, (part_arrays(ev) if keep_arrays else None)

    run_on_threads(todo, threads, work, lambda key, result: finished(key, *result))


# --------------------------------------------------------------------------- workers
def run_chunk(plan: dict, first: int, count: int) -> dict[str, np.ndarray]:
    """Worker entry point: rebuild the scene and processors from ``plan`` (plain data,
    :meth:`Plan.as_dict`) and score trials ``first .. first + count - 1``. Returns
    :func:`part_arrays` plus ``"warnings"`` (the library warnings raised, as text)."""
    from adapt.processors import parse_spec
    from adapt.scenefile import parse_scene
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
                            block=int(plan["block"]), **draw_option(plan.get("draw", "samples")))
    out = part_arrays(ev)
    texts = list(dict.fromkeys(f"{w.category.__name__}:{w.message}" for w in caught))
    out["warnings"] = np.array(texts, dtype=str) if texts else np.zeros(0, dtype="<U1")
    return out


def draw_option(draw: str) -> dict:
    # only pass the option when it differs from the default (older evaluate_batch)
    return {} if draw == "samples" else {"draw": draw}


def reraise_warnings(arrays: dict) -> None:
    import builtins
    for text in np.asarray(arrays.get("warnings", ())).tolist():
        name, _, message = str(text).partition(":")
        category = getattr(builtins, name, None)
        if not (isinstance(category, type) and issubclass(category, Warning)):
            category = UserWarning
        warnings.warn(message, category, stacklevel=3)
