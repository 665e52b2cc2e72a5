"""Digital Butterworth low-pass design (bilinear transform with pre-warping) and the
initial state of its transposed direct form II for a steady input, without scipy.

The steps are those of scipy.signal (scipy 1.17: ``butter`` -> ``iirfilter`` with
``buttap``, ``lp2lp_zpk``, ``bilinear_zpk``, ``zpk2tf``; ``lfilter_zi``), done with the
same numpy operations in the same order so that the coefficients are the very floats
scipy gives (checked bit for bit against scipy by tests/test_butterworth.py); importing
scipy.signal costs about 0.65 s, more than all the rest of a run's start. Reference:
Oppenheim & Schafer, Discrete-Time Signal Processing (3rd ed., 2010), 7.1.2 (bilinear
transformation) and 7.2 (Butterworth) [published]. :class:`LowPass` runs such a
filter on three axes, one sample per call: the IMU's own filter (sandbox.imu).
"""

from __future__ import annotations

import math

import numpy as np

Vector3 = tuple[float, float, float]


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


class LowPass:
    """A Butterworth low-pass on three axes, one sample per call (direct form II transposed).

    ``order`` 1 or 2, ``cutoff`` (Hz) below ``rate`` / 2 (Hz, the sample rate). The first
    sample sets the state to that of a long steady input: a sensor is powered before a run.
    """

    def __init__(self, order: int, cutoff: float, rate: float):
        if order not in (1, 2):
            raise ValueError(f"filter order must be 1 or 2, got {order!r}")
        if not (math.isfinite(cutoff) and 0 < cutoff < rate / 2):
            raise ValueError(f"filter cut-off must be between 0 and {rate / 2:g} Hz "
                             f"(half the sample rate), got {cutoff!r}")
        b, a = butter_lowpass(order, cutoff, rate)  # scipy's butter's floats
        self.order, self.cutoff, self.rate = order, float(cutoff), float(rate)
        self.b = tuple(float(v) for v in b)
        self.a = tuple(float(v) for v in a)  # a[0] == 1
        self._unit_state = tuple(float(v) for v in steady_state(b, a))
        self._state: list[list[float]] | None = None

    def reset(self, steady: Vector3 | None = None) -> None:
        """Forget the past; with ``steady``, start as after a long constant input of it."""
        self._state = (None if steady is None else
                       [[z * float(x) for z in self._unit_state] for x in steady])

    def __call__(self, x: Vector3) -> Vector3:
        """The filter's output (three floats) for the next sample ``x``."""
        if self._state is None:
            self.reset(x)
        b, a = self.b, self.a
        # written out per axis (transposed direct form II, as scipy.signal.lfilter): this
        # runs once a sample, often every physics step
        sx, sy, sz = self._state
        if self.order == 1:
            # first order: y = b0·x + s0; s0 = b1·x − a1·y, each axis written out
            b0, b1, a1 = b[0], b[1], a[1]
            value = x[0]
            out_x = b0 * value + sx[0]
            sx[0] = b1 * value - a1 * out_x
            value = x[1]
            out_y = b0 * value + sy[0]
            sy[0] = b1 * value - a1 * out_y
            value = x[2]
            out_z = b0 * value + sz[0]
            sz[0] = b1 * value - a1 * out_z
            return out_x, out_y, out_z
        # second order: y = b0·x + s0; s0 = b1·x − a1·y + s1; s1 = b2·x − a2·y, each axis
        # written out (no call per axis)
        b0, b1, b2 = b
        a1, a2 = a[1], a[2]
        value = x[0]
        out_x = b0 * value + sx[0]
        sx[0] = b1 * value - a1 * out_x + sx[1]
        sx[1] = b2 * value - a2 * out_x
        value = x[1]
        out_y = b0 * value + sy[0]
        sy[0] = b1 * value - a1 * out_y + sy[1]
        sy[1] = b2 * value - a2 * out_y
        value = x[2]
        out_z = b0 * value + sz[0]
        sz[0] = b1 * value - a1 * out_z + sz[1]
        sz[1] = b2 * value - a2 * out_z
        return out_x, out_y, out_z
