"""The chunk store of a resumable run: finished chunks on disk, each tied to its plan.

A store is a folder (``partial/`` of a run folder) holding

* ``plan.json``: ``{"plan": Plan.as_dict(), "digest": Plan.digest()}``;
* ``chunk-FFFFFFFFF-CCCCCC.npz``: the arrays of the chunk of trials ``F .. F + C - 1``
  (:func:`part_arrays`; ``np.savez``, never pickled);
* ``chunk-FFFFFFFFF-CCCCCC.json``: its record: the plan digest, first trial, trial
  count, the sha256 of the ``.npz`` file and each array's dtype and shape.

Every file is written atomically (:mod:`adapt.io`), the ``.npz`` before its record, so a
chunk counts as finished only once its record exists (a chunk file without a record,
left by a kill between the two writes, is simply computed again). On resume every
stored chunk is checked before use: its record must name this plan's digest and the
chunk's own trials, the file must hash to the recorded sha256, and the arrays must be
exactly the expected names, dtypes and shapes (:func:`expected_arrays`). Anything else
(changed values, one chunk copied over another, NaN written in, float16, a chunk of 3
or 20 trials under another chunk's name, an edited plan) is refused with an
:class:`~adapt.errors.InputError` naming the file (exit code 2): the store is not
silently trusted, and not silently recomputed either.
"""
from __future__ import annotations

import hashlib
import io as _io
import json
import re
import zipfile
from pathlib import Path
from typing import Sequence

import numpy as np

from adapt import io
from adapt.engine.evaluate import Evaluation, ProcessorScores
from adapt.engine.plan import Plan
from adapt.errors import InputError
from adapt.processors import Processor
from adapt.scene.model import Scene

__all__ = ["ChunkStore", "part_arrays", "part_evaluation", "expected_arrays", "kept_chunks",
           "has_finished_chunks", "PLAN_FILE"]

PLAN_FILE = "plan.json"
_FIELDS = ("sinr", "normalised", "loss_db", "white_noise_gain", "null_depth_db",
           "measured_sinr", "final_weights")
_CHUNK_NAME = re.compile(r"^chunk-(\d{9})-(\d{6})\.npz$")
_TRIAL_FIELDS = {"sinr": "c", "normalised": "c", "loss_db": "c", "white_noise_gain": "c",
                 "null_depth_db": "cj", "measured_sinr": "c", "final_weights": "n"}


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


def expected_arrays(processors: int, checkpoints: int, elements: int,
                    interferers: int, trials: int) -> dict[str, tuple[str, tuple]]:
    """The names, dtypes and shapes of :func:`part_arrays` for a chunk of ``trials``
    trials: ``{name: (dtype, shape)}``.

    Parameters
    ----------
    processors, checkpoints, elements, interferers, trials : int
        Number of processors, checkpoints, array elements, interferers and trials.

    Returns
    -------
    dict
        ``name -> (numpy dtype string, shape tuple)``.
    """
    t, c, n, j = int(trials), int(checkpoints), int(elements), int(interferers)
    dims = {"c": (t, c), "cj": (t, c, j), "n": (t, n)}
    out = {"optimum_sinr": ("float64", (t, c)), "positions": ("float64", (t, n, 3)),
           "element_gains": ("complex128", (t, n))}
    for i in range(int(processors)):
        for name, kind in _TRIAL_FIELDS.items():
            out[f"p{i}.{name}"] = ("complex128" if name == "final_weights" else "float64",
                                   dims[kind])
        out[f"p{i}.seconds"] = ("float64", ())
    return out


