"""The trace's columns beyond DESIGN.md's: setpoint, motor voltage and torque, wheel rates,
duties before clipping, ``event``, and with backlash the play angles and motor-side counts.

Each check compares a recorded column with the relation it stands for, computed here from
other columns or read from the engine directly.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from ideal_parts import ideal_robot

from sandbox.events import resolve_test
from sandbox.record import DRIVE_COLUMNS, EVENT_COLUMN, PLAY_COLUMNS, read_trace
from sandbox.runner import RunSettings, Simulation
from sandbox.world import World, pb

ROOT = Path(__file__).resolve().parents[1]
CASCADE = ROOT / "controllers" / "cascade.py"


class EngineRecordingWorld(World):
    """The world, also reading each wheel joint's rate straight from the engine at every
    tick (``body_touching`` is asked once a tick, after the trace row is written)."""

    made: list[EngineRecordingWorld] = []

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.engine_rates: list[tuple[float, float]] = []
        EngineRecordingWorld.made.append(self)

    def body_touching(self, pitch: float, check_anyway: bool = False) -> bool:
        left, right = pb.getJointStates(self.robot_id, self.wheel_joints,
                                        physicsClientId=self.client)
        self.engine_rates.append((left[1], right[1]))
        return super().body_touching(pitch, check_anyway)


def simulate(spec, *, test: str | None = None, duration: float = 1.0, latency: float = 0.0,
             folder: Path | None = None, controller_class: type | None = None,
             world_factory=World):
    """One run (through a built-in test if named); (result, timeline)."""
    timeline = ground = None
    if test is not None:
        plan = resolve_test(test, spec)
        timeline, ground, spec = plan.timeline(), plan.ground(spec), plan.robot(spec)
    settings = RunSettings(controller=str(CASCADE), duration=duration, tilt=math.radians(2.0),
                           seed=3, latency=latency)
    sim = Simulation(spec, settings, ground=ground, timeline=timeline,
                     controller_class=controller_class, world_factory=world_factory)
    return sim.run(folder), timeline


@pytest.fixture(scope="module")
def push_run(tmp_path_factory):
    """shelf-runner, cascade, the built-in push test to just past its first push."""
    spec = ideal_robot("shelf-runner")
    folder = tmp_path_factory.mktemp("push")
    EngineRecordingWorld.made.clear()
    result, timeline = simulate(spec, test="push", duration=2.6, folder=folder,
                                world_factory=EngineRecordingWorld)
    (world,) = EngineRecordingWorld.made
    return spec, result, timeline, read_trace(folder / "trace.csv"), world


def test_new_columns_follow_the_pose_and_precede_the_log_channels(push_run):
    """The drive's columns and ``event`` come after the wheel angles, in their order, and
    before ``log.`` channels; no play columns without backlash."""
    _, result, _, trace, _ = push_run
    names = list(trace)
    start = names.index("wheel_r_rad") + 1
    assert names[start:start + len(DRIVE_COLUMNS) + 1] == [*DRIVE_COLUMNS, EVENT_COLUMN]
    assert names[start + len(DRIVE_COLUMNS) + 1].startswith("log.")
    assert not set(PLAY_COLUMNS) & set(names)
    assert list(result.trace) == names, "the run's own arrays have the file's columns"


def test_motor_voltage_is_duty_times_supply(push_run):
    """Sign-magnitude PWM: the motor's mean voltage is D·V_s, V_s the battery's terminal
    voltage less the bridge's drop (SOURCES §5 [published]). With no latency the bridge
    holds this tick's duty, rounded to the nearest of the 2**pwm_bits − 1 PWM steps: the
    recorded voltage is within half a step of duty × (battery − drop)."""
    spec, _, _, trace, _ = push_run
    supply = np.maximum(trace["battery_v"] - spec.driver.voltage_drop, 0.0)
    half_step = 0.5 / ((1 << spec.driver.pwm_bits) - 1)
    for side in "lr":
        volts, duty = trace[f"voltage_{side}_v"], trace[f"duty_{side}"]
        error = np.abs(volts - duty * supply)
        assert np.all(error <= half_step * supply + 1e-7), (
            f"{side} voltage off duty × supply by up to {error.max():.3g} V")
        assert np.max(np.abs(volts)) > 0.1, "the motors were driven"


def test_voltage_is_what_the_bridge_applies_after_the_latency():
    """With 10 ms of latency at 200 Hz the bridge applies the duty of two ticks before:
    voltage[k] = D[k − 2]·V_s[k] within half a PWM step (SOURCES §5 [published]), not
    this tick's duty."""
    spec = ideal_robot("shelf-runner")
    result, _ = simulate(spec, duration=0.6, latency=0.01)
    trace = result.trace
    supply = np.maximum(trace["battery_v"] - spec.driver.voltage_drop, 0.0)
    half_step = 0.5 / ((1 << spec.driver.pwm_bits) - 1)
    volts, duty = trace["voltage_l_v"], trace["duty_l"]
    delayed = np.abs(volts[2:] - duty[:-2] * supply[2:])
    assert np.all(delayed <= half_step * supply[2:] + 1e-7), f"{delayed.max():.3g} V"
    assert np.all(volts[:2] == 0.0), "nothing reached the bridge in the first two ticks"
    assert np.max(np.abs(volts[2:] - duty[2:] * supply[2:])) > 2 * half_step * supply.max(), (
        "the duty changes between ticks, so the undelayed relation must not hold")


