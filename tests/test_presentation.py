"""What the user reads: one number formatter, the ranked verdict, labels that are never
cut, a scene block that does not scroll sideways."""
from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from adapt.report.html import compare_report, table
from adapt.report.numbers import format_number, format_range
from adapt.report.runfolder import summary_rows
from adapt.scenefile import parse_scene
from adapt.studies.compare import compare, render_table, verdict_lines, write_compare_run

SCENE = {
    "name": "verdict",
    "array": {"layout": "line", "elements": 6, "spacing": 0.5},
    "sources": [{"name": "wanted", "role": "desired", "azimuth": 0, "power_db": 0},
                {"name": "jammer", "role": "interferer", "azimuth": 25, "power_db": 30}],
    "snapshots": 256, "trials": 40, "seed": 7,
    "processors": ["optimum", "conventional", "smi loading_db=10", "nlms step=0.05"],
}


@pytest.fixture(scope="module")
def result():
    return compare(parse_scene(SCENE), threads=1)


# ------------------------------------------------------------------ numbers
@pytest.mark.parametrize("value, decimals, text", [
    (5.011872336e-10, 2, "5.01e-10"),      # was "5.0117" (a cut string, exponent lost)
    (1.25e-09, 2, "1.25e-9"),
    (0.00148, 2, "1.48e-3"),
    (0.0, 2, "0.00"),
    (-0.004, 2, "-4.00e-3"),
    (-0.0, 2, "0.00"),
    (3.14159, 2, "3.14"),
    (2.5e7, 2, "2.50e7"),
    (17, 0, "17"),
    (None, 2, "n/a"),
    (float("nan"), 2, "n/a"),
    (float("inf"), 2, "inf"),
])
def test_one_number_formatter(value, decimals, text):
    assert format_number(value, decimals) == text


def test_formatter_never_hides_a_nonzero_value():
    for v in np.geomspace(1e-300, 1e300, 601):
        for sign in (1, -1):
            shown = format_number(sign * v)
            assert float(shown) != 0 and math.isclose(float(shown), sign * v, rel_tol=6e-3)


def test_tiny_loss_range_in_the_html_table_keeps_its_exponent(result):
    from dataclasses import replace
    first = result.summary.processors[0]
    final = replace(first.final, loss_db_mean=5.0e-10, loss_db_p10=5.0117e-10,
                    loss_db_p90=5.0117e-10)
    summary = replace(result.summary, processors=(replace(first, final=final),))
    row = summary_rows(summary)[0]
    assert row["loss dB p10-p90"] == "5.01e-10 to 5.01e-10"
    html = table([row])
    assert "5.00e-10" in html and "5.0117" not in html
    assert format_range(None, None) == "n/a"


def test_table_html_and_csv_use_the_same_formatter(result, tmp_path):
    folder = write_compare_run(result, tmp_path, figures=False)
    opt = result.metrics["optimum_sinr_db"]
    assert f"optimum SINR (clairvoyant MVDR): {format_number(opt)} dB" in result.table()
    with open(folder / "curves.csv", newline="") as fh:
        row = next(csv.DictReader(fh))
    assert row["sinr_db_mean"] == format_number(
        result.metrics["processors"][0]["curve"]["sinr_db_mean"][0], significant=10)


# ------------------------------------------------------------------ verdict
def test_verdict_ranks_the_adaptive_processors(result):
    v = result.metrics["verdict"]
    finals = {p["label"]: p["final"]["sinr_db_mean"] for p in result.metrics["processors"]}
    ranking = v["final_sinr"]["ranking"]
    assert "optimum" not in ranking                        # the bound is no contender
    assert ranking == sorted(ranking, key=lambda k: -finals[k])
    assert v["final_sinr"]["best"] == "smi loading_db=10"
    # the margin is the paired mean difference, its uncertainty twice the standard error
    ev = result.evaluation
    a = 10 * np.log10(ev.by_label("smi loading_db=10").sinr[:, -1])
    b = 10 * np.log10(ev.by_label(ranking[1]).sinr[:, -1])
    d = a - b
    assert v["final_sinr"]["margin"] == pytest.approx(d.mean(), rel=1e-12)
    assert v["final_sinr"]["uncertainty"] == pytest.approx(
        2 * d.std(ddof=1) / np.sqrt(len(d)), rel=1e-12)
    assert v["final_sinr"]["clear"] is True                # SMI beats NLMS by far here
    assert v["to_target"]["best"] == "smi loading_db=10"
    assert v["robust"]["best"] in ranking
    lines = verdict_lines(result.metrics)
    assert lines[0].startswith("best final SINR: smi loading_db=10")
    assert "clear" in lines[0]
    assert "verdict (margins paired over the same trials):" in result.table()


