"""The plan of a chunked Monte Carlo run: chunk and block sizes, and :class:`Plan`.

A run's trials are split into chunks (consecutive trial ranges). A :class:`Plan` holds
everything a chunk needs as plain data (the resolved scene mapping, processor spec
strings and the run settings): what Dask workers receive and what a resumable run
folder keeps in ``partial/plan.json`` together with the plan's digest
(:meth:`Plan.digest`), to which every stored chunk is tied (:mod:`adapt.engine.chunks`).

Why the results never depend on the partitioning: trial i draws from its own seed
(``SeedSequence(seed, spawn_key=(i, ...))``, :mod:`adapt.streams.snapshots`), every
computation is vectorised along the trial axis with no cross-trial sums, and the block
boundaries (which do change floating-point rounding of running sums) are fixed by
:func:`block_size` from the element count and stream length alone, never from the chunk.
So any chunk size, thread or worker count or interruption gives bit-identical arrays.

Chunk size (:func:`chunk_size`, documented in README): about ``CHUNK_WORK`` units of
``trials x (snapshots + tail) x N^2 x processors`` (measured at roughly 0.5-2 s of
one core on the example scenes), at most ``MAX_CHUNK`` trials and bounded memory; on a
cluster at most a quarter of an even share per worker so the load balances; on threads
one part per thread as long as each holds at least ``THREAD_WORK`` (smaller runs stay
in one chunk: splitting them costs more than the second core gains), the number of
chunks a multiple of the parts. A drawn covariance run (``draw="covariance"``) costs
per trial what streaming N snapshots per span would, so its stream length counts as at
most ``N x (2 x checkpoints + 1)``.
"""
from __future__ import annotations

import hashlib
import json
import math
from dataclasses import asdict, dataclass
from typing import Sequence

import numpy as np

from adapt import io
from adapt.engine.evaluate import trial_chunks
from adapt.errors import InputError
from adapt.processors import Processor
from adapt.scene.model import Scene

__all__ = ["Plan", "block_size", "chunk_size", "scene_mapping", "shippable_specs",
           "CHUNK_WORK", "MAX_CHUNK", "THREAD_WORK", "BLOCKS_PER_STREAM"]

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
        """The plan of :meth:`as_dict` output; ValueError naming the field when a value
        is missing, of the wrong type or out of range."""
        if not isinstance(d, dict):
            raise ValueError("not a mapping")
        for key in ("scene", "specs", "checkpoints", "snapshots", "tail", "trials", "seed",
                    "chunk", "block"):
            if key not in d:
                raise ValueError(f"'{key}' is missing")
        if not isinstance(d["scene"], dict):
            raise ValueError("'scene' is not a mapping")
        if not isinstance(d["specs"], list) or not all(isinstance(s, str) for s in d["specs"]):
            raise ValueError("'specs' is not a list of processor specs")
        if not isinstance(d["checkpoints"], list) or not d["checkpoints"]:
            raise ValueError("'checkpoints' is not a non-empty list")
        least = {"snapshots": 1, "tail": 0, "trials": 1, "seed": 0, "chunk": 1, "block": 1}
        whole = {}
        for key, low in least.items():
            whole[key] = _whole(d[key], key, low)
        cps = tuple(_whole(c, "checkpoints", 1) for c in d["checkpoints"])
        return cls(scene=d["scene"], specs=tuple(d["specs"]), checkpoints=cps,
                   draw=str(d.get("draw", "samples")),
                   streams=str(d.get("streams", "numpy-generator")), **whole)

    def digest(self) -> str:
        """sha256 of the plan's canonical JSON text: what every stored chunk is tied to."""
        text = json.dumps(io.to_jsonable(self.as_dict()), sort_keys=True, allow_nan=False)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

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
    from adapt.scenefile import scene_to_mapping
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


def _whole(value, key: str, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ValueError(f"'{key}' must be a whole number >= {low}, got {value!r}")
    return int(value)
