"""The robot description file: load, validate, and derive the figures in force.

Values are SI floats once loaded. Positions are ``[x, y, z]`` in the body frame
(x forward, y left, z up) measured from the centre of the axle.
"""

from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    create_model,
    model_validator,
)

from .inertia import MassProperties, box_inertia, combine, cylinder_inertia_y
from .units import STANDARD_GRAVITY, UnitError, to_si
from .yamlfile import YamlFileError, parse_yaml_text, read_yaml_file

MAX_NAME = 64  # characters in a robot's name (it becomes part of file and folder names)


class RobotFileError(ValueError):
    """A robot description with one or more problems, one line each."""

    def __init__(self, source: str, problems: list[str]):
        self.source = source
        self.problems = problems
        super().__init__("\n".join(f"{source}: {p}" for p in problems))


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


# --------------------------------------------------------------------- loading


def load_robot(path: str | Path, overrides: dict[str, Any] | None = None) -> RobotSpec:
    """Read, override and validate a robot file. Raises RobotFileError."""
    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise RobotFileError(source, ["no such file"])
    try:
        data = read_yaml_file(path, source)
    except YamlFileError as err:
        raise RobotFileError(source, err.problems) from None
    if isinstance(data, dict) and "name" not in data:
        # The file's stem, cut to the characters a name may hold ('my bot (v2)' -> 'my bot -v2-').
        stem = re.sub(r"[^A-Za-z0-9 _.-]+", "-", path.stem).strip()[:MAX_NAME].strip()
        data["name"] = stem or "robot"
    return robot_from_dict(data, source, overrides)


def parse_yaml(text: str, source: str) -> Any:
    """YAML text to Python data, within the bounds of :mod:`sandbox.yamlfile` (no aliases,
    no duplicate keys, bounded sizes); a problem names the line and the key."""
    try:
        return parse_yaml_text(text, source)
    except YamlFileError as err:
        raise RobotFileError(source, err.problems) from None


def robot_from_dict(
    data: Any, source: str = "<robot>", overrides: dict[str, Any] | None = None
) -> RobotSpec:
    """Validate plain data (as read from YAML) into a RobotSpec."""
    if not isinstance(data, dict):
        raise RobotFileError(source, ["the file must be a mapping of sections (name, body, ...)"])
    if overrides:
        data = apply_overrides(data, overrides, source)
    try:
        spec = RobotSpec.model_validate(data)
    except ValidationError as err:
        raise RobotFileError(source, [describe_error(e) for e in err.errors()]) from None
    from .plausibility import plausibility_errors

    problems = plausibility_errors(spec, data)
    if problems:
        raise RobotFileError(source, problems)
    spec.__dict__["_source_data"] = data  # the values as written, for the warnings
    return spec


def key_kind(dotted: str) -> str | None:
    """The unit kind ('length', 'mass', ...) of a dotted robot key such as
    ``body.parts.0.mass`` or ``imu.at.2``; None for a key without a unit or no such key."""
    annotation: Any = RobotSpec
    metadata: tuple = ()
    for part in dotted.split("."):
        args = [a for a in getattr(annotation, "__args__", ()) if a is not type(None)]
        if isinstance(annotation, type) and issubclass(annotation, BaseModel):
            field = annotation.model_fields.get(part)
            if field is None:
                return None
            annotation, metadata = field.annotation, tuple(field.metadata)
        elif args and part.isdigit():  # a list or tuple element
            annotation = args[min(int(part), len(args) - 1)]
            metadata = tuple(getattr(annotation, "__metadata__", ()))
        else:
            return None
        while not getattr(annotation, "__metadata__", None) and len(
                [a for a in getattr(annotation, "__args__", ()) if a is not type(None)]) == 1 \
                and getattr(annotation, "__origin__", None) not in (list, tuple):
            annotation = next(a for a in annotation.__args__ if a is not type(None))  # X | None
    for item in (*metadata, *getattr(annotation, "__metadata__", ())):
        kind = getattr(getattr(item, "func", None), "unit_kind", None)
        if kind:
            return kind
    return None


def value_to_si(key: str, value: object) -> float:
    """A number or unit string for a dotted key, as ``--set`` reads it: robot keys by their
    kind ('35 mm' for a length), controller ``config.`` keys in SI base units."""
    from .units import any_to_si

    if isinstance(value, str) and key.startswith("config."):
        return any_to_si(value)
    kind = None if key.startswith("config.") else key_kind(key)
    return to_si(value, kind) if kind else any_to_si(value)


def apply_overrides(data: dict, overrides: dict[str, Any], source: str) -> dict:
    """A copy of ``data`` with dotted keys set (``wheels.friction``, ``body.parts.0.mass``)."""
    import copy

    data = copy.deepcopy(data)
    problems = []
    for dotted, value in overrides.items():
        keys = dotted.split(".")
        if not all(keys):
            problems.append(f"{dotted!r}: a key has an empty part (write e.g. wheels.friction)")
            continue
        node: Any = data
        try:
            for key in keys[:-1]:
                node = node[int(key)] if isinstance(node, list) else node.setdefault(key, {})
            if isinstance(node, list):
                node[int(keys[-1])] = value
            elif isinstance(node, dict):
                node[keys[-1]] = value
            else:
                raise TypeError
        except (ValueError, IndexError, TypeError, AttributeError):
            problems.append(f"{dotted}: cannot set this key (no such place in the description)")
    if problems:
        raise RobotFileError(source, problems)
    return data


def describe_error(err: dict, root: type[BaseModel] | None = None) -> str:
    """One plain line for one pydantic error: the dotted key, the problem, the allowed range."""
    loc = err.get("loc", ())
    key = _dotted(loc)
    kind = err.get("type", "")
    if kind == "extra_forbidden":
        parent = loc[:-1]
        known = _fields_at(parent, root or RobotSpec)
        hint = nearest_key(str(loc[-1]), known)
        allowed = f"did you mean '{hint}'?" if hint else "allowed: " + ", ".join(known)
        return f"{key}: unknown key ({allowed})"
    if kind == "missing":
        return f"{key}: missing (required)"
    message = err.get("msg", "")
    if message.startswith("Value error, "):
        message = message[len("Value error, ") :]
    message = message[:1].lower() + message[1:]
    shown = err.get("input")
    if kind in {"greater_than", "greater_than_equal", "less_than", "less_than_equal"}:
        message = f"{message} (got {shown!r}, in SI units)"
    elif kind == "literal_error":
        message = f"{message} (got {shown!r})"
    if not key:
        return message
    return f"{key}: {message}"


def nearest_key(word: str, known: list[str]) -> str | None:
    """The known key closest to a mistyped one, or None; swapped letters count as close."""

    def score(candidate: str) -> float:
        ratio = difflib.SequenceMatcher(None, word.lower(), candidate.lower()).ratio()
        return ratio + (0.2 if sorted(word.lower()) == sorted(candidate.lower()) else 0.0)

    best = max(known, key=score, default=None)
    return best if best is not None and score(best) >= 0.6 else None


def _dotted(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def _fields_at(loc: tuple, root: type[BaseModel]) -> list[str]:
    """Field names of the section at ``loc`` (for 'did you mean')."""
    model: Any = root
    for part in loc:
        if isinstance(part, int):
            continue
        field = model.model_fields.get(part)
        if field is None:
            return []
        annotation = field.annotation
        inner = getattr(annotation, "__args__", None)
        if inner:  # list[Part]
            annotation = inner[0]
        if not (isinstance(annotation, type) and issubclass(annotation, BaseModel)):
            return []
        model = annotation
    return list(model.model_fields)


# --------------------------------------------------------------------- figures

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
