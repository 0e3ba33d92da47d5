"""Shared machinery of the sample-recursive processors (LMS, NLMS, Frost, GSC, RLS).

Everything here works on all trials at once; the only Python loop is over the snapshots
of a block. Per-snapshot arrays are laid out (snapshots, trials, elements) so that one
snapshot of every trial is a contiguous (T, N) slice.

The one LMS-type recursion (Widrow & Hoff 1960; Widrow & Stearns, *Adaptive Signal
Processing*, 1985, in complex form as in Haykin, *Adaptive Filter Theory*)::

    y(k) = w^H(k) u(k)                 output with the current weight
    e(k) = d(k) - y(k)                 error against the desired sample (0 if none)
    w(k+1) = w(k) + g(k) v(k) e^*(k)   v(k) = u(k) unless a different direction is given

serves LMS (u = x, d = reference, g = mu), NLMS (g = mu / (eps + x^H x)), Frost's
constrained LMS (d = 0, v = P x, the regressor projected off the constraints) and the
generalised sidelobe canceller (u = B^H x, d = w_q^H x, NLMS gain). The state kept is
``conj(w)`` so that both inner products are plain multiply-and-sum.
"""
from __future__ import annotations

import numpy as np

from adapt.errors import SpecError
from adapt.numerics.kernels import lms_pass, per_snapshot  # noqa: F401 - re-exported
from adapt.processors.base import Context, Processor

__all__ = ["local_marks", "per_snapshot", "lms_pass", "moments_of", "eigen_extent",
           "extent_over_moments", "mean_square_sum", "mean_square_bound",
           "spectra_over_moments", "step_from_bound", "AutoStep", "look_blocking_matrix",
           "starting_weights", "Projector", "constrained_pass"]


def local_marks(block, checkpoints) -> np.ndarray:
    """0-based in-block indices of the snapshots after which the weights are recorded:
    checkpoint c (c snapshots seen, ``start < c <= stop``) is recorded right after
    in-block snapshot ``c - start - 1``."""
    marks = np.asarray(checkpoints, dtype=np.int64) - int(block.start) - 1
    if marks.size and (marks[0] < 0 or marks[-1] >= block.stop - block.start
                       or np.any(np.diff(marks) <= 0)):
        raise ValueError("checkpoints must be sorted, unique and inside the block")
    return marks


def moments_of(context: Context) -> np.ndarray:
    """Snapshot indices at which to check covariances (context.moments or [0])."""
    k = getattr(context, "moments", None)
    return np.array([0]) if k is None else np.atleast_1d(np.asarray(k, dtype=np.int64))


