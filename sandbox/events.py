"""Disturbance tests: the file format, the built-in tests, the timeline of events.

A test is a plan: how long, what floor, which events at which times or
positions (pushes, payloads, friction changes, battery state, sensor faults,
speed and turn setpoints) and the criteria that decide pass or fail. Built-in
tests are sized to the robot; a user writes the same vocabulary in YAML. The
verdicts are :mod:`sandbox.verdicts` (``judge`` is re-exported here).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from .contract import Setpoint
from .ground import Ground, Patch, Rough, Step
from .robot import (
    AngularSpeed,
    Fraction,
    Length,
    Mass,
    RobotSpec,
    Time,
    _si,
    describe_error,
)
from .verdicts import judge
from .yamlfile import YamlFileError, read_yaml_file

GRAVITY = 9.80665
Impulse = Annotated[float, _si("impulse")]
Force = Annotated[float, _si("force")]
Speed = Annotated[float, _si("speed")]
Angle = Annotated[float, _si("angle")]
PositiveLength = Annotated[float, _si("length"), Field(gt=0, le=5)]
# Beyond any robot upright serves (see DEVELOPERS.md, "Limits of a description").
MAX_PAYLOAD = 500.0  # kg
MAX_IMPULSE = 1000.0  # N·s
MAX_FORCE = 10_000.0  # N


class TestFileError(ValueError):
    """A test file with one or more problems, one line each."""

    def __init__(self, source: str, problems: list[str]):
        self.source = source
        self.problems = problems
        super().__init__("\n".join(f"{source}: {p}" for p in problems))


# --------------------------------------------------------------------- the file format


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class PushSpec(_Section):
    """A shove on the body: an impulse (N·s), or a force (N) held for a duration (s)."""

    impulse: Impulse | None = Field(default=None, gt=0, le=MAX_IMPULSE)
    force: Force | None = Field(default=None, gt=0, le=MAX_FORCE)
    duration: Time = Field(default=0.1, gt=0, le=10)
    height: Length | None = Field(default=None, gt=0, le=5)  # above the axle; default: the top
    direction: Literal["forward", "backward", "left", "right"] = "forward"

    @model_validator(mode="after")
    def _one_size(self) -> PushSpec:
        if (self.impulse is None) == (self.force is None):
            raise ValueError("give either impulse (N*s) or force (N) with duration")
        return self


class PayloadSpec(_Section):
    mass: Mass = Field(gt=0, le=MAX_PAYLOAD)
    at: tuple[Length, Length, Length] | None = None  # body frame; default: on top of the frame
    size: tuple[PositiveLength, PositiveLength, PositiveLength] = (0.05, 0.05, 0.02)


class SensorMiss(_Section):
    side: Literal["left", "right"]
    counts: int = Field(gt=0, le=1_000_000)


class SetpointSpec(_Section):
    speed: Speed = 0.0
    turn: AngularSpeed = 0.0


class BatterySpec(_Section):
    charge: Fraction = Field(ge=0, le=1)


class EventSpec(_Section):
    """One event, at a time (s) or when the robot has travelled to a position (m)."""

    at: Time | None = Field(default=None, ge=0)
    at_position: Length | None = None
    push: PushSpec | None = None
    payload: PayloadSpec | None = None
    friction: float | None = Field(default=None, gt=0, le=3)
    battery: BatterySpec | None = None
    gyro_bias: tuple[AngularSpeed, AngularSpeed, AngularSpeed] | None = None
    accel_dropout: Time | None = Field(default=None, gt=0)
    encoder_miss: SensorMiss | None = None
    setpoint: SetpointSpec | None = None

    @model_validator(mode="after")
    def _one_thing(self) -> EventSpec:
        if (self.at is None) == (self.at_position is None):
            raise ValueError("give exactly one of at (a time) or at_position (a distance)")
        kinds = [k for k in EVENT_KINDS if getattr(self, k) is not None]
        if len(kinds) != 1:
            raise ValueError(f"give exactly one of {', '.join(EVENT_KINDS)} (got "
                             f"{', '.join(kinds) or 'none'})")
        return self


EVENT_KINDS = ("push", "payload", "friction", "battery", "gyro_bias", "accel_dropout",
               "encoder_miss", "setpoint")


class PatchSpec(_Section):
    start: Length
    end: Length
    friction: float = Field(gt=0, le=3)


class StepSpec(_Section):
    at: Length
    height: Length = Field(gt=0, le=0.5)
    length: Length = Field(default=0.03, gt=0)


class RoughSpec(_Section):
    amplitude: Length = Field(gt=0, le=0.2)
    wavelength: Length = Field(gt=0.01, le=10)
    seed: int = Field(default=0, ge=0, le=2**32 - 1)  # numpy's seeds are non-negative


class GroundSpec(_Section):
    slope: Angle = Field(default=0.0, ge=-0.6, le=0.6)
    friction: float | None = Field(default=None, gt=0, le=3)  # default: the robot's wheels
    rolling_resistance: float | None = Field(default=None, ge=0, le=0.2)
    patches: list[PatchSpec] = []
    steps: list[StepSpec] = []
    rough: RoughSpec | None = None

    @model_validator(mode="after")
    def _compatible(self) -> GroundSpec:
        if self.rough is not None and self.patches:
            raise ValueError("rough ground cannot carry friction patches (choose one)")
        return self


class Criteria(_Section):
    """What passing means. Angles in rad, times in s, distances in m."""

    must_not_fall: bool = True
    recover_within: Time | None = Field(default=2.0, gt=0)
    recover_band: Angle = Field(default=math.radians(2.0), gt=0)
    max_drift: Length | None = Field(default=None, gt=0)
    max_speed_error: Speed | None = Field(default=None, gt=0)
    min_distance: Length | None = None  # the robot must get at least this far (thresholds)


class TestFile(_Section):
    name: str = Field(default="custom", min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.-]+$")
    description: str = Field(default="", max_length=2000)
    duration: Time = Field(default=10.0, gt=0, le=3600)
    tilt: Angle = 0.0
    battery_charge: Fraction | None = Field(default=None, ge=0, le=1)
    ground: GroundSpec = GroundSpec()
    # a test is a handful of disturbances; ten thousand is far past any real one
    events: list[EventSpec] = Field(default=[], max_length=10_000)
    criteria: Criteria = Criteria()


# --------------------------------------------------------------------- the plan


@dataclass(frozen=True)
class TestPlan:
    """A resolved test: SI values only, sized to one robot."""

    name: str
    description: str
    duration: float
    ground_spec: GroundSpec
    events: tuple[EventSpec, ...]
    criteria: Criteria
    tilt: float = 0.0
    battery_charge: float | None = None

    def robot(self, spec: RobotSpec) -> RobotSpec:
        """The robot as the test starts it (for example with a tired battery)."""
        if self.battery_charge is None:
            return spec
        battery = spec.battery.model_copy(update={"charge": self.battery_charge})
        return spec.model_copy(update={"battery": battery})

    def ground(self, spec: RobotSpec) -> Ground:
        g = self.ground_spec
        return Ground(
            friction=spec.wheels.friction if g.friction is None else g.friction,
            rolling_resistance=(spec.wheels.rolling_resistance if g.rolling_resistance is None
                                else g.rolling_resistance),
            slope=g.slope,
            patches=tuple(Patch(p.start, p.end, p.friction) for p in g.patches),
            steps=tuple(Step(s.at, s.height, s.length) for s in g.steps),
            rough=None if g.rough is None else Rough(g.rough.amplitude, g.rough.wavelength,
                                                     g.rough.seed),
        )

    def timeline(self) -> Timeline:
        return Timeline(self.events)

    def describe(self) -> dict[str, Any]:
        """Plain data for run.yaml (SI units), the same vocabulary as a test file."""
        return {
            "name": self.name,
            "description": self.description,
            "duration": self.duration,
            "tilt": self.tilt,
            "battery_charge": self.battery_charge,
            "ground": self.ground_spec.model_dump(mode="json"),
            "events": [e.model_dump(mode="json", exclude_none=True) for e in self.events],
            "criteria": self.criteria.model_dump(mode="json"),
        }

    def judge(self, result: Any, timeline: Timeline) -> dict[str, Any]:
        """Apply the criteria to a finished run: each check with its figure and limit."""
        return judge(self, result.status, result.trace, timeline)


# --------------------------------------------------------------------- running events


@dataclass
class Timeline:
    """Fires a test's events during a run; keeps the setpoint and the marks for plots."""

    events: tuple[EventSpec, ...]
    setpoint: Setpoint = field(default_factory=Setpoint)
    marks: list[tuple[float, str]] = field(default_factory=list)
    disturbances: list[float] = field(default_factory=list)  # times that start a recovery
    setpoint_changes: list[tuple[float, float, float]] = field(default_factory=list)
    _done: set[int] = field(default_factory=set)
    _dropout_until: float | None = None

    def fire(self, t: float, x: float, world, drive, imu, encoders) -> None:
        """Apply every event now due (by time ``t`` s or distance ``x`` m)."""
        if self._dropout_until is not None and t >= self._dropout_until - 1e-9:
            imu.accel_dropout = False
            self._dropout_until = None
        for index, event in enumerate(self.events):
            if index in self._done:
                continue
            due = (event.at is not None and t >= event.at - 1e-9) or (
                event.at_position is not None and _reached(x, event.at_position))
            if due:
                self._done.add(index)
                self._apply(event, t, world, drive, imu, encoders)

    def _apply(self, event: EventSpec, t: float, world, drive, imu, encoders) -> None:
        label = ""
        if event.push is not None:
            label = self._push(event.push, world)
        elif event.payload is not None:
            p = event.payload
            at = p.at if p.at is not None else _top_of_frame(world.spec, p.size[2])
            world.add_payload(p.mass, p.size, at)
            label = f"payload {p.mass * 1000:g} g"
        elif event.friction is not None:
            world.set_friction(event.friction)
            label = f"friction {event.friction:g}"
        elif event.battery is not None:
            drive.battery_charge = event.battery.charge
            label = f"battery {100 * event.battery.charge:g} %"
        elif event.gyro_bias is not None:
            imu.add_gyro_bias(tuple(event.gyro_bias))
            label = "gyro bias"
        elif event.accel_dropout is not None:
            imu.accel_dropout = True
            self._dropout_until = t + event.accel_dropout
            label = "accel dropout"
        elif event.encoder_miss is not None:
            encoders.miss(event.encoder_miss.side, event.encoder_miss.counts)
            label = f"encoder miss {event.encoder_miss.side}"
        elif event.setpoint is not None:
            self.setpoint = Setpoint(event.setpoint.speed, event.setpoint.turn)
            self.setpoint_changes.append((t, event.setpoint.speed, event.setpoint.turn))
            label = f"speed {event.setpoint.speed:g} m/s, turn {event.setpoint.turn:g} rad/s"
            self.marks.append((t, label))
            return
        self.marks.append((t, label))
        self.disturbances.append(t)

    def _push(self, push: PushSpec, world) -> str:
        state = world.body_state()
        heading = world.forward_axis(state)
        side = (-heading[1], heading[0], 0.0)  # left of the heading, horizontal
        direction = {"forward": heading, "backward": tuple(-v for v in heading),
                     "left": side, "right": tuple(-v for v in side)}[push.direction]
        height = push.height if push.height is not None else _push_height(world.spec)
        if push.impulse is not None:
            steps = 1
            magnitude = push.impulse / world.dt
            label = f"push {push.impulse:.3g} N*s"
        else:
            steps = max(1, round(push.duration / world.dt))
            magnitude = push.force
            label = f"push {push.force:.3g} N for {push.duration:g} s"
        world.push(tuple(magnitude * v for v in direction), (0.0, 0.0, height), steps)
        return label


