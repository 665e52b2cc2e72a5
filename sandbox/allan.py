"""Allan deviation (IEEE Std 952): how the noise of a rate sensor's samples averages
with the averaging time. The check on the IMU model's noise (white noise falls as
N/√τ, the bias walk rises as K·√(τ/3)); plain numpy.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def allan_deviation(
    rate: np.ndarray, sample_rate: float, taus: Any, overlapping: bool = True
) -> np.ndarray:
    """Allan deviation of rate samples (unit of ``rate``) at each averaging time in ``taus`` (s).

    The samples are integrated to an angle θ_k = τ₀·Σ_{i<k} rate_i (θ_0 = 0,
    τ₀ = 1/sample_rate), then :func:`allan_deviation_from_phase` applies.
    Fractional-frequency data y with τ₀ = 1 s is the case ``sample_rate = 1``.
    """
    if not (math.isfinite(sample_rate) and sample_rate > 0):
        raise ValueError(f"sample_rate must be > 0 Hz, got {sample_rate!r}")
    samples = np.asarray(rate, dtype=float)
    if samples.ndim != 1:
        raise ValueError(f"rate must be one-dimensional, got shape {samples.shape}")
    period = 1.0 / sample_rate
    angle = np.concatenate(([0.0], np.cumsum(samples))) * period
    return allan_deviation_from_phase(angle, period, taus, overlapping)


def allan_deviation_from_phase(
    phase: np.ndarray, sample_period: float, taus: Any, overlapping: bool = True
) -> np.ndarray:
    """Allan deviation from integrated samples θ_0..θ_{N−1} spaced ``sample_period`` (s).

    σ²(τ) = Σ (θ_{k+2m} − 2θ_{k+m} + θ_k)² / (2 τ² · count), τ = m·τ₀, with m
    the nearest whole number of sample periods. Overlapping: every k from 0
    to N−2m−1 (count = N − 2m); otherwise k steps by m. Raises ValueError for
    a τ shorter than one period or longer than half the record.
    """
    theta = np.asarray(phase, dtype=float)
    tau_array = np.atleast_1d(np.asarray(taus, dtype=float))
    result = np.empty(tau_array.shape)
    for index, tau in enumerate(tau_array):
        m = int(round(tau / sample_period))
        if m < 1 or 2 * m > theta.size - 1:
            raise ValueError(
                f"tau {tau:g} s needs 1 to {(theta.size - 1) // 2} sample periods of "
                f"{sample_period:g} s; the record has {theta.size} points"
            )
        step = 1 if overlapping else m
        ahead, middle, behind = theta[2 * m :: step], theta[m:-m:step], theta[: -2 * m : step]
        second_difference = ahead - 2.0 * middle + behind
        span = m * sample_period
        result[index] = math.sqrt(
            float(np.dot(second_difference, second_difference))
            / (2.0 * span * span * second_difference.size)
        )
    return result
