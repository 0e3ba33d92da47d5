"""Typed summaries of the studies: the one set of statistics every output of a run reads.

A study condenses its Monte Carlo trials once, into one of these frozen dataclasses, and
every output reads it: the terminal table, the CSV, the figures, ``report.html`` and the
JSON file. Each summary has exactly one serialiser, ``to_json()``, whose mapping
:func:`adapt.io.write_json` writes as the run folder's file, byte for byte and key for
key in the documented order, and one reader, ``from_mapping()``, which turns that file
(or an older one of the same schema) back into the typed object, so
``from_mapping(to_json())`` gives the same file again.

* :class:`CompareSummary` - ``metrics.json`` of ``adapt compare``: run facts, the optimum
  curve, one :class:`ProcessorSummary` per processor (final statistics
  :class:`FinalScores` with the pattern scores :class:`PatternScores`, per-checkpoint
  :class:`Curve`, floored null depths :class:`NullDepth`) and the :class:`Verdict`;
* :class:`SizingSummary` - ``sizing.json`` of ``adapt size``: one
  :class:`SizedProcessor` per processor (sweep points :class:`SizingPoint`, the answers,
  theory :class:`TheoryAnswer`, :class:`RuleOfThumb`, :class:`Disagreement`) and the
  scene's rules of thumb :class:`RulesOfThumb`.

Conventions. Field names spell "normalised" as the code does; the keys of the files keep
"normalized" (users already read them). Numbers are kept as computed: a NaN (undefined,
e.g. a ratio to a wanted source that is off) is written ``null`` and read back as
None. A field whose key is written only in some runs is None when its key is absent
(noted per field); sequences are tuples and mappings (processor parameters, null
depths by interferer) keep their order. ``from_mapping`` raises ValueError naming the
first missing key.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Mapping

__all__ = ["CompareSummary", "ProcessorSummary", "FinalScores", "PatternScores", "Curve",
           "OptimumCurve", "NullDepth", "Ranking", "Verdict",
           "SizingSummary", "SizedProcessor", "SizingPoint", "TheoryAnswer", "RuleOfThumb",
           "RulesOfThumb", "Disagreement", "typed"]


# --------------------------------------------------------------------------- reading
def typed(value, cls, what: str):
    """``value`` itself when it is a ``cls``, else ``cls.from_mapping(value)`` for a
    mapping; ``what`` names the mapping in the ValueError for anything else (e.g. "a
    metrics.json mapping")."""
    if isinstance(value, cls):
        return value
    if isinstance(value, Mapping):
        return cls.from_mapping(value)
    raise ValueError(f"expected a {cls.__name__} or {what}, got {type(value).__name__}")


def _need(m: Any, key: str, where: str):
    """``m[key]``; ValueError naming ``where.key`` when ``m`` is not a mapping or lacks it."""
    if not isinstance(m, Mapping):
        raise ValueError(f"{where or 'summary'}: expected a mapping, got {type(m).__name__}")
    if key not in m:
        raise ValueError(f"{where + '.' if where else ''}{key}: missing from the summary")
    return m[key]


def _items(m: Any, key: str, where: str) -> list:
    value = _need(m, key, where)
    if not isinstance(value, (list, tuple)):
        raise ValueError(f"{where + '.' if where else ''}{key}: expected a list")
    return list(value)


def _pair(value) -> tuple:
    return tuple(value) if value is not None else None


# =========================================================================== compare

def entry_by_label(entries, label: str):
    """The first of ``entries`` whose ``label`` is ``label`` (KeyError if none)."""
    for p in entries:
        if p.label == label:
            return p
    raise KeyError(label)

@dataclass(frozen=True)
class OptimumCurve:
    """The optimum (clairvoyant MVDR) SINR per checkpoint: mean over trials of dB."""
    snapshots: tuple
    sinr_db_mean: tuple

    def to_json(self) -> dict:
        return {"snapshots": list(self.snapshots), "sinr_db_mean": list(self.sinr_db_mean)}

    @classmethod
    def from_mapping(cls, m, where: str = "optimum_curve") -> "OptimumCurve":
        return cls(snapshots=tuple(_items(m, "snapshots", where)),
                   sinr_db_mean=tuple(_items(m, "sinr_db_mean", where)))


#: (field, key) of :class:`Curve`, in the order of the file
_CURVE_KEYS = (("snapshots", "snapshots"), ("normalised_sinr_mean", "normalized_sinr_mean"),
               ("sinr_db_mean", "sinr_db_mean"), ("sinr_db_p10", "sinr_db_p10"),
               ("sinr_db_p90", "sinr_db_p90"), ("loss_db_mean", "loss_db_mean"),
               ("loss_db_of_mean", "loss_db_of_mean"), ("loss_db_p10", "loss_db_p10"),
               ("loss_db_median", "loss_db_median"), ("loss_db_p90", "loss_db_p90"),
               ("fraction_meeting_target", "fraction_meeting_target"),
               ("measured_sinr_db_mean", "measured_sinr_db_mean"))


@dataclass(frozen=True)
class Curve:
    """One processor's statistics per checkpoint (``curve``), each a tuple aligned with
    ``snapshots``: over trials, the mean normalised SINR; the mean, 10th and 90th
    percentile of the output SINR in dB; the mean, 10th percentile, median and 90th
    percentile of the loss in dB, and the loss of the mean normalised SINR; the share of
    trials within the target loss; the mean SINR measured from output samples, dB."""
    snapshots: tuple
    normalised_sinr_mean: tuple
    sinr_db_mean: tuple
    sinr_db_p10: tuple
    sinr_db_p90: tuple
    loss_db_mean: tuple
    loss_db_of_mean: tuple
    loss_db_p10: tuple
    loss_db_median: tuple
    loss_db_p90: tuple
    fraction_meeting_target: tuple
    measured_sinr_db_mean: tuple

    def to_json(self) -> dict:
        return {key: list(getattr(self, name)) for name, key in _CURVE_KEYS}

    @classmethod
    def from_mapping(cls, m, where: str = "curve") -> "Curve":
        return cls(**{name: tuple(_items(m, key, where)) for name, key in _CURVE_KEYS})


@dataclass(frozen=True)
class PatternScores:
    """Pointing error and peak sidelobe of the final weights on each trial's true array
    (the first ``trials`` trials). A line is scored on its azimuth cut (``scope`` None);
    any other array over all directions (``scope`` ``"all directions"``), with the
    main-beam peak's azimuth and elevation offsets and its height over the look
    response (None for a line: the keys are left out)."""
    pointing_error_deg_mean: float
    pointing_error_deg_rms: float
    peak_sidelobe_db_mean: float
    trials: int
    scope: str | None = None
    peak_azimuth_error_deg_mean: float | None = None
    peak_elevation_error_deg_mean: float | None = None
    peak_over_look_db_mean: float | None = None

    def to_json(self) -> dict:
        out = {"pointing_error_deg_mean": self.pointing_error_deg_mean,
               "pointing_error_deg_rms": self.pointing_error_deg_rms,
               "peak_sidelobe_db_mean": self.peak_sidelobe_db_mean,
               "pattern_trials": self.trials}
        if self.scope is not None:
            out.update({"pattern_scope": self.scope,
                        "peak_azimuth_error_deg_mean": self.peak_azimuth_error_deg_mean,
                        "peak_elevation_error_deg_mean": self.peak_elevation_error_deg_mean,
                        "peak_over_look_db_mean": self.peak_over_look_db_mean})
        return out

    @classmethod
    def from_mapping(cls, m, where: str = "final") -> "PatternScores | None":
        """The pattern keys of a ``final`` mapping; None when it has none."""
        if "pointing_error_deg_mean" not in m:
            return None
        out = cls(pointing_error_deg_mean=m["pointing_error_deg_mean"],
                  pointing_error_deg_rms=_need(m, "pointing_error_deg_rms", where),
                  peak_sidelobe_db_mean=_need(m, "peak_sidelobe_db_mean", where),
                  trials=_need(m, "pattern_trials", where))
        if "pattern_scope" in m:
            out = replace(out, scope=m["pattern_scope"],
                          peak_azimuth_error_deg_mean=_need(m, "peak_azimuth_error_deg_mean",
                                                            where),
                          peak_elevation_error_deg_mean=_need(
                              m, "peak_elevation_error_deg_mean", where),
                          peak_over_look_db_mean=_need(m, "peak_over_look_db_mean", where))
        return out


#: (field, key) of the statistics of :class:`FinalScores` up to the null depths
_FINAL_KEYS = (("sinr_db_mean", "sinr_db_mean"), ("sinr_db_p10", "sinr_db_p10"),
               ("sinr_db_p90", "sinr_db_p90"), ("loss_db_mean", "loss_db_mean"),
               ("loss_db_median", "loss_db_median"), ("loss_db_p10", "loss_db_p10"),
               ("loss_db_p90", "loss_db_p90"), ("loss_db_of_mean", "loss_db_of_mean"),
               ("normalised_sinr_mean", "normalized_sinr_mean"),
               ("normalised_sinr_sem", "normalized_sinr_sem"),
               ("white_noise_gain_db", "white_noise_gain_db"))


@dataclass(frozen=True)
class FinalScores:
    """One processor's statistics at the final checkpoint (``final``), over trials.

    ``null_depth_db``: interferer name -> mean over trials of the response toward it
    relative to the look direction, dB (not floored: see :class:`NullDepth` for the
    floored statistics the figures draw); ``worst_null_db``: the least-suppressed
    interferer among those on at the last checkpoint (None when none is on);
    ``loss_db_vs_interference_free``: mean loss against the same array with no
    interferer (None: the key is left out, the wanted source being off at the last
    checkpoint; NaN: undefined in every trial); ``patterns``: the pattern scores (None
    when they were not computed: the keys are left out)."""
    sinr_db_mean: float
    sinr_db_p10: float
    sinr_db_p90: float
    loss_db_mean: float
    loss_db_median: float
    loss_db_p10: float
    loss_db_p90: float
    loss_db_of_mean: float
    normalised_sinr_mean: float
    normalised_sinr_sem: float
    white_noise_gain_db: float
    null_depth_db: dict
    measured_sinr_db_mean: float
    sinr_db_sem: float
    worst_null_db: float | None
    loss_db_vs_interference_free: float | None = None
    patterns: PatternScores | None = None

    def to_json(self) -> dict:
        out = {key: getattr(self, name) for name, key in _FINAL_KEYS}
        out["null_depth_db"] = dict(self.null_depth_db)
        out["measured_sinr_db_mean"] = self.measured_sinr_db_mean
        out["sinr_db_sem"] = self.sinr_db_sem
        if self.loss_db_vs_interference_free is not None:
            out["loss_db_vs_interference_free"] = self.loss_db_vs_interference_free
        out["worst_null_db"] = self.worst_null_db
        if self.patterns is not None:
            out.update(self.patterns.to_json())
        return out

    @classmethod
    def from_mapping(cls, m, where: str = "final") -> "FinalScores":
        free = m.get("loss_db_vs_interference_free") if isinstance(m, Mapping) else None
        if isinstance(m, Mapping) and "loss_db_vs_interference_free" in m and free is None:
            free = math.nan                  # written, but undefined: keep the key
        nulls = _need(m, "null_depth_db", where)
        if not isinstance(nulls, Mapping):
            raise ValueError(f"{where}.null_depth_db: expected a mapping")
        return cls(**{name: _need(m, key, where) for name, key in _FINAL_KEYS},
                   null_depth_db=dict(nulls),
                   measured_sinr_db_mean=_need(m, "measured_sinr_db_mean", where),
                   sinr_db_sem=_need(m, "sinr_db_sem", where),
                   worst_null_db=_need(m, "worst_null_db", where),
                   loss_db_vs_interference_free=free,
                   patterns=PatternScores.from_mapping(m, where))


@dataclass(frozen=True)
class NullDepth:
    """Statistics over trials of one processor's null depth toward one interferer at the
    final checkpoint, dB re the look direction, each trial's value floored at the
    summary's ``null_depth_floor_db`` first (deeper values only measure round-off):
    mean, 10th and 90th percentile. What the null-depth figures draw."""
    mean: float
    p10: float
    p90: float

    def to_json(self) -> dict:
        return {"mean": self.mean, "p10": self.p10, "p90": self.p90}

    @classmethod
    def from_mapping(cls, m, where: str = "null_depth_floored_db") -> "NullDepth":
        return cls(mean=_need(m, "mean", where), p10=_need(m, "p10", where),
                   p90=_need(m, "p90", where))


@dataclass(frozen=True)
class ProcessorSummary:
    """One processor of a comparison: its label, method, parameters and spec, the final
    statistics, snapshots to the target loss (first reached, and stayed within from;
    in the mean and for the share of trials; None: never), its compute time, the
    per-checkpoint curve and the floored null depths by interferer name (None in a
    summary written before they were kept: the key is left out)."""
    label: str
    method: str
    params: dict
    spec: str
    final: FinalScores
    snapshots_to_3db: int | None
    snapshots_to_3db_fraction: int | None
    snapshots_to_stay_within_3db: int | None
    snapshots_to_stay_within_3db_fraction: int | None
    seconds: float
    curve: Curve
    null_depths: dict | None = None

    def to_json(self) -> dict:
        out = {"label": self.label, "method": self.method, "params": dict(self.params),
               "spec": self.spec, "final": self.final.to_json(),
               "snapshots_to_3db": self.snapshots_to_3db,
               "snapshots_to_3db_fraction": self.snapshots_to_3db_fraction,
               "snapshots_to_stay_within_3db": self.snapshots_to_stay_within_3db,
               "snapshots_to_stay_within_3db_fraction":
                   self.snapshots_to_stay_within_3db_fraction,
               "seconds": self.seconds, "curve": self.curve.to_json()}
        if self.null_depths is not None:
            out["null_depth_floored_db"] = {name: d.to_json()
                                            for name, d in self.null_depths.items()}
        return out

    @classmethod
    def from_mapping(cls, m, where: str = "processors[]") -> "ProcessorSummary":
        nulls = None
        if isinstance(m, Mapping) and "null_depth_floored_db" in m:
            nulls = {name: NullDepth.from_mapping(d, f"{where}.null_depth_floored_db.{name}")
                     for name, d in m["null_depth_floored_db"].items()}
        params = _need(m, "params", where)
        return cls(label=_need(m, "label", where), method=_need(m, "method", where),
                   params=dict(params), spec=_need(m, "spec", where),
                   final=FinalScores.from_mapping(_need(m, "final", where), f"{where}.final"),
                   snapshots_to_3db=_need(m, "snapshots_to_3db", where),
                   snapshots_to_3db_fraction=_need(m, "snapshots_to_3db_fraction", where),
                   snapshots_to_stay_within_3db=_need(m, "snapshots_to_stay_within_3db", where),
                   snapshots_to_stay_within_3db_fraction=_need(
                       m, "snapshots_to_stay_within_3db_fraction", where),
                   seconds=_need(m, "seconds", where),
                   curve=Curve.from_mapping(_need(m, "curve", where), f"{where}.curve"),
                   null_depths=nulls)


@dataclass(frozen=True)
class Ranking:
    """One line of the verdict: the contenders ranked (``ranking``), the best and the
    runner-up (``next`` in the file), the margin between them, its Monte Carlo
    uncertainty and whether the margin is larger (None: cannot be told), in ``unit``
    (``dB`` or ``snapshots``)."""
    ranking: tuple
    best: str | None
    runner_up: str | None
    margin: float | None
    uncertainty: float | None
    clear: bool | None
    unit: str

    def to_json(self) -> dict:
        return {"ranking": list(self.ranking), "best": self.best, "next": self.runner_up,
                "margin": self.margin, "uncertainty": self.uncertainty, "clear": self.clear,
                "unit": self.unit}

    @classmethod
    def from_mapping(cls, m, where: str = "verdict") -> "Ranking":
        return cls(ranking=tuple(_items(m, "ranking", where)), best=_need(m, "best", where),
                   runner_up=_need(m, "next", where), margin=_need(m, "margin", where),
                   uncertainty=_need(m, "uncertainty", where), clear=_need(m, "clear", where),
                   unit=_need(m, "unit", where))


@dataclass(frozen=True)
class Verdict:
    """The ranked verdict under the compare table: best final SINR, fastest to the
    target loss, most robust (highest 10th percentile of the final SINR)."""
    final_sinr: Ranking
    to_target: Ranking
    robust: Ranking

    def to_json(self) -> dict:
        return {"final_sinr": self.final_sinr.to_json(), "to_target": self.to_target.to_json(),
                "robust": self.robust.to_json()}

    @classmethod
    def from_mapping(cls, m, where: str = "verdict") -> "Verdict":
        return cls(**{k: Ranking.from_mapping(_need(m, k, where), f"{where}.{k}")
                      for k in ("final_sinr", "to_target", "robust")})


@dataclass(frozen=True)
class CompareSummary:
    """The summary of a comparison (``metrics.json``; keys and meaning in README and
    :mod:`adapt.studies.compare`).

    Run facts (scene name, elements, trials, snapshots, seed, whether the scene is
    stationary, the interferers by name, the target loss and share of trials, the
    checkpoints), the mean optimum SINR at the final checkpoint and per checkpoint
    (``optimum_curve``), one :class:`ProcessorSummary` per processor and the
    :class:`Verdict`. Written only in some runs (None otherwise, the key left out):
    ``interferers_on_at_end`` (nonstationary scenes), ``interference_free_sinr_db`` and
    ``interference_cost_db`` (the wanted source on at the last checkpoint),
    ``null_depth_floor_db`` (absent from summaries written before the floored null
    depths were kept), ``verdict`` and ``seconds`` (the wall time of the comparison).
    """
    scene: str
    elements: int
    trials: int
    snapshots: int
    seed: int
    optimum_sinr_db: float
    stationary: bool
    interferers: tuple
    target_db: float
    fraction: float
    checkpoints: tuple
    optimum_curve: OptimumCurve
    processors: tuple
    null_depth_floor_db: float | None = None
    interferers_on_at_end: tuple | None = None
    interference_free_sinr_db: float | None = None
    interference_cost_db: float | None = None
    verdict: Verdict | None = None
    seconds: float | None = None

    @property
    def labels(self) -> list[str]:
        """The processors' labels, in order."""
        return [p.label for p in self.processors]

    def processor(self, label: str) -> ProcessorSummary:
        """The entry of one processor, by label (KeyError if there is none)."""
        return entry_by_label(self.processors, label)

    def to_json(self) -> dict:
        """The ``metrics.json`` mapping, keys in the order of the file."""
        out = {"scene": self.scene, "elements": self.elements, "trials": self.trials,
               "snapshots": self.snapshots, "seed": self.seed,
               "optimum_sinr_db": self.optimum_sinr_db, "stationary": self.stationary,
               "interferers": list(self.interferers)}
        if self.null_depth_floor_db is not None:
            out["null_depth_floor_db"] = self.null_depth_floor_db
        out.update({"target_db": self.target_db, "fraction": self.fraction,
                    "checkpoints": list(self.checkpoints),
                    "optimum_curve": self.optimum_curve.to_json(),
                    "processors": [p.to_json() for p in self.processors]})
        if self.interferers_on_at_end is not None:
            out["interferers_on_at_end"] = list(self.interferers_on_at_end)
        if self.interference_free_sinr_db is not None:
            out["interference_free_sinr_db"] = self.interference_free_sinr_db
        if self.interference_cost_db is not None:
            out["interference_cost_db"] = self.interference_cost_db
        if self.verdict is not None:
            out["verdict"] = self.verdict.to_json()
        if self.seconds is not None:
            out["seconds"] = self.seconds
        return out

    @classmethod
    def from_mapping(cls, m) -> "CompareSummary":
        """The summary of a ``metrics.json`` mapping (ValueError naming a missing key)."""
        w = ""
        procs = tuple(ProcessorSummary.from_mapping(p, f"processors[{i}]")
                      for i, p in enumerate(_items(m, "processors", w)))
        on = m.get("interferers_on_at_end")
        return cls(scene=_need(m, "scene", w), elements=_need(m, "elements", w),
                   trials=_need(m, "trials", w), snapshots=_need(m, "snapshots", w),
                   seed=_need(m, "seed", w), optimum_sinr_db=_need(m, "optimum_sinr_db", w),
                   stationary=_need(m, "stationary", w),
                   interferers=tuple(_items(m, "interferers", w)),
                   target_db=_need(m, "target_db", w), fraction=_need(m, "fraction", w),
                   checkpoints=tuple(_items(m, "checkpoints", w)),
                   optimum_curve=OptimumCurve.from_mapping(_need(m, "optimum_curve", w)),
                   processors=procs,
                   null_depth_floor_db=m.get("null_depth_floor_db"),
                   interferers_on_at_end=None if on is None else tuple(on),
                   interference_free_sinr_db=m.get("interference_free_sinr_db"),
                   interference_cost_db=m.get("interference_cost_db"),
                   verdict=(Verdict.from_mapping(m["verdict"]) if m.get("verdict") is not None
                            else None),
                   seconds=m.get("seconds"))


# =========================================================================== sizing
#: (field, key) of :class:`SizingPoint`, in the order of the file
_POINT_KEYS = (("snapshots", "snapshots"), ("normalised_sinr_mean", "normalized_sinr_mean"),
               ("normalised_sinr_sem", "normalized_sinr_sem"), ("loss_db_mean", "loss_db_mean"),
               ("loss_db_median", "loss_db_median"), ("loss_db_p10", "loss_db_p10"),
               ("loss_db_p90", "loss_db_p90"),
               ("fraction_meeting_target", "fraction_meeting_target"),
               ("fraction_interval", "fraction_interval"),
               ("theory_fraction_meeting_target", "theory_fraction_meeting_target"),
               ("theory_normalised_sinr_mean", "theory_normalized_sinr_mean"),
               ("theory_loss_db_p10", "theory_loss_db_p10"),
               ("theory_loss_db_p90", "theory_loss_db_p90"),
               ("trials_defined", "trials_defined"))


@dataclass(frozen=True)
class SizingPoint:
    """One sweep point of one processor: the snapshot count; over trials the mean
    normalised SINR and its standard error, the loss of that mean and the median, 10th
    (best 10 % of trials) and 90th (worst 10 %) percentile of the loss, dB; the share
    of trials within the target and its Clopper-Pearson interval (low, high); the
    closed form's share, mean and loss percentiles (None where none applies); the
    trials whose normalised SINR is defined."""
    snapshots: int
    normalised_sinr_mean: float
    normalised_sinr_sem: float
    loss_db_mean: float
    loss_db_median: float
    loss_db_p10: float
    loss_db_p90: float
    fraction_meeting_target: float
    fraction_interval: tuple
    theory_fraction_meeting_target: float | None
    theory_normalised_sinr_mean: float | None
    theory_loss_db_p10: float | None
    theory_loss_db_p90: float | None
    trials_defined: int

    def to_json(self) -> dict:
        out = {key: getattr(self, name) for name, key in _POINT_KEYS}
        out["fraction_interval"] = list(self.fraction_interval)
        return out

    @classmethod
    def from_mapping(cls, m, where: str = "points[]") -> "SizingPoint":
        values = {name: _need(m, key, where) for name, key in _POINT_KEYS}
        values["fraction_interval"] = tuple(values["fraction_interval"])
        return cls(**values)


@dataclass(frozen=True)
class Disagreement:
    """A sweep point where the simulated mean normalised SINR departs from the closed
    form by more than the reporting threshold: the count, both means, the standard
    error and the departure in standard errors."""
    snapshots: int
    simulated: float
    theory: float
    sem: float
    standard_errors: float

    def to_json(self) -> dict:
        return {"snapshots": self.snapshots, "simulated": self.simulated,
                "theory": self.theory, "sem": self.sem,
                "standard_errors": self.standard_errors}

    @classmethod
    def from_mapping(cls, m, where: str = "disagreements[]") -> "Disagreement":
        return cls(**{k: _need(m, k, where) for k in
                      ("snapshots", "simulated", "theory", "sem", "standard_errors")})


@dataclass(frozen=True)
class TheoryAnswer:
    """The closed form applying to one processor: its name (``rmb``, ...), title and
    source, the snapshots it needs in the mean and for the share of trials (None:
    beyond the sweep), its half-power count, the optimum SINR it assumes (None for
    RMB) and the assumptions the scene breaks."""
    name: str
    title: str
    source: str
    required_snapshots: int | None
    required_snapshots_fraction: int | None
    half_power_snapshots: Any
    optimum_sinr: float | None
    violations: tuple

    def to_json(self) -> dict:
        return {"name": self.name, "title": self.title, "source": self.source,
                "required_snapshots": self.required_snapshots,
                "required_snapshots_fraction": self.required_snapshots_fraction,
                "half_power_snapshots": self.half_power_snapshots,
                "optimum_sinr": self.optimum_sinr, "violations": list(self.violations)}

    @classmethod
    def from_mapping(cls, m, where: str = "theory") -> "TheoryAnswer":
        values = {k: _need(m, k, where) for k in
                  ("name", "title", "source", "required_snapshots",
                   "required_snapshots_fraction", "half_power_snapshots", "optimum_sinr")}
        return cls(**values, violations=tuple(_items(m, "violations", where)))


@dataclass(frozen=True)
class RuleOfThumb:
    """The rule of thumb for one processor: snapshots (None: no rule applies), the
    strong interferers it counts (loaded SMI) and the sentence stating it."""
    snapshots: int | None
    strong_interferers: int | None
    text: str

    def to_json(self) -> dict:
        return {"snapshots": self.snapshots, "strong_interferers": self.strong_interferers,
                "text": self.text}

    @classmethod
    def from_mapping(cls, m, where: str = "rule_of_thumb") -> "RuleOfThumb":
        return cls(**{k: _need(m, k, where) for k in ("snapshots", "strong_interferers", "text")})


@dataclass(frozen=True)
class SizedProcessor:
    """One processor of a sizing run: label, method, parameters, spec; the sweep
    points; the smallest count meeting the target in the mean (``required_snapshots_
    mean``) with its bootstrap range (low, high), and for the share of trials with its
    Clopper-Pearson range (None: beyond the sweep); whether it was met already at the
    first point; the points departing from theory; the closed form (None when none
    applies) and rule of thumb (None); the recommendation sentence and the
    disagreement sentence (None when simulation and theory agree)."""
    label: str
    method: str
    params: dict
    spec: str
    points: tuple
    required_snapshots_mean: int | None
    required_snapshots_mean_range: tuple
    required_snapshots_fraction: int | None
    required_snapshots_fraction_range: tuple
    met_at_first_point: bool
    disagreements: tuple
    theory: TheoryAnswer | None
    rule_of_thumb: RuleOfThumb | None
    recommendation: str = ""
    disagreement_summary: str | None = None

    def to_json(self) -> dict:
        return {"label": self.label, "method": self.method, "params": dict(self.params),
                "spec": self.spec, "points": [p.to_json() for p in self.points],
                "required_snapshots_mean": self.required_snapshots_mean,
                "required_snapshots_mean_range": list(self.required_snapshots_mean_range),
                "required_snapshots_fraction": self.required_snapshots_fraction,
                "required_snapshots_fraction_range":
                    list(self.required_snapshots_fraction_range),
                "met_at_first_point": self.met_at_first_point,
                "disagreements": [d.to_json() for d in self.disagreements],
                "theory": None if self.theory is None else self.theory.to_json(),
                "rule_of_thumb": (None if self.rule_of_thumb is None
                                  else self.rule_of_thumb.to_json()),
                "recommendation": self.recommendation,
                "disagreement_summary": self.disagreement_summary}

    @classmethod
    def from_mapping(cls, m, where: str = "processors[]") -> "SizedProcessor":
        theory = _need(m, "theory", where)
        rule = _need(m, "rule_of_thumb", where)
        return cls(
            label=_need(m, "label", where), method=_need(m, "method", where),
            params=dict(_need(m, "params", where)), spec=_need(m, "spec", where),
            points=tuple(SizingPoint.from_mapping(p, f"{where}.points[{i}]")
                         for i, p in enumerate(_items(m, "points", where))),
            required_snapshots_mean=_need(m, "required_snapshots_mean", where),
            required_snapshots_mean_range=_pair(_need(m, "required_snapshots_mean_range",
                                                      where)),
            required_snapshots_fraction=_need(m, "required_snapshots_fraction", where),
            required_snapshots_fraction_range=_pair(
                _need(m, "required_snapshots_fraction_range", where)),
            met_at_first_point=_need(m, "met_at_first_point", where),
            disagreements=tuple(Disagreement.from_mapping(d, f"{where}.disagreements[{i}]")
                                for i, d in enumerate(_items(m, "disagreements", where))),
            theory=None if theory is None else TheoryAnswer.from_mapping(theory,
                                                                         f"{where}.theory"),
            rule_of_thumb=(None if rule is None
                           else RuleOfThumb.from_mapping(rule, f"{where}.rule_of_thumb")),
            recommendation=_need(m, "recommendation", where),
            disagreement_summary=_need(m, "disagreement_summary", where))


@dataclass(frozen=True)
class RulesOfThumb:
    """The scene's rules of thumb: about 2N unloaded (``unloaded_2n``), the RMB half-power
    count 2N-3, the strong interferers J (and how they are counted) and about 2J loaded
    (None with the wanted signal in the training data, where the rule does not hold)."""
    unloaded_2n: int | None
    rmb_half_power: int | None
    strong_interferers: int | None
    strong_definition: str
    loaded_2j: int | None

    def to_json(self) -> dict:
        return {"unloaded_2n": self.unloaded_2n, "rmb_half_power": self.rmb_half_power,
                "strong_interferers": self.strong_interferers,
                "strong_definition": self.strong_definition, "loaded_2j": self.loaded_2j}

    @classmethod
    def from_mapping(cls, m, where: str = "rules_of_thumb") -> "RulesOfThumb":
        return cls(**{k: _need(m, k, where) for k in
                      ("unloaded_2n", "rmb_half_power", "strong_interferers",
                       "strong_definition", "loaded_2j")})


#: top-level keys of sizing.json read as they are, in the order of the file (the rest
#: are typed: rules_of_thumb, the processors)
_SIZING_HEAD = ("scene", "elements", "trials", "seed", "draw", "draw_reason", "training",
                "optimum_sinr_db", "target_loss_db")


@dataclass(frozen=True)
class SizingSummary:
    """The summary of a sizing run (``sizing.json``; the module docstring of
    :mod:`adapt.studies.sizing` gives the meaning of every answer).

    Run facts (scene, elements, trials, seed, how the training data was drawn and why,
    the training kind), the mean optimum SINR in dB (None when undefined), the target
    loss and the matching normalised SINR, the share of trials, the confidence of the
    ranges and the bootstrap resamples, the sweep's snapshot counts, the scene's
    :class:`RulesOfThumb`, its interference eigenvalues (dB over the noise), the
    assumptions of the closed forms it breaks, the disagreement sentences, one
    :class:`SizedProcessor` per processor, and the wall time (None: left out)."""
    scene: str
    elements: int
    trials: int
    seed: int
    draw: str
    draw_reason: str
    training: str
    optimum_sinr_db: float | None
    target_loss_db: float
    target_normalised_sinr: float
    fraction: float
    confidence: float
    bootstrap_resamples: int
    snapshots: tuple
    rules_of_thumb: RulesOfThumb
    interference_eigenvalues_db: tuple
    assumption_violations: tuple
    disagreements: tuple
    processors: tuple
    seconds: float | None = None

    @property
    def labels(self) -> list[str]:
        """The processors' labels, in order."""
        return [p.label for p in self.processors]

    def processor(self, label: str) -> SizedProcessor:
        """The entry of one processor, by label (KeyError if there is none)."""
        for p in self.processors:
            if p.label == label:
                return p
        raise KeyError(label)

    def to_json(self) -> dict:
        """The ``sizing.json`` mapping, keys in the order of the file."""
        out = {k: getattr(self, k) for k in _SIZING_HEAD}
        out.update({"target_normalized_sinr": self.target_normalised_sinr,
                    "fraction": self.fraction, "confidence": self.confidence,
                    "bootstrap_resamples": self.bootstrap_resamples,
                    "snapshots": list(self.snapshots),
                    "rules_of_thumb": self.rules_of_thumb.to_json(),
                    "interference_eigenvalues_db": list(self.interference_eigenvalues_db),
                    "assumption_violations": list(self.assumption_violations),
                    "disagreements": list(self.disagreements),
                    "processors": [p.to_json() for p in self.processors]})
        if self.seconds is not None:
            out["seconds"] = self.seconds
        return out

    @classmethod
    def from_mapping(cls, m) -> "SizingSummary":
        """The summary of a ``sizing.json`` mapping (ValueError naming a missing key)."""
        w = ""
        return cls(**{k: _need(m, k, w) for k in _SIZING_HEAD},
                   target_normalised_sinr=_need(m, "target_normalized_sinr", w),
                   fraction=_need(m, "fraction", w), confidence=_need(m, "confidence", w),
                   bootstrap_resamples=_need(m, "bootstrap_resamples", w),
                   snapshots=tuple(_items(m, "snapshots", w)),
                   rules_of_thumb=RulesOfThumb.from_mapping(_need(m, "rules_of_thumb", w)),
                   interference_eigenvalues_db=tuple(_items(m, "interference_eigenvalues_db",
                                                            w)),
                   assumption_violations=tuple(_items(m, "assumption_violations", w)),
                   disagreements=tuple(_items(m, "disagreements", w)),
                   processors=tuple(SizedProcessor.from_mapping(p, f"processors[{i}]")
                                    for i, p in enumerate(_items(m, "processors", w))),
                   seconds=m.get("seconds"))