def _reached(x: float, position: float) -> bool:
    """Whether travel ``x`` (m) has got to ``position``: ahead for a positive position,
    behind for a negative one (backing up), at once for zero."""
    return x <= position if position < 0 else x >= position


def _frame_top(spec: RobotSpec) -> float:
    frame = spec.body.frame
    return frame.bottom + frame.height


def _push_height(spec: RobotSpec) -> float:
    """Default push height: 90 % of the way up the frame (m above the axle)."""
    frame = spec.body.frame
    return frame.bottom + 0.9 * frame.height


def _top_of_frame(spec: RobotSpec, thickness: float) -> tuple[float, float, float]:
    top = max([_frame_top(spec)] + [p.at[2] + p.size[2] / 2 for p in spec.body.parts])
    return (0.0, 0.0, top + thickness / 2)


# --------------------------------------------------------------------- built-in tests


def _fall_rate(spec: RobotSpec) -> float:
    """√(m g l / I) of the body about the axle (1/s): how fast this robot falls."""
    f = spec.figures
    pivot = f.body.inertia[1, 1] + f.body.mass * f.com_height**2
    return math.sqrt(f.body.mass * GRAVITY * f.com_height / pivot)


def _push_impulse(spec: RobotSpec, strength: float = 1.0) -> float:
    """A shove sized to the robot: it starts the body turning at 0.2 × its fall rate.

    Angular impulse J·h = I_pivot·Δω about the axle, so J = I_pivot·Δω / h.
    """
    f = spec.figures
    pivot = f.body.inertia[1, 1] + f.body.mass * f.com_height**2
    rate = 0.2 * strength * _fall_rate(spec)
    return pivot * rate / _push_height(spec)


