"""Design studies: one scene or processor setting varied over a range (a line study) or
two over a grid, every point scored like ``adapt compare``.

``sweep(scene, ["sources[jam-1].azimuth=0:20:1"])`` runs the scene at every point of the
axes, each point with the SAME seed: the noise, every source's waveform and the
hardware errors are the same realisation at every point (common random numbers; the
streams are keyed by trial and source name, see :mod:`adapt.streams.snapshots`), so the
curves are smooth and the difference between two points is measured on paired trials.
Two points with the same value give bit-identical results.

Axes (``KEY=VALUES``):

* ``KEY`` is a scene key path written as the error messages write it
  (``sources[1].azimuth``, ``array.errors.phase_deg_rms``, ``array.spacing``,
  ``receiver.bits``, ``look.azimuth``, ``snapshots``, ``training``); a source may also be
  addressed by its name (``sources[jam-2].power_db``). Or a processor parameter,
  ``METHOD_OR_LABEL.PARAM`` (``smi.loading_db``, ``lms.step``, ``rls.forgetting``): the
  parameter of every listed processor whose method or label matches.
* ``VALUES`` is ``START:STOP:STEP`` (inclusive of STOP when the steps land on it), a comma
  list (``8,12,16`` or ``interference,signal``), or ``log:START:STOP:COUNT``, COUNT values
  evenly spaced in logarithm from START to STOP (for steps and powers of ten).

Each point's scene goes through the scene loader, so a value outside a key's allowed
range is refused naming the point; a key that does not exist gets a did-you-mean.

Recommendations are worded from the numbers (:func:`recommendations`):

* for a processor-parameter axis, each processor's best value (least mean loss against
  the optimum) and the values within 0.5 dB of it, judged on the paired per-trial
  differences, with the standard error of each difference;
* for a scene axis, each processor's worst point and the spans of the axis over which its
  mean loss stays within the target loss of the optimum.

Each point's ``final`` scores are those of ``metrics.json`` less the pattern scores
(pointing error and peak sidelobe, which cost as much as the rest of a point's summary;
run ``adapt compare`` on a point of interest for them).
"""
from __future__ import annotations

import copy
import itertools
import math
import re
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from adapt.errors import InputError, SpecError, did_you_mean
from adapt.processors import Processor, is_clairvoyant, parse_spec, registry
from adapt.scene.model import Scene
from adapt.studies.summaries import ProcessorSummary, entry_by_label

__all__ = ["Axis", "Sweep", "SweepPoint", "parse_axis", "sweep", "recommendations", "MAX_POINTS",
           "WITHIN_DB"]

#: points (product of the axes' lengths) allowed without ``max_points``
MAX_POINTS = 400
#: "as good as the best" for a processor-parameter axis: mean paired loss difference
WITHIN_DB = 0.5
#: scene keys that cannot be varied (they define the study, not the scene)
_FIXED_KEYS = {"name": "the scene's name", "trials": "the number of trials (use --trials)",
               "seed": "the seed (every point uses the same seed, by design)",
               "processors": "the processor list (vary a parameter as METHOD.PARAM)",
               "sweep": "the study itself"}
_SEGMENT = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)((?:\[[^\]]+\])*)$")


@dataclass(frozen=True)
class Axis:
    """One varied setting.

    key: the key as written (``sources[jam-1].azimuth``, ``smi.loading_db``);
    kind: ``scene`` or ``processor``; values: the points in order; spacing:
    ``linear``, ``log`` or ``list`` (how the values were given; figures use a log
    scale for ``log``)."""
    key: str
    kind: str
    values: tuple
    spacing: str = "list"


# --------------------------------------------------------------------------- axes
def _number(text: str):
    t = text.strip()
    try:
        if re.fullmatch(r"[+-]?\d+", t):
            return int(t)
        v = float(t)
    except ValueError:
        return None
    return v if math.isfinite(v) else None


def _tidy(x: float) -> float | int:
    """A computed grid value without binary noise (0.30000000000000004 -> 0.3)."""
    v = float(f"{x:.12g}")
    return int(v) if v == int(v) and abs(v) < 2 ** 53 and "." not in f"{x:.12g}" else v