def part_evaluation(arrays: dict, scene: Scene, processors: Sequence[Processor],
                    checkpoints, snapshots: int, seed: int) -> Evaluation:
    """Rebuild an :class:`Evaluation` of one chunk from :func:`part_arrays` output."""
    checkpoints = np.asarray(checkpoints, dtype=np.int64)
    procs = []
    for i, p in enumerate(processors):
        procs.append(ProcessorScores(label=p.label, method=p.method, params=dict(p.params),
                                     spec=p.spec(), checkpoints=checkpoints,
                                     seconds=float(arrays[f"p{i}.seconds"]),
                                     **{n: np.asarray(arrays[f"p{i}.{n}"]) for n in _FIELDS}))
    opt = np.asarray(arrays["optimum_sinr"])
    return Evaluation(scene=scene, trials=int(opt.shape[0]), seed=int(seed),
                      snapshots=int(snapshots), checkpoints=checkpoints, optimum_sinr=opt,
                      processors=procs, interferers=tuple(s.name for s in scene.interferers),
                      positions=np.asarray(arrays["positions"]),
                      element_gains=np.asarray(arrays["element_gains"]))


# --------------------------------------------------------------------------- store
def _refuse(message: str, path: Path) -> InputError:
    return InputError(f"{message}; the stored chunks cannot be trusted, so this run cannot "
                      "be finished: start a new run", file=str(path))


