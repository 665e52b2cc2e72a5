"""Swing and drop fits, and the body figures they give together.

swing (robot upside down, wheels held, body hanging below the axle, motors coasting):
the gyro pitch rate is fitted (scipy least squares) by the damped compound pendulum
  φ'' = −ω² sin φ − c φ' − f tanh(φ'/ε),  ω² = m g d / I_eff, I_eff = I_pivot + 2 J_r
(SOURCES §2; the coasting motors' rotors turn with the body through the gearbox, so their
reflected inertia J_r per motor is in I_eff and their friction in c and f).

drop (motors off, released near upright, wheels free on the floor): the gyro pitch rate
while |pitch| < DROP_WINDOW_RAD is fitted by the linear solution p (a e^(p t) − b e^(−p t))
(SOURCES §1, τ = 0); p is the fall pole.

Together, with the body mass m known: from the swing I_eff = m g d / ω², and the drop's
p² = m g d M11 / (M11 M22 − M12²) (SOURCES §1 with the reflected rotor inertia) is then a
quadratic in d. With a balance-point measurement instead, d is measured directly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from ..units import STANDARD_GRAVITY
from .bench_models import swing_rate_sensitivity
from .logs import BenchLog, LogError
from .stats import Estimate, covariance, intervals, propagate

DROP_WINDOW_RAD = 0.2  # fit the fall while |pitch| stays below this (linear model error ~θ²/6)
SWING_MAX_S = 20.0


@dataclass(frozen=True)
class SwingFit:
    omega: Estimate            # rad/s, √(m g d / I_eff)
    damping: Estimate          # 1/s, c / I_eff
    coulomb: Estimate          # rad/s², f
    cov: np.ndarray = field(repr=False, compare=False)
    dof: int = 0
    curves: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def damping_ratio(self) -> float:
        return self.damping.value / (2 * self.omega.value)


@dataclass(frozen=True)
class DropFit:
    pole: Estimate             # 1/s, as fitted by the linear model
    bias: float
    notes: tuple[str, ...] = ()
    curves: dict = field(default_factory=dict, repr=False, compare=False)
    tilt0: float = 0.0         # rad at release
    times: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False, compare=False)


def _gyro(log: BenchLog, test: str) -> np.ndarray:
    log.need(test, "gyro_y_rad_s")
    return log.columns["gyro_y_rad_s"]


def _still(t: np.ndarray, rate: np.ndarray) -> tuple[float, float, int]:
    """(bias, noise, index of release): the held-still start of a log, up to the first
    sample whose rate leaves the still band for good."""
    head = max(int(np.searchsorted(t, 0.2)), 5)
    bias = float(np.median(rate[:head]))
    noise = float(np.std(rate[:head])) + 1e-4
    far = np.abs(rate - bias) > max(8 * noise, 0.02)
    release = int(np.argmax(far)) if far.any() else rate.size
    return bias, noise, release


def fit_swing(log: BenchLog) -> SwingFit:
    """Fit the damped compound pendulum to a swing log's gyro pitch rate."""
    t, rate = log.t, _gyro(log, "swing")
    peak = float(np.max(np.abs(rate - np.median(rate))))
    if peak < 0.05:
        raise LogError(log.source, f"swing: no swing in the log (peak pitch rate "
                       f"{math.degrees(peak):.2f} deg/s): let the body swing from about 10 deg")
    centred = rate - np.median(rate)
    start = int(np.argmax(np.abs(centred) > 0.3 * peak))
    noise = float(np.std(np.diff(rate[: max(start, 3)]))) / math.sqrt(2) + 1e-4
    crossings = _crossings(centred[start:], max(5 * noise, 0.05 * peak))
    if crossings.size < 4:
        raise LogError(log.source, f"swing: only {crossings.size} half swing(s) after the "
                       "release; let it swing from further out (10-20 deg) or with the motor "
                       "leads unplugged, and log until it stops")
    last = start + crossings[-1]
    quarter = (crossings[-1] - crossings[0]) / (crossings.size - 1) / 2
    end = min(int(last + quarter), int(np.searchsorted(t, t[start] + SWING_MAX_S)), t.size)
    ts, ys = t[start:end], rate[start:end]
    crossings = crossings[crossings < end - start]
    period = 2 * (ts[crossings[-1]] - ts[crossings[0]]) / (crossings.size - 1)
    omega0 = 2 * math.pi / period
    amp0 = float(np.max(np.abs(ys[: max(crossings[2], 3)] - np.median(ys))))
    amp_end = float(np.max(np.abs(ys[crossings[-3]:] - np.median(ys)))) + 1e-6
    decay = max(math.log(max(amp0 / amp_end, 1.0 + 1e-6)) / (ts[-1] - ts[0]), 1e-4)
    s = ts - ts[0]

    cache: dict = {}

    def solve(p):
        key = tuple(p)
        if key not in cache:
            cache.clear()
            cache[key] = swing_rate_sensitivity(s, *p[:5])
        return cache[key]

    def residual(p):
        return solve(p)[0] + p[5] - ys

    def jacobian(p):
        return np.column_stack([solve(p)[1], np.ones(s.size)])

    # which way it starts: φ'' = −ω² sin φ, so the angle has the sign of −(rate's slope)
    slope = (ys[min(2, ys.size - 1)] - ys[0]) / max(s[min(2, s.size - 1)], 1e-6)
    centre = float(np.median(ys))
    rate0 = ys[0] - centre
    angle0 = -math.copysign(1.0, slope) * math.sqrt(max(amp0 ** 2 - rate0 ** 2, 0.0)) / omega0
    lower = np.array([0.1, 0.0, 0.0, -3.0, -50.0, -5.0])
    upper = np.array([200.0, 50.0, 100.0, 3.0, 50.0, 5.0])
    guess = np.clip([omega0, 2 * decay, 1e-6, angle0, rate0, centre], lower + 1e-9,
                    upper - 1e-9)
    best = least_squares(residual, guess, jac=jacobian, x_scale="jac", bounds=(lower, upper))
    dof = max(best.fun.size - best.x.size, 1)
    cov = covariance(best.jac, best.fun)
    est = intervals(best.x, cov, dof)
    curves = {"t": ts, "log": ys, "model": ys + best.fun}
    return SwingFit(est[0], est[1], est[2], cov[:1, :1], dof, curves)


