"""The gearbox between a motor and its wheel, in plain numpy (no physics engine).

Two jobs, both about the rotor's inertia reflected through the gears,
J = rotor_inertia × gear_ratio² (kg·m²), which turns with the wheel's angle
relative to the body:

- :class:`CouplingGains`: how the accelerations that the rotor's cross term needs
  change when the motor torque changes (from the planar mass matrix), so the world can
  apply the cross term without a one-step lag (see DEVELOPERS.md, "Reflected rotor
  inertia").
- :class:`Backlash`: free play at the gearbox output. The motor side (rotor and gears,
  inertia J) and the wheel are two bodies joined through a dead zone: no torque while
  the gap is open, a stiff, damped contact once it closes (the dead-zone model of
  Nordin & Gutman, "Controlling mechanical systems with backlash — a survey",
  Automatica 38(10), 2002).

Angles and rates are relative to the body (rad, rad/s), torques in N·m at the output
shaft, + forward.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .analysis import PlanarParams, mass_matrix, wheel_relative_angle


@dataclass(frozen=True)
class CouplingGains:
    """Accelerations per newton-metre of total motor torque (both motors), planar model.

    ``pitch`` (rad/s² per N·m): the body's pitch acceleration; ``wheels`` (rad/s² per
    N·m): the sum of both wheels' absolute angular accelerations (2 ẍ / r); ``mass``:
    the 2×2 mass matrix for q = [x, pitch] with the reflected inertia (SOURCES §1).
    """

    pitch: float
    wheels: float
    mass: np.ndarray
    wheel_radius: float

    @classmethod
    def from_params(cls, params: PlanarParams) -> CouplingGains:
        mass = mass_matrix(params)
        per_torque = np.linalg.solve(mass, wheel_relative_angle(params))  # [ẍ, θ̈] per N·m
        return cls(pitch=float(per_torque[1]),
                   wheels=float(2.0 * per_torque[0] / params.wheel_radius),
                   mass=mass, wheel_radius=params.wheel_radius)

    def accelerations(self, torque: float, gravity_torque: float) -> tuple[float, float]:
        """(pitch acceleration, sum of wheel accelerations) from rest, rad/s²: the planar
        model's answer to a total motor torque and gravity's torque on the body about
        the axle (N·m, + leaning further forward)."""
        force = np.array([torque / self.wheel_radius, -torque + gravity_torque])
        x_acc, pitch_acc = np.linalg.solve(self.mass, force)
        return float(pitch_acc), float(2.0 * x_acc / self.wheel_radius)