def eigen_extent(covariance: np.ndarray, basis: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Largest eigenvalue and trace per trial, maximised over moments.

    covariance: (T, M, N, N); basis: optional (N, L) orthonormal columns, in which case
    the extent of ``basis^H R basis`` (R restricted to that subspace; the same nonzero
    eigenvalues as ``P R P`` with P the projector onto it). Returns two (T,) arrays.
    """
    r = np.asarray(covariance)
    trials = r.shape[0]
    shared = trials > 1 and r.strides[0] == 0        # one covariance broadcast over trials
    if shared:
        r = r[:1]
    if basis is not None:
        r = np.conj(basis).T @ r @ basis
    lam = np.linalg.eigvalsh(r)[..., -1].max(axis=1)                      # (T,)
    tr = np.real(np.trace(r, axis1=-2, axis2=-1)).max(axis=1)
    if shared:
        lam, tr = np.repeat(lam, trials), np.repeat(tr, trials)
    return lam, tr


def extent_over_moments(covariance_fn, moments: np.ndarray, trials: int, elements: int,
                        basis: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """:func:`eigen_extent` of ``covariance_fn(k)`` over all ``moments``, evaluated in
    chunks of moments so memory stays near 64 MB whatever the trial count."""
    chunk = max(1, (1 << 22) // max(1, trials * elements * elements))
    lam = np.full(trials, -np.inf)
    tr = np.full(trials, -np.inf)
    for i in range(0, len(moments), chunk):
        l_, t_ = eigen_extent(covariance_fn(moments[i:i + chunk]), basis)
        np.maximum(lam, l_, out=lam)
        np.maximum(tr, t_, out=tr)
    return lam, tr


def mean_square_sum(step, eigenvalues: np.ndarray) -> np.ndarray:
    """``sum_i mu lambda_i / (2 - mu lambda_i)`` over the last axis of ``eigenvalues``
    (``inf`` where ``mu lambda_i >= 2``): the LMS mean-square stability sum.

    Parameters
    ----------
    step : float or array broadcasting against ``eigenvalues[..., 0]``
        The step ``mu`` (``w += mu x e^*`` convention).
    eigenvalues : (..., N) array
        Eigenvalues of the covariance the recursion is trained on.

    Returns
    -------
    (...) array of sums; the mean-square error stays bounded iff the sum is below 1.

    References
    ----------
    Widrow, McCool, Larimore & Johnson, "Stationary and nonstationary learning
    characteristics of the LMS adaptive filter", Proc. IEEE 64 (1976); Haykin, *Adaptive
    Filter Theory*, LMS mean-square analysis (independence theory, circular Gaussian data;
    from memory).
    """
    lam = np.maximum(np.asarray(eigenvalues, float), 0.0)
    x = np.asarray(step, float)[..., None] * lam
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(x < 2.0, x / np.where(x < 2.0, 2.0 - x, 1.0), np.inf)
    return terms.sum(axis=-1)


def mean_square_bound(eigenvalues: np.ndarray) -> np.ndarray:
    """The step ``mu*`` at which :func:`mean_square_sum` reaches 1, per leading index.

    The sum rises monotonically from 0 at ``mu = 0`` to infinity at ``2/lambda_max``, so
    ``mu*`` is found by bisection inside ``(0, 2/lambda_max)``; it lies between
    ``2/(tr R + lambda_max)`` and ``2/lambda_max`` (Widrow et al. 1976; Haykin).

    Parameters
    ----------
    eigenvalues : (..., N) array of nonnegative eigenvalues.

    Returns
    -------
    (...) array of bounds (``inf`` for an all-zero spectrum).
    """
    lam = np.maximum(np.asarray(eigenvalues, float), 0.0)
    top = lam.max(axis=-1)
    with np.errstate(divide="ignore"):
        hi = np.where(top > 0, 2.0 / np.where(top > 0, top, 1.0), np.inf)
    lo = np.zeros_like(hi)
    finite = np.isfinite(hi)
    hi_f = np.where(finite, hi, 1.0)
    for _ in range(80):                       # 2^-80: far below double resolution
        mid = 0.5 * (lo + hi_f)
        above = mean_square_sum(mid, lam) >= 1.0
        hi_f = np.where(above, mid, hi_f)
        lo = np.where(above, lo, mid)
    return np.where(finite, lo, np.inf)


def spectra_over_moments(covariance_fn, moments: np.ndarray, trials: int, elements: int,
                         basis: np.ndarray | None = None, step: float | None = None
                         ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per trial, over all ``moments``: the largest eigenvalue, the largest trace, the
    smallest mean-square bound (:func:`mean_square_bound`) and the largest
    :func:`mean_square_sum` at ``step`` (both only when a step is given: inf and NaN
    otherwise) of
    ``covariance_fn(k)``, projected on ``basis`` if given. Evaluated in chunks of moments
    (memory near 64 MB whatever the trial count); a covariance broadcast over trials
    (stride 0) is decomposed once."""
    chunk = max(1, (1 << 22) // max(1, trials * elements * elements))
    lam = np.full(trials, -np.inf)
    tr = np.full(trials, -np.inf)
    bound = np.full(trials, np.inf)
    total = np.full(trials, np.nan if step is None else -np.inf)
    for i in range(0, len(moments), chunk):
        r = np.asarray(covariance_fn(moments[i:i + chunk]))
        shared = trials > 1 and r.strides[0] == 0
        if shared:
            r = r[:1]
        if basis is not None:
            r = np.conj(basis).T @ r @ basis
        ev = np.linalg.eigvalsh(r)                                         # (T, M, L)
        parts = [ev[..., -1].max(axis=1), np.real(np.trace(r, axis1=-2, axis2=-1)).max(axis=1)]
        if step is not None:
            parts += [mean_square_bound(ev).min(axis=1), mean_square_sum(step, ev).max(axis=1)]
        if shared:
            parts = [np.repeat(p, trials) for p in parts]
        np.maximum(lam, parts[0], out=lam)
        np.maximum(tr, parts[1], out=tr)
        if step is not None:
            np.minimum(bound, parts[2], out=bound)
            np.maximum(total, parts[3], out=total)
    return lam, tr, bound, total


def step_from_bound(given: float | None, lam_max: np.ndarray, trace: np.ndarray,
                    method: str, what: str, auto_fraction: float = 0.1,
                    ms_bound: np.ndarray | None = None, ms_sum: np.ndarray | None = None
                    ) -> np.ndarray:
    """Per-trial LMS step: ``given`` if inside the stability bounds of every trial, else
    SpecError; ``None`` (auto) gives ``auto_fraction / trace`` per trial.

    Enforced: the mean-weight bound ``mu < 2/lambda_max`` always and, when ``ms_sum``
    (the mean-square sum at ``given``, per trial) is passed, the mean-square bound
    ``sum_i mu lambda_i / (2 - mu lambda_i) < 1``; ``ms_bound`` (the step where the sum
    reaches 1) is quoted in the message. The automatic step ``0.1/tr R`` keeps the sum
    below ``0.1 / 1.9 = 0.053`` (each ``mu lambda_i <= 0.1``), inside both bounds.

    Sources: Widrow & Stearns (1985), ch. 6: the mean weight converges iff
    ``0 < mu < 2/lambda_max`` in this convention (their ``w += 2 mu e x`` has the bound
    ``1/lambda_max``). Widrow, McCool, Larimore & Johnson, Proc. IEEE 64 (1976), and
    Haykin, *Adaptive Filter Theory* (LMS mean-square analysis; from memory): for
    independent circular Gaussian data the mean-square error stays bounded iff
    ``sum_i mu lambda_i / (2 - mu lambda_i) < 1``, far tighter than ``2/lambda_max``
    when several strong eigenvalues share the spread.
    """
    lam_max = np.asarray(lam_max, float)
    trace = np.asarray(trace, float)
    if given is None:
        return auto_fraction / trace
    bound = 2.0 / lam_max
    worst = int(np.argmin(bound))
    if given >= bound[worst]:
        raise SpecError(
            f"{method}: step {given:g} is at or above the stability bound "
            f"2/lambda_max = {bound[worst]:g} of {what} (lambda_max = {lam_max[worst]:g}"
            f" in the worst trial); the mean weights would diverge. Choose a step below "
            f"{bound[worst]:g}; below 2/trace = {2.0 / trace.max():g} also keeps the "
            f"mean-square error bounded, or give step=auto",
            path="step", value=given, allowed=f"a number in (0, {bound[worst]:g})")
    if ms_sum is not None:
        ms_sum = np.asarray(ms_sum, float)
        bad = int(np.argmax(ms_sum))
        if ms_sum[bad] >= 1.0:
            limit = float(np.min(ms_bound)) if ms_bound is not None else float("nan")
            raise SpecError(
                f"{method}: step {given:g} is at or above the mean-square stability bound "
                f"{limit:.4g} of {what}: sum_i mu lambda_i/(2 - mu lambda_i) = "
                f"{ms_sum[bad]:.3g} at this step (it must stay below 1; Widrow et al. "
                f"1976), so the mean-square error and the weights would grow without "
                f"bound although the mean weights converge (2/lambda_max = "
                f"{bound[worst]:g}). Choose a step below {limit:.4g} (half of it, "
                f"{0.5 * limit:.3g}, keeps the misadjustment moderate) or give step=auto "
                f"(0.1/trace = {0.1 / trace.max():.3g})",
                path="step", value=given, allowed=f"a number in (0, {limit:.4g})")
    return np.full(lam_max.shape, float(given))


class AutoStep(Processor):
    """Mixin: accept ``step=auto`` as a synonym of ``step=none`` (the automatic step)."""

    @classmethod
    def validate(cls, given: dict, where: str = "") -> dict:
        given = dict(given)
        value = given.get("step")
        if isinstance(value, str) and value.strip().lower() == "auto":
            given["step"] = None
        return super().validate(given, where)



def bounded_steps(given: float | None, covariance_fn, context: Context, method: str,
                  noun: str, what: str, basis: np.ndarray | None = None) -> np.ndarray:
    """Per-trial steps for an LMS-type recursion trained on data of true covariance
    ``covariance_fn`` (projected on ``basis`` if given): :func:`step_from_bound` over the
    context's moments. Without a true covariance (a reference candidate's context) only
    a numeric step is accepted; ``noun`` names that covariance in the message, ``what``
    in the bound's message."""
    if covariance_fn is None:
        if given is None:
            raise SpecError(f"step=auto needs the true {noun} (known in simulation only); "
                            "give a step as a number", path="step", value="auto",
                            allowed="a number > 0")
        return np.full(context.trials, float(given))
    lam, tr, limit, total = spectra_over_moments(covariance_fn, moments_of(context),
                                                 context.trials, context.elements, basis,
                                                 given)
    return step_from_bound(given, lam, tr, method, what, ms_bound=limit,
                           ms_sum=None if given is None else total)

def look_blocking_matrix(look: np.ndarray) -> np.ndarray:
    """(N, N-1) blocking matrix B with orthonormal columns and ``B^H a = 0``.

    Built from the complete QR factorisation of the look vector a (N x 1): the first
    column of Q spans a, the other N-1 columns are an orthonormal basis of its
    orthogonal complement (Griffiths & Jim 1982 require only ``B^H a = 0`` and full
    rank; orthonormal columns make the NLMS step scale-free).
    """
    a = np.asarray(look, dtype=complex).reshape(-1, 1)
    if a.shape[0] < 2 or not np.any(a):
        raise ValueError("a blocking matrix needs a nonzero look vector of >= 2 elements")
    q, _ = np.linalg.qr(a, mode="complete")
    return q[:, 1:]


def starting_weights(context: Context, initial: str) -> np.ndarray:
    """(T, N) start weight: ``quiescent`` = look vector / N (unit response toward the
    look direction, the conventional beam) or ``zero``."""
    if initial == "zero":
        return np.zeros((context.trials, context.elements), dtype=complex)
    w = np.asarray(context.look, dtype=complex) / context.elements
    return np.broadcast_to(w, (context.trials, context.elements)).copy()


class Projector:
    """Projection off the span of constraint columns C (N, M):
    ``P v = v - C (C^H C)^-1 C^H v`` and the minimum-norm constrained weight
    ``F = C (C^H C)^-1 f`` (Frost 1972). Applying P costs 2NM per vector."""

    def __init__(self, c: np.ndarray, f: np.ndarray):
        c = np.asarray(c, dtype=complex)
        if c.ndim != 2 or c.shape[1] >= c.shape[0]:
            raise ValueError(f"constraints must be (N, M) with M < N, got {c.shape}")
        self.c = c
        self.ch = np.ascontiguousarray(np.conj(c))
        gram = self.ch.T @ c
        self.q = np.linalg.solve(gram.T, c.T).T            # C (C^H C)^-1
        self.f = np.asarray(f, dtype=complex)
        self.quiescent = self.q @ self.f                    # F

    def project(self, v: np.ndarray) -> np.ndarray:
        """P v for (..., N) vectors."""
        if self.c.shape[1] == 1:
            coef = np.einsum("n,...n->...", self.ch[:, 0], v)
            return v - coef[..., None] * self.q[:, 0]
        return v - np.einsum("nm,...m->...n", self.q, np.einsum("nm,...n->...m", self.ch, v))

    def basis(self) -> np.ndarray:
        """(N, N-M) orthonormal basis of the range of P (from the SVD of C)."""
        u, _, _ = np.linalg.svd(self.c)
        return u[:, self.c.shape[1]:]


def constrained_pass(wc: np.ndarray, x: np.ndarray, marks: np.ndarray, gain,
                     projector: Projector, px: np.ndarray | None = None) -> np.ndarray:
    """Minimum-output-power recursion under ``C^H w = f`` (Frost 1972) over one block:
    ``w <- w - gain (P x) y^*``, ``y = w^H x``; x (B, T, N). The weights returned are
    re-projected, ``P w + F``, so the constraints hold to rounding at every mark; the
    state itself is left as the recursion made it (results do not depend on block size).
    ``px`` may pass a precomputed ``P x``."""
    if px is None:
        px = projector.project(x)
    w = lms_pass(wc, x, marks, gain, desired=None, direction_conj=np.conj(px))
    return projector.project(w) + projector.quiescent
