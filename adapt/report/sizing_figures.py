"""The sizing figure and report sections, drawn from a sizing summary alone.

The summary is ``adapt.studies.summaries.SizingSummary`` (read by its attributes: this
layer sits below the studies); ``SizingSummary.from_mapping`` reads it back from any run
folder's sizing.json, so a figure can be redrawn from the file.

``sizing_figure(summary)`` plots, for each processor, the mean normalised SINR in dB
(``10 log10`` of the mean over trials of ``rho = SINR / SINR_opt``) against snapshots on a
log axis, the band between the 10th and 90th percentiles of rho over trials, the
closed-form mean where one applies (dashed; Reed, Mallett and Brennan 1974 or the
signal-present law of :mod:`adapt.studies.theory`), the target line, and the rules of thumb as
vertical marks (about 2N unloaded, about 2J loaded; Carlson 1988).

``sizing_sections(summary, png)`` gives the ``(heading, parts)`` sections of report.html
for :func:`adapt.report.html.build_page`.
"""
from __future__ import annotations

import math

import numpy as np

from adapt.numerics.units import power_db as _db
from adapt.report.figures import (
    REFERENCE_COLOUR,
    add_title,
    label_axes,
    legend_outside,
    log_minor_grid,
    new_figure,
    save_png,
    series_styles,
)
from adapt.report.html import caution, figure, paragraph, table

__all__ = ["sizing_figure", "sizing_figure_png", "sizing_sections"]


def _check(summary) -> None:
    if not all(hasattr(summary, k) for k in ("processors", "rules_of_thumb", "target_loss_db")):
        raise ValueError("expected a sizing summary (SizingSummary; SizingSummary.from_mapping "
                         f"reads a sizing.json mapping), got {type(summary).__name__}")
    if not summary.processors:
        raise ValueError("the sizing summary has no processors to draw")


def _neg(values) -> np.ndarray:
    return -np.array([np.nan if v is None or not math.isfinite(v) else float(v) for v in values])


def _count_ticks(ax, kmin: float, kmax: float) -> None:
    """Plain integer labels at 1-2-5 steps on the log snapshot axis (no 3x10^1)."""
    from matplotlib.ticker import FixedLocator, NullFormatter
    decades = range(int(math.floor(math.log10(max(kmin, 1)))),
                    int(math.ceil(math.log10(max(kmax, 1)))) + 1)
    ticks = [m * 10 ** d for d in decades for m in (1, 2, 5) if kmin <= m * 10 ** d <= kmax]
    if len(ticks) < 2:
        ticks = sorted({int(kmin), int(kmax)})
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.set_xticklabels([f"{t:,}" for t in ticks])
    ax.xaxis.set_minor_formatter(NullFormatter())


