"""The fixed-rate loop: world, actuators, IMU, controller, events and recorder.

Each physics step: read the wheel rates, step the motors and battery, apply
the torques, step the engine. Each controller tick: read the true state, hand
the controller the IMU sample and encoder counts it would have now, hold its
duties (after the optional latency) until the next tick, write one trace row.
"""

from __future__ import annotations

import hashlib
import math
import platform
import time
import traceback
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from .actuators import DriveTrain
from .control import (
    ControllerError,
    Reading,
    RobotFacts,
    check_duties,
    controller_rate,
    failure_text,
    load_controller_class,
    script_location,
)
from .imu import Encoders, Imu
from .interrupts import is_user_interrupt
from .isolate import build_controller
from .metrics import run_figures
from .record import TraceWriter, write_json, write_yaml
from .robot import RobotSpec
from .world import Ground, World

STATUS_COMPLETED = "completed"
STATUS_FELL = "fell"
STATUS_CONTROLLER_ERROR = "controller_error"
STATUS_INTERRUPTED = "interrupted"


class TimingError(ValueError):
    """A controller period that the physics step does not divide, and the like."""


@dataclass(frozen=True)
class RunSettings:
    """Everything one run needs besides the robot. Times in s, angles in rad, rates in Hz."""

    controller: str  # "path.py" or "path.py:ClassName"
    config: dict = field(default_factory=dict)
    duration: float = 10.0
    tilt: float = 0.0
    seed: int = 0
    physics_dt: float = 1e-3
    rate_hz: float | None = None  # None: the class's rate_hz, else 200 Hz
    latency: float = 0.0  # controller output delay before the bridge
    fall_limit: float = math.radians(60.0)
    test_name: str = "none"
    isolate: bool = False  # the controller in a process of its own (sandbox.isolate)
    step_timeout: float = 1.0  # s of wall clock per controller call, when isolated


@dataclass
class RunResult:
    status: str
    summary: dict[str, Any]
    folder: Path | None
    trace: dict[str, np.ndarray]
    message: str = ""


def steps_per_tick(physics_dt: float, rate_hz: float) -> int:
    """Physics steps in one controller period; the step must divide the period."""
    if not (physics_dt > 0 and math.isfinite(physics_dt)):
        raise TimingError(f"physics step must be a positive number of seconds, got {physics_dt!r}")
    if not (rate_hz > 0 and math.isfinite(rate_hz)):
        raise TimingError(f"controller rate must be a positive number of Hz, got {rate_hz!r}")
    ratio = 1.0 / (rate_hz * physics_dt)
    steps = round(ratio)
    if steps < 1 or abs(ratio - steps) > 1e-9 * max(1.0, ratio):
        raise TimingError(
            f"the physics step ({physics_dt * 1000:g} ms) must divide the controller period "
            f"({1000 / rate_hz:g} ms at {rate_hz:g} Hz): choose a rate such as "
            f"{_nearby_rates(physics_dt)}"
        )
    return steps


def _nearby_rates(physics_dt: float) -> str:
    base = 1.0 / physics_dt
    return ", ".join(f"{base / n:g} Hz" for n in (2, 4, 5, 10))


def sample_step(tick_step: int, physics_dt: float, imu_rate: float, latency_steps: float) -> int:
    """Physics step of the newest IMU sample a controller sees at ``tick_step``.

    Samples are taken at multiples of 1/imu_rate; the newest one at or before
    the tick time less the sensor's latency.
    """
    t = (tick_step - latency_steps) * physics_dt
    if t <= 0:
        return 0
    n = math.floor(t * imu_rate + 1e-9)
    return min(tick_step, round(n / imu_rate / physics_dt))


