"""The fixed-rate loop: timing, call order, latency, faults, run folder, determinism, CLI.

Loop mechanics run against a fake world (as dm_control's ``rl/control_test.py`` tests
its loop against a fake physics, STYLE.md): exact tick and step counts, no engine.
Faults, the run folder and the command line run the real engine for short times.
"""

from __future__ import annotations

import hashlib
import json
import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import numpy as np
import pytest
import yaml
from ideal_parts import ideal_robot
from typer.testing import CliRunner

from sandbox.cli import app
from sandbox.record import DRIVE_COLUMNS, EVENT_COLUMN, POSE_COLUMNS, TEXT_COLUMNS, read_trace
from sandbox.runner import RunSettings, Simulation, TimingError, run
from sandbox.world import World

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
CASCADE = ROOT / "controllers" / "cascade.py"
HELPERS = Path(__file__).resolve().parent / "controllers"
STANDARD_GRAVITY = 9.80665  # m/s², exact by definition (SOURCES.md §10)

# The trace columns DESIGN.md promises, in its order.
DESIGN_COLUMNS = [
    "t_s", "x_m", "pitch_rad", "pitch_rate_rad_s", "yaw_rad", "speed_m_s", "duty_l", "duty_r",
    "current_l_a", "current_r_a", "battery_v", "gyro_x_rad_s", "gyro_y_rad_s", "gyro_z_rad_s",
    "accel_x_m_s2", "accel_y_m_s2", "accel_z_m_s2", "ticks_l", "ticks_r",
]
SUMMARY_KEYS = {"status", "duration_s", "fell_at_s", "max_abs_pitch_deg", "rms_pitch_deg",
                "drift_m", "saturation_fraction", "realtime_factor", "seed"}
NOISELESS_IMU = {"imu.gyro.noise_density": 0.0, "imu.accel.noise_density": 0.0,
                 "imu.gyro.bias": 0.0, "imu.accel.bias": 0.0}


def helper(name: str) -> str:
    return str(HELPERS / f"{name}.py")


@pytest.fixture(scope="module")
def shelf_runner():
    return ideal_robot("shelf-runner")


@pytest.fixture(scope="module")
def frictionless_robot():
    """shelf-runner without gearbox friction: at rest, torque is exactly K_t·duty·V/R or 0."""
    return ideal_robot("shelf-runner", {"motors.friction_torque": 0.0})


# ------------------------------------------------------------------ a fake world


@dataclass(frozen=True)
class FakeState:
    """What the runner reads of the body: a pitch-only rotation, world velocities."""

    pitch: float
    pitch_rate: float
    velocity: tuple[float, float, float]
    yaw: float = 0.0
    com: tuple[float, float, float] = (0.0, 0.0, 0.1)
    com_orientation: tuple[float, float, float, float] = (0.0, 0.0, 0.0, 1.0)

    @property
    def angular_velocity(self) -> tuple[float, float, float]:
        return (0.0, self.pitch_rate, 0.0)

    def to_body(self, v):
        """Rᵀ v for R the rotation by ``pitch`` about +y."""
        c, s = math.cos(self.pitch), math.sin(self.pitch)
        return (c * v[0] - s * v[2], v[1], s * v[0] + c * v[2])

    def point_velocity(self, local_point):
        # rigid body, ω along y: every point moves with the body plus ω × lever arm
        c, s = math.cos(self.pitch), math.sin(self.pitch)
        lever = (c * local_point[0] + s * local_point[2], local_point[1],
                 -s * local_point[0] + c * local_point[2])
        w = self.pitch_rate
        return (self.velocity[0] + w * lever[2], self.velocity[1],
                self.velocity[2] - w * lever[0])


