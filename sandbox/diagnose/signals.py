"""Detectors on plain arrays for the diagnosis: swings, exponential growth, steady rises.

Also the robot's figures the findings compare a trace with: each wheel's rate,
the back-EMF speed limit, the fall rate of ``analyze``'s model, the tilt at
which the frame meets a flat floor. Thresholds are named constants (see
DEVELOPERS.md, "Diagnosis thresholds").
"""

from __future__ import annotations

import math

import numpy as np

# -- thresholds (angles in rad). Our choice unless DEVELOPERS.md marks them common practice.
OSC_MIN_AMPLITUDE = math.radians(0.1)  # half-cycles smaller than this are noise
OSC_MIN_HALF_CYCLES = 4  # two full swings before a swing counts as an oscillation
OSC_MAX_IRREGULARITY = 0.35  # std / mean of the half-periods: above it, not one frequency
DIV_FIT_LOW = math.radians(0.3)  # the exponential fit of a divergence starts here...
DIV_FIT_HIGH = math.radians(15.0)  # ...and ends here (small-angle model still fair)
DIV_MIN_GROWTH = math.e  # the fit must cover at least one e-fold
DIV_MIN_R2 = 0.95  # log-linear fit quality for "grew exponentially"


def half_cycles(t: np.ndarray, y: np.ndarray) -> list[tuple[float, float, float]]:
    """(start s, end s, peak |y|, peak time s) of each swing between zero crossings of y."""
    sign = np.sign(y)
    nonzero = np.nonzero(sign)[0]
    if nonzero.size < 2:
        return []
    s = sign[nonzero]
    changes = nonzero[1:][s[1:] != s[:-1]]
    crossings = []
    for i in changes:  # linear interpolation between the samples either side
        j = nonzero[np.searchsorted(nonzero, i) - 1]
        crossings.append(t[j] + (t[i] - t[j]) * y[j] / (y[j] - y[i]))
    out = []
    for a, b, ia, ib in zip(crossings[:-1], crossings[1:], changes[:-1], changes[1:]):
        seg = np.abs(y[ia:ib])
        k = int(np.argmax(seg))
        out.append((float(a), float(b), float(seg[k]), float(t[ia + k])))
    return out


def oscillation(t: np.ndarray, y: np.ndarray, min_amplitude: float = OSC_MIN_AMPLITUDE
                ) -> dict[str, float] | None:
    """Frequency (Hz) and growth rate (1/s) of the last regular swing of y, or None.

    Zero crossings split y into half-cycles; the last run of at least
    OSC_MIN_HALF_CYCLES consecutive half-cycles above ``min_amplitude`` with
    regular lengths is the swing. Frequency = 1 / (2 × mean half-period);
    growth rate = slope of ln(peak) against the peak times (least squares).
    """
    swings = half_cycles(t, y)
    best: list = []
    run: list = []
    for swing in swings + [None]:
        if swing is not None and swing[2] >= min_amplitude:
            run.append(swing)
            continue
        if len(run) >= OSC_MIN_HALF_CYCLES:
            best = run
        run = []
    if not best:
        return None
    halves = np.array([b - a for a, b, _, _ in best])
    if halves.std() > OSC_MAX_IRREGULARITY * halves.mean():
        return None
    peaks = np.array([p for _, _, p, _ in best])
    when = np.array([w for _, _, _, w in best])
    growth = float(np.polyfit(when, np.log(peaks), 1)[0])
    return {"frequency_hz": float(1.0 / (2.0 * halves.mean())), "growth_rate_1_s": growth,
            "half_cycles": len(best), "first_peak": float(peaks[0]),
            "last_peak": float(peaks[-1]), "start_s": float(best[0][0]),
            "end_s": float(best[-1][1])}


def exponential_growth(t: np.ndarray, y: np.ndarray, low: float = DIV_FIT_LOW,
                       high: float = DIV_FIT_HIGH) -> dict[str, float] | None:
    """Rate (1/s) at which |y| grew without changing sign up to the end, or None.

    The last stretch of one sign, from its smallest |y| on, is fitted, ln|y|
    against t, where low ≤ |y| ≤ high;
    None unless it covers DIV_MIN_GROWTH and the fit's R² reaches DIV_MIN_R2.
    """
    if y.size < 3 or y[-1] == 0:
        return None
    flipped = np.nonzero(np.sign(y) != np.sign(y[-1]))[0]
    start = int(flipped[-1]) + 1 if flipped.size else 0
    start += int(np.argmin(np.abs(y[start:])))  # the growth starts where |y| was smallest
    a = np.abs(y[start:])
    ts = t[start:]
    inside = (a >= low) & (a <= high)
    if inside.sum() < 3 or a[inside].max() < DIV_MIN_GROWTH * a[inside].min():
        return None
    logs = np.log(a[inside])
    slope, offset = np.polyfit(ts[inside], logs, 1)
    residual = logs - (slope * ts[inside] + offset)
    spread = float(np.sum((logs - logs.mean()) ** 2))
    r2 = 1.0 - float(np.sum(residual**2)) / spread if spread > 0 else 0.0
    if slope <= 0 or r2 < DIV_MIN_R2:
        return None
    return {"growth_rate_1_s": float(slope), "r2": r2, "start_s": float(ts[inside][0]),
            "end_s": float(ts[inside][-1])}