def parse_values(text: str, where: str) -> tuple[tuple, str]:
    """The values of ``START:STOP:STEP``, ``log:START:STOP:COUNT`` or a comma list;
    InputError naming ``where`` otherwise. Returns (values, spacing)."""
    t = text.strip()
    allowed = ("START:STOP:STEP, log:START:STOP:COUNT, or a comma list such as 1,2,5 "
               "or interference,signal")
    if not t:
        raise InputError("no values", path=where, value=text, allowed=allowed)
    if t.lower().startswith("log:"):
        parts = t[4:].split(":")
        nums = [_number(p) for p in parts]
        if len(parts) != 3 or any(n is None for n in nums):
            raise InputError("expected log:START:STOP:COUNT", path=where, value=text,
                             allowed=allowed)
        a, b, n = nums
        if a <= 0 or b <= 0 or not isinstance(n, int) or n < 2:
            raise InputError("log spacing needs START > 0, STOP > 0 and a whole COUNT >= 2",
                             path=where, value=text, allowed=allowed)
        return tuple(_tidy(v) for v in np.geomspace(a, b, n)), "log"
    if ":" in t:
        parts = t.split(":")
        nums = [_number(p) for p in parts]
        if len(parts) != 3 or any(n is None for n in nums):
            raise InputError("expected START:STOP:STEP", path=where, value=text,
                             allowed=allowed)
        a, b, s = nums
        if s == 0 or (b - a) * s < 0:
            raise InputError("the STEP must be non-zero and lead from START to STOP",
                             path=where, value=text, allowed=allowed)
        count = int(math.floor((b - a) / s + 1e-9)) + 1
        if count > 100_000:
            raise InputError(f"{count} values", path=where, value=text,
                             allowed="at most 100,000 values on one axis")
        ints = all(isinstance(v, int) for v in (a, b, s))
        vals = [a + i * s if ints else _tidy(a + i * s) for i in range(count)]
        return tuple(vals), "linear"
    items = [p.strip() for p in t.split(",")]
    if any(not p for p in items):
        raise InputError("empty value in the list", path=where, value=text, allowed=allowed)
    vals = tuple(_number(p) if _number(p) is not None else p for p in items)
    return vals, "list"


def _leaf_paths(value, path: str = "") -> list[str]:
    if isinstance(value, dict):
        out = []
        for k, v in value.items():
            out += _leaf_paths(v, f"{path}.{k}" if path else str(k))
        return out
    if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
        out = []
        for i, v in enumerate(value):
            out += _leaf_paths(v, f"{path}[{i}]")
        return out
    return [path]


def _steps(key: str, mapping: dict) -> list:
    """The key path as a list of dict keys and list indices, resolved against the scene
    mapping (``sources[jam-1]`` -> the index of the source named jam-1); None if the
    path does not exist."""
    steps: list = []
    node = mapping
    for segment in key.split("."):
        m = _SEGMENT.match(segment)
        if not m:
            return None
        name, rest = m.group(1), m.group(2)
        if not isinstance(node, dict) or name not in node:
            return None
        steps.append(name)
        node = node[name]
        for index in re.findall(r"\[([^\]]+)\]", rest):
            if not isinstance(node, list):
                return None
            if re.fullmatch(r"\d+", index):
                i = int(index)
            else:
                names = [s.get("name") if isinstance(s, dict) else None for s in node]
                if index not in names:
                    return None
                i = names.index(index)
            if i >= len(node):
                return None
            steps.append(i)
            node = node[i]
    if isinstance(node, (dict, list)):
        return None
    return steps


def _set(raw: dict, resolved: dict, steps: list, value) -> dict:
    """A copy of ``raw`` with ``value`` at ``steps``; containers missing from ``raw``
    (a key left to its default) are copied from the resolved mapping first."""
    out = copy.deepcopy(raw)
    node, full = out, resolved
    for step in steps[:-1]:
        full = full[step]
        nxt = node[step] if (isinstance(node, dict) and step in node) or \
            (isinstance(node, list) and step < len(node)) else None
        if not isinstance(nxt, (dict, list)):
            nxt = copy.deepcopy(full)
            node[step] = nxt
        node = nxt
    node[steps[-1]] = value
    return out


def _matches(processor: Processor, owner: str) -> bool:
    """``owner`` names this processor: its label, or its method (any case)."""
    return processor.label == owner or processor.method == owner.lower()


def _processor_matches(processors: Sequence[Processor], owner: str) -> list[int]:
    return [i for i, p in enumerate(processors) if _matches(p, owner)]


