"""Typed summaries (adapt.studies.summaries): one serialiser and one reader per summary,
exact round trips through the run folders' JSON files, and outputs that read the summary
instead of recomputing statistics from the trials."""
from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from adapt import api, io
from adapt.errors import InputError
from adapt.report import figures as F
from adapt.report.sizing_figures import sizing_figure
from adapt.studies.compare import (
    NULL_FLOOR_DB,
    compare,
    render_table,
    verdict_lines,
    write_compare_run,
)
from adapt.studies.sizing import render_table as sizing_table
from adapt.studies.sizing import size, write_sizing_run
from adapt.studies.summaries import (
    CompareSummary,
    FinalScores,
    NullDepth,
    ProcessorSummary,
    SizingSummary,
)

ROOT = Path(__file__).resolve().parents[1]
SCENES = ROOT / "scenes"
#: keys this version added to metrics.json (README, outputs): a file without them is
#: one written before, and must read back to exactly itself
ADDED = ("null_depth_floor_db", "null_depth_floored_db")


def _bytes(mapping) -> str:
    """What adapt.io.write_json writes for a mapping."""
    return json.dumps(io.to_jsonable(mapping), indent=2, allow_nan=False) + "\n"


# ------------------------------------------------------------------ real runs
@pytest.fixture(scope="module", params=["single_jammer", "nonstationary", "ring"])
def run(request, tmp_path_factory):
    """A real comparison of an example scene (fewer trials and snapshots) and its run
    folder: a line (azimuth-cut pattern scores), a nonstationary scene (interferers off
    at the end) and a ring (patterns over all directions)."""
    snapshots = {"nonstationary": 2500}.get(request.param)
    result = compare(SCENES / f"{request.param}.yaml", trials=6, snapshots=snapshots,
                     threads=1)
    folder = write_compare_run(result, tmp_path_factory.mktemp(request.param))
    return result, folder


def test_metrics_json_round_trips_byte_for_byte(run):
    result, folder = run
    text = (folder / "metrics.json").read_text(encoding="utf-8")
    assert text == _bytes(result.summary.to_json())
    back = CompareSummary.from_mapping(json.loads(text))
    assert _bytes(back.to_json()) == text                           # key order included
    assert CompareSummary.from_mapping(json.loads(_bytes(back.to_json()))) == back
    # and through the public reader
    got = api.read_run(folder)
    assert isinstance(got["summary"], CompareSummary) and got["summary"] == back
    assert got["metrics"] == json.loads(text) and got["problems"] == []


def test_what_the_scene_writes_is_in_the_summary(run):
    result, _ = run
    s = result.summary
    sc = result.scene
    assert (s.interferers_on_at_end is None) == sc.stationary
    line = F.scores_is_line(sc.array.positions)
    assert all((p.final.patterns.scope is None) == line for p in s.processors)
    assert result.metrics == s.to_json()
    assert result.processor(s.labels[0]) == s.processors[0].to_json()
    assert s.processor(s.labels[-1]) is s.processors[-1]
    with pytest.raises(KeyError):
        s.processor("no such processor")


def test_table_redrawn_from_metrics_json_is_summary_txt(run):
    # the terminal table reads the summary alone: from the file it is the same text
    _, folder = run
    back = CompareSummary.from_mapping(json.loads((folder / "metrics.json").read_text()))
    assert render_table(back) + "\n" == (folder / "summary.txt").read_text()
    assert verdict_lines(back) == verdict_lines(json.loads((folder / "metrics.json").read_text()))


def test_a_folder_written_before_the_floored_null_depths_reads_back_exactly(run, tmp_path):
    _, folder = run
    old = json.loads((folder / "metrics.json").read_text())
    old.pop(ADDED[0])
    for p in old["processors"]:
        p.pop(ADDED[1])
    back = CompareSummary.from_mapping(old)
    assert back.null_depth_floor_db is None
    assert all(p.null_depths is None for p in back.processors)
    assert _bytes(back.to_json()) == _bytes(old)
    # the figures need the floored statistics and say so, never recompute them
    with pytest.raises(ValueError, match="floored null depths"):
        F.null_depth_statistics(back)


