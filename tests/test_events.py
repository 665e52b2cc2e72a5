"""Disturbance tests: the timeline, the verdicts, the built-in tests and test files.

The timeline is unit-tested with a fake world and the real plain-Python drive
train, IMU and encoders; verdicts against hand-made traces with exact answers;
the built-in tests by running them and recomputing every check's pass flag
from its reported figure and limit; test files by parsing good, bad and
fuzzed ones and through the command line.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from ideal_parts import ideal_robot
from typer.testing import CliRunner

from sandbox.actuators import DriveTrain
from sandbox.cli import app
from sandbox.control import Setpoint
from sandbox.events import (
    BUILTIN_NAMES,
    Criteria,
    EventSpec,
    GroundSpec,
    Timeline,
    builtin_tests,
    load_test_file,
    resolve_test,
)

# (aliased: pytest would try to collect names that start with "Test")
from sandbox.events import TestFileError as FileError
from sandbox.events import TestPlan as Plan
from sandbox.imu import Encoders, Imu
from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once
from sandbox.verdicts import judge, recovery_after

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(__file__).resolve().parent / "tests_data"
ROBOT_FILES = sorted((ROOT / "robots").glob("*.yaml"))
CONTROLLERS = ("cascade", "pid_tilt")
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
CASCADE = str(ROOT / "controllers" / "cascade.py")
# The cascade example with a soft tilt loop: stands still, but rings for long after a shove.
WEAK_GAINS = {"tilt_kp": 6.0, "tilt_kd": 0.3}
TICK = 0.005  # s, the controllers' 200 Hz period


@pytest.fixture(scope="module")
def spec():
    return ideal_robot("shelf-runner")  # the tests are sized on ideal parts


def events(*items: dict) -> tuple[EventSpec, ...]:
    return tuple(EventSpec.model_validate(item) for item in items)


# ------------------------------------------------------------------ the timeline, with fakes


class FakeWorld:
    """Records what the timeline asks of the world; heading fixed (world axes)."""

    def __init__(self, spec, dt: float = 1e-3, heading=(1.0, 0.0, 0.0)):
        self.spec, self.dt, self.heading = spec, dt, heading
        self.pushes: list[tuple] = []
        self.payloads: list[tuple] = []
        self.frictions: list[float] = []

    def body_state(self):
        return "state"

    def forward_axis(self, state):
        assert state == "state"
        return self.heading

    def push(self, force, body_point, steps):
        self.pushes.append((tuple(force), tuple(body_point), steps))

    def add_payload(self, mass, size, body_point):
        self.payloads.append((mass, tuple(size), tuple(body_point)))

    def set_friction(self, friction):
        self.frictions.append(friction)


class Rig:
    """A fake world with the real drive train, IMU and encoders, and a timeline."""

    def __init__(self, spec, items: tuple[dict, ...], heading=(1.0, 0.0, 0.0)):
        self.world = FakeWorld(spec, heading=heading)
        self.drive = DriveTrain(spec)
        self.imu = Imu(spec.imu, seed=1)
        self.encoders = Encoders(spec.encoders.counts_per_rev, spec.motors.gear_ratio)
        self.timeline = Timeline(events(*items))

    def fire(self, t: float, x: float = 0.0) -> None:
        self.timeline.fire(t, x, self.world, self.drive, self.imu, self.encoders)

    def run(self, seconds: float, x=lambda t: 0.0) -> None:
        for k in range(int(round(seconds / TICK)) + 1):
            self.fire(k * TICK, x(k * TICK))


def test_events_fire_by_time_once_each(spec):
    """Events fire at the first tick at or after their time (to 1 ns), once each,
    in time order, and each leaves a mark and a disturbance time."""
    rig = Rig(spec, ({"at": 2.0, "friction": 0.3}, {"at": 0.3, "friction": 0.5},
                     {"at": 1.0, "friction": 0.7}))
    seen = []
    for k in range(int(round(3.0 / TICK)) + 1):
        t = k * TICK
        before = len(rig.world.frictions)
        rig.fire(t)
        rig.fire(t)  # a second call at the same tick fires nothing new
        seen += [(t, f) for f in rig.world.frictions[before:]]
    assert [f for _, f in seen] == [0.5, 0.7, 0.3]
    np.testing.assert_allclose([t for t, _ in seen], [0.3, 1.0, 2.0], atol=1e-12,
                               err_msg="firing times (s)")
    assert [label for _, label in rig.timeline.marks] == [
        "friction 0.5", "friction 0.7", "friction 0.3"]
    np.testing.assert_allclose(rig.timeline.disturbances, [0.3, 1.0, 2.0], atol=1e-12)


def test_events_fire_by_position_forward_and_backward(spec):
    """`at_position` fires when the distance travelled reaches it: ahead for a positive
    position, behind for a negative one (backing up), at once for zero; once each."""
    rig = Rig(spec, ({"at_position": 0.3, "friction": 0.3},
                     {"at_position": -0.2, "friction": 0.2},
                     {"at_position": 0.0, "friction": 0.1}))
    fired_at = {}
    for step, x in enumerate([0.0, 0.1, 0.29, 0.31, 0.5, 0.3, 0.1, -0.1, -0.19, -0.25, -0.3,
                              0.4]):
        before = len(rig.world.frictions)
        rig.fire(step * TICK, x)
        for friction in rig.world.frictions[before:]:
            fired_at[friction] = x
    assert fired_at == {0.1: 0.0, 0.3: 0.31, 0.2: -0.25}
    assert len(rig.world.frictions) == 3


def test_setpoint_events_change_the_setpoint_but_are_not_disturbances(spec):
    """A setpoint event sets timeline.setpoint (m/s, rad/s), is recorded with its time,
    marked on the plots, and starts no recovery clock."""
    rig = Rig(spec, ({"at": 1.0, "setpoint": {"speed": "0.2 m/s", "turn": "30 deg/s"}},
                     {"at": 2.0, "setpoint": {"speed": 0.0}}))
    assert rig.timeline.setpoint == Setpoint(0.0, 0.0)
    rig.run(1.5)
    assert rig.timeline.setpoint.speed == pytest.approx(0.2)
    assert rig.timeline.setpoint.turn == pytest.approx(math.radians(30.0))
    rig.run(2.5)
    assert rig.timeline.setpoint == Setpoint(0.0, 0.0)
    assert rig.timeline.setpoint_changes == [
        (pytest.approx(1.0), 0.2, pytest.approx(math.radians(30.0))),
        (pytest.approx(2.0), 0.0, 0.0)]
    assert [t for t, _ in rig.timeline.marks] == [pytest.approx(1.0), pytest.approx(2.0)]
    assert rig.timeline.disturbances == []


@pytest.mark.parametrize("start, duration, ticks", [(1.0, 0.3, 60), (0.1, 0.2, 40)])
def test_accel_dropout_ends_after_its_duration(spec, start, duration, ticks):
    """An accelerometer dropout of d seconds blanks exactly d / 5 ms controller ticks
    (0.1 + 0.2 s is 0.30000000000000004 in floating point: still 40 ticks); during it
    the IMU's accelerometer reads zero, after it gravity again."""
    rig = Rig(spec, ({"at": start, "accel_dropout": duration},))
    blanked = []
    for k in range(int(round((start + duration + 0.5) / TICK)) + 1):
        rig.fire(k * TICK)
        _, accel = rig.imu.read((0.0, 0.0, 0.0), (0.0, 0.0, 9.80665), 5)
        assert (accel == (0.0, 0.0, 0.0)) == rig.imu.accel_dropout
        if rig.imu.accel_dropout:
            blanked.append(k * TICK)
    assert len(blanked) == ticks
    assert blanked[0] == pytest.approx(start)
    assert not rig.imu.accel_dropout
    assert rig.imu.read((0.0, 0.0, 0.0), (0.0, 0.0, 9.80665), 5)[1][2] == pytest.approx(
        9.80665, abs=0.2), "accelerometer back after the dropout (m/s^2)"