def _crossings(values: np.ndarray, band: float) -> np.ndarray:
    """Indices where a signal crosses zero, counted only after leaving a ±band (hysteresis,
    so noise near the end of a swing does not count as swings)."""
    out = []
    state = 0
    for i, v in enumerate(values):
        if v > band and state <= 0:
            if state < 0:
                out.append(i)
            state = 1
        elif v < -band and state >= 0:
            if state > 0:
                out.append(i)
            state = -1
    return np.array(out, dtype=int)


def fit_drop(log: BenchLog) -> DropFit:
    """Fit the fall pole to a drop log's gyro pitch rate (linear model, small angles)."""
    t, rate = log.t, _gyro(log, "drop")
    notes = []
    bias, _noise, release = _still(t, rate)
    if release >= rate.size - 5:
        raise LogError(log.source, "drop: the robot never fell in the log (pitch rate stays "
                       "flat); release it from near upright with the motors off")
    if release < 10:
        notes.append("no still start before the release: gyro bias taken as 0")
        bias = 0.0
    tilt0 = 0.0
    if log.has("accel_x_m_s2", "accel_z_m_s2") and release >= 10:
        tilt0 = float(np.median(np.arctan2(-log.columns["accel_x_m_s2"][:release],
                                           log.columns["accel_z_m_s2"][:release])))
    else:
        notes.append("no accelerometer columns: the release tilt is taken as 0")
    pole, curves = fit_pole(t, rate, bias, tilt0, release, log.source)
    return DropFit(pole, bias, tuple(notes), curves, tilt0, t[release:] - t[release])


