"""Sample-covariance machinery shared by the block (covariance-based) processors.

* :class:`GrowingSums` and :class:`SlidingSums` accumulate ``S = sum x x^H`` over the
  training snapshots, batched over trials: each block is split at the snapshot counts
  where a sum is wanted and every piece costs one batched matrix product
  (T, N, b) @ (T, b, N). No per-snapshot outer product is ever materialised.
* :func:`loading_level` gives the diagonal load (fixed, or estimated from the data);
* :func:`solve_sample` solves ``R x = b`` for sample covariances, taking the minimum-norm
  route on the data subspace when fewer snapshots than elements make ``R`` singular;
* :class:`SampleCovarianceProcessor` drives the above under the interface of
  :mod:`adapt.processors.base`; a subclass only turns covariance estimates into weights.

Source: the sample covariance matrix estimate and its use in adaptive arrays, Reed,
Mallett & Brennan (1974); diagonal loading, Carlson (1988).
Cost per snapshot: O(N^2) complex multiply-adds to accumulate (twice that for a sliding
window, which also removes expiring snapshots); O(N^3) per weight computation.
"""
from __future__ import annotations

import warnings

import numpy as np

from adapt.errors import SpecError
from adapt.numerics import kernels as _kernels
from adapt.numerics.linalg import compiled_solves, solve_hermitian
from adapt.processors.base import Context, Parameter, Processor, State

__all__ = ["outer_sum", "GrowingSums", "SlidingSums", "LaggedSums", "hermitian_part", "loading_level",
           "noise_floor_estimate", "signal_count_mdl", "solve_sample", "SampleCovarianceProcessor",
           "loading_parameters", "check_loading", "smoothed_covariance",
           "smoothing_parameters", "check_smoothing", "shift_invariant_reason"]


def outer_sum(x: np.ndarray) -> np.ndarray:
    """``sum_b x_b x_b^H`` for a stack of snapshots x (T, B, N): shape (T, N, N).

    One batched matrix product (T, N, B) @ (T, B, N); B = 0 gives zeros.
    """
    x = np.asarray(x)
    if x.ndim != 3:
        raise ValueError(f"snapshots must have shape (trials, snapshots, elements), got {x.shape}")
    return np.swapaxes(x, 1, 2) @ np.conj(x)


def hermitian_part(r: np.ndarray) -> np.ndarray:
    """``(R + R^H) / 2`` for a stack (..., N, N)."""
    out = np.conj(np.swapaxes(r, -1, -2))          # one temporary (same values as
    out += r                                        # 0.5 * (r + r^H): the sum is
    out *= 0.5                                      # commutative, the halving exact)
    return out


def _check_stops(start: int, size: int, checkpoints: np.ndarray) -> np.ndarray:
    checkpoints = np.asarray(checkpoints, dtype=np.int64).reshape(-1)
    if checkpoints.size and (np.any(np.diff(checkpoints) <= 0) or checkpoints[0] <= start or checkpoints[-1] > start + size):
        raise ValueError(f"checkpoints must be increasing and within ({start}, {start + size}]")
    return checkpoints


class GrowingSums:
    """Running ``S(k) = sum_{j<k} x_j x_j^H`` over all snapshots seen (growing window).

    ``advance(data, start, checkpoints)`` feeds a block (T, B, N) starting at snapshot
    ``start`` and returns S at each snapshot count in ``checkpoints`` (T, len(checkpoints), N, N).
    """

    def __init__(self, trials: int, elements: int):
        if trials < 1 or elements < 1:
            raise ValueError("trials and elements must be >= 1")
        self.total = np.zeros((trials, elements, elements), dtype=complex)
        self.seen = 0

    def count(self, k: np.ndarray) -> np.ndarray:
        """Snapshots in the window at snapshot counts k."""
        return np.asarray(k, dtype=np.int64)

    def advance(self, data: np.ndarray, start: int, checkpoints) -> np.ndarray:
        if start != self.seen:
            raise ValueError(f"blocks must be contiguous: expected start {self.seen}, got {start}")
        t_, b, n = data.shape
        checkpoints = _check_stops(start, b, checkpoints)
        out = np.empty((t_, len(checkpoints), n, n), dtype=complex)
        lo = 0
        for i, s in enumerate(checkpoints):
            hi = int(s - start)
            if hi > lo:
                self.total = self.total + outer_sum(data[:, lo:hi])
            out[:, i] = self.total
            lo = hi
        if b > lo:
            self.total = self.total + outer_sum(data[:, lo:])
        self.seen = start + b
        return out


