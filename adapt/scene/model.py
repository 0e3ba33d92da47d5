"""The scene: an array, the sources around it, what the processors assume and train on.

This module holds the scene's data model (plain frozen dataclasses). Reading and
validating scene files lives in :mod:`adapt.scenefile`; generating sample streams from a
scene lives in :mod:`adapt.streams.snapshots`.

Units: positions and spacings in wavelengths, angles in degrees, powers in dB relative
to the per-element thermal noise power (noise is unit power per element), time in
snapshots.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from adapt.scene import elements, geometry

LAYOUTS = ("line", "grid", "ring", "custom")
ROLES = ("desired", "interferer")
WAVEFORMS = ("gaussian", "bpsk", "qpsk", "tone", "chirp")
#: a waveform kind given only as a mapping: a coherent copy of another source's waveform
COPY = "copy"
TRAINING = ("interference", "signal")


@dataclass(frozen=True)
class HardwareErrors:
    """Per-element errors, drawn once per trial (independent Gaussian, zero mean).

    gain_db_rms: amplitude error, dB rms; phase_deg_rms: phase error, degrees rms;
    position_rms: position error per coordinate in the array's own plane or line,
    wavelengths rms.
    """
    gain_db_rms: float = 0.0
    phase_deg_rms: float = 0.0
    position_rms: float = 0.0
    #: per-channel delay error, snapshots rms (receiver channel mismatch; wideband
    #: generation, see adapt.streams.wideband); drawn from its own per-trial stream
    channel_delay_rms: float = 0.0
    #: per-channel filter ripple: rms of the outer taps of a 3-tap channel filter
    #: [e_-1, 1, e_+1] (complex, per channel and trial; wideband generation)
    channel_ripple_rms: float = 0.0

    @property
    def any(self) -> bool:
        return bool(self.gain_db_rms or self.phase_deg_rms or self.position_rms
                    or self.channel_delay_rms or self.channel_ripple_rms)


@dataclass(frozen=True)
class ArrayLayout:
    """Element positions (N, 3) in wavelengths plus how they were described."""
    layout: str
    positions: np.ndarray
    errors: HardwareErrors = field(default_factory=HardwareErrors)
    #: the layout's own settings as given or defaulted (count, spacing, rows, ...)
    settings: dict = field(default_factory=dict)
    #: element pattern (None: isotropic) and mutual coupling (None: none)
    element: elements.ElementPattern | None = None
    coupling: elements.Coupling | None = None

    @property
    def patterned(self) -> bool:
        """True when elements have a pattern or are coupled (steering beyond the plane
        wave and the hardware errors)."""
        return self.element is not None or self.coupling is not None

    @property
    def elements(self) -> int:
        return int(self.positions.shape[0])

    @property
    def aperture(self) -> float:
        return geometry.aperture(self.positions)

    @property
    def error_axes(self) -> np.ndarray:
        """Boolean mask (3,) of the coordinates position errors perturb: the axes the
        layout spans (x for a line, x and z for a grid, x and y for a ring; all spanned
        axes for a custom layout)."""
        spread = np.ptp(self.positions, axis=0) > 0
        if not spread.any():
            spread = np.array([True, False, False])
        return spread


@dataclass(frozen=True)
class Waveform:
    """A source's complex-envelope waveform, unit average power, one value per snapshot.

    kind: ``gaussian`` (circular complex Gaussian), ``bpsk`` (+-1), ``qpsk``
    ((+-1 +-j)/sqrt 2), ``tone`` (``exp(j(2 pi f k + phi))``, ``frequency`` in cycles per
    snapshot, phi random per trial) or ``chirp`` (linear sweep from ``start`` to ``stop``
    cycles per snapshot over ``period`` snapshots, repeating; random start phase), or
    ``copy``: the waveform of the source named ``of``, rotated by ``phase_deg`` degrees
    (a coherent arrival: multipath of that source, or a repeater), scaled to this
    source's own power and gated by its own pulsing; in a wideband scene also delayed by
    ``delay`` snapshots (any real number, through the same fractional-delay filters as
    the aperture's delays; :mod:`adapt.streams.wideband`).
    """
    kind: str = "gaussian"
    frequency: float = 0.0
    start: float = -0.25
    stop: float = 0.25
    period: int = 1024
    #: copy: the name of the source whose waveform this one repeats
    of: str | None = None
    #: copy: rotation of the repeated waveform, degrees
    phase_deg: float = 0.0
    #: copy: delay of the repeated waveform, snapshots (wideband scenes; 0 otherwise)
    delay: float = 0.0


@dataclass(frozen=True)
class Pulsing:
    """On/off behaviour. The source is on at snapshot k (0-based) when
    ``start <= k < stop`` (``stop`` None means forever) and, if ``period`` is set,
    ``(k - start) % period < on``."""
    start: int = 0
    stop: int | None = None
    period: int | None = None
    on: int | None = None

    def active(self, k: np.ndarray) -> np.ndarray:
        k = np.asarray(k)
        out = k >= self.start
        if self.stop is not None:
            out &= k < self.stop
        if self.period is not None:
            out &= ((k - self.start) % self.period) < self.on
        return out


@dataclass(frozen=True)
class Motion:
    """Constant angular rates, degrees per snapshot."""
    azimuth_rate: float = 0.0
    elevation_rate: float = 0.0


@dataclass(frozen=True)
class Source:
    name: str
    role: str
    azimuth: float
    elevation: float
    power_db: float
    waveform: Waveform = field(default_factory=Waveform)
    pulsing: Pulsing | None = None
    motion: Motion | None = None
    #: flat band of a noise-like source, fraction of the sample rate (None: its
    #: waveform's own spectrum, white for gaussian/bpsk/qpsk)
    bandwidth: float | None = None
    #: centre of that band, fraction of the sample rate
    offset: float = 0.0

    @property
    def power(self) -> float:
        """Per-element power relative to the per-element noise power (linear)."""
        return float(10.0 ** (self.power_db / 10.0))

    @property
    def stationary(self) -> bool:
        return self.pulsing is None and (self.motion is None or (
            self.motion.azimuth_rate == 0 and self.motion.elevation_rate == 0))

    def direction(self, k) -> tuple[np.ndarray, np.ndarray]:
        """(azimuth, elevation) in degrees at snapshot(s) k."""
        k = np.asarray(k, dtype=float)
        if self.motion is None:
            return np.full(k.shape, self.azimuth), np.full(k.shape, self.elevation)
        return (self.azimuth + self.motion.azimuth_rate * k,
                self.elevation + self.motion.elevation_rate * k)

    def active(self, k) -> np.ndarray:
        k = np.asarray(k)
        if self.pulsing is None:
            return np.ones(k.shape, dtype=bool)
        return self.pulsing.active(k)


NOISE_FIELDS = ("white", "isotropic", "cylindrical")


@dataclass(frozen=True)
class NoiseField:
    """The noise besides the unit thermal floor.

    field: ``white`` (nothing but the thermal floor, plus ``level_db`` of white noise if
    set), ``isotropic`` (spherically isotropic diffuse noise: coherence
    ``sin(k d) / (k d)`` between elements d wavelengths apart, ``k = 2 pi``) or
    ``cylindrical`` (diffuse in the x-y plane: coherence ``J0(k d)`` with d the
    separation projected on that plane; Cox 1973). level_db: the diffuse noise's power
    per element over the thermal floor (dB). element_noise_db_rms: spread of each
    channel's thermal noise power, drawn per trial and element (Gaussian in dB, median
    the unit floor).
    """
    field: str = "white"
    level_db: float | None = None
    element_noise_db_rms: float = 0.0

    @property
    def diffuse(self) -> bool:
        """True when noise beyond the thermal floor is added."""
        return self.level_db is not None

    @property
    def spread(self) -> bool:
        return self.element_noise_db_rms > 0

    @property
    def plain(self) -> bool:
        """True for unit white thermal noise alone (the scene without a noise key)."""
        return not self.diffuse and not self.spread


@dataclass(frozen=True)
class Receiver:
    """Optional ADC model: ``bits`` per I and Q rail (None: no quantisation), full scale
    (clip level of each rail) ``full_scale_db`` dB above the per-element noise rms."""
    bits: int | None = None
    full_scale_db: float = 40.0
    #: complex sample rate over carrier frequency, (0, 1]; None: narrowband model
    fractional_bandwidth: float | None = None


@dataclass(frozen=True)
class Scene:
    name: str
    array: ArrayLayout
    sources: tuple[Source, ...]
    look_azimuth: float
    look_elevation: float
    training: str = "interference"
    receiver: Receiver = field(default_factory=Receiver)
    noise: NoiseField = field(default_factory=NoiseField)
    snapshots: int = 1024
    trials: int = 100
    seed: int = 0
    #: processor specs as given (strings or mappings); parsed by adapt.processors
    processors: tuple = ()
    #: file the scene came from, if any
    source_file: str | None = None
    #: a design study kept with the scene (``sweep:`` key): the axes as KEY=VALUES texts
    #: and the target loss in dB (None: the command's default); read by ``adapt sweep``
    sweep_vary: tuple = ()
    sweep_target_db: float | None = None
    #: the scene as a plain mapping, defaults filled in (for scene.yaml in run folders)
    resolved: dict = field(default_factory=dict, compare=False, repr=False)

    @property
    def elements(self) -> int:
        return self.array.elements

    @property
    def desired(self) -> Source:
        return next(s for s in self.sources if s.role == "desired")

    @property
    def desired_index(self) -> int:
        return next(i for i, s in enumerate(self.sources) if s.role == "desired")

    @property
    def interferers(self) -> tuple[Source, ...]:
        return tuple(s for s in self.sources if s.role == "interferer")

    @property
    def interferer_indices(self) -> tuple[int, ...]:
        return tuple(i for i, s in enumerate(self.sources) if s.role == "interferer")

    @property
    def wideband(self) -> bool:
        """True when the scene uses the dispersive (space-time) source model of
        :mod:`adapt.streams.wideband`: a fractional bandwidth, a band-limited source or a
        channel delay error is given."""
        return (self.receiver.fractional_bandwidth is not None
                or any(s.bandwidth is not None for s in self.sources)
                or bool(self.array.errors.channel_delay_rms)
                or bool(self.array.errors.channel_ripple_rms))

    @property
    def stationary(self) -> bool:
        """True when no source pulses or moves: one covariance describes the scene."""
        return all(s.stationary for s in self.sources)

    def source_index(self, name: str) -> int:
        """Index of the source called ``name`` (KeyError if none)."""
        for i, s in enumerate(self.sources):
            if s.name == name:
                return i
        raise KeyError(name)

    @property
    def coherent(self) -> bool:
        """True when some source is a coherent copy of another (``waveform: {kind:
        copy}``)."""
        return any(s.waveform.kind == COPY for s in self.sources)

    def origin_index(self, i: int) -> int:
        """The source whose waveform source ``i`` carries: itself, or the source it
        copies (copies of copies are refused when the scene is read)."""
        wf = self.sources[i].waveform
        return self.source_index(wf.of) if wf.kind == COPY else i

    def look_steering(self) -> np.ndarray:
        """The assumed steering vector (N,) toward ``look``: nominal positions, no
        hardware errors; the element pattern, and the coupling when the array is
        calibrated (:mod:`adapt.scene.elements`)."""
        a = geometry.steering_vector(self.array.positions, self.look_azimuth,
                                     self.look_elevation)
        arr = self.array
        if not arr.patterned:
            return a
        u = geometry.direction_vector(self.look_azimuth, self.look_elevation)
        a = a * elements.pattern_gain(arr.element, u)
        if arr.coupling is not None and arr.coupling.calibrated:
            a = elements.apply_coupling(elements.coupling_matrix(arr.coupling, len(a)), a)
        return a

    def with_overrides(self, **changes: Any) -> "Scene":
        """A copy with fields replaced (trials, snapshots, seed, processors, ...)."""
        import dataclasses
        new = dataclasses.replace(self, **changes)
        resolved = dict(self.resolved)
        for key, value in changes.items():
            if key in ("trials", "snapshots", "seed"):
                resolved[key] = value
            elif key == "processors":
                resolved[key] = list(value)
        object.__setattr__(new, "resolved", resolved)
        return new
