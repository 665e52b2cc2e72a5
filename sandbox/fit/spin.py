"""Spin test fit: motor figures of each side from encoder counts and duty.

The robot stands on a stand, wheels free, and the board drives the sequence of
:mod:`sandbox.fit.sequence` on both wheels while logging t, duty_l/duty_r (commanded),
ticks_l/ticks_r (motor-shaft encoder counts) and, if it can, battery_v.

Model (SOURCES §5, first-order DC motor, inductance neglected; SOURCES §11, Karnopp
friction and a dead zone for the gearbox play), figures at the output shaft:
  J ω' = g (D V − K_e ω) − T_c sign ω,   g = K_t / R,  τ = J / (g K_e)
so a steady speed is ω = D V / K_e − T_c / (g K_e): a line in D·V whose slope is the
no-load speed per volt (1/K_e) and whose offset is the Coulomb friction. A duty step
gives ω(t) = ω∞ + (ω0 − ω∞) e^(−t/τ). A no-load test cannot measure g (stall figures):
torques use the file's stall torque / rated voltage, and say so.

What each part of the sequence shows:
- steady segments (step up, step down, reversal): speed per volt and Coulomb friction,
  fitted by linear least squares;
- the steps: the time constant τ (nonlinear least squares on the counts);
- slow ramp down while moving: the speed collapses at the deadband if the deadband is
  above the Coulomb duty D_c = T_c / (g V); otherwise the deadband is not observable;
- slow ramp up from rest: the breakaway duty (static friction, or the deadband if larger);
- the ramp through zero: the motor side turns through the play before the wheel moves
  only if the wheel side's own friction holds the wheel; then the counts show the play as
  a plateau. If the wheel follows at once, the play is not observable with motor-shaft
  encoders and is left alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from ..actuators import quantise_duty
from .logs import BenchLog, LogError
from .stats import Estimate, covariance, intervals, propagate

STEADY_MIN_S = 0.8   # a constant duty held this long counts as a steady segment
SPEED_WINDOW_S = 0.05  # counts differenced over this window for a speed estimate
RAMP_MIN_S = 2.0     # a ramp shorter than this is not used


@dataclass(frozen=True)
class SideFit:
    """Figures of one side (output shaft, SI). Estimates are None where not determined."""

    side: str
    speed_per_volt: Estimate      # rad/s per V (1 / K_e)
    friction_speed: Estimate      # rad/s: the steady line's offset, T_c / (g K_e)
    time_constant: Estimate | None
    deadband: Estimate | None
    breakaway_duty: Estimate | None
    backlash: Estimate | None
    notes: tuple[str, ...] = ()
    curves: dict = field(default_factory=dict, compare=False, repr=False)


@dataclass(frozen=True)
class SpinFit:
    supply_voltage: float
    supply_from: str
    sides: tuple[SideFit, ...]


def speed_series(t: np.ndarray, angle: np.ndarray, window: float = SPEED_WINDOW_S
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Speed (rad/s) at each sample from angle differences over ±window/2 (uneven t ok)."""
    lo = np.searchsorted(t, t - window / 2, side="left")
    hi = np.searchsorted(t, t + window / 2, side="right") - 1
    lo = np.clip(lo, 0, t.size - 1)
    hi = np.clip(hi, 0, t.size - 1)
    span = t[hi] - t[lo]
    with np.errstate(invalid="ignore", divide="ignore"):
        speed = np.where(span > 0, (angle[hi] - angle[lo]) / np.where(span > 0, span, 1), 0.0)
    return 0.5 * (t[lo] + t[hi]), speed


def runs(duty: np.ndarray, t: np.ndarray) -> list[tuple[int, int]]:
    """(first, last) sample indices of runs of constant commanded duty."""
    out = []
    start = 0
    for i in range(1, duty.size + 1):
        if i == duty.size or abs(duty[i] - duty[start]) > 1e-9:
            out.append((start, i - 1))
            start = i
    return out