def test_interference_cost_is_against_the_matched_filter(result):
    # no interferer, unit noise: the optimum is the matched filter, SINR = P N
    # (Van Trees 2002 ch. 6); here 0 dB wanted power and 6 ideal elements
    m = result.metrics
    assert m["interference_free_sinr_db"] == pytest.approx(10 * np.log10(6), abs=1e-12)
    assert m["interference_cost_db"] == pytest.approx(
        m["interference_free_sinr_db"] - m["optimum_sinr_db"], abs=1e-9)
    assert m["interference_cost_db"] > 0
    for p in m["processors"]:
        f = p["final"]
        assert f["loss_db_vs_interference_free"] == pytest.approx(
            m["interference_free_sinr_db"] - f["sinr_db_mean"], abs=1e-9)
    assert any(t.startswith("interference cost even at the optimum") for t in
               verdict_lines(m))


def test_ties_are_called_ties(result):
    m = dict(result.metrics)
    m["verdict"] = dict(m["verdict"])
    m["verdict"]["to_target"] = {"ranking": ["a", "b"], "best": "a", "next": "b",
                                 "margin": 0.0, "uncertainty": None, "clear": False,
                                 "unit": "snapshots"}
    assert "fastest to 3 dB: a and b tie" in verdict_lines(m)


# ------------------------------------------------------------------ labels and scene block
def test_long_labels_are_never_cut(result):
    m = dict(result.metrics)
    long = "conventional taper=taylor sidelobe_db=35 label=" + "x" * 70
    m["processors"] = [dict(p) for p in m["processors"]]
    m["processors"][1]["label"] = long
    text = render_table(m, width=100)
    # whole (wrapped at spaces when longer than the table), never shortened with "..."
    assert " ".join(long.split()) in " ".join(text.split()) and "..." not in text
    assert max(len(line) for line in text.splitlines()) <= 100


def test_scene_block_wraps_instead_of_scrolling(result):
    summary = "warning: " + "a very long line " * 40
    page = compare_report(result.evaluation, summary_rows(result.summary), summary, {})
    assert '<pre class="wrap">' in page and "pre.wrap { white-space: pre-wrap;" in page


# ------------------------------------------------------------------ one summary
def test_convergence_figure_draws_the_summary_statistics(result):
    from dataclasses import replace

    from adapt.report import figures as F
    ev, summary = result.evaluation, result.summary
    drawn = F.convergence_figure(ev, summary)
    # each curve is the summary's, number for number (mean SINR above, mean loss below)
    for p in summary.processors:
        if p.method == "optimum":
            continue
        top = next(ln for ln in drawn.axes[0].lines if ln.get_label() == p.label)
        np.testing.assert_array_equal(top.get_ydata(), p.curve.sinr_db_mean)
        losses = [ln.get_ydata() for ln in drawn.axes[1].lines
                  if np.array_equal(ln.get_ydata(), p.curve.loss_db_mean)]
        assert losses, p.label
    # the figure reads its numbers there, not from the trials
    spoilt = replace(ev, processors=[replace(p, sinr=p.sinr * 0 + 1.0, loss_db=p.loss_db * 0)
                                     for p in ev.processors])
    again = F.convergence_figure(spoilt, summary)
    for a, b in zip(drawn.axes[0].lines + drawn.axes[1].lines,
                    again.axes[0].lines + again.axes[1].lines):
        np.testing.assert_array_equal(a.get_ydata(), b.get_ydata())
    curve = summary.processors[2].curve
    assert len(curve.sinr_db_p10) == len(curve.snapshots) == len(curve.sinr_db_p90)
    # the summary is required: the figure never computes statistics of its own
    with pytest.raises(TypeError):
        F.convergence_figure(ev)
    with pytest.raises(ValueError, match="summary"):
        F.convergence_figure(ev, result.metrics)


def test_the_scene_is_parsed_once_per_compare(tmp_path, monkeypatch):
    import yaml

    from adapt import scenefile as files
    path = tmp_path / "s.yaml"
    path.write_text(yaml.safe_dump(dict(SCENE, trials=3, snapshots=16)))
    calls = []
    real = files.parse_scene

    def counted(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(files, "parse_scene", counted)
    compare(path, threads=1)
    assert len(calls) == 1
    compare(files.load_scene(path), trials=2, threads=1)    # an override is re-validated
    assert len(calls) == 3