def parse_axis(text: str, scene: Scene, processors: Sequence[Processor]) -> Axis:
    """``KEY=VALUES`` checked against the scene and the processors (see the module
    docstring); InputError with a did-you-mean for a key that does not exist."""
    where = "--vary"
    if not isinstance(text, str) or "=" not in text:
        raise InputError("expected KEY=VALUES", path=where, value=text,
                         allowed="e.g. sources[jam-1].azimuth=0:20:1 or smi.loading_db=0:20:2")
    key, _, spec = text.partition("=")
    key = key.strip()
    values, spacing = parse_values(spec, f"{where} {key}")
    resolved = scene.resolved
    top = key.split(".")[0].split("[")[0]
    if top in _FIXED_KEYS:
        raise InputError(f"'{key}' cannot be varied: it is {_FIXED_KEYS[top]}", path=where,
                         value=text, allowed="a scene key path or METHOD_OR_LABEL.PARAM")
    if top in resolved:
        if _steps(key, resolved) is None:
            known = [p for p in _leaf_paths(resolved) if p.split(".")[0].split("[")[0]
                     not in _FIXED_KEYS]
            raise InputError(f"no scene key '{key}'" + did_you_mean(key, known), path=where,
                             value=text, allowed="a key path of this scene, e.g. "
                             + ", ".join(known[:6]))
        return Axis(key=key, kind="scene", values=values, spacing=spacing)
    owner, dot, param = key.rpartition(".")
    if dot and _processor_matches(processors, owner):
        hits = _processor_matches(processors, owner)
        cls = type(processors[hits[0]])
        if param not in cls.parameters:
            raise InputError(f"'{cls.method}' has no parameter '{param}'"
                             + did_you_mean(param, cls.parameters), path=where, value=text,
                             allowed=", ".join(cls.parameters) or "none")
        return Axis(key=key, kind="processor", values=values, spacing=spacing)
    names = [p for p in _leaf_paths(resolved) if p.split(".")[0].split("[")[0]
             not in _FIXED_KEYS]
    names += [f"{p.label}.{k}" for p in processors for k in type(p).parameters]
    hint = did_you_mean(key, names)
    if dot and not hint and owner.lower() in registry():
        hint = f" (no listed processor is a '{owner}')"
    raise InputError(f"unknown key '{key}'" + hint, path=where, value=text,
                     allowed="a scene key path (sources[NAME].azimuth, array.spacing, ...) "
                             "or METHOD_OR_LABEL.PARAM of a listed processor")


# --------------------------------------------------------------------------- points
def _point_label(axes: Sequence[Axis], values: Sequence) -> str:
    return ", ".join(f"{a.key}={v}" for a, v in zip(axes, values))


def point_scene(base_raw: dict, scene: Scene, axes: Sequence[Axis], values: Sequence,
                file: str | None) -> Scene:
    """The scene at one point (the base scene's own mapping with the scene axes' values
    set), validated by the scene loader; InputError naming the point otherwise."""
    from adapt.scenefile import parse_scene
    raw = base_raw
    for axis, value in zip(axes, values):
        if axis.kind == "scene":
            raw = _set(raw, scene.resolved, _steps(axis.key, scene.resolved), value)
    try:
        return parse_scene(raw, file=file, _stem=scene.name)
    except InputError as exc:
        raise type(exc)(f"at sweep point {_point_label(axes, values)}: {exc.message}",
                        file=exc.file, path=exc.path, value=exc.value,
                        allowed=exc.allowed) from None


def swept_labels(processors: Sequence[Processor], axes: Sequence[Axis]) -> list[str]:
    """One label per processor for the whole study: a processor whose parameter is
    varied and whose label was its default shows the parameter as ``PARAM=varied``
    (``smi loading_db=varied``); a label set by the user is kept, and so is every label
    when the renaming would make two alike."""
    out = []
    for p, varied in zip(processors, _varied_params(processors, axes)):
        if not varied or p.label != p.default_label():
            out.append(p.label)
            continue
        kept = [w for w in p.default_label().split()[1:] if w.split("=")[0] not in varied]
        out.append(" ".join([p.method, *kept, *(f"{k}=varied" for k in sorted(varied))]))
    if len(set(out)) != len(out):       # e.g. "smi" and "smi loading_db=10", both varied
        out = [f"{p.label} [{', '.join(sorted(v))} varied]" if v else p.label
               for p, v in zip(processors, _varied_params(processors, axes))]
    return out


def _varied_params(processors: Sequence[Processor], axes: Sequence[Axis]) -> list[set]:
    return [{a.key.rpartition(".")[2] for a in axes
             if a.kind == "processor" and _matches(p, a.key.rpartition(".")[0])}
            for p in processors]


