"""Figures and report sections of a design study (``adapt sweep``).

Input is the plain ``sweep.json`` record (``Sweep.to_json()``), so a study can be
redrawn from its run folder.

* a line study: :func:`line_figure` - mean final SINR against the swept value per
  processor with the clairvoyant optimum (top), and the loss against the optimum with
  its 10th-90th percentile band over trials, one small panel per processor so many
  processors stay readable (bottom rows), the target loss drawn in each;
* a grid study: :func:`grid_figure` - one heat map of the mean loss per processor
  (small multiples, shared colour scale), the target-loss contour drawn on each.
"""
from __future__ import annotations

import math

import numpy as np

from adapt.processors import is_clairvoyant
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

__all__ = ["line_figure", "grid_figure", "sweep_figures", "sweep_sections"]


def _check(record) -> None:
    for key in ("axes", "points", "target_loss_db", "scene"):
        if not isinstance(record, dict) or key not in record:
            raise ValueError(f"expected a sweep record (sweep.json) with '{key}'")


def _labels(record) -> list[str]:
    """The processors drawn: all but the clairvoyant optimum, which is the reference
    curve (its loss is zero by definition)."""
    return [p["label"] for p in record["points"][0]["processors"]
            if not is_clairvoyant(p["method"])] or \
        [p["label"] for p in record["points"][0]["processors"]]


def _series(record, label: str, key: str) -> np.ndarray:
    out = []
    for point in record["points"]:
        entry = next(p for p in point["processors"] if p["label"] == label)
        v = entry["final"].get(key)
        out.append(math.nan if v is None else float(v))
    return np.asarray(out)


def _axis_values(axis) -> tuple[np.ndarray, list[str] | None]:
    """Numeric x positions, and tick labels when the values are words."""
    vals = axis["values"]
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
        return np.asarray(vals, dtype=float), None
    return np.arange(len(vals), dtype=float), [str(v) for v in vals]


def _log_axis(axis, x: np.ndarray) -> bool:
    return axis.get("spacing") == "log" or (x.size > 2 and np.all(x > 0)
                                             and x.max() / x.min() > 100)


def line_figure(record: dict):
    """Final SINR and loss against the swept value (module docstring)."""
    _check(record)
    axis = record["axes"][0]
    x, words = _axis_values(axis)
    labels = _labels(record)
    styles = series_styles(labels)
    n = len(labels)
    cols = min(4, n)
    rows = 1 + math.ceil(n / cols)
    fig, axes = new_figure(rows, cols, size=(2.6 * cols + 2.4, 2.5 * rows + 0.6))
    top = axes[0, 0]
    gs = top.get_subplotspec().get_gridspec()
    for ax in axes[0, 1:]:
        ax.remove()
    top.remove()
    top = fig.add_subplot(gs[0, :])
    from adapt.report.figures import style_axes
    style_axes(top)
    opt = np.asarray([math.nan if p["optimum_sinr_db"] is None else p["optimum_sinr_db"]
                      for p in record["points"]])
    top.plot(x, opt, color=REFERENCE_COLOUR, linestyle="--", linewidth=1.6,
             label="optimum (clairvoyant)")
    for label in labels:
        s = styles[label]
        top.plot(x, _series(record, label, "sinr_db_mean"), color=s["color"],
                 linestyle=s["linestyle"], marker=s["marker"], markersize=3.5,
                 linewidth=1.3, label=label)
    label_axes(top, None, "final SINR (dB)")
    legend_outside(top)
    target = float(record["target_loss_db"])
    panels = axes[1:].ravel()
    finite = [v for label in labels for v in _series(record, label, "loss_db_p90")
              if np.isfinite(v)]
    ymax = max([target * 2] + finite) if finite else target * 2
    for i, ax in enumerate(panels):
        if i >= n:
            ax.remove()
            continue
        label = labels[i]
        s = styles[label]
        mean = _series(record, label, "loss_db_mean")
        lo = _series(record, label, "loss_db_p10")
        hi = _series(record, label, "loss_db_p90")
        ax.fill_between(x, lo, hi, color=s["color"], alpha=0.2, linewidth=0)
        ax.plot(x, mean, color=s["color"], linestyle=s["linestyle"], marker=s["marker"],
                markersize=3, linewidth=1.3)
        ax.axhline(target, color=REFERENCE_COLOUR, linestyle=":", linewidth=1)
        ax.set_title(label if len(label) <= 34 else label[:33] + "~", fontsize=8.5)
        ax.set_ylim(min(-0.5, np.nanmin(lo) if np.any(np.isfinite(lo)) else 0), ymax * 1.05)
        if i % cols == 0:
            label_axes(ax, None, "loss (dB)")
        if i >= n - cols:
            label_axes(ax, axis["key"], None)
    for ax in [top, *[a for a in panels[:n]]]:
        if words is not None:
            every = 1 if ax is top else max(1, math.ceil(len(words) / 7))
            ax.set_xticks(x[::every], words[::every], rotation=30 if len(words) > 6 else 0)
        elif _log_axis(axis, x):
            ax.set_xscale("log")
            if np.max(x) >= 10 * np.min(x):
                log_minor_grid([ax], float(np.min(x)), float(np.max(x)))
    add_title(fig, f"Design study - {record['scene']}",
              f"{axis['key']} varied; {record['trials']} trials, {record['snapshots']} "
              f"snapshots, the same seed at every point; loss band: 10th-90th percentile, "
              f"dotted: {target:g} dB target")
    return fig