def test_encoder_miss_reaches_the_encoders(spec):
    """`encoder_miss: {side: left, counts: 200}`: the left count lags by 200 from then on,
    the right one is untouched."""
    rig = Rig(spec, ({"at": 0.5, "encoder_miss": {"side": "left", "counts": 200}},))
    angle = 1.0  # rad, both wheels turned forward
    before = rig.encoders.ticks(angle, angle)
    rig.run(0.4)
    assert rig.encoders.ticks(angle, angle) == before
    rig.run(0.6)
    assert rig.encoders.ticks(angle, angle) == (before[0] - 200, before[1])
    assert rig.timeline.marks[0][1] == "encoder miss left"


def test_gyro_bias_reaches_the_imu(spec):
    """`gyro_bias: [0, 2 deg/s, 0]` adds 2 deg/s to the gyro's y bias (rad/s) from then on."""
    rig = Rig(spec, ({"at": 0.2, "gyro_bias": [0, "2 deg/s", "-1 deg/s"]},))
    before = np.array(rig.imu.gyro_bias)
    rig.run(0.5)
    np.testing.assert_allclose(np.array(rig.imu.gyro_bias) - before,
                               [0.0, math.radians(2.0), math.radians(-1.0)], atol=1e-15,
                               err_msg="gyro bias step (rad/s)")


