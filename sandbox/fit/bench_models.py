"""Physics of the three bench tests, plain numpy/scipy: what a log should look like.

Used to make synthetic and demo logs and by the fits' models. Angles in rad, SI throughout.

- swing: the body hangs below a fixed axle (robot upside down, wheels held), coasting motors:
  I_eff φ'' = −m g d sin φ − c φ' − T_f tanh(φ'/ε), I_eff = I_pivot + 2 J_r (compound
  pendulum, SOURCES §2, with viscous and smoothed Coulomb friction).
- drop: the planar wheeled pendulum of SOURCES §1 with its nonlinear terms, wheels free on
  the floor, motors coasting (no back-EMF current), optional gearbox friction on the
  wheel–body relative angle.
- spin: one wheel on a stand driven by the first-order DC motor model (SOURCES §5): a
  motor side (reflected rotor inertia, gearbox friction) and a wheel side (wheel inertia,
  bearing friction) joined through a dead zone of width ``backlash`` (SOURCES §11, Nordin &
  Gutman), each side with Karnopp stick–slip friction (SOURCES §11). The faces of the dead
  zone are a stiff damped contact.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from ..actuators import quantise_duty
from ..units import STANDARD_GRAVITY

COULOMB_SMOOTHING = 0.01  # rad/s: ε of tanh(ω/ε) in the swing and drop models


# ------------------------------------------------------------------ swing


def swing_rate(t: np.ndarray, omega: float, damping: float, coulomb: float,
               angle0: float, rate0: float) -> np.ndarray:
    """Pitch rate (rad/s) of the hanging body at times t (s from t[0]).

    omega = √(m g d / I_eff) (rad/s), damping = c / I_eff (1/s), coulomb = T_f / I_eff
    (rad/s²), angle0 / rate0 the angle from hanging straight down and its rate at t[0].
    """
    def rhs(_t, y):
        return (y[1], -omega * omega * math.sin(y[0]) - damping * y[1]
                - coulomb * math.tanh(y[1] / COULOMB_SMOOTHING))

    t = np.asarray(t, dtype=float)
    sol = solve_ivp(rhs, (t[0], t[-1]), (angle0, rate0), method="DOP853", t_eval=t,
                    rtol=1e-9, atol=1e-11)
    if not sol.success or sol.y.shape[1] != t.size:
        return np.full(t.size, np.nan)
    return sol.y[1]


def swing_rate_sensitivity(t: np.ndarray, omega: float, damping: float, coulomb: float,
                           angle0: float, rate0: float) -> tuple[np.ndarray, np.ndarray]:
    """Pitch rate as :func:`swing_rate` and its derivatives with respect to (omega, damping,
    coulomb, angle0, rate0), [n, 5], from the sensitivity equations S' = (∂f/∂y) S + ∂f/∂q
    integrated with the motion (one solve instead of one per parameter)."""
    eps = COULOMB_SMOOTHING

    def rhs(_t, y):
        phi, w = y[0], y[1]
        s = y[2:].reshape(2, 5)
        th = math.tanh(w / eps)
        dfdy = np.array([[0.0, 1.0], [-omega * omega * math.cos(phi),
                                      -damping - coulomb * (1 - th * th) / eps]])
        dfdq = np.array([[0.0, 0.0, 0.0, 0.0, 0.0],
                         [-2 * omega * math.sin(phi), -w, -th, 0.0, 0.0]])
        ds = dfdy @ s + dfdq
        return np.concatenate(([w, -omega * omega * math.sin(phi) - damping * w
                                - coulomb * th], ds.ravel()))

    t = np.asarray(t, dtype=float)
    s0 = np.zeros((2, 5))
    s0[0, 3] = s0[1, 4] = 1.0
    y0 = np.concatenate(([angle0, rate0], s0.ravel()))
    sol = solve_ivp(rhs, (t[0], t[-1]), y0, method="DOP853", t_eval=t, rtol=1e-8, atol=1e-10)
    if not sol.success or sol.y.shape[1] != t.size:
        return np.full(t.size, np.nan), np.full((t.size, 5), np.nan)
    return sol.y[1], sol.y[2:].reshape(2, 5, -1)[1].T


# ------------------------------------------------------------------ drop


@dataclass(frozen=True)
class PlanarBody:
    """Planar figures of a robot for the drop: body mass (kg, no wheels), body pitch inertia
    about its centre of mass (kg·m²), centre of mass height above the axle (m), one wheel's
    mass (kg) and axle inertia (kg·m²), wheel radius (m), reflected rotor inertia per motor
    (kg·m²), gearbox Coulomb friction per motor (N·m)."""

    body_mass: float
    pitch_inertia: float
    com_height: float
    wheel_mass: float
    wheel_inertia: float
    wheel_radius: float
    reflected_inertia: float = 0.0
    friction_torque: float = 0.0

    @property
    def pivot_inertia(self) -> float:
        """Body pitch inertia about the axle (kg·m²), parallel-axis theorem."""
        return self.pitch_inertia + self.body_mass * self.com_height ** 2

    def hanging_omega(self) -> float:
        """√(m g d / (I_pivot + 2 J_r)): the swing's small-angle frequency (rad/s)."""
        return math.sqrt(self.body_mass * STANDARD_GRAVITY * self.com_height
                         / (self.pivot_inertia + 2 * self.reflected_inertia))

    def fall_pole(self) -> float:
        """Unstable pole (1/s) with the wheels free and no torque (SOURCES §1)."""
        m11, m12, m22 = self._mass_terms(0.0)
        return math.sqrt(self.body_mass * STANDARD_GRAVITY * self.com_height * m11
                         / (m11 * m22 - m12 * m12))

    def _mass_terms(self, pitch: float) -> tuple[float, float, float]:
        r, j = self.wheel_radius, self.reflected_inertia
        m11 = (self.body_mass + 2 * self.wheel_mass + 2 * self.wheel_inertia / r ** 2
               + 2 * j / r ** 2)
        m12 = self.body_mass * self.com_height * math.cos(pitch) - 2 * j / r
        m22 = self.pivot_inertia + 2 * j
        return m11, m12, m22


