"""Render a run's figures on all cores when the process can fork safely.

Drawing a figure with matplotlib is single-threaded Python (a fifth to a quarter of a
second per figure at the report's size), so the figures of a run are split into shares,
one per usable core plus one: this process draws the first and a forked child each of
the others. A child inherits everything already computed, draws its share, sends the PNG
bytes back through a pipe and ends with ``os._exit`` (it never runs this process's
clean-up). The split is taken only when it is safe and can help: the platform forks
(POSIX), this process runs a single thread (forking a process with other threads alive
can copy a held lock), at least two cores are usable and there are at least two
figures. Anything unusual in a child (an exception, a signal, a short message) makes
this process draw that child's share itself, so the bytes are the same either way:
each figure is drawn by the same function from the same data.
"""
from __future__ import annotations

import os
import struct
import sys
import threading
from typing import Callable

__all__ = ["render_all", "can_fork_safely", "usable_cores"]

_HEADER = struct.Struct("<I")        # length prefix of each framed field


def usable_cores() -> int:
    """Cores this process may run on (its affinity set where the platform tells)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def can_fork_safely() -> bool:
    """True when figures may be drawn in forked children: POSIX ``fork`` exists, only
    this thread is alive and at least two cores are usable."""
    if not hasattr(os, "fork") or threading.active_count() != 1:
        return False
    return usable_cores() >= 2


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


def _shares(names: list[str], cost: dict[str, float], count: int) -> list[list[str]]:
    """``names`` split into ``count`` shares of about equal cost (greedy: the costliest
    job first, each to the share with the least so far); empty shares dropped."""
    shares: list[list[str]] = [[] for _ in range(count)]
    for name in sorted(names, key=lambda k: -cost[k]):
        min(shares, key=lambda share: sum(cost[k] for k in share)).append(name)
    return [share for share in shares if share]


def _fork_child(jobs: dict[str, Callable[[], bytes]]) -> tuple[int, int]:
    """A forked child that runs ``jobs`` and sends their bytes: (pid, read end)."""
    read_fd, write_fd = os.pipe()
    pid = os.fork()
    if pid == 0:                                            # the child
        os.close(read_fd)
        _child(jobs, write_fd)
    os.close(write_fd)
    return pid, read_fd


def _collect(pid: int, read_fd: int, expected: set[str]) -> dict[str, bytes] | None:
    """A child's framed bytes (None when it failed or sent something short)."""
    chunks = []
    with os.fdopen(read_fd, "rb") as pipe:
        while True:
            piece = pipe.read(1 << 20)
            if not piece:
                break
            chunks.append(piece)
    _, status = os.waitpid(pid, 0)
    return _unframe(b"".join(chunks), expected) if status == 0 else None


def render_all(jobs: dict[str, Callable[[], bytes]],
               weights: dict[str, float] | None = None) -> dict[str, bytes]:
    """Run every ``job()`` (each returns a figure's PNG bytes) and return ``{name:
    bytes}`` in the order of ``jobs``. When :func:`can_fork_safely`, the jobs are split
    into shares of about equal ``weights`` (relative drawing cost; default 1 each), one
    share per usable core plus one (this process draws the first, a forked child each
    of the others: with 2 cores and three equal figures the three processes finish in
    about 1.5 figure-times, where two shares took 2); otherwise they run here one after
    the other. An exception from a job in this process propagates; a failed child's
    share is drawn by this process."""
    names = list(jobs)
    if len(names) < 2 or not can_fork_safely():
        return {name: jobs[name]() for name in names}
    cost = {name: float((weights or {}).get(name, 1.0)) for name in names}
    mine, *theirs = _shares(names, cost, min(len(names), usable_cores() + 1))
    if not theirs:
        return {name: jobs[name]() for name in names}
    sys.stdout.flush()
    sys.stderr.flush()
    children = [(share, *_fork_child({name: jobs[name] for name in share}))
                for share in theirs]
    done: dict[str, bytes] = {}
    try:
        for name in mine:
            done[name] = jobs[name]()
    finally:
        results = [(share, _collect(pid, fd, set(share))) for share, pid, fd in children]
    for share, got in results:
        done.update(got if got is not None else {name: jobs[name]() for name in share})
    return {name: done[name] for name in names}
