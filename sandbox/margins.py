"""How much of each imperfection a controller survives on a robot, by bisection on full runs.

For each stress (added loop delay, both motors weaker, one motor weaker, gearbox
play, a lower IMU filter bandwidth, a payload on top of the frame, loop jitter)
the largest amount at which a test still passes — for the bandwidth the lowest —
is bracketed by bisection: every probe is a complete run of the test on the
stressed robot, with the run's own seed, so a margin is a property of this
controller on this robot file. The stresses run side by side on the sweep
executors (local processes or a Dask cluster), one probe per stress per round.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from .robot import RobotSpec
from .runner import RunSettings

# A stressed run holds when its test passes and the duty sits at full on at most this share
# of its ticks. Past the linear delay margin a robot often does not fall: it swings in a
# limit cycle the clipping duty bounds, and a test that only asks "did it stay up" passes
# it (shelf-runner at 15 ms: 40 % of ticks at full duty, a 16 Hz swing). A brief push
# saturates a few percent of a test's ticks. Our own rule of thumb, stated in DEVELOPERS.md.
SATURATED_SHARE = 0.10


def holds(row: dict[str, Any]) -> bool:
    """Whether a stressed run's result row counts as surviving the stress."""
    share = row.get("saturation_fraction")
    return bool(row["passed"]) and (share is None or share <= SATURATED_SHARE)


class MarginsError(ValueError):
    """A margins request that cannot be run (unknown stress, a key the robot lacks)."""


@dataclass(frozen=True)
class Stress:
    """One imperfection to bisect on.

    ``limit`` is the far end of the search (the largest amount tried, or for
    ``smaller_is_worse`` stresses the smallest); ``resolution`` the bracket width
    at which the search stops, in the stress's unit (relative for ``log`` searches).
    """

    name: str
    unit: str
    what: str
    limit: float
    resolution: float
    smaller_is_worse: bool = False  # the bandwidth: a lower cut-off is the harder case
    log: bool = False  # bisect on a log scale (the bandwidth spans decades)
    quantum: float = 0.0  # probes land on multiples of this (a delay: whole physics steps)


def _stresses(spec: RobotSpec, settings: RunSettings) -> dict[str, Stress]:
    body = spec.figures.body.mass
    step = settings.physics_dt
    return {s.name: s for s in (
        Stress("delay", "s", "added loop delay (on top of the board's compute time)",
               limit=0.1, resolution=max(step, 0.001), quantum=step),
        Stress("strength", "fraction", "fraction of stall torque removed from both motors",
               limit=0.95, resolution=0.02),
        Stress("weak_side", "fraction", "fraction of stall torque removed from the right motor",
               limit=0.95, resolution=0.02),
        Stress("backlash", "rad", "total gearbox play at each wheel",
               limit=math.radians(10.0), resolution=math.radians(0.1)),
        # from the sensor's Nyquist rate (no filter at all) down to 1 Hz, within 5 %
        Stress("imu_bandwidth", "Hz", "the IMU's own low-pass cut-off (gyro and accelerometer)",
               limit=1.0, resolution=math.log(1.05), smaller_is_worse=True, log=True),
        Stress("payload", "kg", "a block on top of the frame",
               limit=2.0 * body, resolution=0.02 * body),
        Stress("jitter", "s", "standard deviation of the board's tick interval",
               limit=0.5 / (settings.rate_hz or 200.0), resolution=max(step / 4, 5e-5)),
    )}


STRESS_NAMES = ("delay", "strength", "weak_side", "backlash", "imu_bandwidth", "payload",
                "jitter")

# robot-file keys each stress needs (absent from an older schema: the stress is skipped)
_NEEDS = {"weak_side": ("motors", "right"), "backlash": ("motors", "backlash"),
          "imu_bandwidth": ("imu", "gyro", "bandwidth"), "jitter": ("board",)}


def robot_value(spec: RobotSpec, settings: RunSettings, name: str) -> float | None:
    """The robot's own amount of a stress (SI), as its file and the settings give it."""
    board = getattr(spec, "board", None)
    if name == "delay":
        return float(getattr(board, "compute_time", 0.0) or 0.0) + settings.latency
    if name == "backlash":
        return float(getattr(spec.motors, "backlash", 0.0) or 0.0)
    if name == "imu_bandwidth":
        bands = [getattr(spec.imu.gyro, "bandwidth", None), getattr(spec.imu.accel, "bandwidth",
                                                                       None)]
        bands = [b for b in bands if b]
        return float(min(bands)) if bands else None
    if name == "jitter":
        return float(getattr(board, "loop_jitter", 0.0) or 0.0)
    return 0.0


