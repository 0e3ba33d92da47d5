"""Snapshot sizing: how many training snapshots a processor needs, with theory beside it.

``size(scene, processors)`` runs ONE Monte Carlo evaluation (:func:`adapt.engine.execute.run_trials`)
whose checkpoints are the sweep's snapshot counts: each trial is one stream of the
largest count, scored at every count of the growing window, so the points of the sweep
share their trials (common random numbers; a point agrees with a separate run of that
count alone, same seed, to rounding). For each processor and point it reports the mean
normalised SINR ``rho = SINR / SINR_opt`` and its standard error, loss percentiles, the
fraction of trials within the target loss and the closed-form mean where one applies
(:mod:`adapt.studies.theory`), then answers the sizing question two ways:

* in the mean: the smallest sweep point from which the mean normalised SINR stays at or
  above ``10^(-target/10)`` at every larger point (the criterion of Reed, Mallett and
  Brennan 1974; "stays" matters only for scenes whose curves are not monotone), with a
  bootstrap range: trials are resampled with replacement (``BOOTSTRAP_RESAMPLES``
  resamples, a fixed seed derived from the run seed), the answer recomputed on each, and
  the central 95 % of the answers given as a range of snapshot counts;
* per trial: the smallest sweep point from which at least ``fraction`` of the trials
  stay within the target loss, with a range from the Clopper-Pearson 95 % interval of
  that fraction at every point (the earliest point where the upper bound reaches the
  fraction, the point from which the lower bound does).

Answers are sweep points (counts actually simulated), never interpolated. The sweep is
refined automatically: where an answer or an end of its range is more than one snapshot
above the previous sweep point and that step is wider than the answer's range, counts
inside the step are added and the same trials scored again (up to ``REFINE_ROUNDS``
rounds, at most ``MAX_POINTS`` points; the added rounds are not stored for resuming), so
an answer's resolution ends below its uncertainty. Where a closed form applies, the
share of trials it predicts within the target (the Beta law's survival function, RMB
1974) stands beside the simulated share, and the count at which it reaches ``fraction``
beside the per-trial answer. A range end of None means "beyond the sweep".

Loss percentiles: ``loss_db_p10`` is the loss of the best 10 % of trials (the 10th
percentile of the loss, i.e. the 90th percentile of rho: 10 % of trials lose less),
``loss_db_p90`` that of the worst 10 % (90th percentile of the loss, 10th of rho); both
computed as ``-10 log10`` of the rho percentiles.

Disagreement: at any point where a closed form applies and the simulated mean differs
from it by more than ``DISAGREE_SEM`` (4) standard errors, the disagreement is reported
(terminal, sizing.json, report) with the scene's broken assumptions as the likely reason.
"""
from __future__ import annotations

import functools
import math
import time
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Mapping, Sequence

import numpy as np

from adapt.engine.evaluate import Evaluation
from adapt.engine.execute import run_trials
from adapt.errors import InputError
from adapt.processors import Processor
from adapt.processors._covariance import effective_loading
from adapt.scene.model import Scene
from adapt.studies import theory
from adapt.studies.summaries import (
    Disagreement,
    RuleOfThumb,
    RulesOfThumb,
    SizedProcessor,
    SizingPoint,
    SizingSummary,
    TheoryAnswer,
    typed,
)

__all__ = ["Sizing", "SizingSummary", "size", "sweep_points", "stays_met",
           "bootstrap_required", "clopper_pearson", "analyse_processor", "recommendation",
           "render_table", "as_summary", "write_sizing_run", "DEFAULT_PROCESSORS",
           "PER_OCTAVE", "BOOTSTRAP_RESAMPLES", "CONFIDENCE", "DISAGREE_SEM"]

#: processors sized when none are given: the two with theory or a rule of thumb
DEFAULT_PROCESSORS = ("smi", "smi loading_db=10")
#: sweep points per doubling of the snapshot count in a START:STOP range
PER_OCTAVE = 8
BOOTSTRAP_RESAMPLES = 200
CONFIDENCE = 0.95
#: |simulated mean - theory| beyond this many standard errors is reported
DISAGREE_SEM = 4.0
MAX_SNAPSHOTS = 1_000_000_000
MAX_POINTS = 400
#: rounds of automatic refinement near each answer, and counts added per step refined
REFINE_ROUNDS = 4
REFINE_FILL = 8
_BOOT_KEY = 0xB0075
#: resample x trial budget per bootstrap step (bounds memory)
_BOOT_BUDGET = 4_000_000


# --------------------------------------------------------------------------- sweep
def _bad_sweep(message: str, value, where: str) -> InputError:
    return InputError(message, path=where, value=value,
                      allowed="a list of counts '8,12,16', or a geometric range START:STOP "
                              f"or START:STOP:PER_OCTAVE (default {PER_OCTAVE} per octave), "
                              f"whole numbers in [1, {MAX_SNAPSHOTS:,}]")