def fit_pole(t: np.ndarray, rate: np.ndarray, bias: float, tilt0: float, release: int,
             source: str = "<drop>") -> tuple[Estimate, dict]:
    """The fall pole (1/s) from pitch rates after ``release`` while |pitch| < the window."""
    pitch = tilt0 + np.concatenate([[0.0], np.cumsum(np.diff(t) * 0.5 * (
        rate[1:] + rate[:-1] - 2 * bias))])
    pitch = pitch - pitch[release] + tilt0
    inside = np.abs(pitch) < DROP_WINDOW_RAD
    after = ~inside[release:]
    end = release + int(np.argmax(after)) if after.any() else t.size
    ts, ys = t[release:end], rate[release:end] - bias
    if ts.size < 15:
        raise LogError(source, f"drop: only {ts.size} samples while the tilt was under "
                       f"{math.degrees(DROP_WINDOW_RAD):.0f} deg; log faster (500 Hz or more) "
                       "or release nearer upright")
    s = ts - ts[0]
    growth = np.log(np.abs(ys[-1]) / max(abs(ys[0]), 1e-3)) / max(s[-1], 1e-3)
    p0 = max(growth, 1.0)

    def residual(p):
        return p[0] * (p[1] * np.exp(p[0] * s) - p[2] * np.exp(-p[0] * s)) - ys

    guess = [p0, ys[-1] / (p0 * math.exp(p0 * s[-1])), 0.0]
    sol = least_squares(residual, guess, x_scale="jac")
    cov = covariance(sol.jac, sol.fun)
    est = intervals(sol.x, cov, max(sol.fun.size - 3, 1))
    return est[0], {"t": ts, "log": ys, "model": ys + sol.fun}


def window_bias(body, tilt0: float, times: np.ndarray) -> float:
    """Ratio true pole / pole fitted by :func:`fit_pole` on a noise-free nonlinear drop of
    ``body`` (a PlanarBody) from tilt0, sampled at ``times`` (s from release): the linear
    model's bias over the window, to divide out."""
    from .bench_models import drop_motion

    start = tilt0 if abs(tilt0) > 1e-3 else 0.02
    times = times[times < 3.0]
    _pitch, rate = drop_motion(body, times, start)
    fitted, _ = fit_pole(times, rate, 0.0, start, 0)
    return body.fall_pole() / fitted.value


@dataclass(frozen=True)
class BodyFigures:
    com_height: Estimate | None      # m, body centre of mass distance from the axle
    pivot_inertia: Estimate | None   # kg·m², body about the axle
    pitch_inertia: Estimate | None   # kg·m², body about its centre of mass
    com_from: str = ""
    notes: tuple[str, ...] = ()
    fall_pole: Estimate | None = None  # the drop's pole after the window-bias correction


