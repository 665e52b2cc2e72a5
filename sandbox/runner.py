"""The run: world, actuators, IMU, controller, events and recorder on one schedule.

Each physics step (in :meth:`World.advance`): read the wheel rates, step the
motors and battery, apply the torques, step the engine. Each controller tick:
fire the events due, read the true state, hand the controller the IMU sample
and encoder counts the board would have now, send its duties towards the
bridge, write one trace row. Between ticks the world advances from one due
moment to the next (:mod:`sandbox.schedule`).
"""

from __future__ import annotations

import hashlib
import math
import os
import platform
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from .actuators import DriveTrain
from .contract import ControllerError, Reading, RobotFacts, Setpoint
from .duties import check_duties
from .ground import Ground
from .imu import Encoders, Imu
from .interrupts import deferred, exits_raise, is_user_interrupt
from .isolate import IsolatedController, build_controller, start_isolated
from .metrics import run_figures
from .rates import nearby_rates
from .record import PLAY_COLUMNS, RUN_COLUMNS, TraceWriter, write_json, write_yaml
from .robot import RobotSpec
from .schedule import DutyLine, ImuSamples, TickClock, imu_truth
from .scripts import (
    controller_rate,
    failure_error,
    load_controller_class,
    tracked_config,
    unread_key_text,
    unread_keys,
)
from .world import World

_STILL = Setpoint()  # the setpoint of a run without a test: stand still

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
            f"{nearby_rates(physics_dt, rate_hz)}"
        )
    return steps


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
        board = getattr(spec, "board", None)
        self.loop_jitter = float(getattr(board, "loop_jitter", 0.0) or 0.0)
        self.compute_time = float(getattr(board, "compute_time", 0.0) or 0.0)
        # the board's compute time and the added latency both delay the duties
        self.latency_steps = round((self.compute_time + settings.latency) / settings.physics_dt)
        self.robot_facts = RobotFacts.from_spec(spec, self.rate_hz, settings.physics_dt)
        self.controller_class = cls
        self.ground = ground
        self.timeline = timeline
        self.world_factory = world_factory  # tests pass a fake world here

    def run(self, folder: Path | None) -> RunResult:
        """Run to the end, a fall, a controller failure or Ctrl-C; the trace is always kept."""
        s = self.settings
        if folder is not None:
            folder.mkdir(parents=True, exist_ok=True)
        interrupted = False
        try:
            # a Ctrl-C during the set-up waits for it to be whole, so the run can end
            # as interrupted with its summary and (empty) trace like any other
            with deferred():
                # an isolated controller's process loads the script meanwhile
                started = (start_isolated(self.controller_class, s, self.robot_facts)
                           if s.isolate else None)
                try:
                    world, writer = self._world_and_writer(folder)
                except BaseException:
                    if started is not None:
                        started.close()
                    raise
                try:
                    with exits_raise():
                        loop = _Loop(self, world, writer)
                except BaseException:
                    if started is not None:
                        started.close()
                    world.close()
                    writer.close()
                    raise
                loop.started = started
        except KeyboardInterrupt:
            interrupted = True
        wall_start = time.perf_counter()
        try:
            if interrupted:
                raise KeyboardInterrupt
            with exits_raise():
                loop.run()
        except ControllerError as err:
            loop.status, loop.message = STATUS_CONTROLLER_ERROR, str(err)
            if folder is not None:
                (folder / "controller_error.txt").write_text(
                    loop.message + "\n\n" + "".join(traceback.format_exception(err)),
                    encoding="utf-8")
        except KeyboardInterrupt:
            loop.status, loop.message = STATUS_INTERRUPTED, "interrupted (Ctrl-C)"
            loop.keep_pending_row()
        finally:
            isolated = loop.controller or loop.started
            if isinstance(isolated, IsolatedController):
                if s.config and loop.controller is not None:
                    loop.config_reads = isolated.config_reads()
                isolated.close()  # its process and scratch folder
            try:
                writer.close()
            finally:
                wall = time.perf_counter() - wall_start  # the loop itself, trace included
                world.close()
        trace = writer.arrays()
        summary = self._summary(loop, trace, wall, writer)
        if folder is not None:
            write_json(folder / "summary.json", summary)
        return RunResult(status=loop.status, summary=summary, folder=folder, trace=trace,
                         message=loop.message)

    def _world_and_writer(self, folder: Path | None) -> tuple[Any, TraceWriter]:
        s = self.settings
        world = self.world_factory(self.spec, physics_dt=s.physics_dt, tilt=s.tilt,
                                   ground=self.ground)
        try:
            # without a folder the trace is kept in memory only (sweeps need the figures)
            writer = TraceWriter(folder / "trace.csv" if folder is not None else None,
                                 block_rows=50 if folder is not None else 2000,
                                 columns=trace_columns(_has_backlash(world)))
        except OSError:
            world.close()
            raise
        return world, writer

    def _summary(self, loop: _Loop, trace, wall, writer) -> dict:
        s = self.settings
        duration = loop.clock.time_of(loop.ticks_run - 1) if loop.ticks_run else 0.0
        figures = run_figures(trace)
        summary = {
            "status": loop.status,
            "duration_s": duration,
            "fell_at_s": loop.fell_at,
            **figures,
            "clipped_duties": int(loop.clipped),
            "realtime_factor": duration / wall if wall > 0 else None,
            "seed": s.seed,
            "rate_hz": self.rate_hz,
            "physics_dt_s": s.physics_dt,
            "test": s.test_name,
            "dropped_log_channels": sorted(getattr(writer, "dropped_channels", ())),
        }
        if s.config and loop.controller is not None:
            reads = (loop.config_reads if isinstance(loop.controller, IsolatedController)
                     else tracked_config(loop.controller))
            unread = unread_keys(reads, s.config)
            summary["unread_config_keys"] = [
                {"key": key, "did_you_mean": near,
                 "text": unread_key_text(key, near, s.controller)} for key, near in unread]
        if loop.clock.jittered:
            intervals = loop.clock.intervals()[: max(loop.ticks_run - 1, 0)]
            summary["tick_interval_std_s"] = float(intervals.std()) if intervals.size else 0.0
        return summary


