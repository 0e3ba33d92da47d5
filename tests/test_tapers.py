"""The numpy tapers against the reference library and the published sidelobe levels.

Outside references: ``scipy.signal.windows.chebwin`` and ``.taylor`` (value for value);
Dolph (1946) for the equiripple Chebyshev sidelobes; Taylor (1955) for the near-in
sidelobes of the Taylor taper sitting near the design level.
"""
import warnings

import numpy as np
import pytest
from scipy.signal import windows

from adapt.numerics.tapers import chebyshev_taper, taylor_taper


@pytest.mark.parametrize("m", [0, 1, 2, 3, 4, 7, 8, 16, 17, 31, 64, 101])
@pytest.mark.parametrize("level", [13.0, 25.0, 30.0, 47.5, 80.0])
def test_chebyshev_equals_scipy(m, level):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)    # scipy: spectral-analysis advice
        want = windows.chebwin(m, at=level, sym=True)
    assert np.array_equal(chebyshev_taper(m, level), want)


@pytest.mark.parametrize("m", [0, 1, 2, 5, 16, 33, 64])
@pytest.mark.parametrize("nbar", [1, 2, 4, 7])
@pytest.mark.parametrize("level", [20.0, 30.0, 35.5, 60.0])
def test_taylor_equals_scipy(m, nbar, level):
    want = windows.taylor(m, nbar=nbar, sll=level, norm=False, sym=True)
    assert np.array_equal(taylor_taper(m, nbar, level), want)


def _sidelobes_db(w, pad=8192):
    h = np.abs(np.fft.fft(w, pad))
    h = 20 * np.log10(np.maximum(h / h.max(), 1e-300))
    half = h[:pad // 2]
    first_null = np.argmax(np.diff(half) > 0)      # end of the main lobe
    return half[first_null:]


@pytest.mark.parametrize("m,level", [(16, 30.0), (21, 40.0), (40, 55.0)])
def test_chebyshev_sidelobes_are_equiripple_at_the_level(m, level):
    # Dolph (1946): every sidelobe peaks at exactly -level dB
    side = _sidelobes_db(chebyshev_taper(m, level))
    assert side.max() == pytest.approx(-level, abs=0.02)


def test_taylor_near_in_sidelobes_near_the_level():
    # Taylor (1955): the first nbar - 1 sidelobes sit near -level, the peak one within
    # a fraction of a dB of it for a long aperture
    side = _sidelobes_db(taylor_taper(64, 5, 35.0))
    assert -35.8 < side.max() < -34.0


@pytest.mark.parametrize("call", [lambda: chebyshev_taper(-1, 30), lambda: chebyshev_taper(2.5, 30),
                                  lambda: chebyshev_taper(8, 0), lambda: chebyshev_taper(8, float("nan")),
                                  lambda: taylor_taper(8, 0, 30), lambda: taylor_taper(8, 4, -3),
                                  lambda: chebyshev_taper(True, 30)])
def test_bad_arguments_are_refused(call):
    with pytest.raises(ValueError):
        call()
