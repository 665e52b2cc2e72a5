"""The rough floor's smoothing against scipy.ndimage.gaussian_filter (reference library)."""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter

from sandbox.ground import gaussian_smooth_wrapped


@pytest.mark.parametrize("sigma", [0.1, 0.6, 1.5, 3.7, 10.0, 50.0])
@pytest.mark.parametrize("shape", [(181, 25), (901, 121), (40, 7)])
def test_bit_identical_to_scipy(sigma, shape):
    """Source: scipy.ndimage.gaussian_filter(mode="wrap"), the filter the floor used
    before; the heights (and so the trace bytes of rough-floor runs) must not move."""
    noise = np.random.default_rng(3).standard_normal(shape)
    expected = gaussian_filter(noise, sigma=sigma, mode="wrap")
    assert np.array_equal(gaussian_smooth_wrapped(noise, sigma), expected)