def body_figures(*, body_mass: float | None, swing: SwingFit | None, drop: DropFit | None,
                 balance_point: float | None, robot_mass: float | None, wheel_mass: float,
                 wheel_inertia: float, wheel_radius: float, reflected_inertia: float
                 ) -> BodyFigures:
    """Centre of mass height and pitch inertia from what is given (see the module text)."""
    notes = []
    g, j, r = STANDARD_GRAVITY, reflected_inertia, wheel_radius
    if body_mass is None:
        return BodyFigures(None, None, None, "", ("no --mass: the body figures need the "
                                                  "robot weighed",))
    m = body_mass
    if swing is None:
        return BodyFigures(None, None, None, "", ("no swing log: the pitch inertia needs it",))
    m11 = m + 2 * wheel_mass + 2 * wheel_inertia / r ** 2 + 2 * j / r ** 2
    com_from = ""

    def d_from_drop(omega: float, pole: float) -> float:
        # p² m² d² + d (m g M11 (1 − p²/ω²) − 4 p² m J / r) + 4 p² J² / r² = 0, larger root
        a = pole ** 2 * m ** 2
        b = m * g * m11 * (1 - pole ** 2 / omega ** 2) - 4 * pole ** 2 * m * j / r
        c = 4 * pole ** 2 * j ** 2 / r ** 2
        disc = b * b - 4 * a * c
        if disc < 0 or a == 0:
            return math.nan
        return (-b + math.sqrt(disc)) / (2 * a)

    if balance_point is not None:
        total = robot_mass if robot_mass is not None else m + 2 * wheel_mass
        scale = total / m  # the wheels sit on the axle: they pull the balance point to it
        d = Estimate(balance_point * scale, (balance_point - 0.002) * scale,
                     (balance_point + 0.002) * scale)
        com_from = "balance point (±2 mm as measured by hand)"
        d_cov = np.array([[(0.002 * scale / 1.96) ** 2]])
        if drop is not None:
            notes.append("drop log used as a check (the balance point gives the height)")
    elif drop is not None:
        drop = _corrected(drop, swing, m, g, wheel_mass, wheel_inertia, r, j, m11, d_from_drop)
        notes.append("drop pole corrected for the linear model's bias over the window "
                     "(a nonlinear simulation of the fitted body)")
        if not drop.pole.value > swing.omega.value:
            raise ValueError(f"the drop's fall pole {drop.pole.value:.3f} 1/s is not above the "
                             f"swing's frequency {swing.omega.value:.3f} rad/s: the wheels "
                             "were not free in the drop, or the logs are of different robots")
        values = np.array([swing.omega.value, drop.pole.value])
        cov = np.diag([(swing.omega.half_width / 1.96) ** 2, (drop.pole.half_width / 1.96) ** 2])
        d = propagate(lambda p: d_from_drop(p[0], p[1]), values, cov, 1000)
        d_cov = None
        com_from = "swing and drop"
    else:
        return BodyFigures(None, None, None, "", ("the swing alone cannot separate the centre "
                                                  "of mass height from the inertia: give "
                                                  "--drop or --balance-point",))

    def pivot(values):
        om, dd = values
        return m * g * dd / om ** 2 - 2 * j

    def centre(values):
        om, dd = values
        return pivot(values) - m * dd ** 2

    if d_cov is None:  # d depends on ω: propagate through (ω, p)
        values = np.array([swing.omega.value, drop.pole.value])
        cov = np.diag([(swing.omega.half_width / 1.96) ** 2, (drop.pole.half_width / 1.96) ** 2])

        def through(fn):
            return propagate(lambda p: fn((p[0], d_from_drop(p[0], p[1]))), values, cov, 1000)
    else:
        values = np.array([swing.omega.value, d.value])
        cov = np.diag([(swing.omega.half_width / 1.96) ** 2, d_cov[0, 0]])

        def through(fn):
            return propagate(fn, values, cov, 1000)

    pole = drop.pole if drop is not None else None
    return BodyFigures(d, through(pivot), through(centre), com_from, tuple(notes), pole)


def _corrected(drop: DropFit, swing: SwingFit, m, g, wheel_mass, wheel_inertia, r, j, m11,
               d_from_drop) -> DropFit:
    """The drop fit with its pole divided by the window bias of the body it implies
    (two fixed-point passes: the bias is a fraction of a percent and varies slowly)."""
    from dataclasses import replace

    from .bench_models import PlanarBody

    ratio = 1.0
    for _ in range(3):
        pole = drop.pole.value * ratio
        d = d_from_drop(swing.omega.value, pole)
        if not (d > 0 and math.isfinite(d)):
            return drop
        pivot = m * g * d / swing.omega.value ** 2 - 2 * j
        inertia = max(pivot - m * d * d, 1e-9)
        body = PlanarBody(m, inertia, d, wheel_mass, wheel_inertia, r, j)
        ratio = window_bias(body, drop.tilt0, drop.times)
    est = drop.pole
    return replace(drop, pole=Estimate(est.value * ratio, est.low * ratio, est.high * ratio))
