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

Settings plus state: a :class:`Processor` object holds only its settings (the method,
the validated parameters, the label) and is immutable once built; everything a run
changes lives in the :class:`State` that ``begin(context)`` returns, one per run. So one
processor object serves any number of runs, threads and chunks at once, and nothing is
ever copied.

Writing a processor (one file in this package, plus its line in the registry table of
:mod:`adapt.processors`):

1. subclass :class:`Processor`, set ``method`` (the spec name), ``summary``,
   ``parameters`` (a dict of :class:`Parameter`; the constructor validates them) and
   the capability flags that apply (``covariance_based``, ``reference_trained``, ...);
2. implement ``begin(context)`` returning a fresh :class:`State` for
   ``context.trials`` trials (refusing, like ``check``, what cannot work) and
   ``update(state, block, checkpoints)`` returning the weights after each snapshot
   count in ``checkpoints`` (sorted, all within the block), shape
   (T, len(checkpoints), N), and advancing ``state``;
3. optionally ``check(context)`` to refuse settings that cannot work for this scene
   (an LMS step above its stability bound), and ``initial_weights(context)``.
"""
from __future__ import annotations

import math
import shlex
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any, Callable, ClassVar, Iterable

import numpy as np

from adapt.errors import SpecError, did_you_mean

__all__ = ["Parameter", "Processor", "State", "Settings", "Context", "ProcessorResult",
           "held_outputs", "run_processor", "run_processors", "normalised_checkpoints",
           "check_processors", "begin_processors", "require_finite", "format_value"]


@dataclass(frozen=True)
class Parameter:
    """A declared processor parameter.

    kind: ``float``, ``int``, ``bool``, ``str`` or ``choice``; ``choices`` for choice;
    ``low``/``high`` inclusive bounds (``low_open``/``high_open`` make them strict);
    ``allow_none``: the value may be ``none``; ``unit``: shown in help and errors;
    ``omit_unset``: an unset (None) value is left out of the full spec (where writing
    ``none`` back would contradict another parameter, as ``loading=none`` does
    ``loading_db``); with a default other than None, the parameter is unset while at
    its default and then left out of the processor's params altogether (so a later
    extension such as ``taps``, default 1, leaves existing specs and results as they
    were; read it with ``params.get(name, default)``).
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
    omit_unset: bool = False

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
    #: callable ``(k, taps, kind) -> (T, len(k), N taps, N taps)``: true space-time
    #: covariance of the stacked snapshots (kind interference | training | data |
    #: signal; adapt.streams.wideband); what tapped processors' checks use
    space_time: Callable[[np.ndarray, int, str], np.ndarray] | None = None
    #: the scene's fractional bandwidth (sample rate over carrier), 0 when narrowband
    fractional_bandwidth: float = 0.0
    #: delay-line length L behind each element when the look vector and covariances
    #: describe stacked space-time snapshots of ``elements / taps`` channels
    #: (adapt.processors._taps); 1 otherwise
    taps: int = 1

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
                   moments=_check_moments(batch.scene),
                   space_time=lambda k, taps, kind: _space_time(batch, k, taps, kind),
                   fractional_bandwidth=float(batch.scene.receiver.fractional_bandwidth or 0.0))


def _space_time(batch, k, taps: int, kind: str) -> np.ndarray:
    from adapt.streams.wideband import space_time_covariance
    return space_time_covariance(batch, int(taps), np.atleast_1d(np.asarray(k)), kind)


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


class Settings(dict):
    """A processor's validated parameters, read-only (a ``dict`` for reading, JSON and
    ``dict(...)`` copies; every change is refused)."""

    def _refuse(self, *args, **kwargs):
        raise TypeError("processor settings are immutable: build a new processor "
                        "(parse_spec or the class) with other parameters")

    __setitem__ = __delitem__ = clear = pop = popitem = setdefault = update = _refuse
    __ior__ = _refuse

    def __reduce__(self):
        return (Settings, (dict(self),))

    def __copy__(self):
        return self

    def __deepcopy__(self, memo):
        return self


class State(SimpleNamespace):
    """The run state of one processor over one stream: what ``begin(context)`` returns
    and ``update(state, block, checkpoints)`` advances (recursion weights, window sums,
    steps worked out for this context, ...). ``state.context`` is the context it was
    begun for. A fresh state per run: nothing is shared between runs or threads."""

    context: Context


#: names a processor parameter cannot take (they mean something else in a spec)
_RESERVED = ("method", "label")


