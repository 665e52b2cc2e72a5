"""The planar model of a two-wheeled robot: its figures and its linear equations.

Planar model, linearised about upright. State ``s = [x, v, pitch, pitch_rate]`` in
m, m/s, rad, rad/s; pitch positive = top leans forward. Coordinates ``q = [x, pitch]``
with x the axle's forward travel. Lagrange's equations, linearised, read

    M q'' + D q' = S q + b u

M the mass matrix (SOURCES §1: Franklin, Powell & Emami-Naeini, Example 2.7 class),
D the back-EMF damping, S the gravity stiffness, b how the input enters. A torque
tau between body and wheels does work on the wheel's angle relative to the body,
x/r - pitch, so it enters as ``tau * [1/r, -1]``. A reflected rotor inertia J per
motor turns with that relative angle: it adds ``J * [1/r, -1][1/r, -1]^T`` to M.

Left out on purpose (not linear, or not planar): Coulomb friction in the gearbox,
rolling resistance, PWM quantisation and deadband, battery sag, turning. Poles, LQR
designs and suggested gains on this model are :mod:`sandbox.analysis`.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from .units import STANDARD_GRAVITY


class AnalysisError(ValueError):
    """Parameters or weights for which the linear analysis has no meaning."""


@dataclass(frozen=True)
class PlanarParams:
    """Figures of the planar model, SI units.

    body_mass (kg, no wheels), body_pitch_inertia (kg·m², about the body's own centre
    of mass), com_height (m, body centre of mass above the axle), wheel_mass (kg, one
    wheel), wheel_inertia (kg·m², one wheel about its axle), wheel_radius (m),
    reflected_inertia (kg·m², per motor, rotor inertia × gear ratio²), torque_constant
    (N·m/A), back_emf_constant (V·s/rad) and resistance (ohm) per motor at the output
    shaft, drive_voltage (V, what full duty puts across a motor), gravity (m/s²).
    """

    body_mass: float
    body_pitch_inertia: float
    com_height: float
    wheel_mass: float
    wheel_inertia: float
    wheel_radius: float
    reflected_inertia: float = 0.0
    torque_constant: float = 0.0
    back_emf_constant: float = 0.0
    resistance: float = math.inf
    drive_voltage: float = 0.0
    gravity: float = STANDARD_GRAVITY

    def __post_init__(self) -> None:
        positive = ("body_mass", "wheel_radius", "resistance")
        for name, value in asdict(self).items():
            if math.isnan(value) or (name != "resistance" and math.isinf(value)):
                raise AnalysisError(f"{name} must be a finite number, got {value!r}")
            if name in positive and value <= 0:
                raise AnalysisError(f"{name} must be positive, got {value!r}")
            if value < 0:
                raise AnalysisError(f"{name} must not be negative, got {value!r}")

    @classmethod
    def from_spec(cls, spec: Any) -> PlanarParams:
        """The planar figures of a RobotSpec (battery at its nominal voltage)."""
        fig = spec.figures
        return cls(
            body_mass=float(fig.body.mass),
            body_pitch_inertia=float(fig.body.inertia[1, 1]),
            com_height=float(fig.com_height),
            wheel_mass=float(fig.wheel_mass),
            wheel_inertia=float(fig.wheel_inertia_axle),
            wheel_radius=float(spec.wheels.radius),
            reflected_inertia=float(fig.reflected_inertia),
            torque_constant=float(fig.torque_constant),
            back_emf_constant=float(fig.back_emf_constant),
            resistance=float(fig.resistance),
            drive_voltage=float(fig.drive_voltage),
            gravity=STANDARD_GRAVITY,
        )


# ------------------------------------------------------------------ models


def second_order_to_state_space(
    mass: np.ndarray, damping: np.ndarray, stiffness: np.ndarray, input_vector: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """``M q'' + D q' = S q + b u``, q = [q1, q2], as ``s' = A s + B u``, s = [q1, q1', q2, q2']."""
    mass = np.asarray(mass, dtype=float)
    accel_per_q = np.linalg.solve(mass, np.asarray(stiffness, dtype=float))
    accel_per_rate = -np.linalg.solve(mass, np.asarray(damping, dtype=float))
    accel_per_u = np.linalg.solve(mass, np.asarray(input_vector, dtype=float))
    A = np.zeros((4, 4))
    A[0, 1] = A[2, 3] = 1.0
    A[np.ix_([1, 3], [0, 2])] = accel_per_q
    A[np.ix_([1, 3], [1, 3])] = accel_per_rate
    B = np.zeros((4, 1))
    B[[1, 3], 0] = accel_per_u
    return A, B


def wheel_relative_angle(p: PlanarParams) -> np.ndarray:
    """d(wheel angle relative to body)/dq for q = [x, pitch]: [1/r, -1] (rad per m, rad per rad)."""
    return np.array([1.0 / p.wheel_radius, -1.0])


def mass_matrix(p: PlanarParams) -> np.ndarray:
    """2×2 mass matrix for q = [x, pitch] (kg, kg·m, kg·m²), two wheels and two motors."""
    ml = p.body_mass * p.com_height
    body_and_wheels = np.array([
        [p.body_mass + 2 * p.wheel_mass + 2 * p.wheel_inertia / p.wheel_radius**2, ml],
        [ml, p.body_pitch_inertia + p.body_mass * p.com_height**2],
    ])
    relative = wheel_relative_angle(p)
    return body_and_wheels + 2 * p.reflected_inertia * np.outer(relative, relative)


def gravity_stiffness(p: PlanarParams) -> np.ndarray:
    """Gravity's restoring (here destabilising) stiffness for q = [x, pitch]: m_b g l on pitch."""
    return np.array([[0.0, 0.0], [0.0, p.body_mass * p.gravity * p.com_height]])


