"""The schema of a robot file: pydantic models of its sections, every value in SI once read.

Unit keys are converted on the way in by :func:`_si` (a number is SI, a string names its unit);
loading a file and wording its errors is :mod:`sandbox.robot`, the figures derived from a
validated description :mod:`sandbox.figures`. Positions are ``[x, y, z]`` in the body frame
(x forward, y left, z up) measured from the centre of the axle.
"""

from __future__ import annotations

import math
import re
from functools import cached_property
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    create_model,
    model_validator,
)

from .figures import Figures, derive
from .units import STANDARD_GRAVITY, UnitError, to_si

MAX_NAME = 64  # characters in a robot's name (it becomes part of file and folder names)


def _si(kind: str):
    def convert(value: object) -> float:
        try:
            return to_si(value, kind)
        except UnitError as err:
            raise ValueError(str(err)) from None

    convert.unit_kind = kind  # type: ignore[attr-defined]  (read by key_kind)
    return BeforeValidator(convert)


_RATIO = re.compile(r"^\s*([0-9]*\.?[0-9]+)\s*:\s*([0-9]*\.?[0-9]+)\s*$")


def _gear_ratio(value: object) -> object:
    """A gear ratio as a number (48) or as catalogues write it: '1:48' or '48:1' (both 48:
    a gear motor reduces speed). YAML reads an unquoted 1:48 as this text too."""
    if isinstance(value, str):
        match = _RATIO.match(value)
        if match:
            low, high = sorted(float(g) for g in match.groups())
            if low <= 0:
                raise ValueError(f"{value!r}: both sides of a ratio must be above zero")
            return high / low
        try:
            return float(value)
        except ValueError:
            raise ValueError(f"cannot read {value!r} as a gear ratio: write 48, or '1:48'") \
                from None
    return value


GearRatio = Annotated[float, BeforeValidator(_gear_ratio)]


Length = Annotated[float, _si("length")]
Mass = Annotated[float, _si("mass")]
Voltage = Annotated[float, _si("voltage")]
Current = Annotated[float, _si("current")]
Resistance = Annotated[float, _si("resistance")]
Torque = Annotated[float, _si("torque")]
AngularSpeed = Annotated[float, _si("angular_speed")]
Frequency = Annotated[float, _si("frequency")]
Time = Annotated[float, _si("time")]
Acceleration = Annotated[float, _si("acceleration")]
Inertia = Annotated[float, _si("inertia")]
Charge = Annotated[float, _si("charge")]
Fraction = Annotated[float, _si("fraction")]
Angle = Annotated[float, _si("angle")]
GyroDensity = Annotated[float, _si("gyro_density")]
AccelDensity = Annotated[float, _si("accel_density")]
GyroWalk = Annotated[float, _si("gyro_walk")]
AccelWalk = Annotated[float, _si("accel_walk")]
Position = tuple[Length, Length, Length]
PositiveSize = tuple[
    Annotated[Length, Field(gt=0)], Annotated[Length, Field(gt=0)], Annotated[Length, Field(gt=0)]
]


class Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _absent(value: object) -> bool:
    """An optional key left out of the file: left out of to_si_dict too."""
    return value is None


class Frame(Section):
    """The main chassis box: sides along x (depth), y (width), z (height)."""

    depth: Length = Field(gt=0)
    width: Length = Field(gt=0)
    height: Length = Field(gt=0)
    mass: Mass = Field(gt=0)
    bottom: Length = 0.0  # z of the underside relative to the axle


class Part(Section):
    """A solid box fixed to the body (battery, board, payload deck...)."""

    name: str = Field(min_length=1)
    mass: Mass = Field(gt=0)
    size: PositiveSize
    at: Position = (0.0, 0.0, 0.0)
    colour: str | None = Field(default=None, pattern=r"^#[0-9a-fA-F]{6}$")


