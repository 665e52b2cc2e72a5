"""Figures from a trace: tilt, drift, saturation, recovery. Plain numpy."""

from __future__ import annotations

import math

import numpy as np

SATURATED = 0.999  # |duty| at or above this counts as saturated


def run_figures(trace: dict[str, np.ndarray]) -> dict[str, float | None]:
    """Summary figures of a run (degrees for angles, metres, fractions)."""
    pitch = trace.get("pitch_rad", np.zeros(0))
    if pitch.size == 0:
        return {"max_abs_pitch_deg": None, "rms_pitch_deg": None, "drift_m": None,
                "max_drift_m": None, "saturation_fraction": None, "mean_abs_duty": None}
    x = trace["x_m"]
    duty = np.maximum(np.abs(trace["duty_l"]), np.abs(trace["duty_r"]))
    return {
        "max_abs_pitch_deg": float(np.degrees(np.max(np.abs(pitch)))),
        "rms_pitch_deg": float(np.degrees(np.sqrt(np.mean(pitch**2)))),
        "drift_m": float(x[-1] - x[0]),
        "max_drift_m": float(np.max(np.abs(x - x[0]))),
        "saturation_fraction": float(np.mean(duty >= SATURATED)),
        "mean_abs_duty": float(np.mean(0.5 * (np.abs(trace["duty_l"]) + np.abs(trace["duty_r"])))),
    }


def recovery_time(t: np.ndarray, pitch: np.ndarray, after: float, band: float) -> float | None:
    """Seconds after ``after`` until |pitch| stays within ``band`` (rad); None if never."""
    mask = t >= after
    if not mask.any():
        return None
    outside = np.nonzero(np.abs(pitch[mask]) > band)[0]
    if outside.size == 0:
        return 0.0
    last = outside[-1]
    times = t[mask]
    if last + 1 >= times.size:
        return None
    return float(times[last + 1] - after)


def settle_time(t: np.ndarray, pitch: np.ndarray, band: float = math.radians(2.0)) -> float | None:
    """Time from the start until |pitch| stays within ``band`` (rad); None if never."""
    return recovery_time(t, pitch, float(t[0]) if t.size else 0.0, band)
