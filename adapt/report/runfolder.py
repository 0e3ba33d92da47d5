"""Run folders: one new folder per run, every file atomic, a manifest of hashes.

A run folder (``runs/YYYYmmdd-HHMMSS-scene-name/``, made by
:func:`adapt.io.new_run_folder`, never reused) holds:

* ``scene.yaml`` - the scene exactly as run (defaults filled in; trials, snapshots, seed
  and processor specs as used), re-loadable with ``adapt compare scene.yaml``;
* ``metrics.json`` - the summary (schema in README and :mod:`adapt.studies.compare`);
* ``curves.csv`` - one row per processor and checkpoint;
* ``summary.txt`` - the terminal table;
* ``convergence.png``, ``beam_pattern.png``, ``null_depth.png`` and ``report.html`` -
  from :mod:`adapt.report` (figures and a self-contained page);
* ``manifest.json`` - library versions, seed, command line and the sha256 and size of
  every other file (:func:`adapt.io.write_manifest`; check with
  :func:`adapt.io.check_manifest`).

While ``adapt compare`` / ``adapt size`` run, the folder also holds ``INCOMPLETE``,
``resume.json`` and ``partial/`` (finished chunks, see :mod:`adapt.engine.execute`); they are
removed just before the manifest is written, so a folder without a manifest is an
unfinished run that ``--resume`` can complete.
"""
from __future__ import annotations

import csv
import datetime as _dt
import importlib
import importlib.util
import io as _io
import json
import math
from pathlib import Path

import yaml

from adapt import io

__all__ = ["write_run", "write_scene_yaml", "write_curves_csv", "curves_rows",
           "CURVE_COLUMNS", "write_report_files", "summary_rows", "read_run", "RUN_FILES"]

#: files every run folder has (figures and report.html in addition when available)
RUN_FILES = ("scene.yaml", "metrics.json", "curves.csv", "summary.txt", "manifest.json")

#: columns of curves.csv, in order
CURVE_COLUMNS = ("label", "method", "snapshots", "normalized_sinr_mean", "sinr_db_mean",
                 "loss_db_p10", "loss_db_median", "loss_db_p90", "loss_db_of_mean",
                 "fraction_meeting_target", "optimum_sinr_db_mean", "measured_sinr_db_mean")


def write_scene_yaml(folder, scene) -> Path:
    """``scene.yaml``: the resolved scene mapping, YAML safe-dumped in key order."""
    from adapt.scene.files import scene_to_mapping
    mapping = scene.resolved if getattr(scene, "resolved", None) else scene_to_mapping(scene)
    header = ("# The scene exactly as run (defaults filled in). Re-run with:\n"
              "#   adapt compare scene.yaml\n")
    text = yaml.safe_dump(mapping, sort_keys=False, default_flow_style=None,
                          allow_unicode=True)
    return io.atomic_write_text(Path(folder) / "scene.yaml", header + text)


def _num(v) -> str:
    if v is None:
        return ""
    f = float(v)
    return "" if not math.isfinite(f) else format(f, ".10g")


def curves_rows(metrics: dict) -> list[dict]:
    """Rows of ``curves.csv`` (dicts keyed by :data:`CURVE_COLUMNS`)."""
    opt = metrics["optimum_curve"]["sinr_db_mean"]
    rows = []
    for p in metrics["processors"]:
        c = p["curve"]
        for i, k in enumerate(c["snapshots"]):
            rows.append({
                "label": p["label"], "method": p["method"], "snapshots": int(k),
                "normalized_sinr_mean": c["normalized_sinr_mean"][i],
                "sinr_db_mean": c["sinr_db_mean"][i],
                "loss_db_p10": c["loss_db_p10"][i],
                "loss_db_median": c["loss_db_median"][i],
                "loss_db_p90": c["loss_db_p90"][i],
                "loss_db_of_mean": c["loss_db_of_mean"][i],
                "fraction_meeting_target": c["fraction_meeting_target"][i],
                "optimum_sinr_db_mean": opt[i],
                "measured_sinr_db_mean": c["measured_sinr_db_mean"][i],
            })
    return rows


def write_curves_csv(folder, metrics: dict) -> Path:
    """``curves.csv``: header :data:`CURVE_COLUMNS`, one row per processor and
    checkpoint; numbers with 10 significant digits, empty where undefined."""
    buf = _io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CURVE_COLUMNS)
    for row in curves_rows(metrics):
        w.writerow([row[c] if c in ("label", "method", "snapshots") else _num(row[c])
                    for c in CURVE_COLUMNS])
    return io.atomic_write_text(Path(folder) / "curves.csv", buf.getvalue())


def _module(name: str):
    """``adapt.report.<name>``, imported when first needed (matplotlib is heavy)."""
    return importlib.import_module(f"adapt.report.{name}")