class FakeWorld:
    """Stands in for ``sandbox.world.World``: the methods the runner calls, and a journal.

    The body moves by formula: pitch = tilt + pitch_speed·t, body velocity along x
    = ½·jerk·t² (so its acceleration is jerk·t), forward speed constant. Wheels
    report zero angle and rate. ``touch_after`` (steps) makes the body touch the floor.
    ``coupled`` plays a world with rotor coupling, which remembers the body's velocity
    before its last step (``previous_point_velocity``).
    """

    gravity = STANDARD_GRAVITY

    def __init__(self, spec, physics_dt, tilt=0.0, ground=None, *, journal, pitch_speed=0.0,
                 jerk=0.0, speed=0.0, touch_after=None, coupled=False):
        self.reflected_inertia = 1e-4 if coupled else 0.0
        self.dt = physics_dt
        self.tilt = tilt
        self.journal = journal
        self.pitch_speed = pitch_speed
        self.jerk = jerk
        self.speed = speed
        self.touch_after = touch_after
        self.steps = 0
        self.torques: list[tuple[float, float]] = []
        self.closed = 0
        journal.append(("world", self))

    def wheel_state(self):
        return 0.0, 0.0, 0.0, 0.0

    def step(self, torque_left, torque_right, rate_left=0.0, rate_right=0.0):
        self.journal.append(("physics", self.steps))
        self.torques.append((torque_left, torque_right))
        self.steps += 1

    def advance(self, steps, drive):
        for _ in range(steps):
            _, _, rate_left, rate_right = self.wheel_state()
            torque_left, torque_right = drive.step(rate_left, rate_right, self.dt)
            self.step(torque_left, torque_right, rate_left, rate_right)

    def body_state(self, steps=None):
        t = (self.steps if steps is None else steps) * self.dt
        return FakeState(pitch=self.tilt + self.pitch_speed * t, pitch_rate=self.pitch_speed,
                         velocity=(0.5 * self.jerk * t * t, 0.0, 0.0))

    def forward_speed(self, state):
        return self.speed

    def body_on_ground(self):
        return self.touch_after is not None and self.steps >= self.touch_after

    def body_touching(self, pitch, check_anyway=False):
        return self.body_on_ground()

    def previous_point_velocity(self, state, local_point):
        if not self.reflected_inertia or self.steps == 0:
            return None
        return self.body_state(self.steps - 1).point_velocity(local_point)

    def gravity_vector(self):
        return (0.0, 0.0, -self.gravity)

    def close(self):
        self.closed += 1


class Journaling:
    """Controller: logs each step call in the shared journal; duties from ``duty_at(tick)``."""

    journal: list  # set by fake_run on a subclass, one list per run
    rate_hz = 200

    def __init__(self, config, robot):
        self.duty_at = config.get("duty_at", lambda tick: (0.0, 0.0))
        self.tick = 0

    def step(self, r):
        self.journal.append(("control", r.t))
        out = self.duty_at(self.tick)
        self.tick += 1
        return out


def fake_run(spec, *, duration=0.1, rate_hz=200.0, physics_dt=1e-3, latency=0.0, tilt=0.0,
             duty_at=None, folder=None, controller_class=None, config=None, **world_kw):
    """Run on a FakeWorld; returns (result, world, journal)."""
    journal: list = []
    cls = controller_class or type("JournalingHere", (Journaling,), {"journal": journal})
    settings = RunSettings(controller="fake.py", duration=duration, rate_hz=rate_hz,
                           physics_dt=physics_dt, latency=latency, tilt=tilt,
                           config={**(config or {}),
                                   **({"duty_at": duty_at} if duty_at else {})})
    sim = Simulation(spec, settings, controller_class=cls,
                     world_factory=partial(FakeWorld, journal=journal, **world_kw))
    result = sim.run(folder)
    worlds = [entry[1] for entry in journal if entry[0] == "world"]
    assert len(worlds) == 1, "the runner made one world"
    return result, worlds[0], [e for e in journal if e[0] != "world"]


# ------------------------------------------------------------------ loop mechanics


@pytest.mark.parametrize(("rate_hz", "physics_dt", "duration"), [
    (200.0, 1e-3, 0.5), (250.0, 1e-3, 0.2), (100.0, 2e-3, 0.3), (1000.0, 1e-3, 0.05),
    (50.0, 5e-4, 0.4),
])
def test_exact_tick_and_step_counts(frictionless_robot, rate_hz, physics_dt, duration):
    """duration × rate + 1 trace rows at t = k/rate, duration/dt physics steps, one close()."""
    result, world, _ = fake_run(frictionless_robot, duration=duration, rate_hz=rate_hz,
                                physics_dt=physics_dt)
    n_ticks = round(duration * rate_hz)
    steps_per_tick = round(1 / (rate_hz * physics_dt))
    assert result.status == "completed", result.message
    assert result.trace["t_s"].size == n_ticks + 1, "trace rows"
    assert world.steps == n_ticks * steps_per_tick, "physics steps"
    np.testing.assert_allclose(result.trace["t_s"], np.arange(n_ticks + 1) / rate_hz,
                               rtol=0, atol=1e-12, err_msg="tick times, s")
    assert world.closed == 1, "world closed once"
    assert result.summary["duration_s"] == pytest.approx(duration, abs=1e-12)
    assert result.summary["rate_hz"] == rate_hz