class SlidingSums:
    """Exact sums over the last ``length`` snapshots, ``S(k) = sum_{k-L<=j<k} x_j x_j^H``.

    Three running sums, re-based every ``length`` snapshots at a rebuild time r:
    ``F`` = sum over [r-L, r), ``P`` = sum of the snapshots that have left the window
    since r (those in [r-L, k-L)), ``B`` = sum over [r, k). Then
    ``S(k) = F - P + B``; at k = r + L, ``F <- B`` and ``P, B <- 0``. Expiring snapshots
    are read back from a buffer of the last L snapshots (T, L, N), so memory is that of
    one window of data, never a per-snapshot outer product.

    Precision: ``F`` and ``P`` only ever hold data from one window length, so the
    cancellation in ``F - P`` costs an absolute error of a few machine epsilons times the
    energy of that earlier window (e.g. 1e-12 relative to the noise floor after a 40 dB
    jammer switches off); unlike a cumulative sum over the stream, the error does not
    grow with stream length.
    """

    def __init__(self, trials: int, elements: int, length: int):
        if trials < 1 or elements < 1 or length < 1:
            raise ValueError("trials, elements and length must be >= 1")
        zeros = np.zeros((trials, elements, elements), dtype=complex)
        self.length = int(length)
        self.front, self.gone, self.back = zeros, zeros.copy(), zeros.copy()
        self.rebuilt = 0
        self.buffer = np.zeros((trials, 0, elements), dtype=complex)
        self.seen = 0

    def count(self, k: np.ndarray) -> np.ndarray:
        return np.minimum(np.asarray(k, dtype=np.int64), self.length)

    def advance(self, data: np.ndarray, start: int, checkpoints) -> np.ndarray:
        if start != self.seen:
            raise ValueError(f"blocks must be contiguous: expected start {self.seen}, got {start}")
        t_, b, n = data.shape
        checkpoints = _check_stops(start, b, checkpoints)
        stop = start + b
        L = self.length
        rebuilds = np.arange(self.rebuilt + L, stop + 1, L)
        cuts = np.union1d(checkpoints, rebuilds[rebuilds > start])
        if not cuts.size or cuts[-1] != stop:
            cuts = np.append(cuts, stop)
        history = np.concatenate([self.buffer, data], axis=1) if self.buffer.shape[1] else data
        hist_start = start - self.buffer.shape[1]
        out = np.empty((t_, len(checkpoints), n, n), dtype=complex)
        wanted = {int(s): i for i, s in enumerate(checkpoints)}
        lo = start
        for hi in cuts:
            hi = int(hi)
            if hi > lo:
                self.back = self.back + outer_sum(data[:, lo - start:hi - start])
                e_lo, e_hi = max(lo - L, 0), max(hi - L, 0)
                if e_hi > e_lo:
                    self.gone = self.gone + outer_sum(history[:, e_lo - hist_start:e_hi - hist_start])
            if hi - self.rebuilt == L:
                self.front, self.rebuilt = self.back, hi
                self.back = np.zeros_like(self.front)
                self.gone = np.zeros_like(self.front)
            if hi in wanted:
                out[:, wanted[hi]] = self.front - self.gone + self.back
            lo = hi
        self.buffer = history[:, max(0, history.shape[1] - L):].copy()
        self.seen = stop
        return out


