"""Figures of a scored run: convergence, beam patterns, null depths; shared style helpers.

Every figure is a :class:`matplotlib.figure.Figure` built directly on the Agg canvas
(never through ``pyplot``), so figures are made headless, in worker threads, and leave no
global plotting state behind. Font sizes are set on each text element rather than through
``rcParams`` for the same reason.

Style helpers shared with the other report modules (sizing figures reuse them):

* :data:`PALETTE` - seven colours of Okabe and Ito (2008), "Color Universal Design",
  chosen to stay distinguishable under the common colour-vision deficiencies (their
  black is kept for reference curves), then three of Paul Tol's; :data:`LINE_STYLES`
  tell apart the variants of one processor family;
* :func:`series_styles` - one (colour, line style, marker) per label, in the order given,
  grouped by processor family (one colour per method), so the same processor list gets
  the same look in every figure of a report and no two curves share colour and style;
* :func:`new_figure`, :func:`style_axes`, :func:`add_title`, :func:`legend_outside` and
  :func:`save_png` (PNG bytes at :data:`DPI` dots per inch).

Figures of a run: an :class:`adapt.engine.evaluate.Evaluation` (the scene, the run facts,
every trial's final weights and true array) and its comparison summary
(``adapt.studies.summaries.CompareSummary``, read by its attributes: this layer sits below
the studies). Statistics over trials are computed once, in the summary, and read from it:
the convergence curves, the optimum curve and the floored null depths; only what the
summary does not hold (patterns over angle and frequency) comes from the weights.

* :func:`convergence_figure` - output SINR against snapshots (log axis), mean over trials
  of the SINR in dB with the 10th-90th percentile band, the optimum (clairvoyant MVDR)
  SINR, and the loss against the optimum in a second panel;
* :func:`beam_pattern_figure` - trial-averaged power pattern of each processor's final
  weights on the azimuth cut at the look elevation, computed with each trial's TRUE array
  (:func:`mean_beam_pattern_db`, :func:`mean_beam_patterns_db`), every source marked;
* :func:`null_depth_figure` - grouped bars of the response toward each interferer
  relative to the look direction at the final checkpoint, with each interferer's JNR
  (the summary's floored null depths, :func:`null_depth_statistics`).

Checkable fact (tested): the uniform phase-steered sum on a 16-element half-wavelength
line has its first sidelobe at -13.26 dB (the sin(Nx)/(N sin x) pattern; antenna
handbook, e.g. Balanis, *Antenna Theory*, ch. 6), and :func:`mean_beam_pattern_db`
reproduces it from the conventional processor's final weights.
"""
from __future__ import annotations

import io
import math
from typing import TYPE_CHECKING, Iterable, Sequence

import numpy as np

from adapt.processors import is_clairvoyant
from adapt.scene import geometry

if TYPE_CHECKING:                      # matplotlib is imported when a figure is drawn
    from matplotlib.figure import Figure

__all__ = [
    "PALETTE", "LINE_STYLES", "MARKERS", "DPI", "FIGURE_SIZE", "FONT_SIZE",
    "HATCHES", "PATTERN_FLOOR_DB",
    "series_styles", "run_styles", "new_figure", "style_axes", "label_axes", "add_title", "legend_outside",
    "save_png", "figure_to_png", "is_png", "run_title",
    "default_azimuths", "mean_beam_pattern_db", "mean_beam_patterns_db",
    "convergence_figure", "beam_pattern_figure", "null_depth_figure", "null_depth_statistics",
    "response_map_figure", "response_map_db", "processor_panels",
    "standard_figures", "FIGURE_TEXT", "band_map_db", "band_map_figure",
    "WIDEBAND_FIGURE_TEXT",
]

#: Okabe & Ito (2008) colour-blind-safe palette less black, reordered so the first
#: colours are the most distinct on white (yellow last: weakest contrast on paper),
#: then three darker colours of Paul Tol's colour-blind-safe "muted" scheme (Tol 2021,
#: "Colour schemes", SRON/EPS/TN/09-002) for scenes with many processor families.
PALETTE = ("#0072B2",   # blue
           "#D55E00",   # vermillion
           "#009E73",   # bluish green
           "#CC79A7",   # reddish purple
           "#E69F00",   # orange
           "#56B4E9",   # sky blue
           "#882255",   # wine (Tol)
           "#332288",   # indigo (Tol)
           "#999933",   # olive (Tol)
           "#F0E442")   # yellow
#: (the palette's black is kept for reference curves and the wanted source's marker)
LINE_STYLES = ("-", "--", "-.", ":")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
HATCHES = ("", "////", "....", "xxxx")
#: colour of reference curves (the optimum) and of source markers
REFERENCE_COLOUR = "#404040"
DESIRED_COLOUR = "#000000"
INTERFERER_COLOUR = "#8C8C8C"
#: coherent copies (multipath, repeaters) are marked apart from independent interferers
COPY_COLOUR = "#B8561B"
COPY_STYLE = (0, (1, 2))
DPI = 100                         # 800 x 480 pixels at FIGURE_SIZE: sharp on screen, quick to render
FIGURE_SIZE = (8.0, 4.8)          # inches
FONT_SIZE = 9.0                   # points, axis labels and legends
TITLE_SIZE = 10.5
TICK_SIZE = 8.0
PATTERN_FLOOR_DB = -80.0


# ---------------------------------------------------------------------------- style
def series_styles(labels: Iterable[str], methods: Iterable[str] | None = None) -> dict[str, dict]:
    """One style per label, in the order given: ``{label: {"color", "linestyle",
    "marker", "hatch"}}`` (hatch: for bars, changes with the line style).

    Processors are grouped by family: every label of one method (``methods``, aligned
    with ``labels``; default: the label's first word, which is the method for default
    labels) shares a colour, and its variants differ by line style, marker and hatch;
    the clairvoyant ``optimum`` is drawn in the reference colour. Families take the
    colours of :data:`PALETTE` in order; no two labels get the same colour and line
    style (with more than ``len(PALETTE) * len(LINE_STYLES)`` labels the markers still
    differ). Pass the same lists to every figure of a report and each processor keeps
    its look throughout. Duplicate labels keep their first style.
    """
    labels = list(labels)
    methods = [lb.split(" ")[0] if lb else "" for lb in labels] if methods is None \
        else list(methods)
    if len(methods) != len(labels):
        raise ValueError(f"{len(labels)} labels but {len(methods)} methods")
    families: dict[str, int] = {}
    used: set = set()
    out: dict[str, dict] = {}
    for label, method in zip(labels, methods):
        if label in out:
            continue
        if is_clairvoyant(method):
            colours = [REFERENCE_COLOUR] + list(PALETTE)
        else:
            f = families.setdefault(method, len(families))
            colours = [PALETTE[(f + k) % len(PALETTE)] for k in range(len(PALETTE))]
        # the family colour with the first free line style, else the next colours
        free = [(c, d) for c in colours for d in range(len(LINE_STYLES))
                if (c, LINE_STYLES[d]) not in used]
        choice = free[0] if free else (colours[0], len(out) % len(LINE_STYLES))
        colour, i_dash = choice
        used.add((colour, LINE_STYLES[i_dash]))
        i = len(out)
        out[label] = {"color": colour, "linestyle": LINE_STYLES[i_dash],
                      "marker": MARKERS[i % len(MARKERS)],
                      "hatch": HATCHES[i_dash % len(HATCHES)]}
    return out


def run_styles(evaluation) -> dict[str, dict]:
    """:func:`series_styles` of a run's processors, grouped by their methods."""
    procs = evaluation.processors
    return series_styles([p.label for p in procs], [p.method for p in procs])


