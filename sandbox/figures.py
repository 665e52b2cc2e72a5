"""Figures derived from a validated robot description: the body's boxes and mass properties,
motor constants at the output shaft, per-side figures, filter delays; and as plain JSON.

SI units throughout. Reads a :class:`sandbox.robotschema.RobotSpec`, which caches
:func:`derive` as ``spec.figures``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .inertia import MassProperties, box_inertia, combine, cylinder_inertia_y
from .units import STANDARD_GRAVITY

if TYPE_CHECKING:
    from .robotschema import Measured, RobotSpec

PALETTE = ["#4c72b0", "#dd8452", "#55a868", "#c44e52", "#8172b3", "#937860", "#da8bc3"]
FRAME_COLOUR = "#9aa3ad"
WHEEL_COLOUR = "#2b2b2b"


@dataclass(frozen=True)
class Box:
    """A solid box of the body, placed in the body frame (m, kg)."""

    name: str
    mass: float
    size: tuple[float, float, float]
    at: tuple[float, float, float]
    colour: str


@dataclass(frozen=True)
class Figures:
    """Derived figures of a robot, SI units.

    Body figures exclude the wheels; the body's inertia is about its own centre
    of mass. Motor constants are at the gearbox output shaft, per motor.
    """

    boxes: tuple[Box, ...]
    body: MassProperties
    wheel_mass: float
    wheel_inertia: np.ndarray  # one wheel about its own centre, axle along y
    mass: float
    com: np.ndarray
    resistance: float  # ohm
    torque_constant: float  # N·m/A at the output shaft
    back_emf_constant: float  # V·s/rad at the output shaft
    reflected_inertia: float  # kg·m², rotor inertia × gear ratio², felt at the wheel
    battery_voltage: float  # nominal, V
    drive_voltage: float  # battery nominal minus the driver's drop, V
    stall_torque_wheel: float  # N·m per wheel at rated voltage
    available_stall_torque: float  # N·m per wheel at drive_voltage
    top_speed: float  # m/s, no-load wheel speed at drive_voltage
    com_height: float  # body centre of mass above the axle, m
    steepest_hold_tilt: float  # rad; tilt at which both motors at stall just hold the body
    left: SideFigures | None = None  # each side with its own overrides (None: built by hand)
    right: SideFigures | None = None
    gyro_group_delay: float | None = None  # s, the gyro filter's at low frequency; None: none
    accel_group_delay: float | None = None  # s, the accelerometer filter's
    measured: tuple[str, ...] = ()  # body figures taken from body.measured

    @property
    def sides_differ(self) -> bool:
        """True when the left and right motor or wheel figures are not the same."""
        return self.left != self.right

    @property
    def wheel_inertia_axle(self) -> float:
        return float(self.wheel_inertia[1, 1])


@dataclass(frozen=True)
class SideFigures:
    """One side's motor and wheel figures (SI), per-side overrides applied."""

    resistance: float  # ohm
    torque_constant: float  # N·m/A at the output shaft
    back_emf_constant: float  # V·s/rad at the output shaft
    reflected_inertia: float  # kg·m² at the wheel
    stall_torque_wheel: float  # N·m at rated voltage
    available_stall_torque: float  # N·m at the drive voltage
    friction_torque: float  # N·m, kinetic
    static_friction_torque: float  # N·m, breakaway
    wheel_radius: float  # m
    wheel_inertia_axle: float  # kg·m², one wheel about its axle
    top_speed: float  # m/s, no-load at the drive voltage


def side_figures(spec: RobotSpec, side: str, drive_voltage: float) -> SideFigures:
    """The figures of one side ('left'/'right') of a validated description."""
    m, w = spec.motor_side(side), spec.wheel_side(side)
    resistance = m.rated_voltage / m.stall_current
    torque_constant = m.stall_torque / m.stall_current
    back_emf_constant = m.rated_voltage / m.no_load_speed
    static = m.static_friction_torque
    return SideFigures(
        resistance=resistance,
        torque_constant=torque_constant,
        back_emf_constant=back_emf_constant,
        reflected_inertia=m.rotor_inertia * m.gear_ratio**2,
        stall_torque_wheel=m.stall_torque,
        available_stall_torque=torque_constant * drive_voltage / resistance,
        friction_torque=m.friction_torque,
        static_friction_torque=m.friction_torque if static is None else static,
        wheel_radius=w.radius,
        wheel_inertia_axle=float(cylinder_inertia_y(w.mass, w.radius, w.width)[1, 1]),
        top_speed=drive_voltage / back_emf_constant * w.radius,
    )


def filter_group_delay(bandwidth: float | None, order: int) -> float | None:
    """Low-frequency group delay (s) of a Butterworth low-pass of cut-off ``bandwidth`` (Hz):
    1/(2π f_c) for first order, √2/(2π f_c) for second order (from H(s)); None without one."""
    if bandwidth is None:
        return None
    return (1.0 if order == 1 else math.sqrt(2.0)) / (2.0 * math.pi * bandwidth)


def measured_body(parts: MassProperties, measured: Measured | None) -> MassProperties:
    """The parts' mass properties with any measured figures put in their place.

    A measured pitch inertia replaces Iyy about the centre of mass; if it then breaks the
    rigid-body inequality Iyy <= Ixx + Izz, Ixx and Izz are raised to meet it.
    """
    if measured is None:
        return parts
    mass = parts.mass if measured.mass is None else measured.mass
    com = parts.com if measured.com is None else np.array(measured.com, dtype=float)
    inertia = parts.inertia.copy()
    if measured.pitch_inertia is not None:
        inertia[1, 1] = measured.pitch_inertia
        shortfall = inertia[1, 1] - inertia[0, 0] - inertia[2, 2]
        if shortfall > 0:
            inertia[0, 0] += 0.5005 * shortfall
            inertia[2, 2] += 0.5005 * shortfall
    return MassProperties(mass, com, inertia)


