"""One-screen scene summaries and scene warnings (the ``adapt check`` command).

``summarise_scene(scene)`` returns the summary text; ``scene_warnings(scene)`` the list of
warnings; ``main_lobe_contains(positions, look, direction)`` and ``beamwidth_deg(...)``
are the geometric tests behind them.

Warnings (each a plain sentence):

* grating lobe: the uniform beam steered to the look direction has another lobe within
  1 dB of its peak in visible space (:func:`grating_lobe`: the criterion of
  :func:`adapt.scene.geometry.has_grating_lobe`, evaluated in closed form for lines and grids;
  handbook rule for a line: free of grating lobes when ``d (1 + |sin theta0|) < 1``);
* too many interferers: as many interferers as degrees of freedom (N - 1) or more; a
  linearly constrained processor with one look constraint can null at most N - 1
  independent directions (Van Trees, Optimum Array Processing, ch. 6);
* interferers close to the array size: N - 2 interferers (one spare degree of freedom);
  nulls are fragile and ``loading=auto`` has only two noise eigenvalues to estimate the
  noise floor from;
* interferer in the main lobe: the interferer lies inside the main lobe of the uniform
  (conventional) beam steered to the look direction, *defined here as* before the first
  null: walking along the great-circle arc from the look direction to the interferer,
  the conventional power pattern never rises again (it only falls, or stays flat, as on
  the cone of a line array). On a uniform line at broadside this is ``|sin theta| <
  1 / (N d)``. The warning gives the first null's angle on that side, the conventional
  response toward the interferer and what nulling it costs the wanted signal,
  ``-10 log10(1 - B)`` with B that response (small when the interferer sits just inside
  a steep null skirt of a small array). Moving sources are checked at 17 instants;
* pointing mismatch: the look direction differs from the desired source's direction
  (the angle between them is given; a moving desired source is checked at the start
  and end of the run);
* coherent copy with signal-present training: an interferer copies the wanted source's
  waveform while the processors train with the wanted signal present; MVDR then
  cancels the wanted signal (Widrow, Duvall, Gooch and Newman 1982); spatial smoothing
  (``subarray=M``) or interference-only training avoid it;
* uncalibrated coupling: the array has mutual coupling the processors' assumed
  steering ignores (``calibrated: false``);
* superdirective spacing: a diffuse noise field and neighbours closer than half a
  wavelength: the optimum against that field is superdirective (its gain toward
  endfire can approach N^2, Uzkov 1946), with a low white-noise gain and so sensitive
  to errors (Cox, Zeskind and Owen 1987);
* wideband scenes only: the interferers' expected significant eigenvalues (about
  ``1 + 2 W T`` each, W the band in cycles per snapshot (a chirp's: its sweep; a tone
  counts one), T the delay spread across the
  aperture in snapshots: Slepian 1978) add up to more than the space-time degrees of
  freedom ``N L - 1``, L the longest delay line among the listed processors (taps, or
  a sub-band processor's bins; 1 when none has one).
"""
from __future__ import annotations

import math

import numpy as np

from adapt.scene import geometry
from adapt.scene.geometry import angle_between_deg
from adapt.scene.model import Scene, Source
from adapt.streams import wideband

__all__ = ["summarise_scene", "scene_warnings", "check_processor_settings", "main_lobe_contains", "beamwidth_deg",
           "first_null_deg", "conventional_response_db",
           "grating_lobe",
           "angle_between_deg", "describe_waveform", "describe_behaviour"]


def beamwidth_deg(positions: np.ndarray, azimuth_deg: float, elevation_deg: float) -> float:
    """Half-power beamwidth (degrees, azimuth cut at the look elevation) of the uniform
    beam steered to (az, el), any look azimuth; ``nan`` for very small apertures.

    :func:`adapt.scene.geometry.half_power_beamwidth_deg` (which turns the array about z
    so the look azimuth becomes 0) measures the cut, more coarsely for large arrays.
    """
    resolution = 0.005 if len(positions) <= 128 else 0.02
    return geometry.half_power_beamwidth_deg(positions, azimuth_deg, elevation_deg,
                                             resolution_deg=resolution)