def test_battery_friction_and_payload_events_reach_the_world_and_drive(spec):
    """Battery charge is set on the drive train; friction on the world; a payload without
    `at` sits on top of the highest part (shelf-runner's deck top at 214 mm)."""
    rig = Rig(spec, ({"at": 0.1, "battery": {"charge": 0.3}},
                     {"at": 0.2, "friction": 0.4},
                     {"at": 0.3, "payload": {"mass": "80 g", "size": ["40 mm", "30 mm", "20 mm"]}},
                     {"at": 0.4, "payload": {"mass": 0.01, "at": [0.01, 0, 0.05]}}))
    rig.run(0.5)
    assert rig.drive.battery_charge == pytest.approx(0.3)
    assert rig.world.frictions == [0.4]
    (mass, size, at), (mass2, _, at2) = rig.world.payloads
    assert mass == pytest.approx(0.08) and size == pytest.approx((0.04, 0.03, 0.02))
    assert at == pytest.approx((0.0, 0.0, 0.214 + 0.01), abs=1e-12), "payload centre (m)"
    assert mass2 == pytest.approx(0.01) and at2 == pytest.approx((0.01, 0.0, 0.05))
    assert [label for _, label in rig.timeline.marks] == [
        "battery 30 %", "friction 0.4", "payload 80 g", "payload 10 g"]


@pytest.mark.parametrize("direction, unit", [
    ("forward", (0.6, 0.8, 0.0)), ("backward", (-0.6, -0.8, 0.0)),
    ("left", (-0.8, 0.6, 0.0)), ("right", (0.8, -0.6, 0.0))])
def test_push_impulse_becomes_a_one_step_force_along_the_heading(spec, direction, unit):
    """An impulse J becomes a force J/dt for one physics step (so J = F·dt exactly),
    along the heading or square to it (left = heading turned +90° about z), at 90 % of
    the way up the frame (shelf-runner: −10 + 0.9·220 = 188 mm above the axle)."""
    rig = Rig(spec, ({"at": 0.0, "push": {"impulse": "0.3 N*s", "direction": direction}},),
              heading=(0.6, 0.8, 0.0))
    rig.fire(0.0)
    (force, point, steps), = rig.world.pushes
    assert steps == 1
    np.testing.assert_allclose(np.array(force) * rig.world.dt, 0.3 * np.array(unit),
                               atol=1e-12, err_msg="impulse (N*s)")
    assert point == pytest.approx((0.0, 0.0, 0.188), abs=1e-12)
    assert rig.timeline.marks == [(0.0, "push 0.3 N*s")]
    assert rig.timeline.disturbances == [0.0]


def test_push_force_is_held_for_its_duration(spec):
    """`force: 2 N, duration: 150 ms, height: 100 mm`: 2 N for 150 physics steps of 1 ms."""
    rig = Rig(spec, ({"at": 0.0, "push": {"force": "2 N", "duration": "150 ms",
                                          "height": "100 mm"}},))
    rig.fire(0.0)
    assert rig.world.pushes == [((2.0, 0.0, 0.0), (0.0, 0.0, pytest.approx(0.1)), 150)]


# ------------------------------------------------------------------ verdicts on hand-made traces


def bump(t: np.ndarray, start: float, length: float, size: float) -> np.ndarray:
    """A tilt trace (rad) that is `size` from start to start + length, 0 elsewhere."""
    return np.where((t >= start - 1e-12) & (t < start + length - 1e-12), size, 0.0)


T = np.round(np.arange(0.0, 10.0 + 1e-9, 0.01), 10)  # 10 s at 100 Hz


def test_recovery_after_is_the_time_to_stay_inside_the_band():
    """A 5° excursion lasting 0.4 s after a disturbance at 2 s: back within 2° at 0.40 s."""
    pitch = bump(T, 2.0, 0.4, math.radians(5.0))
    assert recovery_after(T, pitch, 2.0, 10.0, math.radians(2.0)) == pytest.approx(0.4)
    # a second excursion later in the window counts: the tilt must stay inside
    pitch2 = pitch + bump(T, 3.0, 0.25, math.radians(-3.0))
    assert recovery_after(T, pitch2, 2.0, 10.0, math.radians(2.0)) == pytest.approx(1.25)
    # an excursion smaller than the band is no excursion
    assert recovery_after(T, bump(T, 2.0, 0.4, math.radians(1.5)), 2.0, 10.0,
                          math.radians(2.0)) == 0.0


def test_recovery_is_measured_from_where_the_tilt_was_before():
    """A robot leaning 3° into a slope recovers when it is back within the band of 3°,
    the median of the half second before the disturbance, not of 0°."""
    lean = math.radians(3.0)
    pitch = lean + bump(T, 5.0, 0.3, math.radians(6.0)) + bump(T, 5.3, 9.0, math.radians(1.0))
    assert recovery_after(T, pitch, 5.0, 10.0, math.radians(2.0)) == pytest.approx(0.3)


def test_recovery_none_when_never_settled_or_no_samples():
    """Still outside the band at the end of the window: None. No samples in it: None."""
    pitch = bump(T, 2.0, 9.0, math.radians(5.0))
    assert recovery_after(T, pitch, 2.0, 5.0, math.radians(2.0)) is None
    assert recovery_after(T, pitch, 12.0, 13.0, math.radians(2.0)) is None


