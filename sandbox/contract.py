"""The controller contract: what a controller script is given and what it may raise.

A controller script defines a class (``Controller`` by default) with
``__init__(self, config, robot)`` and ``step(self, r) -> (left_duty, right_duty)``;
``robot`` is a :class:`RobotFacts`, ``r`` a :class:`Reading` (its ``setpoint`` a
:class:`Setpoint`). Everything is SI; pitch is the rotation about body +y, positive
when the top leans forward. Standard library only; never touches the physics engine.
Scripts import these from :mod:`sandbox.control`.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any

__all__ = [
    "ControllerError",
    "ControllerLoadError",
    "MAX_LOG_NAME_LENGTH",
    "Reading",
    "RobotFacts",
    "Setpoint",
]

MAX_LOG_NAME_LENGTH = 64


class ControllerError(RuntimeError):
    """The controller script failed while running (raised, or returned something unusable)."""


class ControllerLoadError(ValueError):
    """The controller script could not be loaded (bad path, syntax, missing class...)."""


# --------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True)
class Setpoint:
    """What the test timeline asks for: forward speed (m/s) and turn rate (rad/s, left positive)."""

    speed: float = 0.0
    turn: float = 0.0


_STILL = Setpoint()


class Reading:
    """What a controller's ``step(r)`` receives each tick.

    ``t``, ``dt`` (s); ``gyro`` (rad/s) and ``accel`` (specific force, m/s²) as
    3-tuples in the sensor frame; ``ticks`` (left, right) encoder counts, ints;
    ``battery_v`` (V); ``setpoint`` (:class:`Setpoint`). ``log(name, value)``
    adds a float channel to this tick's trace row. The runner keeps one
    instance, sets its fields each tick and collects ``logs`` with
    :meth:`take_logs`.
    """

    __slots__ = ("t", "dt", "gyro", "accel", "ticks", "battery_v", "setpoint", "logs")

    def __init__(
        self,
        t: float = 0.0,
        dt: float = 0.0,
        gyro: tuple[float, float, float] = (0.0, 0.0, 0.0),
        accel: tuple[float, float, float] = (0.0, 0.0, 0.0),
        ticks: tuple[int, int] = (0, 0),
        battery_v: float = 0.0,
        setpoint: Setpoint = _STILL,
    ):
        self.t = t
        self.dt = dt
        self.gyro = gyro
        self.accel = accel
        self.ticks = ticks
        self.battery_v = battery_v
        self.setpoint = setpoint
        self.logs: dict[str, float] = {}

    def log(self, name: str, value: float) -> None:
        """Record ``value`` as channel ``log.<name>`` of this tick's trace row.

        ``name``: ASCII letters, digits and underscores, not starting with a digit,
        at most 64 characters. ``value``: anything ``float()`` takes except text.
        Logging a name twice in one tick keeps the last value.
        """
        if type(name) is not str or name not in _GOOD_LOG_NAMES:
            _check_log_name(name)
        if type(value) is not float:
            value = _log_value(name, value)
        self.logs[name] = value

    def take_logs(self) -> dict[str, float]:
        """This tick's logged channels; starts an empty set for the next tick."""
        logs = self.logs
        self.logs = {}
        return logs

    def __repr__(self) -> str:
        return (
            f"Reading(t={self.t!r}, dt={self.dt!r}, gyro={self.gyro!r}, accel={self.accel!r}, "
            f"ticks={self.ticks!r}, battery_v={self.battery_v!r}, setpoint={self.setpoint!r})"
        )


# Channel names already found good: a controller logs the same few names every tick.
_GOOD_LOG_NAMES: set[str] = set()


def _check_log_name(name: Any) -> None:
    if type(name) is not str or not (
        name.isidentifier() and name.isascii() and len(name) <= MAX_LOG_NAME_LENGTH
    ):
        raise ControllerError(
            f"r.log: channel name {name!r} is not allowed (use letters, digits and "
            f"underscores, not starting with a digit, at most {MAX_LOG_NAME_LENGTH} characters)"
        )
    if len(_GOOD_LOG_NAMES) < 10_000:  # bounded, whatever a script does with names
        _GOOD_LOG_NAMES.add(name)


def _log_value(name: str, value: Any) -> float:
    if isinstance(value, (str, bytes)) or getattr(value, "ndim", 0) != 0:
        kind = f"an array of shape {value.shape}" if hasattr(value, "shape") else repr(value)
        raise ControllerError(f"r.log({name!r}, ...): the value must be one number, got {kind}")
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ControllerError(
            f"r.log({name!r}, ...): the value must be a number, got {type(value).__name__}"
        ) from None


@dataclass(frozen=True)
class RobotFacts:
    """Static facts a controller may read (its ``robot`` argument), SI units.

    wheel_radius (m), track (m, between wheel centres), counts_per_wheel_rev (encoder
    counts of one wheel turn relative to the body, whether the encoder sits on the motor
    shaft or the wheel's; ``counts_per_rev`` is its old name, deprecated), mass (kg, whole robot),
    com_height (m, body centre of mass from the axle), battery_voltage (V,
    nominal), drive_voltage (V, nominal battery less the driver's drop),
    max_wheel_speed (rad/s, no-load at drive_voltage), imu_at (m, body frame),
    physics_dt (s), rate_hz (controller rate, Hz), pitch_inertia (kg·m², body
    without wheels about the axle line), body_mass (kg, without wheels),
    stall_torque (N·m per wheel at drive_voltage, at the wheel).
    """

    wheel_radius: float
    track: float
    counts_per_wheel_rev: float
    mass: float
    com_height: float
    battery_voltage: float
    drive_voltage: float
    max_wheel_speed: float
    imu_at: tuple[float, float, float]
    physics_dt: float
    rate_hz: float
    pitch_inertia: float
    body_mass: float = 0.0
    stall_torque: float = 0.0

    @property
    def counts_per_rev(self) -> float:
        """Deprecated name of :attr:`counts_per_wheel_rev` (kept for one release)."""
        warnings.warn("robot.counts_per_rev is deprecated: read robot.counts_per_wheel_rev "
                      "(counts of one wheel turn) instead", DeprecationWarning, stacklevel=2)
        return self.counts_per_wheel_rev

    @classmethod
    def from_spec(cls, spec: Any, rate_hz: float, physics_dt: float) -> RobotFacts:
        """Facts of a validated :class:`sandbox.robot.RobotSpec` run at ``rate_hz`` (Hz)."""
        for label, value in (("rate_hz", rate_hz), ("physics_dt", physics_dt)):
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"{label} must be a positive number, got {value!r}")
        fig = spec.figures
        body = fig.body
        offset_sq = float(body.com[0] ** 2 + body.com[2] ** 2)  # distance² from the axle line (y)
        return cls(
            wheel_radius=float(spec.wheels.radius),
            track=float(spec.wheels.track),
            counts_per_wheel_rev=float(
                spec.encoders.counts_per_rev
                * (1.0 if getattr(spec.encoders, "shaft", "motor") == "wheel"
                   else spec.motors.gear_ratio)),
            mass=float(fig.mass),
            com_height=float(fig.com_height),
            battery_voltage=float(fig.battery_voltage),
            drive_voltage=float(fig.drive_voltage),
            max_wheel_speed=float(fig.drive_voltage / fig.back_emf_constant),
            imu_at=tuple(float(c) for c in spec.imu.at),
            physics_dt=float(physics_dt),
            rate_hz=float(rate_hz),
            pitch_inertia=float(body.inertia[1, 1] + body.mass * offset_sq),  # parallel axis
            body_mass=float(body.mass),
            stall_torque=float(fig.available_stall_torque),
        )
