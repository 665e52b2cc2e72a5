"""Uncertainty of a least-squares fit: covariance from the Jacobian and the residuals.

For residuals r(β) of n samples and k parameters at the optimum, with Jacobian J:
s² = Σr² / (n − k), covariance C = s² (JᵀJ)⁻¹, and the 95 % interval of parameter i is
β_i ± t₀.₉₇₅(n − k) · √C_ii (Student's t). The pseudo-inverse is used so that a parameter
the data do not determine shows as an infinite interval rather than an error.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats


@dataclass(frozen=True)
class Estimate:
    """A fitted value (SI) with its 95 % interval."""

    value: float
    low: float
    high: float

    @property
    def half_width(self) -> float:
        return (self.high - self.low) / 2


def covariance(jacobian: np.ndarray, residuals: np.ndarray) -> np.ndarray:
    """s² (JᵀJ)⁻¹ for residuals of n samples and k = columns of J parameters."""
    n, k = jacobian.shape
    dof = max(n - k, 1)
    s2 = float(residuals @ residuals) / dof
    jtj = jacobian.T @ jacobian
    try:
        cov = np.linalg.inv(jtj)
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(jtj)
    if not np.all(np.isfinite(cov)):
        cov = np.full((k, k), math.inf)
    return s2 * cov


def t_factor(dof: int) -> float:
    """Two-sided 95 % Student's t quantile for ``dof`` degrees of freedom."""
    return float(stats.t.ppf(0.975, max(dof, 1)))


def intervals(values: np.ndarray, cov: np.ndarray, dof: int) -> list[Estimate]:
    """95 % intervals of each parameter from a covariance matrix."""
    t = t_factor(dof)
    out = []
    for value, var in zip(values, np.diag(cov)):
        half = t * math.sqrt(var) if var >= 0 and math.isfinite(var) else math.inf
        out.append(Estimate(float(value), float(value - half), float(value + half)))
    return out


def propagate(function, values: np.ndarray, cov: np.ndarray, dof: int,
              relative_step: float = 1e-6) -> Estimate:
    """95 % interval of a scalar function of fitted parameters (first-order, delta method):
    var f = ∇fᵀ C ∇f, the gradient by central differences."""
    values = np.asarray(values, dtype=float)
    centre = float(function(values))
    grad = np.zeros(values.size)
    for i in range(values.size):
        h = relative_step * max(abs(values[i]), 1e-12)
        up, down = values.copy(), values.copy()
        up[i] += h
        down[i] -= h
        grad[i] = (function(up) - function(down)) / (2 * h)
    var = float(grad @ cov @ grad)
    half = t_factor(dof) * math.sqrt(var) if var >= 0 and math.isfinite(var) else math.inf
    return Estimate(centre, centre - half, centre + half)