def make_trace(pitch=None, x=None, speed=None) -> dict[str, np.ndarray]:
    zeros = np.zeros_like(T)
    return {"t_s": T, "pitch_rad": zeros if pitch is None else pitch,
            "x_m": zeros if x is None else x, "speed_m_s": zeros if speed is None else speed}


def make_plan(**criteria) -> Plan:
    return Plan("hand", "", 10.0, GroundSpec(), (), Criteria(**criteria))


def make_timeline(disturbances=(), setpoints=()) -> Timeline:
    timeline = Timeline(())
    timeline.disturbances = list(disturbances)
    timeline.setpoint_changes = list(setpoints)
    return timeline


def by_label(verdict: dict) -> dict[str, dict]:
    return {c["label"]: c for c in verdict["checks"]}


RECOVERY = "back within 2 deg after each disturbance"


def test_judge_passes_a_recovery_within_the_limit_and_takes_the_worst():
    """Two shoves, recoveries 0.3 s and 0.8 s: the check reports the worst, 0.8 s ≤ 2 s."""
    pitch = bump(T, 2.0, 0.3, 0.1) + bump(T, 5.0, 0.8, -0.1)
    verdict = judge(make_plan(), "completed", make_trace(pitch), make_timeline([5.0, 2.0]))
    checks = by_label(verdict)
    assert set(checks) == {"stays up", RECOVERY}
    assert checks[RECOVERY]["value"] == pytest.approx(0.8)
    assert checks[RECOVERY]["limit_value"] == 2.0
    assert checks[RECOVERY]["measured"] == "0.8 s" and checks[RECOVERY]["limit"] == "2 s"
    assert checks["stays up"]["measured"] == "completed"
    assert verdict["passed"] is True
    assert verdict["disturbance_times_s"] == [5.0, 2.0]


def test_judge_fails_a_slow_recovery_and_a_fall():
    """Recovery 2.5 s > 2 s fails; a fall fails 'stays up' and the recovery check alike."""
    pitch = bump(T, 2.0, 2.5, 0.1)
    slow = judge(make_plan(), "completed", make_trace(pitch), make_timeline([2.0]))
    assert by_label(slow)[RECOVERY]["value"] == pytest.approx(2.5)
    assert not by_label(slow)[RECOVERY]["passed"] and by_label(slow)["stays up"]["passed"]
    assert slow["passed"] is False
    fell = judge(make_plan(), "fell", make_trace(bump(T, 2.0, 0.3, 0.1)), make_timeline([2.0]))
    checks = by_label(fell)
    assert checks["stays up"]["measured"] == "fell" and not checks["stays up"]["passed"]
    assert not checks[RECOVERY]["passed"]
    assert fell["passed"] is False


def test_judge_never_settled_says_how_far_outside_the_band():
    """Never back inside the band before the run ends: value None, fail, and the measured
    text gives how far outside the band the tilt still was at the end (0.1 rad = 5.73°
    off, less the 2° band: 3.7° outside)."""
    pitch = bump(T, 2.0, 20.0, 0.1)
    check = by_label(judge(make_plan(), "completed", make_trace(pitch),
                           make_timeline([2.0])))[RECOVERY]
    assert check["value"] is None and not check["passed"]
    off = math.degrees(0.1) - 2.0
    assert check["measured"] == (f"not back: {off:.2g} deg outside the band at {T[-1]:.2f} s "
                                 "(after the disturbance at 2.00 s)")


def test_judge_without_disturbances_or_recovery_limit_has_no_recovery_check():
    """No disturbance, or recover_within None: only the other checks."""
    assert set(by_label(judge(make_plan(), "completed", make_trace(), make_timeline()))) == {
        "stays up"}
    verdict = judge(make_plan(recover_within=None, must_not_fall=False), "fell",
                    make_trace(bump(T, 2.0, 9.0, 0.1)), make_timeline([2.0]))
    assert verdict["checks"] == [] and verdict["passed"] is True


def test_judge_drift_against_the_setpoint_path():
    """Position held: max |x − ∫ setpoint speed dt|. Standing still and wandering 0.12 m;
    driving at 0.2 m/s from t = 1 s exactly on the setpoint path drifts ≤ one tick's travel."""
    wander = 0.12 * np.sin(T)
    held = by_label(judge(make_plan(max_drift=0.2), "completed", make_trace(x=wander),
                          make_timeline()))["position held"]
    assert held["value"] == pytest.approx(0.12 * np.max(np.abs(np.sin(T))))
    assert held["passed"]
    assert not by_label(judge(make_plan(max_drift=0.1), "completed", make_trace(x=wander),
                              make_timeline()))["position held"]["passed"]
    path = 0.2 * np.clip(T - 1.0, 0.0, None)
    driving = by_label(judge(make_plan(max_drift=0.01), "completed", make_trace(x=path),
                             make_timeline(setpoints=[(1.0, 0.2, 0.0)])))["position held"]
    assert driving["value"] <= 0.2 * 0.01 + 1e-12 and driving["passed"]
    # the same path with no setpoint is 1.8 m of drift
    assert by_label(judge(make_plan(max_drift=0.01), "completed", make_trace(x=path),
                          make_timeline()))["position held"]["value"] == pytest.approx(1.8)