def _whole(text, value, where) -> int:
    try:
        v = float(text)
    except (TypeError, ValueError):
        raise _bad_sweep("snapshot counts must be whole numbers", value, where) from None
    if not math.isfinite(v) or v != int(v) or not 1 <= v <= MAX_SNAPSHOTS:
        raise _bad_sweep("snapshot counts must be whole numbers >= 1", value, where)
    return int(v)


def sweep_points(spec, elements: int, snapshots: int, where: str = "snapshots") -> np.ndarray:
    """The sweep's snapshot counts (sorted, unique int64).

    spec: None (geometric, ``PER_OCTAVE`` per octave, from ``elements`` - or 1 if the
    scene has fewer snapshots - to ``snapshots``); a list of counts; text ``"8,12,16"``;
    or text ``"START:STOP"`` / ``"START:STOP:PER_OCTAVE"`` (geometric, both ends included).
    InputError for anything else.
    """
    if isinstance(elements, bool) or int(elements) < 1 or int(snapshots) < 1:
        raise ValueError("elements and snapshots must be >= 1")
    per = PER_OCTAVE
    if spec is None:
        start, stop = (int(elements) if int(elements) <= int(snapshots) else 1), int(snapshots)
        return _geometric(start, stop, per)
    if isinstance(spec, str):
        text = spec.strip()
        if ":" in text:
            parts = text.split(":")
            if len(parts) not in (2, 3) or not all(p.strip() for p in parts):
                raise _bad_sweep("a range is START:STOP or START:STOP:PER_OCTAVE", spec, where)
            start, stop = (_whole(p, spec, where) for p in parts[:2])
            if len(parts) == 3:
                per = _whole(parts[2], spec, where)
                if per > 64:
                    raise _bad_sweep("at most 64 points per octave", spec, where)
            if stop < start:
                raise _bad_sweep("the range must not run backwards (START <= STOP)", spec, where)
            return _geometric(start, stop, per)
        items = [p for p in text.replace(",", " ").split() if p]
        if not items:
            raise _bad_sweep("no snapshot counts given", spec, where)
        counts = [_whole(p, spec, where) for p in items]
    else:
        try:
            items = list(spec)
        except TypeError:
            raise _bad_sweep("expected a list of snapshot counts or a range", spec, where) from None
        if not items:
            raise _bad_sweep("no snapshot counts given", spec, where)
        counts = []
        for p in items:
            if isinstance(p, (bool, np.bool_)) or not isinstance(p, (int, float, np.integer, np.floating)):
                raise _bad_sweep("snapshot counts must be whole numbers", spec, where)
            counts.append(_whole(p, spec, where))
    out = np.unique(np.asarray(counts, dtype=np.int64))
    if out.size > MAX_POINTS:
        raise _bad_sweep(f"at most {MAX_POINTS} sweep points", spec, where)
    return out


def _geometric(start: int, stop: int, per_octave: int) -> np.ndarray:
    n = max(1, int(math.ceil(math.log2(stop / start) * per_octave)) + 1)
    out = np.unique(np.round(np.geomspace(start, stop, n)).astype(np.int64))
    if out.size > MAX_POINTS:
        raise _bad_sweep(f"at most {MAX_POINTS} sweep points", f"{start}:{stop}:{per_octave}",
                         "snapshots")
    return out


def _refinement(ev: Evaluation, points: np.ndarray, target_loss_db: float, fraction: float,
                seed: int) -> np.ndarray:
    """Snapshot counts to add so that each answer (and each end of its range) is resolved
    finer than its uncertainty: where an answer's step from the previous sweep point
    exceeds both 1 and the width of its range, up to ``REFINE_FILL`` evenly spaced
    counts strictly inside that step. Empty when every answer is resolved."""
    add: set[int] = set()
    for p in ev.processors:
        rec = analyse_processor(p.normalised, points, target_loss_db, fraction, seed)
        idx = {int(v): i for i, v in enumerate(points)}
        pairs = [(rec["required_snapshots_mean"], rec["required_snapshots_mean_range"]),
                 (rec["required_snapshots_fraction"], rec["required_snapshots_fraction_range"])]
        for answer, (lo, hi) in pairs:
            if answer is None:
                continue
            width = (hi - lo) if lo is not None and hi is not None else np.inf
            for k in (answer, lo, hi):
                if k is None or idx[k] == 0:
                    continue
                below = int(points[idx[k] - 1])
                step = k - below
                if step > 1 and step > width:
                    fill = np.unique(np.round(np.linspace(below, k, REFINE_FILL + 2)[1:-1]))
                    add.update(int(v) for v in fill if below < v < k)
    return np.array(sorted(add - set(int(v) for v in points)), dtype=np.int64)


# --------------------------------------------------------------------------- statistics
def stays_met(ok: np.ndarray) -> np.ndarray:
    """Index (along the last axis) of the first point from which ``ok`` holds at every
    later point; the axis length when it never does. Shape ``ok.shape[:-1]``."""
    ok = np.asarray(ok, dtype=bool)
    if ok.ndim < 1 or ok.shape[-1] == 0:
        raise ValueError("need at least one point")
    held = np.flip(np.logical_and.accumulate(np.flip(ok, -1), -1), -1)
    return np.where(held.any(-1), np.argmax(held, -1), ok.shape[-1])


