"""Reference vectors: record trusted processor outputs, verify other implementations.

Engineers rewriting a processor (a fixed-point model, C or HDL driven from a script, a
port to another language) regression-test it against a *reference set* recorded here:
the exact snapshots a processor adapted on, its weights at a list of checkpoints, its
output samples, and the scene's truth to score SINR.

Reference-set layout (``record`` writes it, ``load_reference`` reads and checks it)::

    DIR/reference.json          scene name, seed, processor spec, trials, snapshots,
                                checkpoints, library versions, the resolved scene mapping
    DIR/tolerances.json         default tolerance of each metric and its definition
    DIR/manifest.json           sha256 and size of every other file (adapt.io)
    DIR/case-0000/              one folder per case (trial 0, 1, ...)
        samples.npy             (K, N) complex128: the snapshots the processor adapts on,
                                rows are snapshots (see "which stream" below)
        steering.npy            (N,) assumed look steering vector (nominal array)
        reference.npy           (K,) complex128 reference waveform; written only for
                                reference-trained methods (lms, nlms, rls)
        checkpoints.npy         (C,) int64 snapshot counts c: the weight after c snapshots
        case.json               method, params, spec, noise_power, trial, positions,
                                look direction, sizes
        samples.sigmf-data      samples.npy as SigMF: cf32_le, N channels interleaved
        samples.sigmf-meta      per snapshot, sample rate 1 (one sample per snapshot)
        weights.npy             (C, N) expected weights, applied as y = w^H x; a
                                space-time set: (C, N L), see "Space-time weights"
        outputs.npy             (K,) expected outputs y = w^H x over samples.npy under
                                the held-weight convention
        sinr_db.npy             (C,) output SINR of the expected weights on the truth
        truth_covariance.npy    true interference-plus-noise covariance: (N, N) for a
                                stationary scene, else (C, N, N) at snapshot index c
                                (a space-time set: M = N L in place of N)
        truth_signal_covariance.npy  space-time sets only: the wanted source's true
                                space-time covariance R_s (power and gate included),
                                (M, M) stationary, else (C, M, M)
        truth_steering.npy      true wanted steering (hardware errors of the trial):
                                (N,) stationary, else (C, N) at snapshot index c
        truth.json              wanted-source power (linear, dB) and, per checkpoint,
                                the power in force (0 while a pulsed source is off)

Space-time weights (``format_version`` 2; a narrowband scene with spatial weights keeps
version 1 and exactly the files above): a wideband scene (``receiver:
fractional_bandwidth``), a processor with ``taps=L`` > 1, or the sub-band processor
``subband`` (whose weights are its synthesis filters, L = F = ``bins``). ``weights.npy``
is (C, N L), complex128, and ``reference.json`` and every ``case.json`` carry the same
``weights`` mapping: ``shape`` [C, N L], ``elements`` N, ``taps`` L, ``column``
``"l*N + n"`` and the order in words. Column ``l N + n`` multiplies element n delayed by
l snapshots: reshaped C-order to (C, L, N) it reads ``w[c, l, n]``; tap l = 0 is the
newest snapshot, l = L - 1 the oldest. The output at snapshot k is ``y_k = w^H z_k``
with ``z_k = [x_k; x_{k-1}; ...; x_{k-L+1}]`` (rows of ``samples.npy``, zeros before
snapshot 0); :func:`stack_snapshots` builds z. A wideband scene with a spatial
processor has L = 1 (weights (C, N)) but is still a space-time set: its SINR needs the
wanted source's covariance. ``case.json`` then also gives ``fractional_bandwidth`` B
(what a wideband processor's look vector needs: element n's look phase at baseband
frequency f is ``2 pi p_n.u (1 + f B)``). SINR uses ``w^H R_s w / (w^H R_in w)`` with
``truth_signal_covariance.npy`` and ``truth_covariance.npy`` (M x M, entries in the
same order), as the engine scores space-time weights (Van Trees 2002, broadband
chapter). For ``subband`` the mapping adds ``bins`` F and ``synthesis``: the per-bin
MVDR weights ``w_b`` (F x N, FFT order: bin b at ``fftfreq(F)[b]`` cycles per snapshot,
b = 0 .. F - 1) become the stacked weights ``w[l, n] = conj(h_n[l])`` with ``h_n =
ifft_b(conj(w_b[n]) exp(-j 2 pi nu_b c))``, c = F // 2 (a pure look delay of c
snapshots); back: ``w_b[n] = conj(fft_l(conj(w[l, n]))[b]) exp(-j 2 pi nu_b c)`` (numpy's
``fft``/``ifft`` conventions). :data:`SUBBAND_RECIPE` (also written into the mapping)
gives the whole recipe a candidate reproduces: frames, window, loading, the look vector
per bin.

Which stream: blind and constrained methods (smi, gsc, frost, eigenspace, ...) adapt on
the *training* stream (interference plus noise, or the received data when the scene
trains with the signal present); reference-trained methods (``reference_trained``: lms,
nlms, rls) adapt on the *received* data with the reference waveform. ``samples.npy`` is
that stream, and the recorded weights are exactly what the processor produces when fed
``samples.npy`` (and ``reference.npy``) alone, with no knowledge of the true covariance:
specs that need the truth (``optimum``, ``step=auto`` of lms/frost) are refused at
record time with a message saying what to give instead.

Held-weight convention (adapt.processors.base): output snapshot j (0-based) uses the
weight of the latest checkpoint c <= j; snapshots before the first checkpoint use the
processor's initial weight (only those are never compared).

Metrics, per case and checkpoint (all in dB; a case passes when every value is at or
below its tolerance):

* ``sinr_db``: ``|SINR(w_c) - SINR(w_r)|``, both ``P |w^H a_true|^2 / (w^H R_in w)`` on
  the true covariance and steering (Van Trees 2002, ch. 6); a space-time set: ``w^H R_s
  w / (w^H R_in w)`` on the true space-time covariances; default 0.1 dB.
* ``weight_error_db``: ``20 log10(||w_c - w_r|| / ||w_r||)`` after scaling both to unit
  look response ``w^H a = 1`` (removes the arbitrary complex scale); for taps > 1
  (:func:`scaled_weight_error_db`) after removing the best complex scale by least
  squares; default -40 dB.
* ``output_evm_db``: ``20 log10(||y_c - y_r|| / ||y_r||)`` over the snapshots
  ``c_i <= j < c_(i+1)`` the checkpoint's weight is held for (the error vector
  magnitude of the output samples; ``y = w^H z`` on stacked snapshots for taps > 1);
  none for a checkpoint at the last snapshot; default -40 dB.

Verify modes: a Python callable ``f(case) -> (C, N) weights`` ((C, N L) in a space-time
set; :class:`CaseInputs`), or a command template with ``{case}`` (a folder with the
input ``.npy`` files and ``case.json``) and ``{out}`` (the ``.npy`` file to write), run
with a timeout (killed with its process group when it runs over). A Python callable runs in-process without a time limit.
Per case, a crash, timeout, nonzero exit or missing output is an *error*; NaN/inf or a
metric beyond tolerance is a *failure*; both fail the run (exit 1). Weights of the wrong
shape (not (C, N), or (C, N L) in a space-time set) mean the candidate reads the set
wrongly: verify stops there with :class:`WeightShapeError` (exit 2), naming the
expected and the returned shape.

Note on the output EVM: on interference-only training data the reference output is
nulled down to the noise, so a weight error leaks the jammers into the output and the
EVM is roughly the weight error plus the jammer-to-output power ratio (measured: 12-bit
weights, 35 dB jammers: weight error -74 dB, EVM -37 dB). Set ``output_evm_db`` with the
scene's jammer powers in mind.
"""
from __future__ import annotations

import hashlib
import importlib
import importlib.util
import json
import os
import re
import shlex
import shutil
import signal
import stat
import subprocess
import sys
import tempfile
import time
import traceback
import types
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable

import numpy as np

from adapt import __version__
from adapt.engine.scores import output_sinr, output_sinr_space_time, to_db
from adapt.errors import CorruptReferenceError, InputError, SpecError, did_you_mean
from adapt.io import (
    atomic_write_bytes,
    atomic_write_text,
    library_versions,
    write_json,
    write_manifest,
    write_npy,
)
from adapt.processors import Context, Processor, parse_spec, run_processors
from adapt.processors._taps import tapped
from adapt.processors.base import normalised_checkpoints
from adapt.report.junit import TestOutcome, write_junit
from adapt.report.runfolder import StagedFolder
from adapt.scene.model import Scene
from adapt.scenefile import scene_to_mapping
from adapt.streams import wideband
from adapt.streams.snapshots import Block, TrialBatch
from adapt.streams.wideband import TapLine

__all__ = ["DEFAULT_TOLERANCES", "METRICS", "record", "load_reference", "verify",
           "ReferenceSet", "ReferenceCase", "CaseInputs", "CaseResult", "VerifyReport",
           "not_run_report", "run_bounded", "parse_npy", "CandidateLoadError",
           "reference_implementation", "load_implementation", "parse_tolerances",
           "format_report", "write_report_junit", "weight_error_db", "output_evm_db",
           "sinr_difference_db", "write_sigmf", "uses_reference", "scaled_weight_error_db",
           "stack_snapshots", "weight_layout", "WeightShapeError", "SPACE_TIME_ORDER",
           "SUBBAND_RECIPE", "SPACE_TIME_METRICS"]

FORMAT = "adapt reference set"
FORMAT_VERSION = 1

#: metric name -> definition (also written to tolerances.json)
METRICS = {
    "sinr_db": "absolute difference in dB between the output SINR the candidate's weights "
               "achieve on the true covariance and the reference weights' SINR",
    "weight_error_db": "20 log10(||w_c - w_r|| / ||w_r||) after scaling both weights to "
                       "unit response toward the look steering vector (w^H a = 1)",
    "output_evm_db": "20 log10(||y_c - y_r|| / ||y_r||) over the output samples y = w^H x "
                     "each checkpoint's weight is held for (held-weight convention)",
}
#: the metrics of a space-time set (weights of N L entries; written to its tolerances.json)
SPACE_TIME_METRICS = {
    "sinr_db": "absolute difference in dB between the output SINR w^H R_s w / (w^H R_in w) "
               "the candidate's weights achieve on the true space-time covariances and the "
               "reference weights' SINR",
    "weight_error_db": "spatial weights (taps 1): as in a narrowband set, 20 log10(||w_c - "
                       "w_r|| / ||w_r||) after scaling both to w^H a = 1; space-time weights "
                       "(taps > 1): 20 log10(min_g ||g w_c - w_r|| / ||w_r||), the best "
                       "complex scale g removed by least squares",
    "output_evm_db": "20 log10(||y_c - y_r|| / ||y_r||) over the output samples y = w^H z "
                     "(z the stacked snapshots [x_k; ...; x_(k-L+1)]) each checkpoint's "
                     "weight is held for (held-weight convention)",
}
#: default tolerances (common practice: double-precision rewrites land far below these)
DEFAULT_TOLERANCES = {"sinr_db": 0.1, "weight_error_db": -40.0, "output_evm_db": -40.0}

#: the format version of a space-time set (wideband scene, taps > 1 or subband: see
#: the module docstring); sets of spatial weights of a narrowband scene keep FORMAT_VERSION
SPACE_TIME_FORMAT_VERSION = 2
#: column order of space-time weights, as written into a set's ``weights`` mapping
SPACE_TIME_ORDER = ("column l*N + n multiplies element n (0 .. N-1) delayed by l snapshots "
                    "(tap l = 0 .. L-1): reshaped C-order to (C, L, N) a row reads w[l, n]; "
                    "tap 0 is the newest snapshot x_k, tap L-1 the oldest x_(k-L+1); the "
                    "output is y_k = w^H z_k, z_k = [x_k; x_(k-1); ...; x_(k-L+1)] (rows of "
                    "samples.npy, zeros before snapshot 0)")