def test_judge_speed_error_leaves_out_a_second_after_each_change():
    """RMS speed error against the setpoint, ignoring the 1 s after each change: a
    0.03 m/s offset elsewhere gives exactly 0.03; a large error inside the settling
    second does not count."""
    target = np.where(T >= 2.0, 0.3, 0.0)
    speed = target + 0.03
    speed[(T >= 2.0) & (T < 3.0)] = 5.0  # while it speeds up: ignored
    check = by_label(judge(make_plan(max_speed_error=0.05, recover_within=None), "completed",
                           make_trace(speed=speed), make_timeline(setpoints=[(2.0, 0.3, 0.0)])))[
        "speed follows the setpoint (rms)"]
    assert check["value"] == pytest.approx(0.03, rel=1e-9) and check["passed"]
    tight = judge(make_plan(max_speed_error=0.02, recover_within=None), "completed",
                  make_trace(speed=speed), make_timeline(setpoints=[(2.0, 0.3, 0.0)]))
    assert tight["passed"] is False


def test_judge_speed_error_without_setpoints_means_standing_still():
    """No setpoint event: the target is 0 m/s throughout, so a robot creeping at
    ±0.01 m/s has an rms error of 0.01 m/s (and passes a 0.02 m/s limit)."""
    speed = 0.01 * np.where(np.arange(T.size) % 2, 1.0, -1.0)
    check = by_label(judge(make_plan(max_speed_error=0.02), "completed", make_trace(speed=speed),
                           make_timeline()))["speed follows the setpoint (rms)"]
    assert check["value"] == pytest.approx(0.01, rel=1e-12) and check["passed"]


def test_judge_distance_travelled():
    """Distance: the final x against min_distance (a robot that got over a threshold)."""
    for final, passed in ((0.7, True), (0.5, False)):
        x = np.linspace(0.0, final, T.size)
        check = by_label(judge(make_plan(min_distance=0.6), "completed", make_trace(x=x),
                               make_timeline()))["distance travelled"]
        assert check["value"] == pytest.approx(final) and check["passed"] is passed


# ------------------------------------------------------------------ built-in tests


def test_builtin_tests_are_all_there_and_sized_to_the_robot(spec):
    """Every name in BUILTIN_NAMES resolves to its plan; the push is sized so its angular
    impulse about the axle starts the body turning at 0.2 × its fall rate.

    Source: angular impulse–momentum about a fixed axis, J·h = I_pivot·Δω, and the
    inverted pendulum's fall rate √(m g l / I_pivot) (SOURCES.md §2: the hanging
    frequency and the unstable pole are the same number).
    """
    plans = builtin_tests(spec)
    assert tuple(plans) == BUILTIN_NAMES
    for name in BUILTIN_NAMES:
        assert resolve_test(name, spec) == plans[name]
    f = spec.figures
    pivot = f.body.inertia[1, 1] + f.body.mass * (f.body.com[0] ** 2 + f.body.com[2] ** 2)
    fall_rate = math.sqrt(f.body.mass * 9.80665 * f.com_height / pivot)
    height = spec.body.frame.bottom + 0.9 * spec.body.frame.height
    first = plans["push"].events[0].push
    assert first.impulse * height / pivot == pytest.approx(0.2 * fall_rate, rel=1e-12)
    assert plans["low-battery"].robot(spec).battery.charge == 0.1
    assert plans["slope"].ground(spec).slope > 0
    with pytest.raises(FileError, match="built-in: push, slope"):
        resolve_test("pusj", spec)


def expected_checks(plan: Plan, verdict: dict) -> set[str]:
    c = plan.criteria
    labels = set()
    if c.must_not_fall:
        labels.add("stays up")
    if c.recover_within is not None and verdict["disturbance_times_s"]:
        labels.add(f"back within {math.degrees(c.recover_band):g} deg after each disturbance")
    if c.max_drift is not None:
        labels.add("position held")
    if c.max_speed_error is not None:
        labels.add("speed follows the setpoint (rms)")
    if c.min_distance is not None:
        labels.add("distance travelled")
    return labels


