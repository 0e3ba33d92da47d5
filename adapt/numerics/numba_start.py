"""How numba is set up in a process: :func:`start_without_blas`, asked for by the
command line before anything is imported, acted on by the first kernel load
(:func:`set_up`, called from :mod:`adapt.numerics.kernels`). Imports nothing heavy, so
``adapt --help`` stays quick."""
from __future__ import annotations

import sys

__all__ = ["start_without_blas", "set_up"]

_WITHOUT_BLAS = False
_CYTHON_BLAS = "scipy.linalg.cython_blas"


def start_without_blas() -> None:
    """Let the first kernel load set numba up without scipy's BLAS wrappers, for a
    process that runs no numba code but adapt's and imports no ``scipy.linalg`` on
    another thread while its kernels first load (the commands that run trials call
    this; ``size`` preloads ``scipy.special`` alongside its trials, which does not
    import ``scipy.linalg``).

    On its first compile or cache load numba sets up its CPU target, and with it the
    module of its numpy functions, which imports ``scipy.linalg`` only to learn whether
    ``np.dot`` and ``np.linalg`` may be compiled through scipy's BLAS (0.23 s of the
    0.42 s numba costs ``adapt compare`` of the example: scipy.linalg pulls in numpy's
    f2py and testing modules). adapt's kernels use neither, so that first set-up runs
    with ``scipy.linalg.cython_blas`` marked unimportable (a ``None`` entry in
    ``sys.modules``), which numba takes as "no BLAS" (``np.dot`` then compiles to a
    plain loop; ``np.linalg`` is refused); the mark is removed at once, so scipy
    imports normally afterwards. Not the library default: other numba code in the same
    process would lose those functions."""
    global _WITHOUT_BLAS
    _WITHOUT_BLAS = True


def set_up() -> None:
    """Called by the first kernel load, numba imported: when :func:`start_without_blas`
    was asked for, set numba's CPU target up with scipy's BLAS wrappers unimportable;
    nothing when it was not, when ``scipy.linalg`` is imported or being imported (the
    check is then free, and a half-done import must not meet the mark) or when numba's
    numpy functions are already loaded."""
    if not _WITHOUT_BLAS or "scipy.linalg" in sys.modules or "numba.np.arraymath" in sys.modules:
        return                     # (scipy.linalg listed: imported, or being imported)
    sys.modules[_CYTHON_BLAS] = None
    try:
        from numba.core.registry import cpu_target
        cpu_target.target_context.refresh()
    finally:
        if _CYTHON_BLAS in sys.modules and sys.modules[_CYTHON_BLAS] is None:
            del sys.modules[_CYTHON_BLAS]