def test_torque_is_kt_times_current_without_friction():
    """T = K_t·i, K_t at the output shaft = stall torque / stall current (SOURCES §5
    [published]): with the gearbox's friction set to zero the recorded torque of each
    side is K_t times the recorded current, to rounding."""
    spec = ideal_robot("shelf-runner", {"motors.friction_torque": 0.0})
    result, _ = simulate(spec, duration=0.6)
    kt = spec.motors.stall_torque / spec.motors.stall_current
    for side in "lr":
        np.testing.assert_allclose(result.trace[f"torque_{side}_n_m"],
                                   kt * result.trace[f"current_{side}_a"], rtol=1e-12,
                                   atol=1e-15, err_msg=f"{side} torque against K_t·i")
    assert np.max(np.abs(result.trace["torque_l_n_m"])) > 1e-3, "the motors gave torque"


def test_torque_is_kt_times_current_less_friction(push_run):
    """T = K_t·i (SOURCES §5 [published]) less the gearbox's Coulomb friction against the
    motion (SOURCES §3): on every tick the wheel turns clearly one way, the recorded torque
    differs from K_t·i by exactly the friction torque, against the rate."""
    spec, _, _, trace, _ = push_run
    kt = spec.motors.stall_torque / spec.motors.stall_current
    friction = spec.motors.friction_torque
    for side in "lr":
        rate = trace[f"wheel_rate_{side}_rad_s"]
        moving = np.abs(rate) > 0.5  # rad/s: the rate cannot change sign within one step
        assert moving.sum() > 50, "enough ticks with the wheel turning"
        difference = trace[f"torque_{side}_n_m"] - kt * trace[f"current_{side}_a"]
        np.testing.assert_allclose(difference[moving], -friction * np.sign(rate[moving]),
                                   rtol=1e-6, atol=1e-9, err_msg=f"{side} friction")


def test_wheel_rate_is_the_engines_joint_rate(push_run):
    """Each side's wheel rate is the engine's joint rate at the tick, read here from the
    engine directly; and it agrees with rolling without slipping, ω_wheel − ω_body =
    v / r − pitch rate (rigid-body kinematics), averaged over both wheels."""
    spec, result, _, _, world = push_run
    trace = result.trace  # full float64: the engine's numbers exactly
    engine = np.array(world.engine_rates)
    assert engine.shape == (trace["t_s"].size, 2)
    np.testing.assert_array_equal(trace["wheel_rate_l_rad_s"], engine[:, 0])
    np.testing.assert_array_equal(trace["wheel_rate_r_rad_s"], engine[:, 1])
    mean = 0.5 * (trace["wheel_rate_l_rad_s"] + trace["wheel_rate_r_rad_s"])
    rolling = trace["speed_m_s"] / spec.wheels.radius - trace["pitch_rate_rad_s"]
    scale = np.max(np.abs(rolling))
    assert scale > 0.5, "the wheels turned"
    assert np.max(np.abs(mean - rolling)) < 0.05 * scale, "rolling without slip (rad/s)"


