"""The one interface every adaptive processor shares.

A processor sees a stream of blocks (trials x snapshots x elements) and, for a list of
checkpoints (snapshot counts k), reports the weight vector it would use after having
seen k snapshots: an array of shape (trials, checkpoints, elements).

Conventions (documented once, here and in README):

* weights are applied as ``y = w^H x``;
* output samples use *held* weights: snapshot j (0-based) is processed with the weight
  of the latest checkpoint c <= j (c snapshots seen before it arrived), and snapshots
  before the first checkpoint with the processor's initial (quiescent) weight. The
  output at a checkpoint's weight is therefore always measured on snapshots that weight
  was not trained on;
* the noise power per element is 1 in scene units; a processor that needs a noise
  level (diagonal loading in dB above the noise floor) takes it from the context.

Writing a processor (one file in this package):

1. subclass :class:`Processor`, set ``method`` (the spec name), ``summary`` and
   ``parameters`` (a dict of :class:`Parameter`); the base validates them;
2. implement ``begin(context)`` (allocate state for ``context.trials`` trials) and
   ``update(block, stops)`` returning the weights after each snapshot count in
   ``stops`` (sorted, all within the block), shape (T, len(stops), N);
3. optionally ``check(context)`` to refuse settings that cannot work for this scene
   (an LMS step above its stability bound), and ``initial_weights(context)``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, ClassVar, Iterable

import numpy as np

from adapt.errors import SpecError, did_you_mean

__all__ = ["Parameter", "Processor", "Context", "ProcessorResult", "held_outputs",
           "run_processor", "run_processors", "normalised_checkpoints", "check_processors",
           "require_finite"]


@dataclass(frozen=True)
class Parameter:
    """A declared processor parameter.

    kind: ``float``, ``int``, ``bool``, ``str`` or ``choice``; ``choices`` for choice;
    ``low``/``high`` inclusive bounds (``low_open``/``high_open`` make them strict);
    ``allow_none``: the value may be ``none``; ``unit``: shown in help and errors.
    """
    kind: str
    default: Any
    help: str
    unit: str = ""
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple = ()
    allow_none: bool = False

    def describe_allowed(self) -> str:
        if self.kind == "choice":
            text = " | ".join(map(str, self.choices))
        elif self.kind == "bool":
            text = "true | false"
        elif self.kind == "str":
            text = "text"
        else:
            lo = "(" if self.low_open else "["
            hi = ")" if self.high_open else "]"
            a = "-inf" if self.low is None else f"{self.low:g}"
            b = "inf" if self.high is None else f"{self.high:g}"
            text = f"{'an integer' if self.kind == 'int' else 'a number'} in {lo}{a}, {b}{hi}"
            if self.unit:
                text += f" {self.unit}"
        if self.allow_none:
            text += " | none"
        return text

    def coerce(self, value: Any, where: str) -> Any:
        """Convert a value (from YAML or a ``key=value`` string) or raise SpecError."""
        def bad(msg="invalid value"):
            return SpecError(msg, path=where, value=value, allowed=self.describe_allowed())

        if (self.kind == "choice" and isinstance(value, str)
                and value.strip().lower() in self.choices):
            return value.strip().lower()      # a choice named "none" is a value, not None
        if value is None or (isinstance(value, str) and value.strip().lower() in ("none", "null", "")):
            if self.allow_none:
                return None
            raise bad("a value is required")
        if self.kind == "bool":
            if isinstance(value, bool):
                return value
            if isinstance(value, str) and value.lower() in ("true", "yes", "1", "on"):
                return True
            if isinstance(value, str) and value.lower() in ("false", "no", "0", "off"):
                return False
            raise bad()
        if self.kind == "str":
            if isinstance(value, str) and len(value) <= 200:
                return value
            raise bad()
        if self.kind == "choice":
            text = str(value).strip().lower() if isinstance(value, str) else value
            if text in self.choices:
                return text
            raise SpecError("unknown choice" + did_you_mean(str(value), map(str, self.choices)),
                            path=where, value=value, allowed=self.describe_allowed())
        # numbers
        if isinstance(value, bool):
            raise bad("expected a number, not a true/false")
        if isinstance(value, str):
            try:
                number = float(value.strip())
            except ValueError:
                raise bad("expected a number") from None
        elif isinstance(value, (int, float, np.integer, np.floating)):
            try:
                number = float(value)
            except OverflowError:             # an integer beyond the float range
                raise bad("out of range") from None
        else:
            raise bad("expected a number")
        if not math.isfinite(number):
            raise bad("must be finite")
        if self.kind == "int":
            if number != int(number) or abs(number) > 2 ** 62:
                raise bad("expected an integer")
            number = int(number)
        if self.low is not None and (number < self.low or (self.low_open and number == self.low)):
            raise bad("out of range")
        if self.high is not None and (number > self.high or (self.high_open and number == self.high)):
            raise bad("out of range")
        return number


@dataclass
class Context:
    """What a processor may know besides the data it is fed.

    look: (N,) assumed steering vector toward the look direction (nominal array).
    positions: (N, 3) nominal element positions in wavelengths.
    trials: number of trials in the batch.
    noise_power: per-element thermal noise power (1 in scene units).
    covariance: callable ``k -> (T, len(k), N, N)`` true interference-plus-noise
        covariance at snapshot indices k; only clairvoyant processors (the optimum) use it.
    training_covariance: callable ``k -> (T, len(k), N, N)``: true covariance of the
        data the processors train on (adds the wanted signal in the signal-present case);
        used to check stability bounds, never to adapt (may be a read-only view).
    has_reference: True when a reference waveform is available (always, in simulation).
    look_direction: (azimuth, elevation) in degrees of the assumed look direction, or
        None when unknown (processors that constrain derivatives of the response need it).
    data_covariance: callable ``k -> (T, len(k), N, N)``: true covariance of the received
        data ``block.data`` (interference, noise and the wanted signal, whatever the
        scene trains on): what reference-trained processors (LMS, RLS) adapt on; used to
        check step-size bounds, never to adapt (may be a read-only view).
    moments: snapshot indices at which stability checks evaluate covariances (None:
        snapshot 0 only, exact for a stationary scene).
    """
    look: np.ndarray
    positions: np.ndarray
    trials: int
    noise_power: float = 1.0
    covariance: Callable[[np.ndarray], np.ndarray] | None = None
    training_covariance: Callable[[np.ndarray], np.ndarray] | None = None
    has_reference: bool = True
    look_direction: tuple[float, float] | None = None
    data_covariance: Callable[[np.ndarray], np.ndarray] | None = None
    moments: np.ndarray | None = None

    @property
    def elements(self) -> int:
        return int(self.look.shape[-1])

    @classmethod
    def from_batch(cls, batch) -> "Context":
        """Context for a :class:`adapt.streams.snapshots.TrialBatch`."""
        return cls(look=batch.look, positions=batch.scene.array.positions,
                   trials=batch.trials, noise_power=1.0,
                   covariance=lambda k: batch.covariance(np.asarray(k)),
                   training_covariance=lambda k: _shared_covariance(batch, k, "training"),
                   look_direction=(float(batch.scene.look_azimuth),
                                   float(batch.scene.look_elevation)),
                   data_covariance=lambda k: _shared_covariance(batch, k, "data"),
                   moments=_check_moments(batch.scene))


def _shared_covariance(batch, k, kind: str) -> np.ndarray:
    """Training (``kind="training"``) or data covariance (T, len(k), N, N) at snapshot
    indices k. Without hardware errors every trial has the same covariance: it is then
    computed once and returned as a read-only broadcast view over the trials."""
    kk = np.atleast_1d(np.asarray(k))

    def one(b):
        return (b.covariance(kk, training=True) if kind == "training"
                else _data_covariance(b, kk))

    if batch.trials > 1 and batch.same_array:
        single = type(batch)(batch.scene, trials=1, seed=batch.seed,
                             first_trial=batch.first_trial)
        r = one(single)
        return np.broadcast_to(r, (batch.trials,) + r.shape[1:])
    return one(batch)


def _data_covariance(batch, k) -> np.ndarray:
    """(T, len(k), N, N) covariance of ``block.data``: interference plus noise plus the
    wanted source (gated) at snapshot indices k (quantisation not included)."""
    kk = np.atleast_1d(np.asarray(k))
    if batch.scene.coherent:             # coherent copies: the cross terms with the signal
        return batch.covariance(kk, data=True)
    r = batch.covariance(kk)
    src = batch.scene.desired
    a = batch.desired_steering(kk)                                    # (T, M, N)
    p = src.power * src.active(kk).astype(float)                      # (M,)
    return r + p[None, :, None, None] * (a[..., :, None] * np.conj(a[..., None, :]))


def _check_moments(scene) -> np.ndarray:
    """Snapshot indices for stability checks: 0 for a stationary scene; otherwise 65
    moments spread over the scene's snapshots plus every pulse's first on-snapshot
    (capped at 1024 moments)."""
    if scene.stationary:
        return np.array([0])
    last = max(int(scene.snapshots) - 1, 0)
    k = [np.linspace(0, last, 65).round().astype(np.int64)]
    for s in scene.sources:
        p = s.pulsing
        if p is not None and p.start <= last:
            stop = last if p.stop is None else min(last, p.stop - 1)
            step = p.period if p.period is not None else stop + 1
            k.append(np.arange(p.start, stop + 1, step)[:1024])
    return np.unique(np.concatenate(k))[:1024]


@dataclass
class ProcessorResult:
    """Weights (T, C, N) at ``checkpoints`` (C,), and output samples (T, K) if asked."""
    label: str
    method: str
    params: dict
    checkpoints: np.ndarray
    weights: np.ndarray
    outputs: np.ndarray | None = None
    initial: np.ndarray | None = None
    seconds: float = 0.0


class Processor:
    """Base class: declared parameters, validation, and the block-driving loop."""

    method: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    parameters: ClassVar[dict[str, Parameter]] = {}
    #: the method trains on the reference waveform (LMS family)
    uses_reference: ClassVar[bool] = False
    #: fewest elements the method works with (2 for anything that adapts under a
    #: look constraint: one element leaves no freedom)
    min_elements: ClassVar[int] = 1

    def __init__(self, label: str | None = None, **params: Any):
        self.params = self.validate(params)
        self.label = label or self.default_label()

    # -- parameters ----------------------------------------------------------
    @classmethod
    def validate(cls, given: dict, where: str = "") -> dict:
        """Fill defaults and coerce each value; unknown names get a did-you-mean."""
        out = {}
        for name, value in given.items():
            if name not in cls.parameters:
                allowed = ", ".join(cls.parameters) or "none"
                raise SpecError(f"unknown parameter '{name}' for method '{cls.method}'"
                                + did_you_mean(name, cls.parameters),
                                path=f"{where}{name}" if where else name, allowed=allowed)
            out[name] = cls.parameters[name].coerce(value, f"{where}{name}" if where else name)
        for name, p in cls.parameters.items():
            out.setdefault(name, p.default)
        cls.cross_check(out, where)
        return out

    @classmethod
    def cross_check(cls, params: dict, where: str) -> None:
        """Checks between parameters; raise SpecError. Default: none."""

    def default_label(self) -> str:
        changed = [f"{k}={_fmt(v)}" for k, v in self.params.items()
                   if v != self.parameters[k].default]
        return " ".join([self.method] + changed)

    def spec(self) -> str:
        """The spec string that rebuilds this processor (words holding spaces or quotes
        are shell-quoted, as :func:`adapt.processors.parse_spec` splits with shlex)."""
        import shlex
        parts = [self.method] + [f"{k}={_fmt(v)}" for k, v in self.params.items()]
        if self.label != self.default_label():
            parts.append(f"label={self.label}")
        return " ".join(shlex.quote(p) for p in parts)

    def compact_spec(self, label: bool = True) -> str:
        """Like :meth:`spec`, with only the parameters that differ from their defaults
        (what a person would type; passing defaults back could trip cross-checks between
        parameters). It rebuilds the same processor; ``label=False`` leaves out a custom
        label."""
        import shlex
        parts = [self.method] + [f"{k}={_fmt(v)}" for k, v in self.params.items()
                                 if v != self.parameters[k].default]
        if label and self.label != self.default_label():
            parts.append(f"label={self.label}")
        return " ".join(shlex.quote(p) for p in parts)

    # -- the kernel interface --------------------------------------------------
    def check(self, context: Context) -> None:
        """Refuse settings that cannot work for this scene (raise SpecError)."""

    def initial_weights(self, context: Context) -> np.ndarray:
        """Weight (T, N) used before the first checkpoint: the look steering vector
        normalised to unit response by default."""
        w = context.look / context.elements
        return np.broadcast_to(w, (context.trials, context.elements)).copy()

    def begin(self, context: Context) -> None:
        raise NotImplementedError

    def update(self, block, stops: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    # -- driver ----------------------------------------------------------------
    def run(self, blocks: Iterable, context: Context, checkpoints,
            outputs: bool = False) -> ProcessorResult:
        """Feed ``blocks`` through the processor; see :func:`run_processor`."""
        return run_processor(self, blocks, context, checkpoints, outputs=outputs)


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if v is None:
        return "none"
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


def normalised_checkpoints(checkpoints, snapshots: int | None = None) -> np.ndarray:
    """Sorted unique int64 checkpoints, each in [1, snapshots]; ValueError otherwise."""
    c = np.asarray(checkpoints)
    if c.ndim != 1 or c.size == 0:
        raise ValueError("checkpoints must be a non-empty 1-D list of snapshot counts")
    if not np.issubdtype(c.dtype, np.integer):
        if not np.all(np.isfinite(c)) or np.any(c != np.round(c)):
            raise ValueError("checkpoints must be whole snapshot counts")
    c = np.unique(c.astype(np.int64))
    if c[0] < 1:
        raise ValueError(f"checkpoints must be >= 1 snapshot, got {c[0]}")
    if snapshots is not None and c[-1] > snapshots:
        raise ValueError(f"checkpoint {c[-1]} is beyond the stream's {snapshots} snapshots")
    return c


def held_outputs(data: np.ndarray, start: int, held: np.ndarray, weights: np.ndarray,
                 checkpoints: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Output samples ``y = w^H x`` of one block under the held-weight convention.

    data: (T, B, N) block starting at snapshot ``start``; held: (T, N) weight in force
    when the block starts; weights: (T, C, N) weights at ``checkpoints`` (C,) that fall
    inside this block (start < c <= start + B). Returns (outputs (T, B), weight in force
    after the block (T, N)).
    """
    t_, b, _ = data.shape
    out = np.empty((t_, b), dtype=np.result_type(data, held, complex))
    edges = [0] + [int(c - start) for c in checkpoints] + [b]
    current = held
    for j in range(len(edges) - 1):
        lo, hi = edges[j], edges[j + 1]
        if j > 0:
            current = weights[:, j - 1, :]
        if hi > lo:
            out[:, lo:hi] = np.einsum("tn,tbn->tb", np.conj(current), data[:, lo:hi, :])
    return out, current