def firing_time(event: EventSpec, t: np.ndarray, x: np.ndarray) -> float | None:
    """When the runner fires ``event`` (s), or None if it never did in this trace.

    A timed event fires at the first tick at or after its time; a positioned one at the
    tick after the first trace row whose distance reached it (the runner fires events
    before it integrates the tick's travel).
    """
    if event.at is not None:
        due = np.nonzero(t >= event.at - 1e-9)[0]
    else:
        p = event.at_position
        reached = np.nonzero(x <= p if p < 0 else x >= p)[0]
        due = reached[reached + 1 < t.size] + 1
        if p == 0:
            due = np.array([0])
    return float(t[due[0]]) if due.size else None


def setpoint_path(plan: Plan, t: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, list[float]]:
    """Setpoint speed (m/s) at each time, and the times the setpoint changed."""
    speed = np.zeros_like(t)
    fired = sorted((when, i) for i, e in enumerate(plan.events) if e.setpoint is not None
                   and (when := firing_time(e, t, x)) is not None)
    for when, i in fired:
        speed[t >= when - 1e-9] = plan.events[i].setpoint.speed
    return speed, [when for when, _ in fired]


def assert_verdict_follows_criteria(plan: Plan, result) -> None:
    """Every check's pass flag from its reported figure and limit; the figures themselves
    recomputed from the trace; the test passes exactly when every check does."""
    verdict = result.summary["test_result"]
    status = result.status
    trace = result.trace
    t, x = trace["t_s"], trace["x_m"]
    c = plan.criteria
    checks = by_label(verdict)
    assert set(checks) == expected_checks(plan, verdict), plan.name
    fired = sorted(when for e in plan.events if e.setpoint is None
                   and (when := firing_time(e, t, x)) is not None)
    assert sorted(verdict["disturbance_times_s"]) == pytest.approx(fired), "disturbances (s)"
    for label, check in checks.items():
        value, limit = check["value"], check["limit_value"]
        if label == "stays up":
            expected = status == "completed"
        elif label.startswith("back within"):
            assert limit == c.recover_within
            times = sorted(verdict["disturbance_times_s"])
            worst = 0.0
            for i, start in enumerate(times):
                end = times[i + 1] if i + 1 < len(times) else t[-1] + 1e-9
                got = recovery_after(t, trace["pitch_rad"], start, end, c.recover_band)
                worst = math.inf if got is None or worst == math.inf else max(worst, got)
            assert value == (None if worst == math.inf else pytest.approx(worst)), label
            expected = value is not None and value <= limit and status == "completed"
        elif label == "position held":
            assert limit == c.max_drift
            speed, _ = setpoint_path(plan, t, x)
            path = np.concatenate(([0.0], np.cumsum(0.5 * (speed[1:] + speed[:-1]) * np.diff(t))))
            # trapezoids here, rectangles in judge: they differ by at most one tick's travel
            assert value == pytest.approx(np.max(np.abs(x - path)), abs=2e-3), label
            expected = value <= limit
        elif label.startswith("speed follows"):
            assert limit == c.max_speed_error
            speed, changes = setpoint_path(plan, t, x)
            keep = np.ones_like(t, dtype=bool)
            for when in changes:
                keep &= ~((t >= when) & (t < when + 1.0))
            rms = float(np.sqrt(np.mean((trace["speed_m_s"][keep] - speed[keep]) ** 2)))
            assert value == pytest.approx(rms, rel=1e-9), label
            expected = value <= limit
        else:
            assert label == "distance travelled" and limit == c.min_distance
            assert value == pytest.approx(x[-1]), label
            expected = value >= limit
        assert check["passed"] is expected, f"{plan.name}: {label} {check}"
    assert verdict["passed"] is all(ch["passed"] for ch in checks.values())
    assert result.summary["marks"], "the timeline marked its events"


@pytest.fixture(scope="module")
def shelf_cascade_runs(spec):
    """All nine built-in tests on shelf-runner with the cascade example (in memory)."""
    settings = RunSettings(controller=CASCADE)
    return {name: run_once(spec, settings, test=name, write=False) for name in BUILTIN_NAMES}


@pytest.mark.parametrize("name", BUILTIN_NAMES)
def test_builtin_test_passes_shelf_runner_with_cascade(spec, shelf_cascade_runs, name):
    """shelf-runner with controllers/cascade.py passes every built-in test, and each
    verdict follows its stated criteria."""
    result = shelf_cascade_runs[name]
    assert_verdict_follows_criteria(builtin_tests(spec)[name], result)
    assert result.status == "completed", result.message
    assert result.summary["test_result"]["passed"], result.summary["test_result"]["checks"]
    assert result.summary["duration_s"] == pytest.approx(builtin_tests(spec)[name].duration)


@pytest.mark.slow
@pytest.mark.parametrize("controller", CONTROLLERS)
@pytest.mark.parametrize("robot_file", ROBOT_FILES, ids=lambda p: p.stem)
def test_every_builtin_test_on_every_example_follows_its_criteria(robot_file, controller):
    """Every built-in test runs on every example robot with both example controllers to a
    normal end (completed or fell), and its verdict follows its stated criteria."""
    robot = load_robot(robot_file)
    settings = RunSettings(controller=str(ROOT / "controllers" / f"{controller}.py"))
    plans = builtin_tests(robot)
    for name in BUILTIN_NAMES:
        result = run_once(robot, settings, test=name, write=False)
        assert result.status in ("completed", "fell"), (name, result.message)
        assert_verdict_follows_criteria(plans[name], result)