def summary_rows(metrics: dict) -> list[dict]:
    """One row per processor for the HTML score table (numbers; None where undefined)."""
    rows = []
    for p in metrics["processors"]:
        f = p["final"]
        nulls = [v for v in f["null_depth_db"].values() if v is not None]
        rows.append({
            "processor": p["label"],
            "SINR dB (final)": f["sinr_db_mean"],
            "loss dB vs optimum": f["loss_db_mean"],
            "loss dB p10-p90": (f"{_num(f['loss_db_p10'])[:6]} to {_num(f['loss_db_p90'])[:6]}"
                                if f["loss_db_p10"] is not None else None),
            "snapshots to 3 dB (mean)": p["snapshots_to_3db"] if p["snapshots_to_3db"] is not None
            else "never",
            f"snapshots to 3 dB ({metrics.get('fraction', 0.9) * 100:.0f}% of trials)":
                p["snapshots_to_3db_fraction"] if p["snapshots_to_3db_fraction"] is not None
                else "never",
            "worst null dB": max(nulls) if nulls else None,
            "white-noise gain dB": f["white_noise_gain_db"],
            "pointing error deg (rms)": f.get("pointing_error_deg_rms"),
            "peak sidelobe dB": f.get("peak_sidelobe_db_mean"),
            "time s": p["seconds"],
        })
    return rows


def write_report_files(folder, evaluation, metrics: dict, scene=None,
                       command_line: str | None = None) -> list[str]:
    """Write the figures (``<name>.png``) and ``report.html`` with :mod:`adapt.report`;
    returns the file names written (none when the report modules are absent)."""
    folder = Path(folder)
    written = []
    figs = _module("figures")
    pngs: dict[str, bytes] = {}
    if figs is not None:
        pngs = figs.standard_figures(evaluation)
        for name, data in pngs.items():
            io.atomic_write_bytes(folder / f"{name}.png", data)
            written.append(f"{name}.png")
    html = _module("html")
    builder = getattr(html, "compare_report", None) if html is not None else None
    if builder is not None:
        from adapt.studies.check import summarise_scene
        sc = scene if scene is not None else evaluation.scene
        notes = [f"Optimum (clairvoyant MVDR) SINR: {_num(metrics['optimum_sinr_db'])[:6]} dB, "
                 "mean over trials. Loss = optimum minus output SINR, mean over trials of dB. "
                 f"'Snapshots to 3 dB' = first checkpoint where the loss of the mean "
                 f"normalised SINR is within {metrics.get('target_db', 3):g} dB."]
        if command_line:
            notes.append(f"Command: {command_line}")
        page = builder(evaluation, summary_rows(metrics), summarise_scene(sc), pngs,
                       notes=notes)
        io.atomic_write_text(folder / "report.html", page)
        written.append("report.html")
    return written


def write_run(scene, evaluation, metrics: dict, out_root="runs", command_line: str | None = None,
              kind: str = "compare", figures: bool = True, table: str | None = None,
              folder=None) -> Path:
    """Write a complete run folder (see the module docstring) and return its path.

    A new folder is created under ``out_root`` (timestamp + scene name, suffixed when
    taken); nothing outside it is touched. ``manifest.json`` is written last, so a
    folder with a manifest is complete. With ``folder`` (a resumable run folder made by
    :func:`adapt.engine.execute.start_run_folder`), the outputs go there and its resume state
    (``partial/``, ``resume.json``, ``INCOMPLETE``) is removed just before the manifest.
    """
    if folder is None:
        folder = io.new_run_folder(out_root, scene.name)
    folder = Path(folder)
    write_scene_yaml(folder, scene)
    io.write_json(folder / "metrics.json", metrics)
    write_curves_csv(folder, metrics)
    if table is not None:
        io.atomic_write_text(folder / "summary.txt", table + "\n")
    else:
        io.atomic_write_text(folder / "summary.txt", json.dumps(io.to_jsonable(metrics)) + "\n")
    extra = []
    if figures:
        extra = write_report_files(folder, evaluation, metrics, scene, command_line)
    info = {"kind": kind, "scene": scene.name, "seed": int(metrics.get("seed", scene.seed)),
            "trials": int(metrics.get("trials", scene.trials)),
            "snapshots": int(metrics.get("snapshots", scene.snapshots)),
            "command_line": command_line,
            "created": _dt.datetime.now().astimezone().isoformat(timespec="seconds"),
            "report": "report.html" in extra}
    from adapt.engine.execute import seal
    seal(folder)
    io.write_manifest(folder, info)
    return folder


def read_run(folder) -> dict:
    """Read a run folder back: ``{"metrics": dict, "manifest": dict, "curves": list of
    row dicts, "problems": [...]}``; ``problems`` lists manifest mismatches (empty:
    intact). ValueError if the folder has no metrics.json."""
    folder = Path(folder)
    if not (folder / "metrics.json").is_file():
        raise ValueError(f"{folder} is not a run folder (no metrics.json)")
    metrics = json.loads((folder / "metrics.json").read_text(encoding="utf-8"))
    manifest = {}
    if (folder / "manifest.json").is_file():
        manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    curves = []
    if (folder / "curves.csv").is_file():
        with open(folder / "curves.csv", newline="", encoding="utf-8") as fh:
            curves = list(csv.DictReader(fh))
    return {"metrics": metrics, "manifest": manifest, "curves": curves,
            "problems": io.check_manifest(folder)}