class Processor:
    """Base class: the settings of one processor (method, declared parameters, label),
    immutable once built, and the block-driving loop.

    ``Processor(label=None, **params)`` is the one constructor: it validates ``params``
    against the declared :attr:`parameters` (defaults filled in, values coerced, ranges
    and cross-checks enforced; :class:`~adapt.errors.SpecError` otherwise). Two
    processors with the same method, parameters and label are equal.

    Capability flags (class attributes, read by the engine and the studies instead of
    lists of method names):

    * ``covariance_based``: the weights come from the sample covariance of the training
      data only (:class:`adapt.processors._covariance.SampleCovarianceProcessor`);
    * ``reference_trained``: trains on the received data and the reference waveform
      (``block.data`` and ``block.reference``) rather than on ``block.training``;
    * ``clairvoyant``: needs the true covariance (``context.covariance``), known only in
      simulation;
    * ``data_free``: needs no training data at all (its weights depend on the context
      only);
    * ``drawn_covariance``: can run on covariances drawn directly
      (:mod:`adapt.engine.drawn`): the covariance-based and the data-free processors;
    * ``sample_mvdr``: the MVDR weight of the (optionally loaded) sample covariance, so
      the Reed-Mallett-Brennan law and its rules of thumb apply
      (:mod:`adapt.studies.theory`).
    """

    method: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    parameters: ClassVar[dict[str, Parameter]] = {}
    covariance_based: ClassVar[bool] = False
    reference_trained: ClassVar[bool] = False
    clairvoyant: ClassVar[bool] = False
    data_free: ClassVar[bool] = False
    drawn_covariance: ClassVar[bool] = False
    sample_mvdr: ClassVar[bool] = False
    #: fewest elements the method works with (2 for anything that adapts under a
    #: look constraint: one element leaves no freedom)
    min_elements: ClassVar[int] = 1

    params: Settings
    label: str

    def __init__(self, /, label: str | None = None, **params: Any):
        if label is not None and (not isinstance(label, str) or not label.strip()
                                  or len(label) > 80):
            raise SpecError("label must be non-empty text of at most 80 characters",
                            path="label", value=label, allowed="text of 1 to 80 characters")
        object.__setattr__(self, "params", Settings(self.validate(params)))
        object.__setattr__(self, "label", label or self.default_label())

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        clash = [name for name in cls.parameters if name in _RESERVED]
        if clash:
            raise TypeError(f"{cls.__name__}: parameter names {clash} are reserved")

    def __setattr__(self, name, value):
        raise AttributeError(f"a {type(self).__name__} is immutable (settings only): "
                             "keep run state in the State that begin() returns")

    def __delattr__(self, name):
        raise AttributeError(f"a {type(self).__name__} is immutable")

    def __eq__(self, other) -> bool:
        return (type(other) is type(self) and other.params == self.params
                and other.label == self.label)

    def __hash__(self) -> int:
        return hash((type(self), self.spec()))

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.spec()!r}>"

    def __copy__(self):
        return self                      # immutable: a copy is the same processor

    def __deepcopy__(self, memo):
        return self

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
            if p.omit_unset and p.default is not None:
                if out.get(name, p.default) == p.default:
                    out.pop(name, None)     # unset: left out of params, spec and results
                continue
            out.setdefault(name, p.default)
        cls.cross_check(out, where)
        return out

    @classmethod
    def cross_check(cls, params: dict, where: str) -> None:
        """Checks between parameters; raise SpecError. Default: none."""

    # -- the one spec serialiser -------------------------------------------------
    def _words(self, defaults: bool) -> list[str]:
        words = [self.method]
        for name, value in self.params.items():
            declared = self.parameters[name]
            if (value is None and declared.omit_unset) or (not defaults
                                                            and value == declared.default):
                continue
            words.append(f"{name}={format_value(value)}")
        return words

    def default_label(self) -> str:
        """The method and the parameters that differ from their defaults."""
        return " ".join(self._words(defaults=False))

    def spec(self, *, defaults: bool = True, label: bool = True) -> str:
        """The spec text that rebuilds this processor exactly (floats are written so
        that they parse back to the same double; words holding spaces or quotes are
        shell-quoted, as :func:`adapt.processors.parse_spec` splits with shlex).

        Parameters
        ----------
        defaults : bool
            True: every parameter (an unset ``omit_unset`` parameter excepted); False:
            only those that differ from their declared defaults (what a person would
            type; passing defaults back could trip cross-checks between parameters).
        label : bool
            Add ``label=...`` when the label is not the default one.

        Returns
        -------
        str
            ``"method key=value ..."``; ``parse_spec(spec)`` equals this processor
            (with ``label=False``, up to a custom label).
        """
        words = self._words(defaults)
        if label and self.label != self.default_label():
            words.append(f"label={self.label}")
        return " ".join(shlex.quote(w) for w in words)

    # -- the kernel interface --------------------------------------------------
    def check(self, context: Context) -> None:
        """Refuse settings that cannot work for this scene (raise SpecError)."""

    def initial_weights(self, context: Context) -> np.ndarray:
        """Weight (T, N) used before the first checkpoint: the look steering vector
        normalised to unit response by default."""
        w = context.look / context.elements
        return np.broadcast_to(w, (context.trials, context.elements)).copy()

    def begin(self, context: Context) -> State:
        """A fresh run state for ``context.trials`` trials; refuses (SpecError) what
        :meth:`check` refuses."""
        raise NotImplementedError

    def update(self, state: State, block, checkpoints: np.ndarray) -> np.ndarray:
        """Advance ``state`` over ``block`` and return the weights after each snapshot
        count in ``checkpoints`` (sorted, inside the block): (T, len(checkpoints), N)."""
        raise NotImplementedError

    # -- driver ----------------------------------------------------------------
    def run(self, blocks: Iterable, context: Context, checkpoints,
            outputs: bool = False) -> ProcessorResult:
        """Feed ``blocks`` through the processor; see :func:`run_processor`."""
        return run_processor(self, blocks, context, checkpoints, outputs=outputs)