def run_processors(processors, blocks: Iterable, context: Context, checkpoints,
                   outputs: bool = False, snapshots: int | None = None,
                   on_block: Callable | None = None) -> list[ProcessorResult]:
    """Drive several processors over one pass of ``blocks`` (objects with ``start``,
    ``stop``, ``data``, ``training``, ``reference``) and collect weights at
    ``checkpoints``.

    The stream is drawn once and every processor sees every block. Returns one
    :class:`ProcessorResult` per processor: weights (T, C, N), and output samples (T, K)
    under the held-weight convention when ``outputs`` is True. Reading stops after the
    last checkpoint unless outputs are wanted. ``seconds`` is each processor's own time.

    ``on_block(index, block, inside, weights, held)``, if given, is called for every
    processor and block with the checkpoints inside the block, their weights (T, C_b, N)
    and the weight held when the block started (T, N); all blocks are then read.
    """
    import time
    cps = normalised_checkpoints(checkpoints, snapshots)
    procs = list(processors)
    check_processors(procs, context)
    seconds = [0.0] * len(procs)
    held, initial = [], []
    for i, p in enumerate(procs):
        t0 = time.perf_counter()
        p.begin(context)
        w0 = p.initial_weights(context)
        seconds[i] += time.perf_counter() - t0
        held.append(w0)
        initial.append(w0.copy())
    found: list[list[np.ndarray]] = [[] for _ in procs]
    outs: list[list[np.ndarray]] = [[] for _ in procs]
    seen = 0
    for block in blocks:
        if block.start != seen:
            raise ValueError(f"blocks must be contiguous: expected start {seen}, got {block.start}")
        seen = block.stop
        inside = cps[(cps > block.start) & (cps <= block.stop)]
        for i, p in enumerate(procs):
            t0 = time.perf_counter()
            # every block goes through update: recursive state and window sums need it
            w = p.update(block, inside)
            seconds[i] += time.perf_counter() - t0
            if inside.size:
                require_finite(p, i, w, inside)
                found[i].append(w)
            if on_block is not None:
                on_block(i, block, inside, w, held[i])
            if outputs:
                y, held[i] = held_outputs(block.data, block.start, held[i], w, inside)
                outs[i].append(y)
            elif inside.size:
                held[i] = w[:, -1, :]
        if seen >= cps[-1] and not outputs and on_block is None:
            break
    if seen < cps[-1]:
        raise ValueError(f"the stream ended at {seen} snapshots, before checkpoint {cps[-1]}")
    return [ProcessorResult(label=p.label, method=p.method, params=dict(p.params),
                            checkpoints=cps, weights=np.concatenate(found[i], axis=1),
                            outputs=np.concatenate(outs[i], axis=1) if outputs else None,
                            initial=initial[i], seconds=seconds[i])
            for i, p in enumerate(procs)]