def test_weak_controller_stands_still_but_fails_the_push_test(spec):
    """The cascade example with a soft tilt loop (tilt_kp 6, tilt_kd 0.3) passes a quiet
    10 s test file with no disturbance, but still rings after the push test's shoves:
    it stays up, and the recovery check fails."""
    settings = RunSettings(controller=CASCADE, config=WEAK_GAINS)
    quiet = run_once(spec, settings, test=str(DATA / "quiet.yaml"), write=False)
    assert quiet.status == "completed" and quiet.summary["test_result"]["passed"]
    assert quiet.summary["max_abs_pitch_deg"] < 2.0
    pushed = run_once(spec, settings, test="push", write=False)
    assert_verdict_follows_criteria(builtin_tests(spec)["push"], pushed)
    checks = by_label(pushed.summary["test_result"])
    assert pushed.summary["test_result"]["passed"] is False
    assert checks["stays up"]["passed"]
    assert not checks["back within 2 deg after each disturbance"]["passed"]


# ------------------------------------------------------------------ test files


def test_every_event_file_parses_to_si_values():
    """tests_data/every_event.yaml: every event kind with units, read into SI."""
    plan = load_test_file(DATA / "every_event.yaml")
    assert plan.name == "every-event" and plan.duration == 3.0
    assert plan.tilt == pytest.approx(math.radians(0.5)) and plan.battery_charge == 0.9
    kinds = [next(k for k in ("push", "payload", "friction", "battery", "gyro_bias",
                              "accel_dropout", "encoder_miss", "setpoint")
                  if getattr(e, k) is not None) for e in plan.events]
    assert set(kinds) == {"push", "payload", "friction", "battery", "gyro_bias",
                          "accel_dropout", "encoder_miss", "setpoint"}
    e = plan.events
    assert e[1].push.impulse == pytest.approx(0.02)
    assert (e[2].push.force, e[2].push.duration, e[2].push.height) == pytest.approx(
        (0.3, 0.05, 0.15))
    assert e[3].payload.mass == pytest.approx(0.03)
    assert e[6].gyro_bias == pytest.approx((0.0, math.radians(1.0), 0.0))
    assert e[7].accel_dropout == pytest.approx(0.1)
    assert e[9].at_position == pytest.approx(0.02)
    assert e[9].setpoint.turn == pytest.approx(math.radians(10.0))
    ground = plan.ground(load_robot(SHELF_RUNNER))
    assert ground.patches[0].friction == 0.4 and ground.steps[0].height == pytest.approx(0.002)
    assert plan.criteria.recover_band == pytest.approx(math.radians(3.0))


@pytest.mark.parametrize("name", ["every_event", "rough_short"])
def test_custom_test_files_run(spec, name):
    """A custom test file runs to completion and every event leaves its mark."""
    path = DATA / f"{name}.yaml"
    plan = load_test_file(path)
    result = run_once(spec, RunSettings(controller=CASCADE), test=str(path), write=False)
    assert result.status == "completed", result.message
    assert result.summary["duration_s"] == pytest.approx(plan.duration)
    assert len(result.summary["marks"]) == len(plan.events)
    assert_verdict_follows_criteria(plan, result)
    assert result.summary["test_result"]["passed"]


def test_described_plan_reads_back_as_a_test_file(tmp_path):
    """TestPlan.describe() is the test-file vocabulary in SI: written as YAML and read
    again it gives the same plan."""
    plan = load_test_file(DATA / "every_event.yaml")
    path = tmp_path / "again.yaml"
    path.write_text(yaml.safe_dump(plan.describe()), encoding="utf-8")
    assert load_test_file(path) == plan


BAD_FILES = {
    "unknown_key": ("duration: 2\nevnets: []\n", ["evnets", "did you mean 'events'"]),
    "unknown_nested_key": ("events:\n  - {at: 1, push: {impluse: 0.1}}\n",
                           ["events[0].push.impluse", "did you mean 'impulse'"]),
    "two_kinds": ("events:\n  - {at: 1, push: {impulse: 0.1}, friction: 0.3}\n",
                  ["events[0]", "got push, friction"]),
    "no_kind": ("events:\n  - {at: 1}\n", ["events[0]", "got none"]),
    "no_time": ("events:\n  - {push: {impulse: 0.1}}\n", ["events[0]", "at (a time)"]),
    "time_and_position": ("events:\n  - {at: 1, at_position: 0.5, friction: 0.2}\n",
                          ["events[0]", "at_position"]),
    "impulse_and_force": ("events:\n  - {at: 1, push: {impulse: 0.1, force: 3}}\n",
                          ["events[0].push", "impulse", "force"]),
    "rough_and_patches": ("ground:\n  rough: {amplitude: 2 mm, wavelength: 0.1}\n"
                          "  patches: [{start: 1, end: 2, friction: 0.2}]\n",
                          ["ground", "rough", "patches"]),
    "wrong_unit": ("duration: 3 kg\n", ["duration", "time"]),
    "out_of_range": ("events:\n  - {at: 1, friction: 7}\n", ["events[0].friction", "7"]),
    "not_a_mapping": ("- push\n", ["mapping"]),
    "yaml_syntax": ("events: [\n", ["line 2", "YAML syntax error"]),
}


