"""Reading, validating and writing scene files (YAML).

``load_scene(path)`` reads a file, ``parse_scene(text_or_mapping, file=None)`` parses YAML
text or an already-loaded mapping, ``scene_to_mapping(scene)`` gives the resolved scene
(every default filled in, plain YAML-safe types) that re-parses to an equal scene; it is
also kept in ``Scene.resolved`` (written as ``scene.yaml`` into run folders).

Every problem raises :class:`adapt.errors.SceneError` naming the file, the key path
(``sources[2].power_db``), the bad value and what is allowed; processor specs raise
:class:`adapt.errors.SpecError` located the same way. Loading is YAML *safe* loading
(a :class:`yaml.SafeLoader` subclass): tags that would build Python objects are refused,
duplicate keys are refused, tabs used for indentation are reported as such, numbers
written as ``1e3`` are read as numbers and only ``true``/``false`` are booleans (YAML 1.2
style: ``on``, ``off``, ``yes`` and ``no`` stay text).

Conventions: positions and spacings in wavelengths; angles in degrees, azimuth 0 /
elevation 0 is broadside of a line (+y), azimuth +90 is endfire along +x, elevation +90
is +z (see :mod:`adapt.scene.geometry`); powers in dB relative to the per-element thermal noise
power (noise is unit power per element, so a source's ``power_db`` is its per-element
SNR or INR); time in snapshots.

Scene file keys (``*`` = required)::

    name: text                       default: the file name without extension
    array: *
      layout: line | grid | ring | custom          default line
      elements: count                  line, ring *   (1 .. 1024)
      spacing: wavelengths             line, grid; default 0.5; (0, 10]
      rows: count, columns: count      grid *          (rows x columns <= 1024)
      row_spacing: wavelengths         grid; spacing along z between rows; default spacing
      radius: wavelengths              ring; default: neighbours half a wavelength apart
      positions: [[x, y, z], ...]      custom *; distinct points, |coordinate| <= 1000
      errors:                          per-element errors drawn once per trial (optional)
        gain_db_rms: dB                [0, 6]      default 0
        phase_deg_rms: degrees         [0, 45]     default 0
        position_rms: wavelengths      [0, 0.25]   default 0 (in the array's own plane)
        channel_delay_rms: snapshots   [0, 2]      default 0: each receiver channel's delay
                                         error (channel mismatch), clipped at 4 rms;
                                         makes the scene wideband (see below)
        channel_ripple_rms: 1          [0, 0.3]    default 0: each channel's filter is
                                         [e_-1, 1, e_+1] (complex normal taps of this
                                         rms), a gain and phase ripple across the band
                                         of the sources (the noise stays white);
                                         makes the scene wideband
      element: isotropic | cosine       the element pattern (default isotropic), the same
               or {pattern: cosine, exponent: q, back_db: B, normal: [x, y, z]}
               or {pattern: table, angles_deg: [...], gains_db: [...], normal: [...]}
                                        cosine: power gain cos(theta)^q, q in [0, 20]
                                        (default 1), floored at the back-lobe level B dB
                                        in [-100, 0] (default -30), theta the angle from
                                        the normal; table: power gain in dB ([-100, 30])
                                        on 2 .. 361 increasing angles from 0 to 180
                                        degrees, interpolated in dB; normal: the way the
                                        elements face (default +z for a ring, else +y),
                                        any non-zero vector. Applied to every source and
                                        to the assumed look steering (a source's
                                        power_db is what an isotropic element would
                                        receive; the pattern scales it)
      coupling: [c1, c2, ...]           mutual coupling on the true steering (C a): unit
               or {coefficients: [c1, ...], calibrated: false}
               or {matrix: [[...], ...], calibrated: false}
                                        c_m couples elements m apart (line: banded
                                        symmetric Toeplitz; ring: circulant), at most
                                        N - 1 values, |c| < 1; matrix: N x N, |entry|
                                        <= 10 (any layout); each value a number or
                                        [re, im]; calibrated (default false): the assumed
                                        look steering includes C too. Wideband scenes:
                                        C mixes the element outputs (each source after
                                        its delays and channel filters; not the noise)
    sources: *                         a list; exactly one has role desired
      - name: text *                   unique, non-empty
        role: desired | interferer *
        azimuth: degrees *             [-180, 180]
        elevation: degrees             [-90, 90]   default 0
        power_db: dB *                 per-element power over noise, [-100, 150]; and
                                         elements x the sum of all sources' linear powers
                                         at most 140 dB (double precision's reach)
        waveform: gaussian | bpsk | qpsk | tone | chirp   (default gaussian)
                  or {kind: tone, frequency: f}              f in [-0.5, 0.5] cycles/snapshot
                  or {kind: chirp, start: f0, stop: f1, period: P}
                                         f0, f1 in [-0.5, 0.5]; P >= 2 snapshots
                                         (defaults -0.25, 0.25, 1024)
                  or {kind: copy, of: NAME, phase_deg: P, delay: D}
                                         a coherent copy of source NAME's waveform,
                                         scaled to this source's power_db, gated by its
                                         own pulsing, rotated by P degrees ([-360, 360],
                                         default 0) and, in wideband scenes only,
                                         delayed by D snapshots ([-100000, 100000],
                                         fractions too, default 0); NAME must be
                                         another source that is not itself a copy;
                                         only interferers may be copies (multipath of
                                         the wanted signal, a repeater); a copy takes
                                         no bandwidth or offset of its own (NAME's
                                         band); scored by README's convention
        pulsing: {start: k0, stop: k1, period: P, on: M}   all optional integers:
                 on at snapshot k when k0 <= k < k1 and (k - k0) mod P < M;
                 k0 >= 0 (default 0), k1 > k0 (default never off), P >= 1 and
                 1 <= M <= P given together
        motion: {azimuth_rate: r, elevation_rate: r}   degrees per snapshot, [-1, 1];
                 the elevation must stay within [-90, 90] over the run (in wideband
                 scenes every element's delay follows the motion snapshot by snapshot)
        bandwidth: fraction of the sample rate   [0.01, 1]  noise-like waveforms only;
                 a flat band (default: white over the sampled band, 1)
        offset: fraction of the sample rate      [-0.5, 0.5] the band's centre, default 0;
                 |offset| + bandwidth/2 <= 0.5
    look: {azimuth: deg, elevation: deg}   the direction the processors assume;
                                           default: the desired source's direction
    training: interference | signal     what the adaptive processors train on: the
                                        interference plus noise alone (default) or the
                                        data with the wanted signal present (MPDR case)
    noise:                              optional; without it: unit white thermal noise
      field: white | isotropic | cylindrical   default white; diffuse noise with
                                        coherence sin(kd)/(kd) (isotropic) or J0(kd)
                                        (cylindrical: the x-y plane), k = 2 pi per
                                        wavelength, added to the thermal floor
      level_db: dB                      diffuse power per element over the thermal
                                        floor, [-100, 100]; required for isotropic
                                        and cylindrical; with white: extra white noise.
                                        Wideband scenes: isotropic and cylindrical
                                        fields are dispersive (coherence at (1 + f B)
                                        times the separations at frequency f), white
                                        noise stays white in time
      element_noise_db_rms: dB rms      each channel's thermal noise power drawn per
                                        trial (Gaussian in dB, median 1), [0, 10],
                                        default 0
    receiver: {bits: b, full_scale_db: dB}  optional ADC per I and Q rail: b in 1 .. 24
                                        (null: none), clip level dB over the noise rms
                                        per element, [-20, 160], default 40
              fractional_bandwidth: B   complex sample rate over the carrier frequency,
                                        (0, 1]; absent: the narrowband model. A plane
                                        wave from u reaches element n delayed by
                                        p_n.u / f_c: at baseband frequency f (cycles
                                        per snapshot) its phase is 2 pi p_n.u (1 + f B)
                                        (adapt.streams.wideband). A scene with B, a
                                        source band or a channel delay error is wideband.
    snapshots: count                    1 .. 1,000,000,000   default 1024
    trials: count                       1 .. 1,000,000       default 100
    seed: integer                       0 .. 2**63 - 1       default 0
    processors: list of specs           strings ("smi loading_db=10") or mappings
                                        ({method: smi, loading_db: 10}); validated by
                                        :func:`adapt.processors.parse_specs`; default none
    sweep:                              optional design study run by ``adapt sweep``
      vary: [KEY=VALUES, ...]           one or two axes (see adapt.studies.sweep), e.g.
                                        "sources[jam-1].azimuth=0:20:1"
      target_loss_db: dB                (0, 100]; default 3

Checkable facts (tested in tests/test_scenefile.py): every example scene loads, and
``parse_scene(scene_to_mapping(s))`` gives back ``s`` (same resolved mapping and
positions).
"""
from __future__ import annotations