#: how the sub-band processor's per-bin weights are made and folded into its weights
SUBBAND_RECIPE = (
    "F = bins; frame j holds snapshots jF .. jF+F-1 of samples.npy; the weight after c "
    "snapshots uses the m = floor(c / F) complete frames (m = 0: w_b = a_b / N). Per frame "
    "X_b = sum_t win[t] x_(jF+t) exp(-j 2 pi b t / F) (numpy fft over t), win[t] = 0.5 - "
    "0.5 cos(2 pi t / F) for window hann (numpy hanning(F+1)[:F]), 1 for rectangular. Bin "
    "b (FFT order, b = 0 .. F-1) is at nu_b = fftfreq(F)[b] cycles per snapshot. R_b = "
    "(1/m) sum_j X_b X_b^H / sum_t win[t]^2 + delta I, delta = 10^(loading_db/10) (0 when "
    "loading_db is null). Look vector per bin a_b[n] = a[n] exp(j 2 pi (p_n.u) nu_b B): a "
    "= steering.npy, p_n = positions[n], u = (sin az cos el, cos az cos el, sin el) of "
    "look_direction, B = fractional_bandwidth (a_b = a when narrowband). w_b = R_b^-1 a_b "
    "/ (a_b^H R_b^-1 a_b), with the minimum-norm (pseudo-inverse) solution where R_b is "
    "singular (fewer than N frames without loading). Synthesis with c = F // 2: h_n = ifft over b of conj(w_b[n]) "
    "exp(-j 2 pi nu_b c) (numpy ifft); the weights are w[l, n] = conj(h_n[l]), column l*N "
    "+ n (a look-direction response that is a pure delay of c snapshots at every bin "
    "frequency). Back to bins: w_b[n] = conj(fft over l of conj(w[l, n]))[b] exp(-j 2 pi "
    "nu_b c).")
_MAX_TAPS = 256                  # taps (or sub-band bins) of a set's weights
_MAX_WIDTH = 16384               # N L entries of a set's space-time weights
_MAX_TRUTH_VALUES = 1 << 25      # complex values of a set's space-time truth (512 MiB)
_MAX_STACKED = 1 << 26           # trials x snapshots x N L values of the stacked snapshots

INPUT_FILES = ("samples.npy", "steering.npy", "reference.npy", "checkpoints.npy", "case.json")
#: every file of a case folder the recorder writes (plus reference.npy when it uses one)
_CASE_FILES = ("samples.npy", "steering.npy", "checkpoints.npy", "case.json",
               "samples.sigmf-data", "samples.sigmf-meta", "weights.npy", "outputs.npy",
               "sinr_db.npy", "truth_covariance.npy", "truth_steering.npy", "truth.json")
_CASE_NAME = re.compile(r"case-[0-9]{4}")
_MANIFEST = "manifest.json"
_MAX_JSON_BYTES = 64 << 20       # a set's JSON files (reference.json holds the scene)
_MAX_ARRAY_BYTES = 4 << 30       # one array of a set (the samples are at most 256 MiB)
_MAX_VALUES = 1 << 24            # trials x snapshots x elements complex values per set
_MAX_CASES = 9999
_DB_FLOOR = -300.0               # dB value of an exact match (ratio floored at 1e-15)


# ============================================================================ tolerances
def parse_tolerances(items, base: dict | None = None) -> dict:
    """Tolerances from ``NAME=VALUE`` strings (or a mapping) over ``base`` (default
    :data:`DEFAULT_TOLERANCES`); InputError for unknown names or bad values."""
    out = dict(DEFAULT_TOLERANCES if base is None else base)
    if items is None:
        return out
    pairs = items.items() if isinstance(items, dict) else None
    if pairs is None:
        pairs = []
        for item in items:
            name, sep, value = str(item).partition("=")
            if not sep:
                raise InputError("a tolerance is NAME=VALUE", value=item,
                                 allowed=", ".join(f"{k}=..." for k in METRICS))
            pairs.append((name.strip(), value.strip()))
    for name, value in pairs:
        if name not in METRICS:
            raise InputError(f"unknown tolerance '{name}'" + did_you_mean(name, METRICS),
                             allowed=", ".join(METRICS))
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise InputError(f"tolerance {name} must be a number of dB", value=value) from None
        if not np.isfinite(number):
            raise InputError(f"tolerance {name} must be finite", value=value)
        if name == "sinr_db" and number < 0:
            raise InputError("tolerance sinr_db is an absolute difference: >= 0 dB", value=value)
        out[name] = number
    return out