def load_drawing_library_in_background():
    """Start importing the drawing library (matplotlib's figure, Agg canvas and font
    list; a third of a second) on a daemon thread, so a command that will draw its
    figures after the trials pays for it while they run. Returns the thread. Safe to
    call more than once; an import that fails here fails again, with its message, when
    a figure is drawn."""
    import threading

    def load():
        try:
            from matplotlib.backends import backend_agg  # noqa: F401
            from matplotlib.figure import Figure  # noqa: F401
        except Exception:           # reported when a figure is drawn
            pass

    t = threading.Thread(target=load, name="adapt-load-figures", daemon=True)
    t.start()
    return t


#: the minor grid's colour and line width (style_axes, log_minor_grid)
MINOR_GRID_COLOUR = "#EEEEEE"
MINOR_GRID_WIDTH = 0.4


def new_figure(rows: int = 1, columns: int = 1, size: tuple[float, float] | None = None,
               height_ratios: Sequence[float] | None = None, sharex: bool = False):
    """A fresh ``Figure`` on its own Agg canvas and its axes (a single Axes when
    ``rows == columns == 1``, else a 2-D array), no pyplot involved."""
    if rows < 1 or columns < 1:
        raise ValueError(f"a figure needs at least one row and column, got {rows} x {columns}")
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=size or FIGURE_SIZE, dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    kw = {"height_ratios": list(height_ratios)} if height_ratios is not None else None
    axes = fig.subplots(rows, columns, squeeze=False, sharex=sharex, gridspec_kw=kw)
    for ax in axes.ravel():
        style_axes(ax)
    return fig, (axes[0, 0] if rows == columns == 1 else axes)


def style_axes(ax) -> None:
    """Light grid behind the data, no top/right frame, readable tick labels."""
    ax.set_axisbelow(True)
    ax.grid(True, which="major", color="#D9D9D9", linewidth=0.6)
    ax.grid(True, which="minor", color=MINOR_GRID_COLOUR, linewidth=MINOR_GRID_WIDTH)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(which="both", labelsize=TICK_SIZE)


def label_axes(ax, xlabel: str | None = None, ylabel: str | None = None) -> None:
    """Axis labels at the report's font size."""
    if xlabel is not None:
        ax.set_xlabel(xlabel, fontsize=FONT_SIZE)
    if ylabel is not None:
        ax.set_ylabel(ylabel, fontsize=FONT_SIZE)


def add_title(fig, title: str, subtitle: str | None = None) -> None:
    """Figure title (and an optional smaller second line)."""
    if subtitle and len(subtitle) > 90:          # keep a long subtitle inside the figure
        import textwrap
        subtitle = "\n".join(textwrap.wrap(subtitle, 90))
    text = title if not subtitle else f"{title}\n{subtitle}"
    fig.suptitle(text, fontsize=TITLE_SIZE)


def legend_outside(ax, handles=None, labels=None, title: str | None = None):
    """A legend to the right of the axes, out of the data's way."""
    kw = {}
    if handles is not None:
        kw["handles"] = handles
    if labels is not None:
        kw["labels"] = labels
    leg = ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0,
                    fontsize=FONT_SIZE - 0.5, frameon=False, title=title, **kw)
    if title:
        leg.get_title().set_fontsize(FONT_SIZE)
    return leg


PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def is_png(data: bytes) -> bool:
    """True when ``data`` starts with the 8-byte PNG signature (PNG spec, ISO/IEC 15948)."""
    return isinstance(data, (bytes, bytearray)) and bytes(data[:8]) == PNG_SIGNATURE