def test_controller_steps_before_the_physics_of_its_period(frictionless_robot):
    """Per tick: the controller's step, then exactly that period's physics steps, in order."""
    _, _, journal = fake_run(frictionless_robot, duration=0.03, rate_hz=200.0)
    expected = []
    for tick in range(7):
        expected.append(("control", pytest.approx(tick * 0.005, abs=1e-12)))
        if tick < 6:
            expected += [("physics", 5 * tick + k) for k in range(5)]
    assert journal == expected


@pytest.mark.parametrize(("latency", "delay_steps"), [(0.0, 0), (0.003, 3), (0.012, 12)])
def test_latency_delays_duties_by_whole_steps(frictionless_robot, latency, delay_steps):
    """Duties reach the bridge ``latency`` after their tick and are held one period.

    The controller alternates 0 and 0.5 duty each tick; with the wheels at rest and no
    gearbox friction the motor torque is zero exactly when the applied duty is zero,
    so the physics step where each duty starts shows in the torques.
    """
    spt = 5
    result, world, _ = fake_run(frictionless_robot, duration=0.1, latency=latency,
                                duty_at=lambda tick: (0.5, 0.5) if tick % 2 else (0.0, 0.0))
    assert result.status == "completed", result.message
    driven = np.array([left != 0.0 for left, _ in world.torques])
    step = np.arange(len(driven))
    shifted = step - delay_steps
    expected = (shifted >= 0) & ((shifted // spt) % 2 == 1)
    first = int(np.argmax(driven))
    assert first == spt + delay_steps, f"first driven step {first}, expected {spt + delay_steps}"
    np.testing.assert_array_equal(driven, expected, err_msg="steps with a nonzero duty")
    torques = np.array(world.torques)
    assert np.all(torques[driven] > 0), "positive duty gives forward torque"


@pytest.mark.parametrize(("rate_hz", "physics_dt", "shown"), [
    (300.0, 1e-3, ("1 ms", "3.33333 ms", "300 Hz")),
    (200.0, 3e-3, ("3 ms", "5 ms", "200 Hz")),
    (2000.0, 1e-3, ("1 ms", "0.5 ms", "2000 Hz")),
])
def test_rate_the_step_does_not_divide_is_a_timing_error(shelf_runner, rate_hz, physics_dt,
                                                          shown):
    """A controller period that is no whole number of physics steps: TimingError quoting both."""
    settings = RunSettings(controller="fake.py", rate_hz=rate_hz, physics_dt=physics_dt)
    with pytest.raises(TimingError) as caught:
        Simulation(shelf_runner, settings, controller_class=Journaling, world_factory=FakeWorld)
    assert isinstance(caught.value, ValueError)
    for text in shown:
        assert text in str(caught.value), f"{text!r} missing from: {caught.value}"


def test_negative_latency_and_long_imu_latency_are_timing_errors(shelf_runner):
    """A negative output latency, or an IMU latency of a whole period, are refused."""
    with pytest.raises(TimingError, match="latency"):
        Simulation(shelf_runner, RunSettings(controller="f.py", latency=-0.001),
                   controller_class=Journaling, world_factory=FakeWorld)
    slow_imu = ideal_robot("shelf-runner", {"imu.latency": "5 ms"})
    with pytest.raises(TimingError, match=r"imu\.latency \(5 ms\).*\(5 ms\)"):
        Simulation(slow_imu, RunSettings(controller="f.py"), controller_class=Journaling,
                   world_factory=FakeWorld)


@pytest.mark.parametrize("coupled", [False, True], ids=["plain", "coupled"])
@pytest.mark.parametrize(("imu_rate", "imu_latency"), [
    ("1000 Hz", "0 ms"), ("1000 Hz", "2 ms"), ("250 Hz", "0 ms"),
    ("250 Hz", "3 ms"),  # the 4 ms sample is first seen at the 10 ms tick, two ticks on
    ("100 Hz", "3 ms"),  # slower than the controller: a sample seen for several ticks
])
def test_accelerometer_sees_the_mount_acceleration_of_its_sample_time(imu_rate, imu_latency,
                                                                      coupled):
    """With the body accelerating as a = J·t, a perfect accelerometer reads J·(t_s − dt/2).

    Sources: specific force f = a − g (SOURCES.md §4; Titterton & Weston, *Strapdown
    Inertial Navigation Technology* [memory]); the runner takes a as the backward
    difference of the mount velocity over one physics step, exact for v = ½J t² at the
    step's midpoint t_s − dt/2 [derived]. t_s is the newest sample at multiples of 1/rate
    no later than t − latency; the first sample (t_s = 0) has no previous velocity, so 0.
    Tolerance one LSB of the 16-bit ±2 g word.
    """
    spec = ideal_robot("shelf-runner", {**NOISELESS_IMU, "imu.rate": imu_rate,
                                     "imu.latency": imu_latency})
    jerk = 20.0  # m/s³
    result, _, _ = fake_run(spec, duration=0.1, jerk=jerk, coupled=coupled)
    dt, rate, latency = 1e-3, spec.imu.rate, spec.imu.latency
    lsb = 2 * spec.imu.accel.range / 2**spec.imu.accel.bits
    t = result.trace["t_s"]
    sample_time = np.floor(np.maximum(t - latency, 0.0) * rate + 1e-9) / rate
    expected_x = np.where(sample_time > 0, jerk * (sample_time - dt / 2), 0.0)
    np.testing.assert_allclose(result.trace["accel_x_m_s2"], expected_x, rtol=0, atol=lsb,
                               err_msg="accel x, m/s^2")
    np.testing.assert_allclose(result.trace["accel_z_m_s2"], STANDARD_GRAVITY, rtol=0, atol=lsb,
                               err_msg="accel z, m/s^2")
    assert expected_x[-1] > 1.0, "the check covers a real acceleration"


def test_distance_is_the_integral_of_forward_speed(frictionless_robot):
    """x_m integrates speed_m_s (trapezoid rule, exact for a constant 0.2 m/s) [derived]."""
    result, _, _ = fake_run(frictionless_robot, duration=0.5, speed=0.2)
    np.testing.assert_allclose(result.trace["x_m"], 0.2 * result.trace["t_s"], atol=1e-12,
                               err_msg="x_m, m")
    assert result.summary["drift_m"] == pytest.approx(0.1, abs=1e-12)


def test_fall_detected_at_the_first_tick_past_the_limit(frictionless_robot):
    """Pitch rising at 1 rad/s crosses 60° (1.0472 rad) first at the tick t = 1.050 s."""
    result, _, _ = fake_run(frictionless_robot, duration=3.0, pitch_speed=1.0)
    assert result.status == "fell"
    assert result.summary["fell_at_s"] == pytest.approx(1.05, abs=1e-9)
    assert result.trace["t_s"][-1] == pytest.approx(1.05, abs=1e-9), "trace ends at the fall"
    assert "fell at t = 1.050 s" in result.message


def test_fall_detected_when_the_body_touches_the_floor(frictionless_robot):
    """A body touching the floor ends the run as fell, even at small pitch."""
    result, _, _ = fake_run(frictionless_robot, duration=1.0, touch_after=100)
    assert result.status == "fell"
    assert result.summary["fell_at_s"] == pytest.approx(0.1, abs=1e-9)


@pytest.mark.parametrize(("duties", "clipped", "recorded"), [
    ((1.5, -3.0), True, (1.0, -1.0)),
    ((0.4, -1.0), False, (0.4, -1.0)),
])
def test_duties_outside_the_range_are_clipped_and_counted(frictionless_robot, duties, clipped,
                                                          recorded):
    """Duties outside [-1, 1] are clipped, recorded clipped, and counted in the summary."""
    result, _, _ = fake_run(frictionless_robot, duration=0.2, duty_at=lambda tick: duties)
    rows = result.trace["t_s"].size
    assert result.status == "completed"
    assert result.summary["clipped_duties"] == (rows if clipped else 0)
    np.testing.assert_array_equal(result.trace["duty_l"], recorded[0])
    np.testing.assert_array_equal(result.trace["duty_r"], recorded[1])
    assert result.summary["saturation_fraction"] == 1.0  # one side at full duty every tick


def test_late_log_channel_is_counted_as_dropped(frictionless_robot, tmp_path):
    """A channel first logged after the first block of rows is reported as dropped."""
    from sandbox.control import load_controller_class

    cls = load_controller_class(helper("late_log"))
    result, _, _ = fake_run(frictionless_robot, duration=2.0, controller_class=cls,
                            config={"start": 1.5}, folder=tmp_path)
    assert result.status == "completed"
    assert result.summary["dropped_log_channels"] == ["late"]
    header = (tmp_path / "trace.csv").read_text().splitlines()[0].split(",")
    assert "log.late" not in header


# ------------------------------------------------------------------ faults (real engine)


def _run(spec, controller: str, folder: Path | None, **settings):
    return run(spec, RunSettings(controller=controller, **settings), folder=folder)


def test_controller_that_raises(shelf_runner, tmp_path):
    """Raising in step(): controller_error, message with the time, traceback saved, rows kept."""
    result = _run(shelf_runner, helper("raises"), tmp_path, duration=1.0)
    assert result.status == "controller_error"
    assert "at t = 0.100 s" in result.message
    assert "ValueError" in result.message and "deliberate failure" in result.message
    assert "raises.py, line" in result.message, "message names the script line"
    saved = (tmp_path / "controller_error.txt").read_text()
    assert "Traceback" in saved and "broken_estimate" in saved and "raises.py" in saved
    trace = read_trace(tmp_path / "trace.csv")
    assert trace["t_s"].size == 20, "rows before the failing tick"
    assert trace["t_s"][-1] == pytest.approx(0.095)
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["status"] == "controller_error"
    assert summary["duration_s"] == pytest.approx(0.095)


@pytest.mark.parametrize(("controller", "config", "cause"), [
    ("nan_duty", {}, "NaN for the left duty"),
    ("bad_shape", {"shape": "three"}, "returned 3 values"),
    ("bad_shape", {"shape": "none"}, "returned None"),
])
def test_unusable_output_is_a_controller_error(shelf_runner, tmp_path, controller, config,
                                               cause):
    """NaN or the wrong shape: controller_error naming the time and the cause; rows kept."""
    result = _run(shelf_runner, helper(controller), tmp_path, duration=1.0, config=config)
    assert result.status == "controller_error"
    assert "at t = 0.100 s" in result.message, result.message
    assert cause in result.message, result.message
    assert (tmp_path / "controller_error.txt").is_file()
    assert read_trace(tmp_path / "trace.csv")["t_s"].size == 20


def test_ctrl_c_keeps_a_valid_trace(shelf_runner, tmp_path):
    """KeyboardInterrupt at t = 0.5 s: status interrupted, a complete, parseable trace."""
    result = _run(shelf_runner, helper("interrupts"), tmp_path, duration=2.0)
    assert result.status == "interrupted"
    trace = read_trace(tmp_path / "trace.csv")
    assert trace["t_s"].size == 100
    np.testing.assert_allclose(trace["t_s"], np.arange(100) * 0.005, atol=1e-9)
    assert all(np.all(np.isfinite(column)) for name, column in trace.items()
               if name not in TEXT_COLUMNS)
    assert json.loads((tmp_path / "summary.json").read_text())["status"] == "interrupted"


def test_constant_zero_duty_falls(shelf_runner):
    """Zero duty from 5°: the robot falls; fell_at_s is the last row's time."""
    result = _run(shelf_runner, helper("constant"), None, duration=3.0, tilt=math.radians(5.0))
    assert result.status == "fell"
    fell_at = result.summary["fell_at_s"]
    assert fell_at is not None and 0.1 < fell_at < 3.0
    assert fell_at == pytest.approx(result.trace["t_s"][-1])
    assert result.summary["max_abs_pitch_deg"] > 20.0


# ------------------------------------------------------------------ determinism


def _cascade_trace_bytes(spec, folder: Path, seed: int) -> bytes:
    result = _run(spec, str(CASCADE), folder, duration=1.0, tilt=math.radians(3.0), seed=seed)
    assert result.status == "completed", result.message
    return (folder / "trace.csv").read_bytes()


def test_same_seed_same_bytes_other_seed_other_bytes(shelf_runner, tmp_path):
    """Same seed: byte-identical trace.csv; another seed: different sensor noise, other bytes."""
    first = _cascade_trace_bytes(shelf_runner, tmp_path / "a", seed=7)
    again = _cascade_trace_bytes(shelf_runner, tmp_path / "b", seed=7)
    other = _cascade_trace_bytes(shelf_runner, tmp_path / "c", seed=8)
    assert first == again
    assert first != other


class _WorldWithoutTickSense(World):
    """The real world, but the runner must use its separate accessors at each tick."""

    tick_sense = None


@pytest.mark.parametrize("imu_latency", ["0 ms", "2 ms"])
def test_one_pass_tick_sensing_gives_the_same_trace(imu_latency):
    """World.tick_sense (one pass) and the separate accessors give the same trace to the
    last bit, on the usual path (sample at the tick) and with sensor latency."""
    spec = ideal_robot("shelf-runner", {"imu.latency": imu_latency})
    settings = RunSettings(controller=str(CASCADE), duration=0.5, tilt=math.radians(3.0),
                           seed=4)
    fused = Simulation(spec, settings).run(None).trace
    separate = Simulation(spec, settings, world_factory=_WorldWithoutTickSense).run(None).trace
    assert list(fused) == list(separate)
    for name in fused:
        np.testing.assert_array_equal(fused[name], separate[name], err_msg=name)


# ------------------------------------------------------------------ the run folder


@pytest.fixture(scope="module")
def cascade_run(tmp_path_factory):
    spec = ideal_robot("shelf-runner")
    folder = tmp_path_factory.mktemp("run")
    result = _run(spec, str(CASCADE), folder, duration=1.0, tilt=math.radians(3.0), seed=11)
    return result, folder


def test_trace_columns(cascade_run):
    """trace.csv: DESIGN.md's columns in order, then the pose columns, the drive's columns
    and ``event``, then log.<name>."""
    _, folder = cascade_run
    header = (folder / "trace.csv").read_text().splitlines()[0].split(",")
    assert header[:19] == DESIGN_COLUMNS
    assert header[19:19 + len(POSE_COLUMNS)] == list(POSE_COLUMNS)
    after_pose = 19 + len(POSE_COLUMNS)
    assert header[after_pose:after_pose + len(DRIVE_COLUMNS) + 1] == [
        *DRIVE_COLUMNS, EVENT_COLUMN]
    assert header[after_pose + len(DRIVE_COLUMNS) + 1:] == [
        "log.tilt_est_rad", "log.target_tilt_rad", "log.speed_est_m_s"]


def test_summary_keys_and_values(cascade_run):
    """summary.json holds DESIGN.md's keys; its figures agree with the trace."""
    result, folder = cascade_run
    summary = json.loads((folder / "summary.json").read_text())
    assert SUMMARY_KEYS <= set(summary), SUMMARY_KEYS - set(summary)
    assert summary["status"] == "completed" and summary["fell_at_s"] is None
    assert summary["seed"] == 11
    assert summary["duration_s"] == pytest.approx(1.0)
    pitch = result.trace["pitch_rad"]
    assert summary["max_abs_pitch_deg"] == pytest.approx(np.degrees(np.max(np.abs(pitch))))
    assert summary["rms_pitch_deg"] == pytest.approx(np.degrees(np.sqrt(np.mean(pitch**2))))
    assert summary["realtime_factor"] > 0
    assert 0.0 <= summary["saturation_fraction"] <= 1.0


def test_run_yaml_records_what_is_needed_to_repeat(cascade_run):
    """run.yaml: the robot (SI), the controller's path and sha256, seed and versions."""
    _, folder = cascade_run
    record = yaml.safe_load((folder / "run.yaml").read_text())
    assert record["robot"]["name"] == "shelf-runner"
    assert record["robot"]["wheels"]["radius"] == pytest.approx(0.034)
    assert Path(record["controller"]["path"]) == CASCADE.resolve()
    assert record["controller"]["sha256"] == hashlib.sha256(CASCADE.read_bytes()).hexdigest()
    assert record["seed"] == 11
    assert {"upright", "python", "numpy"} <= set(record["versions"])
    # the recorded robot loads back into the same description
    from sandbox.robot import robot_from_dict

    assert robot_from_dict(record["robot"]) == ideal_robot("shelf-runner")


def test_robot_urdf_present(cascade_run):
    """robot.urdf is written and is a URDF robot with two wheel joints."""
    _, folder = cascade_run
    root = ET.parse(folder / "robot.urdf").getroot()
    assert root.tag == "robot"
    assert len(root.findall("joint")) >= 2


def test_read_trace_round_trips(cascade_run):
    """read_trace gives back the recorded columns (to the CSV's 9 significant digits)."""
    result, folder = cascade_run
    back = read_trace(folder / "trace.csv")
    assert set(back) == set(result.trace)
    for name, column in result.trace.items():
        if name in TEXT_COLUMNS:
            np.testing.assert_array_equal(back[name], column, err_msg=name)
            continue
        np.testing.assert_allclose(back[name], column, rtol=1e-8, atol=1e-12, err_msg=name)
    np.testing.assert_array_equal(back["ticks_l"], result.trace["ticks_l"])


# ------------------------------------------------------------------ the command line


@pytest.fixture
def cli():
    return CliRunner()


def upright(cli: CliRunner, *args):
    return cli.invoke(app, [str(a) for a in args])


def test_cli_run_writes_the_folder(cli, tmp_path):
    """`upright run ROBOT CONTROLLER --duration 2 --tilt 3 --out DIR`: exit 0, files there."""
    out = tmp_path / "run"
    result = upright(cli, "run", SHELF_RUNNER, CASCADE, "--duration", 2, "--tilt", 3,
                     "--out", out)
    assert result.exit_code == 0, result.output
    for name in ("trace.csv", "summary.json", "run.yaml", "robot.urdf", "plots.png"):
        assert (out / name).is_file(), name
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "completed"
    assert summary["duration_s"] == pytest.approx(2.0)
    assert read_trace(out / "trace.csv")["pitch_rad"][0] == pytest.approx(math.radians(3),
                                                                          abs=1e-6)


def test_cli_controller_error_exit_3(cli, tmp_path):
    """A raising controller: exit code 3, the message names the time and the error."""
    result = upright(cli, "run", SHELF_RUNNER, helper("raises"), "--duration", 1,
                     "--out", tmp_path / "run", "--no-plots")
    assert result.exit_code == 3, result.output
    assert "t = 0.100 s" in result.output and "ValueError" in result.output
    assert "Traceback" not in result.output


def test_cli_bad_robot_key_exit_2(cli, tmp_path):
    """A misspelt robot key in --set: exit code 2, the key and a suggestion, no run folder."""
    out = tmp_path / "run"
    result = upright(cli, "run", SHELF_RUNNER, CASCADE, "--set", "wheels.frction=0.4",
                     "--out", out)
    assert result.exit_code == 2, result.output
    assert "wheels.frction" in result.output and "friction" in result.output
    assert not (out / "trace.csv").exists()


def test_cli_fall_exit_1(cli, tmp_path):
    """A robot that falls: exit code 1."""
    result = upright(cli, "run", SHELF_RUNNER, helper("constant"), "--duration", 3,
                     "--tilt", 5, "--out", tmp_path / "run", "--no-plots")
    assert result.exit_code == 1, result.output
    assert json.loads((tmp_path / "run" / "summary.json").read_text())["status"] == "fell"


def test_cli_set_config_reaches_the_controller(cli, tmp_path):
    """--set config.tilt_kp=12.5 arrives in the controller's config (it logs the value)."""
    out = tmp_path / "run"
    result = upright(cli, "run", SHELF_RUNNER, helper("echo_config"), "--duration", 0.2,
                     "--set", "config.tilt_kp=12.5", "--out", out, "--no-plots")
    assert result.exit_code == 0, result.output
    trace = read_trace(out / "trace.csv")
    np.testing.assert_array_equal(trace["log.tilt_kp"], 12.5)
    np.testing.assert_allclose(trace["log.t_seen"], trace["t_s"], atol=1e-9)
