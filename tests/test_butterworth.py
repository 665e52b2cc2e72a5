"""sandbox.butterworth against scipy.signal, the reference library: butter's (b, a) and
lfilter_zi's state bit for bit, over orders, cut-offs and sample rates drawn by hypothesis;
and the design's defining property, -3 dB at the cut-off (Oppenheim & Schafer, 3rd ed.,
7.2 [published])."""

from __future__ import annotations

import cmath
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sandbox.butterworth import butter_lowpass, steady_state

signal = pytest.importorskip("scipy.signal")

SETTINGS = settings(max_examples=400, deadline=None, derandomize=True)


@st.composite
def designs(draw):
    rate = draw(st.one_of(st.sampled_from([100.0, 200.0, 500.0, 1000.0, 2000.0, 8000.0]),
                          st.floats(min_value=1.0, max_value=1e5)))
    share = draw(st.floats(min_value=1e-4, max_value=0.4999))
    order = draw(st.integers(min_value=1, max_value=4))
    return order, rate * share, rate


@SETTINGS
@given(designs())
def test_coefficients_and_state_are_scipys_to_the_bit(design):
    order, cutoff, rate = design
    b, a = butter_lowpass(order, cutoff, rate)
    b_ref, a_ref = signal.butter(order, cutoff, fs=rate)
    assert b.dtype == b_ref.dtype and a.dtype == a_ref.dtype
    assert b.tobytes() == b_ref.tobytes() and a.tobytes() == a_ref.tobytes(), design
    assert steady_state(b, a).tobytes() == signal.lfilter_zi(b_ref, a_ref).tobytes(), design


@pytest.mark.parametrize(("order", "cutoff", "rate"), [(1, 40.0, 1000.0), (2, 40.0, 1000.0),
                                                      (2, 98.0, 200.0), (1, 5.0, 100.0)])
def test_half_power_at_the_cut_off_and_unit_gain_at_dc(order, cutoff, rate):
    """|H| = 1/sqrt(2) at the cut-off (pre-warped bilinear Butterworth) and 1 at DC."""
    b, a = butter_lowpass(order, cutoff, rate)
    z = cmath.exp(2j * math.pi * cutoff / rate)
    gain = abs(np.polyval(b, z) / np.polyval(a, z))
    assert gain == pytest.approx(1 / math.sqrt(2), rel=1e-9)
    assert float(np.sum(b) / np.sum(a)) == pytest.approx(1.0, rel=1e-12)


def test_bad_designs_refused():
    with pytest.raises(ValueError, match="cut-off"):
        butter_lowpass(2, 600.0, 1000.0)
    with pytest.raises(ValueError, match="order"):
        butter_lowpass(0, 10.0, 1000.0)