def point_processors(processors: Sequence[Processor], axes: Sequence[Axis],
                     values: Sequence) -> list[Processor]:
    """The processors at one point: each matching processor rebuilt with the axis value
    and its study label (:func:`swept_labels`), so a processor is one curve across the
    study."""
    labels = swept_labels(processors, axes)
    out = list(processors)
    for axis, value in zip(axes, values):
        if axis.kind != "processor":
            continue
        owner, _, param = axis.key.rpartition(".")
        for i in _processor_matches(processors, owner):
            p = out[i]
            spec = {"method": p.method, **{k: v for k, v in p.params.items()
                                           if v != type(p).parameters[k].default},
                    param: value, "label": labels[i]}
            try:
                out[i] = parse_spec(spec, where=f"{axis.key}={value}")
            except SpecError as exc:
                raise SpecError(f"at sweep point {_point_label(axes, values)}: {exc.message}",
                                path=exc.path, value=exc.value, allowed=exc.allowed) from None
    return out


# --------------------------------------------------------------------------- study
@dataclass(frozen=True)
class SweepPoint:
    """One point of a study: the axes' values (key -> value), the mean optimum SINR in
    dB at the last checkpoint and the comparison summary entry of every processor
    (:class:`adapt.studies.summaries.ProcessorSummary`, without pattern scores)."""
    values: dict
    optimum_sinr_db: float
    processors: tuple

    def processor(self, label: str) -> ProcessorSummary:
        """The entry of one processor, by its study label (KeyError if none)."""
        return entry_by_label(self.processors, label)

    def to_json(self) -> dict:
        """The point as ``sweep.json`` writes it: of each processor, the label, method,
        parameters, ``final`` scores (as in metrics.json) and the snapshots to the
        target."""
        return {"values": dict(self.values), "optimum_sinr_db": self.optimum_sinr_db,
                "processors": [{"label": p.label, "method": p.method, "params": p.params,
                                "final": p.final.to_json(),
                                "snapshots_to_3db": p.snapshots_to_3db,
                                "snapshots_to_3db_fraction": p.snapshots_to_3db_fraction}
                               for p in self.processors]}


@dataclass
class Sweep:
    """Result of :func:`sweep`.

    axes: the varied settings; points: one :class:`SweepPoint` per point in row-major
    order of the axes; losses: label -> (points, trials) final loss in dB per trial (for
    paired differences); recommendations: sentences, each with the numbers behind it."""
    scene: Scene
    axes: list
    points: list
    losses: dict
    labels: list
    trials: int
    snapshots: int
    seed: int
    target_db: float
    recommendations: list = field(default_factory=list)
    seconds: float = 0.0
    #: the processors as given (before the axes' values), in label order
    base_processors: list = field(default_factory=list)

    def shape(self) -> tuple:
        return tuple(len(a.values) for a in self.axes)

    def table(self, width: int = 100) -> str:
        """Terminal summary: mean loss (dB) per point and processor, then the
        recommendations."""
        return render_table(self, width)

    def to_json(self) -> dict:
        """The ``sweep.json`` content."""
        return {"scene": self.scene.name, "trials": self.trials, "snapshots": self.snapshots,
                "seed": self.seed, "target_loss_db": self.target_db,
                "axes": [{"key": a.key, "kind": a.kind, "values": list(a.values),
                          "spacing": a.spacing} for a in self.axes],
                "points": [p.to_json() for p in self.points],
                "recommendations": self.recommendations,
                "seconds": self.seconds}


@dataclass
class Study:
    """A checked study before it runs: the base scene and processors, the axes and, per
    point, (values, scene, processors)."""
    base: Scene
    processors: list
    axes: list
    points: list
    target_db: float

    def work(self, tail: int) -> int:
        """Trial-snapshots of the whole study (for a progress bar)."""
        return sum(sc.trials * (sc.snapshots + tail) for _, sc, _ in self.points)


