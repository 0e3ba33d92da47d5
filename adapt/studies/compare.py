"""Compare processors on one scene: Monte Carlo scores, a summary table, a run folder.

``compare(scene, processors)`` runs :func:`adapt.engine.execute.run_trials` and condenses it,
once, into a typed summary (:func:`summarise` -> ``Comparison.summary``, a
:class:`adapt.studies.summaries.CompareSummary`, whose ``to_json()`` is ``metrics.json``);
``Comparison.table()`` renders the terminal summary from it; :func:`write_compare_run`
writes a new run folder (``scene.yaml``, ``metrics.json``, ``curves.csv``, figures,
``report.html``, ``manifest.json``), every file read from the same summary. The command
``adapt compare`` is a thin wrapper.

Conventions of the summary (all "mean" values are over Monte Carlo trials):

* ``sinr_db_mean`` is the mean over trials of the output SINR in dB at the final
  checkpoint; ``optimum_sinr_db`` the mean over trials of the optimum (clairvoyant MVDR,
  ``sigma_s^2 a^H R^-1 a``, Van Trees 2002 ch. 6) SINR in dB at the final checkpoint's
  moment (for a stationary scene: *the* optimum); ``loss_db_mean`` the mean over trials
  of the per-trial loss in dB, so ``loss_db_mean = optimum_sinr_db - sinr_db_mean``
  whenever every trial's SINR is defined;
* ``snapshots_to_3db`` is the first checkpoint at which the loss of the MEAN normalised
  SINR, ``-10 log10(mean rho)`` (:func:`adapt.engine.scores.mean_loss_db`, the quantity of Reed,
  Mallett and Brennan 1974), is at most 3 dB; ``snapshots_to_3db_fraction`` the first
  checkpoint at which at least 90 % of the trials are within 3 dB; null if never;
* null depths and white-noise gain are means over trials of dB values at the final
  checkpoint; ``null_depth_floored_db`` gives per interferer the mean, 10th and 90th
  percentile over trials with each trial's value floored at ``null_depth_floor_db``
  (:data:`NULL_FLOOR_DB`, -100 dB: deeper only measures round-off), the statistics
  the null-depth figures draw; pointing error and peak sidelobe come from the final weights on each
  trial's true array: on the azimuth cut for a line (:func:`adapt.engine.scores.pointing_error_deg`,
  :func:`adapt.engine.scores.peak_sidelobe_db`), over all directions for any other
  array (``pattern_scope: "all directions"``; the pointing error is then the angle between the
  main-beam peak and the look direction, :func:`adapt.engine.scores.pointing_error_2d_deg`,
  :func:`adapt.engine.scores.peak_sidelobe_2d_db`, with the peak's azimuth and elevation
  offsets and its height over the look-direction response, ``peak_over_look_db_mean``:
  a beam that is flat toward the peak has a large but harmless pointing error);
* ``measured_sinr_db_mean`` is the SINR measured from output samples (the held final
  weight over the ``tail`` snapshots after the last checkpoint): a cross-check of the
  covariance-based SINR, unbiased only on average.
"""
from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Mapping, Sequence

import numpy as np

from adapt.engine import scores
from adapt.engine.evaluate import Evaluation
from adapt.engine.execute import run_trials
from adapt.engine.settings import (
    MAX_SNAPSHOTS,
    MAX_TRIALS,
    check_scheduler_address,
    checkpoints_for,
    estimate_run,
    prepare_scene,
    whole_count,
)
from adapt.errors import InputError
from adapt.numerics.units import power_db as _db
from adapt.processors import is_clairvoyant
from adapt.report.numbers import format_number
from adapt.scene import geometry
from adapt.scene.model import Scene
from adapt.studies.summaries import (
    CompareSummary,
    Curve,
    FinalScores,
    NullDepth,
    OptimumCurve,
    PatternScores,
    ProcessorSummary,
    Ranking,
    Verdict,
    typed,
)

__all__ = ["Comparison", "CompareSummary", "ProcessorSummary", "compare", "summarise",
           "floored_null_depths", "write_compare_run", "verdict", "verdict_lines",
           "render_table", "own_optima", "own_optima_text", "as_summary", "CAUTION", "TAIL",
           "NULL_FLOOR_DB"]

#: printed under every summary table
CAUTION = ("Simulation only: scores come from a modelled scene; validate against measured "
           "hardware before relying on any processor.")
#: extra snapshots after the last checkpoint used to measure the output SINR from samples
TAIL = 256
#: trial x direction x element budget of the pattern scores (pointing, sidelobes)
_PATTERN_BUDGET = 50_000_000
#: null depths below this are floored (per trial) before their statistics are taken and
#: drawn: deeper values only measure floating-point round-off, no hardware reaches them
#: (common practice); written to metrics.json as ``null_depth_floor_db``
NULL_FLOOR_DB = -100.0