@pytest.mark.parametrize("case", list(BAD_FILES))
def test_bad_test_file_names_the_file_and_the_key(tmp_path, case):
    """A bad test file raises TestFileError whose lines name the file and the key."""
    text, words = BAD_FILES[case]
    path = tmp_path / f"{case}.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(FileError) as caught:
        load_test_file(path)
    message = str(caught.value)
    assert message.startswith(f"{path}: "), message
    for word in words:
        assert word in message, (word, message)


def test_missing_test_file_is_a_test_file_error(tmp_path):
    with pytest.raises(FileError, match="no such file"):
        load_test_file(tmp_path / "absent.yaml")


@pytest.mark.parametrize("case", ["unknown_nested_key", "impulse_and_force"])
def test_cli_run_with_a_bad_test_file_exits_2(tmp_path, case):
    """`upright run ROBOT CTRL --test bad.yaml`: exit code 2, the file and key named,
    no traceback, no run folder."""
    text, words = BAD_FILES[case]
    path = tmp_path / "bad.yaml"
    path.write_text(text, encoding="utf-8")
    out = tmp_path / "run"
    result = CliRunner().invoke(app, ["run", str(SHELF_RUNNER), CASCADE, "--test", str(path),
                                      "--out", str(out)])
    assert result.exit_code == 2, result.output
    assert str(path) in result.output and all(w in result.output for w in words)
    assert "Traceback" not in result.output
    assert not (out / "trace.csv").exists()


def test_cli_run_with_an_unknown_test_name_exits_2(tmp_path):
    result = CliRunner().invoke(app, ["run", str(SHELF_RUNNER), CASCADE, "--test", "pushh",
                                      "--out", str(tmp_path / "run")])
    assert result.exit_code == 2, result.output
    assert "built-in" in result.output and "Traceback" not in result.output


# -- fuzzing: whatever a file holds, loading gives a plan or a TestFileError

VALID = yaml.safe_load((DATA / "every_event.yaml").read_text(encoding="utf-8"))
JUNK = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                 st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
                 st.sampled_from(["5 mm", "3 kg", "-1 s", "2 deg/s", "0.3 N*s", "1e400", "nan"]),
                 st.lists(st.integers(-3, 3), max_size=4), st.dictionaries(
                     st.text(max_size=6), st.integers(), max_size=2))


def _paths(node, prefix=()):
    yield prefix
    if isinstance(node, dict):
        for key, value in node.items():
            yield from _paths(value, (*prefix, key))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from _paths(value, (*prefix, i))


PATHS = [p for p in _paths(VALID) if p]


def _mutate(data, path, action, junk):
    import copy

    data = copy.deepcopy(data)
    node = data
    for key in path[:-1]:
        node = node[key]
    last = path[-1]
    if action == "delete":
        del node[last]
    elif action == "replace":
        node[last] = junk
    elif isinstance(node, dict):
        node[f"{last}x"] = junk  # an unknown key beside a known one
    else:
        node.append(junk)
    return data


@settings(max_examples=150, derandomize=True, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(mutations=st.lists(st.tuples(st.sampled_from(PATHS),
                                    st.sampled_from(["delete", "replace", "add"]), JUNK),
                          min_size=1, max_size=3),
       cut=st.integers(0, 2000), as_text=st.booleans())
def test_fuzzed_test_files_give_a_plan_or_a_test_file_error(tmp_path, mutations, cut, as_text):
    """Random mutations of a valid file (keys deleted, values replaced by junk, unknown keys,
    text cut short) load as a TestPlan or raise TestFileError, nothing else."""
    data = VALID
    for path, action, junk in mutations:
        try:
            data = _mutate(data, path, action, junk)
        except (KeyError, IndexError, TypeError, AttributeError):
            continue  # an earlier mutation removed this place
    text = yaml.safe_dump(data, allow_unicode=True)
    if as_text:
        text = text[:cut]
    path = tmp_path / "fuzzed.yaml"
    path.write_text(text, encoding="utf-8")
    try:
        plan = load_test_file(path)
    except FileError as err:
        assert str(err).startswith(str(path))
        return
    assert isinstance(plan, Plan)
    assert plan.duration > 0