def prepare(scene, vary: Sequence[str], processors: Sequence | None = None,
            trials: int | None = None, snapshots: int | None = None, seed: int | None = None,
            target_db: float | None = None, max_points: int | None = None,
            raw: dict | None = None) -> Study:
    """Check a study and build every point's scene and processors (nothing runs);
    InputError for any problem, naming the key or the point. Arguments as for
    :func:`sweep`."""
    from pathlib import Path

    from adapt.engine.settings import prepare_scene, whole_count
    from adapt.scenefile import load_scene, read_yaml

    if isinstance(scene, (str, Path)):
        path = Path(scene)
        scene = load_scene(path)
        if raw is None:
            raw = read_yaml(path.read_text(encoding="utf-8"), str(path))
    if not isinstance(scene, Scene):
        raise InputError("expected a scene or the path of a scene file",
                         value=type(scene).__name__)
    if isinstance(vary, str):
        vary = [vary]
    if not vary:
        vary = list(scene.sweep_vary)
    if not vary:
        raise InputError("nothing to vary", path="--vary",
                         allowed="one or two KEY=VALUES, e.g. sources[jam-1].azimuth=0:20:1")
    if len(vary) > 2:
        raise InputError(f"{len(vary)} axes", path="--vary", value=list(vary),
                         allowed="one axis (a line study) or two (a grid)")
    if target_db is None:
        target_db = 3.0 if scene.sweep_target_db is None else scene.sweep_target_db
    if isinstance(target_db, bool) or not isinstance(target_db, (int, float)) \
            or not math.isfinite(target_db) or target_db <= 0:
        raise InputError("the target loss must be a positive number of dB",
                         path="--target-loss", value=target_db, allowed="a number > 0 dB")
    base, procs = prepare_scene(scene, processors, trials, snapshots, seed)
    if not isinstance(raw, dict):
        raw = dict(scene.resolved)
    raw = dict(raw)
    raw.pop("sweep", None)
    raw.update(trials=base.trials, snapshots=base.snapshots, seed=base.seed, processors=[])
    axes = [parse_axis(text, base, procs) for text in vary]
    keys = [a.key for a in axes]
    if len(set(keys)) != len(keys):
        raise InputError("the same key is varied twice", path="--vary", value=keys)
    count = math.prod(len(a.values) for a in axes)
    limit = MAX_POINTS if max_points is None else whole_count(max_points, "--max-points",
                                                              10_000_000)
    if count > limit:
        raise InputError(f"{count} points", path="--vary", value=list(vary),
                         allowed=f"at most {limit} points (raise it with --max-points)")
    points = []
    for values in itertools.product(*(a.values for a in axes)):
        sc = point_scene(raw, base, axes, values, base.source_file)
        points.append((values, sc, point_processors(procs, axes, values)))
    return Study(base=base, processors=procs, axes=axes, points=points,
                 target_db=float(target_db))


def sweep(scene, vary: Sequence[str], processors: Sequence | None = None,
          trials: int | None = None, snapshots: int | None = None, seed: int | None = None,
          target_db: float | None = None, max_points: int | None = None,
          progress: Callable[[int], None] | None = None, threads: int | None = None,
          workers: int | None = None, scheduler: str | None = None, chunk: int | None = None,
          store=None, raw: dict | None = None) -> Sweep:
    """Run a design study.

    Parameters
    ----------
    scene : Scene or path
        The base scene (a scene file path or a :class:`Scene`).
    vary : list of str
        One or two ``KEY=VALUES`` axes (module docstring).
    processors : list of specs, optional
        Default: the scene's ``processors`` list.
    trials, snapshots, seed : int, optional
        Override the scene's (every point uses the same seed).
    target_db : float, optional
        Loss against the optimum that counts as "holding" (default: the scene's
        ``sweep.target_loss_db``, else 3 dB).
    max_points : int, optional
        Allow more than :data:`MAX_POINTS` points.
    progress : callable, optional
        Called with trial-snapshots done, summed over the points.
    threads, workers, scheduler, chunk : optional
        Where the trials run (as for ``compare``); results never depend on them.
    store : path or callable, optional
        Folder that keeps finished chunks (one sub-folder per point), so an interrupted
        study resumes where it stopped.
    raw : dict, optional
        The scene as written (defaults not filled in), to which the scene axes are
        applied; default the file's own mapping, or the resolved mapping.

    Returns
    -------
    Sweep
        Points, per-trial losses and the recommendations.

    References
    ----------
    Common random numbers for comparing simulated systems: Law and Kelton, Simulation
    Modeling and Analysis (paired comparisons with correlated streams), from memory.
    """
    import time
    from pathlib import Path

    from adapt.studies.compare import TAIL, compare

    t0 = time.perf_counter()
    study = prepare(scene, vary, processors, trials, snapshots, seed, target_db, max_points,
                    raw)
    base, procs, axes, target_db = study.base, study.processors, study.axes, study.target_db
    keys = [a.key for a in axes]
    if chunk is not None:
        from adapt.engine.settings import MAX_TRIALS, whole_count
        chunk = whole_count(chunk, "chunk", MAX_TRIALS)
    labels = swept_labels(procs, axes)
    points, losses = [], {label: [] for label in labels}

    def run_points(workers, scheduler):
        for index, (values, sc, pp) in enumerate(study.points):
            point_store = None
            if store is not None:
                def point_store(i=index):
                    root = store() if callable(store) else store
                    return Path(root) / f"point-{i:04d}"
            comparison = compare(sc, pp, target_db=target_db, progress=progress, chunk=chunk,
                                 threads=threads, workers=workers, scheduler=scheduler,
                                 store=point_store, tail=TAIL, patterns=False)
            summary = comparison.summary
            for p, scored in zip(summary.processors, comparison.evaluation.processors):
                with np.errstate(all="ignore"):
                    loss = np.where(np.isnan(scored.normalised[:, -1]), np.nan,
                                    np.asarray(scored.loss_db[:, -1], float))
                losses[p.label].append(loss)
            points.append(SweepPoint(values=dict(zip(keys, values)),
                                     optimum_sinr_db=summary.optimum_sinr_db,
                                     processors=summary.processors))

    if workers is not None:
        # one local cluster for the whole study, every point sent to its scheduler
        from adapt.engine.executors import cluster_client
        with cluster_client(workers=workers) as client:
            run_points(None, client.scheduler.address)
    else:
        run_points(None, scheduler)
    result = Sweep(scene=base, axes=axes, points=points,
                   losses={k: np.asarray(v) for k, v in losses.items()},
                   labels=labels, trials=base.trials, snapshots=base.snapshots,
                   seed=base.seed, target_db=float(target_db), base_processors=list(procs))
    result.recommendations = recommendations(result)
    result.seconds = time.perf_counter() - t0
    return result