def fit_side(t: np.ndarray, ticks: np.ndarray, duty: np.ndarray, supply: np.ndarray,
             counts_per_rad: float, pwm_bits: int, side: str, source: str) -> SideFit:
    """Fit one side's spin log; see the module docstring."""
    angle = (ticks - ticks[0]) / counts_per_rad
    applied = np.array([quantise_duty(float(d), pwm_bits, 0.0) for d in duty])
    notes: list[str] = []
    all_runs = runs(duty, t)
    steady = [(a, b) for a, b in all_runs
              if t[b] - t[a] >= STEADY_MIN_S and abs(duty[a]) > 0.05]
    if len(steady) < 2:
        raise LogError(source, f"spin ({side}): fewer than two steady duty segments of "
                       f"{STEADY_MIN_S:g} s or more (found {len(steady)}); log the full sequence")
    # ---- steady line: ω = k_v·(D V) − ω_f·sign(D), points from sub-windows of the last half
    volts, speeds, signs = [], [], []
    for a, b in steady:
        t_start = t[a] + 0.5 * (t[b] - t[a])
        edges = np.linspace(t_start, t[b], 6)
        for lo_t, hi_t in zip(edges[:-1], edges[1:]):
            lo, hi = np.searchsorted(t, lo_t), np.searchsorted(t, hi_t, side="right") - 1
            if hi <= lo:
                continue
            volts.append(applied[a] * float(np.mean(supply[lo:hi + 1])))
            speeds.append((angle[hi] - angle[lo]) / (t[hi] - t[lo]))
            signs.append(math.copysign(1.0, applied[a]))
    volts, speeds, signs = np.array(volts), np.array(speeds), np.array(signs)
    if np.max(np.abs(speeds)) < 20 / counts_per_rad:
        raise LogError(source, f"spin ({side}): the wheel did not turn (encoder counts barely "
                       "change): check the encoder wiring and the duty column")
    design = np.column_stack([volts, -signs])
    coef, *_ = np.linalg.lstsq(design, speeds, rcond=None)
    residuals = speeds - design @ coef
    cov_line = covariance(design, residuals)
    dof_line = max(speeds.size - 2, 1)
    k_v, w_f = intervals(coef, cov_line, dof_line)
    if not k_v.value > 0:
        raise LogError(source, f"spin ({side}): the speed does not rise with the duty "
                       "(is the encoder counting backwards? swap its channels)")

    def line_speed(d_applied, volt):
        return k_v.value * d_applied * volt - w_f.value * np.sign(d_applied)

    # ---- time constant from the steps (shared τ; per step θ0, ω0, ω∞)
    steps = [(a, b) for a, b in steady if a > 0]
    tau = _fit_tau(t, angle, steps, counts_per_rad, line_speed(applied, supply))
    if tau is None:
        notes.append("time constant: no clean duty step to fit")
    tau_value = tau.value if tau is not None else 0.0
    tc, speed = speed_series(t, angle)
    speed = np.interp(t, tc, speed)
    resolution = 3.0 / (counts_per_rad * SPEED_WINDOW_S)
    ramps = _ramps(t, duty)
    deadband = breakaway = backlash = None
    d_coulomb = w_f.value / (k_v.value * float(np.mean(supply)))
    # ---- deadband: the ramp down while moving
    for a, b in ramps:
        if duty[a] > 0.05 and duty[b] < duty[a]:
            deadband = _deadband(t, duty, applied, supply, speed, a, b, line_speed, tau_value,
                                 d_coulomb, resolution, notes, side)
            break
    else:
        notes.append("deadband: no slow ramp down from a moving wheel in the log")
    # ---- breakaway: ramp up from rest (and the reverse breakaway in the ramp through zero)
    breaks = []
    for a, b in ramps:
        if abs(duty[a]) < 1e-9 and duty[b] > 0.05:
            found = _breakaway(t, duty, speed, angle, a, b, line_speed, applied, supply,
                               tau_value, resolution, +1)
            if found is not None:
                breaks.append(found)
        if duty[a] > 0.05 and duty[b] < -0.05:
            zero = a + int(np.argmax(duty[a:b + 1] <= 0.0))
            found = _breakaway(t, duty, speed, angle, zero, b, line_speed, applied, supply,
                               tau_value, resolution, -1)
            if found is not None:
                breaks.append(found)
    if breaks:
        values = [abs(v) for v, _ in breaks]
        half = max(h for _, h in breaks) + (max(values) - min(values)) / 2
        mean = float(np.mean(values))
        breakaway = Estimate(mean, mean - half, mean + half)
    else:
        notes.append("breakaway: no slow ramp from rest in the log")
    curves = {"t": t, "speed": speed, "line": line_speed(applied, supply), "duty": duty}
    return SideFit(side, k_v, w_f, tau, deadband, breakaway, backlash, tuple(notes), curves)