def supported(robot: dict[str, Any], name: str) -> bool:
    """Whether the robot file's schema has the keys a stress needs (absent optional keys
    are left out of ``robot``, so the schema is asked, not the description)."""
    from .robot import RobotSpec

    model: Any = RobotSpec
    for key in _NEEDS.get(name, ()):
        fields = getattr(model, "model_fields", None)
        if fields is None or key not in fields:
            return False
        annotation = fields[key].annotation
        model = next((a for a in getattr(annotation, "__args__", (annotation,))
                      if hasattr(a, "model_fields")), None)
    return True


def apply_stress(robot: dict[str, Any], settings: RunSettings,
                 stress: tuple[str, float]) -> tuple[dict[str, Any], RunSettings]:
    """The SI robot description and settings with ``amount`` of stress ``name`` applied."""
    name, amount = stress
    robot = copy.deepcopy(robot)
    motors = robot["motors"]
    if name == "delay":
        return robot, replace(settings, latency=settings.latency + amount)
    if name == "strength":
        motors["stall_torque"] *= 1.0 - amount
        for side in ("left", "right"):
            override = motors.get(side)
            if isinstance(override, dict) and override.get("stall_torque") is not None:
                override["stall_torque"] *= 1.0 - amount
    elif name == "weak_side":
        right = motors.get("right") or {}
        base = right.get("stall_torque") or motors["stall_torque"]
        motors["right"] = {**{k: v for k, v in right.items() if v is not None},
                           "stall_torque": base * (1.0 - amount)}
    elif name == "backlash":
        motors["backlash"] = amount
    elif name == "imu_bandwidth":
        for sensor in ("gyro", "accel"):
            robot["imu"][sensor]["bandwidth"] = amount
    elif name == "payload":
        if amount > 0.0:
            robot["body"]["parts"] = [*robot["body"].get("parts", []), _payload_part(robot, amount)]
    elif name == "jitter":
        robot["board"] = {**(robot.get("board") or {}), "loop_jitter": amount}
    else:
        raise MarginsError(f"unknown stress {name!r}: choose from {', '.join(STRESS_NAMES)}")
    return robot, settings


def _payload_part(robot: dict[str, Any], mass: float) -> dict[str, Any]:
    """A block of ``mass`` kg resting on the top of the frame, 80 % of its footprint."""
    frame = robot["body"]["frame"]
    height = 0.01
    top = frame["bottom"] + frame["height"]
    return {"name": "margin payload", "mass": mass,
            "size": [0.8 * frame["depth"], 0.8 * frame["width"], height],
            "at": [0.0, 0.0, top + height / 2]}


@dataclass
class Bracket:
    """The bisection of one stress: the worst amount known to pass and the mildest known
    to fail (None: nothing tried has failed)."""

    stress: Stress
    passing: float
    failing: float | None = None
    runs: int = 0
    log: list[tuple[float, bool]] = field(default_factory=list)

    def next_probe(self) -> float | None:
        """The next amount to try, or None when the bracket is narrow enough."""
        s = self.stress
        if not self.log:
            return s.limit  # the far end first: many robots survive the whole range
        if self.failing is None:
            return None
        if s.log:
            if self.failing <= 0 or self.passing <= 0:
                return None
            if abs(math.log(self.passing / self.failing)) <= s.resolution:
                return None
            return math.sqrt(self.passing * self.failing)
        if abs(self.failing - self.passing) <= s.resolution:
            return None
        middle = 0.5 * (self.passing + self.failing)
        if s.quantum:
            middle = round(middle / s.quantum) * s.quantum
            if middle in (self.passing, self.failing):
                return None
        return middle

    def record(self, amount: float, passed: bool) -> None:
        self.runs += 1
        self.log.append((amount, passed))
        if passed:
            self.passing = amount
        else:
            self.failing = amount

    def resolution_si(self) -> float:
        """The bracket's width in the stress's unit."""
        if self.failing is None:
            return 0.0
        return abs(self.failing - self.passing)

    def entry(self, robot_amount: float | None) -> dict[str, Any]:
        s = self.stress
        return {"stress": s.name, "unit": s.unit, "what": s.what, "robot_value": robot_amount,
                "margin": self.passing, "failed_at": self.failing,
                "beyond_range": self.failing is None, "resolution": self.resolution_si(),
                "runs": self.runs}