import math
import os
import re
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from adapt.errors import InputError, SceneError, SpecError, did_you_mean
from adapt.scene import elements, geometry
from adapt.scene.model import (
    COPY,
    LAYOUTS,
    NOISE_FIELDS,
    ROLES,
    TRAINING,
    WAVEFORMS,
    ArrayLayout,
    HardwareErrors,
    Motion,
    NoiseField,
    Pulsing,
    Receiver,
    Scene,
    Source,
    Waveform,
)

__all__ = ["load_scene", "parse_scene", "scene_to_mapping", "dump_scene", "read_yaml",
           "SceneLoader", "MAX_FILE_BYTES", "MAX_YAML_NODES", "MAX_YAML_DEPTH"]

#: scene files larger than this are refused (a scene is a page of YAML)
MAX_FILE_BYTES = 4 * 1024 * 1024
#: YAML values (scalars, lists, mappings) one document may hold, every use of an alias
#: counted with the whole value it stands for: refuses alias bombs ("billion laughs")
#: before anything walks or prints the data (a 1024-element custom array is ~5,000)
MAX_YAML_NODES = 50_000
#: strongest covariance eigenvalue over the noise, bounded by elements x total source
#: power: beyond it double precision cannot resolve the noise floor (scenes refused)
MAX_DYNAMIC_RANGE_DB = 140.0
#: deepest nesting of lists and mappings (a valid scene needs 5)
MAX_YAML_DEPTH = 64
#: longest integer literal, in characters (a valid scene needs 19 for the seed)
MAX_INTEGER_DIGITS = 1000

_MAX_ELEMENTS = 1024
#: smallest distance of an element from the array's centre, wavelengths (below it the
#: aperture underflows: beamwidths divide by it)
_MIN_APERTURE = 1e-6
_MAX_SOURCES = 256
#: largest |delay| of a coherent copy, snapshots (beyond a few filter lengths a delayed
#: copy is uncorrelated with its origin anyway)
MAX_COPY_DELAY = 100_000


# --------------------------------------------------------------------------- YAML
class SceneLoader(yaml.SafeLoader):
    """Safe YAML loader that refuses duplicate keys and reads ``1e3`` as a number.

    Hostile documents are refused while composing, before any value is built: nesting
    deeper than :data:`MAX_YAML_DEPTH`, more than :data:`MAX_YAML_NODES` values with
    every alias counted as the whole value it repeats (an alias bomb), an alias used
    inside its own anchor (a recursive structure), and integer literals longer than
    :data:`MAX_INTEGER_DIGITS` characters.
    """

    def compose_node(self, parent, index):
        depth = getattr(self, "_depth", 0) + 1
        self._count = getattr(self, "_count", 0) + 1
        if depth > MAX_YAML_DEPTH:
            raise yaml.composer.ComposerError(
                None, None, f"lists and mappings nested more than {MAX_YAML_DEPTH} deep",
                self.peek_event().start_mark)
        if self._count > MAX_YAML_NODES:
            raise yaml.composer.ComposerError(
                None, None, f"more than {MAX_YAML_NODES:,} values in one document",
                self.peek_event().start_mark)
        self._depth = depth
        try:
            return super().compose_node(parent, index)
        finally:
            self._depth = depth - 1

    def get_single_node(self):
        node = super().get_single_node()
        if node is not None:
            _check_expansion(node)
        return node

    def construct_yaml_int(self, node):
        text = str(node.value)
        if len(text) > MAX_INTEGER_DIGITS:
            raise yaml.constructor.ConstructorError(
                None, None, f"an integer written with {len(text):,} characters is too long "
                f"(at most {MAX_INTEGER_DIGITS})", node.start_mark)
        return super().construct_yaml_int(node)

    def construct_mapping(self, node, deep=False):
        if isinstance(node, yaml.MappingNode):
            seen: dict = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    hash(key)
                except TypeError:
                    raise yaml.constructor.ConstructorError(
                        "while constructing a mapping", node.start_mark,
                        "found an unusable (list or mapping) key", key_node.start_mark) from None
                if key in seen:
                    raise _DuplicateKey(key, key_node.start_mark, seen[key])
                seen[key] = key_node.start_mark
        return super().construct_mapping(node, deep=deep)


SceneLoader.add_constructor("tag:yaml.org,2002:int", SceneLoader.construct_yaml_int)


def _check_expansion(root) -> None:
    """Refuse a composed YAML graph whose alias-expanded size exceeds
    :data:`MAX_YAML_NODES` or that contains itself (a recursive alias). Shared nodes are
    sized once (memoised), so the check costs the number of distinct nodes."""
    sizes: dict[int, int] = {}
    active: set[int] = set()

    def size(node) -> int:
        key = id(node)
        if key in sizes:
            return sizes[key]
        if key in active:
            raise yaml.composer.ComposerError(
                None, None, "an alias refers to a value that contains it (a recursive "
                "structure)", node.start_mark)
        total = 1
        if isinstance(node, (yaml.SequenceNode, yaml.MappingNode)):
            active.add(key)
            children = (node.value if isinstance(node, yaml.SequenceNode)
                        else [n for pair in node.value for n in pair])
            for child in children:
                total += size(child)
                if total > MAX_YAML_NODES:
                    raise yaml.composer.ComposerError(
                        None, None, f"more than {MAX_YAML_NODES:,} values once aliases "
                        "are expanded (an alias bomb?)", node.start_mark)
            active.discard(key)
        sizes[key] = total
        return total

    size(root)


class _DuplicateKey(Exception):
    def __init__(self, key, mark, first_mark):
        super().__init__(key)
        self.key, self.mark, self.first_mark = key, mark, first_mark


# YAML 1.2 booleans: only true/false (YAML 1.1 also reads yes/no/on/off as booleans,
# which would turn the pulsing key "on" into True)
SceneLoader.yaml_implicit_resolvers = {
    first: [(tag, rx) for tag, rx in resolvers if tag != "tag:yaml.org,2002:bool"]
    for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()}
SceneLoader.add_implicit_resolver(
    "tag:yaml.org,2002:bool", re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"),
    list("tTfF"))
# Numbers by YAML 1.2 core-schema resolution (PyYAML resolves YAML 1.1): integers are
# decimal, 0o octal or 0x hexadecimal; floats include 1e3 and -2.5E-4. The YAML 1.1-only
# forms, read differently by different YAML tools, are kept as text marked ambiguous:
# sexagesimal 1:30 (90 in YAML 1.1), a leading zero 010 (octal 8 in YAML 1.1, 10 in
# YAML 1.2), 0b binary and digits grouped with underscores. Where a number is expected
# they are refused with a message saying how to write it; where text is expected they
# are the text as written (as YAML 1.2 reads them).
_AMBIGUOUS_TAG = "tag:adapt,2026:yaml11-number"


