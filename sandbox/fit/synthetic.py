"""Synthetic bench logs from known figures (for tests and the demo): the bench models of
:mod:`sandbox.fit.bench_models` sampled as a board would log them, with optional gyro
noise and bias, quantisation to sensor counts, timestamp jitter and dropped lines.
Seeded: the same arguments give the same text."""

from __future__ import annotations

import math

import numpy as np

from .bench_models import PlanarBody, WheelDrive, drop_motion, spin_motion, swing_rate
from .sequence import SPIN_DURATION, spin_duty

GYRO_COUNTS_PER_DEG_S = 131.0  # a common 16-bit gyro at ±250 °/s [common practice]


def sample_times(duration: float, rate: float, jitter: float, rng: np.random.Generator
                 ) -> np.ndarray:
    """Log times (s): a nominal rate with uniform jitter of ±jitter s, strictly rising."""
    t = np.arange(0.0, duration, 1.0 / rate)
    if jitter:
        t = t + rng.uniform(-jitter, jitter, t.size)
        t[0] = 0.0
        t = np.maximum.accumulate(t + np.arange(t.size) * 1e-9)
    return t


def _csv(header: list[str], columns: list[np.ndarray], formats: list[str],
         drop: list[int] = ()) -> str:
    lines = [",".join(header)]
    for i in range(columns[0].size):
        if i in drop:
            continue
        lines.append(",".join(f % c[i] for f, c in zip(formats, columns)))
    return "\n".join(lines) + "\n"


def swing_log(body: PlanarBody, *, damping: float, angle0: float = math.radians(10),
              duration: float = 12.0, hold: float = 0.5, rate: float = 200.0,
              noise: float = 0.0, bias: float = 0.0, jitter: float = 0.0, raw: bool = False,
              seed: int = 0, dropped: tuple[int, ...] = ()) -> str:
    """Swing test log: held at angle0 for ``hold`` s, then released. ``damping`` = c (N·m·s);
    gearbox friction of both motors (2 × body.friction_torque) acts as Coulomb friction.
    noise: gyro standard deviation per sample (rad/s); raw: gyro_y in counts at 131/deg/s,
    t in ms."""
    rng = np.random.default_rng(seed)
    t = sample_times(duration, rate, jitter, rng)
    inertia = body.pivot_inertia + 2 * body.reflected_inertia
    free = t >= hold
    rate_true = np.zeros(t.size)
    fine = np.arange(0.0, duration - hold + 1e-3, 1e-3)
    rate_fine = swing_rate(fine, body.hanging_omega(), damping / inertia,
                           2 * body.friction_torque / inertia, angle0, 0.0)
    rate_true[free] = np.interp(t[free] - hold, fine, rate_fine)
    gyro = -rate_true + bias + noise * rng.standard_normal(t.size)  # upside down: y flips
    if raw:
        counts = np.round(np.degrees(gyro) * GYRO_COUNTS_PER_DEG_S)
        return _csv(["t_ms", "gyro_y"], [t * 1000, counts], ["%.0f", "%.0f"], list(dropped))
    return _csv(["t_s", "gyro_y_rad_s"], [t, gyro], ["%.5f", "%.6f"], list(dropped))


