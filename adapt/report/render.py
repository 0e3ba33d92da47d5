"""Render a run's figures on two cores when the process can fork safely.

Drawing a figure with matplotlib is single-threaded Python (about a quarter of a second
per figure at the report's size), so the figures of a run are split between this process
and one forked child: the child inherits everything already computed, draws its share,
sends the PNG bytes back through a pipe and ends with ``os._exit`` (it never runs this
process's clean-up). The split is taken only when it is safe and can help: the
platform forks (POSIX), this process runs a single thread (forking a process with other
threads alive can copy a held lock), at least two cores are usable and there are at least
two figures. Anything unusual in the child (an exception, a signal, a short message)
makes this process draw the child's share itself, so the bytes are the same either way:
each figure is drawn by the same function from the same data.
"""
from __future__ import annotations

import os
import struct
import sys
import threading
from typing import Callable

__all__ = ["render_all", "can_fork_safely"]

_HEADER = struct.Struct("<I")        # length prefix of each framed field


def can_fork_safely() -> bool:
    """True when figures may be drawn in a forked child: POSIX ``fork`` exists, only
    this thread is alive and at least two cores are usable."""
    if not hasattr(os, "fork") or threading.active_count() != 1:
        return False
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    return cores >= 2


def _frame(name: str, data: bytes) -> bytes:
    raw = name.encode()
    return _HEADER.pack(len(raw)) + raw + _HEADER.pack(len(data)) + data


def _unframe(blob: bytes, expected: set[str]) -> dict[str, bytes] | None:
    out: dict[str, bytes] = {}
    i = 0
    try:
        while i < len(blob):
            (n,) = _HEADER.unpack_from(blob, i)
            name = blob[i + 4:i + 4 + n].decode()
            i += 4 + n
            (m,) = _HEADER.unpack_from(blob, i)
            data = blob[i + 4:i + 4 + m]
            if len(data) != m:
                return None
            i += 4 + m
            out[name] = data
    except (struct.error, UnicodeDecodeError):
        return None
    return out if set(out) == expected else None


def _child(jobs: dict[str, Callable[[], bytes]], fd: int) -> None:
    code = 1
    try:
        blob = b"".join(_frame(name, job()) for name, job in jobs.items())
        view = memoryview(blob)
        while view:
            view = view[os.write(fd, view):]
        code = 0
    except BaseException:            # the parent draws this share itself
        code = 1
    finally:
        os._exit(code)


def render_all(jobs: dict[str, Callable[[], bytes]],
               weights: dict[str, float] | None = None) -> dict[str, bytes]:
    """Run every ``job()`` (each returns a figure's PNG bytes) and return ``{name:
    bytes}`` in the order of ``jobs``. When :func:`can_fork_safely`, the jobs are split
    in two shares of about equal ``weights`` (relative drawing cost; default 1 each),
    one drawn by a forked child; otherwise they run here one after the other. An
    exception from a job in this process propagates; a failure in the child makes this
    process run the child's share."""
    names = list(jobs)
    if len(names) < 2 or not can_fork_safely():
        return {name: jobs[name]() for name in names}
    cost = {name: float((weights or {}).get(name, 1.0)) for name in names}
    mine: list[str] = []
    theirs: list[str] = []
    for name in sorted(names, key=lambda k: -cost[k]):        # greedy balance
        (mine if sum(cost[k] for k in mine) <= sum(cost[k] for k in theirs)
         else theirs).append(name)
    if not theirs:
        return {name: jobs[name]() for name in names}
    sys.stdout.flush()
    sys.stderr.flush()
    read_fd, write_fd = os.pipe()
    pid = os.fork()
    if pid == 0:                                            # the child
        os.close(read_fd)
        _child({name: jobs[name] for name in theirs}, write_fd)
    os.close(write_fd)
    done: dict[str, bytes] = {}
    try:
        for name in mine:
            done[name] = jobs[name]()
    finally:
        chunks = []
        with os.fdopen(read_fd, "rb") as pipe:
            while True:
                piece = pipe.read(1 << 20)
                if not piece:
                    break
                chunks.append(piece)
        _, status = os.waitpid(pid, 0)
    got = _unframe(b"".join(chunks), set(theirs)) if status == 0 else None
    if got is None:
        got = {name: jobs[name]() for name in theirs}
    done.update(got)
    return {name: done[name] for name in names}