class AmbiguousNumber(str):
    """A scalar that YAML 1.1 reads as a number and YAML 1.2 as text (or as another
    number): ``1:30``, ``010``, ``0b101``, ``1_000``."""

    def meaning(self) -> str:
        """How YAML 1.1 and YAML 1.2 read it (with the YAML 1.1 value where one exists)."""
        text = str(self)
        sign = -1 if text.startswith("-") else 1
        body = text.lstrip("+-").replace("_", "")
        try:
            if ":" in body:
                value = 0.0
                for part in body.split(":"):
                    value = value * 60 + float(part)
                return (f"YAML 1.1 reads it as {sign * value:g} (base 60), YAML 1.2 as "
                        "the text")
            if "_" in text:
                return f"YAML 1.1 reads it as {sign * float(body):g}, YAML 1.2 as the text"
            if body.lower().startswith("0b"):
                return (f"YAML 1.1 reads it as {sign * int(body[2:], 2)} (binary), YAML 1.2 "
                        "as the text")
            if set(body) <= set("01234567"):
                return (f"YAML 1.1 reads it as {sign * int(body, 8)} (octal), YAML 1.2 as "
                        f"{sign * int(body, 10)}")
        except ValueError:
            pass
        return "YAML 1.1 and YAML 1.2 read it differently"


SceneLoader.add_constructor(_AMBIGUOUS_TAG,
                            lambda loader, node: AmbiguousNumber(loader.construct_scalar(node)))
SceneLoader.yaml_implicit_resolvers = {
    first: [(tag, rx) for tag, rx in resolvers
            if tag not in ("tag:yaml.org,2002:int", "tag:yaml.org,2002:float")]
    for first, resolvers in SceneLoader.yaml_implicit_resolvers.items()}
# (the ambiguous forms first: resolvers are tried in order)
SceneLoader.add_implicit_resolver(
    _AMBIGUOUS_TAG,
    re.compile(r"^(?:[-+]?[0-9][0-9_]*(?::[0-5]?[0-9])+(?:\.[0-9_]*)?"   # 1:30, 1:30:00.5
               r"|[-+]?0[0-9_]+(?:\.[0-9_]*)?(?:[eE][-+]?[0-9]+)?"        # 010 (not 0.5)
               r"|[-+]?0b[0-1_]+"                                       # 0b101
               r"|[-+]?[0-9]+_[0-9_]*(?:\.[0-9_]*)?(?:[eE][-+]?[0-9]+)?"      # 1_000
               r"|[-+]?[0-9]*\.[0-9]*_[0-9_]*(?:[eE][-+]?[0-9]+)?)$"),   # 1.000_5
    list("-+.0123456789"))
SceneLoader.add_implicit_resolver(
    "tag:yaml.org,2002:int",
    re.compile(r"^(?:[-+]?(?:0|[1-9][0-9]*)|0o[0-7]+|0x[0-9a-fA-F]+)$"),
    list("-+0123456789"))
SceneLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^(?:[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?"
               r"|[-+]?\.(?:inf|Inf|INF)|\.(?:nan|NaN|NAN))$"),
    list("-+.0123456789"))


def _tab_line(text: str) -> int | None:
    for number, line in enumerate(text.splitlines(), 1):
        stripped = line.lstrip(" \t")
        indent = line[: len(line) - len(stripped)]
        if "\t" in indent and stripped:
            return number
    return None


def read_yaml(text: str, file: str | None = None) -> Any:
    """Parse YAML text with :class:`SceneLoader`; SceneError for every YAML problem."""
    try:
        return yaml.load(text, Loader=SceneLoader)  # noqa: S506 - SafeLoader subclass
    except _DuplicateKey as exc:
        raise SceneError(
            f"key '{exc.key}' appears twice in one mapping (line {exc.first_mark.line + 1} "
            f"and line {exc.mark.line + 1}); keep one", file=file) from None
    except yaml.constructor.ConstructorError as exc:
        problem = exc.problem or "cannot construct"
        tag = re.search(r"tag '([^']*)'", problem)
        where = _mark_text(exc.problem_mark)
        if tag:
            raise SceneError(
                f"YAML tag '{tag.group(1)}'{where} is refused: scene files are plain data "
                "(safe loading does not build Python objects)", file=file,
                allowed="plain mappings, lists, text and numbers") from None
        raise SceneError(f"YAML problem{where}: {problem}", file=file) from None
    except yaml.reader.ReaderError as exc:
        pos = max(0, min(int(exc.position), len(text)))
        line = text.count("\n", 0, pos) + 1
        raise SceneError(f"YAML syntax error at line {line} (character {pos + 1}): "
                         f"{exc.reason} (character {_char(exc.character)})", file=file,
                         allowed="printable text, tabs and line breaks") from None
    except yaml.composer.ComposerError as exc:
        if exc.context is None and exc.problem and ("nested" in exc.problem or "values" in exc.problem
                                                    or "recursive" in exc.problem):
            raise SceneError(f"YAML refused{_mark_text(exc.problem_mark)}: {exc.problem}",
                             file=file, allowed=f"a scene of at most {MAX_YAML_NODES:,} values, "
                             f"nested at most {MAX_YAML_DEPTH} deep, aliases not repeating "
                             "themselves") from None
        raise SceneError(f"YAML syntax error{_mark_text(exc.problem_mark)}: {exc.problem}"
                         + (f" ({exc.context})" if exc.context else ""), file=file) from None
    except yaml.YAMLError as exc:
        tab = _tab_line(text)
        if tab is not None:
            raise SceneError(f"tab character used for indentation on line {tab}; "
                             "YAML indents with spaces only", file=file) from None
        mark = getattr(exc, "problem_mark", None)
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        context = getattr(exc, "context", None)
        text_ = f"YAML syntax error{_mark_text(mark)}: {problem}"
        if context:
            text_ += f" ({context})"
        raise SceneError(text_, file=file) from None
    except RecursionError:
        raise SceneError("YAML nesting too deep", file=file) from None


def _char(c) -> str:
    return f"#x{c:04x}" if isinstance(c, int) else repr(c)


def _mark_text(mark) -> str:
    if mark is None:
        return ""
    return f" at line {mark.line + 1}, column {mark.column + 1}"


# --------------------------------------------------------------------------- entry points
def load_scene(path) -> Scene:
    """Read and validate a scene file; SceneError/SpecError on any problem."""
    if not isinstance(path, (str, os.PathLike)):
        raise SceneError("expected the path of a scene file", value=type(path).__name__,
                         allowed="the path of a YAML scene file, e.g. scenes/single_jammer.yaml")
    p = Path(path)
    name = str(path)
    if not p.exists():
        raise SceneError("no such scene file", file=name,
                         allowed="the path of a YAML scene file, e.g. scenes/single_jammer.yaml")
    if p.is_dir():
        raise SceneError("is a directory, not a scene file", file=name,
                         allowed="the path of a YAML scene file")
    try:
        size = p.stat().st_size
        if size > MAX_FILE_BYTES:
            raise SceneError(f"file is {size} bytes; a scene file is at most "
                             f"{MAX_FILE_BYTES} bytes", file=name)
        raw = p.read_bytes()
    except OSError as exc:
        raise SceneError(f"cannot read the file: {exc.strerror or exc}", file=name) from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise SceneError(f"not UTF-8 text: byte 0x{raw[exc.start]:02x} at offset "
                         f"{exc.start} (line {line}) cannot be decoded", file=name,
                         allowed="a UTF-8 (or plain ASCII) YAML file") from None
    return parse_scene(text, file=name, _stem=p.stem)


def parse_scene(mapping_or_text, file: str | None = None, *, _stem: str | None = None) -> Scene:
    """Build a validated :class:`Scene` from YAML text (str or bytes) or a mapping.

    ``file`` only locates error messages (and gives the default name).
    """
    if isinstance(mapping_or_text, bytes):
        try:
            mapping_or_text = mapping_or_text.decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise SceneError(f"not UTF-8 text (byte offset {exc.start})", file=file,
                             allowed="a UTF-8 (or plain ASCII) YAML file") from None
    if isinstance(mapping_or_text, str):
        if len(mapping_or_text) > MAX_FILE_BYTES:
            raise SceneError(f"the scene text is {len(mapping_or_text)} characters; a scene "
                             f"is at most {MAX_FILE_BYTES} bytes", file=file)
        data = read_yaml(mapping_or_text, file)
    else:
        data = mapping_or_text
    if data is None:
        raise SceneError("the scene is empty", file=file,
                         allowed="a YAML mapping with at least 'array' and 'sources'")
    if not isinstance(data, dict):
        kind = "a list" if isinstance(data, list) else f"a single value ({type(data).__name__})"
        raise SceneError(f"a scene must be a YAML mapping of keys, not {kind}", file=file,
                         value=data, allowed="keys " + ", ".join(_TOP_KEYS))
    stem = _stem if _stem is not None else (Path(file).stem if file else "scene")
    reader = _Reader(file)
    try:
        scene = reader.scene(data, stem)
    except SpecError as exc:
        raise exc.at(file=file) from None
    object.__setattr__(scene, "resolved", scene_to_mapping(scene))
    return scene


