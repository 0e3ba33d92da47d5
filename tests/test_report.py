"""Figures and the self-contained HTML report (adapt.report)."""
from __future__ import annotations

import base64
import struct
import subprocess
import sys
import threading
from html.parser import HTMLParser

import numpy as np
import pytest
from scipy.signal import find_peaks
from scipy.signal.windows import boxcar

from adapt.engine.execute import run_trials as evaluate
from adapt.numerics.linalg import solve_hermitian
from adapt.processors import parse_spec
from adapt.processors.base import Processor, State
from adapt.report import figures as F
from adapt.report import html as H
from adapt.scenefile import parse_scene
from adapt.studies.compare import NULL_FLOOR_DB, summarise

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"      # PNG specification (ISO/IEC 15948), section 5.2


class LoadedSampleMatrix(Processor):
    """Test-only adaptive processor: sample covariance of the training data plus
    diagonal loading of one noise power, MVDR weight (Reed, Mallett and Brennan 1974;
    loading level: common practice). Keeps this file independent of the processor
    modules other people are writing."""
    method = "test-smi"

    def begin(self, context):
        n = context.elements
        return State(context=context, look=context.look,
                     r=np.zeros((context.trials, n, n), complex), k=0)

    @staticmethod
    def _add(state, x):
        state.r += np.einsum("tbn,tbm->tnm", x, np.conj(x))
        state.k += x.shape[1]

    def update(self, state, block, stops):
        x = block.training
        out, lo = [], 0
        for s in stops:
            hi = int(s - block.start)
            self._add(state, x[:, lo:hi])
            lo = hi
            r = state.r / max(state.k, 1) + np.eye(len(state.look))
            v = solve_hermitian(r, np.broadcast_to(state.look, r.shape[:-1]))
            out.append(v / np.conj(np.einsum("n,tn->t", np.conj(state.look), v))[:, None])
        self._add(state, x[:, lo:])
        if not out:
            return np.zeros((x.shape[0], 0, x.shape[2]), complex)
        return np.stack(out, axis=1)


def _processors():
    return [parse_spec("conventional"),
            parse_spec("conventional taper=chebyshev sidelobe_db=30 label=chebyshev-30"),
            LoadedSampleMatrix(label="sample-matrix")]