class ChunkStore:
    """A folder of finished chunks tied to one plan (see the module docstring)."""

    def __init__(self, folder):
        self.folder = Path(folder)
        self.plan: Plan | None = None
        self.digest: str | None = None

    def adopt(self, plan: Plan) -> Plan:
        """The plan to run: a stored plan's chunking wins (so finished chunks fit);
        InputError naming ``plan.json`` if it is unreadable, was edited (its digest does
        not match) or computes different trials."""
        path = self.folder / PLAN_FILE
        self.folder.mkdir(parents=True, exist_ok=True)
        if path.is_file():
            stored = self._read_plan(path)
            if stored.streams != plan.streams:
                raise InputError(f"the finished chunks here were made by an adapt version "
                                 f"whose random streams are {stored.streams!r}; this one "
                                 f"makes {plan.streams!r}, so the run cannot be finished "
                                 f"here: start a new run", file=str(self.folder))
            if not stored.same_work(plan):
                raise InputError("the finished chunks here belong to a different run (scene, "
                                 "processors, checkpoints, trials or seed differ)",
                                 file=str(path))
            plan = stored
        else:
            io.write_json(path, {"plan": plan.as_dict(), "digest": plan.digest()})
        self.plan, self.digest = plan, plan.digest()
        return plan

    @staticmethod
    def _read_plan(path: Path) -> Plan:
        """The stored plan, its digest checked; a plan of an older adapt (written
        without a digest) is read as it is: its chunks have no records, so they are
        computed again, and its streams are checked by :meth:`adopt`."""
        try:
            record = json.loads(path.read_text(encoding="utf-8"))
            if not isinstance(record, dict):
                raise ValueError("not a mapping")
            legacy = "plan" not in record and "scene" in record
            if not legacy and not isinstance(record.get("plan"), dict):
                raise ValueError("expected {'plan': ..., 'digest': ...}")
            stored = Plan.from_dict(record if legacy else record["plan"])
        except (ValueError, KeyError, TypeError, UnicodeDecodeError) as exc:
            raise _refuse(f"the stored plan is unreadable ({exc})", path) from None
        if not legacy and record.get("digest") != stored.digest():
            raise _refuse("the stored plan was changed after the run started (its digest "
                          "does not match)", path)
        return stored

    def path(self, first: int, count: int) -> Path:
        return self.folder / f"chunk-{first:09d}-{count:06d}.npz"

    def record_path(self, first: int, count: int) -> Path:
        return self.path(first, count).with_suffix(".json")

    def finished(self) -> list[tuple[int, int]]:
        """(first, count) of every chunk file with its record, sorted."""
        if not self.folder.is_dir():
            return []
        out = []
        for p in self.folder.iterdir():
            m = _CHUNK_NAME.match(p.name)
            if m and p.with_suffix(".json").is_file():
                out.append((int(m.group(1)), int(m.group(2))))
        return sorted(out)

    def save(self, first: int, count: int, arrays: dict) -> Path:
        """Store a finished chunk (the ``.npz``, then its record); the store must have
        adopted a plan."""
        if self.digest is None:
            raise RuntimeError("adopt a plan before saving chunks")
        for k, v in arrays.items():
            if np.asarray(v).dtype == object:
                raise ValueError(f"refusing to store an object array ({k})")
        buf = _io.BytesIO()
        np.savez(buf, **{k: np.asarray(v) for k, v in arrays.items()})
        data = buf.getvalue()
        path = io.atomic_write_bytes(self.path(first, count), data)
        io.write_json(self.record_path(first, count), {
            "plan": self.digest, "first": int(first), "count": int(count),
            "sha256": hashlib.sha256(data).hexdigest(),
            "arrays": {k: [str(np.asarray(v).dtype), list(np.shape(v))]
                       for k, v in arrays.items()}})
        return path

    def load(self, first: int, count: int, expected: dict | None = None) -> dict | None:
        """The stored arrays of chunk (first, count), checked (see the module
        docstring); None when the chunk or its record is missing (compute it again);
        InputError naming the file when anything does not match. ``expected``:
        :func:`expected_arrays` for this chunk (names, dtypes, shapes)."""
        path, rec_path = self.path(first, count), self.record_path(first, count)
        if not (path.is_file() and rec_path.is_file()):
            return None
        try:
            record = json.loads(rec_path.read_text(encoding="utf-8"))
            if not isinstance(record, dict):
                raise ValueError
        except (ValueError, UnicodeDecodeError):
            raise _refuse("the chunk record is unreadable", rec_path) from None
        if record.get("plan") != self.digest:
            raise _refuse("the chunk was made under another plan (its plan digest does not "
                          "match plan.json)", rec_path)
        if record.get("first") != first or record.get("count") != count:
            raise _refuse(f"the chunk record is for trials {record.get('first')!r} + "
                          f"{record.get('count')!r}, not the chunk it is named after",
                          rec_path)
        data = path.read_bytes()
        if hashlib.sha256(data).hexdigest() != record.get("sha256"):
            raise _refuse("the chunk file was changed after it was written (its sha256 does "
                          "not match its record)", path)
        try:
            with np.load(_io.BytesIO(data), allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
        except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as exc:
            raise _refuse(f"the chunk file is unreadable ({exc})", path) from None
        if expected is not None:
            _check_arrays(arrays, expected, path)
        return arrays


def _check_arrays(arrays: dict, expected: dict, path: Path) -> None:
    missing = sorted(set(expected) - set(arrays))
    extra = sorted(set(arrays) - set(expected))
    if missing or extra:
        raise _refuse("the chunk holds other arrays than this plan makes ("
                      + ", ".join(f"missing {k}" for k in missing[:3])
                      + (", " if missing and extra else "")
                      + ", ".join(f"unexpected {k}" for k in extra[:3]) + ")", path)
    for name, (dtype, shape) in expected.items():
        a = arrays[name]
        if str(a.dtype) != dtype or tuple(a.shape) != tuple(shape):
            raise _refuse(f"array {name} is {a.dtype} {tuple(a.shape)}; this plan makes "
                          f"{dtype} {tuple(shape)} for this chunk", path)


def has_finished_chunks(folder) -> bool:
    """True if the store at ``folder`` holds at least one finished chunk."""
    return bool(ChunkStore(folder).finished())


def kept_chunks(folder) -> tuple[int, int | None]:
    """(finished chunks, planned chunks or None) of a chunk store folder."""
    store = ChunkStore(folder)
    done = len(store.finished())
    try:
        record = json.loads((store.folder / PLAN_FILE).read_text(encoding="utf-8"))
        plan = Plan.from_dict(record.get("plan", record))
        return done, len(plan.chunks())
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return done, None