class LaggedSums:
    """Growing-window sums of stacked space-time snapshots ``z_k = [x_k; x_{k-1}; ...;
    x_{k-L+1}]`` (zeros before the stream starts), formed from the snapshots x_k (T, B,
    N) themselves: with the lag sums ``Q_q(c) = sum_{j<c} x_j x_{j-q}^H`` (q = 0 ..
    L - 1), block (l, m) of ``S(c) = sum_{k<c} z_k z_k^H`` is, for m >= l,
    ``sum_{j<c-l} x_j x_{j-(m-l)}^H = Q_{m-l}(c) - sum_{c-l<=j<c} x_j x_{j-(m-l)}^H``
    (zero when c <= l) and block (m, l) its conjugate transpose. Cost per snapshot
    L N^2 complex multiply-adds instead of (N L)^2, with L (L - 1) / 2 outer products
    per checkpoint for the last terms; the returned sums are exactly Hermitian (the
    upper triangle mirrored). Equal to :class:`GrowingSums` of the stacked snapshots to
    rounding (tested).

    ``advance(x, start, checkpoints)`` takes the block's snapshots (T, B, N) (or its
    stacked snapshots (T, B, N L), of which it reads x_k, the first N entries) and
    returns S at each snapshot count in ``checkpoints`` (T, len(checkpoints), N L, N L),
    in a buffer reused by the next call.
    """

    #: advance reads the snapshots of the block, not their stacks
    unstacked = True
    #: the sums it returns are exactly Hermitian
    hermitian = True

    def __init__(self, trials: int, elements: int, taps: int):
        if trials < 1 or elements < 1 or taps < 2:
            raise ValueError("trials and elements must be >= 1 and taps >= 2")
        self.n, self.taps = int(elements), int(taps)
        self.lags = np.zeros((trials, self.taps, self.n, self.n), dtype=complex)
        # the last 2 (L - 1) snapshots (zeros before the stream): the last terms' reach
        self.history = np.zeros((trials, 2 * (self.taps - 1), self.n), dtype=complex)
        self.seen = 0
        self._buffer: np.ndarray | None = None

    def count(self, k: np.ndarray) -> np.ndarray:
        return np.asarray(k, dtype=np.int64)

    def advance(self, data: np.ndarray, start: int, checkpoints) -> np.ndarray:
        if start != self.seen:
            raise ValueError(f"blocks must be contiguous: expected start {self.seen}, got {start}")
        n, taps = self.n, self.taps
        if data.shape[-1] == n * taps:
            data = data[..., :n]
        t_, b, _ = data.shape
        checkpoints = _check_stops(start, b, checkpoints)
        h = self.history.shape[1]
        full = np.concatenate([self.history, data], axis=1)       # snapshot j at j - start + h
        conj = np.conj(full)
        out = self._output((t_, len(checkpoints), n * taps, n * taps))
        lo = 0
        compiled = _kernels.compiled()
        for i, c in enumerate(list(checkpoints) + [start + b]):
            hi = int(c - start)
            if hi > lo and compiled:      # one pass, no BLAS call (nor its threads)
                _kernels.loops().lag_sums_kernel(full, h + lo, h + hi, self.lags)
            elif hi > lo:
                now = np.swapaxes(full[:, h + lo:h + hi], 1, 2)
                for q in range(taps):
                    self.lags[:, q] += now @ conj[:, h + lo - q:h + hi - q]
            lo = hi
            if i < len(checkpoints):
                self._assemble(out[:, i], full, conj, int(c), h - start)
        self.history = full[:, full.shape[1] - h:].copy()
        self.seen = start + b
        return out

    def _output(self, shape: tuple) -> np.ndarray:
        """The returned sums: a view of one buffer kept across blocks (valid until the
        next ``advance``; fresh large arrays per block cost page faults)."""
        count = int(np.prod(shape))
        if self._buffer is None or self._buffer.size < count:
            self._buffer = np.empty(count, dtype=complex)
        return self._buffer[:count].reshape(shape)

    def _assemble(self, out: np.ndarray, full: np.ndarray, conj: np.ndarray, c: int,
                  shift: int) -> None:
        """S(c) into out (T, N L, N L); snapshot j sits at full[:, j + shift]."""
        n, taps = self.n, self.taps
        rows, cols = np.triu_indices(n, 1)
        diag = np.arange(n)
        for q in range(taps):
            last = None                                        # the last l terms
            for l_ in range(taps - q):
                if l_:
                    j = c - l_ + shift
                    term = full[:, j, :, None] * conj[:, j - q, None, :]
                    last = term if last is None else np.add(last, term, out=last)
                m = l_ + q
                up = out[:, l_ * n:(l_ + 1) * n, m * n:(m + 1) * n]
                if c <= l_:
                    up[...] = 0.0
                elif last is None:
                    up[...] = self.lags[:, q]
                else:
                    np.subtract(self.lags[:, q], last, out=up)
                if q:                                          # block (m, l): (l, m)^H
                    out[:, m * n:(m + 1) * n, l_ * n:(l_ + 1) * n] = \
                        np.conj(np.swapaxes(up, 1, 2))
                else:                                          # mirror the upper triangle
                    up[:, cols, rows] = np.conj(up[:, rows, cols])
                    up[:, diag, diag] = up[:, diag, diag].real


def signal_count_mdl(lam_desc: np.ndarray, snapshots: int) -> np.ndarray:
    """Number of signal (interference) eigenvalues by the minimum description length
    criterion of Wax & Kailath (1985).

    Parameters
    ----------
    lam_desc : (..., p) sample eigenvalues in descending order (the p the data can make
        non-zero).
    snapshots : int
        Snapshots K behind the sample covariance.

    Returns
    -------
    (...) int array: the k in ``0 .. p-1`` minimising
    ``MDL(k) = -K (p - k) log(g_k / a_k) + k (2p - k) log(K) / 2``, with ``g_k`` and
    ``a_k`` the geometric and arithmetic means of the ``p - k`` smallest eigenvalues.

    References
    ----------
    M. Wax and T. Kailath, "Detection of signals by information theoretic criteria",
    IEEE Trans. ASSP-33 (1985), eq. (16) (complex data).
    """
    lam = np.maximum(np.asarray(lam_desc, float), 1e-300)
    p = lam.shape[-1]
    k_snap = max(int(snapshots), 1)
    logs = np.log(lam)
    # sums over the tail i >= k (descending order), for every k: reversed cumsums
    tail_log = np.cumsum(logs[..., ::-1], axis=-1)[..., ::-1]
    tail_sum = np.cumsum(lam[..., ::-1], axis=-1)[..., ::-1]
    k = np.arange(p)
    q = p - k
    log_g = tail_log / q
    log_a = np.log(tail_sum / q)
    mdl = -k_snap * q * (log_g - log_a) + 0.5 * k * (2 * p - k) * np.log(k_snap)
    return np.argmin(mdl, axis=-1)