# --------------------------------------------------------------------------- validation
_TOP_KEYS = ("name", "array", "sources", "look", "training", "receiver", "snapshots",
             "trials", "seed", "processors", "noise", "sweep")
_NOISE_KEYS = ("field", "level_db", "element_noise_db_rms")
_SWEEP_KEYS = ("vary", "target_loss_db")
_ARRAY_KEYS = {
    "line": ("layout", "elements", "spacing", "errors"),
    "grid": ("layout", "rows", "columns", "spacing", "row_spacing", "errors"),
    "ring": ("layout", "elements", "radius", "errors"),
    "custom": ("layout", "positions", "errors"),
}
_ARRAY_KEYS = {layout: keys + ("element", "coupling") for layout, keys in _ARRAY_KEYS.items()}
_ALL_ARRAY_KEYS = tuple(dict.fromkeys(k for keys in _ARRAY_KEYS.values() for k in keys))
_ELEMENT_KEYS = {"isotropic": ("pattern",),
                 "cosine": ("pattern", "exponent", "back_db", "normal"),
                 "table": ("pattern", "angles_deg", "gains_db", "normal")}
_COUPLING_KEYS = ("coefficients", "matrix", "calibrated")
_ERROR_KEYS = ("gain_db_rms", "phase_deg_rms", "position_rms", "channel_delay_rms",
               "channel_ripple_rms")
_SOURCE_KEYS = ("name", "role", "azimuth", "elevation", "power_db", "waveform", "pulsing",
                "motion", "bandwidth", "offset")
_WAVEFORM_KEYS = {
    "gaussian": ("kind",), "bpsk": ("kind",), "qpsk": ("kind",),
    "tone": ("kind", "frequency"), "chirp": ("kind", "start", "stop", "period"),
    COPY: ("kind", "of", "phase_deg", "delay"),
}
_PULSING_KEYS = ("start", "stop", "period", "on")
_MOTION_KEYS = ("azimuth_rate", "elevation_rate")
_LOOK_KEYS = ("azimuth", "elevation")
_RECEIVER_KEYS = ("bits", "full_scale_db", "fractional_bandwidth")


def _join(path: str, key) -> str:
    if isinstance(key, int):
        return f"{path}[{key}]"
    return f"{path}.{key}" if path else str(key)


