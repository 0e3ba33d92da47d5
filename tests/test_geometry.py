"""Array geometry against handbook values: uniform-line sidelobes, beamwidth and nulls,
Dolph-Chebyshev tapers, array gain, grating lobes and the direction convention."""
from __future__ import annotations

import math

import numpy as np
import pytest

from adapt.processors.conventional import taper_weights
from adapt.scene import geometry
from adapt.scenefile import parse_scene
from adapt.streams.snapshots import TrialBatch


def pattern_in_sine_space(weights, positions, u):
    """Power pattern (dB, peak-normalised) at direction sines u on the azimuth cut."""
    az = np.degrees(np.arcsin(np.clip(u, -1, 1)))
    return geometry.beam_pattern_db(weights, positions, az)


def peak_sidelobe_db(pattern_db):
    """Highest level outside the main lobe: beyond the first local minimum on each
    side of the peak."""
    i0 = int(np.argmax(pattern_db))
    levels = []
    rises = np.nonzero(np.diff(pattern_db[i0:]) > 0)[0]
    if rises.size:
        levels.append(pattern_db[i0 + rises[0]:].max())
    rises = np.nonzero(np.diff(pattern_db[: i0 + 1][::-1]) > 0)[0]
    if rises.size:
        levels.append(pattern_db[: i0 - rises[0] + 1].max())
    return max(levels)


def test_uniform_line_first_sidelobe():
    # uniform line: first sidelobe -13.26 dB in the large-N limit (antenna handbook;
    # the continuous uniform aperture's sinc pattern); N = 32 is within 0.1 dB
    n = 32
    pos = geometry.line_positions(n, 0.5)
    u = np.linspace(0.0, 1.0, 200_001)
    p = pattern_in_sine_space(np.ones(n) / n, pos, u)
    first = p[(u > 1 / (n * 0.5)) & (u < 2 / (n * 0.5))].max()
    assert first == pytest.approx(-13.26, abs=0.1)
    # and it is the highest sidelobe
    assert peak_sidelobe_db(p) == pytest.approx(first, abs=1e-9)


@pytest.mark.parametrize("n,d", [(64, 0.5), (100, 0.5), (64, 0.4)])
def test_uniform_line_half_power_beamwidth(n, d):
    # broadside half-power beamwidth ~ 0.886 / (N d) radians for large N (antenna handbook)
    bw = math.radians(geometry.half_power_beamwidth_deg(geometry.line_positions(n, d)))
    assert bw == pytest.approx(0.886 / (n * d), rel=0.015)


@pytest.mark.parametrize("n,d", [(8, 0.5), (16, 0.5), (11, 0.7)])
def test_uniform_line_nulls(n, d):
    # nulls of the uniform line at sin(theta) = m / (N d), m = 1, 2, ... (antenna handbook)
    pos = geometry.line_positions(n, d)
    m = np.arange(1, int(n * d) + 1)
    u = m / (n * d)
    u = u[u <= 1]
    resp = geometry.array_response(np.ones(n) / n, pos, np.degrees(np.arcsin(u)))
    assert np.all(np.abs(resp) < 1e-12)
    # and not in between: halfway points are well above the nulls
    mid = (m[:-1] + 0.5) / (n * d)
    mid = mid[mid < 1]
    resp_mid = geometry.array_response(np.ones(n) / n, pos, np.degrees(np.arcsin(mid)))
    assert np.all(np.abs(resp_mid) > 1e-3)


@pytest.mark.parametrize("level", [20.0, 30.0, 40.0, 55.0])
@pytest.mark.parametrize("n", [10, 16])
def test_chebyshev_taper_sidelobes(level, n):
    # Dolph (1946): the Chebyshev taper (scipy.signal.windows.chebwin) makes every
    # sidelobe equal to the requested level below the peak; within 0.1 dB
    pos = geometry.line_positions(n, 0.5)
    t = taper_weights(pos, "chebyshev", level, 4)
    u = np.linspace(-1.0, 1.0, 400_001)
    p = pattern_in_sine_space(t, pos, u)
    assert peak_sidelobe_db(p) == pytest.approx(-level, abs=0.1)


@pytest.mark.parametrize("n", [4, 8, 16, 32])
def test_white_noise_array_gain(n):
    # white-noise array gain of the uniform phase-steered line is N: SNR out / SNR in =
    # |w^H a|^2 / (w^H w) = N, +3 dB per doubling (common practice)
    pos = geometry.line_positions(n, 0.5)
    a = geometry.steering_vector(pos, 20.0)
    w = a / n
    gain = abs(np.vdot(w, a)) ** 2 / np.vdot(w, w).real
    assert gain == pytest.approx(n, rel=1e-12)
    assert 10 * np.log10(gain / (n / 2)) == pytest.approx(3.0103, abs=1e-3)