class Simulation:
    """One run of a controller on a robot. Use :func:`run` for the whole thing."""

    def __init__(self, spec: RobotSpec, settings: RunSettings, ground: Ground | None = None,
                 timeline: Any = None, controller_class: type | None = None,
                 world_factory: Callable[..., Any] = World):
        self.spec = spec
        self.settings = settings
        cls = controller_class or load_controller_class(settings.controller)
        self.rate_hz = controller_rate(cls, settings.rate_hz)
        self.steps_per_tick = steps_per_tick(settings.physics_dt, self.rate_hz)
        self.period = self.steps_per_tick * settings.physics_dt
        if settings.latency < 0:
            raise TimingError(f"latency must be zero or more, got {settings.latency * 1000:g} ms")
        if spec.imu.latency >= self.period:
            raise TimingError(
                f"imu.latency ({spec.imu.latency * 1000:g} ms) must be shorter than the "
                f"controller period ({self.period * 1000:g} ms)")
        self.latency_steps = round(settings.latency / settings.physics_dt)
        self.robot_facts = RobotFacts.from_spec(spec, self.rate_hz, settings.physics_dt)
        self.controller_class = cls
        self.ground = ground
        self.timeline = timeline
        self.world_factory = world_factory  # tests pass a fake world here

    def run(self, folder: Path | None) -> RunResult:
        spec, s = self.spec, self.settings
        dt = s.physics_dt
        spt = self.steps_per_tick
        n_ticks = int(round(s.duration * self.rate_hz))
        sensor_latency_steps = spec.imu.latency / dt
        imu_rate = spec.imu.rate
        mount = tuple(float(v) for v in spec.imu.at)

        if folder is not None:
            folder.mkdir(parents=True, exist_ok=True)
        world = self.world_factory(spec, physics_dt=dt, tilt=s.tilt, ground=self.ground)
        try:
            # without a folder the trace is kept in memory only (sweeps need the figures)
            writer = TraceWriter(folder / "trace.csv" if folder is not None else None,
                                 block_rows=50 if folder is not None else 2000)
        except OSError:
            world.close()
            raise
        drive = DriveTrain(spec)
        imu = Imu(spec.imu, seed=s.seed)
        encoders = Encoders(spec.encoders.counts_per_rev, spec.motors.gear_ratio)
        reading = Reading(dt=self.period)
        timeline = self.timeline
        status, message, fell_at = STATUS_COMPLETED, "", None
        clipped = 0
        ticks_run = 0
        wall_start = time.perf_counter()
        gravity = world.gravity_vector()
        coupled = world.reflected_inertia > 0.0  # the world then reads the body every step
        fast_sampling = coupled and not sensor_latency_steps
        # a sample every physics step and no sensor latency: the sample is always the tick's
        every_step = not sensor_latency_steps and abs(imu_rate * dt - 1.0) < 1e-9
        sampled_now = False
        try:
            controller = build_controller(self.controller_class, s, self.robot_facts)
            if hasattr(controller, "reset"):
                _call(controller.reset, "reset", 0.0, self.controller_class)
            pending: deque[tuple[int, float, float]] = deque()  # (apply at step, left, right)
            step = 0
            x = 0.0
            last_speed = 0.0
            last_sample_index = -1
            # true (rate, specific force) of IMU samples taken but not yet seen, by step
            truths: dict[int, tuple] = {}
            period, latency_steps = self.period, self.latency_steps
            step_controller = controller.step
            sense = getattr(world, "tick_sense", None) or partial(_tick_sense, world, gravity, dt)
            # bound once: these run every tick
            read_imu, count_ticks, add_row = imu.read, encoders.ticks, writer.add
            take_logs, touching, fall_limit = reading.take_logs, world.body_touching, s.fall_limit
            for tick in range(n_ticks + 1):
                t = tick * period
                if timeline is not None:
                    timeline.fire(t, x, world, drive, imu, encoders)
                (pitch, pitch_rate, yaw, speed, pose, q, angle_l, angle_r, true_rate,
                 true_force) = sense(mount)
                # -- the IMU sample the controller sees now
                if sampled_now or not tick:
                    # taken now (the first sample has no earlier velocity: no acceleration)
                    sample_at, sample_truth = step, (true_rate, true_force)
                else:
                    sample_at = sample_step(step, dt, imu_rate, sensor_latency_steps)
                if sample_at in truths:
                    sample_truth = truths[sample_at]
                    if len(truths) > 1:
                        truths = {k: v for k, v in truths.items() if k >= sample_at}
                sample_index = math.floor(sample_at * dt * imu_rate + 1e-9)
                elapsed = max(sample_index - last_sample_index, 0)
                last_sample_index = sample_index
                gyro, accel = read_imu(sample_truth[0], sample_truth[1], elapsed)
                ticks_lr = count_ticks(angle_l, angle_r)
                x += 0.5 * (speed + last_speed) * period if tick else 0.0
                last_speed = speed
                # -- the controller
                reading.t = t
                reading.gyro = gyro
                reading.accel = accel
                reading.ticks = ticks_lr
                reading.battery_v = drive.battery_voltage
                if timeline is not None:
                    reading.setpoint = timeline.setpoint
                try:
                    out = step_controller(reading)
                except BaseException as err:  # SystemExit too; the user's Ctrl-C goes on
                    if is_user_interrupt(err):
                        raise
                    raise _failure(err, "step", t, self.controller_class) from err
                try:
                    left, right, was_clipped = check_duties(out)
                except Exception as err:  # a returned object whose iteration raises, too
                    raise _failure(err, "step", t, self.controller_class) from None
                clipped += was_clipped
                pending.append((step + latency_steps, left, right))
                # -- the trace row
                add_row((
                    t, x, pitch, pitch_rate, yaw, speed, left, right,
                    drive.current_left, drive.current_right, drive.battery_voltage,
                    gyro[0], gyro[1], gyro[2], accel[0], accel[1], accel[2],
                    ticks_lr[0], ticks_lr[1],
                    pose[0], pose[1], pose[2], q[0], q[1], q[2], q[3], angle_l, angle_r,
                ), take_logs())
                ticks_run = tick + 1
                # -- fell?
                if abs(pitch) > fall_limit or touching(pitch, tick % 20 == 0):
                    status, fell_at = STATUS_FELL, t
                    message = (f"fell at t = {t:.3f} s (pitch {math.degrees(pitch):.1f} deg)")
                    break
                if tick == n_ticks:
                    break
                # -- physics until the next tick, stopping where something is due
                target = step + spt
                next_sample = target if every_step else sample_step(target, dt, imu_rate,
                                                                   sensor_latency_steps)
                sampled_now = fast_sampling and next_sample == target
                if sampled_now:
                    # The usual case: the sample is taken at the tick itself and the coupled
                    # world remembers the body's velocity before its last step, so the
                    # tick's sensing gives the sample's truth.
                    while step < target:
                        while pending and pending[0][0] <= step:
                            _, left, right = pending.popleft()
                            drive.set_duty(left, right)
                        stop = pending[0][0] if pending and pending[0][0] < target else target
                        world.advance(stop - step, drive)
                        step = stop
                    continue
                # With sensor latency the newest sample of this period may be seen only
                # a tick later (when none falls between the tick and tick + latency).
                newest = (sample_step(target, dt, imu_rate, 0.0) if sensor_latency_steps
                          else next_sample)
                due = [n for n in {next_sample, newest} if n > step]
                if any(n - 1 == step for n in due):
                    state = world.body_state()
                before = {n: state.point_velocity(mount) for n in due if n - 1 == step}
                # stop one step before a sample (its velocity) and at it; at the tick the
                # coupled world remembers the velocity before its last step
                stops = sorted({p for n in due if not (coupled and n == target)
                                for p in (n - 1, n) if step < p < target})
                while step < target:
                    while pending and pending[0][0] <= step:
                        _, left, right = pending.popleft()
                        drive.set_duty(left, right)
                    stop = target
                    if pending and pending[0][0] < stop:
                        stop = pending[0][0]
                    for p in stops:
                        if step < p:
                            stop = min(stop, p)
                            break
                    world.advance(stop - step, drive)
                    step = stop
                    if step != target and (step in due or step + 1 in due):
                        here = world.body_state()
                        if step + 1 in due:
                            before[step + 1] = here.point_velocity(mount)
                        if step in due:
                            truths[step] = self._imu_truth(here, mount, gravity,
                                                           before.get(step), dt)
                if target in due:
                    state = world.body_state()
                    prev = (world.previous_point_velocity(state, mount)
                            if coupled and target not in before else before.get(target))
                    truths[target] = self._imu_truth(state, mount, gravity, prev, dt)
        except ControllerError as err:
            status, message = STATUS_CONTROLLER_ERROR, str(err)
            if folder is not None:
                (folder / "controller_error.txt").write_text(
                    message + "\n\n" + "".join(traceback.format_exception(err)), encoding="utf-8")
        except KeyboardInterrupt:
            status, message = STATUS_INTERRUPTED, "interrupted (Ctrl-C)"
        finally:
            try:
                writer.close()
            finally:
                wall = time.perf_counter() - wall_start  # the loop itself, trace included
                world.close()
        trace = writer.arrays()
        summary = self._summary(status, trace, ticks_run, fell_at, clipped, wall, writer)
        if folder is not None:
            write_json(folder / "summary.json", summary)
        return RunResult(status=status, summary=summary, folder=folder, trace=trace,
                         message=message)

    @staticmethod
    def _imu_truth(state, mount, gravity, prev_mount_velocity, dt: float):
        """True gyro rate and specific force at the IMU (sensor axes = body axes).

        The acceleration is the mount point's velocity change over the last
        physics step, so an IMU high on the body feels the robot's own motion.
        """
        gx, gy, gz = gravity
        if prev_mount_velocity is None:
            force = (-gx, -gy, -gz)
        else:
            v = state.point_velocity(mount)
            p = prev_mount_velocity
            force = ((v[0] - p[0]) / dt - gx, (v[1] - p[1]) / dt - gy, (v[2] - p[2]) / dt - gz)
        return state.to_body(state.angular_velocity), state.to_body(force)

    def _summary(self, status, trace, ticks_run, fell_at, clipped, wall, writer) -> dict:
        s = self.settings
        duration = (ticks_run - 1) * self.period if ticks_run else 0.0
        figures = run_figures(trace)
        return {
            "status": status,
            "duration_s": duration,
            "fell_at_s": fell_at,
            **figures,
            "clipped_duties": int(clipped),
            "realtime_factor": duration / wall if wall > 0 else None,
            "seed": s.seed,
            "rate_hz": self.rate_hz,
            "physics_dt_s": s.physics_dt,
            "test": s.test_name,
            "dropped_log_channels": sorted(getattr(writer, "dropped_channels", ())),
        }


