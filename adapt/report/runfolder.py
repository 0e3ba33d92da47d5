"""Run folders: one new folder per run, every file atomic, a manifest of hashes.

A run folder (``runs/YYYYmmdd-HHMMSS-scene-name/``, made by
:func:`adapt.io.new_run_folder`, never reused) holds:

* ``scene.yaml`` - the scene exactly as run (defaults filled in; trials, snapshots, seed
  and processor specs as used), re-loadable with ``adapt compare scene.yaml``;
* ``metrics.json`` - the summary (schema in README and :mod:`adapt.studies.compare`;
  ``CompareSummary.to_json()`` of :mod:`adapt.studies.summaries`);
* ``curves.csv`` - one row per processor and checkpoint;
* ``summary.txt`` - the terminal table;
* ``convergence.png``, ``beam_pattern.png``, ``null_depth.png`` and ``report.html`` -
  from :mod:`adapt.report` (figures and a self-contained page);
* ``manifest.json`` - library versions, seed, command line and the sha256 and size of
  every other file (:func:`adapt.io.write_manifest`; check with
  :func:`adapt.io.check_manifest`).

Every study writes its folder through one writer, :class:`RunWriter` (atomic files, the
manifest last), and one life cycle:

* :func:`start_run_folder` makes a new folder holding ``resume.json`` (the command's
  settings) and then ``INCOMPLETE`` (how to resume); if either cannot be written (a full
  disk) the folder is removed again, so nothing misleading is left;
* while ``adapt compare`` / ``adapt size`` run, finished chunks go to ``partial/``
  (:mod:`adapt.engine.chunks`);
* :meth:`RunWriter.seal` first removes stray ``.partial-`` files (left by a kill during
  an atomic write), then writes ``manifest.json`` (which never lists the resume state),
  and only then removes ``partial/``, ``resume.json`` and ``INCOMPLETE``. So a folder
  is always either complete (it has a manifest) or resumable (it has its resume state);
  a kill between the two steps leaves a complete folder with leftovers that
  :func:`open_for_resume` clears (:func:`finish_seal`).
"""
from __future__ import annotations

import csv
import datetime as _dt
import importlib
import importlib.util
import io as _io
import json
import math
import os
import shutil
from pathlib import Path
from typing import Callable, Sequence

import yaml

from adapt import io
from adapt.errors import InputError
from adapt.report.numbers import format_number, format_range

__all__ = ["RunWriter", "StagedFolder", "start_run_folder", "open_for_resume", "finish_seal",
           "remove_if_empty", "RESUME_FILE", "MARKER", "PARTIAL", "RESUME_STATE", "write_run",
           "write_scene_yaml", "write_curves_csv", "curves_rows",
           "CURVE_COLUMNS", "write_report_files", "summary_rows", "read_run", "RUN_FILES",
           "SUMMARY_FILES"]

#: the resume state of an unfinished run folder
RESUME_FILE = "resume.json"
MARKER = "INCOMPLETE"
PARTIAL = "partial"
RESUME_STATE = (PARTIAL, RESUME_FILE, MARKER)
_MANIFEST = "manifest.json"


# --------------------------------------------------------------------------- life cycle
def start_run_folder(out_root, name: str, kind: str, settings: dict,
                     command_line: str | None = None) -> Path:
    """A new run folder marked incomplete: ``resume.json`` (kind, settings - the
    resolved scene and the command's parameters - and command line), then ``INCOMPLETE``
    (how to resume). If either cannot be written the folder is removed and the error
    raised: a folder is never left claiming to be resumable when it is not.

    Parameters
    ----------
    out_root : path
        Folder receiving the run folder (created if needed).
    name : str
        Scene name (part of the folder name).
    kind : str
        The command (``compare``, ``size``): named in ``INCOMPLETE`` and checked on
        resume.
    settings : dict
        JSON-able settings the command needs to finish the run.
    command_line : str, optional
        The command line, recorded.

    Returns
    -------
    Path
        The new folder.
    """
    folder = io.new_run_folder(out_root, name)
    try:
        io.write_json(folder / RESUME_FILE, {"kind": kind, "status": "incomplete",
                                             "settings": settings,
                                             "command_line": command_line})
        io.atomic_write_text(folder / MARKER, _marker_text(folder, kind))
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    return folder