@pytest.fixture(scope="module")
def stationary():
    sc = parse_scene({
        "name": "two jammers <script>alert(1)</script>",
        "array": {"layout": "line", "elements": 16, "spacing": 0.5},
        "sources": [
            {"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
            {"name": "jam-a", "role": "interferer", "azimuth": 31, "power_db": 30},
            {"name": "jam-b", "role": "interferer", "azimuth": -50, "power_db": 40}]})
    return evaluate(sc, _processors(), trials=8, snapshots=128, seed=3)


@pytest.fixture(scope="module")
def nonstationary():
    sc = parse_scene({
        "name": "pulsed and moving",
        "array": {"layout": "line", "elements": 8},
        "sources": [
            {"name": "wanted", "role": "desired", "azimuth": 5, "power_db": 0},
            {"name": "pulser", "role": "interferer", "azimuth": 40, "power_db": 35,
             "pulsing": {"start": 64, "period": 64, "on": 32}},
            {"name": "mover", "role": "interferer", "azimuth": -30, "power_db": 30,
             "motion": {"azimuth_rate": 0.05}}]})
    return evaluate(sc, _processors()[::2], trials=6, snapshots=256, seed=5)


@pytest.fixture(scope="module")
def ring():
    sc = parse_scene({
        "name": "ring with errors",
        "array": {"layout": "ring", "elements": 12,
                  "errors": {"gain_db_rms": 0.5, "phase_deg_rms": 3,
                             "position_rms": 0.02}},
        "sources": [
            {"name": "wanted", "role": "desired", "azimuth": 20, "power_db": 0},
            {"name": "behind", "role": "interferer", "azimuth": 150, "power_db": 30}]})
    return evaluate(sc, [parse_spec("conventional"), LoadedSampleMatrix(label="smi")],
                    trials=5, snapshots=96, seed=11)


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG spec, section 11.2.2)."""
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def check_png(data: bytes, width_in: float) -> None:
    w, h = png_size(data)
    # F.DPI figures; constrained layout keeps the canvas size (common practice)
    assert abs(w - width_in * F.DPI) <= 2, w
    assert 300 < h < 2000
    assert 5_000 < len(data) < 2_000_000


_SUMMARIES: dict = {}


def summary_of(evaluation):
    """The comparison summary the figures read (made once per evaluation)."""
    if id(evaluation) not in _SUMMARIES:
        _SUMMARIES[id(evaluation)] = (evaluation, summarise(evaluation, patterns=False))
    return _SUMMARIES[id(evaluation)][1]


FIGURES = [(lambda ev: F.convergence_figure(ev, summary_of(ev)), 8.0),
           (F.beam_pattern_figure, 8.6),
           (lambda ev: F.null_depth_figure(ev, summary_of(ev)), 8.0)]


@pytest.mark.parametrize("case", ["stationary", "nonstationary", "ring"])
def test_figures_are_png_of_sensible_size(case, request):
    evaluation = request.getfixturevalue(case)
    for make, width in FIGURES:
        fig = make(evaluation)
        check_png(F.figure_to_png(fig), width)


def test_series_colours_consistent_across_figures(stationary):
    # grouped by family: the two conventional beams share a colour, not a line style
    styles = F.run_styles(stationary)
    assert len({s["color"] for s in styles.values()}) == 2
    assert len({(s["color"], s["linestyle"]) for s in styles.values()}) == 3
    conv = F.convergence_figure(stationary, summary_of(stationary))
    beam = F.beam_pattern_figure(stationary)
    for fig in (conv, beam):
        lines = {ln.get_label(): ln.get_color() for ln in fig.axes[0].get_lines()}
        for label, st in styles.items():
            assert lines[label] == st["color"]
    bars = F.null_depth_figure(stationary, summary_of(stationary)).axes[0].containers
    colours = [tuple(np.round(b.patches[0].get_facecolor()[:3], 3)) for b in bars
               if hasattr(b, "patches")]
    from matplotlib.colors import to_rgb
    assert colours[:3] == [tuple(np.round(to_rgb(st["color"]), 3)) for st in styles.values()]
    # more series than colours: line styles change
    many = F.series_styles(f"p{i}" for i in range(len(F.PALETTE) + 1))
    first, extra = many["p0"], many[f"p{len(F.PALETTE)}"]
    assert first["color"] == extra["color"] and first["linestyle"] != extra["linestyle"]
    assert first["hatch"] != extra["hatch"]


def test_first_sidelobe_of_uniform_line(stationary):
    # Uniform 16-element half-wavelength line: first sidelobe -13.26 dB in the large-N
    # limit (Balanis, Antenna Theory, ch. 6; tolerance +- 0.3 dB, common practice), and
    # for N = 16
    # exactly the first sidelobe of the zero-padded DFT of scipy.signal.windows.boxcar(16).
    az = np.arange(0.0, 30.0, 0.0005)
    pat = F.mean_beam_pattern_db(stationary, "conventional", az)
    peaks, _ = find_peaks(pat)
    first = pat[peaks[0]]
    assert abs(first - (-13.26)) <= 0.3
    spec = np.abs(np.fft.fft(boxcar(16), 1 << 18)) ** 2
    spec_db = 10 * np.log10(spec / spec.max() + 1e-300)
    half = spec_db[: (1 << 17)]
    dft_peaks, _ = find_peaks(half)
    assert abs(first - half[dft_peaks[0]]) < 0.01
    # and its angle: sin(az) = 1.43 / (N d) for the first sidelobe (x = 1.4303 pi,
    # root of tan x = N tan(x/N) ~ tan x = x; Balanis ch. 6)
    assert abs(np.sin(np.deg2rad(az[peaks[0]])) - 1.4303 / 8) < 2e-3
    # the look direction is 0 dB by construction
    assert abs(F.mean_beam_pattern_db(stationary, "conventional", [0.0])[0]) < 1e-9


def looped_pattern_db(evaluation, label, az):
    """Independent reference: a plain loop over trials with each trial's true positions
    and gains, elevation 0, normalised per trial to the look direction."""
    sc = evaluation.scene
    w = evaluation.by_label(label).final_weights
    u = np.stack([np.sin(np.deg2rad(az)), np.cos(np.deg2rad(az)), 0 * az], -1)
    u0 = np.array([np.sin(np.deg2rad(sc.look_azimuth)), np.cos(np.deg2rad(sc.look_azimuth)), 0])
    ratios = []
    for t in range(evaluation.trials):
        g, p = evaluation.element_gains[t], evaluation.positions[t]
        a = g * np.exp(2j * np.pi * (u @ p.T))
        a0 = g * np.exp(2j * np.pi * p @ u0)
        ratios.append(np.abs(a @ np.conj(w[t])) ** 2 / np.abs(np.vdot(w[t], a0)) ** 2)
    return 10 * np.log10(np.mean(ratios, axis=0))


def test_pattern_uses_true_array_of_each_trial(ring):
    import dataclasses
    sc = ring.scene
    az = np.linspace(-180, 180, 181)
    # position errors: every trial has its own steering matrix
    got = F.mean_beam_pattern_db(ring, "smi", az)
    np.testing.assert_allclose(got, looped_pattern_db(ring, "smi", az), atol=1e-9)
    # nominal positions with per-trial gains: the shared-steering path
    same = dataclasses.replace(ring, positions=np.broadcast_to(
        sc.array.positions, ring.positions.shape).copy())
    np.testing.assert_allclose(F.mean_beam_pattern_db(same, "smi", az),
                               looped_pattern_db(same, "smi", az), atol=1e-9)
    # several processors at once give the same patterns
    both = F.mean_beam_patterns_db(ring, ["conventional", "smi"], az)
    np.testing.assert_allclose(both[1], got, atol=1e-12)
    # the hardware errors matter: the nominal array's pattern differs
    nominal = dataclasses.replace(ring, positions=None, element_gains=None)
    assert np.max(np.abs(F.mean_beam_pattern_db(nominal, "smi", az) - got)) > 0.1
    # a ring has depth along y: the cut covers the whole circle
    assert F.default_azimuths(sc)[0] == -180 and F.default_azimuths(sc)[-1] == 180


def test_pattern_matches_engine_null_depths(stationary):
    # The engine scores the response toward each interferer with its own code
    # (adapt.engine.scores.response_db); the pattern at the interferer's azimuth is the trial
    # mean of the same linear ratio.
    for p in stationary.processors:
        for j, s in enumerate(stationary.scene.interferers):
            got = F.mean_beam_pattern_db(stationary, p.label, [s.azimuth])[0]
            nd = p.null_depth_db[:, -1, j]
            want = 10 * np.log10(np.mean(10 ** (nd / 10)))
            if want > -250:     # below that both are floating-point round-off
                assert abs(got - want) < 1e-6, (p.label, s.name, got, want)


def test_nonstationary_optimum_is_a_curve(nonstationary):
    fig = F.convergence_figure(nonstationary, summary_of(nonstationary))
    opt = [ln for ln in fig.axes[0].get_lines() if ln.get_label().startswith("optimum")]
    assert len(opt) == 1
    y = np.asarray(opt[0].get_ydata(), float)
    # the pulsed jammer switches on at snapshot 64: the optimum of the moment moves
    assert np.nanmax(y) - np.nanmin(y) > 0.1
    assert "nonstationary" in fig.get_suptitle()


def test_null_depth_figure_annotates_jnr(stationary):
    fig = F.null_depth_figure(stationary, summary_of(stationary))
    ticks = [t.get_text() for t in fig.axes[0].get_xticklabels()]
    assert any("jam-a" in t and "JNR 30 dB" in t for t in ticks)
    assert any("jam-b" in t and "JNR 40 dB" in t for t in ticks)
    # bars are finite, floored, and drawn in the visible range
    for bars in fig.axes[0].containers:
        if hasattr(bars, "patches"):
            for b in bars.patches:
                assert NULL_FLOOR_DB - 1e-9 <= b.get_height() <= 5


def test_null_depth_figure_without_interferers():
    sc = parse_scene({"name": "quiet", "array": {"layout": "line", "elements": 4},
                      "sources": [{"name": "w", "role": "desired", "azimuth": 0,
                                   "power_db": 0}]})
    ev = evaluate(sc, [parse_spec("conventional")], trials=2, snapshots=16)
    check_png(F.figure_to_png(F.null_depth_figure(ev, summary_of(ev))), 8.0)


def test_png_is_deterministic_and_threads_work(stationary):
    a = F.figure_to_png(F.null_depth_figure(stationary, summary_of(stationary)))
    b = F.figure_to_png(F.null_depth_figure(stationary, summary_of(stationary)))
    assert a == b
    out = {}
    summary = summary_of(stationary)

    def work(i):
        out[i] = F.figure_to_png(F.convergence_figure(stationary, summary))

    threads = [threading.Thread(target=work, args=(i,)) for i in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert out[0] == out[1] and out[0][:8] == PNG_SIGNATURE


@pytest.mark.slow
def test_no_pyplot_state():
    code = ("import sys, adapt.report.figures as F\n"
            "fig, ax = F.new_figure(); ax.plot([1, 2]); F.save_png(fig)\n"
            "assert 'matplotlib.pyplot' not in sys.modules\n")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=60)


def test_input_guards(stationary):
    with pytest.raises(ValueError, match="no processor labelled"):
        F.mean_beam_pattern_db(stationary, "nope", [0.0])
    with pytest.raises(ValueError):
        F.mean_beam_pattern_db(stationary, "conventional", [])
    with pytest.raises(ValueError):
        F.save_png("not a figure")
    with pytest.raises(ValueError):
        H.png_data_uri(b"GIF89a....")
    with pytest.raises(ValueError):
        H.figure(F.figure_to_png(F.new_figure()[0]), alt="")
    with pytest.raises(ValueError):
        H.build_page("", [])
    with pytest.raises(ValueError):
        H.table([{"a": 1}, [1, 2]])


# ------------------------------------------------------------------------------ HTML
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta",
        "source", "track", "wbr"}


class StrictCollector(HTMLParser):
    """Collects tags and attributes and checks that elements nest and close (HTML5
    void elements per the WHATWG standard's list)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.problems, self.images, self.attrs, self.tags = [], [], [], [], []
        self.text = []
        self.decl = None

    def handle_decl(self, decl):
        self.decl = decl

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend(attrs)
        if tag == "img":
            self.images.append(dict(attrs))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def parse(page: str) -> StrictCollector:
    p = StrictCollector()
    p.feed(page)
    p.close()
    assert not p.problems, p.problems
    assert not p.stack, p.stack
    assert p.decl and p.decl.lower() == "doctype html"
    return p


@pytest.fixture(scope="module")
def report(stationary):
    figs = F.standard_figures(stationary, summary_of(stationary))
    rows = [{"processor": p.label, "final loss, dB": float(np.mean(p.loss_db[:, -1])),
             "note": "<b>bold?</b> & more"} for p in stationary.processors]
    rows[0]["final loss, dB"] = float("nan")
    page = H.compare_report(stationary, rows, "scene summary with <tags> & ampersands",
                            figs)
    return page, figs


def test_report_is_self_contained_html(report):
    page, figs = report
    p = parse(page)
    assert len(p.images) == len(figs) == 3
    for img, (name, png) in zip(p.images, figs.items()):
        src = img["src"]
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)   # RFC 4648
        assert data[:8] == PNG_SIGNATURE and data == png
        assert img.get("alt") and img["alt"] == F.FIGURE_TEXT[name][0]
    for key, value in p.attrs:
        if key in ("src", "href", "action", "srcset", "poster"):
            assert not str(value).lower().startswith(("http:", "https:", "//")), value
    low = page.lower()
    assert "http://" not in low and "https://" not in low
    assert "<script" not in low and "<link" not in low and "@import" not in low
    assert "url(" not in low
    for caption in (F.FIGURE_TEXT[name][1] for name in figs):
        assert H.escape(caption) in page


