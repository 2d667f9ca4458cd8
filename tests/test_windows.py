"""Blending windows against scipy's and numpy's reference windows, and their partition of unity."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.signal import windows as sw

from fcnkit.windows import ramp, window


@pytest.mark.parametrize("r", [1, 2, 3, 8, 31, 64])
def test_full_hann_is_scipy_hann_at_pixel_centres(r):
    # scipy.signal.windows.hann(M, sym=True)[k] = 0.5 - 0.5 cos(2πk/(M-1)). Our window of 2r pixels samples
    # the same curve at pixel centres, i.e. the odd samples of a symmetric Hann window of 4r+1 points; it
    # never reaches 0 at its ends (scipy's does), so a tile's edge pixels keep a small positive weight.
    ours = window("hann", 2 * r, r, r)
    ref = sw.hann(4 * r + 1, sym=True)[1::2]
    np.testing.assert_allclose(ours, ref, atol=1e-12)
    assert ours.min() > 0


@pytest.mark.parametrize("r", [1, 2, 5, 16, 50])
def test_full_linear_is_numpy_bartlett_at_pixel_centres(r):
    # numpy.bartlett(M)[k] = 1 - |2k/(M-1) - 1| (numpy docs); ours is its odd samples for M = 4r+1, for the same
    # reason as above: pixel centres, no zero weight at the ends.
    np.testing.assert_allclose(window("linear", 2 * r, r, r), np.bartlett(4 * r + 1)[1::2], atol=1e-12)


def test_tapered_window_is_scipy_tukey_shape():
    # A Tukey window (scipy.signal.windows.tukey) is a flat top with Hann tapers. A (2n+1)-point Tukey window with
    # alpha = 2r/n has tapers of alpha·(M-1)/2 = 2r sample intervals; its odd samples are our n-pixel window
    # tapered over r pixels on each side.
    n, r = 40, 10
    ours = window("hann", n, r, r)
    ref = sw.tukey(2 * n + 1, alpha=2 * r / n, sym=True)[1::2]
    np.testing.assert_allclose(ours, ref, atol=1e-12)


@settings(max_examples=60, deadline=None)
@given(kind=st.sampled_from(["hann", "linear", "none"]), n=st.integers(1, 200))
def test_neighbouring_ramps_sum_to_one(kind, n):
    # Partition of unity (common practice for overlap-add blending): where two tiles overlap by n pixels the
    # falling ramp of one and the rising ramp of the other add up to exactly 1.
    falling = window(kind, n, 0, n)
    rising = window(kind, n, n, 0)
    np.testing.assert_allclose(falling + rising, 1.0, atol=1e-12)


def test_border_sides_are_flat_and_centre_crop_is_binary():
    assert np.all(window("hann", 10, 0, 0) == 1)
    w = window("none", 12, 4, 6)
    assert set(np.unique(w)) == {0.0, 1.0}
    np.testing.assert_array_equal(w, [0, 0, 1, 1, 1, 1, 1, 1, 1, 0, 0, 0])
    np.testing.assert_array_equal(ramp("none", 5), [0, 0, 1, 1, 1])


def test_bad_arguments():
    with pytest.raises(ValueError, match="window: 'gauss' is not one of"):
        ramp("gauss", 3)
    with pytest.raises(ValueError, match="do not fit"):
        window("hann", 4, 5, 0)