def noise_floor_estimate(r: np.ndarray, counts) -> np.ndarray:
    """Noise power estimated from sample covariances (T, C, N, N) built from ``counts``
    (C,) snapshots. Shape (T, C).

    Of the ``m = min(K, N)`` eigenvalues the data can make non-zero, the ``k`` largest
    are taken as interference by the MDL criterion (:func:`signal_count_mdl`, Wax &
    Kailath 1985, which also works when the interferers nearly fill the array: J up to
    N - 1); the noise floor is the sum of the other ``m - k`` eigenvalues divided by
    their expected share of the noise, ``(N - k)(K - k) / K`` noise powers (the residual
    after fitting k directions keeps ``(N - k)(K - k)`` of the ``N K`` complex degrees of
    freedom, as a least-squares residual variance divides by its degrees of freedom;
    for K >= N this is the mean of the noise eigenvalues times ``K / (K - k)``, for
    K < N their mean times ``K / (N - k)``). Common practice for the correction; the
    plain mean of the smaller half of the eigenvalues, used before, reads an
    interference eigenvalue as noise as soon as the interferers exceed N/2.
    """
    counts = np.asarray(counts, dtype=np.int64)
    lam = np.linalg.eigvalsh(r)                       # ascending, (T, C, N)
    n = r.shape[-1]
    out = np.empty(r.shape[:2])
    for c, kk in enumerate(counts):                   # a loop over checkpoints, never trials
        kk = max(int(kk), 1)
        m = min(kk, n)
        top = np.maximum(lam[:, c, n - m:][:, ::-1], 0.0)          # (T, m) descending
        k = signal_count_mdl(top, kk)                              # (T,)
        keep = np.arange(m)[None, :] >= k[:, None]
        rest = np.where(keep, top, 0.0).sum(-1)
        out[:, c] = rest * kk / ((n - k) * (kk - k))
    return out


def loading_level(r: np.ndarray, counts, mode: str | None, loading_db: float | None,
                  noise_power: float) -> np.ndarray | None:
    """Diagonal load (T, C) to add to sample covariances r (T, C, N, N), or None.

    ``fixed``: ``noise_power * 10^(loading_db/10)`` (Carlson 1988: loading about 10 dB
    above the noise floor). ``auto``: the same with the noise power replaced by
    :func:`noise_floor_estimate` (common practice).
    """
    if mode is None:
        return None
    gain = 10.0 ** (loading_db / 10.0)
    if mode == "fixed":
        return np.full(r.shape[:2], noise_power * gain)
    if mode == "auto":
        return noise_floor_estimate(r, counts) * gain
    raise ValueError(f"unknown loading mode {mode!r}")


def solve_sample(r: np.ndarray, b: np.ndarray, counts, exact: np.ndarray) -> np.ndarray:
    """Solve ``R x = b`` for sample covariances r (T, C, N, N), b (T, C, N) or
    (T, C, N, M).

    Checkpoints where ``exact`` (C,) is False (unloaded, fewer snapshots than elements)
    have a singular R of rank ``counts``: they get the minimum-norm solution on the data
    subspace, ``x = E_k diag(1/lambda_k) E_k^H b`` over the ``counts`` largest eigenpairs
    (the pseudo-inverse with its rank fixed by the snapshot count, so no tolerance
    decides it). Other checkpoints use the batched Cholesky solve of ``_linalg``.
    """
    counts = np.asarray(counts, dtype=np.int64)
    exact = np.asarray(exact, dtype=bool)
    vec = b.ndim == r.ndim - 1
    rhs = b[..., None] if vec else b
    x = np.empty(np.broadcast_shapes(r.shape[:-1], rhs.shape[:-1]) + rhs.shape[-1:],
                 dtype=np.result_type(r, rhs, complex))
    if exact.all():                                # no copies of the whole stack
        x[...] = solve_hermitian(r, rhs)
    elif exact.any():
        x[:, exact] = solve_hermitian(r[:, exact], rhs[:, exact])
    for c in np.flatnonzero(~exact):               # a loop over checkpoints, never trials
        lam, e = np.linalg.eigh(r[:, c])
        k = int(counts[c])
        lam, e = lam[:, -k:], e[:, :, -k:]
        proj = np.conj(np.swapaxes(e, -1, -2)) @ rhs[:, c]
        x[:, c] = e @ (proj / lam[:, :, None]) if k else 0.0
    return x[..., 0] if vec else x