def _marker_text(folder: Path, kind: str) -> str:
    return (f"This run has not finished (it was interrupted, or is still running).\n"
            f"Finished chunks are kept in {PARTIAL}/. Finish it with:\n"
            f"  adapt {kind} --resume {folder}\n")


def _resume_state_left(folder: Path) -> bool:
    return any((folder / name).exists() for name in RESUME_STATE)


def finish_seal(folder) -> None:
    """Remove what a sealed folder must not hold: stray ``.partial-`` files, then
    ``partial/``, ``resume.json`` and ``INCOMPLETE`` (the marker last)."""
    folder = Path(folder)
    _remove_strays(folder)
    shutil.rmtree(folder / PARTIAL, ignore_errors=True)
    for name in (RESUME_FILE, MARKER):
        (folder / name).unlink(missing_ok=True)


def _remove_strays(folder: Path) -> None:
    """Delete ``.partial-`` files (an atomic write cut short by a kill) outside
    ``partial/``."""
    for stray in list(folder.rglob(f"{io.TMP_PREFIX}*")):
        if stray.is_file() and stray.relative_to(folder).parts[0] != PARTIAL:
            stray.unlink(missing_ok=True)


def open_for_resume(folder, kind: str) -> dict | None:
    """The ``resume.json`` record of an incomplete run folder of ``kind``.

    Returns None when the folder already has its manifest but still holds resume state
    (the run was stopped while sealing): the sealing is finished here and there is
    nothing left to compute. InputError if the folder is complete, not a run folder, of
    another command, or its ``resume.json`` is unreadable or lacks what a resume needs.
    """
    path = Path(folder)
    if not path.is_dir():
        raise InputError("no such run folder", path="--resume", value=str(folder))
    if (path / _MANIFEST).is_file():
        if _resume_state_left(path) and not io.check_manifest(path):
            finish_seal(path)
            return None
        raise InputError("this run folder is already complete (it has a manifest); there "
                         "is nothing to resume", path="--resume", value=str(folder),
                         allowed="the folder of an interrupted run (marked INCOMPLETE)")
    file = str(path / RESUME_FILE)
    try:
        record = json.loads((path / RESUME_FILE).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"not a resumable run folder (no {RESUME_FILE})", path="--resume",
                         value=str(folder),
                         allowed="the folder of an interrupted run (marked INCOMPLETE)") from None
    except (ValueError, UnicodeDecodeError):
        raise InputError(f"{RESUME_FILE} is unreadable", file=file) from None
    if not isinstance(record, dict) or not isinstance(record.get("settings"), dict):
        raise InputError(f"{RESUME_FILE} holds no settings", file=file, path="settings")
    if record.get("kind") != kind:
        raise InputError(f"this folder is an interrupted 'adapt {_plain(record.get('kind'))}' "
                         "run", path="--resume", value=str(folder),
                         allowed=f"adapt {_plain(record.get('kind'))} --resume {folder}")
    settings = record["settings"]
    if not isinstance(settings.get("scene"), dict):
        raise InputError(f"{RESUME_FILE} holds no scene", file=file, path="settings.scene")
    return record


def _plain(text) -> str:
    """Text from a file, safe to print: control characters escaped."""
    return "".join(ch if ch.isprintable() else repr(ch)[1:-1] for ch in str(text))


def remove_if_empty(folder, has_work: Callable[[Path], bool]) -> bool:
    """Delete a run folder that was started but holds no finished work
    (``has_work(folder / PARTIAL)`` is false and there is no manifest): the run failed
    before anything was kept. True if removed."""
    folder = Path(folder)
    if folder.is_dir() and not (folder / _MANIFEST).exists() \
            and not has_work(folder / PARTIAL):
        shutil.rmtree(folder, ignore_errors=True)
        return True
    return False