class _Reader:
    def __init__(self, file: str | None):
        self.file = file

    def error(self, message, path, value=InputError._NOVALUE, allowed=None) -> SceneError:
        return SceneError(message, file=self.file, path=path or None, value=value,
                          allowed=allowed)

    # -- generic pieces -------------------------------------------------------
    def mapping(self, value, path, keys, required=(), what="a mapping") -> dict:
        if not isinstance(value, dict):
            raise self.error(f"expected {what}", path, value,
                             "keys " + ", ".join(keys))
        for key in value:
            if not isinstance(key, str):
                raise self.error("keys must be text", path, key, ", ".join(keys))
            if key not in keys:
                raise self.error(f"unknown key '{key}'" + did_you_mean(key, keys),
                                 _join(path, key), allowed=", ".join(keys))
        for key in required:
            if key not in value:
                raise self.error(f"required key '{key}' is missing", path,
                                 allowed=", ".join(keys))
        return value

    def number(self, value, path, low=None, high=None, *, low_open=False,
               high_open=False, integer=False, unit="") -> float | int:
        lo = "(" if low_open else "["
        hi = ")" if high_open else "]"
        rng = f"{lo}{'-inf' if low is None else f'{low:g}'}, " \
              f"{'inf' if high is None else f'{high:g}'}{hi}"
        allowed = f"{'an integer' if integer else 'a number'} in {rng}" + (f" {unit}" if unit else "")
        if isinstance(value, bool):
            raise self.error("expected a number, not true/false", path, value, allowed)
        if isinstance(value, AmbiguousNumber):
            raise self.error(f"'{value}' is ambiguous: {value.meaning()}; write the "
                             "number you mean in plain decimal digits",
                             path, str(value), allowed)
        if isinstance(value, (int, np.integer)):
            number = int(value)
        elif isinstance(value, (float, np.floating)):
            number = float(value)
            if not math.isfinite(number):
                raise self.error("must be a finite number", path, value, allowed)
            if integer:
                if number != int(number):
                    raise self.error("expected a whole number", path, value, allowed)
                number = int(number)
        else:
            raise self.error("expected a number", path, value, allowed)
        if (low is not None and (number < low or (low_open and number == low))) or \
                (high is not None and (number > high or (high_open and number == high))):
            raise self.error("out of range", path, value, allowed)
        return int(number) if integer else float(number)

    def count(self, value, path, high, low=1) -> int:
        return self.number(value, path, low, high, integer=True)

    def text(self, value, path, what="non-empty text") -> str:
        if not isinstance(value, str) or not value.strip() or len(value) > 200:
            raise self.error(f"expected {what}", path, value,
                             "text of 1 to 200 characters")
        self.printable(value, path)
        return str(value)

    def printable(self, value, path) -> None:
        """Refuse control and other unprintable characters (escape sequences such as
        ``"\\e[2J"`` after YAML's escape processing, lone surrogates such as
        ``"\\ud800"``) in text that is printed or written to files, found in ``value``
        or anywhere inside a list or mapping (each shared list or mapping walked once,
        so the walk is bounded by the distinct values)."""
        seen: set[int] = set()
        todo = [(value, path)]
        while todo:
            item, where = todo.pop()
            if isinstance(item, str):
                if not item.isprintable():
                    bad = next(c for c in item if not c.isprintable())
                    raise self.error(f"text holds the unprintable character U+{ord(bad):04X} "
                                     "(control characters and escape sequences are refused)",
                                     where, item, "printable text")
            elif isinstance(item, (dict, list, tuple)):
                if id(item) in seen:
                    continue
                seen.add(id(item))
                if isinstance(item, dict):
                    for k, v in item.items():
                        todo.append((k, where))
                        todo.append((v, _join(where, k) if isinstance(k, str) else where))
                else:
                    todo.extend((v, _join(where, i)) for i, v in enumerate(item))

    def choice(self, value, path, choices) -> str:
        if not isinstance(value, str) or value not in choices:
            hint = did_you_mean(value, choices) if isinstance(value, str) else ""
            raise self.error("unknown choice" + hint, path, value, " | ".join(choices))
        return value

    # -- sections -------------------------------------------------------------
    def scene(self, data: dict, stem: str) -> Scene:
        self.mapping(data, "", _TOP_KEYS, required=("array", "sources"), what="a mapping")
        name = self.text(data["name"], "name") if "name" in data else stem
        array = self.array(data["array"], "array")
        sources = self.sources(data["sources"], "sources")
        snapshots = self.count(data.get("snapshots", 1024), "snapshots", 1_000_000_000)
        trials = self.count(data.get("trials", 100), "trials", 1_000_000)
        seed = self.number(data.get("seed", 0), "seed", 0, 2 ** 63 - 1, integer=True)
        for i, src in enumerate(sources):
            self.motion_bounds(src, snapshots, f"sources[{i}].motion")
        self.dynamic_range(array, sources)
        desired = next(s for s in sources if s.role == "desired")
        if "look" in data:
            look = self.mapping(data["look"], "look", _LOOK_KEYS, required=("azimuth",))
            look_az = self.number(look["azimuth"], "look.azimuth", -180, 180, unit="degrees")
            look_el = self.number(look.get("elevation", 0.0), "look.elevation", -90, 90,
                                  unit="degrees")
        else:
            look_az, look_el = float(desired.azimuth), float(desired.elevation)
        training = self.choice(data.get("training", "interference"), "training", TRAINING)
        receiver = self.receiver(data.get("receiver"), "receiver")
        noise = self.noise(data.get("noise"), "noise", array)
        processors = self.processors(data.get("processors", []), "processors")
        wideband = (receiver.fractional_bandwidth is not None or array.errors.channel_delay_rms
                    or array.errors.channel_ripple_rms
                    or any(s.bandwidth is not None for s in sources))
        for i, src in enumerate(sources):
            if not wideband and src.waveform.kind == COPY and src.waveform.delay:
                raise self.error("a copy's delay needs the wideband model",
                                 f"sources[{i}].waveform.delay", src.waveform.delay,
                                 "0 in a narrowband scene (add receiver.fractional_bandwidth "
                                 "for a delayed copy)")
        vary, target = self.sweep(data.get("sweep"), "sweep")
        return Scene(name=name, array=array, sources=sources, look_azimuth=look_az,
                     look_elevation=look_el, training=training, receiver=receiver, noise=noise,
                     snapshots=snapshots, trials=trials, seed=seed, processors=processors,
                     source_file=self.file, sweep_vary=vary, sweep_target_db=target)

    def sweep(self, value, path) -> tuple[tuple, float | None]:
        """The ``sweep:`` section: its axes are checked against the scene when the
        study runs (adapt.studies.sweep); here only their form."""
        if value is None:
            return (), None
        self.mapping(value, path, _SWEEP_KEYS, required=("vary",))
        vary = value["vary"]
        if isinstance(vary, str):
            vary = [vary]
        if not isinstance(vary, list) or not 1 <= len(vary) <= 2:
            raise self.error("expected a list of one or two KEY=VALUES texts",
                             _join(path, "vary"), vary,
                             "e.g. ['sources[jam-1].azimuth=0:20:1']")
        for i, item in enumerate(vary):
            if not isinstance(item, str) or "=" not in item or len(item) > 200:
                raise self.error("expected KEY=VALUES", f"{_join(path, 'vary')}[{i}]", item,
                                 "e.g. 'smi.loading_db=0:20:2'")
        target = None
        if "target_loss_db" in value:
            target = self.number(value["target_loss_db"], _join(path, "target_loss_db"),
                                 0, 100, low_open=True, unit="dB")
        return tuple(vary), target

    def array(self, value, path) -> ArrayLayout:
        self.mapping(value, path, _ALL_ARRAY_KEYS)
        layout = self.choice(value.get("layout", "line"), _join(path, "layout"), LAYOUTS)
        keys = _ARRAY_KEYS[layout]
        for key in value:
            if key not in keys:
                raise self.error(f"key '{key}' does not apply to a {layout} array",
                                 _join(path, key), allowed=", ".join(keys))
        p = lambda key: _join(path, key)  # noqa: E731
        settings: dict = {}
        if layout == "line":
            if "elements" not in value:
                raise self.error("required key 'elements' is missing", path,
                                 allowed=", ".join(keys))
            n = self.count(value["elements"], p("elements"), _MAX_ELEMENTS)
            d = self.number(value.get("spacing", 0.5), p("spacing"), 0, 10, low_open=True,
                            unit="wavelengths")
            settings = {"elements": n, "spacing": d}
            positions = geometry.line_positions(n, d)
        elif layout == "grid":
            for key in ("rows", "columns"):
                if key not in value:
                    raise self.error(f"required key '{key}' is missing", path,
                                     allowed=", ".join(keys))
            rows = self.count(value["rows"], p("rows"), _MAX_ELEMENTS)
            cols = self.count(value["columns"], p("columns"), _MAX_ELEMENTS)
            if rows * cols > _MAX_ELEMENTS:
                raise self.error(f"{rows} x {cols} = {rows * cols} elements is too many",
                                 p("rows"), allowed=f"rows x columns <= {_MAX_ELEMENTS}")
            d = self.number(value.get("spacing", 0.5), p("spacing"), 0, 10, low_open=True,
                            unit="wavelengths")
            dz = self.number(value.get("row_spacing", d), p("row_spacing"), 0, 10,
                             low_open=True, unit="wavelengths")
            settings = {"rows": rows, "columns": cols, "spacing": d, "row_spacing": dz}
            positions = geometry.grid_positions(rows, cols, d, dz)
        elif layout == "ring":
            if "elements" not in value:
                raise self.error("required key 'elements' is missing", path,
                                 allowed=", ".join(keys))
            n = self.count(value["elements"], p("elements"), _MAX_ELEMENTS)
            default_r = 0.25 / math.sin(math.pi / n) if n >= 2 else 0.5
            r = self.number(value.get("radius", default_r), p("radius"), 0, 100,
                            low_open=True, unit="wavelengths")
            settings = {"elements": n, "radius": r}
            positions = geometry.ring_positions(n, r)
        else:
            if "positions" not in value:
                raise self.error("required key 'positions' is missing", path,
                                 allowed=", ".join(keys))
            positions = self.positions(value["positions"], p("positions"))
            settings = {"positions": positions.tolist()}
        if len(positions) >= 2:
            extent = float(np.max(np.linalg.norm(positions - positions.mean(axis=0), axis=1)))
            if not extent >= _MIN_APERTURE:
                key = {"line": "spacing", "grid": "spacing", "ring": "radius"}.get(
                    layout, "positions")
                raise self.error(f"the elements span {extent:.3g} wavelengths: too small an "
                                 "array to steer (beamwidths and nulls are undefined)",
                                 p(key), allowed=f"elements spread over at least "
                                 f"{_MIN_APERTURE:g} wavelengths")
        errors = self.hardware(value.get("errors"), p("errors"))
        element = self.element(value.get("element"), p("element"), layout)
        coupling = self.coupling(value.get("coupling"), p("coupling"), layout, len(positions))
        return ArrayLayout(layout=layout, positions=positions, errors=errors,
                           settings=settings, element=element, coupling=coupling)

    def element(self, value, path, layout) -> elements.ElementPattern | None:
        if value is None:
            return None
        if isinstance(value, str):
            value = {"pattern": value}
        if not isinstance(value, dict):
            raise self.error("expected a pattern name or a mapping with 'pattern'", path,
                             value, " | ".join(elements.PATTERNS))
        kind = self.choice(value.get("pattern", "isotropic"), _join(path, "pattern"),
                           elements.PATTERNS)
        self.mapping(value, path, _ELEMENT_KEYS[kind])
        p = lambda key: _join(path, key)  # noqa: E731
        if kind == "isotropic":
            return None
        normal = elements.default_normal(layout)
        if "normal" in value:
            v = value["normal"]
            if not isinstance(v, list) or len(v) != 3:
                raise self.error("expected [x, y, z]", p("normal"), v, "a non-zero vector")
            vec = np.array([self.number(c, _join(p("normal"), j), -1000, 1000)
                            for j, c in enumerate(v)])
            if not np.linalg.norm(vec) > 0:
                raise self.error("the normal must not be zero", p("normal"), v,
                                 "a non-zero vector")
            normal = tuple(float(c) for c in vec / np.linalg.norm(vec))
        if kind == "cosine":
            return elements.ElementPattern(
                pattern=kind, normal=normal,
                exponent=self.number(value.get("exponent", 1.0), p("exponent"), 0, 20),
                back_db=self.number(value.get("back_db", -30.0), p("back_db"), -100, 0,
                                    unit="dB"))
        for key in ("angles_deg", "gains_db"):
            if key not in value:
                raise self.error(f"required key '{key}' is missing", path,
                                 allowed=", ".join(_ELEMENT_KEYS[kind]))
        ang, gain = value["angles_deg"], value["gains_db"]
        if not isinstance(ang, list) or not 2 <= len(ang) <= 361:
            raise self.error("expected a list of 2 to 361 angles", p("angles_deg"), ang,
                             "increasing angles from 0 to 180 degrees")
        if not isinstance(gain, list) or len(gain) != len(ang):
            raise self.error(f"expected a list of {len(ang)} gains (one per angle)",
                             p("gains_db"), gain, "numbers in [-100, 30] dB")
        a = [self.number(x, _join(p("angles_deg"), j), 0, 180, unit="degrees")
             for j, x in enumerate(ang)]
        g = [self.number(x, _join(p("gains_db"), j), -100, 30, unit="dB")
             for j, x in enumerate(gain)]
        if a[0] != 0 or a[-1] != 180 or any(b <= c for c, b in zip(a, a[1:])):
            raise self.error("angles must increase from 0 to 180 degrees", p("angles_deg"),
                             ang, "increasing angles, the first 0 and the last 180")
        return elements.ElementPattern(pattern=kind, normal=normal, angles_deg=tuple(a),
                                       gains_db=tuple(g))

    def complex_value(self, value, path, bound, strict=False) -> float | tuple:
        allowed = f"a number or [re, im], magnitude {'<' if strict else '<='} {bound:g}"
        if isinstance(value, list):
            if len(value) != 2:
                raise self.error("expected [re, im]", path, value, allowed)
            out = tuple(self.number(x, _join(path, j), -bound, bound)
                        for j, x in enumerate(value))
            size = math.hypot(*out)
        else:
            out = self.number(value, path, -bound, bound)
            size = abs(out)
        if size > bound or (strict and size >= bound):
            raise self.error("magnitude out of range", path, value, allowed)
        return out

    def coupling(self, value, path, layout, n) -> elements.Coupling | None:
        if value is None:
            return None
        if isinstance(value, list):
            value = {"coefficients": value}
        self.mapping(value, path, _COUPLING_KEYS, what="a list of coefficients or a mapping")
        calibrated = value.get("calibrated", False)
        if not isinstance(calibrated, bool):
            raise self.error("expected true or false", _join(path, "calibrated"), calibrated,
                             "true | false")
        has_c, has_m = "coefficients" in value, "matrix" in value
        if has_c == has_m:
            raise self.error("give either coefficients or matrix", path,
                             allowed="coefficients: [c1, c2, ...] or matrix: N x N")
        if has_m:
            rows = value["matrix"]
            where = _join(path, "matrix")
            if not isinstance(rows, list) or len(rows) != n or any(
                    not isinstance(r, list) or len(r) != n for r in rows):
                raise self.error(f"expected a {n} x {n} matrix (a list of {n} rows)", where,
                                 allowed=f"{n} rows of {n} numbers or [re, im] pairs")
            matrix = tuple(tuple(self.complex_value(x, _join(_join(where, i), j), 10)
                                 for j, x in enumerate(r)) for i, r in enumerate(rows))
            return elements.Coupling(matrix=matrix, calibrated=calibrated)
        where = _join(path, "coefficients")
        coeff = value["coefficients"]
        if layout not in ("line", "ring"):
            raise self.error(f"coupling coefficients need neighbours in a line or ring; a "
                             f"{layout} array has none by index", where,
                             allowed="matrix: the N x N coupling matrix")
        if not isinstance(coeff, list) or not 1 <= len(coeff) <= max(n - 1, 1):
            raise self.error(f"expected a list of 1 to {max(n - 1, 1)} coefficients", where,
                             coeff, "c1 (neighbours), c2 (two apart), ...")
        values = tuple(self.complex_value(x, _join(where, j), 1, strict=True)
                       for j, x in enumerate(coeff))
        return elements.Coupling(coefficients=values, calibrated=calibrated,
                                 circular=layout == "ring")

    def positions(self, value, path) -> np.ndarray:
        allowed = "a list of [x, y, z] points in wavelengths"
        if not isinstance(value, list) or not value:
            raise self.error("expected a non-empty list of [x, y, z] points", path, value,
                             allowed)
        if len(value) > _MAX_ELEMENTS:
            raise self.error(f"{len(value)} elements is too many", path,
                             allowed=f"at most {_MAX_ELEMENTS} points")
        out = np.empty((len(value), 3))
        for i, point in enumerate(value):
            where = _join(path, i)
            if not isinstance(point, list) or len(point) != 3:
                raise self.error("expected a list of three numbers [x, y, z]", where, point,
                                 allowed)
            for j, c in enumerate(point):
                out[i, j] = self.number(c, _join(where, j), -1000, 1000, unit="wavelengths")
        for i in range(1, len(out)):
            gap = np.linalg.norm(out[:i] - out[i], axis=1)
            j = int(np.argmin(gap))
            if gap[j] < 1e-9:
                raise self.error(f"point {i} coincides with point {j}", _join(path, i),
                                 value[i], "distinct element positions")
        return out

    def hardware(self, value, path) -> HardwareErrors:
        if value is None:
            return HardwareErrors()
        self.mapping(value, path, _ERROR_KEYS)
        return HardwareErrors(
            gain_db_rms=self.number(value.get("gain_db_rms", 0.0), _join(path, "gain_db_rms"),
                                    0, 6, unit="dB rms"),
            phase_deg_rms=self.number(value.get("phase_deg_rms", 0.0),
                                      _join(path, "phase_deg_rms"), 0, 45, unit="degrees rms"),
            position_rms=self.number(value.get("position_rms", 0.0),
                                     _join(path, "position_rms"), 0, 0.25,
                                     unit="wavelengths rms"),
            channel_delay_rms=self.number(value.get("channel_delay_rms", 0.0),
                                          _join(path, "channel_delay_rms"), 0, 2,
                                          unit="snapshots rms"),
            channel_ripple_rms=self.number(value.get("channel_ripple_rms", 0.0),
                                           _join(path, "channel_ripple_rms"), 0, 0.3,
                                           unit="rms of the outer channel-filter taps"))

    def sources(self, value, path) -> tuple[Source, ...]:
        if not isinstance(value, list) or not value:
            raise self.error("expected a non-empty list of sources", path, value,
                             "a list with exactly one desired source and any interferers")
        if len(value) > _MAX_SOURCES:
            raise self.error(f"{len(value)} sources is too many", path,
                             allowed=f"at most {_MAX_SOURCES}")
        out = [self.source(item, _join(path, i)) for i, item in enumerate(value)]
        names: dict[str, int] = {}
        for i, src in enumerate(out):
            if src.name in names:
                raise self.error(f"source name '{src.name}' is already used by "
                                 f"sources[{names[src.name]}]", _join(_join(path, i), "name"),
                                 src.name, "unique names")
            names[src.name] = i
        desired = [i for i, s in enumerate(out) if s.role == "desired"]
        if len(desired) != 1:
            where = _join(_join(path, desired[1]), "role") if len(desired) > 1 else path
            raise self.error(f"exactly one source must have role desired, found {len(desired)}",
                             where, allowed="one 'role: desired' source plus any interferers")
        self.copies(out, path)
        return tuple(out)

    def source(self, value, path) -> Source:
        self.mapping(value, path, _SOURCE_KEYS, required=("name", "role", "azimuth", "power_db"))
        p = lambda key: _join(path, key)  # noqa: E731
        name = self.text(value["name"], p("name"), "a non-empty name")
        role = self.choice(value["role"], p("role"), ROLES)
        az = self.number(value["azimuth"], p("azimuth"), -180, 180, unit="degrees")
        el = self.number(value.get("elevation", 0.0), p("elevation"), -90, 90, unit="degrees")
        power = self.number(value["power_db"], p("power_db"), -100, 150,
                            unit="dB over the per-element noise")
        waveform = self.waveform(value.get("waveform", "gaussian"), p("waveform"))
        pulsing = self.pulsing(value["pulsing"], p("pulsing")) if value.get("pulsing") is not None else None
        motion = self.motion(value["motion"], p("motion")) if value.get("motion") is not None else None
        bandwidth, offset = self.band(value, path, waveform)
        return Source(name=name, role=role, azimuth=az, elevation=el, power_db=power,
                      waveform=waveform, pulsing=pulsing, motion=motion,
                      bandwidth=bandwidth, offset=offset)

    def band(self, value, path, waveform: Waveform) -> tuple[float | None, float]:
        """A source's optional flat band (``bandwidth``, ``offset``), fractions of the
        sample rate, for noise-like waveforms only, inside [-1/2, 1/2]."""
        if "bandwidth" not in value and "offset" not in value:
            return None, 0.0
        p = lambda key: _join(path, key)  # noqa: E731
        if waveform.kind not in ("gaussian", "bpsk", "qpsk"):
            key = "bandwidth" if "bandwidth" in value else "offset"
            raise self.error(f"a band applies to noise-like waveforms only, not {waveform.kind}",
                             p(key), value[key], "gaussian | bpsk | qpsk waveforms")
        bandwidth = self.number(value.get("bandwidth", 1.0), p("bandwidth"), 0.01, 1,
                                unit="fraction of the sample rate")
        offset = self.number(value.get("offset", 0.0), p("offset"), -0.5, 0.5,
                             unit="fraction of the sample rate")
        if abs(offset) + bandwidth / 2 > 0.5 + 1e-12:
            raise self.error("the band reaches beyond the sampled band", p("offset"), offset,
                             f"|offset| + bandwidth/2 <= 0.5 (bandwidth {bandwidth:g})")
        return bandwidth, offset

    def waveform(self, value, path) -> Waveform:
        if isinstance(value, str):
            kind = self.choice(value, path, WAVEFORMS)
            return Waveform(kind=kind)
        if not isinstance(value, dict):
            raise self.error("expected a waveform name or a mapping with 'kind'", path, value,
                             " | ".join(WAVEFORMS) + " or {kind: tone, frequency: 0.1}")
        if "kind" not in value:
            raise self.error("required key 'kind' is missing", path,
                             allowed=" | ".join(WAVEFORMS))
        kind = self.choice(value["kind"], _join(path, "kind"), WAVEFORMS + (COPY,))
        keys = _WAVEFORM_KEYS[kind]
        for key in value:
            if not isinstance(key, str) or key not in keys:
                hint = did_you_mean(key, keys) if isinstance(key, str) else ""
                raise self.error(f"key '{key}' does not apply to a {kind} waveform" + hint,
                                 _join(path, key), allowed=", ".join(keys))
        p = lambda key: _join(path, key)  # noqa: E731
        if kind == "tone":
            f = self.number(value.get("frequency", 0.0), p("frequency"), -0.5, 0.5,
                            unit="cycles per snapshot")
            return Waveform(kind=kind, frequency=f)
        if kind == "chirp":
            d = Waveform()
            f0 = self.number(value.get("start", d.start), p("start"), -0.5, 0.5,
                             unit="cycles per snapshot")
            f1 = self.number(value.get("stop", d.stop), p("stop"), -0.5, 0.5,
                             unit="cycles per snapshot")
            period = self.count(value.get("period", d.period), p("period"), 1_000_000_000, low=2)
            return Waveform(kind=kind, start=f0, stop=f1, period=period)
        if kind == COPY:
            if "of" not in value:
                raise self.error("required key 'of' is missing", path,
                                 allowed="of: the name of the source copied")
            of = self.text(value["of"], p("of"), "the name of another source")
            phase = self.number(value.get("phase_deg", 0.0), p("phase_deg"), -360, 360,
                                unit="degrees")
            delay = self.number(value.get("delay", 0.0), p("delay"), -MAX_COPY_DELAY,
                                MAX_COPY_DELAY, unit="snapshots")
            return Waveform(kind=kind, of=of, phase_deg=phase, delay=delay)
        return Waveform(kind=kind)

    def copies(self, sources, path) -> None:
        """Refuse copies of unknown sources, of themselves, of other copies (chains and
        cycles), and a wanted source that is a copy."""
        names = {s.name: i for i, s in enumerate(sources)}
        for i, src in enumerate(sources):
            if src.waveform.kind != COPY:
                continue
            where = _join(_join(_join(path, i), "waveform"), "of")
            of = src.waveform.of
            if src.role == "desired":
                raise self.error("the wanted source cannot be a copy; make the other "
                                 "arrival the copy", _join(_join(path, i), "waveform"),
                                 allowed="role interferer for a copy")
            if of == src.name:
                raise self.error(f"source '{src.name}' cannot copy itself", where, of,
                                 "the name of another source")
            if of not in names:
                raise self.error(f"no source is named '{of}'" + did_you_mean(of, names),
                                 where, of, ", ".join(n for n in names if n != src.name))
            if sources[names[of]].waveform.kind == COPY:
                raise self.error(f"source '{of}' is itself a copy (of "
                                 f"'{sources[names[of]].waveform.of}'); copies of copies "
                                 "(chains and cycles) are refused", where, of,
                                 "a source that is not a copy")

    def pulsing(self, value, path) -> Pulsing:
        self.mapping(value, path, _PULSING_KEYS)
        p = lambda key: _join(path, key)  # noqa: E731
        big = 1_000_000_000
        start = self.number(value.get("start", 0), p("start"), 0, big, integer=True)
        stop = None
        if value.get("stop") is not None:
            stop = self.number(value["stop"], p("stop"), 1, big, integer=True)
            if stop <= start:
                raise self.error("stop must come after start", p("stop"), value["stop"],
                                 f"an integer > start ({start})")
        has_period = value.get("period") is not None
        has_on = value.get("on") is not None
        if has_period != has_on:
            missing = "on" if has_period else "period"
            raise self.error(f"'period' and 'on' go together; '{missing}' is missing", path,
                             allowed="both period and on, or neither")
        period = on = None
        if has_period:
            period = self.number(value["period"], p("period"), 1, big, integer=True)
            on = self.number(value["on"], p("on"), 1, big, integer=True)
            if on > period:
                raise self.error("'on' is longer than the period", p("on"), on,
                                 f"1 <= on <= period ({period})")
        return Pulsing(start=start, stop=stop, period=period, on=on)

    def motion(self, value, path) -> Motion:
        self.mapping(value, path, _MOTION_KEYS)
        return Motion(
            azimuth_rate=self.number(value.get("azimuth_rate", 0.0), _join(path, "azimuth_rate"),
                                     -1, 1, unit="degrees per snapshot"),
            elevation_rate=self.number(value.get("elevation_rate", 0.0),
                                       _join(path, "elevation_rate"), -1, 1,
                                       unit="degrees per snapshot"))

    def motion_bounds(self, src: Source, snapshots: int, path: str) -> None:
        if src.motion is None or src.motion.elevation_rate == 0:
            return
        end = src.elevation + src.motion.elevation_rate * (snapshots - 1)
        if not -90 <= end <= 90:
            raise self.error(f"source '{src.name}' would reach elevation {end:.4g} degrees "
                             f"by snapshot {snapshots - 1}", _join(path, "elevation_rate"),
                             src.motion.elevation_rate,
                             "a rate keeping the elevation within [-90, 90] over the run")

    def dynamic_range(self, array: ArrayLayout, sources) -> None:
        """Refuse scenes whose strongest covariance eigenvalue, bounded by N times the
        total source power, exceeds :data:`MAX_DYNAMIC_RANGE_DB` over the unit noise:
        beyond it double precision (eps 2.2e-16) cannot hold the noise floor under the
        sources, and scores lose accuracy (measured: 8 elements, one 150 dB jammer, the
        optimum misses its own bound by 0.24 dB and RLS scores a zero SINR)."""
        powers = [10.0 ** (s.power_db / 10.0) for s in sources]
        total_db = 10.0 * math.log10(1.0 + len(array.positions) * sum(powers))
        if total_db > MAX_DYNAMIC_RANGE_DB:
            i = int(np.argmax(powers))
            raise self.error(
                f"the sources reach {total_db:.1f} dB over the noise at the array "
                f"({len(array.positions)} elements x the total source power); double-precision "
                f"covariances hold the noise floor under at most {MAX_DYNAMIC_RANGE_DB:g} dB",
                f"sources[{i}].power_db", sources[i].power_db,
                f"powers with 10 log10(elements x sum of source powers) <= "
                f"{MAX_DYNAMIC_RANGE_DB:g} dB")

    def receiver(self, value, path) -> Receiver:
        if value is None:
            return Receiver()
        self.mapping(value, path, _RECEIVER_KEYS)
        bits = value.get("bits")
        if bits is not None:
            bits = self.number(bits, _join(path, "bits"), 1, 24, integer=True)
        fs = self.number(value.get("full_scale_db", Receiver().full_scale_db),
                         _join(path, "full_scale_db"), -20, 160,
                         unit="dB over the per-element noise rms")
        fb = value.get("fractional_bandwidth")
        if fb is not None:
            fb = self.number(fb, _join(path, "fractional_bandwidth"), 0, 1, low_open=True,
                             unit="sample rate over carrier frequency")
        return Receiver(bits=bits, full_scale_db=fs, fractional_bandwidth=fb)

    def noise(self, value, path, array) -> NoiseField:
        if value is None:
            return NoiseField()
        self.mapping(value, path, _NOISE_KEYS)
        field = self.choice(value.get("field", "white"), _join(path, "field"), NOISE_FIELDS)
        level = value.get("level_db")
        if level is not None:
            level = self.number(level, _join(path, "level_db"), -100, 100,
                                unit="dB over the thermal noise per element")
            total = 10.0 * math.log10(1.0 + len(array.positions) * 10.0 ** (level / 10.0))
            if total > MAX_DYNAMIC_RANGE_DB:
                raise self.error(f"the noise reaches {total:.1f} dB over the thermal floor "
                                 f"at the array; double-precision covariances hold at most "
                                 f"{MAX_DYNAMIC_RANGE_DB:g} dB", _join(path, "level_db"),
                                 level, "a lower level")
        elif field != "white":
            raise self.error(f"a {field} noise field needs level_db", path,
                             allowed="level_db: its power per element over the thermal "
                                     "floor, dB")
        spread = self.number(value.get("element_noise_db_rms", 0.0),
                             _join(path, "element_noise_db_rms"), 0, 10, unit="dB rms")
        return NoiseField(field=field, level_db=level, element_noise_db_rms=spread)

    def processors(self, value, path) -> tuple:
        if value is None:
            return ()
        if not isinstance(value, list):
            raise self.error("expected a list of processor specs", path, value,
                             "e.g. [conventional, 'smi loading_db=10']")
        from adapt.processors import parse_specs
        self.printable(value, path)
        try:
            parse_specs(value, where=path)
        except SpecError as exc:
            raise exc.at(file=self.file) from None
        return tuple(_plain(v) for v in value)