def test_undefined_but_written_values_keep_their_key():
    # a processor whose loss against the interference-free array is undefined in every
    # trial: written as null, read back as NaN so that the key is written again
    entry = FinalScores.from_mapping({
        "sinr_db_mean": None, "sinr_db_p10": None, "sinr_db_p90": None,
        "loss_db_mean": None, "loss_db_median": None, "loss_db_p10": None,
        "loss_db_p90": None, "loss_db_of_mean": None, "normalized_sinr_mean": None,
        "normalized_sinr_sem": None, "white_noise_gain_db": 3.0, "null_depth_db": {"j": None},
        "measured_sinr_db_mean": None, "sinr_db_sem": None,
        "loss_db_vs_interference_free": None, "worst_null_db": None})
    assert np.isnan(entry.loss_db_vs_interference_free)
    assert io.to_jsonable(entry.to_json())["loss_db_vs_interference_free"] is None
    # absent (the wanted source off at the end): absent again
    mapping = io.to_jsonable(entry.to_json())
    mapping.pop("loss_db_vs_interference_free")
    assert "loss_db_vs_interference_free" not in FinalScores.from_mapping(mapping).to_json()


def test_a_missing_key_is_named(run, tmp_path):
    _, folder = run
    broken = json.loads((folder / "metrics.json").read_text())
    del broken["processors"][1]["final"]["worst_null_db"]
    with pytest.raises(ValueError, match=r"processors\[1\]\.final\.worst_null_db"):
        CompareSummary.from_mapping(broken)
    with pytest.raises(ValueError, match="expected a mapping"):
        CompareSummary.from_mapping([1, 2])
    copy = tmp_path / "broken"
    copy.mkdir()
    (copy / "metrics.json").write_text(json.dumps(broken))
    with pytest.raises(InputError, match="worst_null_db"):
        api.read_run(copy)
    (copy / "metrics.json").write_text("{not json")
    with pytest.raises(InputError, match="unreadable"):
        api.read_run(copy)


# ------------------------------------------------------------------ floored null depths
def test_floored_null_depths_are_the_per_trial_statistics(run):
    # Checked against a plain loop over processors and interferers: each trial's null
    # depth floored at -100 dB, then the mean and the 10th and 90th percentiles of the
    # finite values (numpy's default linear interpolation, Hyndman and Fan 1996,
    # definition 7).
    result, _ = run
    s = result.summary
    assert s.null_depth_floor_db == NULL_FLOOR_DB == -100.0
    for scored, entry in zip(result.evaluation.processors, s.processors):
        for j, name in enumerate(s.interferers):
            values = [max(float(v), -100.0) for v in scored.null_depth_db[:, -1, j]
                      if np.isfinite(v)]
            d = entry.null_depths[name]
            assert d.mean == pytest.approx(sum(values) / len(values), abs=1e-9)
            assert d.p10 == pytest.approx(np.percentile(values, 10), abs=1e-9)
            assert d.p90 == pytest.approx(np.percentile(values, 90), abs=1e-9)
            # flooring only raises values: never below the floor, never below the
            # unfloored mean that metrics.json keeps in final.null_depth_db
            assert min(d.p10, d.mean) >= -100.0
            assert d.mean >= entry.final.null_depth_db[name] - 1e-9


# ------------------------------------------------------------------ figures read it
@pytest.fixture(scope="module")
def jammed():
    return compare(SCENES / "single_jammer.yaml", trials=8, threads=1, patterns=False)


def _bar_heights(fig) -> list[float]:
    return [b.get_height() for c in fig.axes[0].containers if hasattr(c, "patches")
            for b in c.patches]


def test_null_depth_figure_draws_the_summary_not_the_trials(jammed):
    ev, summary = jammed.evaluation, jammed.summary
    fig = F.null_depth_figure(ev, summary)
    means = [p.null_depths[n].mean for p in summary.processors for n in summary.interferers]
    np.testing.assert_array_equal(_bar_heights(fig), means)
    # spoil the trials' null depths: the figure is unchanged, bytes and all
    spoilt = replace(ev, processors=[replace(p, null_depth_db=p.null_depth_db * 0 + 7.0)
                                     for p in ev.processors])
    assert F.save_png(F.null_depth_figure(spoilt, summary)) == F.save_png(fig)
    # change the summary: the bars follow it
    changed = replace(summary, processors=tuple(
        replace(p, null_depths={n: NullDepth(mean=-33.0, p10=-40.0, p90=-30.0)
                                for n in summary.interferers})
        for p in summary.processors))
    assert set(_bar_heights(F.null_depth_figure(ev, changed))) == {-33.0}
    # a summary of another run is refused
    other = replace(summary, processors=summary.processors[:1])
    with pytest.raises(ValueError, match="not the run's"):
        F.null_depth_figure(ev, other)