def smoothed_covariance(r: np.ndarray, subarray: int, backward: bool = False) -> np.ndarray:
    """Spatially smoothed covariance (..., M, M) of a uniform line's covariance
    (..., N, N): the mean of the ``L = N - M + 1`` diagonal M x M blocks
    ``R_l = R[l:l+M, l:l+M]`` (forward smoothing, Shan, Wax and Kailath, "On spatial
    smoothing for direction-of-arrival estimation of coherent signals", IEEE Trans.
    ASSP-33, 1985); ``backward``: averaged with its exchange-conjugate
    ``J conj(R_f) J`` (forward-backward smoothing, Pillai and Kwon, "Forward/backward
    spatial smoothing techniques for coherent signal identification", IEEE Trans.
    ASSP-37, 1989). Decorrelates up to L (forward) or 2L (forward-backward) coherent
    arrivals, at the cost of an M-element aperture."""
    n = r.shape[-1]
    m = int(subarray)
    if not 1 <= m <= n:
        raise ValueError(f"subarray must be in [1, {n}], got {m}")
    count = n - m + 1
    out = r[..., 0:m, 0:m].copy()
    for lag in range(1, count):
        out += r[..., lag:lag + m, lag:lag + m]
    out *= 1.0 / count
    if backward:
        out = 0.5 * (out + np.conj(out[..., ::-1, ::-1]))
    return out


def shift_invariant_reason(positions: np.ndarray) -> str | None:
    """None when the elements form a uniform line in their stored order (equal steps
    between neighbours: every subarray of consecutive elements is a shifted copy of the
    first), else why not."""
    p = np.asarray(positions, float)
    if len(p) < 2:
        return "one element has no subarrays"
    step = np.diff(p, axis=0)
    if np.abs(step - step[0]).max() > 1e-9 * max(1.0, np.abs(p).max()):
        return ("the elements are not equally spaced along one line, so the subarrays "
                "are not shifted copies of one another (a grid, ring or irregular layout)")
    return None


def smoothing_parameters() -> dict[str, Parameter]:
    """The declared spatial-smoothing parameters (``subarray``, ``smoothing``)."""
    return {
        "subarray": Parameter("int", None, "spatial smoothing over subarrays of this many "
                              "consecutive elements (uniform lines only); the weight is the "
                              "subarray's, applied to the first subarray", unit="elements",
                              low=1, high=1024, allow_none=True),
        "smoothing": Parameter("choice", "forward", "with subarray: forward, or "
                               "forward-backward (also the exchange-conjugate)",
                               choices=("forward", "forward-backward")),
    }


def check_smoothing(params: dict, given: dict, where: str) -> None:
    """``smoothing`` needs ``subarray``; unsmoothed processors keep no smoothing keys in
    their parameters (so their specs and metrics read as before)."""
    if params.get("subarray") is None:
        if "smoothing" in given and params.get("smoothing") != "forward":
            raise SpecError("smoothing applies with subarray only", path=f"{where}smoothing",
                            value=given["smoothing"], allowed="add subarray=M, or drop it")
        params.pop("subarray", None)
        params.pop("smoothing", None)


def _count(k: int, noun: str) -> str:
    """``k`` and the noun, plural unless k is 1 ("1 training snapshot")."""
    return f"{k} {noun}{'' if k == 1 else 's'}"


def window_parameters() -> dict[str, Parameter]:
    """The declared training-window parameters (growing, or sliding of ``length``)."""
    return {
        "window": Parameter("choice", "growing", "training window: all snapshots so far, "
                            "or the last `length`", choices=("growing", "sliding")),
        "length": Parameter("int", None, "sliding window length", unit="snapshots",
                            low=1, high=10 ** 9, allow_none=True),
    }


def check_window(params: dict, where: str) -> None:
    """A sliding window needs its length; a growing one takes none (SpecError)."""
    if params["window"] == "sliding" and params["length"] is None:
        raise SpecError("a sliding window needs length (snapshots)", path=f"{where}length",
                        allowed="an integer >= 1 snapshots")
    if params["window"] == "growing" and params["length"] is not None:
        raise SpecError("length applies to window=sliding only", path=f"{where}length",
                        value=params["length"], allowed="none, or add window=sliding")


def loading_parameters(auto: bool) -> dict[str, Parameter]:
    """The declared loading parameters (``loading`` only when ``auto`` is offered)."""
    out = {}
    if auto:
        out["loading"] = Parameter(
            "choice", None, "diagonal loading: none, fixed (loading_db above the known noise "
            "floor) or auto (loading_db above a noise floor estimated from the data; "
            "loading_db defaults to 10)", choices=("fixed", "auto"), allow_none=True,
            omit_unset=True)     # unset stays out of the spec: loading_db alone is fixed
    out["loading_db"] = Parameter(
        "float", None, "diagonal load above the noise floor (alone: fixed loading)",
        unit="dB", low=-60.0, high=100.0, allow_none=True)
    return out