def grid_figure(record: dict):
    """Heat maps of the mean loss per processor with the target contour."""
    _check(record)
    a1, a2 = record["axes"]
    x, xw = _axis_values(a1)
    y, yw = _axis_values(a2)
    labels = _labels(record)
    n = len(labels)
    cols = min(3, n)
    rows = math.ceil(n / cols)
    fig, axes = new_figure(rows, cols, size=(3.4 * cols + 1.2, 3.0 * rows + 0.8))
    axes = np.atleast_1d(axes).ravel() if n > 1 else np.asarray([axes])
    target = float(record["target_loss_db"])
    grids = {label: _series(record, label, "loss_db_mean").reshape(len(x), len(y)).T
             for label in labels}
    finite = np.concatenate([g[np.isfinite(g)] for g in grids.values()] + [np.zeros(1)])
    vmax = max(target * 2, float(np.percentile(finite, 98)) if finite.size else 1.0)
    image = None
    xs = np.arange(len(x)) if (xw is not None or _log_axis(a1, x)) else x
    ys = np.arange(len(y)) if (yw is not None or _log_axis(a2, y)) else y
    for i, ax in enumerate(axes):
        if i >= n:
            ax.remove()
            continue
        g = grids[labels[i]]
        image = ax.pcolormesh(xs, ys, np.clip(g, 0, vmax), shading="nearest",
                              cmap="viridis_r", vmin=0, vmax=vmax)
        if np.nanmin(g) <= target <= np.nanmax(g) and len(x) > 1 and len(y) > 1:
            ax.contour(xs, ys, g, levels=[target], colors="white", linewidths=1.5)
        ax.set_title(labels[i] if len(labels[i]) <= 34 else labels[i][:33] + "~",
                     fontsize=8.5)
        if xs is not x:
            ax.set_xticks(xs, xw or [f"{v:.3g}" for v in x], rotation=45, fontsize=7)
        if ys is not y:
            ax.set_yticks(ys, yw or [f"{v:.3g}" for v in y], fontsize=7)
        label_axes(ax, a1["key"], a2["key"] if i % cols == 0 else None)
    if image is not None:
        bar = fig.colorbar(image, ax=list(axes[:n]), shrink=0.9)
        bar.set_label("mean loss against the optimum (dB)", fontsize=8.5)
    add_title(fig, f"Design study - {record['scene']}",
              f"{record['trials']} trials, {record['snapshots']} snapshots, the same seed "
              f"at every point; white contour: {target:g} dB loss")
    return fig


def sweep_figures(record: dict) -> dict[str, bytes]:
    """``{"sweep": png}`` for a line or grid study."""
    fig = line_figure(record) if len(record["axes"]) == 1 else grid_figure(record)
    return {"sweep": save_png(fig)}


def sweep_sections(record: dict, pngs: dict[str, bytes]) -> list:
    """Report sections: caution, what was varied, recommendations, the figure and one
    table of the points."""
    _check(record)
    keys = [a["key"] for a in record["axes"]]
    facts = (f"{len(record['points'])} points ({' x '.join(keys)}), {record['trials']} "
             f"trials each, {record['snapshots']} snapshots, seed {record['seed']} at every "
             "point: the noise, waveforms and hardware errors are the same realisation at "
             "every point (common random numbers), so differences between points are "
             f"measured on paired trials. Target: at most {record['target_loss_db']:g} dB "
             "loss against the clairvoyant optimum.")
    sections = [(None, [caution(), paragraph(facts)]),
                ("Recommendations", [paragraph(r["text"]) for r in record["recommendations"]])]
    if "sweep" in pngs:
        sections.append(("Figure", [figure(
            pngs["sweep"], alt="Final SINR and loss against the varied setting per processor",
            caption="Line study: final SINR with the optimum (top), loss with its 10th-90th "
                    "percentile band per processor. Grid study: mean loss per processor with "
                    "the target contour.", name="sweep")]))
    rows = []
    for point in record["points"]:
        for p in point["processors"]:
            f = p["final"]
            rows.append([*(point["values"][k] for k in keys), p["label"], f["sinr_db_mean"],
                         f["loss_db_mean"], f["loss_db_p10"], f["loss_db_p90"],
                         point["optimum_sinr_db"], p["snapshots_to_3db"]])
    sections.append(("Points", [table(rows, header=[*keys, "processor", "SINR dB",
                                                    "loss dB", "loss p10", "loss p90",
                                                    "optimum dB", "to 3 dB"], digits=3)]))
    return sections