# ============================================================================ metrics
def _db20(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """20 log10(num / den), floored at -300 dB; +inf when den is 0 and num is not."""
    num, den = np.asarray(num, float), np.asarray(den, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(den > 0, num / np.where(den > 0, den, 1.0),
                         np.where(num > 0, np.inf, 0.0))
    return 20.0 * np.log10(np.maximum(ratio, 1e-15))


def sinr_difference_db(weights: np.ndarray, truth_steering: np.ndarray,
                       truth_covariance: np.ndarray, signal_power: np.ndarray,
                       reference_sinr_db: np.ndarray) -> np.ndarray:
    """``|SINR_dB(w) - reference|`` per checkpoint; SINR from :func:`adapt.engine.scores.output_sinr`
    (Van Trees 2002, ch. 6). weights (C, N); steering (N,) or (C, N); covariance (N, N)
    or (C, N, N); signal_power (C,). Zero SINR reads as -300 dB."""
    s = output_sinr(weights, truth_steering, truth_covariance, signal_power)
    return np.abs(to_db(s) - np.asarray(reference_sinr_db, float))


def weight_error_db(candidate: np.ndarray, reference: np.ndarray, look: np.ndarray) -> np.ndarray:
    """Weight error in dB after removing the complex scale: both weights (..., N) scaled
    to ``w^H a = 1`` toward ``look`` (N,), then ``20 log10(||w_c - w_r|| / ||w_r||)``.

    Checkable fact: any ``w_c = g w_r`` (g complex, nonzero) gives -300 dB (exact match);
    a weight with no response toward ``look`` cannot be scaled and gives +inf.
    """
    wc, wr, a = np.asarray(candidate), np.asarray(reference), np.asarray(look)
    if wc.shape != wr.shape or wc.shape[-1] != a.shape[-1]:
        raise ValueError(f"weight shapes differ: {wc.shape}, {wr.shape}, look {a.shape}")
    rc = np.einsum("...n,n->...", np.conj(wc), a)
    rr = np.einsum("...n,n->...", np.conj(wr), a)
    scale = np.maximum(np.linalg.norm(wc, axis=-1) * np.linalg.norm(a), 1e-300)
    dead = np.abs(rc) <= 1e-14 * scale
    with np.errstate(divide="ignore", invalid="ignore"):
        nc = wc / np.conj(np.where(dead, 1.0, rc))[..., None]
        nr = wr / np.conj(rr)[..., None]
    err = _db20(np.linalg.norm(nc - nr, axis=-1), np.linalg.norm(nr, axis=-1))
    return np.where(dead, np.inf, err)


def output_evm_db(candidate: np.ndarray, reference: np.ndarray) -> float:
    """Error vector magnitude ``20 log10(||y_c - y_r|| / ||y_r||)`` in dB of two output
    sample sequences (same shape); -300 dB for an exact match."""
    yc, yr = np.asarray(candidate), np.asarray(reference)
    if yc.shape != yr.shape:
        raise ValueError(f"output shapes differ: {yc.shape} and {yr.shape}")
    return float(_db20(np.linalg.norm(yc - yr), np.linalg.norm(yr)))


def scaled_weight_error_db(candidate: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """Weight error in dB of space-time weights (..., M) after removing the best complex
    scale: ``20 log10(min_g ||g w_c - w_r|| / ||w_r||)``, g by least squares (``g =
    w_c^H w_r / w_c^H w_c``), the sine of the angle between the two weights.

    Space-time weights have no one look response every processor fixes (Frost's FIR
    response may be zero at any tap; the sub-band synthesis fixes a delay of F // 2), so
    the scale is taken from the weights themselves. Checkable fact: ``w_c = g w_r`` gives
    -300 dB (exact match); an error e orthogonal to both gives ``20 log10(||e|| /
    sqrt(||w_r||^2 + ||e||^2))``; a zero candidate gives 0 dB.
    """
    wc, wr = np.asarray(candidate), np.asarray(reference)
    if wc.shape != wr.shape:
        raise ValueError(f"weight shapes differ: {wc.shape}, {wr.shape}")
    num = np.einsum("...m,...m->...", np.conj(wc), wr)
    den = np.real(np.einsum("...m,...m->...", np.conj(wc), wc))
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return _db20(np.linalg.norm(g[..., None] * wc - wr, axis=-1), np.linalg.norm(wr, axis=-1))


def stack_snapshots(samples: np.ndarray, taps: int) -> np.ndarray:
    """Space-time snapshots of a stream: (..., K, N) -> (..., K, N L) with row k
    ``z_k = [x_k; x_{k-1}; ...; x_{k-L+1}]`` (entry ``l N + n`` is element n delayed by
    l snapshots, zeros before snapshot 0): what space-time weights of a set apply to,
    ``y_k = w^H z_k``. The engine's own delay line (:class:`adapt.streams.wideband.TapLine`)
    over the whole stream."""
    x = np.asarray(samples)
    if x.ndim < 2:
        raise ValueError(f"samples must be (..., snapshots, elements), got {x.shape}")
    if int(taps) < 1:
        raise ValueError(f"taps must be at least 1, got {taps}")
    lead = x.shape[:-2]
    flat = x.reshape((-1,) + x.shape[-2:])
    return TapLine(int(taps))(flat).reshape(lead + (x.shape[-2], x.shape[-1] * int(taps)))


def weight_layout(checkpoints: int, elements: int, taps: int, method: str = "",
                  bins: int | None = None) -> dict:
    """The ``weights`` mapping of a space-time set (reference.json and case.json): shape,
    elements, taps, the column order in words and, for the sub-band processor, its bins
    and synthesis recipe (:data:`SUBBAND_RECIPE`)."""
    out = {"shape": [int(checkpoints), int(elements) * int(taps)],
           "elements": int(elements), "taps": int(taps), "column": "l*N + n",
           "order": SPACE_TIME_ORDER}
    if bins is not None:
        out.update({"bins": int(bins), "synthesis": SUBBAND_RECIPE})
    return out


def _held_segments(checkpoints: np.ndarray, snapshots: int) -> list[tuple[int, int]]:
    """[c_i, c_(i+1)) snapshot ranges each checkpoint's weight is held for (held-weight
    convention); the last runs to the end of the stream (empty when c = K)."""
    c = [int(v) for v in checkpoints]
    return [(c[i], c[i + 1] if i + 1 < len(c) else snapshots) for i in range(len(c))]


# ============================================================================ record
def uses_reference(processor: Processor) -> bool:
    """True when the method trains on the reference waveform (adapts on the received
    data): the class flag ``Processor.reference_trained``."""
    return bool(processor.reference_trained)


def _candidate_context(look, positions, trials: int, noise_power: float, has_reference: bool,
                       look_direction, fractional_bandwidth: float = 0.0) -> Context:
    """The context a candidate could know: geometry, noise level and the scene's
    fractional bandwidth, no true covariance."""
    return Context(look=np.asarray(look, dtype=complex), positions=np.asarray(positions, float),
                   trials=int(trials), noise_power=float(noise_power), covariance=None,
                   training_covariance=None, has_reference=bool(has_reference),
                   look_direction=None if look_direction is None else
                   (float(look_direction[0]), float(look_direction[1])),
                   data_covariance=None, moments=None,
                   fractional_bandwidth=float(fractional_bandwidth))


def _run_on_stream(proc: Processor, samples: np.ndarray, reference: np.ndarray | None,
                   context: Context, checkpoints: np.ndarray, outputs: bool):
    """Run ``proc`` on one stream (T, K, N) fed as both ``data`` and ``training``."""
    t_, k, _ = samples.shape
    ref = np.zeros((t_, k), dtype=complex) if reference is None else reference
    block = Block(0, k, samples, np.zeros_like(samples), samples, ref)
    return run_processors([proc], [block], context, checkpoints, outputs=outputs,
                          snapshots=k)[0]


def _as_scene(scene) -> Scene:
    if isinstance(scene, Scene):
        return scene
    if isinstance(scene, (str, os.PathLike)):
        from adapt.scenefile import load_scene
        return load_scene(scene)
    raise InputError("expected a Scene or the path of a scene file", value=scene)


def _changed_params(method: str, params) -> dict:
    """The parameters that differ from their declared defaults (what rebuilds the
    processor: passing defaults back can trip cross-checks between parameters)."""
    from adapt.processors import registry
    cls = registry().get(method)
    if cls is None:
        return dict(params)
    return {k: v for k, v in dict(params).items()
            if k not in cls.parameters or v != cls.parameters[k].default}


def _rebuild(method: str, params, label: str | None = None) -> Processor:
    """A fresh processor of ``method`` with ``params``."""
    spec = {"method": method, **_changed_params(method, params)}
    if label:
        spec["label"] = label
    return parse_spec(spec, "processor")


def _as_processor(processor) -> Processor:
    if isinstance(processor, Processor):             # rebuilt as verify will rebuild it
        return _rebuild(processor.method, processor.params, processor.label)
    return parse_spec(processor, "processor")


def _weight_taps(proc: Processor) -> int:
    """L of the weights ``proc`` reports (N L entries): its ``taps``, or the sub-band
    processor's ``bins`` (its weights are its F-tap synthesis filters)."""
    if proc.method == "subband":
        return int(proc.params["bins"])
    return int(proc.params.get("taps", 1))


def _prepare_out_dir(out_dir) -> Path:
    if out_dir is None:
        raise InputError("an output folder is required", allowed="--out DIR")
    out = Path(out_dir)
    if out.exists():
        if not out.is_dir():
            raise InputError("exists and is not a folder; refusing to overwrite", file=str(out))
        if any(out.iterdir()):
            raise InputError("exists and is not empty; a reference set is never overwritten",
                             file=str(out), allowed="a new or empty folder")
    out.parent.mkdir(parents=True, exist_ok=True)
    return out


def default_reference_checkpoints(snapshots: int, elements: int) -> np.ndarray:
    """Checkpoints for a reference set: N, 2N, 4N, ... below K, then K (common practice:
    early checkpoints expose windowing and loading errors)."""
    k, first = int(snapshots), max(1, min(int(elements), int(snapshots)))
    c = [first]
    while c[-1] * 2 < k:
        c.append(c[-1] * 2)
    return np.unique(np.array(c + [k], dtype=np.int64))


def _record_chunk(scene_mapping: dict, spec: str, first: int, count: int, snapshots: int,
                  checkpoints, with_ref: bool) -> dict:
    """Worker entry point of :func:`record` on a Dask cluster: the expected weights and
    outputs of cases ``first .. first + count - 1``, rebuilt from plain data (the
    resolved scene mapping and the processor spec). Each case draws from its own seed,
    so the arrays equal the matching rows of a one-batch recording bit for bit."""
    from adapt.scenefile import parse_scene
    sc = parse_scene(scene_mapping)
    proc = parse_spec(spec, "processor")
    batch = TrialBatch(sc, trials=int(count), first_trial=int(first))
    blk = batch.samples(int(snapshots))
    samples = np.ascontiguousarray(blk.data if with_ref else blk.training, dtype=complex)
    reference = np.ascontiguousarray(blk.reference, dtype=complex) if with_ref else None
    look_dir = (float(sc.look_azimuth), float(sc.look_elevation))
    ctx = _candidate_context(batch.look, sc.array.positions, int(count), 1.0, with_ref, look_dir,
                             float(sc.receiver.fractional_bandwidth or 0.0))
    res = _run_on_stream(proc, samples, reference, ctx, np.asarray(checkpoints, dtype=np.int64),
                         outputs=True)
    return {"weights": res.weights, "outputs": res.outputs}


def _record_on_cluster(sc: Scene, proc: Processor, trials: int, snapshots: int, cps,
                       with_ref: bool, workers, scheduler) -> tuple[np.ndarray, np.ndarray]:
    from adapt.engine.evaluate import trial_chunks
    from adapt.engine.execute import cluster_client, scene_mapping, shippable_specs
    spec = shippable_specs([proc])[0]
    mapping = scene_mapping(sc)
    share = workers if workers is not None else 4
    chunks = trial_chunks(trials, max(1, -(-trials // (4 * share))))
    with cluster_client(workers, scheduler) as client:
        futures = [client.submit(_record_chunk, mapping, spec, f, c, snapshots,
                                 [int(x) for x in cps], with_ref, pure=False) for f, c in chunks]
        try:
            parts = client.gather(futures)
        finally:
            client.cancel(futures)
    return (np.concatenate([p["weights"] for p in parts], axis=0),
            np.concatenate([p["outputs"] for p in parts], axis=0))


def _record_on_threads(proc: Processor, samples: np.ndarray, reference: np.ndarray | None,
                       look, positions, with_ref: bool, look_dir, cps,
                       threads: int, fractional_bandwidth: float = 0.0
                       ) -> tuple[np.ndarray, np.ndarray]:
    """The expected weights and outputs with the cases split over ``threads`` threads
    (:func:`adapt.engine.execute.run_on_threads`), all sharing ``proc`` (immutable). Every
    computation runs along the case axis with no sums across cases, so the arrays equal
    a one-batch recording bit for bit."""
    from adapt.engine.evaluate import trial_chunks
    from adapt.engine.execute import run_on_threads
    parts: dict = {}

    def work(key, check):
        first, count = key
        rows = slice(first, first + count)
        ctx = _candidate_context(look, positions, count, 1.0, with_ref, look_dir,
                                 fractional_bandwidth)
        res = _run_on_stream(proc, samples[rows],
                             None if reference is None else reference[rows], ctx, cps,
                             outputs=True)
        return res.weights, res.outputs

    trials = samples.shape[0]
    run_on_threads(trial_chunks(trials, -(-trials // threads)), threads, work,
                   parts.__setitem__)
    keys = sorted(parts)
    return (np.concatenate([parts[k][0] for k in keys], axis=0),
            np.concatenate([parts[k][1] for k in keys], axis=0))


def record(scene, processor, trials, snapshots, checkpoints, out_dir,
           tolerances=None, *, workers: int | None = None,
           scheduler: str | None = None, threads: int | None = None) -> Path:
    """Record a reference set of ``processor`` on ``trials`` cases of ``scene``.

    scene: a :class:`Scene` or a scene file path; processor: a Processor or a spec
    (``"smi loading_db=10"``); trials: number of cases (None: 3); snapshots: K (None: the
    scene's); checkpoints: snapshot counts (None: N, 2N, 4N, ... and K); out_dir:
    a new or empty folder (anything else is refused, never overwritten); tolerances:
    overrides of :data:`DEFAULT_TOLERANCES` (mapping or ``NAME=VALUE`` strings);
    workers / scheduler: compute the expected weights on a Dask cluster (local worker
    processes or an existing scheduler; the arrays are identical to a local recording);
    threads: compute them on this many threads of this process instead (default: every
    usable core; 1: one batch; the arrays are identical).

    The set is built in a temporary sibling folder and renamed into place when complete.
    The expected weights are produced by the processor fed the stored samples alone
    (the context a candidate has: no true covariance), so
    :func:`reference_implementation` reproduces them. A wideband scene, ``taps=L`` > 1
    or ``subband`` makes a space-time set (weights (C, N L), format version 2; see the
    module docstring). Returns the folder.
    """
    sc = _as_scene(scene)
    proc = _as_processor(processor)
    tol = parse_tolerances(tolerances)
    from adapt.engine.settings import MAX_SNAPSHOTS, check_scheduler_address, whole_count
    t_ = 3 if trials is None else whole_count(trials, "trials", _MAX_CASES)
    k = sc.snapshots if snapshots is None else whole_count(snapshots, "snapshots", MAX_SNAPSHOTS)
    check_scheduler_address(scheduler)
    n = sc.elements
    if t_ * k * n > _MAX_VALUES:
        raise InputError(f"a reference set of {t_} cases x {k} snapshots x {n} elements is too "
                         f"big to keep as test vectors (limit {_MAX_VALUES} values)",
                         allowed="fewer trials or snapshots")
    taps = _weight_taps(proc)
    if t_ * k * n * taps > _MAX_STACKED:
        raise InputError(f"a space-time reference set of {t_} cases x {k} snapshots x {n} "
                         f"elements x {taps} taps is too big to record (the stacked snapshots "
                         f"hold {t_ * k * n * taps} values; limit {_MAX_STACKED})",
                         allowed="fewer trials, snapshots, taps or bins")
    try:
        cps = (default_reference_checkpoints(k, n) if checkpoints is None
               else normalised_checkpoints(checkpoints, k))
    except ValueError as exc:
        raise InputError(str(exc), path="checkpoints", value=checkpoints) from None
    from adapt.engine.execute import check_cluster_options, check_threads
    pool = check_threads(threads, remote=workers is not None or scheduler is not None)
    check_cluster_options(workers, scheduler)
    out = _prepare_out_dir(out_dir)

    batch = TrialBatch(sc, trials=t_)
    blk = batch.samples(k)
    with_ref = uses_reference(proc)
    samples = np.ascontiguousarray(blk.data if with_ref else blk.training, dtype=complex)
    reference = np.ascontiguousarray(blk.reference, dtype=complex) if with_ref else None

    # 1) the spec must make sense for the true scene (stability bounds etc.)
    tapped(_rebuild(proc.method, proc.params)).check(Context.from_batch(batch))
    # 2) the expected weights: the processor fed only what a candidate gets
    look_dir = (float(sc.look_azimuth), float(sc.look_elevation))
    fb = float(sc.receiver.fractional_bandwidth or 0.0)
    ctx = _candidate_context(batch.look, sc.array.positions, t_, 1.0, with_ref, look_dir, fb)
    try:
        if workers is None and scheduler is None and (pool == 1 or t_ == 1):
            result = _run_on_stream(proc, samples, reference, ctx, cps, outputs=True)
            weights, outputs = result.weights, result.outputs
        elif workers is None and scheduler is None:
            weights, outputs = _record_on_threads(proc, samples, reference, batch.look,
                                                  sc.array.positions, with_ref, look_dir,
                                                  cps, pool, fb)
        else:
            weights, outputs = _record_on_cluster(sc, proc, t_, k, cps, with_ref, workers,
                                                  scheduler)
    except (SpecError, ValueError) as exc:
        raise SpecError(f"'{proc.spec(defaults=False, label=False)}' cannot be recorded as a reference: it needs what "
                        f"a candidate implementation is not given ({exc}); give explicit "
                        "settings (e.g. a numeric step) or choose an adaptive method",
                        path="processor", value=proc.spec(defaults=False, label=False)) from None
    if not (np.all(np.isfinite(weights)) and np.all(np.isfinite(outputs))):
        raise SpecError(f"'{proc.spec(defaults=False, label=False)}' produced non-finite weights on this scene; nothing "
                        "written", path="processor", value=proc.spec(defaults=False, label=False))

    # truth: scored at snapshot index c, the first snapshot each weight is applied to
    m = weights.shape[-1]
    if m != n * taps:
        raise ValueError(f"{proc.method} returned weights of {m} entries, not {n} x {taps}")
    space_time = bool(sc.wideband) or taps > 1
    src = sc.desired
    power = src.power * src.active(cps).astype(float)    # (C,)
    signal = layout = None
    if space_time:
        moments = np.zeros(1, dtype=np.int64) if sc.stationary else cps
        size = 2 * t_ * len(moments) * m * m
        if size > _MAX_TRUTH_VALUES:
            raise InputError(f"the space-time truth of {t_} cases ({len(moments)} x 2 "
                             f"matrices of {m} x {m} per case) is too big to keep as test "
                             f"vectors (limit {_MAX_TRUTH_VALUES} values)",
                             allowed="fewer trials, taps, bins or checkpoints")
        cov = wideband.space_time_covariance(batch, taps, moments)             # (T, Mo, M, M)
        signal = wideband.space_time_covariance(batch, taps, moments, "signal")
        sinr_db = to_db(output_sinr_space_time(weights, signal, cov))           # (T, C)
        if sc.stationary:
            cov, signal = cov[:, 0], signal[:, 0]
        steer = batch.desired_steering() if sc.stationary else batch.desired_steering(cps)
        layout = weight_layout(len(cps), n, taps, proc.method,
                               proc.params.get("bins") if proc.method == "subband" else None)
    elif sc.stationary:
        cov = batch.covariance()                         # (T, N, N)
        steer = batch.desired_steering()                 # (T, N)
        sinr_db = to_db(output_sinr(weights, steer[:, None], cov[:, None], power[None, :]))
    else:
        cov = batch.covariance(cps)                      # (T, C, N, N)
        steer = batch.desired_steering(cps)              # (T, C, N)
        sinr_db = to_db(output_sinr(weights, steer, cov, power[None, :]))      # (T, C)
    version = SPACE_TIME_FORMAT_VERSION if space_time else FORMAT_VERSION

    versions = library_versions()
    stage = StagedFolder(out)            # the shared run-folder life cycle
    tmp = stage.path
    try:
        names = [f"case-{i:04d}" for i in range(t_)]
        for i, name in enumerate(names):
            folder = tmp / name
            folder.mkdir()
            write_npy(folder / "samples.npy", samples[i])
            write_npy(folder / "steering.npy", np.asarray(batch.look, dtype=complex))
            if with_ref:
                write_npy(folder / "reference.npy", reference[i])
            write_npy(folder / "checkpoints.npy", cps.astype(np.int64))
            meta = {
                "case": i, "trial": int(batch.first_trial + i), "method": proc.method,
                "spec": proc.spec(defaults=False, label=False), "label": proc.label, "params": proc.params,
                "uses_reference": with_ref,
                "stream": "received data" if with_ref else "training data",
                "noise_power": 1.0, "elements": n, "snapshots": k,
                "checkpoints": cps.tolist(), "look_direction": list(look_dir),
                "positions": sc.array.positions.tolist(),
            }
            if space_time:
                meta.update({"fractional_bandwidth": fb, "weights": layout})
            write_json(folder / "case.json", meta)
            write_sigmf(folder / "samples", samples[i], cps, description=(
                f"adapt reference case {i} of scene '{sc.name}' (seed {sc.seed}, trial "
                f"{batch.first_trial + i}): the {n}-element {'received' if with_ref else 'training'}"
                f" snapshots '{proc.spec(defaults=False, label=False)}' adapts on; one sample per snapshot (sample "
                "rate normalised to 1), element e is channel e"))
            write_npy(folder / "weights.npy", weights[i])
            write_npy(folder / "outputs.npy", outputs[i])
            write_npy(folder / "sinr_db.npy", sinr_db[i])
            write_npy(folder / "truth_covariance.npy", cov[i])
            if space_time:
                write_npy(folder / "truth_signal_covariance.npy", signal[i])
            write_npy(folder / "truth_steering.npy", steer[i])
            truth = {
                "signal_power": src.power, "signal_power_db": src.power_db,
                "signal_power_at_checkpoints": power.tolist(),
                "moments": "stationary" if sc.stationary else "snapshot index c of each checkpoint",
                "noise_power": 1.0,
            }
            if space_time:
                truth["sinr"] = ("w^H R_s w / (w^H R_in w): R_s truth_signal_covariance.npy, "
                                 "R_in truth_covariance.npy, entries in the weights' order")
            write_json(folder / "truth.json", truth)
        write_json(tmp / "tolerances.json", {"tolerances": tol, "metrics":
                                             SPACE_TIME_METRICS if space_time else METRICS})
        info = {
            "format": FORMAT, "format_version": version, "scene": sc.name,
            "scene_file": sc.source_file, "seed": int(sc.seed), "processor": proc.spec(defaults=False, label=False),
            "method": proc.method, "label": proc.label, "trials": t_, "snapshots": k,
            "elements": n, "checkpoints": cps.tolist(), "cases": names,
            "uses_reference": with_ref, "versions": versions,
            "scene_mapping": sc.resolved or scene_to_mapping(sc),
        }
        if space_time:
            info.update({"fractional_bandwidth": fb, "weights": layout})
        write_json(tmp / "reference.json", info)
        write_manifest(tmp, {"format": FORMAT, "format_version": version,
                             "versions": versions})
        stage.commit()                    # replaces an empty folder, refuses a non-empty one
    except BaseException:
        stage.discard()
        raise
    return out


# ============================================================================ SigMF
SIGMF_VERSION_FALLBACK = "1.2.0"


def _sigmf_meta(samples: np.ndarray, data: bytes, checkpoints, description: str,
                version: str, sha512: str) -> dict:
    k, n = samples.shape
    annotations = []
    c = [int(v) for v in checkpoints]
    if c[0] > 0:
        annotations.append({"core:sample_start": 0, "core:sample_count": c[0],
                            "core:label": "initial", "core:comment":
                            "before the first checkpoint: the processor's initial weight"})
    for lo, hi in _held_segments(np.asarray(c), k):
        if hi > lo:
            annotations.append({"core:sample_start": lo, "core:sample_count": hi - lo,
                                "core:label": f"after {lo}", "core:comment":
                                f"held weight after {lo} snapshots (checkpoint {lo})"})
    return {
        "global": {"core:datatype": "cf32_le", "core:version": version,
                   "core:num_channels": int(n), "core:offset": 0, "core:sample_rate": 1.0,
                   "core:description": description, "core:recorder": f"adapt {__version__}",
                   "core:sha512": sha512},
        "captures": [{"core:sample_start": 0}],
        "annotations": annotations,
    }


def write_sigmf(base: str | os.PathLike, samples: np.ndarray, checkpoints,
                description: str = "", use_library: bool | None = None) -> tuple[Path, Path]:
    """Write ``base.sigmf-data`` and ``base.sigmf-meta`` for snapshots (K, N).

    SigMF (signal metadata format, sigmf.org, specification 1.2): the data file is raw
    little-endian complex float32 (``cf32_le``), the N elements as N channels interleaved
    per snapshot (``core:num_channels`` = N); the meta file holds the core global fields
    (datatype, version, num_channels, sample_rate = 1: one sample per snapshot, a
    normalised rate; description; recorder ``adapt <version>``; sha512 of the data), one
    capture from sample 0, and annotations marking each held-weight segment. Uses the
    ``sigmf`` package (optional extra ``adapt[sigmf]``) to build and validate the
    metadata when it is installed, else an equivalent hand-written JSON. Both files are
    written atomically. Returns (data path, meta path).
    """
    import hashlib
    x = np.asarray(samples)
    if x.ndim != 2:
        raise ValueError(f"samples must be (snapshots, elements), got shape {x.shape}")
    base = Path(base)
    data_path = base.with_name(base.name + ".sigmf-data")
    meta_path = base.with_name(base.name + ".sigmf-meta")
    data = np.ascontiguousarray(x, dtype="<c8").tobytes()
    atomic_write_bytes(data_path, data)
    sha = hashlib.sha512(data).hexdigest()
    try:
        if use_library is False:
            raise ImportError
        from sigmf import __specification__ as spec_version
        from sigmf import sigmffile
    except ImportError:
        if use_library:
            raise
        meta = _sigmf_meta(x, data, checkpoints, description, SIGMF_VERSION_FALLBACK, sha)
        atomic_write_text(meta_path, json.dumps(meta, indent=4) + "\n")
        return data_path, meta_path
    meta = _sigmf_meta(x, data, checkpoints, description, spec_version, sha)
    handle = sigmffile.SigMFFile(metadata=meta)
    handle.set_data_file(data_path)            # checks the sha512 against the data file
    handle.validate()                          # the standard's JSON schema
    atomic_write_text(meta_path, handle.dumps(pretty=True) + "\n")
    return data_path, meta_path


# ============================================================================ loading
@dataclass(frozen=True)
class CaseInputs:
    """What a candidate implementation gets for one case (read-only).

    samples: (K, N) complex, rows are snapshots; steering: (N,) assumed look steering;
    reference: (K,) reference waveform, or None for methods that do not use one;
    checkpoints: (C,) int64 snapshot counts; noise_power: float; params: the processor's
    parameters (read-only mapping); method, spec: the processor; positions: (N, 3)
    nominal element positions in wavelengths; look_direction: (azimuth, elevation) deg;
    name: the case folder name; taps: L, the taps per element of the expected weights (1:
    spatial; the sub-band processor's bins F); fractional_bandwidth: the scene's B (0
    when narrowband). Return weights (C, N L), row i after checkpoints[i] snapshots,
    applied as y = w^H z (column l N + n: element n delayed by l snapshots, tap 0 the
    newest; z from :func:`stack_snapshots`; for L = 1 simply (C, N) and y = w^H x).
    """
    name: str
    samples: np.ndarray
    steering: np.ndarray
    reference: np.ndarray | None
    checkpoints: np.ndarray
    noise_power: float
    params: types.MappingProxyType
    method: str
    spec: str
    positions: np.ndarray
    look_direction: tuple
    taps: int = 1
    fractional_bandwidth: float = 0.0


@dataclass
class ReferenceCase:
    """One case of a reference set: inputs, expected outputs and truth."""
    name: str
    folder: Path
    info: dict
    samples: np.ndarray
    steering: np.ndarray
    reference: np.ndarray | None
    checkpoints: np.ndarray
    weights: np.ndarray
    outputs: np.ndarray
    sinr_db: np.ndarray
    truth_covariance: np.ndarray
    truth_steering: np.ndarray
    signal_power: np.ndarray
    #: space-time sets: the wanted source's true space-time covariance R_s (M, M) or
    #: (C, M, M); None for a set of spatial weights of a narrowband scene
    signal_covariance: np.ndarray | None = None
    #: taps L of the expected weights (weights (C, N L))
    taps: int = 1

    @property
    def space_time(self) -> bool:
        """True for a space-time set (SINR from the space-time covariances)."""
        return self.signal_covariance is not None

    def inputs(self) -> CaseInputs:
        """Read-only inputs for a candidate (fresh read-only copies each call)."""
        def ro(a):
            if a is None:
                return None
            b = np.array(a, copy=True)
            b.setflags(write=False)
            return b
        params = json.loads(json.dumps(self.info.get("params", {})))
        look = self.info.get("look_direction") or [None, None]
        return CaseInputs(name=self.name, samples=ro(self.samples), steering=ro(self.steering),
                          reference=ro(self.reference), checkpoints=ro(self.checkpoints),
                          noise_power=float(self.info.get("noise_power", 1.0)),
                          params=types.MappingProxyType(params),
                          method=str(self.info.get("method", "")),
                          spec=str(self.info.get("spec", "")),
                          positions=ro(np.asarray(self.info.get("positions", []), float)),
                          look_direction=tuple(look), taps=int(self.taps),
                          fractional_bandwidth=float(self.info.get("fractional_bandwidth",
                                                                   0.0)))


@dataclass
class ReferenceSet:
    """A checked reference set: ``info`` (reference.json), ``tolerances`` and cases."""
    folder: Path
    info: dict
    tolerances: dict
    cases: list[ReferenceCase]


def _corrupt(message: str, file=None) -> CorruptReferenceError:
    return CorruptReferenceError(message, file=None if file is None else str(file))


def case_files(with_reference: bool, space_time: bool = False) -> tuple[str, ...]:
    """The files of one recorder-made case folder (``reference.npy`` only for methods
    that train on the reference waveform, ``truth_signal_covariance.npy`` only in a
    space-time set)."""
    return (_CASE_FILES + (("reference.npy",) if with_reference else ())
            + (("truth_signal_covariance.npy",) if space_time else ()))


def _read_regular(path: Path, limit: int) -> bytes:
    """The bytes of a regular file opened without following links or blocking
    (at most ``limit`` bytes; InputError otherwise)."""
    flags = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0)
    try:
        fd = os.open(path, flags)
    except FileNotFoundError:
        raise
    except OSError as exc:
        raise _corrupt(f"cannot be opened as a regular file ({exc.strerror or exc}); "
                       "symbolic links are refused", path) from None
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise _corrupt("is not a regular file", path)
        if st.st_size > limit:
            raise _corrupt(f"is {st.st_size:,} bytes, more than a reference set's file "
                           f"may hold ({limit:,})", path)
        chunks, left = [], st.st_size + 1
        while left > 0:
            b = os.read(fd, min(left, 1 << 24))
            if not b:
                break
            chunks.append(b)
            left -= len(b)
        data = b"".join(chunks)
    finally:
        os.close(fd)
    if len(data) > limit:
        raise _corrupt(f"grew past {limit:,} bytes while being read", path)
    return data


class _SetFiles:
    """The files of a reference set, checked against its manifest before use.

    Every entry of the folder is found without following links: only regular files and
    the case folders, no symbolic links, FIFOs or devices, nothing deeper than one
    folder. The manifest must list exactly the files found (paths relative to the set,
    nothing outside it), each with its size and sha256. A file is read once, through a
    descriptor opened without following links and without blocking, its size compared
    with the manifest before reading and its digest after: the bytes checked are the
    bytes used."""

    def __init__(self, root: Path):
        self.root = root
        self.found = self._scan()
        self.listed = self._manifest()
        self.used: set[str] = set()
        problems = [f"{rel}: listed in the manifest but missing"
                    for rel in sorted(set(self.listed) - set(self.found))]
        problems += [f"{rel}: not listed in the manifest (every file of a set must be)"
                     for rel in sorted(set(self.found) - set(self.listed))]
        problems += [f"{rel}: {self.found[rel]:,} bytes, the manifest says "
                     f"{self.listed[rel][1]:,} (file changed or corrupt)"
                     for rel in sorted(set(self.found) & set(self.listed))
                     if self.found[rel] != self.listed[rel][1]]
        if problems:
            shown = "; ".join(problems[:10]) + (f"; and {len(problems) - 10} more"
                                                if len(problems) > 10 else "")
            raise CorruptReferenceError(
                f"the reference set does not match its manifest: {shown}", file=str(root))

    def _scan(self) -> dict[str, int]:
        """relative path -> size of every regular file (InputError for anything else)."""
        found: dict[str, int] = {}

        def entries(folder: Path, rel: str):
            try:
                with os.scandir(folder) as it:
                    items = sorted(it, key=lambda e: e.name)
            except OSError as exc:
                raise _corrupt(f"cannot list the folder ({exc.strerror or exc})", folder) from None
            if len(items) > 4 * _MAX_CASES:
                raise _corrupt(f"holds {len(items):,} entries; not a reference set", folder)
            for e in items:
                yield e, f"{rel}{e.name}"

        for entry, rel in entries(self.root, ""):
            if entry.is_symlink():
                raise _corrupt("is a symbolic link; a reference set holds only its own "
                               "regular files", self.root / rel)
            if entry.is_dir(follow_symlinks=False):
                if not _CASE_NAME.fullmatch(entry.name):
                    raise _corrupt("unexpected folder in a reference set (case folders are "
                                   "named case-NNNN)", self.root / rel)
                for sub, subrel in entries(Path(entry.path), rel + "/"):
                    if sub.is_symlink() or not sub.is_file(follow_symlinks=False):
                        raise _corrupt("is not a regular file (symbolic link, folder, FIFO "
                                       "or device); a case folder holds only its own regular "
                                       "files", self.root / subrel)
                    found[subrel] = sub.stat(follow_symlinks=False).st_size
            elif entry.is_file(follow_symlinks=False):
                if rel != _MANIFEST:
                    found[rel] = entry.stat(follow_symlinks=False).st_size
            else:
                raise _corrupt("is not a regular file or folder (FIFO, socket or device)",
                               self.root / rel)
        return found

    def _manifest(self) -> dict[str, tuple[str, int]]:
        path = self.root / _MANIFEST
        try:
            data = _read_regular(path, _MAX_JSON_BYTES)
        except FileNotFoundError:
            raise CorruptReferenceError(f"the reference set does not match its manifest: "
                                        f"{path} is missing", file=str(self.root)) from None
        try:
            doc = json.loads(data.decode("utf-8"))
            files = doc["files"]
            if not isinstance(files, dict):
                raise TypeError
        except (ValueError, KeyError, TypeError, UnicodeDecodeError, RecursionError):
            raise CorruptReferenceError(f"the reference set does not match its manifest: "
                                        f"{path} is not a readable manifest",
                                        file=str(self.root)) from None
        listed = {}
        for rel, entry in files.items():
            parts = rel.split("/")
            if (not rel or rel.startswith("/") or "\\" in rel or len(parts) > 2
                    or any(p in ("", ".", "..") for p in parts) or rel == _MANIFEST):
                raise _corrupt(f"lists {_show_text(rel)}, which is not a file inside the set "
                               "(paths are relative, at most one folder deep, no '..')", path)
            if (not isinstance(entry, dict) or not isinstance(entry.get("sha256"), str)
                    or isinstance(entry.get("bytes"), bool)
                    or not isinstance(entry.get("bytes"), int) or entry["bytes"] < 0):
                raise _corrupt(f"the entry of {_show_text(rel)} needs sha256 (text) and bytes "
                               "(a whole number)", path)
            listed[rel] = (entry["sha256"], entry["bytes"])
        return listed

    def read(self, rel: str, limit: int = 0) -> bytes:
        """The checked bytes of the listed file ``rel``."""
        path = self.root / rel
        if rel not in self.listed:
            raise CorruptReferenceError("the reference set does not match its manifest: "
                                        f"{rel}: missing from the manifest and the folder",
                                        file=str(self.root))
        digest, size = self.listed[rel]
        try:
            data = _read_regular(path, min(size, limit or size))
        except FileNotFoundError:
            raise _corrupt("missing", path) from None
        if len(data) != size or hashlib.sha256(data).hexdigest() != digest:
            raise CorruptReferenceError(
                f"the reference set does not match its manifest: {rel}: sha256 does not "
                "match the manifest (file changed or corrupt)", file=str(self.root))
        self.used.add(rel)
        return data

    def require_exactly(self, expected: set[str]) -> None:
        """Refuse files a recorder-made set would not hold and missing ones."""
        extra = sorted(set(self.found) - expected)
        missing = sorted(expected - set(self.found))
        if extra:
            raise _corrupt(f"{extra[0]} is not part of a reference set"
                           + (f" (and {len(extra) - 1} more)" if len(extra) > 1 else ""),
                           self.root)
        if missing:
            raise CorruptReferenceError("the reference set does not match its manifest: "
                                        f"{missing[0]}: missing", file=str(self.root))

    def check_rest(self) -> None:
        """Digest every listed file not read yet (e.g. the SigMF copy of the samples)."""
        for rel in sorted(set(self.listed) - self.used):
            self.read(rel)


def _show_text(text) -> str:
    """A value from a file as a short, printable quoted text."""
    return repr(str(text)[:120])


def _read_json(files: _SetFiles, rel: str) -> dict:
    path = files.root / rel
    data = files.read(rel, _MAX_JSON_BYTES)
    try:
        doc = json.loads(data.decode("utf-8"))
    except (ValueError, UnicodeDecodeError, RecursionError):
        raise _corrupt("not readable JSON", path) from None
    if not isinstance(doc, dict):
        raise _corrupt("expected a JSON object", path)
    return doc


def parse_npy(data: bytes, where) -> np.ndarray:
    """An array from the bytes of a ``.npy`` file, never unpickling: the header is read
    first, object (pickled) data refused, and the data size the header describes must
    equal the bytes that follow it (a header claiming terabytes is refused before any
    allocation). CorruptReferenceError naming ``where`` otherwise."""
    import io as _io
    fmt = np.lib.format
    if not data.startswith(b"\x93NUMPY"):
        raise _corrupt("not a readable .npy array: it does not start with the NumPy "
                       "header (random or damaged bytes)", where)
    fh = _io.BytesIO(data)
    try:
        version = fmt.read_magic(fh)
        if version == (1, 0):
            shape, fortran, dtype = fmt.read_array_header_1_0(fh)
        elif version == (2, 0):
            shape, fortran, dtype = fmt.read_array_header_2_0(fh)
        else:
            raise ValueError(f".npy format version {version} is not supported")
    except (ValueError, TypeError, SyntaxError, EOFError) as exc:
        raise _corrupt(f"not a readable .npy array (bad header: {exc})", where) from None
    if dtype.hasobject:
        raise _corrupt("not a readable .npy array: it holds Python objects (pickled "
                       "data), which are never loaded", where)
    if dtype.kind not in "biufc" or dtype.fields is not None or dtype.subdtype is not None:
        raise _corrupt(f"not a readable .npy array: it holds {dtype} values, not numbers",
                       where)
    count = 1
    for d in shape:
        count *= int(d)
    offset = fh.tell()
    need = count * dtype.itemsize
    if need != len(data) - offset:
        raise _corrupt(f"not a readable .npy array: its header describes {need:,} bytes of "
                       f"data ({shape} {dtype}) but the file holds {len(data) - offset:,}",
                       where)
    a = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
    return a.reshape(shape, order="F" if fortran else "C").copy()


def _read_array(files: _SetFiles, rel: str, shape: tuple, complex_: bool = True) -> np.ndarray:
    """Read one listed .npy (never unpickling), check its shape and that it is finite."""
    path = files.root / rel
    a = parse_npy(files.read(rel, _MAX_ARRAY_BYTES), path)
    if a.dtype.kind not in ("c", "f", "i", "u"):
        raise _corrupt(f"holds {a.dtype} values, not numbers", path)
    if a.shape != tuple(shape):
        raise _corrupt(f"has shape {a.shape}, expected {tuple(shape)}", path)
    if not np.all(np.isfinite(a)):
        bad = int(np.size(a) - np.count_nonzero(np.isfinite(a)))
        raise _corrupt(f"holds {bad} NaN or infinite value(s)", path)
    return a.astype(complex) if complex_ else a


def _case_names(names, path: Path) -> list[str]:
    """The case list of reference.json: recorder-made names ``case-0000, case-0001, ...``
    in order, each once, at most :data:`_MAX_CASES`."""
    if not isinstance(names, list) or not names:
        raise _corrupt("lists no cases", path)
    if len(names) > _MAX_CASES:
        raise _corrupt(f"lists {len(names):,} cases; a set holds at most {_MAX_CASES}", path)
    expected = [f"case-{i:04d}" for i in range(len(names))]
    for i, (name, want) in enumerate(zip(names, expected)):
        if not isinstance(name, str) or not _CASE_NAME.fullmatch(name):
            raise _corrupt(f"bad case name {_show_text(name)} at cases[{i}]: only the names "
                           "the recorder writes (case-0000, case-0001, ...) are accepted", path)
        if name != want:
            raise _corrupt(f"cases[{i}] is {name!r}, expected {want!r}: the recorder lists "
                           "case-0000, case-0001, ... in order, each once", path)
    return list(names)


def _checked_layout(layout, path: Path) -> dict:
    """A space-time set's ``weights`` mapping, checked: whole numbers ``elements`` N (1 ..
    4096) and ``taps`` L (1 .. 256, ``bins`` equal to it when given), N L at most
    16384, ``shape`` [C, N L] with C >= 1, ``column`` ``"l*N + n"``."""
    def whole(value, low, high):
        return type(value) is int and low <= value <= high

    shape = layout.get("shape") if isinstance(layout, dict) else None
    if not (isinstance(layout, dict) and whole(layout.get("elements"), 1, 4096)
            and whole(layout.get("taps"), 1, _MAX_TAPS)
            and layout["elements"] * layout["taps"] <= _MAX_WIDTH
            and isinstance(shape, list) and len(shape) == 2
            and whole(shape[0], 1, _MAX_VALUES)
            and whole(shape[1], 1, _MAX_WIDTH)
            and shape[1] == layout["elements"] * layout["taps"]):
        got = _show_text(json.dumps(layout)[:200] if isinstance(layout, (dict, list)) else layout)
        raise _corrupt("the space-time weights mapping 'weights' must give shape [C, N L], "
                       "elements N (1 .. 4096) and taps L (1 .. 256) as whole numbers, "
                       f"N L at most {_MAX_WIDTH} (got {got})", path)
    if "bins" in layout and layout["bins"] != layout["taps"]:
        raise _corrupt("weights: bins must equal taps (the sub-band synthesis has one tap "
                       "per bin)", path)
    if layout.get("column") != "l*N + n":
        raise _corrupt(f"weights: column order {_show_text(layout.get('column'))} is not "
                       "'l*N + n', the one this version reads", path)
    return layout


def _set_layout(info: dict, path: Path) -> dict | None:
    """The checked ``weights`` mapping of a space-time set (format version 2); None for
    a set of spatial weights of a narrowband scene (version 1, no such mapping)."""
    version = info.get("format_version")
    if type(version) is not int or version not in (FORMAT_VERSION, SPACE_TIME_FORMAT_VERSION):
        raise _corrupt(f"format_version {_show_text(version)} is not one this version reads "
                       f"({FORMAT_VERSION}: spatial weights, {SPACE_TIME_FORMAT_VERSION}: "
                       "space-time weights)", path)
    if version == FORMAT_VERSION:
        if "weights" in info or "fractional_bandwidth" in info:
            raise _corrupt("a version 1 set holds spatial weights of a narrowband scene: no "
                           "'weights' or 'fractional_bandwidth' (space-time sets are version "
                           f"{SPACE_TIME_FORMAT_VERSION})", path)
        return None
    layout = _checked_layout(info.get("weights"), path)
    fb = info.get("fractional_bandwidth")
    if isinstance(fb, bool) or not isinstance(fb, (int, float)) or not 0 <= fb <= 1:
        raise _corrupt("fractional_bandwidth must be a number in [0, 1] in a space-time set",
                       path)
    return layout


def load_reference(folder) -> ReferenceSet:
    """Read and check a reference set written by :func:`record`.

    Raises CorruptReferenceError (exit code 2) naming the file when the set holds
    anything but its own regular files (symbolic links, FIFOs, devices, unexpected
    files or folders), when the manifest does not list exactly the files of the set
    (unlisted, missing, extra, outside the set) or a file does not match its size and
    sha256, when a file is malformed, or when any array holds NaN or infinity. Arrays
    are read with their header checked against the file size, never unpickled.
    """
    if not isinstance(folder, (str, os.PathLike)):
        raise InputError("expected the path of a reference-set folder",
                         value=type(folder).__name__)
    root = Path(folder)
    if not root.is_dir():
        raise _corrupt("no such reference-set folder", root)
    files = _SetFiles(root)
    info = _read_json(files, "reference.json")
    if info.get("format") != FORMAT:
        raise _corrupt(f"not an adapt reference set (format {_show_text(info.get('format'))})",
                       root / "reference.json")
    tol_doc = _read_json(files, "tolerances.json")
    try:
        tolerances = parse_tolerances(tol_doc.get("tolerances", {}))
    except InputError as exc:
        raise _corrupt(exc.message, root / "tolerances.json") from None
    names = _case_names(info.get("cases"), root / "reference.json")
    if "trials" in info and info["trials"] != len(names):
        raise _corrupt(f"says {_show_text(info['trials'])} trials but lists {len(names)} cases",
                       root / "reference.json")
    with_ref = info.get("uses_reference")
    if not isinstance(with_ref, bool):
        raise _corrupt("uses_reference must be true or false", root / "reference.json")
    layout = _set_layout(info, root / "reference.json")
    files.require_exactly({"reference.json", "tolerances.json"}
                          | {f"{name}/{f}" for name in names
                             for f in case_files(with_ref, layout is not None)})
    cases = [_load_case(files, name, with_ref, layout, info.get("fractional_bandwidth"))
             for name in names]
    files.check_rest()
    return ReferenceSet(folder=root, info=info, tolerances=tolerances, cases=cases)


def _finite_numbers(value, shape, what: str, path: Path) -> np.ndarray:
    try:
        a = np.asarray(value, dtype=float)
    except (TypeError, ValueError, OverflowError):
        a = None
    if a is None or a.shape != shape or not np.all(np.isfinite(a)):
        raise _corrupt(f"{what} must be {shape} finite numbers", path)
    return a


def _load_case(files: _SetFiles, name: str, with_ref: bool, layout: dict | None = None,
               fractional_bandwidth=None) -> ReferenceCase:
    folder = files.root / name
    meta = _read_json(files, f"{name}/case.json")
    try:
        k, n = meta["snapshots"], meta["elements"]
        if not all(isinstance(v, int) and not isinstance(v, bool) for v in (k, n)):
            raise TypeError
        if not (1 <= k <= _MAX_VALUES and 1 <= n <= 4096 and k * n <= _MAX_VALUES):
            raise ValueError
        if meta["uses_reference"] is not with_ref:
            raise _corrupt("uses_reference differs from reference.json", folder / "case.json")
    except (KeyError, TypeError, ValueError):
        raise _corrupt("lacks snapshots, elements or uses_reference (whole numbers in range "
                       "and true/false)", folder / "case.json") from None
    _finite_numbers(meta.get("positions"), (n, 3), "positions", folder / "case.json")
    look = meta.get("look_direction")
    if look is not None:
        _finite_numbers(look, (2,), "look_direction", folder / "case.json")
    noise = _finite_numbers(meta.get("noise_power", 1.0), (), "noise_power", folder / "case.json")
    if not float(noise) > 0:
        raise _corrupt("noise_power must be positive", folder / "case.json")
    if not isinstance(meta.get("params", {}), dict) or not all(
            isinstance(meta.get(key, ""), str) for key in ("method", "spec")):
        raise _corrupt("params must be a mapping, method and spec text", folder / "case.json")
    cps_raw = parse_npy(files.read(f"{name}/checkpoints.npy", _MAX_ARRAY_BYTES),
                        folder / "checkpoints.npy")
    if cps_raw.ndim != 1 or cps_raw.dtype.kind not in "iu":
        raise _corrupt("must be a 1-D integer array", folder / "checkpoints.npy")
    try:
        cps = normalised_checkpoints(cps_raw, k)
    except ValueError as exc:
        raise _corrupt(str(exc), folder / "checkpoints.npy") from None
    if len(cps) != len(cps_raw) or np.any(cps != cps_raw):
        raise _corrupt("checkpoints must be sorted and distinct", folder / "checkpoints.npy")
    c = len(cps)
    m = n
    if layout is not None:          # a space-time set: the same mapping in every case
        if meta.get("weights") != layout or layout["elements"] != n or layout["shape"][0] != c:
            raise _corrupt("its weights mapping must equal reference.json's and match the "
                           f"case's {n} elements and {c} checkpoints", folder / "case.json")
        if meta.get("fractional_bandwidth") != fractional_bandwidth:
            raise _corrupt("fractional_bandwidth differs from reference.json",
                           folder / "case.json")
        m = layout["shape"][1]
    elif "weights" in meta or "fractional_bandwidth" in meta:
        raise _corrupt("a version 1 set holds spatial weights: no weights mapping or "
                       "fractional_bandwidth", folder / "case.json")
    truth = _read_json(files, f"{name}/truth.json")
    power = _finite_numbers(truth.get("signal_power_at_checkpoints"), (c,),
                            "signal_power_at_checkpoints", folder / "truth.json")
    stationary = truth.get("moments") == "stationary"

    def arr(fname, shape, complex_=True):
        return _read_array(files, f"{name}/{fname}", shape, complex_)

    return ReferenceCase(
        name=name, folder=folder, info=meta,
        samples=arr("samples.npy", (k, n)),
        steering=arr("steering.npy", (n,)),
        reference=arr("reference.npy", (k,)) if with_ref else None,
        checkpoints=cps,
        weights=arr("weights.npy", (c, m)),
        outputs=arr("outputs.npy", (k,)),
        sinr_db=arr("sinr_db.npy", (c,), complex_=False).astype(float),
        truth_covariance=arr("truth_covariance.npy", (m, m) if stationary else (c, m, m)),
        truth_steering=arr("truth_steering.npy", (n,) if stationary else (c, n)),
        signal_power=power,
        signal_covariance=None if layout is None else
        arr("truth_signal_covariance.npy", (m, m) if stationary else (c, m, m)),
        taps=1 if layout is None else layout["taps"],
    )


# ============================================================================ implementations
def reference_implementation(case: CaseInputs) -> np.ndarray:
    """The trusted implementation: rebuild the processor from ``case.method`` and
    ``case.params`` and run it on ``case.samples`` (and ``case.reference``).

    This is also the worked example of the Python interface: ``adapt verify DIR
    --python adapt.studies.reference:reference_implementation`` passes on any set recorded by
    this version (the expected weights were produced exactly this way), space-time sets
    included (``case.params`` holds ``taps``; the sub-band processor is rebuilt from its
    ``bins``; ``case.fractional_bandwidth`` gives a wideband look vector).
    """
    proc = _rebuild(case.method, case.params)
    x = np.asarray(case.samples, dtype=complex)[None]
    ref = None if case.reference is None else np.asarray(case.reference, dtype=complex)[None]
    ctx = _candidate_context(case.steering, case.positions, 1, case.noise_power,
                             ref is not None, case.look_direction
                             if None not in tuple(case.look_direction) else None,
                             case.fractional_bandwidth)
    return _run_on_stream(proc, x, ref, ctx, np.asarray(case.checkpoints), False).weights[0]


class CandidateLoadError(InputError):
    """The candidate's own code failed (raised, exited or was interrupted) while its
    module was imported: :func:`verify` reports it as every case's error."""


def load_implementation(target: str) -> Callable:
    """``MODULE:FUNCTION`` or ``path/to/file.py:FUNCTION`` -> the callable (InputError
    when it cannot be found; :class:`CandidateLoadError` when the module's own code
    raises or exits while importing, ``SystemExit`` included). The current folder is
    searched for modules."""
    text = str(target)
    where, sep, func = text.rpartition(":")
    if not sep or not where or not func:
        raise InputError("expected MODULE:FUNCTION or path/to/file.py:FUNCTION", value=text)
    try:
        if where.endswith(".py") or os.sep in where or "/" in where:
            path = Path(where)
            if not path.is_file():
                raise InputError("no such Python file", file=where)
            mod_name = f"_adapt_candidate_{abs(hash(str(path.resolve())))}"
            spec = importlib.util.spec_from_file_location(mod_name, path)
            module = importlib.util.module_from_spec(spec)
            sys.modules[mod_name] = module
            spec.loader.exec_module(module)
        else:
            added = os.getcwd() not in sys.path
            if added:
                sys.path.insert(0, os.getcwd())
            try:
                module = importlib.import_module(where)
            finally:
                if added:
                    sys.path.remove(os.getcwd())
    except InputError:
        raise
    except ModuleNotFoundError as exc:
        if exc.name is not None and where.split(".")[0] != exc.name.split(".")[0]:
            raise CandidateLoadError(f"importing '{where}' failed: {type(exc).__name__}: "
                                     f"{exc}", value=text) from None
        raise InputError(f"cannot import '{where}': {exc}", value=text) from None
    except BaseException as exc:  # noqa: BLE001 - the candidate's code failed or exited
        raise CandidateLoadError(f"importing '{where}' failed: {type(exc).__name__}: {exc}",
                                 value=text) from None
    fn = getattr(module, func, None)
    if fn is None:
        names = [k for k in vars(module) if not k.startswith("_")]
        raise InputError(f"'{where}' has no function '{func}'" + did_you_mean(func, names),
                         value=text)
    if not callable(fn):
        raise InputError(f"'{where}:{func}' is not callable", value=text)
    return fn


# ============================================================================ verify
@dataclass
class CaseResult:
    """Outcome of one case: ``kind`` pass | failure | error; metric arrays (C,) are None
    when the candidate produced no usable weights (NaN where a metric does not apply)."""
    name: str
    kind: str
    message: str = ""
    details: str = ""
    seconds: float = 0.0
    checkpoints: np.ndarray | None = None
    sinr_db: np.ndarray | None = None
    weight_error_db: np.ndarray | None = None
    output_evm_db: np.ndarray | None = None
    #: (metric, checkpoint, value, tolerance, excess) with the largest excess over its
    #: tolerance, if any (excesses of different metrics are in the same unit, dB over
    #: the tolerance, but rank only within a metric: see ``failing``)
    worst: tuple | None = None
    #: every metric beyond its tolerance, each at its worst checkpoint, same tuples
    failing: list = field(default_factory=list)
    #: the complex factor relating the candidate's outputs to the reference's when
    #: they match up to one (only set on a failure it explains)
    scale: complex | None = None

    @property
    def passed(self) -> bool:
        return self.kind == "pass"

    def worst_of(self, metric: str) -> float:
        a = getattr(self, metric)
        if a is None or not np.any(~np.isnan(a)):
            return float("nan")
        return float(np.nanmax(a))


@dataclass
class VerifyReport:
    """All cases of one verify run."""
    folder: Path
    mode: str
    implementation: str
    tolerances: dict
    cases: list[CaseResult] = field(default_factory=list)
    scale_blind: bool = False

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.cases)

    @property
    def counts(self) -> dict:
        return {k: sum(c.kind == k for c in self.cases) for k in ("pass", "failure", "error")}

    @property
    def exit_code(self) -> int:
        return 0 if self.passed else 1

    @property
    def worst(self) -> tuple | None:
        """(case name, metric, checkpoint, value, tolerance, excess) with the largest
        excess over tolerance across all compared cases, or None."""
        best = None
        for c in self.cases:
            if c.worst is not None and (best is None or c.worst[4] > best[5]):
                best = (c.name,) + tuple(c.worst)
        return best

    def worst_by_metric(self) -> dict:
        """metric -> (case name, checkpoint, value, tolerance, excess) of the case with
        the largest value of that metric (cases ranked within each metric only)."""
        out: dict = {}
        for metric in METRICS:
            tol = self.tolerances.get(metric)
            for c in self.cases:
                a = getattr(c, metric)
                if a is None or not np.any(~np.isnan(a)):
                    continue
                i = int(np.nanargmax(a))
                value = float(a[i])
                if metric not in out or value > out[metric][2]:
                    out[metric] = (c.name, int(c.checkpoints[i]), value, tol, value - tol)
        return out


class _CaseFailure(Exception):
    def __init__(self, kind: str, message: str, details: str = ""):
        super().__init__(message)
        self.kind, self.message, self.details = kind, message, details


def _shape_text(case: ReferenceCase) -> tuple[tuple[int, int], str]:
    """The expected weight shape of ``case`` and what its axes are, in words."""
    c, n, taps = len(case.checkpoints), case.samples.shape[1], int(case.taps)
    if taps == 1:
        return (c, n), f"one row per checkpoint ({c}), one column per element ({n})"
    return (c, n * taps), (f"one row per checkpoint ({c}), N x L = {n} x {taps} = {n * taps} "
                           "columns, column l*N + n for element n delayed by l snapshots "
                           "(tap 0 the newest; see 'weights' in case.json)")


class WeightShapeError(InputError):
    """A candidate returned weights of the wrong shape: verify stops there (exit 2).
    ``report`` holds the cases run so far, this one an error and the rest "not run"."""
    report = None


def _check_weights(raw: Any, case: ReferenceCase) -> np.ndarray:
    (c, n), axes = _shape_text(case)
    try:
        w = np.array(raw, copy=True)
        kind = w.dtype.kind
    except BaseException as exc:  # noqa: BLE001 - the candidate's object misbehaved
        raise _CaseFailure("failure", f"returned weights are not an array "
                           f"({type(exc).__name__}: {exc})") from None
    if kind not in "biufc":
        raise _CaseFailure("failure", f"returned {type(raw).__name__} of {w.dtype}, not "
                           f"numeric weights of shape ({c}, {n})")
    if w.shape != (c, n):
        got = str(w.shape) if len(w.shape) <= 8 else f"({w.ndim} dimensions)"
        raise _CaseFailure("shape", f"{case.name}: the candidate's weights have shape {got}, "
                           f"expected {(c, n)}: {axes}")
    bad = ~np.all(np.isfinite(w), axis=1)
    if bad.any():
        rows = np.flatnonzero(bad)
        raise _CaseFailure("failure", f"weights hold NaN or infinity at {bad.sum()} "
                           f"checkpoint(s), first at row {rows[0]}")
    return w.astype(complex)


def _space_time_outputs(w: np.ndarray, samples: np.ndarray, taps: int, lo: int,
                        hi: int) -> np.ndarray:
    """``y_k = w^H z_k`` for snapshots lo <= k < hi of a stream (K, N) and space-time
    weights (N L,) (:func:`stack_snapshots` order), as ``sum_l w_l^H x_{k-l}`` with zeros
    before snapshot 0, without building the stacked snapshots."""
    n = samples.shape[1]
    wl = np.conj(w).reshape(taps, n)
    y = np.zeros(hi - lo, dtype=complex)
    for l_ in range(taps):
        first = max(lo - l_, 0)
        if hi - l_ > first:
            y[first - (lo - l_):] += samples[first:hi - l_] @ wl[l_]
    return y


def _best_scale(yc: np.ndarray, yr: np.ndarray) -> complex:
    """The complex g minimising ``||yc - g yr||`` (least squares): the candidate is
    ``g`` times the reference when the residual vanishes."""
    den = float(np.vdot(yr, yr).real)
    return complex(np.vdot(yr, yc) / den) if den > 0 else 1.0 + 0j


def _scale_text(g: complex) -> str:
    """'1.017' for a real scale, '1.017 at 12.5 degrees' for a complex one."""
    mag, deg = abs(g), float(np.degrees(np.angle(g)))
    if abs(deg) < 0.05:
        return f"{mag:.4g}"
    if abs(abs(deg) - 180.0) < 0.05:
        return f"{-mag:.4g}"
    return f"{mag:.4g} at {deg:.1f} degrees"


def _compare(case: ReferenceCase, w: np.ndarray, tol: dict, scale_blind: bool = False
             ) -> CaseResult:
    cps = case.checkpoints
    k = case.samples.shape[0]
    if case.space_time:
        sinr = np.abs(to_db(output_sinr_space_time(w, case.signal_covariance,
                                                   case.truth_covariance))
                      - np.asarray(case.sinr_db, float))
    else:
        sinr = sinr_difference_db(w, case.truth_steering, case.truth_covariance,
                                  case.signal_power, case.sinr_db)
    if case.taps > 1:
        werr = scaled_weight_error_db(w, case.weights)
    else:
        werr = weight_error_db(w, case.weights, case.steering)
    evm = np.full(len(cps), np.nan)
    raw_evm = np.full(len(cps), np.nan)
    scales = []
    for i, (lo, hi) in enumerate(_held_segments(cps, k)):
        if hi > lo:
            yc = (np.conj(w[i]) @ case.samples[lo:hi].T if case.taps == 1 else
                  _space_time_outputs(w[i], case.samples, case.taps, lo, hi))
            yr = case.outputs[lo:hi]
            g = _best_scale(yc, yr)
            blind = output_evm_db(yc / g, yr) if g != 0 else float(raw_evm[i])
            scales.append((g, blind))
            raw_evm[i] = output_evm_db(yc, yr)
            evm[i] = blind if scale_blind else raw_evm[i]
    failing = []                      # (metric, checkpoint, value, tolerance, excess)
    worst = None
    for metric, values in (("sinr_db", sinr), ("weight_error_db", werr),
                           ("output_evm_db", evm)):
        own = None
        for i, v in enumerate(values):
            if np.isnan(v):
                continue
            excess = float(v - tol[metric])
            item = (metric, int(cps[i]), float(v), float(tol[metric]), excess)
            if own is None or excess > own[4]:
                own = item
        if own is not None:
            if worst is None or own[4] > worst[4]:
                worst = own
            if own[4] > 0:
                failing.append(own)
    res = CaseResult(case.name, "failure" if failing else "pass", checkpoints=cps,
                     sinr_db=sinr, weight_error_db=werr, output_evm_db=evm, worst=worst,
                     failing=failing)
    if not failing:
        return res
    parts = []
    for metric, cp, value, limit, _ in failing:
        count = int(np.sum(getattr(res, metric) > limit))
        parts.append(f"{metric} = {value:.3g} dB at checkpoint {cp} exceeds the tolerance "
                     f"{limit:g} dB" + (f" (at {count} of {len(cps)} checkpoints)"
                                        if count > 1 else ""))
    res.message = "; ".join(parts)
    # a candidate equal to the reference up to a constant factor: say so
    names = {f[0] for f in failing}
    if names == {"output_evm_db"} and not scale_blind and scales:
        g = np.array([x[0] for x in scales])
        fixed = max(x[1] for x in scales)
        if fixed <= tol["output_evm_db"] and np.all(g != 0):
            same = bool(np.all(np.abs(g - g[0]) <= 1e-6 * np.abs(g[0])))
            res.scale = complex(g[0]) if same else None
            hint = (f"matches up to a scale of {_scale_text(g[0])}" if same else
                    f"matches up to a scale per checkpoint ({_scale_text(g[0])} .. "
                    f"{_scale_text(g[-1])})")
            res.message += (f"; the output {hint} (output EVM after removing it: "
                            f"{fixed:.3g} dB): if the scale is arbitrary in your "
                            "implementation, verify with scale_blind (--scale-blind)")
    lines = [f"{'checkpoint':>10} {'sinr_db':>10} {'weight_error_db':>16} {'output_evm_db':>14}"]
    for i, cp_ in enumerate(cps):
        lines.append(f"{int(cp_):>10} {sinr[i]:>10.4g} {werr[i]:>16.4g} {evm[i]:>14.4g}")
    res.details = res.message + "\n" + "\n".join(lines)
    return res


def _run_python(fn: Callable, case: ReferenceCase) -> Any:
    try:
        return fn(case.inputs())
    except BaseException as exc:  # noqa: BLE001 - the candidate's own failure, SystemExit,
        # KeyboardInterrupt and GeneratorExit included: reported as this case's error
        tb = traceback.format_exc(limit=-5)
        what = type(exc).__name__
        text = f"raised {what}: {exc}" if str(exc) else f"raised {what}"
        if isinstance(exc, SystemExit):
            text = f"called sys.exit({exc.code!r}) (SystemExit): a candidate returns weights"
        raise _CaseFailure("error", text, tb) from None


#: bytes of each of the candidate's stdout and stderr kept (the tail)
OUTPUT_TAIL_BYTES = 64 * 1024
#: seconds a command's output is still read after it exited (its pipes may be held open
#: by a process it left behind)
_DRAIN_SECONDS = 0.5
_MARKER = "ADAPT_VERIFY_RUN"


def _printable(text: str) -> str:
    """``text`` with control and other unprintable characters escaped (``\\x1b``), line
    breaks kept: text from a candidate or a file never drives the terminal."""
    return "\n".join(line if line.isprintable() else
                     "".join(c if c.isprintable() else repr(c)[1:-1] for c in line)
                     for line in str(text).split("\n"))


def _tail(data: bytes, lines: int = 12, chars: int = 2000) -> str:
    text = data.decode("utf-8", "replace").rstrip()
    return _printable("\n".join(text.splitlines()[-lines:])[-chars:])


def _command_args(template: str) -> list[str]:
    if not isinstance(template, str):
        raise InputError("a command template is text", value=type(template).__name__)
    try:
        args = shlex.split(template)
    except ValueError as exc:
        raise InputError(f"cannot split the command: {exc}", value=template) from None
    if not args:
        raise InputError("empty command", allowed="e.g. 'python mine.py {case} {out}'")
    joined = " ".join(args)
    for slot in ("{case}", "{out}"):
        if slot not in joined:
            raise InputError(f"the command must contain {slot}", value=template,
                             allowed="'PROGRAM {case} {out}': {case} the folder with the "
                                     "inputs, {out} the .npy file of weights to write")
    return args


def _marked_processes(token: str) -> list[int]:
    """Process ids (other than this one) whose environment carries this run's marker:
    what a candidate started, even in a new session or process group (Linux /proc;
    empty elsewhere)."""
    needle = f"{_MARKER}={token}".encode() + b"\0"
    found = []
    try:
        names = os.listdir("/proc")
    except OSError:
        return found
    me = os.getpid()
    for name in names:
        if not name.isdigit() or int(name) == me:
            continue
        try:
            with open(f"/proc/{name}/environ", "rb") as fh:
                env = fh.read(1 << 20)
        except OSError:
            continue
        if needle in env or env.endswith(needle[:-1]):
            found.append(int(name))
    return found


def _stop_everything(pid: int, token: str) -> None:
    """Kill the candidate's process group and every process left behind that carries
    this run's marker (a grandchild that started its own session)."""
    try:
        os.killpg(pid, signal.SIGKILL)          # the group this run started, only
    except (ProcessLookupError, PermissionError):
        pass
    for _ in range(5):
        left = _marked_processes(token)
        if not left:
            return
        for other in left:
            try:
                os.kill(other, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
        time.sleep(0.02)


def run_bounded(argv: list[str], timeout: float, env: dict | None = None,
                keep: int = OUTPUT_TAIL_BYTES) -> tuple[int | None, bytes, bytes, int]:
    """Run ``argv`` (no shell) in its own session and process group, at most
    ``timeout`` seconds, keeping the last ``keep`` bytes of its stdout and stderr.

    At the timeout, or when the program exits, its process group and every process
    carrying this run's environment marker (so also a grandchild that started a new
    session) are killed; output still arriving through pipes held open by such a
    process is read for at most half a second. Returns (exit code or None when it
    timed out, stdout tail, stderr tail, total bytes of output). OSError when the
    program cannot be started."""
    import secrets
    import selectors
    token = secrets.token_hex(8)
    env = dict(os.environ if env is None else env)
    env[_MARKER] = token
    proc = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, start_new_session=True, env=env)
    bufs = {proc.stdout.fileno(): bytearray(), proc.stderr.fileno(): bytearray()}
    total = 0
    sel = selectors.DefaultSelector()
    for fd in bufs:
        os.set_blocking(fd, False)
        sel.register(fd, selectors.EVENT_READ)
    deadline = time.monotonic() + timeout
    exited_at = None
    timed_out = False
    try:
        while True:
            now = time.monotonic()
            if exited_at is None and proc.poll() is not None:
                exited_at = now
            if exited_at is not None and (not sel.get_map() or now - exited_at > _DRAIN_SECONDS):
                break
            if exited_at is None and now >= deadline:
                timed_out = True
                break
            for key, _ in sel.select(timeout=0.05):
                try:
                    chunk = os.read(key.fd, 1 << 16)
                except BlockingIOError:
                    continue
                except OSError:
                    chunk = b""
                if not chunk:
                    sel.unregister(key.fd)
                    continue
                total += len(chunk)
                buf = bufs[key.fd]
                buf += chunk
                if len(buf) > 2 * keep:
                    del buf[:-keep]
    finally:
        sel.close()
        _stop_everything(proc.pid, token)
        try:
            proc.wait(timeout=5)
        except subprocess.TimeoutExpired:       # pragma: no cover - SIGKILL was sent
            pass
        proc.stdout.close()
        proc.stderr.close()
    out, err = (bytes(buf[-keep:]) for buf in bufs.values())
    return (None if timed_out else proc.returncode), out, err, total


def _run_command(args: list[str], case: ReferenceCase, timeout: float) -> Any:
    work = Path(tempfile.mkdtemp(prefix="adapt-verify-"))
    try:
        inputs = work / case.name
        inputs.mkdir()
        for fname in INPUT_FILES:               # inputs only: the expected outputs stay hidden
            if (case.folder / fname).exists():
                shutil.copyfile(case.folder / fname, inputs / fname)
        out = work / "weights.npy"
        # {case} and {out} are replaced inside each word after splitting: no shell is
        # involved unless the template runs one (see README on quoting)
        argv = [a.replace("{case}", str(inputs)).replace("{out}", str(out)) for a in args]
        env = dict(os.environ, ADAPT_CASE=str(inputs), ADAPT_OUT=str(out))
        try:
            code, _, err, total = run_bounded(argv, timeout, env)
        except OSError as exc:
            raise _CaseFailure("error", f"cannot start {_printable(repr(argv[0]))}: "
                               f"{exc.strerror or exc}") from None
        tail = _tail(err)
        if total > 2 * OUTPUT_TAIL_BYTES:
            tail = (f"[output of {total:,} bytes; the last {OUTPUT_TAIL_BYTES // 1024} KiB "
                    "of stderr kept]\n" + tail)
        if code is None:
            raise _CaseFailure("error", f"timed out after {timeout:g} s (killed)", tail)
        if code != 0:
            last = tail.splitlines()[-1] if tail else "(no error output)"
            raise _CaseFailure("error", f"exited with code {code}: {last}", tail)
        (c, m), _ = _shape_text(case)
        try:
            data = _read_regular(out, 4 * c * m * 16 + 65536)   # room to name a wrong shape
        except FileNotFoundError:
            raise _CaseFailure("error", f"wrote no weights file ({{out}} = {out.name})",
                               tail) from None
        except CorruptReferenceError as exc:
            raise _CaseFailure("failure", f"the weights file is refused: {exc.message}") from None
        try:
            return parse_npy(data, out.name)
        except CorruptReferenceError as exc:
            raise _CaseFailure("failure", f"the weights file is {exc.message}") from None
    finally:
        shutil.rmtree(work, ignore_errors=True)


def verify(reference_set, implementation, tolerances=None, timeout=None,
           scale_blind: bool = False, on_start=None) -> VerifyReport:
    """Run a candidate on every case of a reference set and compare it.

    Parameters
    ----------
    reference_set : a :class:`ReferenceSet` or a folder (checked by
        :func:`load_reference`; CorruptReferenceError when damaged).
    implementation : a callable ``f(case: CaseInputs) -> weights (C, N)``, a
        ``"MODULE:FUNCTION"`` / ``"file.py:FUNCTION"`` text prefixed ``python:``, or a
        command template containing ``{case}`` and ``{out}``.
    tolerances : overrides (mapping or ``NAME=VALUE``) of the set's tolerances.json.
    timeout : seconds per case for commands (default 60).
    scale_blind : compare the output samples after removing the best complex scale per
        checkpoint (for implementations whose weights carry an arbitrary constant
        factor; the SINR and the weight error are scale-free already).
    on_start : called with the (empty) report before the first case runs (the command
        line writes a JUnit file marking every case "not run" there, so a candidate that
        ends the process cannot leave a passing trace).

    Returns
    -------
    VerifyReport
        Per case: crashes (any exception, ``SystemExit`` and ``KeyboardInterrupt``
        included), timeouts and missing output are errors; NaN or a metric beyond
        tolerance are failures; see the module docstring for the metrics.

    Raises
    ------
    WeightShapeError
        (an InputError, exit 2) at the first case whose weights have the wrong shape:
        (C, N), or (C, N L) in a space-time set; its ``report`` marks that case an error
        and the later ones "not run".
    """
    ref = reference_set if isinstance(reference_set, ReferenceSet) else load_reference(reference_set)
    tol = parse_tolerances(tolerances, base=ref.tolerances)
    if timeout is None:
        limit = 60.0
    else:
        try:
            limit = float(timeout)
        except (TypeError, ValueError):
            raise InputError("timeout must be a positive number of seconds",
                             value=timeout) from None
    if not np.isfinite(limit) or limit <= 0:
        raise InputError("timeout must be a positive number of seconds", value=timeout)
    if not isinstance(scale_blind, (bool, np.bool_)):
        raise InputError("scale_blind must be true or false", value=scale_blind)
    load_failure = None
    if callable(implementation):
        mode, label = "python", getattr(implementation, "__qualname__", repr(implementation))
        run = lambda case: _run_python(implementation, case)          # noqa: E731
    elif isinstance(implementation, str) and implementation.startswith("python:"):
        mode, label = "python", implementation[len("python:"):]
        try:
            fn = load_implementation(implementation[len("python:"):])
        except CandidateLoadError as exc:
            load_failure = exc.message
            fn = None
        run = lambda case: _run_python(fn, case)                      # noqa: E731
    elif isinstance(implementation, str):
        args = _command_args(implementation)
        mode, label = "command", implementation
        run = lambda case: _run_command(args, case, limit)            # noqa: E731
    else:
        raise InputError("implementation must be a callable or a command template",
                         value=type(implementation).__name__)
    report = VerifyReport(folder=ref.folder, mode=mode, implementation=label, tolerances=tol,
                          scale_blind=bool(scale_blind))
    if on_start is not None:
        on_start(report)
    for case in ref.cases:
        t0 = time.perf_counter()
        try:
            if load_failure is not None:
                raise _CaseFailure("error", load_failure)
            raw = run(case)
            w = _check_weights(raw, case)
            res = _compare(case, w, tol, scale_blind=bool(scale_blind))
        except _CaseFailure as exc:
            if exc.kind == "shape":     # the candidate reads the set wrongly: stop here
                refused = WeightShapeError(_printable(exc.message))
                res = CaseResult(case.name, "error", _printable(exc.message),
                                 seconds=time.perf_counter() - t0)
                rest = [CaseResult(other.name, "error", f"not run: verify stopped at "
                                   f"{case.name} (weights of the wrong shape)")
                        for other in ref.cases[len(report.cases) + 1:]]
                refused.report = replace(report, cases=report.cases + [res] + rest)
                raise refused from None
            res = CaseResult(case.name, exc.kind, _printable(exc.message),
                             _printable(exc.details or exc.message))
        res.seconds = time.perf_counter() - t0
        report.cases.append(res)
    return report


# ============================================================================ reporting
def _fmt_db(v: float) -> str:
    if np.isnan(v):
        return "-"
    if np.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.2f}"


def format_report(report: VerifyReport) -> str:
    """The terminal table: per case the worst SINR difference, weight error and output
    EVM (dB) and the result naming every failing metric; then, per metric, the case and
    checkpoint where it is worst (metrics in different units are never ranked against
    each other). Text from outside (paths, the candidate's messages) is printed with
    control characters escaped."""
    head = (f"{'case':<12} {'SINR diff dB':>12} {'weight err dB':>13} "
            f"{'output EVM dB':>13}  result")
    lines = [f"verify {report.folder} with {report.mode} '{report.implementation}'",
             "tolerances: " + ", ".join(f"{k} {v:g} dB" for k, v in report.tolerances.items())
             + (" (output EVM scale-blind)" if report.scale_blind else ""),
             head, "-" * len(head)]
    for c in report.cases:
        result = "pass" if c.passed else f"{'FAIL' if c.kind == 'failure' else 'ERROR'}: {c.message}"
        lines.append(f"{c.name:<12} {_fmt_db(c.worst_of('sinr_db')):>12} "
                     f"{_fmt_db(c.worst_of('weight_error_db')):>13} "
                     f"{_fmt_db(c.worst_of('output_evm_db')):>13}  {result}")
    lines.append("-" * len(head))
    ranked = sorted(report.worst_by_metric().items(), key=lambda kv: kv[1][4] <= 0)
    for metric, (name, cp, value, limit, excess) in ranked:
        verdict = "over" if excess > 0 else "within"
        lines.append(f"worst: {name}, checkpoint {cp}, {metric} = {_fmt_db(value)} dB "
                     f"({verdict} the tolerance {limit:g} dB)")
    n = report.counts
    lines.append(f"{len(report.cases)} cases: {n['pass']} passed, {n['failure']} failed, "
                 f"{n['error']} errors -> {'PASS' if report.passed else 'FAIL'}")
    return _printable("\n".join(lines))


def not_run_report(report: VerifyReport, ref: ReferenceSet) -> VerifyReport:
    """A copy of ``report`` with every case of ``ref`` an error "not run" (what the JUnit
    file says until verify finishes)."""
    return replace(report, cases=[CaseResult(c.name, "error", "not run: verify did not "
                                             "finish (the candidate may have ended the "
                                             "process)") for c in ref.cases])


def write_report_junit(report: VerifyReport, path) -> Path:
    """JUnit XML of ``report`` (one testcase per case) written atomically to ``path``."""
    suite = f"adapt verify {report.folder.name}"
    outcomes = [TestOutcome(name=c.name, classname=f"adapt.verify.{report.folder.name}",
                            seconds=c.seconds, kind=c.kind, message=c.message,
                            details=c.details) for c in report.cases]
    props = {"implementation": report.implementation, "mode": report.mode,
             "scale_blind": str(report.scale_blind).lower()}
    props.update({f"tolerance.{k}": f"{v:g}" for k, v in report.tolerances.items()})
    return write_junit(path, suite, outcomes, props)