class _Loop:
    """The run's loop: a schedule of due moments on the physics-step clock.

    At each controller tick the events due fire, the true state is read, the
    IMU sample and encoder counts the board would have go to the controller,
    its duties leave for the bridge and a trace row is written. Between two
    ticks the world advances from one due moment to the next: a duty reaching
    the bridge (after the board's compute time and any added latency), an IMU
    sample to be read. The clock (:class:`TickClock`), the duty line
    (:class:`DutyLine`) and the IMU's samples (:class:`ImuSamples`) each own
    their state and say what is due next.
    """

    def __init__(self, sim: Simulation, world: Any, writer: Any):
        spec, s = sim.spec, sim.settings
        self.sim, self.world, self.writer = sim, world, writer
        self.dt = s.physics_dt
        self.n_ticks = int(round(s.duration * sim.rate_hz))
        self.clock = TickClock(sim.steps_per_tick, s.physics_dt, self.n_ticks,
                               sim.loop_jitter, s.seed)
        self.duties = DutyLine(sim.latency_steps)
        self.drive = DriveTrain(spec)
        self.imu = Imu(spec.imu, seed=s.seed)
        self.encoders = Encoders.from_spec(spec)
        self.mount = tuple(float(v) for v in spec.imu.at)
        gravity = world.gravity_vector()
        coupled = world.reflected_inertia > 0.0  # the world then reads the body every step
        self.samples = ImuSamples(self.imu, spec.imu.rate, s.physics_dt, spec.imu.latency,
                                  self.mount, gravity, coupled)
        self.sense = (getattr(world, "tick_sense", None)
                      or partial(_tick_sense, world, gravity, s.physics_dt))
        self.reading = Reading(dt=sim.period)
        self.timeline = sim.timeline
        self.voltage_drop = float(spec.driver.voltage_drop)
        # with backlash the play is recorded, and an encoder on the motor shaft counts
        # the motor side (its count includes the play)
        self.backlash = _has_backlash(world)
        self.motor_encoders = self.backlash and self.encoders.shaft == "motor"
        self.status, self.message, self.fell_at = STATUS_COMPLETED, "", None
        self.clipped = 0
        self.pid = os.getpid()  # the run's process (a script may fork)
        self.config_reads = None  # an isolated controller's config reads, asked at the end
        self.ticks_run = 0
        self.step = 0
        # An isolated controller whose duties the board's compute time delays answers
        # while the world advances to their arrival: the tick posts the reading, and the
        # reply (and the tick's trace row) is taken just before the duties are due.
        self.pipelined = False
        self.pending: tuple | None = None  # (arrival step, t, tick step, tick, row parts)
        self.x = 0.0  # distance travelled along the heading (m), trapezoidal from the speed
        self.last_speed = 0.0
        self.controller: Any = None
        self.started: IsolatedController | None = None  # an isolated controller's process

    def run(self) -> None:
        sim = self.sim
        self.controller = build_controller(sim.controller_class, sim.settings, sim.robot_facts,
                                           self.started)
        self.pipelined = (isinstance(self.controller, IsolatedController)
                          and self.duties.delay_steps > 0)
        if hasattr(self.controller, "reset"):
            _call(self.controller.reset, "reset", 0.0, sim.controller_class)
        for tick in range(self.n_ticks + 1):
            if self.tick(tick) or tick == self.n_ticks:
                break
            self.advance_to(self.clock.step_of(tick + 1))
        if self.pending is not None:
            self.collect()

    def tick(self, tick: int) -> bool:
        """One controller tick at the present step; True if the robot fell."""
        t = self.clock.time_of(tick)
        event = self.fire(t) if self.timeline is not None else ""
        (pitch, pitch_rate, yaw, speed, pose, q, angle_l, angle_r, true_rate,
         true_force) = self.sense(self.mount)
        truth, elapsed = self.samples.seen(self.step, tick == 0, (true_rate, true_force))
        gyro, accel = self.imu.read(truth[0], truth[1], elapsed)
        if self.backlash:
            motor_l, motor_r = self.world.motor_angles()
            play = (motor_l - angle_l, motor_r - angle_r)
            ticks_lr = (self.encoders.ticks(motor_l, motor_r) if self.motor_encoders
                        else self.encoders.ticks(angle_l, angle_r))
        else:
            ticks_lr = self.encoders.ticks(angle_l, angle_r)
        if tick:
            self.x += 0.5 * (speed + self.last_speed) * (t - self.clock.time_of(tick - 1)
                                                         if self.clock.jittered else
                                                         self.sim.period)
        self.last_speed = speed
        if self.pending is not None:  # the last tick's reply, when it is due no earlier
            self.collect()
        if self.pipelined:
            self.post(t, tick, gyro, accel, ticks_lr)
        else:
            left, right, raw_l, raw_r = self.control(t, tick, gyro, accel, ticks_lr)
        drive = self.drive
        # the duties due at the bridge now (as the world's next step would take them):
        # the voltage column is what the bridge applies from this tick on
        self.duties.deliver(self.step, drive)
        supply = drive.battery_voltage - self.voltage_drop
        if supply < 0.0:
            supply = 0.0
        torque_l, torque_r = drive.last_torques
        _, _, rate_l, rate_r = self.world.wheel_state()
        setpoint = self.timeline.setpoint if self.timeline is not None else _STILL
        # the row around the controller's duties (columns 7-8 and 37-38)
        before = (t, self.x, pitch, pitch_rate, yaw, speed)
        between = (
            drive.current_left, drive.current_right, drive.battery_voltage,
            gyro[0], gyro[1], gyro[2], accel[0], accel[1], accel[2], ticks_lr[0], ticks_lr[1],
            pose[0], pose[1], pose[2], q[0], q[1], q[2], q[3], angle_l, angle_r,
            setpoint.speed, setpoint.turn, drive.duty_left * supply, drive.duty_right * supply,
            torque_l, torque_r, rate_l, rate_r,
        )
        after = (event,) + play if self.backlash else (event,)
        if self.pipelined:
            self.pending = (self.step + self.duties.delay_steps, t, self.step, tick,
                            before, between, after)
        else:
            self.writer.add(before + (left, right) + between + (raw_l, raw_r) + after,
                            self.reading.take_logs())
        self.ticks_run = tick + 1
        if abs(pitch) > self.sim.settings.fall_limit or self.world.body_touching(
                pitch, tick % 20 == 0):
            if self.pending is not None:
                self.collect()
            self.status, self.fell_at = STATUS_FELL, t
            self.message = f"fell at t = {t:.3f} s (pitch {math.degrees(pitch):.1f} deg)"
            return True
        return False

    def fire(self, t: float) -> str:
        """Fire the test's events due now; the names of those that fired ("" if none)."""
        marks = getattr(self.timeline, "marks", None)
        before = len(marks) if marks is not None else 0
        self.timeline.fire(t, self.x, self.world, self.drive, self.imu, self.encoders)
        if marks is None or len(marks) == before:
            return ""
        return "; ".join(str(label) for _, label in marks[before:])

    def control(self, t: float, tick: int, gyro, accel,
                ticks_lr) -> tuple[float, float, float, float]:
        """Hand the controller this tick's reading; send its duties towards the bridge.

        Returns the duties (clipped to [-1, 1]) and the duties as returned (before clipping).
        """
        r = self.fill_reading(t, tick, gyro, accel, ticks_lr)
        try:
            out = self.controller.step(r)
        except BaseException as err:  # SystemExit too; the user's Ctrl-C goes on
            if os.getpid() != self.pid:
                os._exit(0)
            if is_user_interrupt(err):
                raise
            raise _failure(err, "step", t, self.sim.controller_class) from err
        if os.getpid() != self.pid:  # a copy the script forked: only the run may go on
            os._exit(0)
        left, right, raw_l, raw_r = self.checked(out, t)
        self.duties.send(self.step, left, right)
        return left, right, raw_l, raw_r

    def checked(self, out: Any, t: float) -> tuple[float, float, float, float]:
        """What ``step`` returned as duties clipped to [-1, 1] and as returned."""
        try:
            left, right, was_clipped = check_duties(out)
        except Exception as err:  # a returned object whose iteration raises, too
            raise _failure(err, "step", t, self.sim.controller_class) from None
        raw_l, raw_r = left, right
        if was_clipped:
            self.clipped += 1
            raw_l, raw_r = _returned_duties(out, left, right)
        return left, right, raw_l, raw_r

    def fill_reading(self, t: float, tick: int, gyro, accel, ticks_lr) -> Reading:
        """This tick's reading, in the one Reading the run hands its controller."""
        r = self.reading
        r.t, r.gyro, r.accel, r.ticks = t, gyro, accel, ticks_lr
        if self.clock.jittered:
            r.dt = self.clock.interval(tick)
        r.battery_v = self.drive.battery_voltage
        if self.timeline is not None:
            r.setpoint = self.timeline.setpoint
        return r

    def post(self, t: float, tick: int, gyro, accel, ticks_lr) -> None:
        """:meth:`control`'s first half for an isolated controller: the reading sent."""
        self.controller.post(self.fill_reading(t, tick, gyro, accel, ticks_lr))

    def keep_pending_row(self) -> None:
        """After a Ctrl-C: the posted tick's row, if its reply still comes (else it is
        dropped, as a tick cut short in-process would be)."""
        if self.pending is None:
            return
        try:
            with deferred():
                self.collect()
        except (ControllerError, KeyboardInterrupt):
            self.pending = None

    def collect(self) -> None:
        """The posted tick's duties sent towards the bridge, and its trace row written."""
        _, t, tick_step, tick, before, between, after = self.pending
        self.pending = None
        try:
            out = self.controller.collect(self.reading)
            left, right, raw_l, raw_r = self.checked(out, t)
        except BaseException as err:
            self.ticks_run = tick  # as in-process: a tick whose step failed is not run
            if is_user_interrupt(err) or isinstance(err, ControllerError):
                raise
            raise _failure(err, "step", t, self.sim.controller_class) from err
        self.duties.send(tick_step, left, right)
        self.writer.add(before + (left, right) + between + (raw_l, raw_r) + after,
                        self.reading.take_logs())

    def advance_to(self, target: int) -> None:
        """Advance the world to the step of the next tick, stopping where something is due."""
        world, drive, samples = self.world, self.drive, self.samples
        next_duties, advance = self.duties.deliver_then_next, world.advance
        reached = samples.reached
        step = self.step
        stops = samples.plan(step, target, world)  # ascending, within (step, target)
        take_step = samples.take_step  # read by the world at each step, or None
        if take_step is not None:
            advance = partial(advance, take_step=take_step)
        stop_index, stop_count = 0, len(stops)
        while step < target:
            if self.pending is not None and step >= self.pending[0]:
                self.collect()  # its duties are due at the bridge now
            stop = next_duties(step, drive, target)
            if self.pending is not None and self.pending[0] < stop:
                stop = self.pending[0]
            while stop_index < stop_count and stops[stop_index] <= step:
                stop_index += 1
            if stop_index < stop_count and stops[stop_index] < stop:
                stop = stops[stop_index]
            advance(stop - step, drive)
            step = stop
            reached(step, target, world)
        samples.end_period(target, world)
        self.step = step