def test_null_depth_table_and_response_map_read_the_summary():
    # many bars: the table of cells; a planar array: the response map's null labels
    scene = {"name": "many", "array": {"layout": "grid", "rows": 2, "columns": 4},
             "sources": [{"name": "w", "role": "desired", "azimuth": 0, "power_db": 0}]
             + [{"name": f"j{i}", "role": "interferer", "azimuth": a, "elevation": 10,
                 "power_db": 30} for i, a in enumerate((-60, -35, -15, 20, 40, 65))],
             "trials": 2, "snapshots": 32,
             "processors": ["conventional", "optimum", "smi loading_db=10",
                            "smi loading_db=20", "lcmv loading_db=10", "nlms", "rls"]}
    result = compare(api.parse_scene(scene), threads=1, patterns=False)
    ev = result.evaluation
    summary = replace(result.summary, processors=tuple(
        replace(p, null_depths={n: NullDepth(mean=-42.0 - i, p10=-50.0, p90=-40.0)
                                for n in result.summary.interferers})
        for i, p in enumerate(result.summary.processors)))
    fig = F.null_depth_figure(ev, summary)
    cells = fig.axes[0].get_images()[0].get_array()
    np.testing.assert_array_equal(cells, np.repeat(-42.0 - np.arange(7.0), 6).reshape(7, 6))
    fig = F.response_map_figure(ev, summary)
    notes = {t.get_text() for ax in fig.axes for t in ax.texts}
    assert any(t.endswith(" -42") for t in notes) and any(t == "-48" for t in notes)


# ------------------------------------------------------------------ sizing
@pytest.fixture(scope="module")
def sized(tmp_path_factory):
    result = size(SCENES / "single_jammer.yaml", ["smi", "smi loading_db=10"], trials=40,
                  snapshots="8:64", threads=1)
    return result, write_sizing_run(result, tmp_path_factory.mktemp("size"))


def test_sizing_json_round_trips_byte_for_byte(sized):
    result, folder = sized
    text = (folder / "sizing.json").read_text(encoding="utf-8")
    assert text == _bytes(result.summary.to_json())
    back = SizingSummary.from_mapping(json.loads(text))
    assert _bytes(back.to_json()) == text
    assert SizingSummary.from_mapping(json.loads(_bytes(back.to_json()))) == back
    got = api.read_run(folder)
    assert got["summary"] == back and got["sizing"] == json.loads(text)
    assert result.record == result.summary.to_json()
    # the table and the figure need nothing but the file
    assert sizing_table(back) == result.table()
    fig = sizing_figure(back)
    drawn = next(ln for ln in fig.axes[0].get_lines()
                 if ln.get_label() == "smi (simulation, mean)")
    np.testing.assert_allclose(
        drawn.get_ydata(),
        [10 * np.log10(p.normalised_sinr_mean) for p in back.processor("smi").points],
        rtol=0, atol=1e-12)
    with pytest.raises(ValueError, match="sizing summary"):
        sizing_figure(json.loads(text))


def test_summary_types_are_frozen(jammed):
    with pytest.raises(AttributeError):
        jammed.summary.trials = 3
    entry: ProcessorSummary = jammed.summary.processors[0]
    with pytest.raises(AttributeError):
        entry.label = "x"


def test_results_given_a_mapping_read_it_into_their_summary(jammed, sized):
    # the first release built Comparison(evaluation, metrics, ...) and Sizing(record, ...)
    from adapt.studies.compare import Comparison
    from adapt.studies.sizing import Sizing
    again = Comparison(jammed.evaluation, jammed.metrics, jammed.scene)
    assert isinstance(again.summary, CompareSummary)
    assert _bytes(again.metrics) == _bytes(jammed.metrics) and again.table() == jammed.table()
    result, _ = sized
    back = Sizing(result.record, result.evaluation, result.scene)
    assert isinstance(back.summary, SizingSummary) and back.table() == result.table()
    with pytest.raises(ValueError, match="CompareSummary"):
        Comparison(jammed.evaluation, "metrics", jammed.scene)