class RunWriter:
    """The one writer of run folders (``adapt compare``, ``adapt size``): every file
    atomically (:mod:`adapt.io`), then :meth:`seal` (manifest, then the resume state
    removed; see the module docstring).

    Parameters
    ----------
    folder : path, optional
        A run folder made by :func:`start_run_folder` (resumable), to complete.
    out_root, name : optional
        Without ``folder``: a NEW folder ``out_root/<timestamp>-<name>`` is made.
    """

    def __init__(self, folder=None, out_root="runs", name: str = "run"):
        self.folder = Path(folder) if folder is not None else io.new_run_folder(out_root, name)
        self.written: list[str] = []

    def text(self, name: str, text: str) -> Path:
        """Write a text file (UTF-8) atomically."""
        self.written.append(name)
        return io.atomic_write_text(self.folder / name, text)

    def bytes(self, name: str, data: bytes) -> Path:
        """Write a binary file atomically."""
        self.written.append(name)
        return io.atomic_write_bytes(self.folder / name, data)

    def json(self, name: str, obj) -> Path:
        """Write a JSON file atomically (numpy values converted, NaN as null)."""
        self.written.append(name)
        return io.write_json(self.folder / name, obj)

    def seal(self, info: dict) -> Path:
        """Write ``manifest.json`` (``info`` plus versions and every file's sha256,
        never the resume state), then remove the resume state; returns the folder."""
        _remove_strays(self.folder)
        io.write_manifest(self.folder, info, exclude=RESUME_STATE)
        finish_seal(self.folder)
        return self.folder


class StagedFolder:
    """A folder built under a temporary sibling name (``.partial-NAME-PID``) and moved
    into place whole by :meth:`commit`, so ``out`` either does not exist or is complete
    (the life cycle of a reference set, :func:`adapt.studies.reference.record`; its
    files and manifest are the recorder's own). :meth:`discard` removes the temporary
    folder after a failure or an interruption.

    Parameters
    ----------
    out : path
        The final folder: absent or empty.
    """

    def __init__(self, out):
        self.out = Path(out)
        self.path = self.out.parent / f"{io.TMP_PREFIX}{self.out.name}-{os.getpid()}"
        if self.path.exists():
            shutil.rmtree(self.path)
        self.path.mkdir()

    def commit(self) -> Path:
        """Move the finished folder into place (``os.rename``: replaces an empty folder,
        refuses a non-empty one, InputError then)."""
        try:
            os.rename(self.path, self.out)
        except OSError as exc:
            raise InputError(f"cannot move the finished set into place ({exc.strerror}); "
                             "was the folder filled meanwhile?", file=str(self.out)) from None
        return self.out

    def discard(self) -> None:
        """Remove the temporary folder and everything in it."""
        shutil.rmtree(self.path, ignore_errors=True)


#: the summary file of each kind of run folder :func:`read_run` reads -> its key there
SUMMARY_FILES = {"metrics.json": "metrics", "sizing.json": "sizing"}
#: files every run folder has (figures and report.html in addition when available)
RUN_FILES = ("scene.yaml", "metrics.json", "curves.csv", "summary.txt", "manifest.json")

#: columns of curves.csv, in order
CURVE_COLUMNS = ("label", "method", "snapshots", "normalized_sinr_mean", "sinr_db_mean",
                 "loss_db_p10", "loss_db_median", "loss_db_p90", "loss_db_of_mean",
                 "fraction_meeting_target", "optimum_sinr_db_mean", "measured_sinr_db_mean")


def write_scene_yaml(folder, scene) -> Path:
    """``scene.yaml``: the resolved scene mapping, YAML safe-dumped in key order."""
    from adapt.scenefile import scene_to_mapping
    mapping = scene.resolved if getattr(scene, "resolved", None) else scene_to_mapping(scene)
    header = ("# The scene exactly as run (defaults filled in). Re-run with:\n"
              "#   adapt compare scene.yaml\n")
    text = yaml.safe_dump(mapping, sort_keys=False, default_flow_style=None,
                          allow_unicode=True)
    return io.atomic_write_text(Path(folder) / "scene.yaml", header + text)


def _num(v) -> str:
    """A CSV number: 10 significant digits, empty where undefined or infinite."""
    if v is None or not math.isfinite(float(v)):
        return ""
    return format_number(v, significant=10)


def _check_summary(summary) -> None:
    """A comparison summary (``adapt.studies.summaries.CompareSummary``, read by its
    attributes: the report layer sits below the studies), not a mapping."""
    for name in ("processors", "optimum_curve", "optimum_sinr_db", "target_db"):
        if not hasattr(summary, name):
            raise ValueError("expected a comparison summary (CompareSummary; "
                             "CompareSummary.from_mapping reads a metrics.json mapping), "
                             f"got {type(summary).__name__}")