def save_png(fig, dpi: int = DPI) -> bytes:
    """Render ``fig`` to PNG bytes with the Agg renderer (thread-safe, headless).

    No timestamp is written, so the same figure gives the same bytes.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    if not isinstance(fig, Figure):
        raise ValueError(f"expected a matplotlib Figure, got {type(fig).__name__}")
    if not dpi or dpi <= 0:
        raise ValueError(f"dpi must be > 0, got {dpi}")
    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None},
                facecolor="white")
    return buf.getvalue()


#: another name for save_png, kept for callers of the first release
figure_to_png = save_png


def run_title(evaluation, what: str) -> tuple[str, str]:
    """(title, subtitle) naming the figure, the scene, trials and elements."""
    sc = evaluation.scene
    title = f"{what} - {sc.name}"
    k = int(evaluation.snapshots)
    last = int(evaluation.checkpoints[-1])
    sub = (f"{evaluation.trials} trial{'s' if evaluation.trials != 1 else ''}, "
           f"{sc.elements} element{'s' if sc.elements != 1 else ''} ({sc.array.layout}), "
           f"{k} snapshot{'s' if k != 1 else ''}"
           + (f" (last checkpoint {last})" if last != k else ""))
    return title, sub


def _check_evaluation(evaluation) -> None:
    for name in ("scene", "processors", "checkpoints", "optimum_sinr", "trials"):
        if not hasattr(evaluation, name):
            raise ValueError(f"expected an adapt.engine.evaluate.Evaluation, got {type(evaluation).__name__}")
    if not evaluation.processors:
        raise ValueError("the evaluation has no processors to draw")


def _check_summary(summary, evaluation) -> None:
    """``summary`` is the comparison summary of ``evaluation`` (a
    ``adapt.studies.summaries.CompareSummary``, read by its attributes: the report
    layer sits below the studies): the same processors, in the same order."""
    if not hasattr(summary, "processors") or not hasattr(summary, "optimum_curve"):
        raise ValueError("expected the comparison summary (CompareSummary) of the run, got "
                         f"{type(summary).__name__}")
    have = [p.label for p in summary.processors]
    want = [p.label for p in evaluation.processors]
    if have != want:
        raise ValueError(f"the summary's processors {have} are not the run's {want}")


# ---------------------------------------------------------------------- convergence
def _summary_curves(summary) -> dict:
    """Per label ``(mean, p10, p90)`` of the output SINR in dB and the mean loss per
    checkpoint, read from a comparison summary, so the figure shows the statistics the
    table and CSV show, computed once."""
    return {p.label: tuple(np.array(getattr(p.curve, k), dtype=float) for k in
                           ("sinr_db_mean", "sinr_db_p10", "sinr_db_p90", "loss_db_mean"))
            for p in summary.processors}


def null_depth_statistics(summary, labels: Sequence[str] | None = None
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """The floored null-depth statistics of a comparison summary as arrays (P, J):
    mean, 10th and 90th percentile over trials, dB re the look direction, one row per
    processor (``labels``, default all) and one column per interferer of
    ``summary.interferers``, and the floor they were taken at. ValueError for a
    summary without them (written before they were kept)."""
    floor = getattr(summary, "null_depth_floor_db", None)
    procs = summary.processors if labels is None else [summary.processor(lb) for lb in labels]
    if floor is None or any(p.null_depths is None for p in procs):
        raise ValueError("the summary holds no floored null depths (null_depth_floored_db); "
                         "it was written before they were kept")
    names = list(summary.interferers)
    out = np.full((3, len(procs), len(names)), np.nan)
    for i, p in enumerate(procs):
        for j, name in enumerate(names):
            d = p.null_depths[name]
            out[:, i, j] = [np.nan if v is None else v for v in (d.mean, d.p10, d.p90)]
    return out[0], out[1], out[2], float(floor)


#: processor families drawn together when a run has too many curves for one panel
FAMILY_GROUPS = (("fixed beams", ("conventional",)),
                 ("sample-covariance (block) methods", ("smi", "lcmv", "power_inversion",
                                                       "eigenspace")),
                 ("recursive methods on the reference", ("lms", "nlms", "rls")),
                 ("constrained recursive methods", ("frost", "gsc")))
#: at most this many processors share one convergence panel
PANEL_CURVES = 6


def processor_panels(processors) -> list[tuple[str, list]]:
    """Processors split into (title, processors) panels for small multiples: one panel
    when there are at most :data:`PANEL_CURVES` of them (the clairvoyant optimum, drawn
    as the reference in every panel, not counted), else one per family group of
    :data:`FAMILY_GROUPS` (other methods in a last group), each cut into panels of at
    most :data:`PANEL_CURVES`; neighbouring groups that fit together share a panel."""
    curves = [p for p in processors if not is_clairvoyant(p.method)]
    if len(curves) <= PANEL_CURVES:
        return [("", curves)]
    out = []
    taken = set()
    groups = [(title, [p for p in curves if p.method in methods]) for title, methods in FAMILY_GROUPS]
    for _, members in groups:
        taken.update(id(p) for p in members)
    groups.append(("other methods", [p for p in curves if id(p) not in taken]))
    for title, members in groups:
        for k in range(0, len(members), PANEL_CURVES):
            part = members[k:k + PANEL_CURVES]
            if not part:
                continue
            if out and len(out[-1][1]) + len(part) <= PANEL_CURVES:   # small groups share
                out[-1] = (f"{out[-1][0]}; {title}", out[-1][1] + part)
            else:
                out.append((title, part))
    return out


def _time_axis_linear(scene) -> bool:
    """A pulsing or moving scene is read against a linear time axis (its events are
    evenly spaced in time); a stationary one against a log axis (convergence)."""
    return not scene.stationary


def convergence_figure(evaluation, summary) -> Figure:
    """Output SINR (dB) against snapshots seen, one line per processor.

    Top panel: the mean over trials of the output SINR in dB (solid line), the band
    between the 10th and 90th percentiles over trials (shaded), and the optimum SINR
    ``sigma_s^2 a^H R^-1 a`` of the moment (Van Trees 2002, ch. 6), averaged over trials
    in dB at each checkpoint (a flat line when the scene is stationary); the
    ``optimum`` processor, whose SINR is that line by definition, is the line (one
    legend entry). Bottom panel: the mean over trials of the loss against that optimum,
    dB. With more than :data:`PANEL_CURVES` processors the SINR is drawn in small
    multiples, one panel per family group (:func:`processor_panels`), each with the
    optimum. The snapshot axis is logarithmic for a stationary scene and linear when a
    source pulses or moves (the times when pulsing interferers are on are shaded
    under the axis). Checkpoints where the SINR is undefined (wanted source off) are gaps.
    ``summary``: the comparison summary of the run (``CompareSummary``), whose curves
    are drawn; the evaluation gives the scene and the run facts.
    """
    _check_evaluation(evaluation)
    _check_summary(summary, evaluation)
    curves = _summary_curves(summary)
    cps = np.asarray(evaluation.checkpoints, dtype=float)
    styles = run_styles(evaluation)
    panels = processor_panels(evaluation.processors)
    linear = _time_axis_linear(evaluation.scene)
    single = len(cps) == 1
    pulsing = [s for s in evaluation.scene.interferers if s.pulsing is not None]
    strip = [0.22 + 0.14 * len(pulsing)] if pulsing else []
    if len(panels) == 1:
        fig, axes = new_figure(2 + bool(strip), 1, size=(8.0, 6.2 + sum(strip)),
                               height_ratios=[2.2, 1.0] + strip, sharex=True)
        tops, bottom = [axes[0, 0]], axes[1, 0]
    else:
        rows = len(panels)
        fig, axes = new_figure(rows + bool(strip), 1, size=(8.0, 1.2 + 2.3 * rows + sum(strip)),
                               height_ratios=[2.3] * rows + strip, sharex=True)
        tops, bottom = list(axes[:rows, 0]), None
    on_axes = axes[-1, 0] if strip else None
    opt_mean = np.array(summary.optimum_curve.sinr_db_mean, dtype=float)
    lows, highs = [], []
    for ax, (group, procs) in zip(tops, panels):
        for p in procs:
            st = styles[p.label]
            mean, lo, hi, loss_mean = curves[p.label]
            kw = dict(color=st["color"], linestyle=st["linestyle"], linewidth=1.6)
            if single or len(cps) <= 12:
                kw.update(marker=st["marker"], markersize=3.5)
            ax.plot(cps, mean, label=p.label, **kw)
            if evaluation.trials > 1:
                ax.fill_between(cps, lo, hi, color=st["color"], alpha=0.15, linewidth=0)
            lows.append(np.nanmin(lo) if np.isfinite(lo).any() else np.nan)
            if bottom is not None:
                bottom.plot(cps, loss_mean, **kw)
        ax.plot(cps, opt_mean, color=REFERENCE_COLOUR, linestyle=(0, (5, 2)), linewidth=1.2,
                label="optimum (clairvoyant MVDR)", marker="_" if single else None)
        highs.append(np.nanmax(opt_mean) if np.isfinite(opt_mean).any() else np.nan)
        if group:
            ax.set_title(group, fontsize=FONT_SIZE, loc="left")
    axis_ax = on_axes if on_axes is not None else bottom if bottom is not None else tops[-1]
    for ax in tops:
        if not linear:
            ax.set_xscale("log")
        if single:
            ax.set_xlim(cps[0] / 2, cps[0] * 2) if not linear else ax.set_xlim(cps[0] - 1, cps[0] + 1)
        else:
            ax.set_xlim(0 if linear else cps[0], cps[-1])
    if len(panels) > 1 and np.isfinite(lows).any() and np.isfinite(highs).any():
        lo_all, hi_all = np.nanmin(lows), np.nanmax(highs)
        for ax in tops:
            ax.set_ylim(lo_all - 2.0, hi_all + 3.0)                # one scale for all panels
    if not linear:
        wide = single is False and cps[-1] / cps[0] >= 10
        _plain_log_ticks(axis_ax, wide=wide)
        if wide:
            log_minor_grid(axes[:, 0], cps[0], cps[-1])
    if on_axes is not None:
        _mark_pulses(on_axes, evaluation, pulsing)
    what = "snapshots seen" + (" (log scale)" if not linear else "")
    for ax in tops:
        label_axes(ax, ylabel="output SINR, dB\n(mean over trials of dB)")
    if bottom is not None:
        label_axes(bottom, ylabel="loss vs optimum, dB\n(mean over trials)")
        bottom.axhline(0.0, color=REFERENCE_COLOUR, linewidth=0.8, linestyle=(0, (5, 2)))
        bottom.invert_yaxis()        # better processors sit higher in both panels
    label_axes(axis_ax, xlabel=what)
    from matplotlib.patches import Patch
    for i, ax in enumerate(tops):
        handles, labels = ax.get_legend_handles_labels()
        if i > 0:                    # the optimum's entry once, in the first panel
            keep = [k for k, lb in enumerate(labels) if not lb.startswith("optimum")]
            handles, labels = [handles[k] for k in keep], [labels[k] for k in keep]
        if i == 0 and evaluation.trials > 1:
            handles.append(Patch(color="#BBBBBB", alpha=0.6))
            labels.append("10th-90th percentile over trials")
        legend_outside(ax, handles, labels, title="processor" if i == 0 else None)
    title, sub = run_title(evaluation, "Convergence")
    if not evaluation.scene.stationary:
        sub += "; nonstationary scene: optimum of the moment"
    add_title(fig, title, sub)
    return fig


def _mark_pulses(ax, evaluation, pulsing) -> None:
    """A strip under the convergence panels: one row per pulsing interferer, filled
    while it is on (sampled at 2,000 points over the run)."""
    k = np.unique(np.linspace(0, int(evaluation.snapshots), 2000).astype(np.int64))
    for i, s in enumerate(pulsing):
        on = np.asarray(s.active(k), dtype=bool)
        ax.fill_between(k, i - 0.35, i + 0.35, where=on, step="post",
                        color=INTERFERER_COLOUR, linewidth=0)
    ax.set_ylim(len(pulsing) - 0.5, -0.5)
    ax.set_yticks(range(len(pulsing)))
    ax.set_yticklabels([(s.name if len(s.name) <= 14 else s.name[:13] + "...") + " on"
                        for s in pulsing], fontsize=TICK_SIZE - 0.5)
    ax.grid(False, axis="y")
    ax.tick_params(axis="y", length=0)


def _plain_log_ticks(ax, wide: bool) -> None:
    """Snapshot counts as plain numbers (1, 10, 100) on a log axis; minor ticks
    labelled only when the axis spans less than a decade."""
    from matplotlib.ticker import FuncFormatter, NullFormatter
    plain = FuncFormatter(lambda v, _: f"{v:g}")
    ax.xaxis.set_major_formatter(plain)
    ax.xaxis.set_minor_formatter(NullFormatter() if wide else plain)


def log_minor_grid(axes, low: float, high: float) -> None:
    """The minor grid of a logarithmic x axis spanning ``low`` .. ``high`` (a decade or
    more, so minor ticks carry no labels) drawn as one line collection per axes, at 2-9
    times each power of ten, instead of as minor ticks: the same lines, without the
    dozens of tick objects whose creation and layout made most of a figure's drawing
    time (one convergence figure 0.24 s -> 0.18 s)."""
    from matplotlib.collections import LineCollection
    from matplotlib.ticker import NullLocator
    if not (low > 0 and high > low):
        return
    first, last = math.floor(math.log10(low)) - 1, math.ceil(math.log10(high)) + 1
    xs = [m * 10.0 ** d for d in range(first, last + 1) for m in range(2, 10)]
    xs = [x for x in xs if low / 10 < x < high * 10]
    for ax in axes:
        ax.xaxis.set_minor_locator(NullLocator())
        lines = LineCollection([[(x, 0.0), (x, 1.0)] for x in xs],
                               transform=ax.get_xaxis_transform(), colors=MINOR_GRID_COLOUR,
                               linewidths=MINOR_GRID_WIDTH, zorder=0.4)
        ax.add_collection(lines, autolim=False)


# ----------------------------------------------------------------------- patterns
def _spans_depth(scene) -> bool:
    """True when the array has extent along y (the broadside axis of a line): then the
    front (|az| < 90) and back half-planes differ and the cut covers -180..180."""
    pos = np.asarray(scene.array.positions, dtype=float)
    return bool(np.ptp(pos[:, 1]) > 1e-12)


def default_azimuths(scene, points: int | None = None) -> np.ndarray:
    """Azimuths (degrees) for a pattern cut: -90..90 for arrays in the x-z plane (line,
    grid: the back half mirrors the front), -180..180 when the array has depth along y
    (ring, most custom layouts). The step resolves the main beam (about a tenth of the
    aperture's null-to-null width ``lambda/D`` rad, between 0.01 and 0.25 degrees)."""
    full = _spans_depth(scene)
    lo, hi = (-180.0, 180.0) if full else (-90.0, 90.0)
    if points is None:
        ap = max(float(scene.array.aperture), 0.5)
        step = float(np.clip(np.rad2deg(1.0 / ap) / 10.0, 0.01, 0.25))
        points = int(round((hi - lo) / step)) + 1
    if points < 2:
        raise ValueError(f"a pattern cut needs at least 2 azimuths, got {points}")
    return np.linspace(lo, hi, int(points))


def mean_beam_pattern_db(evaluation, label: str, azimuths, elevation: float | None = None,
                         weights: np.ndarray | None = None) -> np.ndarray:
    """Trial-averaged power pattern (dB) of one processor's final weights.

    For each trial t the power response ``|w_t^H a_t(u)|^2`` uses that trial's TRUE
    array (element positions ``evaluation.positions[t]`` and complex gains
    ``evaluation.element_gains[t]``), and is divided by the same trial's response toward
    the look direction; the ratios are averaged over trials and returned in dB
    (0 dB = the look-direction response; nulls are negative). ``elevation`` defaults to
    the scene's look elevation. ``weights`` (T, N) replaces the final weights (e.g. the
    weights of another checkpoint). Trials whose look response is zero are left out.

    Checkable fact: for the untapered conventional processor on a uniform
    half-wavelength line the first sidelobe is -13.26 dB (Balanis, *Antenna Theory*,
    ch. 6). See :func:`mean_beam_patterns_db` for several processors at once.
    """
    _check_evaluation(evaluation)
    if weights is None:
        return mean_beam_patterns_db(evaluation, [label], azimuths, elevation)[0]
    w = np.asarray(weights)
    return _patterns(evaluation, w[None] if w.ndim == 2 else w[None, None], [label],
                     azimuths, elevation)[0]


def mean_beam_patterns_db(evaluation, labels: Sequence[str], azimuths,
                          elevation: float | None = None,
                          skip_dead: bool = False) -> np.ndarray:
    """:func:`mean_beam_pattern_db` of several processors, (len(labels), len(azimuths)).

    The true steering vectors of every trial are computed once and shared by all the
    processors. Vectorised over trials; azimuths go in chunks of about 4 million
    trial-azimuth-element values to bound memory; when every trial has the nominal
    element positions (no position errors) the steering matrix is common to all trials
    and only the gains differ, which needs one matrix product. A processor with no
    response toward the look direction in any trial raises ValueError, or gets a row of
    NaN with ``skip_dead``.
    """
    _check_evaluation(evaluation)
    have = [p.label for p in evaluation.processors]
    labels = list(labels)
    if not labels:
        raise ValueError("no processor labels given")
    for label in labels:
        if label not in have:
            raise ValueError(f"no processor labelled {label!r}; the run has: {', '.join(have)}")
    n = None if evaluation.positions is None else evaluation.positions.shape[-2]
    w = np.stack([_band_centre(evaluation.by_label(lb).final_weights, n) for lb in labels])
    return _patterns(evaluation, w, labels, azimuths, elevation, skip_dead)


def _band_centre(w, elements: int) -> np.ndarray:
    """Space-time weights (..., N L) folded to their band-centre response ``sum_l w_l``
    (N); spatial weights unchanged."""
    w = np.asarray(w)
    if elements is None or w.shape[-1] == elements:
        return w
    return w.reshape(w.shape[:-1] + (-1, elements)).sum(-2)


def _patterns(evaluation, w: np.ndarray, labels, azimuths, elevation,
              skip_dead: bool = False) -> np.ndarray:
    """Core of the pattern functions: weights w (P, T, N) -> (P, D) dB."""
    az = np.atleast_1d(np.asarray(azimuths, dtype=float))
    if az.ndim != 1 or az.size == 0 or not np.all(np.isfinite(az)):
        raise ValueError("azimuths must be a non-empty 1-D list of finite angles in degrees")
    sc = evaluation.scene
    el = float(sc.look_elevation if elevation is None else elevation)
    if not np.isfinite(el) or abs(el) > 90:
        raise ValueError(f"elevation must be within [-90, 90] degrees, got {elevation}")
    n = sc.elements
    p_, t_ = w.shape[0], w.shape[1]
    pos = evaluation.positions
    gains = evaluation.element_gains
    if pos is None:
        pos = np.broadcast_to(sc.array.positions, (t_, n, 3))
    if gains is None:
        gains = np.ones((t_, n), dtype=complex)
    pos = np.asarray(pos, dtype=float)
    gains = np.asarray(gains)
    if w.shape[-1] != n or pos.shape != (t_, n, 3) or gains.shape != (t_, n):
        raise ValueError(f"weights {w.shape[1:]}, positions {pos.shape} and gains "
                         f"{gains.shape} do not describe {t_} trials of {n} elements")
    wc = np.conj(w) * gains[None]                                # (P, T, N): w^H diag(g)
    common = bool(np.all(pos == pos[:1]))                        # no position errors

    def response(az_chunk: np.ndarray, el_: float) -> np.ndarray:
        u = geometry.direction_vector(az_chunk, el_)             # (D, 3)
        if common:
            a = np.exp(2j * np.pi * (u @ pos[0].T))              # (D, N)
            return wc @ a.T                                      # (P, T, D)
        a = np.exp(2j * np.pi * np.einsum("tnk,dk->tdn", pos, u))  # (T, D, N)
        return np.einsum("ptn,tdn->ptd", wc, a)

    look = np.abs(response(np.array([float(sc.look_azimuth)]),
                           float(sc.look_elevation))[..., 0]) ** 2  # (P, T)
    keep = look > 0
    for i, label in enumerate(labels):
        if not keep[i].any() and not skip_dead:
            raise ValueError(f"processor {label!r} has no response toward the look direction")
    inv = np.where(keep, 1.0 / np.where(keep, look, 1.0), 0.0)   # left-out trials weigh 0
    counts = keep.sum(axis=1).astype(float)                       # (P,)
    counts[counts == 0] = np.nan                                  # dead processors: NaN
    chunk = max(1, (1 << 22) // max(t_ * (1 if common else n) * p_, 1))
    acc = np.empty((p_, az.size))
    for s in range(0, az.size, chunk):
        r = response(az[s:s + chunk], el)                         # (P, T, D)
        acc[:, s:s + chunk] = np.einsum("ptd,pt->pd", np.abs(r) ** 2, inv) / counts[:, None]
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(acc)


def _wrap(az: float) -> float:
    return float((az + 180.0) % 360.0 - 180.0)


def _on_cut(az: float, full: bool) -> float:
    """Where a direction shows on the cut: -180..180, or folded into -90..90 for arrays
    without depth (the back direction 180 - az gives the same response)."""
    a = _wrap(az)
    if full:
        return a
    if a > 90:
        return 180.0 - a
    if a < -90:
        return -180.0 - a
    return a


def _cut_elevations(evaluation) -> list[tuple[float, list]]:
    """(elevation, sources on that cut) of the pattern panels: the look elevation, and
    for an array that is not a line also the elevation of every interferer at the final
    checkpoint (a line's response depends on one direction cosine only, so its cut at
    the look elevation holds every value; a planar array's does not)."""
    sc = evaluation.scene
    k = int(evaluation.checkpoints[-1]) - 1
    look = float(sc.look_elevation)
    if scores_is_line(sc.array.positions):
        return [(look, list(sc.sources))]
    cuts: list[tuple[float, list]] = [(look, [])]
    for s in sc.sources:
        el = float(s.direction(k)[1])
        for c_el, members in cuts:
            if abs(c_el - el) < 0.05:
                members.append(s)
                break
        else:
            cuts.append((el, [s]))
    return cuts


def scores_is_line(positions) -> bool:
    """True when the element positions lie on one line (see
    :func:`adapt.engine.scores.is_line_array`; repeated here, the report layer sits
    below the engine)."""
    pos = np.asarray(positions, dtype=float).reshape(-1, 3)
    if pos.shape[0] < 3:
        return True
    sv = np.linalg.svd(pos - pos.mean(axis=0), compute_uv=False)
    return bool(sv[1] <= 1e-9 * max(float(sv[0]), 1.0))


def beam_pattern_figure(evaluation, azimuths=None, floor_db: float = PATTERN_FLOOR_DB) -> Figure:
    """Beam patterns of every processor's final weights on azimuth cuts, dB relative to
    the look-direction response, trial-averaged with each trial's true array
    (:func:`mean_beam_pattern_db`); sources marked by vertical lines at their direction
    at the final checkpoint (wanted source solid black, interferers dashed grey,
    coherent copies dotted orange and labelled "copy of ...", each labelled with its
    name), the look direction by a triangle. A line array gets the
    cut at the look elevation; any other array one panel per elevation: the look's and
    each interferer's (the cut through each jammer, where its null is), every source
    marked on the cut at its own elevation. Values below ``floor_db`` are drawn at the
    floor; :func:`response_map_figure` shows the whole sky of a planar array."""
    _check_evaluation(evaluation)
    if not floor_db < 0:
        raise ValueError(f"floor_db must be negative, got {floor_db}")
    sc = evaluation.scene
    full = _spans_depth(sc)
    az = default_azimuths(sc) if azimuths is None else np.asarray(azimuths, dtype=float)
    styles = run_styles(evaluation)
    cuts = _cut_elevations(evaluation)
    everyone = list(evaluation.processors)
    # (elevation, sources on the cut, processors, group title) of each panel: one per
    # elevation, or for a line with many processors one per family group
    groups = processor_panels(everyone) if len(cuts) == 1 else [("", everyone)]
    optimum = [p for p in everyone if is_clairvoyant(p.method)]
    if len(groups) > 1:
        panels = [(cuts[0][0], cuts[0][1], optimum + procs, title) for title, procs in groups]
    else:
        panels = [(el, here, everyone, "") for el, here in cuts]
    rows = len(panels)
    size = (8.6, 4.9) if rows == 1 else (8.6, 1.3 + 2.5 * rows)
    fig, axes = new_figure(rows, 1, size=size, sharex=True)
    axes = [axes] if rows == 1 else list(axes[:, 0])
    k_final = int(evaluation.checkpoints[-1]) - 1
    from matplotlib.transforms import blended_transform_factory
    for i, (ax, (el, here, procs, group)) in enumerate(zip(axes, panels)):
        patterns = mean_beam_patterns_db(evaluation, [p.label for p in procs], az,
                                         elevation=el, skip_dead=True)
        for p, pat in zip(procs, patterns):
            st = styles[p.label]
            dead = not np.any(np.isfinite(pat))
            ax.plot(az, np.maximum(pat, floor_db), color=st["color"],
                    linestyle=st["linestyle"], linewidth=1.3,
                    label=(p.label + (" (no response toward look)" if dead else ""))
                    if i == 0 or not is_clairvoyant(p.method) else "_" + p.label)
        ax.set_ylim(floor_db, 10.0)
        ax.set_xlim(az[0], az[-1])
        trans = blended_transform_factory(ax.transData, ax.transAxes)
        for s in here:
            a_s, e_s = s.direction(k_final)
            x = _on_cut(float(a_s), full)
            desired = s.role == "desired"
            copy = s.waveform.kind == "copy"
            ax.axvline(x, color=DESIRED_COLOUR if desired else (COPY_COLOUR if copy
                                                                else INTERFERER_COLOUR),
                       linestyle="-" if desired else (COPY_STYLE if copy else (0, (4, 3))),
                       linewidth=1.1 if desired else (1.3 if copy else 0.9),
                       alpha=0.75 if desired else 1.0, zorder=1)
            name = s.name if len(s.name) <= 18 else s.name[:17] + "..."
            extra = [f"copy of {s.waveform.of}"] if copy else []
            if rows == 1 and abs(float(e_s) - sc.look_elevation) > 1e-9:
                extra.append(f"el {float(e_s):g}")
            if not s.stationary:
                extra.append("at end")
            text = name + (f" ({', '.join(extra)})" if extra else "")
            ax.text(x, 0.995, text, transform=trans, rotation=90, ha="right", va="top",
                    fontsize=TICK_SIZE - 0.5,
                    color="#000000" if desired else "#505050",
                    fontweight="bold" if desired else "normal", clip_on=True)
        if abs(el - sc.look_elevation) < 0.05:
            ax.plot([_on_cut(sc.look_azimuth, full)], [floor_db], marker="^", markersize=8,
                    color=REFERENCE_COLOUR, clip_on=False, linestyle="none",
                    label="look direction")
        if group:
            ax.set_title(group, fontsize=FONT_SIZE, loc="left")
            label_axes(ax, ylabel="response, dB")
        elif rows > 1:
            names = ", ".join(s.name for s in here if s.role != "desired")
            what = "look elevation" if abs(el - sc.look_elevation) < 0.05 else ""
            ax.set_title(f"cut at elevation {el:g} deg"
                         + (f" ({what})" if what else "") + (f": {names}" if names else ""),
                         fontsize=FONT_SIZE, loc="left")
            label_axes(ax, ylabel="response, dB")
        step = 30 if full else 15
        ax.set_xticks(np.arange(np.ceil(az[0] / step) * step, az[-1] + 1e-9, step))
    if rows == 1:
        label_axes(axes[0], xlabel=f"azimuth, degrees (cut at elevation {sc.look_elevation:g} deg)",
                   ylabel="power response re look direction, dB\n(mean over trials)")
    else:
        label_axes(axes[-1], xlabel="azimuth, degrees" + (
            f" (cut at elevation {sc.look_elevation:g} deg)" if len(cuts) == 1 else ""))
    from matplotlib.lines import Line2D
    marks = [Line2D([], [], color=DESIRED_COLOUR, linewidth=1.1, alpha=0.75),
             Line2D([], [], color=INTERFERER_COLOUR, linestyle=(0, (4, 3)))]
    mark_names = ["wanted source", "interferer"]
    if sc.coherent:
        marks.append(Line2D([], [], color=COPY_COLOUR, linestyle=COPY_STYLE, linewidth=1.3))
        mark_names.append("coherent copy")
    for i, ax in enumerate(axes):
        handles, names = ax.get_legend_handles_labels()
        if i == 0:                   # the source marks once, with the first panel's curves
            legend_outside(ax, handles + marks, names + mark_names, title="processor")
        elif len(groups) > 1:        # family panels: each lists its own curves
            legend_outside(ax, handles, names)
    title, sub = run_title(evaluation, "Beam patterns at the final checkpoint")
    if rows > 1:
        sub += "; dB re the look-direction response, mean over trials"
    if sc.array.errors.any:
        sub += "; true arrays with hardware errors"
    add_title(fig, title, sub)
    return fig


def _map_extent(scene) -> tuple[tuple[float, float], tuple[float, float]]:
    """(azimuth span, elevation span) of the response map: a planar array's mirror
    half is left out (a horizontal array: the hemisphere on the look side; an array in
    the x-z plane: the front, azimuth -90..90)."""
    pos = np.asarray(scene.array.positions, dtype=float)
    c = pos - pos.mean(axis=0)
    _, sv, vt = np.linalg.svd(c)
    if sv.size >= 3 and sv[2] <= 1e-9 * max(float(sv[0]), 1.0):
        n = vt[-1]
        if abs(abs(n[2]) - 1) < 1e-9:
            return (-180.0, 180.0), ((0.0, 90.0) if scene.look_elevation >= 0 else (-90.0, 0.0))
        if abs(abs(n[1]) - 1) < 1e-9:
            return (-90.0, 90.0), (-90.0, 90.0)
    return (-180.0, 180.0), (-90.0, 90.0)


def response_map_db(evaluation, labels: Sequence[str], azimuths, elevations) -> np.ndarray:
    """Trial-averaged power response (dB re the look direction) of processors' final
    weights over an azimuth x elevation grid: (len(labels), len(elevations),
    len(azimuths)); each row is :func:`mean_beam_patterns_db` at that elevation."""
    el = np.atleast_1d(np.asarray(elevations, dtype=float))
    rows = [mean_beam_patterns_db(evaluation, labels, azimuths, elevation=float(e),
                                  skip_dead=True) for e in el]
    return np.stack(rows, axis=1)


def response_map_figure(evaluation, summary, floor_db: float = -60.0) -> Figure:
    """The whole sky: one map per processor of the trial-averaged response of its
    final weights (dB re the look direction, :func:`response_map_db`) over azimuth x
    elevation, every source marked at its direction at the final checkpoint (wanted
    source: star; interferers: crosses, named in the first map, each with its null
    depth read from the comparison ``summary``; look direction: plus). Meant for
    arrays that are not a line, whose azimuth cut misses sources at other elevations.
    Values below ``floor_db`` show at the floor."""
    _check_evaluation(evaluation)
    _check_summary(summary, evaluation)
    if not floor_db < 0:
        raise ValueError(f"floor_db must be negative, got {floor_db}")
    sc = evaluation.scene
    (a0, a1), (e0, e1) = _map_extent(sc)
    ap = max(float(sc.array.aperture), 0.5)
    step = float(np.clip(np.rad2deg(1.0 / ap) / 4.0, 0.5, 3.0))
    az = np.linspace(a0, a1, int(round((a1 - a0) / step)) + 1)
    el = np.linspace(e0, e1, int(round((e1 - e0) / step)) + 1)
    procs = evaluation.processors
    labels = [p.label for p in procs]
    maps = response_map_db(evaluation, labels, az, el)
    count = len(procs)
    cols = 1 if count == 1 else 2 if count <= 4 else 3
    rows = int(np.ceil(count / cols))
    aspect = (e1 - e0) / (a1 - a0)
    panel_w = 7.6 / cols
    fig, axes = new_figure(rows, cols, size=(8.6, 1.3 + rows * (panel_w * aspect + 0.75)),
                           sharex=True)
    axes = np.atleast_1d(axes).ravel() if count > 1 else np.array([axes])
    finite = maps[np.isfinite(maps)]
    top = float(np.clip(np.ceil(finite.max()) if finite.size else 0.0, 0.0, 30.0))
    k = int(evaluation.checkpoints[-1]) - 1
    depths, _, _, null_floor = null_depth_statistics(summary)              # (P, J)
    names = list(summary.interferers)
    img = None
    for i, (ax, p) in enumerate(zip(axes, procs)):
        ax.grid(False)
        img = ax.imshow(np.maximum(maps[i], floor_db), origin="lower", aspect="auto",
                        extent=(a0 - step / 2, a1 + step / 2, e0 - step / 2, e1 + step / 2),
                        cmap="viridis", vmin=floor_db, vmax=top, interpolation="nearest")
        for s in sc.sources:
            sa, se = (float(v) for v in s.direction(k))
            sa = _wrap(sa)
            if not (a0 - 1e-9 <= sa <= a1 + 1e-9 and e0 - 1e-9 <= se <= e1 + 1e-9):
                continue
            desired = s.role == "desired"
            ax.plot([sa], [se], linestyle="none", marker="*" if desired else "X",
                    markersize=10 if desired else 7, markerfacecolor="white",
                    markeredgecolor="black", markeredgewidth=0.8)
            text = ""
            if i == 0:
                text = s.name if len(s.name) <= 12 else s.name[:11] + "..."
            if not desired and s.name in names:
                # the null is a point of the sky, narrower than the map's cells: its depth
                depth = depths[i, names.index(s.name)]
                text = (text + " " if text else "") + _depth_text(float(depth), null_floor)
            if text:
                ax.annotate(text, (sa, se), xytext=(4, 3), textcoords="offset points",
                            fontsize=TICK_SIZE - 1.5, color="white",
                            bbox={"boxstyle": "round,pad=0.1", "facecolor": "black",
                                  "alpha": 0.55, "edgecolor": "none"})
        ax.plot([_wrap(sc.look_azimuth)], [sc.look_elevation], marker="+", markersize=11,
                color="white", markeredgewidth=1.4, linestyle="none")
        ax.set_title(p.label if len(p.label) <= 40 else p.label[:39] + "...",
                     fontsize=FONT_SIZE - 0.5, loc="left")
        ax.set_xlim(a0, a1)
        ax.set_ylim(e0, e1)
        ax.set_xticks(np.arange(a0, a1 + 1e-9, 90 if a1 - a0 > 180 else 45))
        ax.set_yticks(np.arange(e0, e1 + 1e-9, 30))
    for ax in axes[count:]:
        ax.set_visible(False)
    for ax in axes[(rows - 1) * cols:count] if count else []:
        label_axes(ax, xlabel="azimuth, deg")
    for r in range(rows):
        label_axes(axes[r * cols], ylabel="elevation, deg")
    if img is not None:
        bar = fig.colorbar(img, ax=list(axes[:count]), shrink=0.85, pad=0.02)
        bar.set_label(f"response re look direction, dB (mean over trials, floor {floor_db:g})",
                      fontsize=FONT_SIZE - 0.5)
        bar.ax.tick_params(labelsize=TICK_SIZE)
    title, sub = run_title(evaluation, "Response over the sky at the final checkpoint")
    sub += ("; star: wanted source, crosses: interferers with their null depth in dB, "
            "plus: look direction")
    add_title(fig, title, sub)
    return fig


# --------------------------------------------------------------------- null depths
def null_depth_figure(evaluation, summary) -> Figure:
    """Grouped bars: the response toward each interferer relative to the look
    direction (the null depth, dB, negative = suppressed; mean over trials of the dB
    value at the final checkpoint, each trial's value floored at the summary's
    ``null_depth_floor_db``), one bar per processor in each interferer's group, with the
    10th-90th percentile over trials as a whisker and the mean written on the bar when
    there is room. Each group is labelled with the interferer's name, azimuth and JNR
    (per-element jammer-to-noise ratio, dB).

    The statistics are read from the comparison ``summary`` (``CompareSummary``: its
    processors' ``null_depths``, :func:`null_depth_statistics`), never recomputed from
    the trials; the evaluation gives the scene (labels) and the run facts."""
    _check_evaluation(evaluation)
    _check_summary(summary, evaluation)
    names = list(summary.interferers)
    fig, ax = new_figure(size=(8.0, 4.6))
    title, sub = run_title(evaluation, "Null depth toward each interferer")
    if not names:
        ax.text(0.5, 0.5, "no interferers in this scene", transform=ax.transAxes,
                ha="center", va="center", fontsize=FONT_SIZE + 1)
        ax.set_xticks([])
        ax.set_yticks([])
        add_title(fig, title, sub)
        return fig
    procs = summary.processors
    labels = _interferer_labels(evaluation)
    means, lows, highs, floor = null_depth_statistics(summary)           # (P, J) each
    if len(procs) * len(names) > BAR_LIMIT:
        return _null_depth_map(evaluation, summary, fig, ax, labels, title, sub)
    styles = run_styles(evaluation)
    count = len(procs)
    width = 0.8 / count
    x0 = np.arange(len(names), dtype=float)
    lowest = 0.0
    for i, p in enumerate(procs):
        mean, lo, hi = means[i], lows[i], highs[i]
        x = x0 - 0.4 + width * (i + 0.5)
        st = styles[p.label]
        bars = ax.bar(x, mean, width=width * 0.92, color=st["color"], label=p.label,
                      edgecolor="white", linewidth=0.4, hatch=st["hatch"] or None)
        if count * len(names) <= 24:
            for text in ax.bar_label(bars, labels=[_depth_text(v, floor) for v in mean],
                                     label_type="center", fontsize=TICK_SIZE - 1,
                                     color="#202020"):
                text.set_bbox({"boxstyle": "round,pad=0.15", "facecolor": "white",
                               "edgecolor": "none", "alpha": 0.8})
        if evaluation.trials > 1:
            ax.errorbar(x, mean, yerr=np.clip(np.vstack([mean - lo, hi - mean]), 0, None), fmt="none",
                        ecolor="#303030", elinewidth=0.8, capsize=2)
        finite = np.concatenate([mean[np.isfinite(mean)], lo[np.isfinite(lo)]])
        if finite.size:
            lowest = min(lowest, float(finite.min()))
    ax.axhline(0.0, color="#303030", linewidth=0.8)
    ax.set_xticks(x0)
    if len(names) <= 5:
        ax.set_xticklabels(labels, fontsize=TICK_SIZE)
    else:                          # many groups: one line each, slanted so they never overlap
        ax.set_xticklabels([t.replace("\n", ", ") for t in labels], fontsize=TICK_SIZE - 0.5,
                           rotation=30, ha="right", rotation_mode="anchor")
    ax.set_xlim(-0.6, len(names) - 0.4)
    ax.set_ylim(min(lowest * 1.1 - 4.0, -10.0), 5.0)
    label_axes(ax, ylabel="response re look direction, dB\n"
                          f"(mean over trials of dB, floor {floor:g})")
    legend_outside(ax, title="processor")
    add_title(fig, title, sub + f"; weights after {int(evaluation.checkpoints[-1])} snapshots")
    return fig


#: above this many processor x interferer bars the null depths are drawn as a table
#: of coloured cells instead (bars that thin cannot be told apart)
BAR_LIMIT = 36


def _interferer_labels(evaluation) -> list[str]:
    """Label of each interferer for the null-depth figures: name, direction at the
    final checkpoint (elevation shown whenever a source of the scene is off the
    horizon), JNR, "copy of ..." for a coherent copy, and "off at end" for one not
    transmitting then."""
    sc = evaluation.scene
    k = int(evaluation.checkpoints[-1])
    show_el = any(abs(float(s.direction(k)[1])) > 1e-9 for s in sc.sources) \
        or abs(sc.look_elevation) > 1e-9
    by_name = {s.name: s for s in sc.interferers}
    out = []
    for name in evaluation.interferers:
        short = name if len(name) <= 16 else name[:15] + "..."
        s = by_name.get(name)
        if s is None:
            out.append(short)
            continue
        az, el = (float(v) for v in s.direction(k))
        where = f"az {az:.3g}" + (f", el {el:.3g}" if show_el else "") + " deg"
        off = "" if bool(s.active(k)) else " (off at end)"
        copy = f", copy of {s.waveform.of}" if s.waveform.kind == "copy" else ""
        out.append(f"{short}{off}\n{where}\nJNR {s.power_db:g} dB{copy}")
    return out


def _null_depth_map(evaluation, summary, fig, ax, labels, title, sub) -> Figure:
    """Null depths of many processors toward many interferers as a table of coloured
    cells (rows: processors, columns: interferers), the mean (read from the summary)
    written in each cell."""
    procs = summary.processors
    table, _, _, floor = null_depth_statistics(summary)
    height = max(3.6, min(9.0, 1.9 + 0.32 * len(procs)))
    fig.set_size_inches(FIGURE_SIZE[0], height)
    img = ax.imshow(table, cmap="viridis", vmin=floor, vmax=0.0, aspect="auto",
                    interpolation="nearest")
    ax.grid(False)
    for (i, j), v in np.ndenumerate(table):
        ax.text(j, i, _depth_text(v, floor), ha="center", va="center", fontsize=TICK_SIZE - 1,
                color="white" if v < -45 else "black")
    ax.set_yticks(range(len(procs)))
    ax.set_yticklabels([p.label if len(p.label) <= 32 else p.label[:31] + "..." for p in procs],
                       fontsize=TICK_SIZE - 0.5)
    ax.set_xticks(range(len(labels)))
    ax.set_xticklabels([t.replace("\n", ", ") for t in labels], fontsize=TICK_SIZE - 0.5,
                       rotation=30, ha="right", rotation_mode="anchor")
    for side in ("left", "bottom"):
        ax.spines[side].set_visible(False)
    ax.tick_params(length=0)
    bar = fig.colorbar(img, ax=ax, shrink=0.9, pad=0.02)
    bar.set_label("response re look direction, dB\n"
                  f"(mean over trials of dB, floor {floor:g})", fontsize=FONT_SIZE)
    bar.ax.tick_params(labelsize=TICK_SIZE)
    add_title(fig, title, sub + f"; weights after {int(evaluation.checkpoints[-1])} snapshots")
    return fig


def _depth_text(v: float, floor: float) -> str:
    """A null depth as written on a bar or a cell: whole dB, ``<=floor`` at the floor."""
    if not np.isfinite(v):
        return ""
    if v <= floor + 1e-9:
        return f"<={floor:g}"
    return f"{v:.0f}"


# ---------------------------------------------------------------------- all three
#: file name -> (alt text, caption) of the standard figures of a comparison report
FIGURE_TEXT = {
    "convergence": (
        "Line chart of output SINR in dB against snapshots for each processor",
        "Output SINR against snapshots seen (log scale): mean over trials of the SINR in "
        "dB, shaded 10th-90th percentile over trials, dashed: the optimum (clairvoyant "
        "MVDR) SINR of the moment. Lower panel: mean loss against the optimum, dB."),
    "beam_pattern": (
        "Beam pattern in dB against azimuth for each processor, with sources marked",
        "Power response of each processor's final weights on the azimuth cut at the look "
        "elevation, relative to the look-direction response and averaged over trials, "
        "each trial with its true element positions and gains. Vertical lines: the "
        "wanted source (solid) and interferers (dashed)."),
    "response_map": (
        "Maps of each processor's response over azimuth and elevation, sources marked",
        "Response of each processor's final weights over azimuth and elevation, relative "
        "to the look direction and averaged over trials (arrays that are not a line: "
        "sources away from the look elevation are not on the azimuth cut). Star: the "
        "wanted source; crosses: interferers, each with its null depth (dB, mean over "
        "trials: a null is a point of the sky, narrower than a cell); plus: the look "
        "direction."),
    "null_depth": (
        "Grouped bar chart of the response toward each interferer per processor",
        "Response toward each interferer relative to the look direction at the final "
        "checkpoint (negative: suppressed), mean over trials of the dB value, whiskers "
        "10th-90th percentile; JNR is the per-element jammer-to-noise ratio."),
}

#: alt text and caption of the wideband scenes' extra figure (kept apart from the
#: standard figures every run has)
WIDEBAND_FIGURE_TEXT = {
    "band_map": (
        "Maps of power response in dB over azimuth and frequency, one per processor",
        "Power response of each processor's final weights over azimuth (look elevation) "
        "and baseband frequency across the sampled band, relative to the look direction "
        "at the band centre, mean over trials; dashed white bars: interferers across "
        "their band (wideband scenes only)."),
}


def standard_figures(evaluation, summary) -> dict[str, bytes]:
    """The figures of a comparison as PNG bytes: ``{"convergence": ..,
    "beam_pattern": .., "null_depth": ..}`` and, for an array that is not a line,
    ``"response_map"`` (keys match :data:`FIGURE_TEXT`), and for a wideband scene
    ``"band_map"`` (:data:`WIDEBAND_FIGURE_TEXT`); ``summary``: the comparison
    summary (``CompareSummary``) whose statistics the convergence, null-depth and
    response-map figures draw (the beam patterns and band maps, curves over angle and
    frequency, are not in the summary and come from the final weights)."""
    from adapt.report.render import render_all
    jobs = {"convergence": lambda: save_png(convergence_figure(evaluation, summary)),
            "beam_pattern": lambda: save_png(beam_pattern_figure(evaluation)),
            "null_depth": lambda: save_png(null_depth_figure(evaluation, summary))}
    if not scores_is_line(evaluation.scene.array.positions):
        jobs["response_map"] = lambda: save_png(response_map_figure(evaluation, summary))
    if evaluation.scene.wideband:
        jobs["band_map"] = lambda: save_png(band_map_figure(evaluation))
    # relative drawing costs (measured: the convergence panels and maps take longest)
    return render_all(jobs, weights={"convergence": 1.4, "beam_pattern": 1.2,
                                     "null_depth": 0.8, "response_map": 1.5,
                                     "band_map": 1.5})


# --------------------------------------------------------------------- band maps
def band_map_db(evaluation, label: str, azimuths, frequencies) -> np.ndarray:
    """(F, A) mean power response over trials of a processor's final weights at
    baseband frequencies ``frequencies`` (cycles per snapshot) and azimuths (degrees,
    at the look elevation), dB relative to the look-direction response at the band
    centre. The response of space-time weights (N L) at frequency f toward u is
    ``sum_{l,n} conj(w_{l,n}) g_n exp(j 2 pi p_n.u (1 + f B)) exp(-j 2 pi f l)`` with
    each trial's true positions and gains (channel delay errors left out)."""
    sc = evaluation.scene
    w = np.asarray(evaluation.by_label(label).final_weights)               # (T, N L)
    pos, gains = evaluation.positions, evaluation.element_gains
    n = pos.shape[-2]
    taps = w.shape[-1] // n
    wl = np.conj(w).reshape(w.shape[0], taps, n)                            # (T, L, N)
    fb = sc.receiver.fractional_bandwidth or 0.0
    f = np.asarray(frequencies, dtype=float)
    az = np.asarray(azimuths, dtype=float)

    def power(a_deg, el):
        u = geometry.direction_vector(a_deg, np.full_like(a_deg, el))      # (A, 3)
        pu = np.einsum("tnc,ac->tan", pos, u)                              # (T, A, N)
        out = np.empty((len(f), len(a_deg)))
        for i, fi in enumerate(f):
            a = gains[:, None, :] * np.exp(2j * np.pi * pu * (1 + fi * fb))
            h = np.einsum("tln,tan,l->ta", wl, a, np.exp(-2j * np.pi * fi * np.arange(taps)))
            out[i] = np.mean(np.abs(h) ** 2, axis=0)
        return out

    ref = power(np.array([sc.look_azimuth]), sc.look_elevation)
    ref0 = ref[np.argmin(np.abs(f))][0] if len(f) else 1.0
    with np.errstate(divide="ignore"):
        return 10 * np.log10(np.maximum(power(az, sc.look_elevation), 1e-30) / ref0)


def band_map_figure(evaluation, azimuths=None, frequencies=None,
                        floor_db: float = PATTERN_FLOOR_DB) -> Figure:
    """One panel per processor: power response (dB re the look direction at the band
    centre) over azimuth and baseband frequency, final weights, mean over trials;
    interferers marked by a vertical bar across their band."""
    _check_evaluation(evaluation)
    sc = evaluation.scene
    az = np.linspace(-90, 90, 181) if azimuths is None else np.asarray(azimuths, float)
    f = np.linspace(-0.5, 0.5, 41) if frequencies is None else np.asarray(frequencies, float)
    procs = evaluation.processors
    cols = min(3, len(procs))
    rows = int(np.ceil(len(procs) / cols))
    fig, axes = new_figure(rows, cols, size=(3.4 * cols + 1.2, 2.8 * rows + 0.9))
    axes = np.atleast_1d(axes).ravel()
    image = None
    for ax, p in zip(axes, procs):
        m = band_map_db(evaluation, p.label, az, f)
        image = ax.pcolormesh(az, f, np.clip(m, floor_db, 10), shading="nearest",
                              vmin=floor_db, vmax=10, cmap="viridis")
        for i in sc.interferer_indices:
            s = sc.sources[i]
            o = sc.sources[sc.origin_index(i)]          # a copy: its origin's band
            lo, hi = -0.5, 0.5
            if o.bandwidth is not None:
                lo, hi = o.offset - o.bandwidth / 2, o.offset + o.bandwidth / 2
            if o.waveform.kind == "tone":
                lo = hi = o.waveform.frequency
            ax.plot([s.azimuth, s.azimuth], [lo, hi], color="#ffffff", linewidth=1.0,
                    linestyle=(0, (3, 2)))
        ax.set_title(p.label, fontsize=TICK_SIZE + 0.5)
        ax.tick_params(labelsize=TICK_SIZE)
    for ax in axes[len(procs):]:
        ax.set_visible(False)
    for ax in axes[::cols]:
        ax.set_ylabel("frequency, cycles/snapshot", fontsize=TICK_SIZE)
    for ax in axes[-cols:]:
        ax.set_xlabel("azimuth, degrees", fontsize=TICK_SIZE)
    if image is not None:
        cb = fig.colorbar(image, ax=list(axes[:len(procs)]), shrink=0.85)
        cb.set_label("dB re look direction at band centre", fontsize=TICK_SIZE)
    title, sub = run_title(evaluation, "Response over angle and frequency")
    add_title(fig, title, sub + "; dashed: interferers across their band")
    return fig