def drop_motion(body: PlanarBody, t: np.ndarray, pitch0: float,
                rate0: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """(pitch, pitch rate) of a free fall from pitch0 with the wheels free (nonlinear)."""
    ml, g, r = body.body_mass * body.com_height, STANDARD_GRAVITY, body.wheel_radius

    def rhs(_t, y):
        _x, v, th, w = y
        m11, m12, m22 = body._mass_terms(th)
        relative = v / r - w
        tau = -2 * body.friction_torque * math.tanh(relative / COULOMB_SMOOTHING)
        f1 = tau / r + ml * math.sin(th) * w * w
        f2 = ml * g * math.sin(th) - tau
        det = m11 * m22 - m12 * m12
        return (v, (m22 * f1 - m12 * f2) / det, w, (m11 * f2 - m12 * f1) / det)

    t = np.asarray(t, dtype=float)
    sol = solve_ivp(rhs, (t[0], t[-1]), (0.0, 0.0, pitch0, rate0), method="DOP853",
                    t_eval=t, rtol=1e-10, atol=1e-12)
    return sol.y[2], sol.y[3]


# ------------------------------------------------------------------ spin


@dataclass(frozen=True)
class WheelDrive:
    """One motor and wheel on the stand, figures at the gearbox output shaft (SI).

    resistance (ohm), torque_constant (N·m/A), back_emf_constant (V·s/rad); motor_inertia
    (reflected rotor, kg·m²) and wheel_inertia (kg·m²); Coulomb / static friction on the motor
    side and on the wheel side (N·m); backlash (rad, total free play); deadband and pwm_bits
    of the driver; brake (True: zero duty shorts the motor).
    """

    resistance: float
    torque_constant: float
    back_emf_constant: float
    motor_inertia: float
    wheel_inertia: float
    motor_friction: float
    motor_static: float
    wheel_friction: float = 0.0
    wheel_static: float = 0.0
    backlash: float = 0.0
    deadband: float = 0.0
    pwm_bits: int = 8
    brake: bool = True

    @property
    def friction_torque(self) -> float:
        return self.motor_friction + self.wheel_friction

    @property
    def static_friction_torque(self) -> float:
        return self.motor_static + self.wheel_static

    @property
    def time_constant(self) -> float:
        """Mechanical time constant (s): J R / (K_t K_e), both inertias coupled."""
        return ((self.motor_inertia + self.wheel_inertia) * self.resistance
                / (self.torque_constant * self.back_emf_constant))


def _karnopp(rate: float, applied: float, coulomb: float, static: float, inertia: float,
             dt: float, band: float) -> float:
    """The next rate of a body under ``applied`` torque with Karnopp friction (SOURCES §11):
    stuck while at rest and |applied| ≤ static; Coulomb against the motion otherwise; a rate
    that friction would reverse within the step stops."""
    if -band < rate < band:
        if -static <= applied <= static:
            return 0.0
        return rate + (applied - math.copysign(coulomb, applied)) / inertia * dt
    new = rate + (applied - math.copysign(coulomb, rate)) / inertia * dt
    if new * rate < 0.0 and -static <= applied <= static:
        return 0.0
    return new


def spin_motion(drives: tuple[WheelDrive, ...], duty, t_end: float, supply_voltage: float,
                dt: float = 2e-4, contact_stiffness: float = 12.0
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Simulate wheels on a stand; ``duty(t)`` returns one commanded duty per drive.

    Returns (t, motor-side angles [n, k], wheel angles [n, k]) sampled every dt (rad, at the
    output shaft). The motor side is what an encoder on the motor shaft counts.
    """
    n = int(round(t_end / dt)) + 1
    k = len(drives)
    times = np.arange(n) * dt
    motor_angle = np.zeros((n, k))
    wheel_angle = np.zeros((n, k))
    for j, d in enumerate(drives):
        theta_m = theta_w = omega_m = omega_w = 0.0
        half = d.backlash / 2
        damping = 2.0 * math.sqrt(contact_stiffness * min(d.motor_inertia, d.wheel_inertia))
        conductance = d.torque_constant / d.resistance
        band = 1e-3
        applied_duty = 0.0
        last_command = math.nan
        for i in range(n):
            motor_angle[i, j], wheel_angle[i, j] = theta_m, theta_w
            command = duty(times[i])[j]
            if command != last_command:
                applied_duty = quantise_duty(command, d.pwm_bits, d.deadband)
                last_command = command
            if applied_duty == 0.0 and not d.brake:
                drive = 0.0
            else:
                drive = conductance * (applied_duty * supply_voltage
                                       - d.back_emf_constant * omega_m)
            gap = theta_m - theta_w
            contact = 0.0
            if gap > half:
                contact = contact_stiffness * (gap - half) + damping * (omega_m - omega_w)
                contact = max(contact, 0.0)
            elif gap < -half:
                contact = contact_stiffness * (gap + half) + damping * (omega_m - omega_w)
                contact = min(contact, 0.0)
            omega_m = _karnopp(omega_m, drive - contact, d.motor_friction, d.motor_static,
                               d.motor_inertia, dt, band)
            omega_w = _karnopp(omega_w, contact, d.wheel_friction, d.wheel_static,
                               d.wheel_inertia, dt, band)
            theta_m += omega_m * dt
            theta_w += omega_w * dt
    return times, motor_angle, wheel_angle