def check_processors(processors, context: Context) -> None:
    """Each processor's own scene checks (stability bounds, constraints) and its
    element minimum; a SpecError is located at ``processors[i]``."""
    for i, p in enumerate(processors):
        if context.elements < p.min_elements:
            raise SpecError(f"'{p.method}' needs at least {p.min_elements} elements; this "
                            f"array has {context.elements}", path=f"processors[{i}]",
                            value=p.label, allowed="a method that works on one element "
                                                   "(conventional, optimum, smi, ...)")
        try:
            p.check(context)
        except SpecError as exc:
            raise exc.at(path_prefix=f"processors[{i}]") from None


def require_finite(processor: Processor, index: int, weights: np.ndarray,
                   checkpoints: np.ndarray) -> None:
    """Refuse non-finite weights (a diverged recursion, an overflow): scores are never
    computed from NaN silently."""
    ok = np.isfinite(weights).all(axis=(0, 2))
    if not ok.all():
        first = int(checkpoints[int(np.argmin(ok))])
        raise SpecError(f"'{processor.label}' diverged: its weights are not finite after "
                        f"{first} snapshots; choose settings inside the method's stable "
                        "range (a smaller step, a forgetting factor nearer 1, more loading)",
                        path=f"processors[{index}]", value=processor.spec())


def run_processor(processor: Processor, blocks: Iterable, context: Context, checkpoints,
                  outputs: bool = False, snapshots: int | None = None) -> ProcessorResult:
    """One processor over ``blocks``; see :func:`run_processors`."""
    return run_processors([processor], blocks, context, checkpoints, outputs, snapshots)[0]