def _returned_duties(out: Any, left: float, right: float) -> tuple[float, float]:
    """The duties as ``step`` returned them, before clipping (checked finite numbers); the
    clipped ones if what it returned cannot be read twice (an iterator)."""
    try:
        return float(out[0]), float(out[1])
    except (TypeError, ValueError, IndexError, KeyError):
        return left, right


def trace_columns(backlash: bool) -> tuple[str, ...]:
    """A run's fixed trace columns: DESIGN.md's, the pose, the drive's columns, ``event``;
    with backlash the play angles follow ``event``."""
    return RUN_COLUMNS + PLAY_COLUMNS if backlash else RUN_COLUMNS


def _has_backlash(world: Any) -> bool:
    """Whether the world models gearbox play (a test's fake world may not know of it)."""
    return float(getattr(world, "backlash", 0.0) or 0.0) > 0.0


def _tick_sense(world: Any, gravity, dt: float, mount) -> tuple:
    """``World.tick_sense`` from a world's separate accessors (for worlds without it)."""
    state = world.body_state()
    angle_l, angle_r, _, _ = world.wheel_state()
    true_rate, true_force = imu_truth(
        state, mount, gravity, world.previous_point_velocity(state, mount), dt)
    return (state.pitch, state.pitch_rate, state.yaw, world.forward_speed(state), state.com,
            state.com_orientation, angle_l, angle_r, true_rate, true_force)


def _failure(err: BaseException, name: str, t: float, cls: type) -> ControllerError:
    """A controller method's exception as a ControllerError naming the time and the line."""
    return failure_error(err, name + "()", cls, f"at t = {t:.3f} s")


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
        extra_record: dict | None = None,
        world_factory: Callable[..., Any] = World) -> RunResult:
    """Run a controller on a robot; write the run folder when ``folder`` is given.
    ``world_factory`` makes the world (a sweep's worker reuses its worlds; ``sandbox.watch``
    passes one with a window)."""
    sim = Simulation(spec, settings, ground=ground, timeline=timeline,
                     world_factory=world_factory)
    if folder is not None:
        from .ground import ground_record
        from .urdf import robot_urdf

        folder.mkdir(parents=True, exist_ok=True)
        extra = dict(extra_record or {})
        extra["ground"] = ground_record(ground or Ground(
            friction=spec.wheels.friction, rolling_resistance=spec.wheels.rolling_resistance))
        write_yaml(folder / "run.yaml", run_record(spec, replace(settings), sim.rate_hz, extra))
        write_yaml(folder / "robot.yaml", spec.to_si_dict())
        (folder / "robot.urdf").write_text(robot_urdf(spec), encoding="utf-8")
    return sim.run(folder)