def torque_input_model(p: PlanarParams) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) with input = total wheel torque of both motors (N·m); no motor terms."""
    return second_order_to_state_space(
        mass_matrix(p), np.zeros((2, 2)), gravity_stiffness(p), wheel_relative_angle(p)
    )


def duty_input_model(p: PlanarParams) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) with input = one duty on both motors (driven bridge, averaged model).

    Total torque tau = 2 (kt/R) (duty·V_drive − ke·w), w = v/r − pitch_rate the wheel's
    rate relative to the body (DC motor, SOURCES §5, inductance neglected). The
    back-EMF part is a damper on the relative angle: D = 2 kt ke / R · a aᵀ, a = [1/r, −1].
    """
    relative = wheel_relative_angle(p)
    conductance = 2.0 * p.torque_constant / p.resistance  # N·m per V, both motors
    damping = conductance * p.back_emf_constant * np.outer(relative, relative)
    return second_order_to_state_space(
        mass_matrix(p), damping, gravity_stiffness(p), conductance * p.drive_voltage * relative
    )


def cart_pendulum_model(
    cart_mass: float, pendulum_mass: float, cart_friction: float, pendulum_inertia: float,
    pivot_to_com: float, gravity: float,
) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) of a pendulum on a cart pushed by a force (N), in OUR convention.

    State [x, v, pitch, pitch_rate], pitch positive = pendulum top ahead of the cart
    (+x). Same Lagrangian as the wheeled model with the wheels replaced by a cart of
    viscous friction b (N·s/m). Messner & Tilbury's tutorial measures their angle
    deviation the other way (their phi = −pitch), so their (A, B) is (T A T, T B)
    with T = diag(1, 1, −1, −1).
    """
    ml = pendulum_mass * pivot_to_com
    mass = np.array([[cart_mass + pendulum_mass, ml], [ml, pendulum_inertia + ml * pivot_to_com]])
    damping = np.diag([cart_friction, 0.0])
    stiffness = np.array([[0.0, 0.0], [0.0, ml * gravity]])
    return second_order_to_state_space(mass, damping, stiffness, np.array([1.0, 0.0]))