def _ramps(t: np.ndarray, duty: np.ndarray) -> list[tuple[int, int]]:
    """Index spans where the commanded duty moves steadily one way for RAMP_MIN_S or more
    (a board's duty may move in small steps: runs of equal values are allowed inside)."""
    diff = np.diff(duty)
    direction = np.sign(diff)
    out = []
    start, sense, last_move = 0, 0.0, 0
    for i, s in enumerate(direction):
        if s == 0:
            if i - last_move > 20 and sense != 0:  # held too long: the ramp ended
                if t[last_move + 1] - t[start] >= RAMP_MIN_S:
                    out.append((start, last_move + 1))
                sense = 0
            continue
        big = abs(diff[i]) > 0.02
        if sense == 0 or s != sense or big:
            if sense != 0 and t[last_move + 1] - t[start] >= RAMP_MIN_S:
                out.append((start, last_move + 1))
            start, sense = i, (0.0 if big else s)
        last_move = i
    if sense != 0 and t[last_move + 1] - t[start] >= RAMP_MIN_S:
        out.append((start, last_move + 1))
    return out


def _fit_tau(t, angle, steps, counts_per_rad, line) -> Estimate | None:
    segments = []
    for a, b in steps:
        lo = a + 1
        hi = min(b, int(np.searchsorted(t, t[a] + 1.0)))
        if hi - lo < 10:
            continue
        segments.append((lo, hi))
    if not segments:
        return None
    guess = [0.05]
    for lo, hi in segments:
        w_end = (angle[hi] - angle[hi - 5]) / (t[hi] - t[hi - 5])
        w_start = (angle[lo + 2] - angle[lo]) / (t[lo + 2] - t[lo])
        guess += [angle[lo], w_start, w_end]

    def model(p):
        out = []
        tau = p[0]
        for k, (lo, hi) in enumerate(segments):
            th0, w0, winf = p[1 + 3 * k: 4 + 3 * k]
            s = t[lo:hi + 1] - t[lo]
            pred = th0 + winf * s + (w0 - winf) * tau * (1 - np.exp(-s / tau))
            out.append((pred - angle[lo:hi + 1]) * counts_per_rad)
        return np.concatenate(out)

    lower = [1e-4] + [-np.inf] * (3 * len(segments))
    upper = [10.0] + [np.inf] * (3 * len(segments))
    sol = least_squares(model, guess, bounds=(lower, upper), x_scale="jac")
    cov = covariance(sol.jac, sol.fun)
    return intervals(sol.x, cov, max(sol.fun.size - sol.x.size, 1))[0]


def _deadband(t, duty, applied, supply, speed, a, b, line_speed, tau, d_coulomb, resolution,
              notes, side) -> Estimate | None:
    line = line_speed(applied, supply)
    for i in range(a, b + 1):
        if duty[i] <= 0:
            break
        if line[i] > 4 * resolution and speed[i] < 0.5 * line[i]:
            # after the cut the speed decays as (ω0 + ω_f) e^(−s/τ) − ω_f (brake and friction)
            w0, w_f = line[i], line_speed(1e-12, 1.0) * -1.0
            when = t[i] - tau * math.log((w0 + w_f) / (w0 / 2 + w_f))
            d_stop = float(np.interp(when, t[a:b + 1], duty[a:b + 1]))
            if d_stop <= 1.1 * d_coulomb + 0.003:
                break
            rate = abs((duty[b] - duty[a]) / (t[b] - t[a]))
            half = rate * (SPEED_WINDOW_S + 2 * float(np.median(np.diff(t[a:b + 1]))))
            return Estimate(d_stop, d_stop - half, d_stop + half)
    notes.append(f"deadband: below the Coulomb duty {d_coulomb:.3f} ({side} wheel stopped "
                 "smoothly), not observable; left alone")
    return None


def _breakaway(t, duty, speed, angle, a, b, line_speed, applied, supply, tau, resolution,
               sense) -> tuple[float, float] | None:
    """(duty, half-width) where sustained motion in direction ``sense`` starts."""
    line = line_speed(applied, supply) * sense
    moving = (speed * sense > np.maximum(0.3 * line, 2 * resolution)) & (line > 0)
    hold = 0.5
    for i in range(a, b + 1):
        if moving[i]:
            j = int(np.searchsorted(t, t[i] + hold))
            if j <= b and moving[i:j].all():
                when = t[i] - tau * math.log(1 / 0.7) - SPEED_WINDOW_S / 2
                d = float(np.interp(when, t[a:b + 1], duty[a:b + 1]))
                rate = abs((duty[b] - duty[a]) / (t[b] - t[a]))
                return d, rate * (SPEED_WINDOW_S + 2 * float(np.median(np.diff(t[a:b + 1]))))
    return None