def _cruise(spec: RobotSpec) -> float:
    """A comfortable driving speed: a fifth of the no-load top speed (m/s)."""
    return 0.2 * spec.figures.top_speed


def _events(*items: dict) -> tuple[EventSpec, ...]:
    return tuple(EventSpec.model_validate(item) for item in items)


def builtin_tests(spec: RobotSpec) -> dict[str, TestPlan]:
    """Every built-in test, sized to ``spec``."""
    r = spec.wheels.radius
    impulse = _push_impulse(spec)
    cruise = _cruise(spec)
    hold = spec.figures.steepest_hold_tilt
    slope = min(math.radians(5.0), 0.3 * hold)
    body = spec.figures.body.mass
    plans = [
        TestPlan("push", "Shoves forward and backward at the top of the frame; must recover.",
                 10.0, GroundSpec(), _events(
                     {"at": 2.0, "push": {"impulse": impulse}},
                     {"at": 5.0, "push": {"impulse": impulse, "direction": "backward"}},
                     {"at": 8.0, "push": {"impulse": 1.5 * impulse}}),
                 Criteria(recover_within=3.0, max_drift=max(1.0, 30 * r))),
        TestPlan("slope", f"Starts on a {math.degrees(slope):.1f} deg ramp and must hold its "
                 "place, then takes a push.", 10.0, GroundSpec(slope=slope),
                 _events({"at": 5.0, "push": {"impulse": 0.7 * impulse}}),
                 Criteria(max_drift=max(0.5, 15 * r))),
        TestPlan("bumps", "Drives across rough floor (bumps a tenth of the wheel radius).",
                 12.0, GroundSpec(rough=RoughSpec(amplitude=0.1 * r, wavelength=4 * r, seed=7)),
                 _events({"at": 1.0, "setpoint": {"speed": cruise}},
                         {"at": 9.0, "setpoint": {"speed": 0.0}}),
                 Criteria(recover_within=None, max_speed_error=0.5 * cruise)),
        TestPlan("threshold", "Drives over a door threshold 15 % of the wheel radius high.",
                 10.0, GroundSpec(steps=[StepSpec(at=0.5, height=0.15 * r, length=0.03)]),
                 _events({"at": 1.0, "setpoint": {"speed": cruise}},
                         {"at": 7.0, "setpoint": {"speed": 0.0}}),
                 Criteria(recover_within=None, min_distance=0.6)),
        TestPlan("slippery", "Drives onto a slippery patch (friction 0.15) and is pushed there.",
                 10.0, GroundSpec(patches=[PatchSpec(start=0.15, end=3.0, friction=0.15)]),
                 _events({"at": 1.0, "setpoint": {"speed": 0.5 * cruise}},
                         {"at": 3.0, "setpoint": {"speed": 0.0}},
                         {"at": 6.0, "push": {"impulse": 0.5 * impulse}}),
                 Criteria()),
        TestPlan("payload", "A payload of 30 % of the body's mass lands on top.", 10.0,
                 GroundSpec(), _events({"at": 3.0, "payload": {"mass": 0.3 * body}}),
                 Criteria(max_drift=max(0.5, 15 * r))),
        TestPlan("drive", "Follows a speed and turn profile: go, turn, stop.", 12.0,
                 GroundSpec(), _events(
                     {"at": 1.0, "setpoint": {"speed": cruise}},
                     {"at": 5.0, "setpoint": {"speed": cruise, "turn": 1.0}},
                     {"at": 7.0, "setpoint": {"speed": cruise}},
                     {"at": 9.0, "setpoint": {"speed": 0.0}}),
                 Criteria(recover_within=None, max_speed_error=0.4 * cruise)),
        TestPlan("low-battery", "Starts with a nearly flat battery (10 %) and takes a push.",
                 10.0, GroundSpec(), _events({"at": 3.0, "push": {"impulse": 0.7 * impulse}}),
                 Criteria(max_drift=max(0.5, 15 * r)), battery_charge=0.1),
        TestPlan("sensor-fault", "Gyro bias jumps 2 deg/s, the accelerometer drops out for "
                 "0.3 s, the left encoder misses counts.", 10.0, GroundSpec(), _events(
                     {"at": 2.0, "gyro_bias": [0.0, math.radians(2.0), 0.0]},
                     {"at": 5.0, "accel_dropout": 0.3},
                     {"at": 7.0, "encoder_miss": {"side": "left", "counts": 200}}),
                 Criteria(recover_within=3.0, max_drift=max(0.5, 15 * r))),
    ]
    return {p.name: p for p in plans}