def test_report_escapes_outside_text(report):
    page, _ = report
    p = parse(page)
    text = "".join(p.text)
    # the scene name containing <script> is shown as text, never as a tag
    assert "two jammers <script>alert(1)</script>" in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "script" not in p.tags and "b" not in p.tags
    assert "&lt;b&gt;bold?&lt;/b&gt; &amp; more" in page
    assert "scene summary with &lt;tags&gt; &amp; ampersands" in page
    assert "n/a" in text                     # NaN cell
    assert "Simulation only" in text and "unlawful" in text and "measured hardware" in text


def test_build_page_generic_sections():
    png = F.figure_to_png(F.new_figure()[0])
    page = H.build_page("Sizing <sweep>", [
        ("Plain & text", ["a paragraph with <em>", H.table([[1, 2.5], [3, np.nan]],
                                                            header=["n", "x <dB>"])]),
        ("Figure", [H.figure(png, "an empty chart", "caption & more")]),
        (None, [H.preformatted("x < y")]),
    ])
    p = parse(page)
    assert len(p.images) == 1
    assert "Sizing &lt;sweep&gt;" in page and "x &lt;dB&gt;" in page
    assert "a paragraph with &lt;em&gt;" in page and "em" not in p.tags
    assert page.count("<h2>") == 2