def clopper_pearson(successes, trials, level: float = CONFIDENCE) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Clopper and Pearson 1934) two-sided binomial interval for a proportion:
    lower ``Beta(alpha/2; m, n-m+1)``, upper ``Beta(1-alpha/2; m+1, n-m)`` quantiles
    (:func:`adapt.studies.theory.beta_quantile`), 0 for m = 0 and 1 for m = n.
    Checkable fact: the interval holds the proportion with probability >= level for
    every true proportion."""
    m = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    if not 0 < level < 1:
        raise ValueError(f"level must be in (0, 1), got {level}")
    if np.any(m < 0) or np.any(m > n) or np.any(n < 1):
        raise ValueError("need 0 <= successes <= trials and trials >= 1")
    alpha = 1.0 - level
    with np.errstate(invalid="ignore"):
        lo = np.where(m > 0, theory.beta_quantile(alpha / 2, np.maximum(m, 1), n - m + 1), 0.0)
        hi = np.where(m < n, theory.beta_quantile(1 - alpha / 2, m + 1, np.maximum(n - m, 1)),
                      1.0)
    return lo, hi


@functools.lru_cache(maxsize=2)
def _resample_counts(seed: int, trials: int, resamples: int) -> tuple:
    """The bootstrap's multinomial count vectors, in groups of at most ``_BOOT_BUDGET``
    values: a function of (seed, trials, resamples) alone, so every processor and every
    refinement round of one study resamples the same trials, and they are drawn once
    (10,000 trials x 200 resamples take about 0.1 s to draw). Read-only arrays."""
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_BOOT_KEY,)))
    group = max(1, _BOOT_BUDGET // trials)
    p = np.full(trials, 1.0 / trials)
    out = []
    for start in range(0, resamples, group):
        w = rng.multinomial(trials, p, size=min(group, resamples - start)).astype(float)
        w.flags.writeable = False
        out.append(w)
    return tuple(out)


def bootstrap_required(rho: np.ndarray, target: float, seed: int,
                       resamples: int = BOOTSTRAP_RESAMPLES) -> np.ndarray:
    """Sweep-point index at which the mean criterion is met, for each of ``resamples``
    bootstrap resamples of the trials (Efron and Tibshirani, *An Introduction to the
    Bootstrap*, 1993: resample trials with replacement, recompute the statistic).

    rho: (T, C) normalised SINR (NaN: undefined, left out). Each resample is a
    multinomial count vector over the trials, so a resample's means are one matrix
    product; resamples are processed in groups bounding memory. Returns (resamples,)
    indices, C meaning "not met within the sweep". Deterministic for a given seed.
    """
    rho = np.asarray(rho, dtype=float)
    if rho.ndim != 2 or rho.shape[0] < 1:
        raise ValueError("rho must have shape (trials, points)")
    if resamples < 1:
        raise ValueError(f"resamples must be >= 1, got {resamples}")
    t_ = rho.shape[0]
    finite = np.isfinite(rho)
    filled = np.where(finite, rho, 0.0)
    out = []
    for w in _resample_counts(int(seed), t_, int(resamples)):
        num, den = w @ filled, w @ finite
        with np.errstate(invalid="ignore", divide="ignore"):
            means = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
        out.append(stays_met(means >= target))
    return np.concatenate(out)


def _index_range(indices: np.ndarray, level: float = CONFIDENCE) -> tuple[int, int]:
    q = (1.0 - level) / 2
    lo, hi = np.quantile(indices, [q, 1 - q], method="inverted_cdf")
    return int(lo), int(hi)


def _count_at(points: np.ndarray, index: int) -> int | None:
    return int(points[index]) if index < len(points) else None


def _pct_loss(rho_q: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(rho_q > 0, -10 * np.log10(np.where(rho_q > 0, rho_q, 1.0)), np.inf)


def analyse_processor(rho: np.ndarray, points: np.ndarray, target_loss_db: float,
                      fraction: float, seed: int, law: theory.Law | None = None) -> dict:
    """Per-point statistics and the two sizing answers for one processor.

    rho: (T, C) normalised SINR at the sweep ``points`` (C,). Returns the answers as a
    mapping of :class:`adapt.studies.summaries.SizedProcessor` fields (``points``: one
    :class:`SizingPoint` per count; the required counts and their ranges;
    ``met_at_first_point``; ``disagreements``: :class:`Disagreement` entries) plus the
    closed form's own answers ``theory_required_snapshots`` and
    ``theory_required_snapshots_fraction`` (None without ``law``).
    """
    rho = np.asarray(rho, dtype=float)
    points = np.asarray(points, dtype=np.int64)
    if rho.ndim != 2 or rho.shape[1] != len(points):
        raise ValueError("rho must have shape (trials, len(points))")
    target = 10.0 ** (-target_loss_db / 10.0)
    finite = np.isfinite(rho)
    n = finite.sum(0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, np.where(finite, rho, 0).sum(0) / np.maximum(n, 1), np.nan)
        dev = np.where(finite, rho - mean, 0.0)
        sem = np.where(n > 1, np.sqrt((dev ** 2).sum(0) / np.maximum(n - 1, 1) / np.maximum(n, 1)),
                       np.nan)
    qs = np.full((3, len(points)), np.nan)
    ok_cols = n > 0
    if ok_cols.any():
        qs[:, ok_cols] = np.nanquantile(rho[:, ok_cols], [0.9, 0.5, 0.1], axis=0)
    loss_p10, loss_med, loss_p90 = _pct_loss(qs[0]), _pct_loss(qs[1]), _pct_loss(qs[2])
    meets = (finite & (rho >= target)).sum(0)
    frac = np.where(n > 0, meets / np.maximum(n, 1), np.nan)
    cp_lo, cp_hi = clopper_pearson(meets, np.maximum(n, 1))
    cp_lo, cp_hi = np.where(n > 0, cp_lo, 0.0), np.where(n > 0, cp_hi, 1.0)

    th_mean = law.mean(points) if law is not None else np.full(len(points), np.nan)
    th_q = (law.quantile(np.array([[0.9], [0.1]]), points[None, :]) if law is not None
            else np.full((2, len(points)), np.nan))
    th_share = (law.share_meeting(target, points) if law is not None
                else np.full(len(points), np.nan))

    i_mean = int(stays_met(np.nan_to_num(mean, nan=-1.0) >= target))
    boot = bootstrap_required(rho, target, seed)
    b_lo, b_hi = _index_range(boot)
    i_frac = int(stays_met(np.nan_to_num(frac, nan=-1.0) >= fraction))
    i_frac_early = int(stays_met(cp_hi >= fraction))
    i_frac_late = int(stays_met(cp_lo >= fraction))

    rows = []
    disagreements = []
    for c, k in enumerate(points):
        th = float(th_mean[c])
        rows.append(SizingPoint(
            snapshots=int(k),
            normalised_sinr_mean=float(mean[c]),
            normalised_sinr_sem=float(sem[c]),
            loss_db_mean=float(_pct_loss(np.array([mean[c]]))[0]),
            loss_db_median=float(loss_med[c]),
            loss_db_p10=float(loss_p10[c]),
            loss_db_p90=float(loss_p90[c]),
            fraction_meeting_target=float(frac[c]),
            fraction_interval=(float(cp_lo[c]), float(cp_hi[c])),
            theory_fraction_meeting_target=(float(th_share[c]) if math.isfinite(th_share[c])
                                            else None),
            theory_normalised_sinr_mean=th if math.isfinite(th) else None,
            theory_loss_db_p10=(float(_pct_loss(th_q[0, c:c + 1])[0]) if math.isfinite(th)
                                else None),
            theory_loss_db_p90=(float(_pct_loss(th_q[1, c:c + 1])[0]) if math.isfinite(th)
                                else None),
            trials_defined=int(n[c])))
        if math.isfinite(th) and np.isfinite(sem[c]) and sem[c] > 0:
            z = (mean[c] - th) / sem[c]
            if abs(z) > DISAGREE_SEM:
                disagreements.append(Disagreement(snapshots=int(k), simulated=float(mean[c]),
                                                  theory=th, sem=float(sem[c]),
                                                  standard_errors=float(z)))
    limit = int(points[-1])
    return {
        "points": tuple(rows),
        "required_snapshots_mean": _count_at(points, i_mean),
        "required_snapshots_mean_range": (_count_at(points, b_lo), _count_at(points, b_hi)),
        "required_snapshots_fraction": _count_at(points, i_frac),
        "required_snapshots_fraction_range": (_count_at(points, i_frac_early),
                                              _count_at(points, i_frac_late)),
        "met_at_first_point": bool((i_mean == 0 or i_frac == 0) and points[0] > 1),
        "theory_required_snapshots": (law.required_snapshots(target, limit)
                                      if law is not None else None),
        "theory_required_snapshots_fraction": (law.required_snapshots_share(target, fraction,
                                                                            limit)
                                               if law is not None else None),
        "disagreements": tuple(disagreements),
    }


def _unloaded_smi(proc: Processor) -> bool:
    return proc.sample_mvdr and effective_loading(proc.params)[0] is None


# --------------------------------------------------------------------------- rules of thumb
def _rule_of_thumb(proc: Processor, scene: Scene, sinr_opt: float) -> RuleOfThumb | None:
    """The rule of thumb for one processor, or None (methods other than smi, and
    spatially smoothed smi)."""
    if not proc.sample_mvdr or proc.params.get("subarray") is not None:
        return None
    n = scene.elements
    mode, db = effective_loading(proc.params)
    if mode is not None and scene.training == "signal":
        # Carlson's 2J rule assumes interference-only training; with the wanted signal in
        # the training data the loaded weight also partly cancels the signal and no rule
        # of thumb is known (the unloaded signal-present law is the no-loading limit)
        k = max(n, int(round((n - 1) * (2.0 + sinr_opt) - 1)))
        return RuleOfThumb(
            snapshots=None, strong_interferers=None,
            text="none applies: Carlson's 2J rule holds for training without the wanted "
                 "signal, and loaded SMI trained with it present has no rule of thumb; "
                 "without loading the signal-present law would need about "
                 f"(N-1)(2+SINR_opt)-1 = {k} (Boroson 1980)")
    if mode is not None:
        j = theory.strong_interferers(scene, db)
        return RuleOfThumb(
            snapshots=theory.loaded_rule_of_thumb(j), strong_interferers=j,
            text=f"about 2J = {2 * j} (J = {j} interferer eigenvalue(s) above the "
                 f"{db:g} dB load; {theory.CARLSON_SOURCE})")
    if scene.training == "signal":
        k = max(n, int(round((n - 1) * (2.0 + sinr_opt) - 1)))
        return RuleOfThumb(
            snapshots=k, strong_interferers=None,
            text=f"about (N-1)(2+SINR_opt)-1 = {k} with the signal in the training data "
                 "(derived in adapt.studies.theory; Boroson 1980)")
    return RuleOfThumb(
        snapshots=theory.unloaded_rule_of_thumb(n), strong_interferers=None,
        text=f"about 2N = {2 * n} (3 dB in the mean at exactly 2N-3 = "
             f"{theory.rmb_three_db_snapshots(n)}; {theory.RMB_SOURCE})")


# --------------------------------------------------------------------------- text
def _k(v) -> str:
    return "-" if v is None else f"{v}"


def _range(r, limit: int) -> str:
    if r[0] is None:
        return "beyond the sweep"
    hi = f">{limit}" if r[1] is None else str(r[1])
    return str(r[0]) if hi == str(r[0]) else f"{r[0]}-{hi}"


def _snaps(k: int) -> str:
    return f"{k} snapshot" + ("" if k == 1 else "s")


def _entry(proc) -> SizedProcessor:
    return typed(proc, SizedProcessor, "a processor mapping of sizing.json")


def recommendation(proc: SizedProcessor | Mapping, target_loss_db: float, fraction: float,
                   limit: int) -> str:
    """One plain-language line for one processor of a sizing summary (a
    :class:`SizedProcessor`, or its mapping in sizing.json)."""
    proc = _entry(proc)
    t = f"{target_loss_db:g} dB"
    m = proc.required_snapshots_mean
    f = proc.required_snapshots_fraction
    pct = f"{100 * fraction:g} %"
    lvl = f"{100 * CONFIDENCE:g} %"
    if m is None:
        head = f"{proc.label}: the mean loss stays above {t} up to {limit} snapshots"
    else:
        head = (f"{proc.label}: {t} in the mean after {_snaps(m)} (bootstrap {lvl} range "
                f"{_range(proc.required_snapshots_mean_range, limit)})")
    if f is None:
        tail = f"fewer than {pct} of trials within {t} by {limit}"
    else:
        tail = (f"{pct} of trials by {f} "
                f"({_range(proc.required_snapshots_fraction_range, limit)})")
    out = f"{head}; {tail}"
    th = proc.theory
    if th is not None:
        k = th.required_snapshots
        out += (f"; {th.title} says {k}" if k is not None
                else f"; {th.title} says more than {limit}")
        kf = th.required_snapshots_fraction
        out += (f" ({pct} of trials by {kf}, Beta law)" if kf is not None
                else f" ({pct} of trials beyond {limit}, Beta law)")
    rule = proc.rule_of_thumb
    if rule is not None and th is None:
        out += f"; rule of thumb {rule.text}"
    if proc.met_at_first_point:
        out += ("; met already at the first sweep point: fewer snapshots may do (extend "
                "the sweep downwards)")
    return out


def _disagreement_text(proc: SizedProcessor, violations: Sequence[str]) -> str | None:
    d = proc.disagreements
    if not d:
        return None
    worst = max(d, key=lambda x: abs(x.standard_errors))
    th = proc.theory.title
    text = (f"{proc.label}: simulation departs from {th} by more than "
            f"{DISAGREE_SEM:g} standard errors at {len(d)} of "
            f"{sum(p.theory_normalised_sinr_mean is not None for p in proc.points)} "
            f"points (worst at {worst.snapshots} snapshots: mean normalised SINR "
            f"{worst.simulated:.4f} against {worst.theory:.4f}, "
            f"{worst.standard_errors:+.1f} standard errors)")
    if violations:
        text += "; likely reason: the scene breaks the law's assumptions: " + "; ".join(violations)
    else:
        text += ("; the scene breaks none of the law's assumptions, so this is a genuine "
                 "discrepancy worth investigating (by chance alone it happens at a given "
                 "point about once in 16,000)")
    return text


def _f(v, fmt="{:.3f}") -> str:
    return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else fmt.format(v)


def as_summary(summary) -> SizingSummary:
    """A :class:`SizingSummary` as it is, or the one of a ``sizing.json`` mapping."""
    return typed(summary, SizingSummary, "a sizing.json mapping")


def render_table(summary: SizingSummary | Mapping) -> str:
    """The terminal report of a sizing summary (or its sizing.json mapping): one table
    per processor, recommendations, disagreements."""
    s = as_summary(summary)
    lines = [f"Snapshot sizing - {s.scene}: {s.elements} elements, "
             f"{s.trials} trials, seed {s.seed}, optimum SINR "
             f"{_f(s.optimum_sinr_db, '{:.1f}')} dB, target loss "
             f"{s.target_loss_db:g} dB (normalised SINR >= "
             f"{s.target_normalised_sinr:.4f})"]
    head = (f"{'snapshots':>9} {'mean rho':>9} {'sem':>7} {'loss(mean)':>10} {'median':>7} "
            f"{'p10':>6} {'p90':>6} {'within':>7} {'theory':>8}")
    for p in s.processors:
        name = p.label if p.label == p.spec else f"{p.label}  ({p.spec})"
        lines += ["", name, head]
        for r in p.points:
            within = r.fraction_meeting_target
            lines.append(
                f"{r.snapshots:>9} {_f(r.normalised_sinr_mean, '{:.4f}'):>9} "
                f"{_f(r.normalised_sinr_sem, '{:.4f}'):>7} {_f(r.loss_db_mean, '{:.2f}'):>10} "
                f"{_f(r.loss_db_median, '{:.2f}'):>7} {_f(r.loss_db_p10, '{:.2f}'):>6} "
                f"{_f(r.loss_db_p90, '{:.2f}'):>6} "
                f"{_f(100 * within, '{:.0f} %') if within is not None else '-':>7} "
                f"{_f(r.theory_normalised_sinr_mean, '{:.4f}'):>8}")
    if s.draw_reason:
        lines += ["", f"training data: {s.draw} ({s.draw_reason})"]
    lines += ["", "loss in dB; p10 = best 10 % of trials, p90 = worst 10 %; 'within' = "
              f"trials within {s.target_loss_db:g} dB; theory = closed-form mean "
              "normalised SINR", "", "Recommendations:"]
    lines += [f"  {p.recommendation}" for p in s.processors]
    if s.assumption_violations:
        lines += ["", "Assumptions of the closed forms this scene breaks:"]
        lines += [f"  {v}" for v in s.assumption_violations]
    if s.disagreements:
        lines += ["", "Simulation against theory:"]
        lines += [f"  {t}" for t in s.disagreements]
    lines += ["", CAUTION]
    return "\n".join(lines)


CAUTION = ("Simulation only: sizes come from a modelled scene; real data (non-Gaussian, "
           "non-stationary, calibration errors) usually need more snapshots.")


# --------------------------------------------------------------------------- the run
@dataclass
class Sizing:
    """Result of :func:`size`: its :class:`SizingSummary` (``summary``: what the table,
    figure, report and sizing.json read), the evaluation it came from (per-trial
    arrays), the scene as run and its processors. ``record`` is the summary as the
    ``sizing.json`` mapping."""
    summary: SizingSummary
    evaluation: Evaluation
    scene: Scene
    processors: list = field(default_factory=list)
    seconds: float = 0.0

    def __post_init__(self):
        # a sizing.json mapping given in the summary's place (as the first release's
        # Sizing(record, ...) did) is read into its summary
        self.summary = as_summary(self.summary)

    @property
    def record(self) -> dict:
        """The ``sizing.json`` mapping (``summary.to_json()``; a new dict each time)."""
        return self.summary.to_json()

    def table(self) -> str:
        return render_table(self.summary)

    def __str__(self) -> str:
        return self.table()


def _number(value, name: str, low: float, high: float, low_open=False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    if isinstance(value, bool) or not math.isfinite(v) or v > high or v < low or (low_open and v == low):
        lo = "(" if low_open else "["
        raise InputError(f"{name} out of range or not a number", path=name, value=value,
                         allowed=f"a number in {lo}{low:g}, {high:g}]")
    return v


#: ways of producing the training data :func:`size` accepts (``auto`` chooses)
DRAW_CHOICES = ("auto", "samples", "covariance")


def choose_draw(draw: str, scene: Scene, processors: Sequence[Processor]) -> tuple[str, str]:
    """The way to produce the training data and why: ``(draw, reason)`` with draw
    ``samples`` or ``covariance``.

    ``auto`` takes the drawn covariances exactly where they are statistically exact: a
    stationary scene, Gaussian training data, no ADC model and only covariance-based
    processors (the conditions of :func:`adapt.engine.drawn.covariance_draw_refusal`; the
    sample covariance of such data is complex Wishart, Goodman 1963), and the snapshot
    streams otherwise. ``samples`` and ``covariance`` are taken as asked (``covariance``
    is refused later where it does not apply). InputError for another value.
    """
    from adapt.engine.drawn import covariance_draw_refusal
    if draw not in DRAW_CHOICES:
        raise InputError("unknown way to draw the training data", path="draw", value=draw,
                         allowed=", ".join(DRAW_CHOICES))
    if draw == "samples":
        return "samples", "samples requested: the snapshot streams are simulated"
    if draw == "covariance":
        return "covariance", ("covariance requested: window sample covariances drawn from "
                              "their complex-Wishart law")
    why = covariance_draw_refusal(scene, processors)
    if why is None:
        return "covariance", ("auto: stationary scene, Gaussian training data, no ADC model "
                              "and covariance-based processors only, so the window sample "
                              "covariances are drawn exactly from their complex-Wishart law")
    return "samples", "auto: the snapshot streams are simulated, because " + why


def size(scene, processors: Sequence | None = None, snapshots=None, trials: int | None = None,
         seed: int | None = None, target_loss_db: float = 3.0, fraction: float = 0.9,
         progress: Callable[[int], None] | None = None, *, chunk: int | None = None,
         workers: int | None = None, scheduler: str | None = None, store=None,
         on_chunk: Callable[[int, int], None] | None = None, draw: str = "samples",
         threads: int | None = None) -> Sizing:
    """Size the training of ``processors`` on ``scene`` (a Scene or a scene file path).

    processors: specs or Processor objects (default: the scene's ``processors`` list, or
    :data:`DEFAULT_PROCESSORS`, unloaded and 10 dB-loaded SMI, when it lists none);
    snapshots: the sweep (see :func:`sweep_points`; default
    geometric, 8 per octave, from N to the scene's snapshots when every processor is
    unloaded SMI, else from 1, since loaded methods may need fewer than N); trials, seed: override the scene's
    (at least 2 trials); target_loss_db: the loss the answer must meet; fraction: the
    share of trials for the per-trial answer; progress: called with trial-snapshots done;
    chunk, threads, workers, scheduler, store, on_chunk: chunked execution on threads
    of this process or a Dask cluster and resumable runs, as in
    :func:`adapt.studies.compare.compare` (results never depend on them);
    draw: ``samples`` (default here: simulate the snapshot streams), ``auto`` (the default
    of ``adapt size`` and :func:`adapt.api.size`; see :func:`choose_draw`) or
    ``covariance``: window covariances drawn directly from the complex-Wishart law
    (:mod:`adapt.engine.drawn`; Gaussian stationary scenes, covariance processors
    only), the same distribution at a cost independent of the snapshot count.
    The record's ``draw`` says which was used and ``draw_reason`` why.
    InputError for bad values (exit code 2 on the command line).
    """
    from adapt.engine.settings import prepare_scene
    from adapt.scenefile import load_scene
    t0 = time.perf_counter()
    if isinstance(scene, (str, Path)):
        scene = load_scene(scene)
    if not isinstance(scene, Scene):
        raise InputError("expected a scene or the path of a scene file", value=type(scene).__name__)
    target_loss_db = _number(target_loss_db, "target_loss_db", 0.0, 100.0, low_open=True)
    fraction = _number(fraction, "fraction", 0.0, 1.0, low_open=True)
    if trials is not None and not isinstance(trials, bool) and isinstance(trials, (int, np.integer)) \
            and trials < 2:
        raise InputError("sizing needs at least 2 trials (standard errors, bootstrap)",
                         path="trials", value=trials, allowed="an integer >= 2")
    if processors is None:
        procs_in = list(scene.processors) or list(DEFAULT_PROCESSORS)
    else:
        procs_in = processors
    _, procs = prepare_scene(scene, procs_in, trials, None, seed)
    if snapshots is None and not all(_unloaded_smi(p) for p in procs):
        # loaded and other methods may need fewer than N snapshots: start the sweep at 1
        points = sweep_points(f"1:{scene.snapshots}", scene.elements, scene.snapshots)
    else:
        points = sweep_points(snapshots, scene.elements, scene.snapshots)
    used, procs = prepare_scene(scene, procs_in, trials, int(points[-1]), seed)
    if used.trials < 2:
        raise InputError("sizing needs at least 2 trials (standard errors, bootstrap)",
                         path="trials", value=used.trials, allowed="an integer >= 2")
    n = used.elements
    draw, draw_reason = choose_draw(draw, used, procs)
    from adapt.engine.executors import check_cluster_options, check_threads
    from adapt.engine.settings import MAX_TRIALS, whole_count
    check_threads(threads, remote=workers is not None or scheduler is not None)
    check_cluster_options(workers, scheduler)
    if chunk is not None:
        chunk = whole_count(chunk, "chunk", MAX_TRIALS)
    with warnings.catch_warnings():
        # below N snapshots unloaded SMI uses the minimum-norm weight; the sweep shows it
        warnings.filterwarnings("ignore", message=".*sample covariance is singular",
                                category=RuntimeWarning)
        ev = run_trials(used, procs, points, chunk=chunk, tail=0, progress=progress,
                      workers=workers, scheduler=scheduler, store=store, on_chunk=on_chunk,
                      draw=draw, threads=threads)

    for _ in range(REFINE_ROUNDS):
        extra = _refinement(ev, points, target_loss_db, fraction, used.seed)
        if extra.size == 0 or len(points) + extra.size > MAX_POINTS:
            break
        points = np.union1d(points, extra)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*sample covariance is singular",
                                    category=RuntimeWarning)
            ev = run_trials(used, procs, points, chunk=chunk, tail=0, progress=None,
                            workers=workers, scheduler=scheduler, store=None, draw=draw,
                            threads=threads)

    facts = theory.scene_facts(used)
    opt = np.asarray(ev.optimum_sinr, dtype=float)
    opt_mean = float(np.nanmean(opt)) if np.isfinite(opt).any() else float("nan")
    if math.isfinite(opt_mean) and opt_mean > 0:
        facts["optimum_sinr"] = opt_mean              # what was simulated (trial mean)
    violations = list(facts["violations"])
    target = 10.0 ** (-target_loss_db / 10.0)
    limit = int(points[-1])
    entries, disagreements = [], []
    for proc, scores in zip(procs, ev.processors):
        law = theory.theory_for(proc, facts)
        answers = analyse_processor(scores.normalised, points, target_loss_db, fraction,
                                    used.seed, law)
        law_needs = answers.pop("theory_required_snapshots")
        law_needs_share = answers.pop("theory_required_snapshots_fraction")
        answer = None
        if law is not None:
            answer = TheoryAnswer(
                name=law.name, title="RMB theory" if law.name == "rmb" else "signal-present theory",
                source=law.source, required_snapshots=law_needs,
                required_snapshots_fraction=law_needs_share,
                half_power_snapshots=law.three_db_snapshots(),
                optimum_sinr=law.sinr_opt if law.name != "rmb" else None,
                violations=tuple(law.violations))
        entry = SizedProcessor(label=proc.label, method=proc.method, params=dict(proc.params),
                               spec=proc.spec(defaults=False), **answers, theory=answer,
                               rule_of_thumb=_rule_of_thumb(proc, used, facts["optimum_sinr"]))
        own = violations + [v for v in (law.violations if law is not None else ())
                            if v not in violations]
        text = _disagreement_text(entry, own) if law is not None else None
        entries.append(replace(entry, disagreement_summary=text,
                               recommendation=recommendation(entry, target_loss_db, fraction,
                                                             limit)))
        if text:
            disagreements.append(text)
    summary = SizingSummary(
        scene=used.name, elements=n, trials=used.trials, seed=used.seed, draw=draw,
        draw_reason=draw_reason, training=used.training,
        optimum_sinr_db=10 * math.log10(opt_mean) if opt_mean > 0 else None,
        target_loss_db=target_loss_db, target_normalised_sinr=target, fraction=fraction,
        confidence=CONFIDENCE, bootstrap_resamples=BOOTSTRAP_RESAMPLES,
        snapshots=tuple(int(k) for k in points),
        rules_of_thumb=RulesOfThumb(
            unloaded_2n=theory.unloaded_rule_of_thumb(n) if n >= 2 else None,
            rmb_half_power=theory.rmb_three_db_snapshots(n) if n >= 2 else None,
            strong_interferers=facts["strong_interferers"],
            strong_definition="interference eigenvalues above the load (10 dB over the "
                              "noise when unloaded); a lone interferer counts when N x "
                              "its per-element INR exceeds the load",
            # Carlson's rule assumes training without the wanted signal
            loaded_2j=facts["loaded_rule"] if used.training != "signal" else None),
        interference_eigenvalues_db=tuple(facts["interference_eigenvalues_db"]),
        assumption_violations=tuple(violations), disagreements=tuple(disagreements),
        processors=tuple(entries))
    seconds = time.perf_counter() - t0
    return Sizing(summary=replace(summary, seconds=seconds), evaluation=ev, scene=used,
                  processors=procs, seconds=seconds)


# --------------------------------------------------------------------------- run folder
def write_sizing_run(sizing: Sizing, out_root="runs", command_line: str | None = None,
                     folder=None) -> Path:
    """Write a NEW run folder under ``out_root``: ``scene.yaml`` (the scene as run),
    ``sizing.json``, ``sizing.png``, ``report.html`` and ``manifest.json`` (versions,
    seed, command line, sha256 of every file); every file atomically. With ``folder``
    (a resumable run folder, :func:`adapt.report.runfolder.start_run_folder`) the outputs
    go there and it is sealed (:meth:`adapt.report.runfolder.RunWriter.seal`)."""
    from adapt.report.html import build_page
    from adapt.report.runfolder import RunWriter
    from adapt.report.sizing_figures import sizing_figure_png, sizing_sections
    from adapt.scenefile import dump_scene
    if not isinstance(sizing, Sizing):
        raise ValueError(f"expected a Sizing, got {type(sizing).__name__}")
    summary = sizing.summary
    writer = RunWriter(folder, out_root, f"size-{sizing.scene.name}")
    writer.text("scene.yaml",
                "# The scene exactly as sized (defaults filled in; trials, seed and "
                "the largest\n# snapshot count as run). Re-run with: adapt size "
                "scene.yaml\n" + dump_scene(sizing.scene))
    writer.json("sizing.json", summary.to_json())
    png = sizing_figure_png(summary)
    writer.bytes("sizing.png", png)
    page = build_page(f"Snapshot sizing: {summary.scene}", sizing_sections(summary, png),
                      footer=f"adapt size, seed {summary.seed}, {summary.trials} trials")
    writer.text("report.html", page)
    return writer.seal({"kind": "size", "scene": summary.scene, "seed": summary.seed,
                        "trials": summary.trials, "command_line": command_line,
                        "seconds": sizing.seconds})