def test_white_noise_array_gain_on_simulated_streams():
    # the same gain measured on simulated snapshots: output SNR / input SNR = N
    # (common practice); tolerance 5 standard errors of the output-noise estimate
    n = 8
    scene = parse_scene({"array": {"elements": n},
                         "sources": [{"name": "s", "role": "desired", "azimuth": 25,
                                      "power_db": 0, "waveform": "qpsk"}],
                         "trials": 20, "snapshots": 2000, "seed": 4})
    blk = TrialBatch(scene).samples()
    w = scene.look_steering() / n
    s_out = np.mean(np.abs(blk.signal @ np.conj(w)) ** 2)       # exact: unit-modulus symbols
    noise_out = np.abs(blk.interference @ np.conj(w)) ** 2      # exponential, mean 1/N
    m = noise_out.size
    assert s_out == pytest.approx(1.0, rel=1e-12)
    assert np.mean(noise_out) == pytest.approx(1 / n, abs=5 * (1 / n) / math.sqrt(m))


def test_grating_lobes():
    # one-wavelength spacing: a broadside beam has a full-height grating lobe at endfire
    # (sin theta = 1/d); half a wavelength: none (antenna handbook, d < 1/(1+|sin theta0|))
    n = 16
    wide = geometry.line_positions(n, 1.0)
    half = geometry.line_positions(n, 0.5)
    assert geometry.has_grating_lobe(wide, 0.0)
    assert not geometry.has_grating_lobe(half, 0.0)
    w_wide = geometry.steering_vector(wide, 0.0) / n
    w_half = geometry.steering_vector(half, 0.0) / n
    assert abs(geometry.array_response(w_wide, wide, 90.0)[0]) == pytest.approx(1.0, abs=1e-12)
    assert abs(geometry.array_response(w_half, half, 90.0)[0]) < 1e-12
    # spacing 0.6: free at broadside, but scanning to 60 degrees exceeds 1/(1+sin 60)=0.536
    mid = geometry.line_positions(n, 0.6)
    assert not geometry.has_grating_lobe(mid, 0.0)
    assert geometry.has_grating_lobe(mid, 60.0)
    assert geometry.grating_lobe_free_spacing(60.0) == pytest.approx(1 / (1 + math.sin(math.pi / 3)))


def test_direction_convention():
    # az 0 el 0 is +y (broadside of a line along x), az 90 is +x (endfire), el 90 is +z
    np.testing.assert_allclose(geometry.direction_vector(0, 0), [0, 1, 0], atol=1e-15)
    np.testing.assert_allclose(geometry.direction_vector(90, 0), [1, 0, 0], atol=1e-15)
    np.testing.assert_allclose(geometry.direction_vector(-90, 0), [-1, 0, 0], atol=1e-15)
    np.testing.assert_allclose(geometry.direction_vector(180, 0), [0, -1, 0], atol=1e-15)
    np.testing.assert_allclose(geometry.direction_vector(37, 90), [0, 0, 1], atol=1e-15)
    # steering phase exp(+j 2 pi p.u): an element at x = +0.25 seen from endfire (+x)
    # leads the origin by a quarter cycle
    a = geometry.steering_vector(np.array([[0.0, 0, 0], [0.25, 0, 0]]), 90.0)
    np.testing.assert_allclose(a, [1, 1j], atol=1e-15)
    # a line cannot tell elevation from azimuth on the same cone: sin(az) cos(el) fixed
    line = geometry.line_positions(6, 0.5)
    np.testing.assert_allclose(geometry.steering_vector(line, 30.0, 0.0),
                               geometry.steering_vector(line, 90.0, 60.0), atol=1e-12)


def test_layout_planes():
    line = geometry.line_positions(5, 0.5)
    grid = geometry.grid_positions(3, 4, 0.5, 0.7)
    ring = geometry.ring_positions(8, 1.2)
    # line along x, grid in the x-z plane, ring in the x-y plane, all centred
    assert np.all(line[:, 1:] == 0) and np.allclose(line.mean(0), 0)
    assert np.all(grid[:, 1] == 0) and np.allclose(grid.mean(0), 0)
    assert np.all(ring[:, 2] == 0) and np.allclose(ring.mean(0), 0, atol=1e-15)
    # grid order: row by row, x fastest; columns 0.5 apart along x, rows 0.7 along z
    np.testing.assert_allclose(grid[1] - grid[0], [0.5, 0, 0])
    np.testing.assert_allclose(grid[4] - grid[0], [0, 0, 0.7])
    # ring: element 0 on +x, counter-clockwise seen from +z, all at the radius
    np.testing.assert_allclose(ring[0], [1.2, 0, 0])
    assert ring[2, 1] == pytest.approx(1.2)
    np.testing.assert_allclose(np.linalg.norm(ring, axis=1), 1.2)
    # a grid resolves elevation: the beam at el 0 and el 30 differ; a ring is symmetric
    # about its plane: el and -el give the same steering vector
    assert not np.allclose(geometry.steering_vector(grid, 0, 0), geometry.steering_vector(grid, 0, 30))
    np.testing.assert_allclose(geometry.steering_vector(ring, 40, 25),
                               geometry.steering_vector(ring, 40, -25), atol=1e-12)
    # apertures: (N-1) d for a line, the diameter for an even ring
    assert geometry.aperture(line) == pytest.approx(2.0)
    assert geometry.aperture(ring) == pytest.approx(2.4)