def final_run(t: np.ndarray, flag: np.ndarray) -> tuple[float, float]:
    """(seconds, start s) for which ``flag`` has held up to the last sample; (0, end) if not.

    Each sample stands for one sample period, so a flag on every tick lasts the whole trace.
    """
    if flag.size == 0 or not flag[-1]:
        return 0.0, float(t[-1]) if t.size else 0.0
    off = np.nonzero(~flag)[0]
    first = int(off[-1]) + 1 if off.size else 0
    period = float(t[1] - t[0]) if t.size > 1 else 0.0
    return float(t[-1] - t[first]) + period, float(t[first])


def steady_growth(t: np.ndarray, v: np.ndarray, window: float = 0.2,
                  from_share: float = 0.1) -> dict[str, float] | None:
    """How |v| (moving average over ``window`` s) rose to its largest value.

    The rise is timed from the last moment |v| was below ``from_share`` of that
    largest value (a jump, as a push gives, takes no time) to the moment it
    was reached; ``rising_share`` is the share of ticks in between that rose.
    """
    if v.size < 3:
        return None
    dt = float(np.median(np.diff(t)))
    n = max(1, int(round(window / dt)))
    padded = np.concatenate([np.full(n - 1, abs(v[0])), np.abs(v)])
    smooth = np.convolve(padded, np.ones(n) / n, mode="valid")  # trailing average
    peak = int(np.argmax(smooth))
    if smooth[peak] <= 0:
        return None
    low = np.nonzero(smooth[:peak + 1] < from_share * smooth[peak])[0]
    start = int(low[-1]) if low.size else 0
    if peak <= start:
        return None
    share = float(np.mean(np.diff(smooth[start:peak + 1]) > 0))
    return {"start_s": float(t[start]), "end_s": float(t[peak]), "rising_share": share,
            "peak": float(smooth[peak])}


def touching_tilt(spec) -> float:
    """Smallest tilt (rad) at which a corner of a body box reaches a flat floor."""
    radius = spec.wheels.radius
    corners = np.array([(b.at[0] + sx * b.size[0] / 2, b.at[2] + sz * b.size[2] / 2)
                        for b in spec.figures.boxes for sx in (-1, 1) for sz in (-1, 1)])
    tilts = np.radians(np.arange(0.0, 90.01, 0.1))
    lowest = np.full(tilts.shape, np.inf)
    for sign in (1.0, -1.0):  # leaning forward or back: the lowest corner's height
        heights = (-corners[:, :1] * np.sin(sign * tilts)[None, :]
                   + corners[:, 1:] * np.cos(tilts)[None, :])
        lowest = np.minimum(lowest, heights.min(axis=0))
    touching = np.nonzero(lowest <= -radius)[0]
    if touching.size:
        return float(tilts[touching[0]])
    return math.pi / 2


# --------------------------------------------------------------------- the robot's figures


def wheel_rates(trace: dict[str, np.ndarray], spec) -> np.ndarray:
    """Each wheel's rate relative to the body (rad/s), shape (2, n): recorded, or derived."""
    t = trace["t_s"]
    if "wheel_rate_l_rad_s" in trace and "wheel_rate_r_rad_s" in trace:
        return np.vstack([trace["wheel_rate_l_rad_s"], trace["wheel_rate_r_rad_s"]])
    if "wheel_l_rad" in trace and t.size > 1:
        return np.vstack([np.gradient(trace["wheel_l_rad"], t),
                          np.gradient(trace["wheel_r_rad"], t)])
    relative = trace["speed_m_s"] / spec.wheels.radius - trace["pitch_rate_rad_s"]
    return np.vstack([relative, relative])


def speed_limit(trace: dict[str, np.ndarray], spec) -> np.ndarray:
    """The back-EMF limit of each tick (rad/s at the wheel): (battery − driver drop) / ke."""
    f = spec.figures
    volts = trace.get("battery_v")
    if volts is None or not np.all(np.isfinite(volts)):
        volts = np.full(trace["t_s"].shape, f.battery_voltage)
    return np.maximum(volts - spec.driver.voltage_drop, 1e-9) / f.back_emf_constant


def fall_rate(spec) -> float:
    """The robot's own fall rate (1/s): the unstable open-loop pole of ``analyze``'s model."""
    from ..analysis import PlanarParams, duty_input_model, fall_time_constant

    tau = fall_time_constant(duty_input_model(PlanarParams.from_spec(spec))[0])
    return 1.0 / tau if math.isfinite(tau) and tau > 0 else 0.0