class Measured(Section):
    """The body's figures as measured on the real robot (without the wheels); each one given
    replaces the figure derived from the parts. ``pitch_inertia`` is about the body's centre
    of mass (kg·m²)."""

    mass: Mass | None = Field(default=None, gt=0, exclude_if=_absent)
    com: Position | None = Field(default=None, exclude_if=_absent)
    pitch_inertia: Inertia | None = Field(default=None, gt=0, exclude_if=_absent)


class Body(Section):
    frame: Frame
    parts: list[Part] = []
    measured: Measured | None = Field(default=None, exclude_if=_absent)


class Wheels(Section):
    radius: Length = Field(gt=0, le=1.0)
    width: Length = Field(gt=0)
    mass: Mass = Field(gt=0)
    track: Length = Field(gt=0)  # distance between the two wheel centres
    friction: float = Field(default=0.9, gt=0, le=3.0)
    rolling_resistance: float = Field(default=0.0, ge=0, le=0.2)  # rolling friction coefficient
    left: WheelSide | None = Field(default=None, exclude_if=_absent)  # this side's own figures
    right: WheelSide | None = Field(default=None, exclude_if=_absent)


class Motors(Section):
    """Per-motor catalogue figures at the gearbox output shaft."""

    rated_voltage: Voltage = Field(default=6.0, gt=0)
    no_load_speed: AngularSpeed = Field(default=250 * 2 * math.pi / 60, gt=0)  # 250 rpm
    stall_torque: Torque = Field(default=1.5 * STANDARD_GRAVITY / 100, gt=0)  # 1.5 kgf·cm
    stall_current: Current = Field(default=1.6, gt=0)
    gear_ratio: GearRatio = Field(default=48.0, ge=1.0)
    rotor_inertia: Inertia = Field(default=1.0e-7, ge=0)  # at the motor shaft
    friction_torque: Torque = Field(default=0.005, ge=0)  # Coulomb, at the output shaft
    # total free play at the output shaft (an angle); the motor side needs a rotor inertia
    backlash: Annotated[float, _si("angle")] = Field(default=0.0, ge=0, le=math.pi / 6)
    # breakaway torque at the output shaft (Karnopp stick-slip); absent: equal to friction_torque
    static_friction_torque: Torque | None = Field(default=None, ge=0, exclude_if=_absent)
    left: MotorSide | None = Field(default=None, exclude_if=_absent)  # this side's own figures
    right: MotorSide | None = Field(default=None, exclude_if=_absent)

    @model_validator(mode="after")
    def _static_at_least_kinetic(self) -> Motors:
        static = self.static_friction_torque
        if static is not None and static < self.friction_torque:
            raise ValueError(
                f"static_friction_torque {static:g} N·m is below friction_torque "
                f"{self.friction_torque:g} N·m: the breakaway torque is at least the kinetic "
                "one (raise static_friction_torque or lower friction_torque)")
        return self

    @model_validator(mode="after")
    def _backlash_needs_rotor(self) -> Motors:
        if self.backlash > 0 and self.rotor_inertia == 0:
            raise ValueError(
                "backlash needs a rotor inertia: the play is crossed by the motor side "
                "(rotor and gears), which has no inertia when motors.rotor_inertia is 0; "
                "give motors.rotor_inertia (at the motor shaft, kg*m^2, e.g. 1e-7) or set "
                "motors.backlash to 0")
        return self


def _side_model(section: type[Section], name: str, leave_out: tuple[str, ...]) -> type[Section]:
    """A section's keys, each optional: one side's overrides (motors.left, wheels.right...)."""
    fields: dict[str, Any] = {}
    for key, info in section.model_fields.items():
        if key in leave_out:
            continue
        kept = Annotated[(info.annotation, *info.metadata)]  # unit conversion and range
        fields[key] = (kept | None, Field(default=None, exclude_if=_absent))
    side = create_model(name, __base__=Section, **fields)
    side.__doc__ = f"One side's overrides of the {section.__name__.lower()} section (SI)."
    return side


