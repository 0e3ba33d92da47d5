"""One beamwidth for every look direction: the array is turned so the look azimuth is 0
before the cut is measured (a ring looking at 120 degrees used to get NaN, and the
pattern scores then fell back to a 30-degree window)."""
from __future__ import annotations

import numpy as np
import pytest

from adapt.engine import scores
from adapt.scene import geometry
from adapt.studies.check import beamwidth_deg

RING = geometry.ring_positions(8, 0.6)


@pytest.mark.parametrize("look", [120.0, -150.0, 95.0])
def test_ring_beamwidth_is_finite_past_90_degrees(look):
    bw = geometry.half_power_beamwidth_deg(RING, look, 0.0, resolution_deg=0.01)
    assert np.isfinite(bw) and bw > 0
    # an 8-element ring is unchanged by turns of 45 degrees (geometry), so its beam at
    # `look` is its beam at the look reduced to [-45, 45) (where the cut was always
    # measured)
    inside = (look + 45.0) % 90.0 - 45.0
    ref = geometry.half_power_beamwidth_deg(RING, inside, 0.0, resolution_deg=0.01)
    assert bw == pytest.approx(ref, abs=0.02)
    # the `adapt check` summary and the scores use the same beamwidth
    assert beamwidth_deg(RING, look, 0.0) == pytest.approx(bw, abs=0.02)


def test_line_beamwidth_at_broadside_matches_the_handbook():
    # uniform line of N at half-wavelength spacing: 3 dB beamwidth about 0.886 / (N d)
    # radians at broadside (antenna handbook, uniform aperture; from memory)
    n = 32
    bw = geometry.half_power_beamwidth_deg(geometry.line_positions(n, 0.5), 0.0, 0.0)
    assert bw == pytest.approx(np.rad2deg(0.886 / (n * 0.5)), rel=0.01)


def test_line_beamwidth_past_90_mirrors_the_front():
    # a line along x sees a direction only through cos(az): the beam at 120 degrees is
    # the beam at 60 degrees mirrored (geometry)
    line = geometry.line_positions(12, 0.5)
    a = geometry.half_power_beamwidth_deg(line, 120.0, 0.0, resolution_deg=0.01)
    b = geometry.half_power_beamwidth_deg(line, 60.0, 0.0, resolution_deg=0.01)
    assert np.isfinite(a) and a == pytest.approx(b, abs=0.02)


def test_ring_scores_at_120_degrees_equal_those_at_30():
    # the conventional beam of the 8-element ring looking at 120 degrees is the beam at
    # 30 degrees turned by 90 (a symmetry of the ring): same pointing error (none) and
    # the same peak sidelobe
    def both(look):
        w = (geometry.steering_vector(RING, look, 0.0) / len(RING))[None, :]
        pe = scores.pointing_error_deg(w, RING[None], look)
        psl = scores.peak_sidelobe_db(w, RING[None], look)
        return float(pe[0]), float(psl[0])

    pe120, psl120 = both(120.0)
    pe30, psl30 = both(30.0)
    assert abs(pe120) < 0.05 and abs(pe30) < 0.05
    assert np.isfinite(psl120) and psl120 == pytest.approx(psl30, abs=0.05)
    # the window is the ring's own beamwidth, not the 30-degree fallback
    assert scores._default_beamwidth(RING[None], 120.0, 0.0) == pytest.approx(
        geometry.half_power_beamwidth_deg(RING, 30.0, 0.0, resolution_deg=0.01), abs=0.02)