def curves_rows(summary) -> list[dict]:
    """Rows of ``curves.csv`` (dicts keyed by :data:`CURVE_COLUMNS`) from a comparison
    summary's per-checkpoint curves."""
    _check_summary(summary)
    opt = summary.optimum_curve.sinr_db_mean
    rows = []
    for p in summary.processors:
        c = p.curve
        for i, k in enumerate(c.snapshots):
            rows.append({
                "label": p.label, "method": p.method, "snapshots": int(k),
                "normalized_sinr_mean": c.normalised_sinr_mean[i],
                "sinr_db_mean": c.sinr_db_mean[i],
                "loss_db_p10": c.loss_db_p10[i],
                "loss_db_median": c.loss_db_median[i],
                "loss_db_p90": c.loss_db_p90[i],
                "loss_db_of_mean": c.loss_db_of_mean[i],
                "fraction_meeting_target": c.fraction_meeting_target[i],
                "optimum_sinr_db_mean": opt[i],
                "measured_sinr_db_mean": c.measured_sinr_db_mean[i],
            })
    return rows


def write_curves_csv(folder, summary) -> Path:
    """``curves.csv``: header :data:`CURVE_COLUMNS`, one row per processor and
    checkpoint of a comparison summary; numbers with 10 significant digits, empty where
    undefined."""
    buf = _io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CURVE_COLUMNS)
    for row in curves_rows(summary):
        w.writerow([row[c] if c in ("label", "method", "snapshots") else _num(row[c])
                    for c in CURVE_COLUMNS])
    return io.atomic_write_text(Path(folder) / "curves.csv", buf.getvalue())


def _module(name: str):
    """``adapt.report.<name>``, imported when first needed (matplotlib is heavy)."""
    return importlib.import_module(f"adapt.report.{name}")


def summary_rows(summary) -> list[dict]:
    """One row per processor of a comparison summary for the HTML score table
    (numbers; None where undefined)."""
    _check_summary(summary)
    rows = []
    for p in summary.processors:
        f = p.final
        rows.append({
            "processor": p.label,
            "SINR dB (final)": f.sinr_db_mean,
            "loss dB vs optimum": f.loss_db_mean,
            "loss dB p10-p90": (format_range(f.loss_db_p10, f.loss_db_p90)
                                if f.loss_db_p10 is not None else None),
            "snapshots to 3 dB (mean)": p.snapshots_to_3db if p.snapshots_to_3db is not None
            else "never",
            f"snapshots to 3 dB ({summary.fraction * 100:.0f}% of trials)":
                p.snapshots_to_3db_fraction if p.snapshots_to_3db_fraction is not None
                else "never",
            "snapshots to stay within 3 dB (mean)": p.snapshots_to_stay_within_3db or "never",
            "worst null dB": f.worst_null_db,
            "white-noise gain dB": f.white_noise_gain_db,
            "pointing error deg (rms)": (f.patterns.pointing_error_deg_rms
                                         if f.patterns is not None else None),
            "peak sidelobe dB": (f.patterns.peak_sidelobe_db_mean
                                 if f.patterns is not None else None),
            "time s": p.seconds,
        })
    return rows


