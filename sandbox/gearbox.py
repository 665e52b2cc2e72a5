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

import math
from dataclasses import dataclass

import numpy as np

from .planar import PlanarParams, mass_matrix, wheel_relative_angle


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


# ------------------------------------------------------------------ backlash

# The contact is designed against the physics step: its natural frequency on the
# motor side and the lightest wheel side is CONTACT_FREQUENCY_STEPS / dt, damped at
# CONTACT_DAMPING_RATIO, and the gearbox takes SUBSTEP_ANGLE rad of that oscillation per
# sub-step (see DEVELOPERS.md, "Backlash").
CONTACT_FREQUENCY_STEPS = 1.0
CONTACT_DAMPING_RATIO = 0.7
SUBSTEP_ANGLE = 0.25


def contact_torque(play_angle: float, play_rate: float, half_gap: float, stiffness: float,
                   damping: float) -> float:
    """Torque the motor side puts on the wheel through the dead zone (N·m).

    ``play_angle`` is the motor side's angle less the wheel's (rad), ``play_rate`` its
    rate (rad/s). Zero while |play_angle| < half_gap; beyond, a spring-damper on the
    overlap that only pushes (the teeth cannot pull), as in the dead-zone model of
    Nordin & Gutman (Automatica 38(10), 2002).
    """
    if play_angle > half_gap:
        return max(0.0, stiffness * (play_angle - half_gap) + damping * play_rate)
    if play_angle < -half_gap:
        return min(0.0, stiffness * (play_angle + half_gap) + damping * play_rate)
    return 0.0


@dataclass(frozen=True)
class ContactDesign:
    """A dead-zone contact sized to the physics step.

    ``play`` (rad) total free play; ``motor_inertia`` J (kg·m²) of the motor side at the
    output; ``wheel_mobility`` (rad/s² per N·m) the largest angular acceleration of the
    wheel relative to the body per newton-metre between them (the wheel in the air);
    ``stiffness`` (N·m/rad), ``damping`` (N·m·s/rad), ``substeps`` per physics step.
    """

    play: float
    motor_inertia: float
    wheel_mobility: float
    stiffness: float
    damping: float
    substeps: int

    @classmethod
    def for_step(cls, play: float, motor_inertia: float, wheel_mobility: float,
                 dt: float) -> ContactDesign:
        if not (play >= 0 and motor_inertia > 0 and wheel_mobility > 0 and dt > 0):
            raise ValueError("a backlash contact needs play >= 0 rad, a motor inertia > 0, "
                             f"a wheel mobility > 0 and a step > 0 (got {play!r}, "
                             f"{motor_inertia!r}, {wheel_mobility!r}, {dt!r})")
        reduced = 1.0 / (1.0 / motor_inertia + wheel_mobility)
        omega = CONTACT_FREQUENCY_STEPS / dt
        stiffness = reduced * omega * omega
        damping = 2.0 * CONTACT_DAMPING_RATIO * math.sqrt(stiffness * reduced)
        substeps = max(1, math.ceil(CONTACT_FREQUENCY_STEPS / SUBSTEP_ANGLE))
        return cls(play, motor_inertia, wheel_mobility, stiffness, damping, substeps)