def sizing_figure(summary):
    """Mean normalised SINR (dB) against snapshots of a sizing summary: see the module
    docstring."""
    _check(summary)
    styles = series_styles(p.label for p in summary.processors)
    fig, ax = new_figure()
    marks: dict[int, list[str]] = {}
    for p in summary.processors:
        st = styles[p.label]
        pts = p.points
        k = np.array([r.snapshots for r in pts], dtype=float)
        mean_db = _db(r.normalised_sinr_mean for r in pts)
        # loss p90 is the worst 10 %: rho's 10th percentile; loss p10 rho's 90th
        lo = _neg(r.loss_db_p90 for r in pts)
        hi = _neg(r.loss_db_p10 for r in pts)
        many = len(k) > 12
        ax.plot(k, mean_db, color=st["color"], linestyle=st["linestyle"], linewidth=1.6,
                marker=None if many else st["marker"], markersize=3.5,
                label=f"{p.label} (simulation, mean)")
        ax.fill_between(k, lo, hi, color=st["color"], alpha=0.15, linewidth=0)
        th = _db(r.theory_normalised_sinr_mean for r in pts)
        if np.isfinite(th).any():
            name = p.theory.title if p.theory is not None else "theory"
            # drawn over the simulation, wider and translucent, so both stay visible
            ax.plot(k, th, color=st["color"], linestyle=(0, (4, 2)), linewidth=2.6,
                    alpha=0.55, zorder=3, label=f"{p.label} ({name}, mean)")
        rule = p.rule_of_thumb
        if rule is not None and rule.snapshots:
            marks.setdefault(int(rule.snapshots), []).append(p.label)
    target = -float(summary.target_loss_db)
    ax.axhline(target, color=REFERENCE_COLOUR, linewidth=1.0, linestyle=":",
               label=f"target: {summary.target_loss_db:g} dB loss")
    all_k = [r.snapshots for p in summary.processors for r in p.points]
    kmin, kmax = min(all_k), max(all_k)
    shown = [(kk, labels) for kk, labels in sorted(marks.items()) if kmin <= kk <= kmax]
    for i, (kk, labels) in enumerate(shown):
        ax.axvline(kk, color=REFERENCE_COLOUR, linewidth=0.8, linestyle=(0, (1, 3)))
        # staggered downwards so neighbouring marks' labels never overlap
        ax.annotate(f"rule of thumb {kk}\n({', '.join(labels)})", xy=(kk, 1.0),
                    xycoords=("data", "axes fraction"), xytext=(2, -2 - 22 * i),
                    textcoords="offset points", fontsize=7, va="top",
                    color=REFERENCE_COLOUR)
    ax.set_xscale("log")
    _count_ticks(ax, kmin, kmax)
    if kmax >= 10 * kmin:
        log_minor_grid([ax], kmin, kmax)
    if kmax > kmin:
        ax.set_xlim(kmin, kmax)
    else:
        ax.set_xlim(kmin / 2, kmin * 2)
    ax.set_ylim(bottom=max(ax.get_ylim()[0], -40.0), top=1.0)
    label_axes(ax, xlabel="training snapshots (log scale)",
               ylabel="normalised SINR, dB\n(SINR / optimum; 0 dB is the optimum)")
    handles, labels = ax.get_legend_handles_labels()
    from matplotlib.patches import Patch
    handles.append(Patch(color="#BBBBBB", alpha=0.6))
    labels.append("10th-90th percentile over trials")
    legend_outside(ax, handles, labels, title="processor")
    add_title(fig, f"Snapshot sizing - {summary.scene}",
              f"{summary.trials} trials, {summary.elements} elements, optimum SINR "
              + ("n/a" if summary.optimum_sinr_db is None
                 else f"{summary.optimum_sinr_db:.1f} dB"))
    return fig


def sizing_figure_png(summary) -> bytes:
    """:func:`sizing_figure` rendered to PNG bytes."""
    return save_png(sizing_figure(summary))


def _k(v) -> str:
    return "-" if v is None else str(v)


def _rng(r) -> str:
    if r is None or r[0] is None:
        return "beyond the sweep"
    return f"{r[0]}-{'beyond' if r[1] is None else r[1]}"