BUILTIN_NAMES = ("push", "slope", "bumps", "threshold", "slippery", "payload", "drive",
                 "low-battery", "sensor-fault")


def resolve_test(name_or_path: str, spec: RobotSpec) -> TestPlan:
    """A built-in test by name, or a test file (YAML) by path."""
    if name_or_path in BUILTIN_NAMES:
        return builtin_tests(spec)[name_or_path]
    path = Path(name_or_path)
    if path.suffix.lower() in (".yaml", ".yml") or path.exists():
        return load_test_file(path)
    raise TestFileError(name_or_path, [
        f"no built-in test of that name (built-in: {', '.join(BUILTIN_NAMES)}) and no such file"])


def load_test_file(path: Path) -> TestPlan:
    """Read and validate a test file; raises TestFileError naming the key and the problem."""
    source = str(path)
    if not path.is_file():
        raise TestFileError(source, ["no such file (check the path, or use a built-in test: "
                                     f"{', '.join(BUILTIN_NAMES)})"])
    try:
        data = read_yaml_file(path, source)
    except YamlFileError as err:
        raise TestFileError(source, err.problems) from None
    if not isinstance(data, dict):
        raise TestFileError(source, ["a test file must be a mapping (name, duration, events...)"])
    data.setdefault("name", path.stem)
    try:
        test = TestFile.model_validate(data)
    except ValidationError as err:
        raise TestFileError(source, [describe_error(e, TestFile) for e in err.errors()]) from None
    return TestPlan(name=test.name, description=test.description, duration=test.duration,
                    ground_spec=test.ground, events=tuple(test.events), criteria=test.criteria,
                    tilt=test.tilt, battery_charge=test.battery_charge)