def fit_play(log: BenchLog, counts_per_rad: float) -> dict[str, Estimate]:
    """Play check: wheels clamped in the stand, the board alternates a gentle duty ±D at two
    levels. The motor side turns from one face of the play to the other and presses on it;
    the counts' peak-to-peak at each level is b + 2 T / k (the gearbox's compliance k), so
    the play b is the intercept of peak-to-peak against |duty| (linear least squares)."""
    out = {}
    for side in ("l", "r"):
        if not log.has(f"ticks_{side}", f"duty_{side}"):
            continue
        duty, ticks = log.columns[f"duty_{side}"], log.columns[f"ticks_{side}"]
        levels, spans = [], []
        for a, b in runs(duty, log.t):
            if abs(duty[a]) < 0.02 or log.t[b] - log.t[a] < 0.3:
                continue
            settle = np.searchsorted(log.t, log.t[a] + 0.5 * (log.t[b] - log.t[a]))
            levels.append(duty[a])
            spans.append(float(np.median(ticks[settle:b + 1])))
        pairs = []
        for k in range(1, len(levels)):
            if levels[k] * levels[k - 1] < 0 and abs(abs(levels[k]) - abs(levels[k - 1])) < 1e-6:
                pairs.append((abs(levels[k]), abs(spans[k] - spans[k - 1]) / counts_per_rad))
        magnitudes = {round(m, 6) for m, _ in pairs}
        if len(pairs) < 3 or len(magnitudes) < 2:
            raise LogError(log.source, "play check: needs the duty alternating +D/-D at two "
                           "levels, each held 0.3 s or more, with the wheels clamped")
        design = np.column_stack([np.ones(len(pairs)), [m for m, _ in pairs]])
        values = np.array([v for _, v in pairs])
        coef, *_ = np.linalg.lstsq(design, values, rcond=None)
        residuals = values - design @ coef
        floor = np.full(2, 1.0 / counts_per_rad)  # one count of resolution at least
        cov = covariance(design, residuals) + np.diag(floor ** 2)
        est = intervals(coef, cov, max(len(pairs) - 2, 1))[0]
        if est.value < 0:
            est = Estimate(0.0, 0.0, max(est.high, 0.0))
        out["left" if side == "l" else "right"] = est
    if not out:
        log.need("play check", "ticks_l", "duty_l")
    return out


def fit_spin(log: BenchLog, *, counts_per_rad: float, pwm_bits: int, voltage_drop: float,
             nominal_supply: float) -> SpinFit:
    """Fit both sides of a spin log (sides without ticks columns are skipped)."""
    sides = [s for s in ("l", "r") if log.has(f"ticks_{s}", f"duty_{s}")]
    if not sides:
        log.need("spin", "ticks_l", "duty_l")
    if log.t[-1] < 10.0:
        raise LogError(log.source, f"spin: the log covers {log.t[-1]:.1f} s; the sequence "
                       "takes about 30 s")
    if log.has("battery_v"):
        supply = log.columns["battery_v"] - voltage_drop
        supply_from = "battery_v column minus the driver's drop"
    else:
        supply = np.full(log.t.size, nominal_supply)
        supply_from = "nominal battery minus the driver's drop (no battery_v column)"
    names = {"l": "left", "r": "right"}
    fits = tuple(fit_side(log.t, log.columns[f"ticks_{s}"], log.columns[f"duty_{s}"], supply,
                          counts_per_rad, pwm_bits, names[s], log.source) for s in sides)
    return SpinFit(float(np.mean(supply)), supply_from, fits)


def torque_figures(side: SideFit, stall_torque_per_volt: float, wheel_inertia: float,
                   gear_ratio: float, rated_voltage: float) -> dict[str, Estimate | None]:
    """Robot-file figures of one side from its fit and the file's g = stall torque / rated V.

    no_load_speed = k_v · rated V; friction_torque T_c = ω_f g / k_v;
    static_friction_torque = D_break · V · g (only when the breakaway exceeds the deadband);
    rotor_inertia = (τ g / k_v − wheel inertia) / G².
    """
    k_v, w_f = side.speed_per_volt, side.friction_speed
    cov = np.diag([(k_v.half_width / 1.96) ** 2, (w_f.half_width / 1.96) ** 2])
    out: dict[str, Estimate | None] = {
        "no_load_speed": Estimate(k_v.value * rated_voltage, k_v.low * rated_voltage,
                                  k_v.high * rated_voltage),
        "friction_torque": propagate(lambda p: p[1] * stall_torque_per_volt / p[0],
                                     np.array([k_v.value, w_f.value]), cov, 1000),
    }
    if side.time_constant is not None:
        tau = side.time_constant

        def rotor(tau_value, kv=k_v.value):
            return (tau_value * stall_torque_per_volt / kv - wheel_inertia) / gear_ratio ** 2

        out["rotor_inertia"] = Estimate(rotor(tau.value), rotor(tau.low), rotor(tau.high))
    return out