MotorSide = _side_model(Motors, "MotorSide", ("left", "right"))


class Driver(Section):
    """The H-bridge: voltage lost across it, PWM resolution, deadband, zero-duty behaviour."""

    voltage_drop: Voltage = Field(default=1.8, ge=0)
    pwm_bits: int = Field(default=8, ge=1, le=16)
    deadband: Fraction = Field(default=0.0, ge=0, lt=1)
    off_state: Literal["brake", "coast"] = "brake"


WheelSide = _side_model(Wheels, "WheelSide", ("left", "right", "track"))
Motors.model_rebuild()
Wheels.model_rebuild()


class Battery(Section):
    cells: int = Field(default=6, ge=1, le=48)
    cell_voltage: Voltage = Field(default=1.2, gt=0, le=5.0)  # nominal, per cell
    cell_resistance: Resistance = Field(default=0.03, ge=0)
    capacity: Charge = Field(default=7200.0, gt=0)  # 2000 mAh
    charge: Fraction = Field(default=0.8, ge=0, le=1)  # state of charge at the start


class Gyro(Section):
    range: AngularSpeed = Field(default=math.radians(250), gt=0)  # 250 deg/s
    noise_density: GyroDensity = Field(default=math.radians(0.005), ge=0)  # deg/s/sqrt(Hz)
    bias: AngularSpeed = Field(default=math.radians(0.5), ge=0)  # 0.5 deg/s
    bias_walk: GyroWalk = Field(default=0.0, ge=0)
    bits: int = Field(default=16, ge=4, le=32)
    # the sensor's own digital low-pass (Butterworth), Hz; absent: no filter
    bandwidth: Frequency | None = Field(default=None, gt=0, exclude_if=_absent)
    scale_error: Fraction = Field(default=0.0, ge=-0.5, le=0.5)  # reading = (1 + e) · true


class Accel(Section):
    range: Acceleration = Field(default=2 * STANDARD_GRAVITY, gt=0)
    noise_density: AccelDensity = Field(default=0.0002 * STANDARD_GRAVITY, ge=0)
    bias: Acceleration = Field(default=0.02, ge=0)
    bias_walk: AccelWalk = Field(default=0.0, ge=0)
    bits: int = Field(default=16, ge=4, le=32)
    # the sensor's own digital low-pass (Butterworth), Hz; absent: no filter
    bandwidth: Frequency | None = Field(default=None, gt=0, exclude_if=_absent)
    scale_error: Fraction = Field(default=0.0, ge=-0.5, le=0.5)  # reading = (1 + e) · true


class Imu(Section):
    at: Position = (0.0, 0.0, 0.05)
    rate: Frequency = Field(default=1000.0, gt=0, le=100_000)
    latency: Time = Field(default=0.0, ge=0, le=1.0)
    gyro: Gyro = Gyro()
    accel: Accel = Accel()
    rotation: tuple[Angle, Angle, Angle] = (0.0, 0.0, 0.0)  # board mounting: roll, pitch, yaw
    filter_order: Literal[1, 2] = 2  # of the Butterworth low-pass of gyro/accel bandwidth

    @model_validator(mode="after")
    def _filters_below_nyquist(self) -> Imu:
        for name, sensor in (("gyro", self.gyro), ("accel", self.accel)):
            if sensor.bandwidth is not None and sensor.bandwidth >= self.rate / 2:
                raise ValueError(
                    f"{name}.bandwidth {sensor.bandwidth:g} Hz must be below half the sample "
                    f"rate (rate {self.rate:g} Hz / 2 = {self.rate / 2:g} Hz)")
        return self

    @property
    def filtering(self) -> bool:
        """True when the gyro or the accelerometer has its own low-pass filter."""
        return self.gyro.bandwidth is not None or self.accel.bandwidth is not None


class Encoders(Section):
    counts_per_rev: int = Field(default=360, ge=1)  # per turn of the shaft below
    shaft: Literal["motor", "wheel"] = "motor"  # encoder on the motor shaft or the wheel's