def main_lobe_contains(positions: np.ndarray, look: tuple[float, float],
                       direction: tuple[float, float], samples: int = 721) -> bool:
    """True when ``direction`` (az, el) lies inside the main lobe of the uniform beam
    steered to ``look``: the conventional power pattern never rises along the
    great-circle arc from the look direction to ``direction`` (it has passed no null).

    Checkable fact: on a uniform line along x steered broadside, this holds exactly when
    ``|sin az| < 1 / (N d)`` (the first null; antenna handbook).
    """
    pos = np.asarray(positions, float)
    u0 = geometry.direction_vector(*look)
    u1 = geometry.direction_vector(*direction)
    cos_t = float(np.clip(np.dot(u0, u1), -1.0, 1.0))
    theta = math.acos(cos_t)
    if theta < 1e-12:
        return True
    perp = u1 - cos_t * u0
    norm = np.linalg.norm(perp)
    if norm < 1e-12:      # opposite directions: any great circle will do
        trial = np.array([1.0, 0.0, 0.0]) if abs(u0[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
        perp = trial - np.dot(trial, u0) * u0
        norm = np.linalg.norm(perp)
    perp = perp / norm
    t = np.linspace(0.0, theta, samples)
    u = np.cos(t)[:, None] * u0 + np.sin(t)[:, None] * perp           # (S, 3)
    w = np.exp(2j * np.pi * (pos @ u0)) / len(pos)
    p = np.abs(np.exp(2j * np.pi * (u @ pos.T)) @ np.conj(w)) ** 2     # (S,)
    return bool(np.all(np.diff(p) <= 1e-9))


def first_null_deg(positions: np.ndarray, look: tuple[float, float],
                   direction: tuple[float, float], samples: int = 3601) -> float | None:
    """Angle (degrees) from the look direction to the first null of the uniform beam
    steered to ``look``, along the great circle from the look direction through
    ``direction`` (continued to 180 degrees): the first point where the conventional
    power pattern stops falling, refined to 0.05 degrees or better. None when the
    pattern never rises again along that half circle (no null on it).

    Checkable fact: on a uniform line along x steered broadside, along the azimuth cut
    the first null is at ``asin(1 / (N d))`` (antenna handbook).
    """
    pos = np.asarray(positions, float)
    u0 = geometry.direction_vector(*look)
    u1 = geometry.direction_vector(*direction)
    cos_t = float(np.clip(np.dot(u0, u1), -1.0, 1.0))
    perp = u1 - cos_t * u0
    norm = np.linalg.norm(perp)
    if norm < 1e-12:
        trial = np.array([1.0, 0.0, 0.0]) if abs(u0[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
        perp = trial - np.dot(trial, u0) * u0
        norm = np.linalg.norm(perp)
    perp = perp / norm
    w = np.exp(2j * np.pi * (pos @ u0)) / len(pos)
    t = np.linspace(0.0, math.pi, samples)
    u = np.cos(t)[:, None] * u0 + np.sin(t)[:, None] * perp
    p = np.abs(np.exp(2j * np.pi * (u @ pos.T)) @ np.conj(w)) ** 2
    rising = np.flatnonzero(np.diff(p) > 1e-9)
    if rising.size == 0:
        return None
    i = int(rising[0])
    return math.degrees(t[i])


def conventional_response_db(positions: np.ndarray, look: tuple[float, float],
                             direction: tuple[float, float]) -> float:
    """Power response (dB, 0 at the look direction) of the uniform beam steered to
    ``look`` toward ``direction``: ``|a_look^H a / N|^2``."""
    pos = np.asarray(positions, float)
    a0 = np.exp(2j * np.pi * (pos @ geometry.direction_vector(*look)))
    a1 = np.exp(2j * np.pi * (pos @ geometry.direction_vector(*direction)))
    b = abs(np.vdot(a0, a1) / len(pos)) ** 2
    return 10 * math.log10(max(b, 1e-30))


def _uniform_factor(n: int, d: float, delta: np.ndarray) -> np.ndarray:
    """Power pattern of n uniform elements spaced d, at direction-cosine offsets delta
    from the steering direction: ``|sin(pi n d delta) / (n sin(pi d delta))|^2``."""
    x = np.pi * d * np.asarray(delta, float)
    den = n * np.sin(x)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(np.abs(den) > 1e-12, np.sin(n * x) / den, 1.0)
    return np.minimum(f * f, 1.0)


def grating_lobe(scene: Scene, threshold_db: float = -1.0) -> bool:
    """True when the uniform beam steered to the look direction has another lobe within
    ``threshold_db`` of its peak in visible space (directions more than one
    aperture-null width, 1/aperture in direction-cosine space, from the main beam), as in
    :func:`adapt.scene.geometry.has_grating_lobe`.

    Uniform lines and grids are evaluated in direction-cosine space with the closed-form
    uniform pattern (separable for a grid), finely and at any size; rings and custom
    layouts use :func:`adapt.scene.geometry.has_grating_lobe`. Handbook rule for a line:
    lobes at ``u0 + m / d``, free when ``d (1 + |u0|) < 1``.
    """
    arr = scene.array
    st = arr.settings
    u0 = geometry.direction_vector(scene.look_azimuth, scene.look_elevation)
    level = 10.0 ** (threshold_db / 10.0)
    if arr.layout == "line" and st:
        n, d = int(st["elements"]), float(st["spacing"])
        if n < 2:
            return False
        u = np.linspace(-1.0, 1.0, 40001)
        keep = np.abs(u - u0[0]) > 1.0 / ((n - 1) * d)
        return bool(np.any(_uniform_factor(n, d, u[keep] - u0[0]) > level))
    if arr.layout == "grid" and st:
        rows, cols = int(st["rows"]), int(st["columns"])
        if rows * cols < 2:
            return False
        dx, dz = float(st["spacing"]), float(st["row_spacing"])
        u = np.linspace(-1.0, 1.0, 2001)
        fx = _uniform_factor(cols, dx, u - u0[0])
        fz = _uniform_factor(rows, dz, u - u0[2])
        ux, uz = np.meshgrid(u, u, indexing="ij")
        dist = np.hypot(ux - u0[0], uz - u0[2]) if rows > 1 and cols > 1 else (
            np.abs(ux - u0[0]) if rows == 1 else np.abs(uz - u0[2]))
        keep = (ux ** 2 + uz ** 2 <= 1.0) & (dist > 1.0 / arr.aperture)
        return bool(np.any((fx[:, None] * fz[None, :])[keep] > level))
    return arr.elements >= 2 and geometry.has_grating_lobe(
        arr.positions, scene.look_azimuth, scene.look_elevation, threshold_db)


def describe_waveform(src: Source) -> str:
    wf = src.waveform
    if wf.kind == "tone":
        return f"tone {wf.frequency:g} cyc/snap"
    if wf.kind == "chirp":
        return f"chirp {wf.start:g}..{wf.stop:g} / {wf.period}"
    if wf.kind == "copy":
        return (f"copy of {wf.of}" + (f" at {wf.phase_deg:g} deg" if wf.phase_deg else "")
                + (f", {wf.delay:g} snap later" if wf.delay else ""))
    return wf.kind


def describe_behaviour(src: Source) -> str:
    parts = []
    pl = src.pulsing
    if pl is not None:
        text = []
        if pl.period is not None:
            text.append(f"on {pl.on} of every {pl.period}")
        if pl.start:
            text.append(f"from {pl.start}")
        if pl.stop is not None:
            text.append(f"until {pl.stop}")
        parts.append("pulsing: " + (", ".join(text) if text else "always on"))
    mo = src.motion
    if mo is not None and (mo.azimuth_rate or mo.elevation_rate):
        rates = []
        if mo.azimuth_rate:
            rates.append(f"az {mo.azimuth_rate:+g}")
        if mo.elevation_rate:
            rates.append(f"el {mo.elevation_rate:+g}")
        parts.append("moving " + ", ".join(rates) + " deg/snap")
    return "; ".join(parts) if parts else "steady"


def _instants(scene: Scene, count: int = 17) -> np.ndarray:
    return np.unique(np.linspace(0, scene.snapshots - 1, count).round().astype(int))


def scene_warnings(scene: Scene) -> list[str]:
    """Plain-sentence warnings about a scene (see the module docstring)."""
    pos = scene.array.positions
    n = scene.elements
    look = (scene.look_azimuth, scene.look_elevation)
    out: list[str] = []
    if grating_lobe(scene):
        out.append(f"grating lobe: with this element spacing the beam steered to az "
                   f"{look[0]:g}, el {look[1]:g} has a grating lobe in visible space "
                   "(a line is free of them for spacing < 1/(1 + |sin(scan angle)|) "
                   "wavelengths)")
    dof = n - 1
    count = len(scene.interferers)
    if count and count >= dof:
        out.append(f"too many interferers: {count} interferer{'s' if count != 1 else ''} for "
                   f"{dof} degree{'s' if dof != 1 else ''} of freedom ({n} elements - 1); the adaptive processors cannot null "
                   "them all")
    elif count and count >= dof - 1 and n > 2:
        # MDL-based noise floor (Wax & Kailath 1985) of loading=auto needs a noise
        # eigenvalue left over: check and say what is left (common practice)
        out.append(f"interferers close to the array size: {count} interferers on {n} "
                   f"elements leave {dof - count} spare degree(s) of freedom; nulls are "
                   "shallow to small pointing or hardware errors, and loading=auto finds "
                   f"the noise floor only from the {n - count} noise eigenvalue(s) (it "
                   f"needs more than {count} training snapshots, about {2 * n} or more)")
    for src in scene.interferers:
        inside = []
        for k in (_instants(scene) if not src.stationary else [0]):
            az, el = src.direction(k)
            if main_lobe_contains(pos, look, (float(az), float(el))):
                inside.append(int(k))
        if inside:
            az0, el0 = src.direction(inside[0])
            sep = angle_between_deg(look[0], look[1], float(az0), float(el0))
            when = "" if src.stationary else f" (at snapshot {inside[0]})"
            null = first_null_deg(pos, look, (float(az0), float(el0)))
            resp = conventional_response_db(pos, look, (float(az0), float(el0)))
            # nulling one strong interferer leaves the fraction 1 - B of the array gain,
            # B the normalised conventional response toward it (Van Trees 2002, ch. 6)
            cost = -10 * math.log10(max(1.0 - 10 ** (resp / 10), 1e-30))
            at = "" if null is None else f" (at {null:.3g} degrees on that side)"
            out.append(f"interferer in the main lobe: '{src.name}' is {sep:.3g} degrees from "
                       f"the look direction{when}, inside the first null of the "
                       f"conventional beam{at}; the conventional response there is "
                       f"{resp:.1f} dB, so nulling it costs the wanted signal about "
                       f"{cost:.2g} dB of array gain")
    if scene.wideband:
        taps = _longest_delay_line(scene)
        need = sum(wideband.expected_eigenvalues(scene, s) for s in scene.interferers)
        if need > n * taps - 1:
            out.append(f"wideband interference: the interferers need about {need:.3g} "
                       f"degrees of freedom (significant eigenvalues, 1 + 2 x band x "
                       f"delay spread each) and {n} elements x {taps} taps give "
                       f"{n * taps - 1}; add taps or bins")
    d = scene.desired
    ks = [0, scene.snapshots - 1] if not d.stationary else [0]
    worst = 0.0
    for k in ks:
        az, el = d.direction(k)
        worst = max(worst, angle_between_deg(look[0], look[1], float(az), float(el)))
    if worst > 1e-6:
        out.append(f"pointing mismatch: the look direction (az {look[0]:g}, el {look[1]:g}) "
                   f"is {worst:.3g} degrees from the desired source '{d.name}'"
                   + (" (largest over the run)" if len(ks) > 1 else ""))
    out.extend(_array_warnings(scene))
    return out


def _nearest_spacing(positions: np.ndarray) -> float:
    p = np.asarray(positions, float)
    if len(p) < 2:
        return float("inf")
    d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
    return float(d[~np.eye(len(p), dtype=bool)].min())


def _array_warnings(scene: Scene) -> list[str]:
    """Warnings about coherent copies, coupling and noise fields (module docstring)."""
    out: list[str] = []
    d = scene.desired
    copies = [s.name for s in scene.interferers
              if s.waveform.kind == "copy" and s.waveform.of == d.name]
    if copies and scene.training == "signal":
        out.append("coherent copy with signal-present training: " + ", ".join(
            f"'{c}'" for c in copies) + f" repeat(s) the wanted signal '{d.name}' while the "
            "processors train with it present; MVDR-type processors will cancel the wanted "
            "signal (use subarray=M smoothing on a line, or interference-only training)")
    cp = scene.array.coupling
    if cp is not None and not cp.calibrated:
        out.append("uncalibrated coupling: the array's mutual coupling is in the true "
                   "steering but not in the steering the processors assume "
                   "(array.coupling.calibrated: false)")
    nf = scene.noise
    gap = _nearest_spacing(scene.array.positions)
    if nf.diffuse and nf.field != "white" and gap < 0.5:
        out.append(f"superdirective spacing: elements {gap:.3g} wavelengths apart in a "
                   f"{nf.field} noise field; the optimum becomes superdirective, with a "
                   "low white-noise gain that makes it fragile to errors")
    return out


def check_processor_settings(scene: Scene) -> None:
    """Run every listed processor's own scene checks (element minimum, stability bounds
    such as an LMS step against 2/lambda_max, constraint counts) on the scene's first
    trial (``compare`` repeats them over every trial, whose hardware errors differ);
    SpecError located in the scene file."""
    if not scene.processors:
        return
    from adapt.errors import SpecError
    from adapt.processors import Context, parse_specs
    from adapt.processors.base import check_processors
    from adapt.streams.snapshots import TrialBatch
    procs = parse_specs(list(scene.processors))
    try:
        check_processors(procs, Context.from_batch(TrialBatch(scene, trials=1)))
    except SpecError as exc:
        raise exc.at(file=scene.source_file) from None


def _array_lines(scene: Scene) -> list[str]:
    """Summary lines for the element pattern, coupling and noise field (when set)."""
    arr = scene.array
    out = []
    el = arr.element
    if el is not None:
        text = (f"cosine^{el.exponent:g}, back lobe {el.back_db:g} dB" if el.pattern == "cosine"
                else f"table of {len(el.angles_deg)} angles")
        out.append(f"elements:    {text}, facing ({', '.join(f'{c:.3g}' for c in el.normal)})")
    cp = arr.coupling
    if cp is not None:
        kind = "matrix" if cp.matrix is not None else f"{len(cp.coefficients)} coefficient(s)"
        out.append(f"coupling:    {kind}, {'calibrated' if cp.calibrated else 'not calibrated'}")
    nf = scene.noise
    if not nf.plain:
        parts = []
        if nf.diffuse:
            parts.append(f"{nf.field} field {nf.level_db:g} dB over the thermal floor")
        if nf.spread:
            parts.append(f"channel noise spread {nf.element_noise_db_rms:g} dB rms")
        out.append("noise:       " + "; ".join(parts))
    return out


def _longest_delay_line(scene: Scene) -> int:
    """Longest delay line among the listed processors: taps, or a sub-band processor's
    bins (1 when none)."""
    from adapt.processors import parse_specs
    procs = parse_specs(list(scene.processors)) if scene.processors else []
    return max([1] + [int(p.params.get("taps", p.params.get("bins", 1))) for p in procs])


def _wideband_lines(scene: Scene) -> list[str]:
    fb = scene.receiver.fractional_bandwidth
    lines = [f"wideband:    fractional bandwidth {fb if fb is not None else 0:g} (sample rate "
             f"/ carrier); aperture delay spread {wideband.delay_spread(scene):.3g} "
             "snapshots"]
    per = ", ".join(f"{s.name} {wideband.expected_eigenvalues(scene, s):.3g}"
                    for s in scene.interferers)
    lines.append("eigenvalues: expected significant per interferer (1 + 2 band x spread): "
                 + (per or "none"))
    return lines


def _processor_labels(scene: Scene) -> list[str]:
    from adapt.processors import parse_specs
    return [p.label for p in parse_specs(list(scene.processors))]


def _length(value, fmt: str = "g") -> str:
    """A length in wavelengths, singular for exactly 1 ("1 wavelength")."""
    text = format(float(value), fmt)
    return f"{text} wavelength{'' if float(text) == 1 else 's'}"


def summarise_scene(scene: Scene, warnings: list[str] | None = None) -> str:
    """Summary text of a validated scene: array, beam, run, processors, sources table
    and warnings."""
    arr = scene.array
    pos = arr.positions
    n = scene.elements
    st = arr.settings
    if arr.layout == "line":
        shape = f"line of {n} element{'s' if n != 1 else ''}, spacing {_length(st.get('spacing', 0))}"
    elif arr.layout == "grid":
        shape = (f"grid of {st.get('rows')} x {st.get('columns')} = {n} elements, spacing "
                 f"{st.get('spacing', 0):g} (columns) x {st.get('row_spacing', 0):g} (rows) "
                 "wavelengths")
    elif arr.layout == "ring":
        shape = f"ring of {n} element{'s' if n != 1 else ''}, radius {_length(st.get('radius', 0), '.4g')}"
    else:
        shape = f"custom layout of {n} elements"
    look = (scene.look_azimuth, scene.look_elevation)
    bw = beamwidth_deg(pos, *look) if n >= 2 else float("nan")
    bw_text = "n/a (aperture too small)" if not math.isfinite(bw) else f"{bw:.3g} degrees"
    e = arr.errors
    if e.any:
        errors = (f"gain {e.gain_db_rms:g} dB rms, phase {e.phase_deg_rms:g} deg rms, "
                  f"position {_length(e.position_rms)} rms (drawn per trial)")
        if e.channel_delay_rms:
            errors += f"; channel delay {e.channel_delay_rms:g} snapshots rms"
        if e.channel_ripple_rms:
            errors += f"; channel ripple taps {e.channel_ripple_rms:g} rms"
    else:
        errors = "none"
    rx = scene.receiver
    receiver = ("ideal (no ADC model)" if rx.bits is None else
                f"{rx.bits}-bit ADC per rail, full scale {rx.full_scale_db:g} dB over "
                "the noise rms")
    training = {"interference": "interference plus noise only (wanted signal absent)",
                "signal": "data with the wanted signal present (MPDR case)"}[scene.training]
    labels = _processor_labels(scene)
    lines = [
        f"scene:       {scene.name}" + (f"  ({scene.source_file})" if scene.source_file else ""),
        f"array:       {shape}",
        f"aperture:    {_length(arr.aperture, '.4g')}; half-power beamwidth {bw_text} "
        f"at the look direction",
        f"freedom:     {n - 1} degree{'s' if n != 2 else ''} of freedom ({n} element{'s' if n != 1 else ''} - 1)",
        f"look:        az {look[0]:g}, el {look[1]:g} degrees",
        f"errors:      {errors}",
        f"receiver:    {receiver}",
        f"training:    {training}",
        *_array_lines(scene),
        f"run:         {scene.snapshots} snapshot{'s' if scene.snapshots != 1 else ''} x "
        f"{scene.trials} trial{'s' if scene.trials != 1 else ''}, seed {scene.seed}",
        "processors:  " + (", ".join(labels) if labels else "(none listed)"),
        "sources:",
    ]
    if scene.wideband:
        lines[-1:-1] = _wideband_lines(scene)
    header = ("name", "role", "az", "el", "power dB", "waveform", "behaviour")
    rows = [(s.name, s.role, f"{s.azimuth:g}", f"{s.elevation:g}", f"{s.power_db:g}",
             describe_waveform(s), describe_behaviour(s)) for s in scene.sources]
    widths = [max(len(r[i]) for r in [header] + rows) for i in range(len(header))]
    right = {2, 3, 4}
    for r in [header] + rows:
        cells = [c.rjust(w) if i in right else c.ljust(w)
                 for i, (c, w) in enumerate(zip(r, widths))]
        lines.append("  " + "  ".join(cells).rstrip())
    warns = scene_warnings(scene) if warnings is None else warnings
    if warns:
        lines.append("warnings:")
        lines.extend(f"  - {w}" for w in warns)
    else:
        lines.append("warnings:    none")
    return "\n".join(lines)