def frame_box(spec: RobotSpec) -> Box:
    f = spec.body.frame
    return Box("frame", f.mass, (f.depth, f.width, f.height), (0.0, 0.0, f.bottom + f.height / 2),
               FRAME_COLOUR)


def derive(spec: RobotSpec) -> Figures:
    """All derived figures of a validated description."""
    boxes = [frame_box(spec)]
    for i, part in enumerate(spec.body.parts):
        boxes.append(Box(part.name, part.mass, tuple(part.size), tuple(part.at),
                         part.colour or PALETTE[i % len(PALETTE)]))
    body = combine(MassProperties(b.mass, np.array(b.at), box_inertia(b.mass, b.size))
                   for b in boxes)
    body = measured_body(body, spec.body.measured)

    w = spec.wheels
    wheel_inertia = cylinder_inertia_y(w.mass, w.radius, w.width)
    mass = body.mass + 2 * w.mass
    com = body.com * body.mass / mass  # wheel centres sit at ±track/2 on the axle: x = z = 0

    m = spec.motors
    resistance = m.rated_voltage / m.stall_current
    torque_constant = m.stall_torque / m.stall_current
    back_emf_constant = m.rated_voltage / m.no_load_speed
    drive_voltage = spec.battery_voltage - spec.driver.voltage_drop
    available = torque_constant * drive_voltage / resistance
    com_height = float(math.hypot(body.com[0], body.com[2]))
    lean_torque = body.mass * STANDARD_GRAVITY * com_height
    left, right = (side_figures(spec, side, drive_voltage) for side in ("left", "right"))
    both = left.available_stall_torque + right.available_stall_torque  # 2 · available if alike
    ratio = both / lean_torque if lean_torque > 0 else math.inf
    imu = spec.imu
    measured = spec.body.measured
    steepest = math.pi / 2 if ratio >= 1 else math.asin(ratio)
    return Figures(
        boxes=tuple(boxes),
        body=body,
        wheel_mass=w.mass,
        wheel_inertia=wheel_inertia,
        mass=mass,
        com=com,
        resistance=resistance,
        torque_constant=torque_constant,
        back_emf_constant=back_emf_constant,
        reflected_inertia=m.rotor_inertia * m.gear_ratio**2,
        battery_voltage=spec.battery_voltage,
        drive_voltage=drive_voltage,
        stall_torque_wheel=m.stall_torque,
        available_stall_torque=available,
        top_speed=drive_voltage / back_emf_constant * w.radius,
        com_height=com_height,
        steepest_hold_tilt=steepest,
        left=left,
        right=right,
        gyro_group_delay=filter_group_delay(imu.gyro.bandwidth, imu.filter_order),
        accel_group_delay=filter_group_delay(imu.accel.bandwidth, imu.filter_order),
        measured=() if measured is None else tuple(
            key for key, value in measured.model_dump().items() if value is not None),
    )


def figures_json(spec: RobotSpec) -> dict[str, Any]:
    """Derived figures as plain JSON types, SI units named in each key."""
    f = spec.figures
    return {
        "name": spec.name,
        "mass_kg": f.mass,
        "com_m": f.com.tolist(),
        "body_mass_kg": f.body.mass,
        "body_com_m": f.body.com.tolist(),
        "body_inertia_kg_m2": f.body.inertia.tolist(),
        "body_pitch_inertia_about_axle_kg_m2": float(
            f.body.inertia[1, 1] + f.body.mass * (f.body.com[0] ** 2 + f.body.com[2] ** 2)),
        "com_height_m": f.com_height,
        "wheel_mass_kg": f.wheel_mass,
        "wheel_inertia_kg_m2": f.wheel_inertia_axle,
        "motor_resistance_ohm": f.resistance,
        "torque_constant_n_m_per_a": f.torque_constant,
        "back_emf_constant_v_s_per_rad": f.back_emf_constant,
        "reflected_rotor_inertia_kg_m2": f.reflected_inertia,
        "stall_torque_per_wheel_n_m": f.stall_torque_wheel,
        "battery_nominal_voltage_v": f.battery_voltage,
        "drive_voltage_v": f.drive_voltage,
        "available_stall_torque_per_wheel_n_m": f.available_stall_torque,
        "top_speed_m_s": f.top_speed,
        "steepest_hold_tilt_deg": math.degrees(f.steepest_hold_tilt),
        "sides_differ": f.sides_differ,
        "sides": {side: _side_json(getattr(f, side)) for side in ("left", "right")},
        "imu_gyro_group_delay_s": f.gyro_group_delay,
        "imu_accel_group_delay_s": f.accel_group_delay,
        "body_measured": list(f.measured),
        "description": spec.to_si_dict(),
    }


def _side_json(side: SideFigures) -> dict[str, float]:
    return {
        "motor_resistance_ohm": side.resistance,
        "torque_constant_n_m_per_a": side.torque_constant,
        "back_emf_constant_v_s_per_rad": side.back_emf_constant,
        "reflected_rotor_inertia_kg_m2": side.reflected_inertia,
        "stall_torque_n_m": side.stall_torque_wheel,
        "available_stall_torque_n_m": side.available_stall_torque,
        "friction_torque_n_m": side.friction_torque,
        "static_friction_torque_n_m": side.static_friction_torque,
        "wheel_radius_m": side.wheel_radius,
        "wheel_inertia_kg_m2": side.wheel_inertia_axle,
        "top_speed_m_s": side.top_speed,
    }