@dataclass
class MarginsResult:
    test: str
    baseline_passed: bool
    baseline_message: str
    margins: list[dict[str, Any]]
    skipped: dict[str, str]

    def json(self) -> dict[str, Any]:
        return {"test": self.test, "baseline_passed": self.baseline_passed,
                "margins": self.margins, "skipped": self.skipped}


def _start(stress: Stress, spec: RobotSpec, settings: RunSettings) -> float:
    """Where the search starts: no stress (for the bandwidth: the sensor's Nyquist rate)."""
    if stress.smaller_is_worse:
        own = robot_value(spec, settings, stress.name)
        return own if own else 0.5 * spec.imu.rate
    if stress.name in ("backlash", "jitter"):
        return robot_value(spec, settings, stress.name) or 0.0
    return 0.0


def find_margins(spec: RobotSpec, settings: RunSettings, *, test: str = "push",
                 stresses: Sequence[str] = STRESS_NAMES, duration_given: bool = False,
                 workers: int | None = None, cluster: str | None = None,
                 progress: Callable[[int, int], None] | None = None) -> MarginsResult:
    """Bisect each stress on full runs of ``test``; the unstressed run first."""
    from .sweep.executors import open_executor
    from .sweep.grid import make_common
    from .sweep.jobs import PointJob

    unknown = [name for name in stresses if name not in STRESS_NAMES]
    if unknown:
        raise MarginsError(f"unknown stress {unknown[0]!r}: choose from "
                           f"{', '.join(STRESS_NAMES)}")
    common = make_common(spec, settings, [test], duration_given)
    table = _stresses(spec, settings)
    skipped = {name: "this robot file has no key for it yet" for name in stresses
               if not supported(common.robot, name)}
    brackets = {name: Bracket(table[name], _start(table[name], spec, settings))
                for name in stresses if name not in skipped}
    index = 0
    done = 0
    estimate = 1 + 8 * len(brackets)
    with open_executor(common, workers=workers, cluster=cluster, jobs=len(brackets)) as pool:
        baseline = next(iter(pool.map_unordered([PointJob(0, {}, {}, settings.seed, test)])))[1]
        done += 1
        if progress:
            progress(done, estimate)
        if not holds(baseline):
            why = baseline.get("message") or baseline["status"]
            if baseline["passed"]:
                why = (f"the duty is at full on {100 * baseline['saturation_fraction']:.0f} % "
                       f"of the ticks (more than {100 * SATURATED_SHARE:.0f} %): a limit cycle")
            return MarginsResult(test, False, why, [], skipped)
        while True:
            jobs = []
            for name, bracket in brackets.items():
                amount = bracket.next_probe()
                if amount is not None:
                    index += 1
                    jobs.append(PointJob(index, {}, {}, settings.seed, test,
                                         stress=(name, amount)))
            if not jobs:
                break
            for job, row in pool.map_unordered(jobs):
                name, amount = job.stress
                brackets[name].record(amount, holds(row))
                done += 1
                if progress:
                    progress(done, max(estimate, done + 1))
    margins = [b.entry(robot_value(spec, settings, name)) for name, b in brackets.items()]
    return MarginsResult(test, True, "", margins, skipped)


def margins_table(result: MarginsResult) -> list[list[str]]:
    """Rows for the terminal: stress, the robot's own value, the margin, resolution, runs."""
    rows = []
    for m in result.margins:
        rows.append([m["stress"], _shown(m["robot_value"], m["unit"]),
                     ("≥ " if m["beyond_range"] and m["unit"] != "Hz" else
                      "≤ " if m["beyond_range"] else "") + _shown(m["margin"], m["unit"]),
                     "±" + _shown(m["resolution"], m["unit"]) if m["resolution"] else "-",
                     str(m["runs"])])
    return rows


def _shown(value: float | None, unit: str) -> str:
    if value is None:
        return "none"
    if unit == "s":
        return f"{value * 1000:.3g} ms"
    if unit == "rad":
        return f"{math.degrees(value):.3g} deg"
    if unit == "fraction":
        return f"{100 * value:.3g} %"
    return f"{value:.3g} {unit}"