def drop_log(body: PlanarBody, *, pitch0: float = math.radians(2.0), hold: float = 0.5,
             until: float = math.radians(45), rate: float = 500.0, noise: float = 0.0,
             bias: float = 0.0, jitter: float = 0.0, seed: int = 0,
             dropped: tuple[int, ...] = ()) -> str:
    """Drop test log: held still at pitch0 for ``hold`` s, released, logged until the tilt
    passes ``until`` (a soft landing follows). Columns t_s, gyro_y_rad_s, accel_x/z_m_s2."""
    rng = np.random.default_rng(seed)
    t_fall = np.arange(0.0, 3.0, 1e-4)
    pitch, pitch_rate = drop_motion(body, t_fall, pitch0)
    end = int(np.argmax(np.abs(pitch) > until)) if (np.abs(pitch) > until).any() else t_fall.size
    t = sample_times(hold + t_fall[end - 1], rate, jitter, rng)
    s = np.clip(t - hold, 0.0, None)
    th = np.interp(s, t_fall[:end], pitch[:end])
    w = np.interp(s, t_fall[:end], pitch_rate[:end])
    gyro = w + bias + noise * rng.standard_normal(t.size)
    g = 9.80665
    accel_x = -g * np.sin(th) + 0.05 * rng.standard_normal(t.size) * (noise > 0)
    accel_z = g * np.cos(th) + 0.05 * rng.standard_normal(t.size) * (noise > 0)
    return _csv(["t_s", "gyro_y_rad_s", "accel_x_m_s2", "accel_z_m_s2"],
                [t, gyro, accel_x, accel_z], ["%.5f", "%.6f", "%.4f", "%.4f"], list(dropped))


def spin_log(drives: tuple[WheelDrive, WheelDrive], *, supply_voltage: float,
             voltage_drop: float, counts_per_rad: float, rate: float = 200.0,
             jitter: float = 0.0, seed: int = 0, dropped: tuple[int, ...] = (),
             dt: float = 2e-4) -> str:
    """Spin test log of the sequence of :mod:`sandbox.fit.sequence` on both wheels.
    ticks are motor-shaft counts (floor of the motor-side angle × counts_per_rad)."""
    rng = np.random.default_rng(seed)
    times, motor, _wheel = spin_motion(drives, lambda t: (spin_duty(t), spin_duty(t)),
                                       SPIN_DURATION, supply_voltage - voltage_drop, dt=dt)
    t = sample_times(SPIN_DURATION, rate, jitter, rng)
    # the log row shows the duty commanded at its time and the counts read then
    ticks = [np.floor(np.interp(t, times, motor[:, k]) * counts_per_rad) for k in range(2)]
    duty = np.array([spin_duty(x) for x in t])
    battery = np.round((supply_voltage + 0.01 * rng.standard_normal(t.size)) * 100) / 100
    return _csv(["t_s", "duty_l", "duty_r", "ticks_l", "ticks_r", "battery_v"],
                [t, duty, duty, ticks[0], ticks[1], battery],
                ["%.4f", "%.5f", "%.5f", "%.0f", "%.0f", "%.2f"], list(dropped))


PLAY_LEVELS = (0.10, 0.16)  # duty levels of the play check, each +/- twice, 1 s per hold


def play_duty(t: float) -> tuple[float, float]:
    """The play check's duty at t s: 1 s rest, then +D, -D, +D, -D at each level, 1 s each."""
    k = int(t) - 1
    if k < 0 or k >= 4 * len(PLAY_LEVELS):
        return 0.0, 0.0
    level = PLAY_LEVELS[k // 4]
    d = level if k % 2 == 0 else -level
    return d, d


def play_log(drives: tuple[WheelDrive, WheelDrive], *, supply_voltage: float,
             voltage_drop: float, counts_per_rad: float, rate: float = 200.0,
             seed: int = 0, dt: float = 2e-4) -> str:
    """Play check log: the wheels clamped, the duty alternating gently (see play_duty)."""
    from dataclasses import replace

    rng = np.random.default_rng(seed)
    held = tuple(replace(d, wheel_static=1e3, wheel_friction=1e3) for d in drives)
    duration = 1.0 + 4 * len(PLAY_LEVELS) + 1.0
    times, motor, _wheel = spin_motion(held, play_duty, duration, supply_voltage - voltage_drop,
                                       dt=dt)
    t = sample_times(duration, rate, 5e-4, rng)
    ticks = [np.floor(np.interp(t, times, motor[:, k]) * counts_per_rad) for k in range(2)]
    duty = np.array([play_duty(x)[0] for x in t])
    return _csv(["t_s", "duty_l", "duty_r", "ticks_l", "ticks_r"],
                [t, duty, duty, ticks[0], ticks[1]], ["%.4f", "%.3f", "%.3f", "%.0f", "%.0f"])