def test_event_names_the_push_on_the_tick_it_fires(push_run):
    """``event`` is empty except on the tick each disturbance fires, where it holds the
    disturbance's name as the test's marks give it; the body's pitch rate jumps on the
    next tick (an impulse J at height h changes the angular momentum by J·h)."""
    _, _, timeline, trace, _ = push_run
    fired = np.nonzero(trace["event"] != "")[0]
    assert len(timeline.marks) == fired.size >= 1
    for row, (t, label) in zip(fired, timeline.marks):
        assert trace["t_s"][row] == pytest.approx(t, abs=1e-9)
        assert trace["event"][row] == label and label.startswith("push")
    row = fired[0]
    before = abs(trace["pitch_rate_rad_s"][row])
    jump = abs(trace["pitch_rate_rad_s"][row + 1] - trace["pitch_rate_rad_s"][row])
    assert jump > 0.1 and jump > 3 * before, "the push acted from the tick it is named on"


def test_setpoint_follows_the_drive_test(tmp_path):
    """The setpoint columns hold the drive test's timeline: each row the speed and turn of
    the last setpoint event at or before it (zero before the first), and ``event`` names
    each change on its tick (its comma kept inside the CSV cell)."""
    spec = ideal_robot("shelf-runner")
    plan = resolve_test("drive", spec)
    result, timeline = simulate(spec, test="drive", duration=5.5, folder=tmp_path)
    trace = read_trace(tmp_path / "trace.csv")
    t = trace["t_s"]
    speed, turn = np.zeros_like(t), np.zeros_like(t)
    for event in plan.events:
        if event.setpoint is not None:
            speed[t >= event.at - 1e-9] = event.setpoint.speed
            turn[t >= event.at - 1e-9] = event.setpoint.turn
    assert result.status == "completed"
    assert np.ptp(speed) > 0 and np.ptp(turn) > 0, "the profile goes and turns by 5.5 s"
    np.testing.assert_allclose(trace["setpoint_speed_m_s"], speed, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(trace["setpoint_turn_rad_s"], turn, rtol=1e-8, atol=1e-12)
    named = [(float(t[i]), str(trace["event"][i])) for i in np.nonzero(trace["event"] != "")[0]]
    assert named == [(pytest.approx(m[0], abs=1e-9), m[1]) for m in timeline.marks]
    assert all("," in text for _, text in named), "labels with a comma read back whole"


class Overdriving:
    """Returns duties out of [-1, 1] on some ticks, of types a script may return."""

    rate_hz = 200
    OUT = [(0.25, -0.5), (1.75, -3.0), (np.float64(-1.5), 2), (0.5, np.float32(0.125))]

    def __init__(self, config, robot):
        self.tick = 0

    def step(self, r):
        out = self.OUT[self.tick % len(self.OUT)]
        self.tick += 1
        return out


def test_duty_raw_is_what_the_controller_returned():
    """``duty_raw_*`` is the duty as ``step`` returned it; ``duty_*`` the same clipped to
    [-1, 1] (the run's contract, DESIGN.md)."""
    spec = ideal_robot("shelf-runner")
    result, _ = simulate(spec, duration=0.1, controller_class=Overdriving)
    trace = result.trace
    n = trace["t_s"].size
    returned = np.array([[float(v) for v in Overdriving.OUT[k % 4]] for k in range(n)])
    np.testing.assert_array_equal(trace["duty_raw_l"], returned[:, 0])
    np.testing.assert_array_equal(trace["duty_raw_r"], returned[:, 1])
    np.testing.assert_array_equal(trace["duty_l"], np.clip(returned[:, 0], -1, 1))
    np.testing.assert_array_equal(trace["duty_r"], np.clip(returned[:, 1], -1, 1))
    assert result.summary["clipped_duties"] == sum(
        1 for k in range(n) if np.any(np.abs(returned[k]) > 1))


# ------------------------------------------------------------------ backlash


@pytest.fixture(scope="module")
def backlash_run():
    """shelf-runner with 1.5° of gearbox play (SOURCES §11, small plastic gearboxes
    [common practice]), encoders on the motor shafts, the cascade for 2 s."""
    spec = ideal_robot("shelf-runner", {"motors.backlash": "1.5 deg"})
    EngineRecordingWorld.made.clear()
    result, _ = simulate(spec, duration=2.0, world_factory=EngineRecordingWorld)
    (world,) = EngineRecordingWorld.made
    return spec, result, world._gearbox.design


def test_play_stays_within_half_the_play(backlash_run):
    """Dead-zone backlash (Nordin & Gutman, Automatica 38(10), 2002; SOURCES §11
    [published]): the motor side moves freely within ±b/2 of its wheel and presses on the
    contact beyond it. The contact is a spring k with damping ratio ζ (as the world sized
    it), so past b/2 it gives at most the largest torque the motor has, its stall torque,
    over k, times 1 + exp(−πζ/√(1−ζ²)) for the overshoot of a damped second-order system's
    step response (standard). The play is used, too: both sides cross most of the gap as
    the controller reverses."""
    spec, result, contact = backlash_run
    assert result.status == "completed", result.message
    b = spec.motors.backlash
    zeta = contact.damping / (2.0 * math.sqrt(contact.stiffness * 1.0 / (
        1.0 / contact.motor_inertia + contact.wheel_mobility)))
    overshoot = 1.0 + math.exp(-math.pi * zeta / math.sqrt(1.0 - zeta * zeta))
    deflection = overshoot * spec.motors.stall_torque / contact.stiffness
    assert deflection < 0.5 * b, "a stiff contact: its give is smaller than the gap"
    for side in "lr":
        play = result.trace[f"play_{side}_rad"]
        assert np.max(np.abs(play)) <= 0.5 * b + deflection, (
            f"{side} play {math.degrees(np.max(np.abs(play))):.3f} deg against "
            f"{math.degrees(0.5 * b + deflection):.3f} deg")
        assert np.ptp(play) > 0.5 * b, f"{side} play crossed the gap"
        assert np.mean(np.abs(play) <= 0.5 * b) > 0.5, f"{side}: mostly within the gap"


def test_motor_shaft_encoders_count_the_motor_side(backlash_run):
    """An encoder on the motor shaft counts floor(ψ·N·G / 2π) for the motor side's angle
    ψ at the output (wheel angle plus play), N counts per motor turn, G the gear ratio
    (quadrature counting [common practice]): its count includes the play, so it differs
    from the wheel's own count when the play is open."""
    spec, result, _ = backlash_run
    trace = result.trace
    per_radian = spec.encoders.counts_per_rev * spec.motors.gear_ratio / (2 * math.pi)
    for side in "lr":
        motor = (trace[f"wheel_{side}_rad"] + trace[f"play_{side}_rad"]) * per_radian
        off_edge = np.abs(motor - np.rint(motor)) > 1e-6  # away from a count's edge
        np.testing.assert_array_equal(trace[f"ticks_{side}"][off_edge],
                                      np.floor(motor[off_edge]), err_msg=side)
        wheel_count = np.floor(trace[f"wheel_{side}_rad"] * per_radian)
        assert np.any(trace[f"ticks_{side}"] != wheel_count), "the play shows in the count"


def test_wheel_shaft_encoders_count_the_wheel():
    """An encoder on the gearbox's output counts floor(θ·N / 2π) of the wheel's angle θ
    (N counts per wheel turn [common practice]), whatever the play."""
    spec = ideal_robot("shelf-runner", {"motors.backlash": "1.5 deg", "encoders.shaft": "wheel"})
    result, _ = simulate(spec, duration=0.5)
    trace = result.trace
    per_radian = spec.encoders.counts_per_rev / (2 * math.pi)
    assert np.ptp(trace["play_l_rad"]) > 0, "the play moved"
    for side in "lr":
        wheel = trace[f"wheel_{side}_rad"] * per_radian
        off_edge = np.abs(wheel - np.rint(wheel)) > 1e-6
        np.testing.assert_array_equal(trace[f"ticks_{side}"][off_edge],
                                      np.floor(wheel[off_edge]), err_msg=side)