# --------------------------------------------------------------------------- reading
def paired_difference(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    """Mean and standard error of the per-trial difference ``a - b`` (trials where both
    are finite)."""
    d = np.asarray(a, float) - np.asarray(b, float)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return math.nan, math.nan
    se = float(d.std(ddof=1) / math.sqrt(d.size)) if d.size > 1 else math.nan
    return float(d.mean()), se


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def _spans(values: Sequence, ok: Sequence[bool]) -> list[tuple]:
    """Contiguous runs of ``values`` where ``ok`` holds: [(first, last), ...]."""
    runs, start = [], None
    for i, flag in enumerate(ok):
        if flag and start is None:
            start = i
        if not flag and start is not None:
            runs.append((values[start], values[i - 1]))
            start = None
    if start is not None:
        runs.append((values[start], values[len(values) - 1]))
    return runs


def _spans_text(runs) -> str:
    return ", ".join(_fmt(a) if a == b else f"{_fmt(a)} to {_fmt(b)}" for a, b in runs)


def _mean_losses(result: Sweep, label: str) -> np.ndarray:
    out = []
    for point in result.points:
        v = point.processor(label).final.loss_db_mean
        out.append(math.nan if v is None else float(v))
    return np.asarray(out)


def recommendations(result: Sweep) -> list[dict]:
    """What the numbers say, per processor: ``{"processor", "kind", "text", ...}`` with
    the values the text was made from (see the module docstring)."""
    out = []
    target = result.target_db
    if len(result.axes) == 1:
        axis = result.axes[0]
        values = list(axis.values)
        for label in _adaptive(result):
            loss = _mean_losses(result, label)
            trials = result.losses[label]                       # (P, T)
            if not np.any(np.isfinite(loss)):
                out.append({"processor": label, "kind": "undefined",
                            "text": f"{label}: no finite loss at any point"})
                continue
            owner = axis.key.rpartition(".")[0]
            if axis.kind == "processor" and not _label_matches(result, label, owner):
                out.append({"processor": label, "kind": "not_varied", "key": axis.key,
                            "text": f"{label}: not changed by {axis.key} (mean loss "
                                    f"{np.nanmean(loss):.2f} dB)"})
                continue
            if axis.kind == "processor":
                best = int(np.nanargmin(loss))
                diffs = [paired_difference(trials[i], trials[best]) for i in range(len(values))]
                within = [np.isfinite(d) and d <= WITHIN_DB for d, _ in diffs]
                runs = _spans(values, within)
                ses = [se for (d, se), w in zip(diffs, within) if w and np.isfinite(se)]
                se_best = float(np.nanstd(trials[best], ddof=1)
                                / math.sqrt(max(1, np.isfinite(trials[best]).sum())))
                text = (f"{label}: best {axis.key} = {_fmt(values[best])} (mean loss "
                        f"{loss[best]:.2f} +- {se_best:.2f} dB); within {WITHIN_DB:g} dB of it "
                        f"(paired over the trials): {_spans_text(runs)}")
                if ses:
                    text += f" (standard error of those differences at most {max(ses):.2f} dB)"
                if best in (0, len(values) - 1) and len(values) > 1:
                    text += "; the best value is at the end of the range swept: widen it"
                out.append({"processor": label, "kind": "best_setting", "key": axis.key,
                            "best": values[best], "best_loss_db": float(loss[best]),
                            "within": [[a, b] for a, b in runs], "text": text})
            else:
                ok = [bool(np.isfinite(v) and v <= target) for v in loss]
                runs = _spans(values, ok)
                worst = int(np.nanargmax(loss))
                if all(ok):
                    holds = (f"holds within {target:g} dB of the optimum over the whole range "
                             f"swept ({_fmt(values[0])} to {_fmt(values[-1])})")
                elif not any(ok):
                    holds = (f"is never within {target:g} dB of the optimum over "
                             f"{_fmt(values[0])} to {_fmt(values[-1])}")
                else:
                    holds = (f"holds within {target:g} dB of the optimum for {axis.key} "
                             f"{_spans_text(runs)}")
                text = (f"{label} {holds}; worst at {axis.key} = {_fmt(values[worst])} "
                        f"(mean loss {loss[worst]:.2f} dB)")
                out.append({"processor": label, "kind": "holding_range", "key": axis.key,
                            "within": [[a, b] for a, b in runs], "worst": values[worst],
                            "worst_loss_db": float(loss[worst]), "text": text})
    else:
        a1, a2 = result.axes
        for label in _adaptive(result):
            loss = _mean_losses(result, label).reshape(result.shape())
            if not np.any(np.isfinite(loss)):
                out.append({"processor": label, "kind": "undefined",
                            "text": f"{label}: no finite loss at any point"})
                continue
            ok = np.isfinite(loss) & (loss <= target)
            best = np.unravel_index(int(np.nanargmin(loss)), loss.shape)
            worst = np.unravel_index(int(np.nanargmax(loss)), loss.shape)
            text = (f"{label}: within {target:g} dB of the optimum at {int(ok.sum())} of "
                    f"{ok.size} points; best at {a1.key} = {_fmt(a1.values[best[0]])}, "
                    f"{a2.key} = {_fmt(a2.values[best[1]])} (mean loss {loss[best]:.2f} dB); "
                    f"worst at {a1.key} = {_fmt(a1.values[worst[0]])}, {a2.key} = "
                    f"{_fmt(a2.values[worst[1]])} ({loss[worst]:.2f} dB)")
            out.append({"processor": label, "kind": "grid", "points_within": int(ok.sum()),
                        "points": int(ok.size),
                        "best": [a1.values[best[0]], a2.values[best[1]]],
                        "worst": [a1.values[worst[0]], a2.values[worst[1]]], "text": text})
    return out


def _adaptive(result: Sweep) -> list[str]:
    """Labels of the processors a recommendation is about: all but the clairvoyant
    optimum, which is the yardstick (its loss is zero by definition)."""
    return [p.label for p in result.points[0].processors if not is_clairvoyant(p.method)]


def _label_matches(result: Sweep, label: str, owner: str) -> bool:
    """Whether the processor with this study label is the one ``owner`` names."""
    return any(_matches(p, owner) and study == label
               for p, study in zip(result.base_processors, result.labels))


def render_table(result: Sweep, width: int = 100) -> str:
    """Mean final loss (dB against the optimum) per point and processor, the optimum SINR
    per point, and the recommendations."""
    import textwrap
    keys = [a.key for a in result.axes]
    labels = result.labels
    head = ([f"{result.scene.name}: {len(result.points)} points x {result.trials} trials, "
             f"{result.snapshots} snapshots, seed {result.seed} (the same at every point)"],)
    cols = ["point"] + ["optimum SINR dB"] + labels
    rows = []
    for point in result.points:
        cells = [", ".join(_fmt(point.values[k]) for k in keys),
                 _num(point.optimum_sinr_db)]
        for label in labels:
            cells.append(_num(point.processor(label).final.loss_db_mean))
        rows.append(cells)
    widths = [max(len(c[i]) for c in [cols] + rows) for i in range(len(cols))]
    widths = [min(w, 24) for w in widths]

    def line(cells):
        return "  ".join((c if len(c) <= w else c[:w - 1] + "~").rjust(w) if i else
                         (c if len(c) <= w else c[:w - 1] + "~").ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    out = list(head[0])
    out.append(f"mean loss in dB against the optimum at the last checkpoint, per point "
               f"({' x '.join(keys)}) and processor:")
    out.append(line(cols))
    out.append("-" * min(width, sum(widths) + 2 * (len(widths) - 1)))
    out += [line(r) for r in rows]
    out.append("")
    for rec in result.recommendations:
        out += textwrap.wrap(rec["text"], width, subsequent_indent="  ")
    from adapt.studies.compare import CAUTION
    out.append(CAUTION)
    return "\n".join(out)


def _num(v) -> str:
    if v is None or not np.isfinite(v):
        return "n/a"
    return f"{v:.2f}"


# --------------------------------------------------------------------------- writing
CSV_COLUMNS = ("label", "method", "optimum_sinr_db", "sinr_db_mean", "sinr_db_p10",
               "sinr_db_p90", "loss_db_mean", "loss_db_p10", "loss_db_p90",
               "loss_db_of_mean", "snapshots_to_3db", "snapshots_to_3db_fraction",
               "worst_null_db", "white_noise_gain_db")


def csv_text(record: dict) -> str:
    """``sweep.csv``: one row per point and processor, the axes' values first."""
    import csv
    import io as _io
    keys = [a["key"] for a in record["axes"]]
    buf = _io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([*keys, *CSV_COLUMNS])
    for point in record["points"]:
        for p in point["processors"]:
            f = p["final"]
            # worst_null_db as in the summary: interferers on at the last checkpoint only
            row = {"label": p["label"], "method": p["method"],
                   "optimum_sinr_db": point["optimum_sinr_db"],
                   "snapshots_to_3db": p["snapshots_to_3db"],
                   "snapshots_to_3db_fraction": p["snapshots_to_3db_fraction"],
                   **{k: f.get(k) for k in CSV_COLUMNS if k in f}}
            w.writerow([*(point["values"][k] for k in keys),
                        *("" if row.get(c) is None else _csv_num(row.get(c))
                          for c in CSV_COLUMNS)])
    return buf.getvalue()


def _csv_num(v) -> str:
    if isinstance(v, float):
        return "" if not math.isfinite(v) else repr(v)
    return str(v)


def write_sweep_run(result: Sweep, out_root="runs", command_line: str | None = None,
                    folder=None):
    """Write a NEW run folder ``<time>-sweep-<scene>/`` under ``out_root``: ``scene.yaml``
    (the base scene as run), ``sweep.json``, ``sweep.csv``, ``sweep.png``,
    ``summary.txt``, ``report.html`` and ``manifest.json``, every file atomically. With
    ``folder`` (a resumable run folder) the outputs go there and its resume state is
    removed once they are written."""
    from adapt import io
    from adapt.report.html import build_page
    from adapt.report.runfolder import RunWriter
    from adapt.report.sweep_figures import sweep_figures, sweep_sections
    from adapt.scenefile import dump_scene
    if not isinstance(result, Sweep):
        raise ValueError(f"expected a Sweep, got {type(result).__name__}")
    record = io.to_jsonable(result.to_json())
    writer = RunWriter(folder, out_root, f"sweep-{result.scene.name}")
    writer.text("scene.yaml", "# The base scene of the study (defaults filled in); the axes "
                              "are in sweep.json.\n" + dump_scene(result.scene))
    writer.json("sweep.json", record)
    writer.text("sweep.csv", csv_text(record))
    writer.text("summary.txt", result.table() + "\n")
    pngs = sweep_figures(record)
    for name, data in pngs.items():
        writer.bytes(f"{name}.png", data)
    page = build_page(f"Design study: {record['scene']}", sweep_sections(record, pngs),
                      footer=f"adapt sweep, seed {record['seed']}, {record['trials']} trials "
                             f"per point")
    writer.text("report.html", page)
    return writer.seal({"kind": "sweep", "scene": record["scene"], "seed": record["seed"],
                        "trials": record["trials"], "points": len(record["points"]),
                        "command_line": command_line, "seconds": result.seconds})