def _tick_sense(world: Any, gravity, dt: float, mount) -> tuple:
    """``World.tick_sense`` from a world's separate accessors (for worlds without it)."""
    state = world.body_state()
    angle_l, angle_r, _, _ = world.wheel_state()
    true_rate, true_force = Simulation._imu_truth(
        state, mount, gravity, world.previous_point_velocity(state, mount), dt)
    return (state.pitch, state.pitch_rate, state.yaw, world.forward_speed(state), state.com,
            state.com_orientation, angle_l, angle_r, true_rate, true_force)


def _failure(err: Exception, name: str, t: float, cls: type) -> ControllerError:
    """A controller method's exception as a ControllerError naming the time and the line."""
    if isinstance(err, ControllerError):
        return ControllerError(f"at t = {t:.3f} s: {err}")
    where = script_location(err, cls)
    at = f" ({where})" if where else ""
    return ControllerError(f"at t = {t:.3f} s: {failure_text(name + '()', err)}{at}")


def _call(method: Callable, name: str, t: float, cls: type, *args):
    """Call a controller method; anything it raises becomes a ControllerError naming t."""
    try:
        return method(*args)
    except BaseException as err:  # SystemExit too; the user's Ctrl-C goes on
        if is_user_interrupt(err):
            raise
        raise _failure(err, name, t, cls) from err


