"""Array geometry: element positions, directions, steering vectors and beam patterns.

Conventions (also in README):

* positions (x, y, z) are in wavelengths;
* a direction (azimuth, elevation) in degrees is the unit vector
  ``u = (sin az cos el, cos az cos el, sin el)``; azimuth 0, elevation 0 is the +y axis
  (broadside of a line along x), azimuth +-90 is endfire along +-x;
* a line array lies along x, a grid in the x-z plane, a ring in the x-y plane, each
  centred on the origin;
* the steering vector of an element at position p toward direction u is
  ``exp(+j 2 pi p . u)`` (a plane wave from u reaches elements with larger p . u first);
* weights are applied as ``y = w^H x``; the array response of weights w toward u is
  ``w^H a(u)``.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = [
    "line_positions", "grid_positions", "ring_positions", "direction_vector",
    "steering_vector", "array_response", "beam_pattern_db", "half_power_beamwidth_deg",
    "rotate_about_z",
    "grating_lobe_free_spacing", "has_grating_lobe", "aperture", "angle_between_deg",
    "steering_derivatives", "diffuse_coherence",
]


def line_positions(count: int, spacing: float = 0.5) -> np.ndarray:
    """Positions (count, 3) of a uniform line along x, centred on the origin."""
    if count < 1:
        raise ValueError(f"element count must be >= 1, got {count}")
    if not spacing > 0:
        raise ValueError(f"spacing must be > 0 wavelengths, got {spacing}")
    x = (np.arange(count) - (count - 1) / 2.0) * spacing
    return np.stack([x, np.zeros(count), np.zeros(count)], axis=1)


def grid_positions(rows: int, columns: int, spacing: float = 0.5,
                   row_spacing: float | None = None) -> np.ndarray:
    """Positions (rows*columns, 3) of a rectangular grid in the x-z plane.

    Columns run along x (``spacing``), rows along z (``row_spacing``, default ``spacing``).
    Element order is row by row, x fastest.
    """
    if rows < 1 or columns < 1:
        raise ValueError(f"grid needs rows, columns >= 1, got {rows} x {columns}")
    dz = spacing if row_spacing is None else row_spacing
    if not spacing > 0 or not dz > 0:
        raise ValueError("grid spacings must be > 0 wavelengths")
    x = (np.arange(columns) - (columns - 1) / 2.0) * spacing
    z = (np.arange(rows) - (rows - 1) / 2.0) * dz
    zz, xx = np.meshgrid(z, x, indexing="ij")
    return np.stack([xx.ravel(), np.zeros(rows * columns), zz.ravel()], axis=1)


def ring_positions(count: int, radius: float) -> np.ndarray:
    """Positions (count, 3) of a uniform ring of ``radius`` wavelengths in the x-y plane.

    Element 0 sits on +x; elements go counter-clockwise seen from +z.
    """
    if count < 1:
        raise ValueError(f"element count must be >= 1, got {count}")
    if not radius > 0:
        raise ValueError(f"ring radius must be > 0 wavelengths, got {radius}")
    phi = 2 * np.pi * np.arange(count) / count
    return np.stack([radius * np.cos(phi), radius * np.sin(phi), np.zeros(count)], axis=1)


def direction_vector(azimuth_deg, elevation_deg=0.0) -> np.ndarray:
    """Unit vector(s) ``(sin az cos el, cos az cos el, sin el)``; shape (..., 3)."""
    az = np.deg2rad(np.asarray(azimuth_deg, dtype=float))
    el = np.deg2rad(np.asarray(elevation_deg, dtype=float))
    az, el = np.broadcast_arrays(az, el)
    return np.stack([np.sin(az) * np.cos(el), np.cos(az) * np.cos(el), np.sin(el)], axis=-1)


def steering_vector(positions: np.ndarray, azimuth_deg, elevation_deg=0.0) -> np.ndarray:
    """Steering vector(s) ``exp(j 2 pi p . u)``.

    ``positions`` has shape (..., N, 3); the directions broadcast against its leading
    dimensions. Returns shape (directions..., N) for a single position set (N, 3).
    """
    u = direction_vector(azimuth_deg, elevation_deg)          # (..., 3)
    phase = 2 * np.pi * (u @ np.swapaxes(np.asarray(positions, float), -1, -2))
    return np.exp(1j * phase)


def array_response(weights: np.ndarray, positions: np.ndarray, azimuth_deg,
                   elevation_deg=0.0) -> np.ndarray:
    """Complex response ``w^H a(u)`` of weights (..., N) toward each direction.

    Returns shape (..., D) for D directions.
    """
    a = steering_vector(positions, azimuth_deg, elevation_deg)  # (D, N)
    a = np.atleast_2d(a)
    return np.einsum("...n,dn->...d", np.conj(np.asarray(weights)), a)


def beam_pattern_db(weights: np.ndarray, positions: np.ndarray, azimuth_deg,
                    elevation_deg=0.0, normalise: bool = True) -> np.ndarray:
    """Power pattern ``|w^H a(u)|^2`` in dB, normalised to its peak over the given cut."""
    p = np.abs(array_response(weights, positions, azimuth_deg, elevation_deg)) ** 2
    with np.errstate(divide="ignore"):
        out = 10 * np.log10(p)
        if normalise:
            out = out - 10 * np.log10(np.max(p, axis=-1, keepdims=True))
    return out


def angle_between_deg(az1, el1, az2, el2) -> float:
    """Great-circle angle in degrees between two directions (degrees)."""
    u = direction_vector(az1, el1)
    v = direction_vector(az2, el2)
    c = float(np.clip(np.dot(u, v), -1.0, 1.0))
    # atan2 form: accurate for small angles too
    return float(np.degrees(np.arctan2(np.linalg.norm(np.cross(u, v)), c)))


def steering_derivatives(positions: np.ndarray, azimuth_deg: float, elevation_deg: float,
                         order: int, steering: np.ndarray | None = None) -> list[np.ndarray]:
    """Derivatives of the steering vector ``exp(j 2 pi p.u)`` with respect to azimuth
    (per radian), orders 1..order, each (N,).

    With ``phi = 2 pi p.u``: ``da/daz = j phi' a`` and ``d2a/daz2 = (j phi'' - phi'^2) a``,
    ``u' = (cos az cos el, -sin az cos el, 0)``, ``u'' = (-sin az cos el, -cos az cos el, 0)``.
    ``steering``: the steering vector itself if already at hand (default: computed).
    Used for derivative constraints (pointing robustness) by lcmv and frost.
    """
    az, el = np.deg2rad(azimuth_deg), np.deg2rad(elevation_deg)
    p = np.asarray(positions, float)
    a = steering_vector(p, azimuth_deg, elevation_deg) if steering is None else steering
    d1 = 2 * np.pi * p @ np.array([np.cos(az) * np.cos(el), -np.sin(az) * np.cos(el), 0.0])
    d2 = 2 * np.pi * p @ np.array([-np.sin(az) * np.cos(el), -np.cos(az) * np.cos(el), 0.0])
    out = [1j * d1 * a]
    if order >= 2:
        out.append((1j * d2 - d1 ** 2) * a)
    return out


def aperture(positions: np.ndarray) -> float:
    """Largest distance between two elements, in wavelengths."""
    p = np.asarray(positions, float)
    d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
    return float(d.max())


def rotate_about_z(positions: np.ndarray, azimuth_deg: float) -> np.ndarray:
    """Positions turned about z by ``-azimuth_deg``: ``p' . u(az - alpha, el) == p .
    u(az, el)`` (alpha = ``azimuth_deg``), so a beam looking at alpha looks at 0 on the
    turned array. Exact for alpha = 0 (the positions are returned unchanged)."""
    p = np.asarray(positions, float)
    if azimuth_deg == 0:
        return p
    a = math.radians(azimuth_deg)
    c, s = math.cos(a), math.sin(a)
    out = p.copy()
    out[:, 0] = p[:, 0] * c - p[:, 1] * s
    out[:, 1] = p[:, 0] * s + p[:, 1] * c
    return out


def half_power_beamwidth_deg(positions: np.ndarray, azimuth_deg: float = 0.0,
                             elevation_deg: float = 0.0, weights=None,
                             resolution_deg: float = 0.005) -> float:
    """Half-power (-3 dB) beamwidth in azimuth of the beam steered to (az, el), degrees.

    The array is first turned about z so the look azimuth becomes 0
    (:func:`rotate_about_z`), so any look azimuth is answered, also past +-90 degrees
    (a ring looking at 120 degrees); the beamwidth is then measured numerically on the
    azimuth cut through the beam peak, within +-90 degrees of it. ``weights`` default
    to the uniform phase-steered sum (weights belong to elements, so turning the array
    leaves them valid).

    Parameters
    ----------
    positions : (N, 3) array
        Element positions, wavelengths.
    azimuth_deg, elevation_deg : float
        Look direction, degrees.
    weights : (N,) complex array, optional
        Weights applied as ``w^H x``.
    resolution_deg : float
        Azimuth sampling of the cut, degrees.

    Returns
    -------
    float
        The beamwidth in degrees; ``nan`` if the beam never falls 3 dB within +-90
        degrees of its peak (very small apertures).
    """
    pos = rotate_about_z(positions, azimuth_deg)
    if weights is None:
        weights = steering_vector(pos, 0.0, elevation_deg) / len(pos)
    az = np.arange(-90.0, 90.0 + resolution_deg / 2, resolution_deg)
    p = beam_pattern_db(weights, pos, az, elevation_deg, normalise=False)
    i0 = int(np.argmin(np.abs(az)))
    peak = p[i0]
    below = p < peak - 10 * np.log10(2)
    right = np.nonzero(below[i0:])[0]
    left = np.nonzero(below[: i0 + 1][::-1])[0]
    if len(right) == 0 or len(left) == 0:
        return float("nan")

    def edge(i_in, i_out):
        # linear interpolation of the -3 dB crossing between two samples
        y0, y1 = p[i_in] - peak, p[i_out] - peak
        t = (-10 * np.log10(2) - y0) / (y1 - y0)
        return az[i_in] + t * (az[i_out] - az[i_in])

    r = edge(i0 + right[0] - 1, i0 + right[0])
    l_ = edge(i0 - left[0] + 1, i0 - left[0])
    return float(r - l_)


def has_grating_lobe(positions: np.ndarray, azimuth_deg: float = 0.0,
                     elevation_deg: float = 0.0, threshold_db: float = -1.0) -> bool:
    """True if the uniform beam steered to (az, el) has another lobe within
    ``threshold_db`` of its peak somewhere in visible space (a grating lobe).

    The response of an array depends on a direction u only through the projection of u
    onto the span of the (centred) element positions, so directions that share the main
    beam's projection (the cone around a line array, the mirror image of a planar array)
    are the main beam itself, not grating lobes. Directions whose projection lies more
    than one aperture-null width (1/aperture in sine space) from the main beam are
    searched on a 0.5 x 0.5 degree grid of the whole sphere.
    """
    pos = np.asarray(positions, float)
    centred = pos - pos.mean(axis=0)
    if len(pos) < 2 or not np.any(centred):
        return False
    _, s, vt = np.linalg.svd(centred, full_matrices=False)
    basis = vt[s > 1e-9 * s[0]]                        # (r, 3) span of the array
    az = np.arange(-180.0, 180.0, 0.5)
    el = np.arange(-90.0, 90.01, 0.5)
    A, E = np.meshgrid(az, el, indexing="ij")
    u = direction_vector(A.ravel(), E.ravel())
    u0 = direction_vector(azimuth_deg, elevation_deg)
    dist = np.linalg.norm((u - u0) @ basis.T, axis=-1)
    keep = dist > 1.0 / aperture(pos)
    w = steering_vector(pos, azimuth_deg, elevation_deg) / len(pos)
    u = u[keep]
    if not len(u):
        return False
    # evaluate in chunks of directions so memory stays bounded for large arrays
    chunk = max(1, (1 << 20) // len(pos))
    peak = max(float(np.max(np.abs(np.exp(1j * 2 * np.pi * (u[i:i + chunk] @ pos.T))
                                   @ np.conj(w)) ** 2))
               for i in range(0, len(u), chunk))
    return bool(10 * np.log10(peak) > threshold_db)


def grating_lobe_free_spacing(max_scan_deg: float) -> float:
    """Largest uniform spacing (wavelengths) free of grating lobes when scanning to
    ``max_scan_deg`` from broadside: ``d < 1 / (1 + |sin theta|)`` (antenna handbook
    rule)."""
    return 1.0 / (1.0 + abs(np.sin(np.deg2rad(max_scan_deg))))


def diffuse_coherence(positions: np.ndarray, field: str) -> np.ndarray:
    """Coherence (..., N, N) of diffuse noise between elements at ``positions``
    (..., N, 3) in wavelengths: ``sin(k d) / (k d)`` for a spherically isotropic field,
    ``J0(k d_xy)`` for a cylindrically isotropic one (arrivals spread evenly over
    azimuth in the x-y plane; d_xy the separation projected on that plane), the
    identity for ``white``; ``k = 2 pi``. Cox, "Spatial correlation in arbitrary noise
    fields with application to ambient sea noise", JASA 54, 1973."""
    p = np.asarray(positions, float)
    diff = p[..., :, None, :] - p[..., None, :, :]
    if field == "isotropic":
        return np.sinc(2.0 * np.linalg.norm(diff, axis=-1))      # sin(2 pi d) / (2 pi d)
    if field == "cylindrical":
        from scipy.special import j0
        return j0(2.0 * np.pi * np.linalg.norm(diff[..., :2], axis=-1))
    if field == "white":
        return np.broadcast_to(np.eye(p.shape[-2]), diff.shape[:-1]).copy()
    raise ValueError(f"unknown noise field {field!r}")