def write_report_files(folder, evaluation, summary, scene_summary: str = "",
                       command_line: str | None = None, writer: "RunWriter | None" = None,
                       verdict: Sequence[str] = (), notes: Sequence[str] = ()) -> list[str]:
    """Write the figures (``<name>.png``) and ``report.html`` with :mod:`adapt.report`;
    returns the file names written (none when the report modules are absent). The
    figures and the score table read the comparison ``summary``; the ``evaluation``
    gives the scene, the trials' weights (beam patterns) and the run facts.
    ``scene_summary``: the text of the scene block (what ``adapt check`` prints);
    ``verdict``: sentences shown under the score table; ``notes``: further sentences
    after the optimum's (what the losses are measured against)."""
    writer = writer if writer is not None else RunWriter(folder)
    written = []
    figs = _module("figures")
    pngs: dict[str, bytes] = {}
    if figs is not None:
        pngs = figs.standard_figures(evaluation, summary)
        for name, data in pngs.items():
            writer.bytes(f"{name}.png", data)
            written.append(f"{name}.png")
    extra_notes = notes
    html = _module("html")
    builder = getattr(html, "compare_report", None) if html is not None else None
    if builder is not None:
        notes = [f"Optimum (clairvoyant MVDR) SINR: {format_number(summary.optimum_sinr_db)} dB, "
                 "mean over trials. Loss = optimum minus output SINR, mean over trials of dB. "
                 f"'Snapshots to 3 dB' = first checkpoint where the loss of the mean "
                 f"normalised SINR is within {summary.target_db:g} dB."]
        notes += [text[0].upper() + text[1:] + "." for text in extra_notes]
        notes += [f"Verdict: {line}." for line in verdict]
        if command_line:
            notes.append(f"Command: {command_line}")
        extra = getattr(figs, "WIDEBAND_FIGURE_TEXT", {}) if figs is not None else {}
        extra = {k: v for k, v in extra.items() if k in pngs}
        page = builder(evaluation, summary_rows(summary), scene_summary, pngs, notes=notes,
                       alt_texts={k: v[0] for k, v in extra.items()} or None,
                       captions={k: v[1] for k, v in extra.items()} or None)
        writer.text("report.html", page)
        written.append("report.html")
    return written


def write_run(scene, evaluation, summary, out_root="runs", command_line: str | None = None,
              kind: str = "compare", figures: bool = True, table: str | None = None,
              folder=None, scene_summary: str = "", verdict: Sequence[str] = (),
              notes: Sequence[str] = ()) -> Path:
    """Write a complete run folder (see the module docstring) and return its path: the
    JSON, CSV, figures and report of the comparison ``summary`` (a ``CompareSummary``).

    A new folder is created under ``out_root`` (timestamp + scene name, suffixed when
    taken); nothing outside it is touched. ``manifest.json`` is written last, so a
    folder with a manifest is complete. With ``folder`` (a resumable run folder made by
    :func:`start_run_folder`), the outputs go there and it is sealed
    (:meth:`RunWriter.seal`). ``scene_summary``, ``verdict``: the scene block and the
    verdict sentences of ``report.html``; ``notes``: further sentences for its notes.
    """
    _check_summary(summary)
    writer = RunWriter(folder, out_root, scene.name)
    write_scene_yaml(writer.folder, scene)
    mapping = summary.to_json()
    writer.json("metrics.json", mapping)
    write_curves_csv(writer.folder, summary)
    if table is not None:
        writer.text("summary.txt", table + "\n")
    else:
        writer.text("summary.txt", json.dumps(io.to_jsonable(mapping)) + "\n")
    extra = []
    if figures:
        extra = write_report_files(writer.folder, evaluation, summary, scene_summary,
                                   command_line, writer=writer, verdict=verdict,
                                   notes=notes)
    info = {"kind": kind, "scene": scene.name, "seed": int(summary.seed),
            "trials": int(summary.trials), "snapshots": int(summary.snapshots),
            "command_line": command_line,
            "created": _dt.datetime.now().astimezone().isoformat(timespec="seconds"),
            "report": "report.html" in extra}
    return writer.seal(info)


def read_run(folder) -> dict:
    """Read a run folder back as plain data.

    A compare folder gives ``{"metrics": dict, "manifest": dict, "curves": list of row
    dicts, "problems": [...]}``, a size folder ``{"sizing": dict, "manifest": dict,
    "problems": [...]}``; ``problems`` lists manifest mismatches (empty: intact).
    ValueError if the folder has neither metrics.json nor sizing.json.
    (:func:`adapt.api.read_run` adds the typed summary.)"""
    folder = Path(folder)
    found = [(name, kind) for name, kind in SUMMARY_FILES.items() if (folder / name).is_file()]
    if not found:
        raise ValueError(f"{folder} is not a run folder (no metrics.json or sizing.json)")
    name, kind = found[0]
    out = {kind: json.loads((folder / name).read_text(encoding="utf-8"))}
    manifest = {}
    if (folder / "manifest.json").is_file():
        manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    out["manifest"] = manifest
    if kind == "metrics":
        curves = []
        if (folder / "curves.csv").is_file():
            with open(folder / "curves.csv", newline="", encoding="utf-8") as fh:
                curves = list(csv.DictReader(fh))
        out["curves"] = curves
    out["problems"] = io.check_manifest(folder)
    return out
