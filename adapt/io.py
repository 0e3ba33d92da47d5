"""Safe file output: atomic writes, run folders that never overwrite, manifests.

Every file is written to a temporary name in the same folder, flushed to disk and then
renamed into place (``os.replace``), so an interrupted run never leaves a half-written
file under its final name. Run folders are created with an exclusive ``mkdir``: a new run
never touches an earlier one. Arrays are stored as ``.npy`` without pickling and are read
back with ``allow_pickle=False``.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import io as _io
import json
import os
import re
import sys
from pathlib import Path
from typing import Any, Iterable

import numpy as np

__all__ = ["atomic_write_bytes", "atomic_write_text", "write_json", "write_npy", "read_npy",
           "new_run_folder", "sha256_file", "write_manifest", "check_manifest",
           "library_versions", "slug", "to_jsonable"]

_TMP_PREFIX = ".partial-"
#: name prefix of a file being written (see :func:`atomic_write_bytes`)
TMP_PREFIX = _TMP_PREFIX


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file + fsync + rename).

    On any failure (disk full, permission denied, a parent that is not a folder) the
    temporary file is removed, ``path`` is left as it was, and the OSError names
    ``path`` itself (not the temporary name)."""
    path = Path(path)
    tmp = path.with_name(f"{_TMP_PREFIX}{path.name}.{os.getpid()}")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        try:
            tmp.unlink()
        except OSError:
            pass
        if isinstance(exc, OSError) and exc.errno is not None:
            raise OSError(exc.errno, exc.strerror, str(path)) from exc
        raise
    return path


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"))


def to_jsonable(obj: Any) -> Any:
    """Convert numpy scalars/arrays, paths and tuples to plain JSON types; non-finite
    floats become ``None`` (JSON has no NaN)."""
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, complex):
        return {"re": obj.real, "im": obj.imag}
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path: str | os.PathLike, obj: Any) -> Path:
    return atomic_write_text(path, json.dumps(to_jsonable(obj), indent=2, allow_nan=False) + "\n")


def write_npy(path: str | os.PathLike, array: np.ndarray) -> Path:
    """Atomically write one array as .npy (object arrays are refused: no pickling)."""
    arr = np.asarray(array)
    if arr.dtype == object:
        raise ValueError(f"refusing to store an object array in {path}")
    buf = _io.BytesIO()
    np.save(buf, arr, allow_pickle=False)
    return atomic_write_bytes(path, buf.getvalue())


def read_npy(path: str | os.PathLike) -> np.ndarray:
    """Read a .npy file without ever unpickling."""
    return np.load(path, allow_pickle=False)


def slug(text: str, limit: int = 40) -> str:
    s = re.sub(r"[^A-Za-z0-9._-]+", "-", str(text)).strip("-._")
    return (s or "scene")[:limit]


def new_run_folder(root: str | os.PathLike, name: str, now: _dt.datetime | None = None) -> Path:
    """Create and return a new, empty folder ``root/YYYYmmdd-HHMMSS-name`` (``-2``,
    ``-3``... appended if taken). Never reuses an existing folder."""
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    stamp = (now or _dt.datetime.now()).strftime("%Y%m%d-%H%M%S")
    base = f"{stamp}-{slug(name)}"
    for i in range(1, 10_000):
        candidate = root / (base if i == 1 else f"{base}-{i}")
        try:
            candidate.mkdir()
            return candidate
        except FileExistsError:
            continue
    raise RuntimeError(f"could not create a new run folder under {root}")


def sha256_file(path: str | os.PathLike, chunk: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            b = fh.read(chunk)
            if not b:
                break
            h.update(b)
    return h.hexdigest()


def library_versions() -> dict:
    import scipy

    from adapt import __version__
    return {"adapt": __version__, "numpy": np.__version__, "scipy": scipy.__version__,
            "python": sys.version.split()[0]}


def _listed_files(folder: Path, skip: Iterable[str]) -> list[Path]:
    skip = set(skip)
    return sorted(p for p in folder.rglob("*") if p.is_file() and p.name not in skip
                  and not p.name.startswith(_TMP_PREFIX))


def write_manifest(folder: str | os.PathLike, info: dict, name: str = "manifest.json",
                   exclude: Iterable[str] = ()) -> Path:
    """Write ``manifest.json``: ``info`` plus library versions and the sha256 and size
    of every other file in the folder (paths relative to the folder, '/' separated),
    except those under the top-level names in ``exclude`` (files or folders about to be
    removed, e.g. a run's resume state)."""
    folder = Path(folder)
    excluded = set(exclude)
    files = {p.relative_to(folder).as_posix(): {"sha256": sha256_file(p), "bytes": p.stat().st_size}
             for p in _listed_files(folder, [name])
             if p.relative_to(folder).parts[0] not in excluded}
    manifest = dict(info)
    manifest.setdefault("versions", library_versions())
    manifest["files"] = files
    return write_json(folder / name, manifest)


def check_manifest(folder: str | os.PathLike, name: str = "manifest.json") -> list[str]:
    """Compare a folder with its manifest; return a list of problems (empty: intact)."""
    folder = Path(folder)
    try:
        manifest = json.loads((folder / name).read_text(encoding="utf-8"))
        files = manifest["files"]
        if not isinstance(files, dict):
            raise TypeError
    except FileNotFoundError:
        return [f"{folder / name} is missing"]
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        return [f"{folder / name} is not a readable manifest"]
    problems = []
    for rel, entry in files.items():
        p = folder / rel
        try:
            digest = sha256_file(p)
        except FileNotFoundError:
            problems.append(f"{rel}: listed in the manifest but missing")
            continue
        except OSError as exc:
            problems.append(f"{rel}: cannot be read ({exc.strerror})")
            continue
        if not isinstance(entry, dict) or digest != entry.get("sha256"):
            problems.append(f"{rel}: sha256 does not match the manifest (file changed or corrupt)")
    return problems