def file_hash(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def run_record(spec: RobotSpec, settings: RunSettings, rate_hz: float,
               extra: dict | None = None) -> dict[str, Any]:
    """The resolved run description for run.yaml: enough to repeat the run."""
    import scipy

    from .world import engine_version

    script = Path(settings.controller.split(".py:")[0] + ".py"
                  if ".py:" in settings.controller else settings.controller)
    record = {
        "robot": spec.to_si_dict(),
        "controller": {
            "path": str(script.resolve()),
            "class": settings.controller.split(".py:")[1] if ".py:" in settings.controller
            else "Controller",
            "sha256": file_hash(script) if script.is_file() else None,
            "config": settings.config,
        },
        "test": settings.test_name,
        "seed": settings.seed,
        "duration_s": settings.duration,
        "tilt_rad": settings.tilt,
        "physics_dt_s": settings.physics_dt,
        "rate_hz": rate_hz,
        "latency_s": settings.latency,
        "fall_limit_rad": settings.fall_limit,
        "versions": {
            "upright": __version__,
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "pybullet_api": engine_version(),
        },
    }
    if extra:
        record.update(extra)
    return record


def run(spec: RobotSpec, settings: RunSettings, folder: Path | None = None,
        ground: Ground | None = None, timeline: Any = None,
        extra_record: dict | None = None) -> RunResult:
    """Run a controller on a robot; write the run folder when ``folder`` is given."""
    sim = Simulation(spec, settings, ground=ground, timeline=timeline)
    if folder is not None:
        from .urdf import robot_urdf
        from .world import ground_record

        folder.mkdir(parents=True, exist_ok=True)
        extra = dict(extra_record or {})
        extra["ground"] = ground_record(ground or Ground(
            friction=spec.wheels.friction, rolling_resistance=spec.wheels.rolling_resistance))
        write_yaml(folder / "run.yaml", run_record(spec, replace(settings), sim.rate_hz, extra))
        write_yaml(folder / "robot.yaml", spec.to_si_dict())
        (folder / "robot.urdf").write_text(robot_urdf(spec), encoding="utf-8")
    return sim.run(folder)
