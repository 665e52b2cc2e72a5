"""Digital Butterworth low-pass design (bilinear transform with pre-warping) and the
initial state of its transposed direct form II for a steady input, without scipy.

The steps are those of scipy.signal (scipy 1.17: ``butter`` -> ``iirfilter`` with
``buttap``, ``lp2lp_zpk``, ``bilinear_zpk``, ``zpk2tf``; ``lfilter_zi``), done with the
same numpy operations in the same order so that the coefficients are the very floats
scipy gives (checked bit for bit against scipy by tests/test_butterworth.py); importing
scipy.signal costs about 0.65 s, more than all the rest of a run's start. Reference:
Oppenheim & Schafer, Discrete-Time Signal Processing (3rd ed., 2010), 7.1.2 (bilinear
transformation) and 7.2 (Butterworth) [published].
"""

from __future__ import annotations

import math

import numpy as np


def butter_lowpass(order: int, cutoff: float, rate: float) -> tuple[np.ndarray, np.ndarray]:
    """(b, a) of the ``order``-th Butterworth low-pass with its -3 dB point at ``cutoff`` Hz
    for samples at ``rate`` Hz, a[0] == 1; as ``scipy.signal.butter(order, cutoff, fs=rate)``.
    Raises ValueError unless 0 < cutoff < rate / 2 and order is a positive integer."""
    if isinstance(order, bool) or int(order) != order or order < 1:
        raise ValueError(f"filter order must be a positive integer, got {order!r}")
    order = int(order)
    fs = float(rate)
    wn = np.asarray(cutoff, dtype=np.float64) / (fs / 2)
    if not (0 < wn < 1):
        raise ValueError(f"the cut-off must be between 0 and {fs / 2:g} Hz, got {cutoff!r}")
    # analog prototype (buttap): no zeros, poles on the unit circle's left half
    m = np.arange(-order + 1, order, 2, dtype=np.float64)
    poles = -np.exp(1j * np.pi * m / (2 * order))
    zeros = np.asarray([], dtype=np.float64)
    gain = 1.0
    # pre-warp for fs = 2 (normalised frequency), then move the cut-off (lp2lp_zpk)
    warped = 2 * 2.0 * np.tan(np.pi * wn / 2.0)
    wo = float(warped)
    zeros, poles, gain = wo * zeros, wo * poles, gain * wo**order
    # bilinear transform (bilinear_zpk, fs = 2)
    fs2 = 2.0 * 2.0
    zeros_z = np.concatenate(((fs2 + zeros) / (fs2 - zeros), -np.ones(order)))
    poles_z = (fs2 + poles) / (fs2 - poles)
    gain_z = gain * np.real(np.prod(fs2 - zeros) / np.prod(fs2 - poles))
    # zpk2tf
    k = np.asarray(gain_z, dtype=np.result_type(np.real(zeros_z), np.real(poles_z), gain_z))
    k = np.atleast_1d(k)
    b = np.multiply(k, _poly(zeros_z))
    a = np.atleast_1d(np.asarray(_poly(poles_z)))
    return b, a


def _poly(roots: np.ndarray) -> np.ndarray:
    """The monic polynomial with these roots, highest power first (numpy.poly's steps)."""
    a = np.ones((1,), dtype=roots.dtype)
    one = np.ones_like(roots[0])
    for root in roots:
        a = np.convolve(a, np.stack((one, -root)), mode="full")
    if np.iscomplexobj(a):
        as_complex = np.asarray(roots, dtype=np.complex128)
        if np.all(np.sort(np.imag(as_complex)) == np.sort(np.imag(np.conj(as_complex)))):
            a = np.array(np.real(a), copy=True)
    return a


def steady_state(b: np.ndarray, a: np.ndarray) -> np.ndarray:
    """The state (transposed direct form II) after a long input of 1: as
    ``scipy.signal.lfilter_zi(b, a)`` for a[0] != 0 and len(b) == len(a)."""
    b, a = np.atleast_1d(np.asarray(b)), np.atleast_1d(np.asarray(a))
    if a[0] != 1.0:
        b, a = b / a[0], a / a[0]
    if len(a) != len(b) or len(a) < 2 or not math.isfinite(float(a[0])):
        raise ValueError("b and a must have the same length, at least 2")
    n = len(a)
    companion = np.zeros((n - 1, n - 1), dtype=(-a[1:] / (1.0 * a[0:1])).dtype)
    companion[0, :] = -a[1:] / (1.0 * a[0:1])
    companion[np.arange(1, n - 1), np.arange(0, n - 2)] = 1
    i_minus_a = np.asarray(np.eye(n - 1) - companion.T, dtype=np.result_type(a, b))
    return np.linalg.solve(i_minus_a, b[1:] - a[1:] * b[0])