def sizing_sections(summary, png: bytes | None = None) -> list:
    """Report sections of a sizing summary: summary, recommendations, simulation against
    theory (the disagreements, stated as findings), the figure, one table per
    processor, notes and the caution."""
    _check(summary)
    t = summary.target_loss_db
    pct = f"{100 * summary.fraction:g} %"
    facts = (f"{summary.elements} elements, {summary.trials} trials, seed "
             f"{summary.seed}, training on "
             + ("interference plus noise" if summary.training != "signal"
                else "the data with the wanted signal present")
             + ", optimum SINR "
             + ("n/a" if summary.optimum_sinr_db is None
                else f"{summary.optimum_sinr_db:.1f} dB")
             + f"; target: at most {t:g} dB loss against the optimum.")
    answers = []
    for p in summary.processors:
        th, rule = p.theory, p.rule_of_thumb
        answers.append([p.label, _k(p.required_snapshots_mean),
                        _rng(p.required_snapshots_mean_range),
                        _k(p.required_snapshots_fraction),
                        _rng(p.required_snapshots_fraction_range),
                        _k(th.required_snapshots) if th is not None else "no closed form",
                        _k(rule.snapshots) if rule is not None else "-"])
    sections = [
        (None, [caution(), paragraph(facts)]),
        ("Recommendations", [
            table(answers, header=["processor", f"{t:g} dB in the mean", "bootstrap 95 % range",
                                   f"{pct} of trials", "Clopper-Pearson 95 % range",
                                   "theory", "rule of thumb"]),
            *[paragraph(p.recommendation) for p in summary.processors]]),
    ]
    viol = summary.assumption_violations
    parts = []
    if summary.disagreements:
        parts += [paragraph("Finding: " + d) for d in summary.disagreements]
    elif any(p.theory is not None for p in summary.processors):
        parts.append(paragraph("Simulation and theory agree within 4 standard errors at "
                               "every point where a closed form applies."))
    else:
        parts.append(paragraph("No closed form applies to these processors (loaded or "
                               "non-SMI methods); only rules of thumb are shown."))
    parts.append(paragraph("Assumptions of the closed forms broken by this scene: "
                           + ("; ".join(viol) if viol else "none") + "."))
    sections.append(("Simulation against theory", parts))
    if png is not None:
        sections.append(("Figure", [figure(
            png, alt="Mean normalised SINR in dB against training snapshots for each "
                     "processor, with percentile bands, theory and the target line",
            caption="Mean normalised SINR (solid), 10th-90th percentile band over trials "
                    "(shaded), closed-form mean (dashed), target (dotted), rules of thumb "
                    "(vertical).", name="sizing")]))
    for p in summary.processors:
        rows = [[r.snapshots, r.normalised_sinr_mean, r.normalised_sinr_sem,
                 r.loss_db_median, r.loss_db_p10, r.loss_db_p90,
                 r.fraction_meeting_target, r.theory_normalised_sinr_mean]
                for r in p.points]
        sections.append((f"Points: {p.label}", [
            paragraph(f"spec: {p.spec}"),
            table(rows, header=["snapshots", "mean rho", "sem", "median loss dB",
                                "p10 loss dB", "p90 loss dB", f"share within {t:g} dB",
                                "theory mean rho"], digits=4)]))
    rt = summary.rules_of_thumb
    sections.append(("Notes", [
        paragraph("rho is the normalised SINR, SINR / optimum SINR, scored on the true "
                  "covariance. 'In the mean': the smallest sweep point from which the mean "
                  "of rho over trials stays at or above the target; its range is the central "
                  "95 % of the same answer over 200 bootstrap resamples of the trials. 'Of "
                  "trials': the smallest sweep point from which the stated share of trials "
                  "stays within the target; its range comes from Clopper-Pearson 95 % "
                  "intervals of that share. p10 loss is the best 10 % of trials, p90 the "
                  "worst 10 %."),
        paragraph("Theory: Reed, Mallett and Brennan (1974), rho ~ Beta(K-N+2, N-1) for "
                  "unloaded SMI trained on Gaussian interference plus noise, half power at "
                  f"2N-3 = {_k(rt.rmb_half_power)}; with the wanted signal in the "
                  "training data rho = eta / (1 + SINR_opt (1 - eta)), eta of the same beta "
                  "law (Boroson 1980), so the snapshots grow about as 1 + SINR_opt. Rules of "
                  f"thumb: about 2N = {_k(rt.unloaded_2n)} unloaded; about 2J = "
                  f"{_k(rt.loaded_2j)} with 10 dB loading (Carlson 1988), J = "
                  f"{_k(rt.strong_interferers)} strong interferers ("
                  f"{rt.strong_definition})."),
    ]))
    return sections