def effective_loading(params: dict) -> tuple[str | None, float | None]:
    """(mode, dB) from declared loading parameters: ``loading_db`` alone means fixed;
    ``auto`` without ``loading_db`` uses 10 dB (Carlson 1988's 10 dB above noise)."""
    mode = params.get("loading")
    db = params.get("loading_db")
    if mode is None and db is not None:
        mode = "fixed"
    if mode == "auto" and db is None:
        db = 10.0
    return mode, db


def check_loading(params: dict, given: dict, where: str) -> None:
    """Refuse contradictory loading settings (``loading=none loading_db=10``, fixed
    without a level)."""
    prefix = where or ""
    if "loading" in given and params.get("loading") is None and params.get("loading_db") is not None:
        raise SpecError("loading=none contradicts loading_db", path=f"{prefix}loading",
                        value=given["loading"], allowed="fixed | auto, or drop loading_db")
    if params.get("loading") == "fixed" and params.get("loading_db") is None:
        raise SpecError("fixed loading needs loading_db (dB above the noise floor)",
                        path=f"{prefix}loading_db", allowed="a number in [-60, 100] dB")


class SampleCovarianceProcessor(Processor):
    """Base for processors computing weights from a sample covariance of the training
    data (``block.training``: interference plus noise, or with the wanted signal present
    when the scene says so).

    Checkpoint c uses the estimate at the last update time ``u = floor(c/interval) *
    interval`` (u = c for interval 1), from the snapshots [0, u) (growing window) or
    [max(0, u - length), u) (sliding window). ``u = 0`` (no data yet) gives the initial
    weight. Subclasses implement ``weights_from(state, r, counts, exact)``; r (T, C, N, N)
    is the loaded sample covariance ``S/count + load I``.

    The run state (:meth:`begin`) holds the window sums (``sums``), the sum held at the
    last update time (``held``), the initial weight (``initial``) and whether the
    singular-covariance warning was given (``warned``; ``warned_auto`` for the crowded
    noise floor of ``loading=auto``).
    """

    method = ""
    covariance_based = True
    drawn_covariance = True
    #: warn when unloaded data are singular (a subclass that does not solve with R sets False)
    warns_singular = True

    # -- settings a subclass may override ------------------------------------------
    def window_settings(self) -> tuple[str, int | None, int]:
        return "growing", None, 1

    def loading_settings(self) -> tuple[str | None, float | None]:
        return effective_loading(self.params)

    def smoothing_settings(self) -> tuple[int | None, bool]:
        """(subarray size M or None, forward-backward?)."""
        return (self.params.get("subarray"),
                self.params.get("smoothing") == "forward-backward")

    def look(self, context: Context) -> np.ndarray:
        """The assumed look steering the weights are formed for: the whole array's, or
        with spatial smoothing the first subarray's (its first M entries)."""
        m, _ = self.smoothing_settings()
        return context.look if m is None else context.look[..., :m]

    def check_subarray(self, context: Context) -> None:
        """Refuse smoothing on layouts that are not shift-invariant, and subarrays
        larger than the array."""
        m, _ = self.smoothing_settings()
        if m is None:
            return
        if m > context.elements:
            raise SpecError(f"a subarray of {m} elements is larger than the "
                            f"{context.elements}-element array", path="subarray", value=m,
                            allowed=f"1 .. {context.elements}")
        reason = shift_invariant_reason(context.positions)
        if reason is not None:
            raise SpecError(f"spatial smoothing needs a uniform line: {reason}",
                            path="subarray", value=m,
                            allowed="a line array, or drop subarray")

    def weights_from(self, state: State, r: np.ndarray, counts: np.ndarray,
                     exact: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def weights_from_scaled(self, state: State, table: np.ndarray, counts: np.ndarray,
                            load: np.ndarray | None) -> np.ndarray | None:
        """Optional fast path: the weights of :meth:`weights_from` straight from the
        window sums ``table`` (T, C, N, N), exactly Hermitian, with ``S / count + load I``
        folded into the solve (no scaled copy of the stack); None when not offered or
        not possible here (the caller then takes the general path)."""
        return None

    # -- driver ------------------------------------------------------------------
    def begin(self, context: Context) -> State:
        self.check(context)
        window, length, _ = self.window_settings()
        t_, n = context.trials, context.elements
        if window == "growing" and context.taps > 1:     # stacked: from the lag sums
            sums = LaggedSums(t_, n // context.taps, context.taps)
        else:
            sums = GrowingSums(t_, n) if window == "growing" else SlidingSums(t_, n, length)
        return State(context=context,
                     sums=sums,
                     held=None,           # (sum (T, N, N), update time) at the last update
                     warned=False,
                     warned_auto=False,
                     initial=self.initial_weights(context))

    def warn_once(self, state: State, message: str) -> None:
        if not state.warned:
            state.warned = True
            warnings.warn(f"{self.label}: {message}", RuntimeWarning, stacklevel=4)

    def _warn_crowded_floor(self, state: State, r: np.ndarray, count: int) -> None:
        """Warn once when ``loading=auto`` finds at most two noise eigenvalues left after
        the MDL count (Wax & Kailath 1985) in the median trial: the interferers nearly
        fill the array and the estimated floor rests on very few numbers."""
        n = r.shape[-1]
        m = max(1, min(count, n))
        top = np.linalg.eigvalsh(r)[:, n - m:][:, ::-1]
        k = int(np.median(signal_count_mdl(top, count)))
        if m - k <= 2 and n > 2:
            state.warned_auto = True
            warnings.warn(f"{self.label}: loading=auto finds {k} interference eigenvalue(s) "
                          f"on {n} elements after {count} snapshots, so the noise floor "
                          f"rests on {m - k} eigenvalue(s); give loading_db alone (fixed "
                          "loading above the known noise) if the noise power is known",
                          RuntimeWarning, stacklevel=4)

    def update_times(self, checkpoints) -> np.ndarray:
        """Update time ``u = floor(c/interval) * interval`` behind each checkpoint c."""
        every = int(self.window_settings()[2])
        return (np.asarray(checkpoints, dtype=np.int64) // every) * every

    def window_start(self, times) -> np.ndarray:
        """First snapshot of the training window ending at each update time (exclusive
        end): 0 for a growing window, ``max(0, u - length)`` for a sliding one."""
        times = np.asarray(times, dtype=np.int64)
        window, length, _ = self.window_settings()
        if window != "growing":
            return np.maximum(times - int(length), 0)
        return np.zeros_like(times)

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        checkpoints = np.asarray(checkpoints, dtype=np.int64)
        every = int(self.window_settings()[2])
        if every == 1 and getattr(state.sums, "unstacked", False):
            return self._update_by_checkpoint(state, block, checkpoints)
        times = self.update_times(checkpoints)
        last = (block.stop // every) * every
        # the sum at the block's last update time serves the checkpoints of later
        # blocks that fall before their own next update (interval > 1 only)
        keep = every > 1 and last > block.start
        wanted = np.union1d(times[times > block.start],
                            [last] if keep else []).astype(np.int64)
        sums = state.sums.advance(self._training(state, block), block.start, wanted)
        t_, n = state.context.trials, state.context.elements
        if not checkpoints.size:
            if keep:
                state.held = (sums[:, -1].copy(), int(wanted[-1]))
            return np.empty((t_, 0, n), dtype=complex)
        # the sum behind each distinct update time used by this block's checkpoints
        distinct = np.unique(times[times > 0])
        if np.array_equal(distinct, wanted):            # all of this block's own
            table = sums
        else:
            table = np.empty((t_, len(distinct), n, n), dtype=complex)
            for i, u in enumerate(distinct):
                if u > block.start:
                    table[:, i] = sums[:, int(np.searchsorted(wanted, u))]
                else:
                    if state.held is None or state.held[1] != u:
                        raise RuntimeError("internal: no covariance held for the update time")
                    table[:, i] = state.held[0]
        if keep:
            state.held = (sums[:, -1].copy(), int(wanted[-1]))
        if getattr(state.sums, "hermitian", False):
            with compiled_solves():                  # see _update_by_checkpoint
                return self.weights_from_sums(state, checkpoints, distinct, table,
                                              hermitian=True)
        return self.weights_from_sums(state, checkpoints, distinct, table)

    @staticmethod
    def _training(state: State, block) -> np.ndarray:
        """What the window sums read: the block's own snapshots for sums formed from
        them (:class:`LaggedSums`, when the block offers them), else ``training``."""
        if getattr(state.sums, "unstacked", False):
            raw = getattr(block, "unstacked_training", None)
            if raw is not None:
                return raw
        return block.training

    def _update_by_checkpoint(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        """Space-time sums (:class:`LaggedSums`, a weight at every checkpoint): the block
        is fed up to each checkpoint in turn and the weight solved there, so only one
        N L x N L sum per trial exists at a time (the block's sums all at once are
        hundreds of megabytes for a few hundred trials). The sums are exactly
        Hermitian; with the kernels on they are solved by the compiled Cholesky loop
        (one pass per matrix instead of a LAPACK call per small matrix, whose threads
        crawl on a busy machine; equal to rounding)."""
        x = self._training(state, block)
        t_, n = state.context.trials, state.context.elements
        w = np.empty((t_, len(checkpoints), n), dtype=complex)
        lo = block.start
        for i, c in enumerate(int(c) for c in checkpoints):
            sums = state.sums.advance(x[:, lo - block.start:c - block.start], lo, [c])
            with compiled_solves():
                w[:, i] = self.weights_from_sums(state, [c], np.array([c]), sums,
                                                 hermitian=True)[:, 0]
            lo = c
        if block.stop > lo:
            state.sums.advance(x[:, lo - block.start:], lo, [])
        return w

    def weights_from_sums(self, state: State, checkpoints, distinct: np.ndarray, table: np.ndarray,
                          rows: slice = slice(None), hermitian: bool = False) -> np.ndarray:
        """Weights (T, len(checkpoints), N) at checkpoints ``checkpoints`` from the window sums
        ``table`` (T, len(distinct), N, N) at the distinct nonzero update times
        ``distinct`` (sorted) behind them; ``rows`` selects the trials of the batch the
        table holds (all by default); ``hermitian``: the caller guarantees the sums are
        exactly Hermitian, so the symmetrisation is skipped (it would change nothing).
        Shared by the streaming path and the drawn covariance path
        (:mod:`adapt.engine.drawn`)."""
        checkpoints = np.asarray(checkpoints, dtype=np.int64)
        times = self.update_times(checkpoints)
        t_, n = table.shape[0], state.context.elements
        w = np.empty((t_, len(checkpoints), n), dtype=complex)
        w[:, times == 0] = state.initial[rows][:, None, :]
        if distinct.size and self.smoothing_settings()[0] is not None:
            w[:, times > 0] = self._smoothed_weights(state, table, distinct, hermitian)[
                :, np.searchsorted(distinct, times[times > 0])]
        elif distinct.size:
            counts = state.sums.count(distinct)
            pos = np.searchsorted(distinct, times[times > 0])
            mode, db = self.loading_settings()
            if hermitian and mode != "auto" and (mode is not None or counts.min() >= n):
                load = loading_level(table, counts, mode, db, state.context.noise_power)
                wd = self.weights_from_scaled(state, table, counts, load)
                if wd is not None:
                    w[:, times > 0] = wd[:, pos]
                    return w
            r = table * (1.0 / counts)[None, :, None, None]
            if not hermitian:
                r = hermitian_part(r)
            load = loading_level(r, counts, mode, db, state.context.noise_power)
            if mode == "auto" and not state.warned_auto:
                self._warn_crowded_floor(state, r[:, -1], int(counts[-1]))
            if load is not None:
                idx = np.arange(n)
                r[..., idx, idx] += load[..., None]           # r is a fresh array
                exact = np.ones(len(distinct), dtype=bool)
            else:
                exact = counts >= n
                if not exact.all() and self.warns_singular:
                    self.warn_once(
                        state,
                        f"{_count(int(counts.min()), 'training snapshot')} for {n} elements without "
                        "loading: the sample covariance is singular; using the minimum-norm "
                        "(pseudo-inverse) solution on the data subspace until "
                        f"{n} snapshots are seen (add loading_db to avoid this)")
            wd = self.weights_from(state, r, counts, exact)
            w[:, times > 0] = wd[:, pos]
        return w

    def _smoothed_weights(self, state: State, table: np.ndarray, distinct: np.ndarray,
                          hermitian: bool) -> np.ndarray:
        """Weights (T, len(distinct), N) with spatial smoothing: the M-element weight
        from the smoothed covariance (loaded as the unsmoothed one would be), applied to
        the first subarray and zero on the other N - M elements. The smoothed estimate
        of k snapshots has rank at most min(M, k L) (2 k L forward-backward)."""
        m, backward = self.smoothing_settings()
        n = table.shape[-1]
        counts = state.sums.count(distinct)
        r = table * (1.0 / counts)[None, :, None, None]
        if not hermitian:
            r = hermitian_part(r)
        r = smoothed_covariance(r, m, backward)
        looks = counts * (n - m + 1) * (2 if backward else 1)     # subarray snapshots
        reach = np.minimum(looks, m)
        mode, db = self.loading_settings()
        load = loading_level(r, looks, mode, db, state.context.noise_power)
        if load is not None:
            idx = np.arange(m)
            r[..., idx, idx] += load[..., None]
            exact = np.ones(len(distinct), dtype=bool)
        else:
            exact = looks >= m
            if not exact.all() and self.warns_singular:
                self.warn_once(state,
                               f"{int(counts.min())} training snapshots are too few for a "
                               f"full-rank smoothed covariance of {m} elements; using the "
                               "minimum-norm solution (add loading_db to avoid this)")
        out = np.zeros(r.shape[:2] + (n,), dtype=complex)
        out[..., :m] = self.weights_from(state, r, reach, exact)
        return out
