"""Verdicts of disturbance tests: a finished run's trace against its test's criteria.

Plain numpy: each check (stays up, back within the band after each disturbance,
position held, speed follows the setpoint, distance travelled) with its measured
figure and limit, in SI units. The tests themselves are :mod:`sandbox.events`.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from .events import TestPlan, Timeline


def _check(label: str, measured: float | None, limit: float, passed: bool,
           unit: str) -> dict[str, Any]:
    text = "-" if measured is None else f"{measured:.3g} {unit}".strip()
    return {"label": label, "measured": text, "limit": f"{limit:.3g} {unit}".strip(),
            "value": measured, "limit_value": limit, "passed": bool(passed)}


def judge(plan: TestPlan, status: str, trace: dict[str, np.ndarray],
          timeline: Timeline) -> dict[str, Any]:
    """Pass/fail of a run against its test's criteria."""
    c = plan.criteria
    t = trace["t_s"]
    pitch = trace["pitch_rad"]
    checks = []
    if c.must_not_fall:
        checks.append(_check("stays up", 0.0 if status != "fell" else 1.0, 0.0,
                             status not in ("fell", "controller_error", "interrupted"), ""))
        checks[-1]["measured"] = status
        checks[-1]["limit"] = "completed"
    if c.recover_within is not None and timeline.disturbances and t.size:
        times = sorted(timeline.disturbances)
        worst = 0.0
        unsettled = None  # the first disturbance the tilt never settled after
        for i, start in enumerate(times):
            end = times[i + 1] if i + 1 < len(times) else float(t[-1]) + 1e-9
            recovery = recovery_after(t, pitch, start, end, c.recover_band)
            worst = math.inf if recovery is None else max(worst, recovery)
            if recovery is None and unsettled is None:
                unsettled = (start, end)
        label = f"back within {math.degrees(c.recover_band):g} deg after each disturbance"
        checks.append(_check(label, None if math.isinf(worst) else worst, c.recover_within,
                             worst <= c.recover_within and status == "completed", "s"))
        if unsettled is not None:
            checks[-1]["measured"] = unsettled_text(t, pitch, *unsettled, c.recover_band)
    if c.max_drift is not None and t.size:
        expected = _expected_distance(t, timeline)
        drift = float(np.max(np.abs(trace["x_m"] - expected)))
        checks.append(_check("position held", drift, c.max_drift, drift <= c.max_drift, "m"))
    if c.max_speed_error is not None and t.size:
        error = _speed_error(t, trace["speed_m_s"], timeline)
        checks.append(_check("speed follows the setpoint (rms)", error, c.max_speed_error,
                             error is not None and error <= c.max_speed_error, "m/s"))
    if c.min_distance is not None and t.size:
        distance = float(trace["x_m"][-1])
        checks.append(_check("distance travelled", distance, c.min_distance,
                             distance >= c.min_distance, "m"))
    return {"name": plan.name, "passed": all(ch["passed"] for ch in checks), "checks": checks,
            "disturbance_times_s": list(timeline.disturbances)}


def recovery_after(t: np.ndarray, pitch: np.ndarray, start: float, end: float,
                   band: float) -> float | None:
    """Seconds from ``start`` until the tilt stays within ``band`` of where it was before.

    "Where it was" is the median tilt over the half second before the
    disturbance (a robot holding a slope leans into it). None if it never
    settles before ``end``.
    """
    before = (t >= start - 0.5) & (t < start)
    reference = float(np.median(pitch[before])) if before.any() else 0.0
    window = (t >= start) & (t < end)
    if not window.any():
        return None
    times = t[window]
    outside = np.nonzero(np.abs(pitch[window] - reference) > band)[0]
    if outside.size == 0:
        return 0.0
    last = int(outside[-1])
    if last + 1 >= times.size:
        return None
    return float(times[last + 1] - start)


def unsettled_text(t: np.ndarray, pitch: np.ndarray, start: float, end: float,
                   band: float) -> str:
    """What a failed recovery measured: how far outside the band the tilt still was."""
    before = (t >= start - 0.5) & (t < start)
    reference = float(np.median(pitch[before])) if before.any() else 0.0
    inside = np.nonzero((t >= start) & (t < end))[0]
    if inside.size == 0:
        return f"no samples after the disturbance at {start:.2f} s"
    last = int(inside[-1])
    off = math.degrees(abs(float(pitch[last]) - reference) - band)
    return (f"not back: {off:.2g} deg outside the band at {t[last]:.2f} s "
            f"(after the disturbance at {start:.2f} s)")


def _setpoint_speed(t: np.ndarray, timeline: Timeline) -> np.ndarray:
    speed = np.zeros_like(t)
    for when, value, _ in timeline.setpoint_changes:
        speed[t >= when - 1e-9] = value
    return speed


def _expected_distance(t: np.ndarray, timeline: Timeline) -> np.ndarray:
    speed = _setpoint_speed(t, timeline)
    dt = np.diff(t, prepend=t[0])
    return np.cumsum(speed * dt)


def _speed_error(t: np.ndarray, speed: np.ndarray, timeline: Timeline,
                 settle: float = 1.0) -> float | None:
    """RMS speed error (m/s), leaving out ``settle`` s after each setpoint change."""
    target = _setpoint_speed(t, timeline)
    mask = np.ones_like(t, dtype=bool)
    for when, _, _ in timeline.setpoint_changes:
        mask &= ~((t >= when) & (t < when + settle))
    # with no setpoint event at all the target is 0 m/s throughout: holding still
    if not mask.any():
        return None
    return float(np.sqrt(np.mean((speed[mask] - target[mask]) ** 2)))