class Board(Section):
    """The microcontroller: timing of its loop (s)."""

    loop_jitter: Time = Field(default=0.0, ge=0, le=0.1)  # standard deviation of tick times
    compute_time: Time = Field(default=0.0, ge=0, le=1.0)  # from the reading to the duties


class RobotSpec(Section):
    """A validated robot description, every value in SI."""

    name: str = Field(default="robot", min_length=1, max_length=MAX_NAME,
                      pattern=r"^[A-Za-z0-9_.-][A-Za-z0-9 _.-]*$")
    body: Body
    wheels: Wheels
    motors: Motors = Motors()
    driver: Driver = Driver()
    battery: Battery = Battery()
    imu: Imu = Imu()
    encoders: Encoders = Encoders()
    board: Board = Board()

    @model_validator(mode="after")
    def _above_ground(self) -> RobotSpec:
        ground = -self.wheels.radius
        frame = self.body.frame
        if frame.bottom <= ground:
            raise ValueError(
                f"body.frame.bottom {frame.bottom * 1000:g} mm puts the frame into the ground: "
                f"it must be above -{self.wheels.radius * 1000:g} mm (minus the wheel radius)"
            )
        for i, part in enumerate(self.body.parts):
            low = part.at[2] - part.size[2] / 2
            if low <= ground:
                raise ValueError(
                    f"body.parts[{i}] ({part.name}) reaches {low * 1000:g} mm, into the ground: "
                    f"its underside must be above -{self.wheels.radius * 1000:g} mm"
                )
        if self.battery_voltage <= self.driver.voltage_drop:
            raise ValueError(
                f"driver.voltage_drop {self.driver.voltage_drop:g} V leaves nothing of the "
                f"battery's {self.battery_voltage:g} V for the motors"
            )
        return self

    @model_validator(mode="after")
    def _sides_valid(self) -> RobotSpec:
        for section, make in (("motors", self.motor_side), ("wheels", self.wheel_side)):
            for side in ("left", "right"):
                try:
                    make(side)
                except ValidationError as err:
                    from .robot import describe_error  # the loader's wording (imports this)

                    problems = "; ".join(describe_error(e, type(getattr(self, section)))
                                         for e in err.errors())
                    raise ValueError(f"{section}.{side}: {problems}") from None
        return self

    def motor_side(self, side: str) -> Motors:
        """The motors section with ``side``'s ('left'/'right') overrides applied."""
        return _with_side(self.motors, side)

    def wheel_side(self, side: str) -> Wheels:
        """The wheels section with ``side``'s ('left'/'right') overrides applied."""
        return _with_side(self.wheels, side)

    @property
    def battery_voltage(self) -> float:
        """Nominal battery voltage (V): cells × cell voltage."""
        return self.battery.cells * self.battery.cell_voltage

    @cached_property
    def figures(self) -> Figures:
        return derive(self)

    @cached_property
    def warnings(self) -> tuple[str, ...]:
        """Plausibility warnings, one line each naming the key (the run goes on)."""
        from .plausibility import plausibility_warnings

        return tuple(plausibility_warnings(self, self.__dict__.get("_source_data")))

    def to_si_dict(self) -> dict[str, Any]:
        """The description with every value in SI, plain Python types (for run.yaml)."""
        return self.model_dump(mode="json")


def _with_side(section: Motors | Wheels, side: str) -> Any:
    """``section`` (motors or wheels) with one side's overrides, as the same class."""
    if side not in ("left", "right"):
        raise ValueError(f"side must be 'left' or 'right', got {side!r}")
    overrides = getattr(section, side)
    if overrides is None:
        return section.model_copy(update={"left": None, "right": None})
    data = section.model_dump(exclude={"left", "right"})
    data.update(overrides.model_dump(exclude_none=True))
    return type(section).model_validate(data)

