"""Interruptions on the command line: SIGTERM as an interruption, exit codes, messages.

A run stopped by Ctrl-C (SIGINT) or SIGTERM keeps its finished chunks in its run folder
(marked ``INCOMPLETE``, :mod:`adapt.report.runfolder`); the command prints what was kept
and how to finish it, and exits with the shell convention 128 + signal number (130 for
SIGINT, 143 for SIGTERM).
"""
from __future__ import annotations

import signal
import threading
from contextlib import contextmanager

from adapt.engine.chunks import kept_chunks
from adapt.report.runfolder import MARKER, PARTIAL

__all__ = ["Terminated", "exit_code", "stop_on_signals", "interrupted_message"]


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


def interrupted_message(folder, kind: str, exc: BaseException) -> str:
    """What the command prints when stopped: what was kept and how to resume."""
    done, planned = kept_chunks(folder / PARTIAL)
    what = "SIGTERM" if isinstance(exc, Terminated) else "interrupt (SIGINT)"
    of = f" of {planned}" if planned is not None else ""
    return (f"adapt: stopped by {what}: kept {done}{of} finished chunks in {folder} "
            f"(marked {MARKER}, no manifest).\n"
            f"adapt: finish it with: adapt {kind} --resume {folder}")