def format_value(v: Any) -> str:
    """Spec text of a parameter value that parses back to exactly the same value:
    ``none``, ``true``/``false``, integers and text as they are, floats in their short
    ``%g`` form when that is exact (``10``, ``1e-05``) and otherwise as ``repr`` (the
    shortest text that round-trips, ``0.000123456789``)."""
    if isinstance(v, float):
        short = f"{v:g}"
        return short if float(short) == v else repr(v)
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
    under the held-weight convention when ``outputs`` is True (space-time weights of
    N L entries apply to the stacked snapshots ``[x_k; ...; x_{k-L+1}]``). Reading stops after the
    last checkpoint unless outputs are wanted. ``seconds`` is each processor's own time.

    ``on_block(index, block, inside, weights, held)``, if given, is called for every
    processor and block with the checkpoints inside the block, their weights (T, C_b, N)
    and the weight held when the block started (T, N); all blocks are then read.
    """
    import time

    from adapt.processors._taps import stacked_data, tapped
    from adapt.streams.wideband import TapLine
    cps = normalised_checkpoints(checkpoints, snapshots)
    procs = [tapped(p) for p in processors]
    seconds = [0.0] * len(procs)
    states = begin_processors(procs, context, seconds)
    held, initial = [], []
    for i, p in enumerate(procs):
        t0 = time.perf_counter()
        w0 = p.initial_weights(context)
        seconds[i] += time.perf_counter() - t0
        held.append(w0)
        initial.append(w0.copy())
    found: list[list[np.ndarray]] = [[] for _ in procs]
    outs: list[list[np.ndarray]] = [[] for _ in procs]
    lines: dict = {}
    seen = 0
    for block in blocks:
        if block.start != seen:
            raise ValueError(f"blocks must be contiguous: expected start {seen}, got {block.start}")
        seen = block.stop
        inside = cps[(cps > block.start) & (cps <= block.stop)]
        for i, p in enumerate(procs):
            t0 = time.perf_counter()
            # every block goes through update: recursive state and window sums need it
            w = p.update(states[i], block, inside)
            seconds[i] += time.perf_counter() - t0
            if inside.size:
                require_finite(p, i, w, inside)
                found[i].append(w)
            if on_block is not None:
                on_block(i, block, inside, w, held[i])
            if outputs:
                data = stacked_data(p, states[i], block)
                if held[i].shape[-1] != data.shape[-1]:   # N L weights of an N-element
                    # processor (the sub-band FIR): its own delay line, across blocks
                    data = lines.setdefault(i, TapLine(held[i].shape[-1]
                                                       // data.shape[-1]))(data)
                y, held[i] = held_outputs(data, block.start, held[i], w, inside)
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
    from adapt.processors._taps import tapped
    for i, p in enumerate(processors):
        p = tapped(p)
        _check_elements(i, p, context)
        try:
            p.check(context)
        except SpecError as exc:
            raise exc.at(path_prefix=f"processors[{i}]") from None


def begin_processors(processors, context: Context,
                     seconds: list | None = None) -> list[State]:
    """A fresh run state per processor (``begin(context)``), after its element minimum;
    a SpecError (a stability bound, a constraint) is located at ``processors[i]``.

    Parameters
    ----------
    processors : sequence of Processor
    context : Context
    seconds : list of float, optional
        Each processor's time in ``begin`` is added to its entry.

    Returns
    -------
    list of State
        One per processor, in order.
    """
    import time
    states = []
    for i, p in enumerate(processors):
        _check_elements(i, p, context)
        t0 = time.perf_counter()
        try:
            states.append(p.begin(context))
        except SpecError as exc:
            raise exc.at(path_prefix=f"processors[{i}]") from None
        if seconds is not None:
            seconds[i] += time.perf_counter() - t0
    return states


def _check_elements(i: int, p: Processor, context: Context) -> None:
    if context.elements < p.min_elements:
        raise SpecError(f"'{p.method}' needs at least {p.min_elements} elements; this "
                        f"array has {context.elements}", path=f"processors[{i}]",
                        value=p.label, allowed="a method that works on one element "
                                               "(conventional, optimum, smi, ...)")


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