# --------------------------------------------------------------------------- writing
def _plain(value):
    """Plain YAML-safe copy (dict, list, str, int, float, bool, None)."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, str):
        return str(value)
    return value


def scene_to_mapping(scene: Scene) -> dict:
    """The resolved scene as a plain mapping (defaults filled in, YAML-safe types).

    ``parse_scene(scene_to_mapping(s))`` rebuilds an equal scene.
    """
    arr = scene.array
    array: dict = {"layout": arr.layout}
    if arr.layout == "custom" or not arr.settings:
        if arr.layout != "custom":
            array["layout"] = "custom"
        array["positions"] = _plain(arr.positions)
    else:
        array.update(_plain(arr.settings))
    e = arr.errors
    array["errors"] = {"gain_db_rms": float(e.gain_db_rms),
                       "phase_deg_rms": float(e.phase_deg_rms),
                       "position_rms": float(e.position_rms)}
    array.update(_element_mapping(arr))
    if e.channel_delay_rms:
        array["errors"]["channel_delay_rms"] = float(e.channel_delay_rms)
    if e.channel_ripple_rms:
        array["errors"]["channel_ripple_rms"] = float(e.channel_ripple_rms)
    sources = []
    for s in scene.sources:
        wf: dict = {"kind": s.waveform.kind}
        if s.waveform.kind == "tone":
            wf["frequency"] = float(s.waveform.frequency)
        elif s.waveform.kind == "chirp":
            wf.update(start=float(s.waveform.start), stop=float(s.waveform.stop),
                      period=int(s.waveform.period))
        elif s.waveform.kind == COPY:
            wf.update(of=s.waveform.of, phase_deg=float(s.waveform.phase_deg))
            if scene.wideband:          # (a narrowband copy has no delay: not written)
                wf["delay"] = float(s.waveform.delay)
        item = {"name": s.name, "role": s.role, "azimuth": float(s.azimuth),
                "elevation": float(s.elevation), "power_db": float(s.power_db),
                "waveform": wf}
        if s.pulsing is not None:
            pl = s.pulsing
            item["pulsing"] = {"start": int(pl.start),
                               "stop": None if pl.stop is None else int(pl.stop),
                               "period": None if pl.period is None else int(pl.period),
                               "on": None if pl.on is None else int(pl.on)}
        if s.bandwidth is not None:
            item.update(bandwidth=float(s.bandwidth), offset=float(s.offset))
        if s.motion is not None:
            item["motion"] = {"azimuth_rate": float(s.motion.azimuth_rate),
                              "elevation_rate": float(s.motion.elevation_rate)}
        sources.append(item)
    receiver = {"bits": None if scene.receiver.bits is None else int(scene.receiver.bits),
                "full_scale_db": float(scene.receiver.full_scale_db)}
    if scene.receiver.fractional_bandwidth is not None:
        receiver["fractional_bandwidth"] = float(scene.receiver.fractional_bandwidth)
    return {
        "name": scene.name,
        "array": array,
        "sources": sources,
        "look": {"azimuth": float(scene.look_azimuth), "elevation": float(scene.look_elevation)},
        "training": scene.training,
        "receiver": receiver,
        "snapshots": int(scene.snapshots),
        "trials": int(scene.trials),
        "seed": int(scene.seed),
        "processors": [_plain(p) for p in scene.processors],
        **_noise_mapping(scene),
        **({"sweep": {"vary": list(scene.sweep_vary),
                      **({} if scene.sweep_target_db is None
                         else {"target_loss_db": float(scene.sweep_target_db)})}}
           if scene.sweep_vary else {}),
    }


def _element_mapping(arr) -> dict:
    """``element`` and ``coupling`` keys, only when the array has them."""
    out: dict = {}
    el = arr.element
    if el is not None:
        item: dict = {"pattern": el.pattern}
        if el.pattern == "cosine":
            item.update(exponent=float(el.exponent), back_db=float(el.back_db))
        else:
            item.update(angles_deg=[float(a) for a in el.angles_deg],
                        gains_db=[float(g) for g in el.gains_db])
        item["normal"] = [float(c) for c in el.normal]
        out["element"] = item
    cp = arr.coupling
    if cp is not None:
        def plain(v):
            return [float(v[0]), float(v[1])] if isinstance(v, tuple) else float(v)
        if cp.matrix is not None:
            out["coupling"] = {"matrix": [[plain(v) for v in row] for row in cp.matrix],
                               "calibrated": bool(cp.calibrated)}
        else:
            out["coupling"] = {"coefficients": [plain(v) for v in cp.coefficients],
                               "calibrated": bool(cp.calibrated)}
    return out


def _noise_mapping(scene: Scene) -> dict:
    """The ``noise`` key, only when the scene has one (scenes without stay as before)."""
    nf = scene.noise
    if nf == NoiseField():
        return {}
    return {"noise": {"field": nf.field,
                      "level_db": None if nf.level_db is None else float(nf.level_db),
                      "element_noise_db_rms": float(nf.element_noise_db_rms)}}


def dump_scene(scene: Scene) -> str:
    """The resolved scene as YAML text (keys in the documented order)."""
    if not isinstance(scene, Scene):
        raise SceneError("expected a Scene", value=type(scene).__name__)
    return yaml.safe_dump(scene_to_mapping(scene), sort_keys=False, default_flow_style=None,
                          allow_unicode=True)