# --------------------------------------------------------------------------- summary
def _nanmean(x, axis=0):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(np.asarray(x, dtype=float), axis=axis)


def _first(x) -> float:
    return float(np.asarray(x).ravel()[0])


def quiescent_beamwidth_deg(scene) -> float:
    """Half-power beamwidth of the scene's uniform beam at its look direction (degrees;
    the yardstick of the pattern scores; the same for every processor of a run)."""
    return geometry.half_power_beamwidth_deg(scene.array.positions, scene.look_azimuth,
                                             scene.look_elevation, resolution_deg=0.01)


def _pattern_scores(evaluation: Evaluation, weights: np.ndarray, bw: float) -> PatternScores:
    """``bw``: :func:`quiescent_beamwidth_deg` of the evaluation's scene."""
    sc = evaluation.scene
    pos = evaluation.positions
    gains = evaluation.element_gains
    t_, n = weights.shape
    if pos is None:
        pos = np.broadcast_to(sc.array.positions, (t_, n, 3))
    ap = max(float(sc.array.aperture), 0.5)
    step = float(np.clip(np.rad2deg(1.0 / ap) / 10.0, 0.01, 0.25))
    span = 180.0 if np.ptp(np.asarray(sc.array.positions)[:, 1]) < 1e-9 else 360.0
    points = int(span / step) + 1
    use = int(max(1, min(t_, _PATTERN_BUDGET // max(1, points * n))))
    w = weights[:use]
    g = None if gains is None or np.all(gains[:use] == 1) else gains[:use]
    if not scores.is_line_array(sc.array.positions):
        return _pattern_scores_2d(evaluation, weights, pos, gains, ap, bw)
    args = dict(positions=pos[:use], look_azimuth=float(sc.look_azimuth),
                look_elevation=float(sc.look_elevation), gains=g,
                beamwidth_deg=float(bw) if np.isfinite(bw) and bw > 0 else None)
    with np.errstate(all="ignore"):
        pe = scores.pointing_error_deg(w, **args)
        psl = scores.peak_sidelobe_db(w, step_deg=step, **args)
    return PatternScores(pointing_error_deg_mean=float(_nanmean(pe)),
                         pointing_error_deg_rms=float(np.sqrt(_nanmean(pe ** 2))),
                         peak_sidelobe_db_mean=float(_nanmean(psl)), trials=use)


def _pattern_scores_2d(evaluation: Evaluation, weights: np.ndarray, pos, gains,
                       aperture: float, bw: float) -> PatternScores:
    """Pointing error (angle between the main-beam peak and the look direction) and
    peak sidelobe searched over the sphere, for arrays that are not a line."""
    sc = evaluation.scene
    t_, n = weights.shape
    # about six samples across a sidelobe (lambda / aperture wide); parabolic refinement
    # does the rest
    step = float(np.clip(np.rad2deg(1.0 / aperture) / 6.0, 0.1, 3.0))
    points = int(360.0 * 180.0 / step ** 2) if scores.plane_normal(sc.array.positions) is None \
        else int((2.0 / np.deg2rad(step)) ** 2)
    use = int(max(1, min(t_, _PATTERN_BUDGET // max(1, points * n))))
    g = None if gains is None or np.all(gains[:use] == 1) else gains[:use]
    args = dict(positions=pos[:use], look_azimuth=float(sc.look_azimuth),
                look_elevation=float(sc.look_elevation), gains=g,
                beamwidth_deg=float(bw) if np.isfinite(bw) and bw > 0 else None)
    w = weights[:use]
    with np.errstate(all="ignore"):
        peak = scores.main_beam_peak_2d(w, **args)
        pe = scores.pointing_error_2d_deg(w, **args, peak=peak)
        psl = scores.peak_sidelobe_2d_db(w, step_deg=step, **args, peak=peak)
        u = peak[0]
        normal = scores.plane_normal(sc.array.positions)
        look = geometry.direction_vector(sc.look_azimuth, sc.look_elevation)
        if normal is not None:             # the mirror image on the look side of the plane
            flip = (u @ normal) * (1.0 if look @ normal >= 0 else -1.0) < 0
            u = np.where(flip[:, None], u - 2 * (u @ normal)[:, None] * normal, u)
        az = np.rad2deg(np.arctan2(u[:, 0], u[:, 1]))
        el = np.rad2deg(np.arcsin(np.clip(u[:, 2], -1.0, 1.0)))
        look_db = scores.to_db(scores.direction_response(w, pos[:use], look[None], g))[:, 0]
    return PatternScores(
        pointing_error_deg_mean=float(_nanmean(pe)),
        pointing_error_deg_rms=float(np.sqrt(_nanmean(pe ** 2))),
        peak_sidelobe_db_mean=float(_nanmean(psl)), trials=use, scope="all directions",
        peak_azimuth_error_deg_mean=float(_nanmean((az - sc.look_azimuth + 180.0) % 360.0
                                                   - 180.0)),
        peak_elevation_error_deg_mean=float(_nanmean(el - sc.look_elevation)),
        peak_over_look_db_mean=float(_nanmean(peak[1] - look_db)))


def _worst_null(depths: dict, on: list) -> float | None:
    """The least-suppressed interferer among those on (None when none is on)."""
    vals = [v for k, v in depths.items() if k in on and v is not None and math.isfinite(v)]
    return max(vals) if vals else None


def floored_null_depths(null_depth_db, names: Sequence[str],
                        floor_db: float = NULL_FLOOR_DB) -> dict[str, NullDepth]:
    """Statistics over trials of the null depths at the final checkpoint, each trial's
    value floored at ``floor_db`` first: ``{name: NullDepth(mean, p10, p90)}``.

    null_depth_db: (T, C, J) dB of one processor (:attr:`ProcessorScores.null_depth_db`);
    names: the J interferers. Non-finite values are left out; an interferer with none
    finite gets NaN."""
    nd = np.asarray(null_depth_db, dtype=float)[:, -1, :]                 # (T, J)
    if nd.shape[1] != len(names):
        raise ValueError(f"{nd.shape[1]} null depths per trial but {len(names)} interferers")
    nd = np.where(np.isfinite(nd), np.maximum(nd, floor_db), np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nanmean(nd, axis=0)
        lo = np.nanpercentile(nd, 10, axis=0)
        hi = np.nanpercentile(nd, 90, axis=0)
    return {name: NullDepth(mean=float(mean[j]), p10=float(lo[j]), p90=float(hi[j]))
            for j, name in enumerate(names)}


def summarise(evaluation: Evaluation, target_db: float = 3.0, fraction: float = 0.9,
              seconds: float | None = None, patterns: bool = True) -> CompareSummary:
    """The summary of an evaluation, every statistic computed once (its ``to_json()``
    is ``metrics.json``; see the module docstring and README for the meaning of each
    mean)."""
    if not isinstance(evaluation, Evaluation):
        raise ValueError(f"expected an Evaluation, got {type(evaluation).__name__}")
    if not np.isfinite(target_db):
        raise ValueError(f"target_db must be finite, got {target_db}")
    if not 0 < fraction <= 1:
        raise ValueError(f"fraction must be in (0, 1], got {fraction}")
    sc = evaluation.scene
    checkpoints = np.asarray(evaluation.checkpoints)
    counts = tuple(int(c) for c in checkpoints)
    names = list(evaluation.interferers)
    opt_db = _db(evaluation.optimum_sinr)                               # (T, C)
    # interferers transmitting at the moment the final weights are scored (snapshot c)
    on_at_end = [s.name for s in sc.interferers if bool(s.active(int(checkpoints[-1])))]
    free_db = _interference_free_db(evaluation)                          # (T,) or None
    beamwidth = None                                # computed once, when first needed
    per_trial, entries = [], []
    for p in evaluation.processors:
        sinr_db = _db(p.sinr)
        with np.errstate(all="ignore"):
            loss = np.where(np.isnan(p.normalised), np.nan, np.asarray(p.loss_db, float))
        rho = np.asarray(p.normalised, dtype=float)
        loss_stats = scores.trial_summary(loss)
        sinr_stats = scores.trial_summary(sinr_db)
        rho_stats = scores.trial_summary(rho)
        with np.errstate(all="ignore"):
            rho_ok = np.where(np.isfinite(rho), rho, np.nan)
            loss_of_mean = -10 * np.log10(_nanmean(rho_ok, axis=0))
        frac = scores.fraction_meeting(loss, target_db)
        to_mean, to_frac = scores.snapshots_to_target(checkpoints, np.nan_to_num(rho, nan=0.0),
                                                      target_db, fraction)
        stay_mean, stay_frac = scores.snapshots_staying_within(
            checkpoints, np.nan_to_num(rho, nan=0.0), target_db, fraction)
        measured_db = _db(p.measured_sinr)
        wng_db = _db(p.white_noise_gain)
        nd = np.asarray(p.null_depth_db, dtype=float)
        depths = {name: _first(_nanmean(nd[:, -1, j])) for j, name in enumerate(names)}
        if patterns and beamwidth is None:
            beamwidth = quiescent_beamwidth_deg(sc)
        final = FinalScores(
            sinr_db_mean=_first(sinr_stats["mean"][-1]),
            sinr_db_p10=_first(sinr_stats["p10"][-1]),
            sinr_db_p90=_first(sinr_stats["p90"][-1]),
            loss_db_mean=_first(loss_stats["mean"][-1]),
            loss_db_median=_first(loss_stats["median"][-1]),
            loss_db_p10=_first(loss_stats["p10"][-1]),
            loss_db_p90=_first(loss_stats["p90"][-1]),
            loss_db_of_mean=_first(loss_of_mean[-1]),
            normalised_sinr_mean=_first(rho_stats["mean"][-1]),
            normalised_sinr_sem=_first(rho_stats["sem"][-1]),
            white_noise_gain_db=_first(_nanmean(wng_db[:, -1])),
            null_depth_db=depths,
            measured_sinr_db_mean=_first(_nanmean(measured_db[:, -1])),
            sinr_db_sem=_first(sinr_stats["sem"][-1]),
            loss_db_vs_interference_free=(None if free_db is None else
                                          _first(_nanmean(free_db - sinr_db[:, -1]))),
            worst_null_db=_worst_null(depths, on_at_end),
            patterns=(_pattern_scores(evaluation, scores.band_centre_weights(
                p.final_weights, evaluation.scene.elements), beamwidth) if patterns else None))
        per_trial.append((sinr_db[:, -1], rho_stats))
        entries.append(ProcessorSummary(
            label=p.label, method=p.method, params=dict(p.params), spec=p.spec, final=final,
            snapshots_to_3db=to_mean, snapshots_to_3db_fraction=to_frac,
            snapshots_to_stay_within_3db=stay_mean,
            snapshots_to_stay_within_3db_fraction=stay_frac,
            seconds=float(p.seconds),
            curve=Curve(snapshots=counts,
                        normalised_sinr_mean=tuple(rho_stats["mean"].tolist()),
                        sinr_db_mean=tuple(sinr_stats["mean"].tolist()),
                        sinr_db_p10=tuple(sinr_stats["p10"].tolist()),
                        sinr_db_p90=tuple(sinr_stats["p90"].tolist()),
                        loss_db_mean=tuple(loss_stats["mean"].tolist()),
                        loss_db_of_mean=tuple(loss_of_mean.tolist()),
                        loss_db_p10=tuple(loss_stats["p10"].tolist()),
                        loss_db_median=tuple(loss_stats["median"].tolist()),
                        loss_db_p90=tuple(loss_stats["p90"].tolist()),
                        fraction_meeting_target=tuple(frac.tolist()),
                        measured_sinr_db_mean=tuple(_nanmean(measured_db, axis=0).tolist())),
            null_depths=floored_null_depths(nd, names)))
    summary = CompareSummary(
        scene=sc.name, elements=int(sc.elements), trials=int(evaluation.trials),
        snapshots=int(evaluation.snapshots), seed=int(evaluation.seed),
        optimum_sinr_db=float(_nanmean(opt_db[:, -1])), stationary=bool(sc.stationary),
        interferers=tuple(names), target_db=float(target_db), fraction=float(fraction),
        checkpoints=counts,
        optimum_curve=OptimumCurve(snapshots=counts,
                                   sinr_db_mean=tuple(_nanmean(opt_db, axis=0).tolist())),
        processors=tuple(entries), null_depth_floor_db=NULL_FLOOR_DB,
        interferers_on_at_end=None if sc.stationary else tuple(on_at_end),
        interference_free_sinr_db=None if free_db is None else float(_nanmean(free_db)),
        interference_cost_db=(None if free_db is None
                              else float(_nanmean(free_db - opt_db[:, -1]))),
        seconds=None if seconds is None else float(seconds))
    return replace(summary, verdict=verdict(summary, per_trial, target_db, int(evaluation.seed)))


def _interference_free_db(evaluation: Evaluation):
    """Per-trial optimum SINR (dB) of the same array with no interferer at the last
    checkpoint: ``sigma_s^2 a^H a`` with unit noise per element (Van Trees 2002 ch. 6:
    the optimum against white noise alone is the matched filter); ``a`` carries each
    trial's element gains, so ``a^H a = sum |g_n|^2``. None when the wanted source is
    off at the last checkpoint."""
    sc = evaluation.scene
    d = sc.desired
    last = np.asarray(evaluation.checkpoints)[-1:]
    power = float(d.power) * float(d.active(last).astype(float)[0])
    if not power > 0:
        return None
    gains = evaluation.element_gains
    energy = (np.sum(np.abs(np.asarray(gains)) ** 2, axis=-1) if gains is not None
              else np.full(evaluation.trials, float(sc.elements)))
    return _db(power * energy)


#: bootstrap resamples of the robustness margin's uncertainty
VERDICT_RESAMPLES = 200


def verdict(summary: CompareSummary, per_trial: list, target_db: float, seed: int) -> Verdict:
    """The ranked verdict under the compare table: best final SINR, fastest to the
    target loss, most robust across trials; each with its margin over the next and
    whether the margin is larger than its Monte Carlo uncertainty.

    Parameters
    ----------
    summary : CompareSummary
        The summary built so far (its ``checkpoints`` and ``processors``, each with
        ``final`` and ``snapshots_to_3db``; the verdict itself is not read).
    per_trial : list of (ndarray, dict)
        Per processor: final SINR in dB per trial, and the across-trial statistics of
        the normalised SINR per checkpoint (:func:`adapt.engine.scores.trial_summary`).
    target_db : float
        The loss target of "to 3 dB".
    seed : int
        Seeds the bootstrap of the robustness margin (results are reproducible).

    Returns
    -------
    Verdict
        ``final_sinr``, ``to_target`` and ``robust``: each a :class:`Ranking` (labels
        ranked, ``best``, ``runner_up``, ``margin``, ``uncertainty``, ``clear``: the
        margin is larger than the uncertainty; None when it cannot be told).

    Notes
    -----
    Every processor sees the same trials (common random numbers), so margins are
    paired: the uncertainty of the final-SINR margin is twice the standard error of the
    mean per-trial difference; of the robustness margin (difference of the 10th
    percentiles of the final SINR) twice its bootstrap standard error (Efron and
    Tibshirani 1993, ch. 6); "to target" is clear when the best processor reaches the
    target, even at its mean normalised SINR minus two standard errors, at an earlier
    checkpoint than the next reaches it at plus two standard errors.
    """
    procs = summary.processors
    labels = [p.label for p in procs]
    # the clairvoyant bound is what the others are measured against, not a contender
    contenders = [i for i, p in enumerate(procs) if not is_clairvoyant(p.method)]
    checkpoints = np.asarray(summary.checkpoints)
    finals = [np.asarray(x, float) for x, _ in per_trial]

    def entry(order, margin, uncertainty, clear, unit):
        ranking = tuple(labels[i] for i in order)
        return Ranking(ranking=ranking, best=ranking[0] if ranking else None,
                       runner_up=ranking[1] if len(ranking) > 1 else None, margin=margin,
                       uncertainty=uncertainty, clear=clear, unit=unit)

    def paired(i, j, stat):
        ok = np.isfinite(finals[i]) & np.isfinite(finals[j])
        return finals[i][ok], finals[j][ok]

    # best final SINR: mean over trials of dB
    means = [p.final.sinr_db_mean for p in procs]
    order = sorted((i for i in contenders if _finite(means[i])), key=lambda i: -means[i])
    margin = unc = clear = None
    if len(order) > 1:
        a, b = paired(order[0], order[1], None)
        if len(a) > 1:
            diff = a - b
            margin = float(np.mean(diff))
            unc = float(2 * np.std(diff, ddof=1) / math.sqrt(len(diff)))
            clear = bool(margin > unc)
    final_sinr = entry(order, margin, unc, clear, "dB")

    # fastest to the target: first checkpoint where the mean normalised SINR is within
    # target_db of the optimum; its range from the mean +- 2 standard errors
    target = 10.0 ** (-float(target_db) / 10.0)

    def first(curve):
        hit = np.nonzero(np.nan_to_num(curve, nan=-1.0) >= target)[0]
        return int(checkpoints[hit[0]]) if len(hit) else None

    reach = []
    for i, (_, stats) in enumerate(per_trial):
        mean, sem = np.asarray(stats["mean"], float), np.nan_to_num(stats["sem"], nan=0.0)
        reach.append((procs[i].snapshots_to_3db,
                      first(mean + 2 * sem), first(mean - 2 * sem)))
    order = sorted((i for i in contenders if reach[i][0] is not None), key=lambda i: reach[i][0])
    order += [i for i in contenders if reach[i][0] is None]
    margin = unc = clear = None
    if len(order) > 1 and reach[order[0]][0] is not None:
        best, nxt = reach[order[0]], reach[order[1]]
        margin = None if nxt[0] is None else float(nxt[0] - best[0])
        clear = bool(best[2] is not None and (nxt[1] is None or best[2] < nxt[1]))
    to_target = entry(order, margin, unc, clear, "snapshots")

    # most robust: the highest 10th percentile of the final SINR over trials
    p10 = [p.final.sinr_db_p10 for p in procs]
    order = sorted((i for i in contenders if _finite(p10[i])), key=lambda i: -p10[i])
    margin = unc = clear = None
    if len(order) > 1:
        a, b = paired(order[0], order[1], None)
        if len(a) > 1:
            margin = float(p10[order[0]] - p10[order[1]])
            rng = np.random.default_rng(seed)
            pick = rng.integers(0, len(a), size=(VERDICT_RESAMPLES, len(a)))
            diffs = np.percentile(a[pick], 10, axis=1) - np.percentile(b[pick], 10, axis=1)
            unc = float(2 * np.std(diffs, ddof=1))
            clear = bool(margin > unc)
    return Verdict(final_sinr=final_sinr, to_target=to_target,
                   robust=entry(order, margin, unc, clear, "dB"))


def _finite(v) -> bool:
    return v is not None and math.isfinite(float(v))


def as_summary(summary) -> CompareSummary:
    """A :class:`CompareSummary` as it is, or the one of a ``metrics.json`` mapping."""
    return typed(summary, CompareSummary, "a metrics.json mapping")


def verdict_lines(summary: CompareSummary | Mapping) -> list[str]:
    """The verdict of :func:`verdict` and the interference cost as short sentences (for
    the table and report.html); empty for a summary without them. ``summary``: a
    :class:`CompareSummary` or a ``metrics.json`` mapping."""
    summary = as_summary(summary)
    v = summary.verdict
    if v is None:
        return []
    lines = []

    def said(e: Ranking, what, unit_word):
        if e.best is None:
            return None
        if e.runner_up is None:
            return f"{what}: {e.best}"
        if e.margin is None:
            return f"{what}: {e.best} ({e.runner_up} never gets there)" \
                if e.unit == "snapshots" else f"{what}: {e.best}"
        digits = 0 if e.unit == "snapshots" else 2
        if e.margin == 0:
            return f"{what}: {e.best} and {e.runner_up} tie"
        text = f"{what}: {e.best}, {format_number(e.margin, digits)} {unit_word} " \
               f"ahead of {e.runner_up}"
        if e.clear is None:
            return text
        if e.uncertainty is not None:
            text += f" (Monte Carlo uncertainty {format_number(e.uncertainty, digits)} " \
                    f"{unit_word}: {'clear' if e.clear else 'not clear'})"
        else:
            text += " (" + ("clear beyond" if e.clear else "within") + \
                    " the Monte Carlo uncertainty)"
        return text

    for entry, what, unit_word in ((v.final_sinr, "best final SINR", "dB"),
                                   (v.to_target, f"fastest to {summary.target_db:g} dB",
                                    "snapshots"),
                                   (v.robust, "most robust (highest SINR of the worst 10 % of "
                                    "trials)", "dB")):
        text = said(entry, what, unit_word)
        if text:
            lines.append(text)
    cost = summary.interference_cost_db
    if _finite(cost):
        lines.append(f"interference cost even at the optimum: {format_number(cost)} dB "
                     f"(interference-free array "
                     f"{format_number(summary.interference_free_sinr_db)} dB SINR, optimum "
                     f"{format_number(summary.optimum_sinr_db)} dB)")
    return lines


# --------------------------------------------------------------------------- table
def own_optima(summary: CompareSummary, tolerance_db: float = 0.01) -> list[tuple[float, list[str]]]:
    """The optima the processors' losses are measured against where they differ from
    the summary's (one-tap) optimum by more than ``tolerance_db``: (dB, labels) for
    each distinct value, highest first. A processor's own optimum is the mean over
    trials of its final output SINR plus its loss, both means of dB, so their sum is the
    mean of the optimum it is scored against: for space-time weights in a wideband
    scene, the largest generalised eigenvalue for its number of taps."""
    base = summary.optimum_sinr_db
    groups: dict[float, list[str]] = {}
    for p in summary.processors:
        f = p.final
        if not (_finite(f.sinr_db_mean) and _finite(f.loss_db_mean)):
            continue
        value = f.sinr_db_mean + f.loss_db_mean
        if _finite(base) and abs(value - base) <= tolerance_db:
            continue
        key = next((k for k in groups if abs(k - value) <= tolerance_db), value)
        groups.setdefault(key, []).append(p.label)
    return sorted(groups.items(), key=lambda kv: -kv[0])


def own_optima_text(summary: CompareSummary) -> str | None:
    """The sentence naming :func:`own_optima` (None when every processor is scored
    against the summary's optimum), for the table and the report."""
    own = own_optima(summary)
    if not own:
        return None
    return ("for a longer delay line the optimum is higher, and each processor's loss is "
            "against the optimum for its own weight length: "
            + "; ".join(f"{_cell(v)} dB for {', '.join(labels)}" for v, labels in own))


def _cell(v, decimals: int = 2, none: str = "n/a") -> str:
    return format_number(v, decimals, none=none)


def render_table(summary: CompareSummary | Mapping, width: int = 100) -> str:
    """Plain-text summary of a comparison (a :class:`CompareSummary` or a
    ``metrics.json`` mapping), aligned, at most ``width`` columns wide (a label too
    long for its column is written whole on a line of its own, its numbers on the
    next)."""
    summary = as_summary(summary)
    heads = [("SINR dB", "final"), ("loss dB", "vs opt"), ("to 3 dB", "mean"),
             ("to 3 dB", f"{summary.fraction * 100:.0f}% trials"),
             ("worst null", "dB"), ("WNG", "dB"), ("time", "s")]
    # "stays within" differs from "first reached" when the loss comes back (the scene
    # changes, or the mean wanders): then both are shown
    stays = any(p.snapshots_to_stay_within_3db != p.snapshots_to_3db
                for p in summary.processors)
    if stays:
        heads.insert(4, ("stays 3 dB", "mean from"))
    rows = []
    for p in summary.processors:
        f = p.final
        rows.append([p.label,
                     _cell(f.sinr_db_mean), _cell(f.loss_db_mean),
                     _cell(p.snapshots_to_3db, 0, "never"),
                     _cell(p.snapshots_to_3db_fraction, 0, "never"),
                     _cell(f.worst_null_db, 1),
                     _cell(f.white_noise_gain_db), _cell(p.seconds, 2)])
        if stays:
            rows[-1].insert(5, _cell(p.snapshots_to_stay_within_3db, 0, "never"))
    numw = [max(len(h[0]), len(h[1]), *(len(r[i + 1]) for r in rows)) for i, h in enumerate(heads)]
    fixed = sum(numw) + 2 * len(numw)
    labw = max(9, min(max([len(r[0]) for r in rows] + [9]), max(9, width - fixed)))

    def line(cells):
        # a label longer than its column is never cut: it gets a line of its own and
        # its numbers follow on the next line
        first = cells[0] if len(cells[0]) <= labw else ""
        text = (first.ljust(labw) + "".join("  " + c.rjust(w) for c, w in zip(cells[1:], numw))).rstrip()
        return text if len(cells[0]) <= labw else cells[0] + "\n" + text

    k = summary.snapshots
    what = (f"{summary.scene}: {summary.elements} elements, {summary.trials} trials, "
            f"{k} snapshots, seed {summary.seed}")
    opt = (f"optimum SINR (clairvoyant MVDR): {_cell(summary.optimum_sinr_db)} dB, mean over "
           f"trials" + ("" if summary.stationary else " at the last snapshot"))
    own = own_optima_text(summary)
    if own:
        opt += "; " + own
    out = [what, opt, "",
           line(["processor"] + [h[0] for h in heads]),
           line([""] + [h[1] for h in heads]),
           "-" * min(width, labw + fixed)]
    out += [line(r) for r in rows]
    on = summary.interferers_on_at_end
    off = [name for name in summary.interferers if on is not None and name not in on]
    if off:
        out += ["", "worst null: interferers on at the last checkpoint only (off then: "
                + ", ".join(off) + ")"]
    said = verdict_lines(summary)
    if said:
        import textwrap
        out += ["", "verdict (margins paired over the same trials):"]
        out += [textwrap.fill(t, width, initial_indent="  ", subsequent_indent="    ")
                for t in said]
    total = summary.seconds
    out += ["", f"loss = optimum minus output SINR, mean over trials of dB; 'to 3 dB' = snapshots "
                f"until the loss is first within {summary.target_db:g} dB ('never': not within "
                f"{k})" + ("; 'stays 3 dB' = snapshots from which the mean loss stays within "
                           "it to the end (first reached and lost again counts only here)"
                           if stays else "")
            + "; time = each processor's own compute time, summed over threads"
            + (f" (whole comparison {total:.1f} s of wall time)" if total is not None else "")]
    if any("n/a" in r[1:] for r in rows) or _cell(summary.optimum_sinr_db) == "n/a":
        out += ["n/a = undefined: no finite value in any trial (e.g. the wanted source is off "
                "at the last checkpoint, so the optimum SINR is 0 and ratios to it are "
                "undefined; metrics.json holds null)"]
    out += [CAUTION]
    return "\n".join(_wrap(t, width) for t in out)


def _wrap(text: str, width: int) -> str:
    if len(text) <= width:
        return text
    import textwrap
    return "\n".join(part if len(part) <= width else "\n".join(textwrap.wrap(part, width))
                     for part in text.split("\n"))


# --------------------------------------------------------------------------- compare
@dataclass
class Comparison:
    """Result of :func:`compare`: the scored :class:`Evaluation` (numpy arrays per
    processor, checkpoint and trial), its :class:`CompareSummary` (``summary``: every
    statistic the table, CSV, figures and report show), the scene as run and the
    processors. ``metrics`` is the summary as the ``metrics.json`` mapping."""
    evaluation: Evaluation
    summary: CompareSummary
    scene: Scene
    processors: list = field(default_factory=list)
    seconds: float = 0.0

    def __post_init__(self):
        # a metrics.json mapping given in the summary's place (as the first release's
        # Comparison(evaluation, metrics, ...) did) is read into its summary
        self.summary = as_summary(self.summary)

    @property
    def metrics(self) -> dict:
        """The ``metrics.json`` mapping (``summary.to_json()``; a new dict each time)."""
        return self.summary.to_json()

    def table(self, width: int = 100) -> str:
        """The terminal summary table (plain text)."""
        return render_table(self.summary, width)

    def processor(self, label: str) -> dict:
        """The ``metrics.json`` entry of one processor, by label (KeyError if none;
        ``summary.processor(label)`` is the typed entry)."""
        return self.summary.processor(label).to_json()

    @property
    def labels(self) -> list[str]:
        return self.summary.labels

    def __str__(self) -> str:
        return self.table()


def check_target(target_db, fraction) -> None:
    """The target loss (a finite number of dB) and the share of trials in (0, 1]:
    InputError before any work."""
    import math
    if isinstance(target_db, bool) or not isinstance(target_db, (int, float)) \
            or not math.isfinite(target_db):
        raise InputError("the target loss must be a finite number of dB", path="target_db",
                         value=target_db, allowed="a finite number, e.g. 3")
    if isinstance(fraction, bool) or not isinstance(fraction, (int, float)) \
            or not 0 < fraction <= 1:
        raise InputError("the share of trials must be in (0, 1]", path="fraction",
                         value=fraction, allowed="a number in (0, 1], e.g. 0.9")


def compare(scene, processors: Sequence | None = None, trials: int | None = None,
            snapshots: int | None = None, seed: int | None = None, checkpoints=None,
            progress: Callable[[int], None] | None = None, *, target_db: float = 3.0,
            fraction: float = 0.9, tail: int = TAIL, chunk: int | None = None,
            workers: int | None = None, scheduler: str | None = None, store=None,
            on_chunk: Callable[[int, int], None] | None = None,
            threads: int | None = None, patterns: bool = True) -> Comparison:
    """Run and score ``processors`` on ``scene`` (a :class:`Scene` or a scene file).

    processors: specs or Processor objects (default: the scene's ``processors`` list;
    SpecError if there are none); trials, snapshots, seed: override the scene's;
    checkpoints: snapshot counts to score (list or "1,2,4" text; default geometric,
    4 per octave); progress: called with the number of trial-snapshots done after each
    block (the total is ``trials * (snapshots + tail)``); chunk: trials per chunk
    (default :func:`adapt.engine.plan.chunk_size`); threads: run the chunks on this many
    threads of this process (default: every usable core; 1: one after another); workers:
    run on that many local Dask worker processes, or scheduler: on an existing Dask
    cluster (not with threads); store: a folder that
    keeps finished chunks, so an interrupted run resumes where it stopped (a callable
    returning the folder is called once the work starts); on_chunk: called with (first
    trial, count) after each finished chunk; patterns: False leaves out the pattern
    scores (pointing error, peak sidelobe), the costliest part of the summary. Results are bit-identical whatever the
    chunking, the number of threads or workers or any interruption and resume.
    """
    check_target(target_db, fraction)
    used, procs = prepare_scene(scene, processors, trials, snapshots, seed)
    checkpoints = checkpoints_for(checkpoints, used.snapshots)
    tail = whole_count(tail, "tail", MAX_SNAPSHOTS, low=0)
    check_scheduler_address(scheduler)
    estimate_run(used, len(procs), len(checkpoints), tail, threads).check_fits(
        "fewer trials, checkpoints, snapshots or processors", used.trials)
    from adapt.engine.executors import check_cluster_options, check_threads
    check_threads(threads, remote=workers is not None or scheduler is not None)
    check_cluster_options(workers, scheduler)
    if chunk is not None:
        chunk = whole_count(chunk, "chunk", MAX_TRIALS)
    t0 = time.perf_counter()
    ev = run_trials(used, procs, checkpoints, chunk=chunk, tail=tail, progress=progress,
                  workers=workers, scheduler=scheduler, store=store, on_chunk=on_chunk,
                  threads=threads)
    summary = summarise(ev, target_db, fraction, patterns=patterns)
    seconds = time.perf_counter() - t0
    return Comparison(evaluation=ev, summary=replace(summary, seconds=seconds), scene=used,
                      processors=procs, seconds=seconds)


def write_compare_run(comparison: Comparison, out_root="runs",
                      command_line: str | None = None, figures: bool = True,
                      folder=None) -> Path:
    """Write ``comparison`` to a NEW run folder under ``out_root`` and return its path.

    Contents: ``scene.yaml`` (the scene as run), ``metrics.json``, ``curves.csv``,
    the figures and ``report.html`` (when :mod:`adapt.report` provides them) and
    ``manifest.json`` (versions, seed, command line, sha256 of every file). Every file
    is written atomically; an existing folder is never touched, except ``folder``: the
    run folder this comparison was computed into (resumable, see
    :func:`adapt.report.runfolder.start_run_folder`), which is completed and sealed.
    """
    from adapt.report import runfolder as runs
    from adapt.studies.check import summarise_scene
    if not isinstance(comparison, Comparison):
        raise ValueError(f"expected a Comparison, got {type(comparison).__name__}")
    return runs.write_run(comparison.scene, comparison.evaluation, comparison.summary,
                          out_root=out_root, command_line=command_line, kind="compare",
                          figures=figures, table=comparison.table(), folder=folder,
                          scene_summary=summarise_scene(comparison.scene) if figures else "",
                          verdict=verdict_lines(comparison.summary),
                          notes=[t for t in [own_optima_text(comparison.summary)] if t])