class Backlash:
    """The motor sides of both gearboxes and their dead-zone contacts with the wheels.

    Each physics step, :meth:`step` takes the motor torques (from the motors, driven at
    :meth:`motor_rates`) and the wheels' angles and rates relative to the body as the
    engine has them at the start of the step, and returns the torque each motor side
    puts on its wheel over the step (the mean over the sub-steps). Within a step the
    wheel is carried along as the engine last moved it (its last acceleration) plus
    what the change of contact torque adds at the largest wheel mobility; that keeps the
    coupling stable whether the wheel rolls on the floor, spins in the air or slips.
    The motor side starts in the middle of the play, at rest with its wheel.
    """

    def __init__(self, design: ContactDesign, dt: float):
        self.design = design
        self.dt = float(dt)
        self._h = self.dt / design.substeps
        self._half_gap = 0.5 * design.play
        # what _step_side needs, bound once (it runs twice a physics step)
        self._constants = (design.wheel_mobility, 1.0 / design.motor_inertia, self._half_gap,
                           design.stiffness, design.damping, self._h, 0.5 * self._h,
                           range(design.substeps), design.substeps, self.dt)
        self.motor_angle = [0.0, 0.0]  # rad, relative to the body, at the output shaft
        self.motor_rate = [0.0, 0.0]
        self._wheel_rate = [0.0, 0.0]  # at the start of the last step
        self._torque = [0.0, 0.0]  # contact torque applied over the last step
        self._wheel_acceleration = [0.0, 0.0]  # the wheel's, less the contact's share
        self._started = False

    def motor_rates(self) -> tuple[float, float]:
        """Motor-side rates (rad/s at the output, relative to the body): what the motors'
        back-EMF sees."""
        return self.motor_rate[0], self.motor_rate[1]

    def play_angles(self, wheel_left: float, wheel_right: float) -> tuple[float, float]:
        """Motor-side angle less the wheel's (rad), for wheel angles relative to the body."""
        return self.motor_angle[0] - wheel_left, self.motor_angle[1] - wheel_right

    def start(self, wheel_angles: tuple[float, float], wheel_rates: tuple[float, float]) -> None:
        """Put each motor side in the middle of its play, moving with its wheel."""
        for side in (0, 1):
            self.motor_angle[side] = float(wheel_angles[side])
            self.motor_rate[side] = float(wheel_rates[side])
            self._wheel_rate[side] = float(wheel_rates[side])
            self._torque[side] = 0.0
            self._wheel_acceleration[side] = 0.0
        self._started = True

    def step(self, motor_torques: tuple[float, float], wheel_angles: tuple[float, float],
             wheel_rates: tuple[float, float]) -> tuple[float, float]:
        """Advance both motor sides one physics step; (left, right) torque on the wheels."""
        if not self._started:
            self.start(wheel_angles, wheel_rates)
        side_step = self._step_side
        return (side_step(0, motor_torques[0], wheel_angles[0], wheel_rates[0]),
                side_step(1, motor_torques[1], wheel_angles[1], wheel_rates[1]))

    def _step_side(self, side: int, motor_torque: float, wheel_angle: float,
                   wheel_rate: float) -> float:
        (mobility, inverse_inertia, half_gap, k, c, h, half_h, substeps, count,
         dt) = self._constants
        # the engine's wheel acceleration over the last step, less the contact's share
        measured = (wheel_rate - self._wheel_rate[side]) / dt
        free_acceleration = self._wheel_acceleration[side] = (measured
                                                              - mobility * self._torque[side])
        self._wheel_rate[side] = wheel_rate
        motor, motor_rate = self.motor_angle[side], self.motor_rate[side]
        wheel = wheel_angle
        total = 0.0
        for _ in substeps:
            # contact_torque written out (8 calls a physics step otherwise); same floats
            play = motor - wheel
            if play > half_gap:
                torque = k * (play - half_gap) + c * (motor_rate - wheel_rate)
                if not torque > 0.0:
                    torque = 0.0
            elif play < -half_gap:
                torque = k * (play + half_gap) + c * (motor_rate - wheel_rate)
                if not torque < 0.0:
                    torque = 0.0
            else:
                torque = 0.0
            motor_acc = (motor_torque - torque) * inverse_inertia
            wheel_acc = free_acceleration + mobility * torque
            # constant acceleration over the sub-step (exact in free flight)
            motor += h * (motor_rate + half_h * motor_acc)
            motor_rate += h * motor_acc
            wheel += h * (wheel_rate + half_h * wheel_acc)
            wheel_rate += h * wheel_acc
            total += torque
        self.motor_angle[side], self.motor_rate[side] = motor, motor_rate
        mean = self._torque[side] = total / count
        return mean
