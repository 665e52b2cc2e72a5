"""sandbox.gearbox and its use in the world: the rotor's cross term without a lag, backlash."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import scipy.integrate
from ideal_parts import ideal_robot

from sandbox.actuators import DriveTrain
from sandbox.analysis import PlanarParams, duty_input_model, torque_input_model
from sandbox.gearbox import Backlash, ContactDesign, CouplingGains, contact_torque
from sandbox.identify import Excitation, identification_spec, record_run
from sandbox.robot import RobotFileError
from sandbox.runner import RunSettings, run
from sandbox.world import World

ROBOTS = Path(__file__).resolve().parents[1] / "robots"
CONTROLLERS = Path(__file__).resolve().parents[1] / "controllers"
ROBOT_NAMES = sorted(p.stem for p in ROBOTS.glob("*.yaml"))


def robot(name: str, overrides: dict | None = None):
    return ideal_robot(name, overrides)  # physics checks: ideal parts


# ------------------------------------------------------------------ rotor coupling


@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_coupling_gains_are_the_planar_models_torque_column(name):
    """The per-torque accelerations the world predicts with are B of the torque-input
    planar model (SOURCES §1 with the reflected rotor inertia terms [derived]): pitch
    acceleration B[3], and the two wheels' absolute accelerations 2·B[1]/r."""
    params = PlanarParams.from_spec(robot(name))
    gains = CouplingGains.from_params(params)
    _, B = torque_input_model(params)
    assert gains.pitch == pytest.approx(B[3, 0], rel=1e-12), "pitch acceleration per N·m"
    assert gains.wheels == pytest.approx(2 * B[1, 0] / params.wheel_radius, rel=1e-12)
    # from rest with no gravity torque, the same thing
    pitch, wheels = gains.accelerations(0.1, 0.0)
    assert pitch == pytest.approx(0.1 * B[3, 0], rel=1e-12)
    assert wheels == pytest.approx(0.2 * B[1, 0] / params.wheel_radius, rel=1e-12)


def duty_step_response(spec, physics_dt: float, period: float = 0.005, duty: float = 0.2):
    """(engine, model) state change one controller period after a duty step from balance.

    The engine runs the robot under identification conditions (sandbox.identify); the
    model is the planar duty-input model of SOURCES §1 and §5, integrated with
    scipy.integrate.solve_ivp at the duty the bridge actually drove (scaled to nominal
    voltage, as B is defined)."""
    plain = identification_spec(spec)
    steps = int(round(period / physics_dt))
    states, inputs = record_run(plain, 0.0, np.full(steps, duty), Excitation(physics_dt=physics_dt))
    A, B = duty_input_model(PlanarParams.from_spec(plain))
    applied = float(np.mean(inputs))
    solution = scipy.integrate.solve_ivp(lambda t, s: A @ s + B[:, 0] * applied, (0.0, period),
                                         np.zeros(4), rtol=1e-10, atol=1e-13)
    return states[-1] - states[0], solution.y[:, -1]


@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_duty_step_response_matches_the_planar_model_at_1_ms(name):
    """One 5 ms controller period after a duty step, the engine's pitch rate and forward
    speed agree with the linearised planar Lagrange model (SOURCES §1, rotor terms
    [derived]; DC motor §5 [published]) integrated by scipy, within 2 % at a 1 ms step
    (measured: 1.0 % desk-mite, 0.5 % shelf-runner, 0.6 % tall-mast; 7-10 % before the
    cross term was predicted)."""
    engine, model = duty_step_response(robot(name), 1e-3)
    assert engine[3] == pytest.approx(model[3], rel=0.02), "pitch rate after 5 ms (rad/s)"
    assert engine[1] == pytest.approx(model[1], rel=0.02), "forward speed after 5 ms (m/s)"


def test_duty_step_without_rotor_is_unchanged_by_the_coupling():
    """With no rotor inertia the world applies no cross term, so the response is the
    engine's own and still agrees with the planar model (SOURCES §1) within 2 %."""
    engine, model = duty_step_response(robot("shelf-runner", {"motors.rotor_inertia": 0.0}), 1e-3)
    assert engine[3] == pytest.approx(model[3], rel=0.02), "pitch rate after 5 ms (rad/s)"


# ------------------------------------------------------------------ backlash, no engine

# invented figures of a small gearbox (demo data): 2.0e-8 kg·m² rotor through 50:1
J_DEMO = 2.0e-8 * 50**2
PLAY = math.radians(1.5)


def held_wheel_run(torque: float, dt: float, steps: int, play: float = PLAY):
    """Motor side starting at rest against the back flank (play angle −b/2), constant
    motor torque, wheel held at angle 0: (times, motor angles, contact torques) per step."""
    design = ContactDesign.for_step(play, J_DEMO, 1.0 / 2.0e-6, dt)
    gear = Backlash(design, dt)
    gear.start((0.0, 0.0), (0.0, 0.0))
    gear.motor_angle[0] = -0.5 * play
    times, angles, torques = [], [], []
    for k in range(steps):
        contact, _ = gear.step((torque, 0.0), (0.0, 0.0), (0.0, 0.0))
        times.append((k + 1) * dt)
        angles.append(gear.motor_angle[0])
        torques.append(contact)
    return np.array(times), np.array(angles), np.array(torques)


def test_contact_torque_is_zero_inside_the_play_and_only_pushes():
    """Dead-zone law (Nordin & Gutman, Automatica 38(10), 2002 [published]): no torque
    for |play angle| < b/2; beyond, k·overlap + c·rate, never pulling."""
    half, k, c = 0.01, 50.0, 0.1
    assert contact_torque(0.0099, 5.0, half, k, c) == 0.0
    assert contact_torque(-0.0099, -5.0, half, k, c) == 0.0
    assert contact_torque(0.011, 0.0, half, k, c) == pytest.approx(50.0 * 0.001)
    assert contact_torque(-0.011, -0.2, half, k, c) == pytest.approx(-50.0 * 0.001 - 0.02)
    assert contact_torque(0.0101, -10.0, half, k, c) == 0.0, "separating teeth do not pull"


def test_held_wheel_sees_no_torque_until_the_motor_side_has_turned_through_the_play():
    """With the wheel held, the motor side turns freely through exactly the play b before
    any torque reaches the wheel (definition of backlash, SOURCES §11 [published]): zero
    torque while its travel is below b, torque in the step its travel passes b."""
    times, angles, torques = held_wheel_run(0.02, 1e-3, 40)
    travel = angles + 0.5 * PLAY
    first = int(np.argmax(torques != 0.0))
    assert torques[first] > 0.0, "the motor pushes the wheel forward"
    assert np.all(torques[:first] == 0.0) and np.all(travel[:first] < PLAY)
    step_travel = travel[first] - travel[first - 1]
    assert travel[first - 1] < PLAY <= travel[first - 1] + step_travel, "travel b at contact (rad)"
    # free flight before contact is constant acceleration from rest: θ = ½ (τ/J) t²
    np.testing.assert_allclose(travel[:first], 0.5 * 0.02 / J_DEMO * times[:first] ** 2,
                               rtol=1e-9, err_msg="free travel (rad)")


@pytest.mark.parametrize("torque", [0.005, 0.02, 0.06])
def test_gap_is_crossed_in_the_time_of_constant_acceleration(torque):
    """Constant torque τ on the motor-side inertia J crosses the gap b in √(2 b J / τ)
    (constant-acceleration kinematics, SOURCES §11 [derived]), within 2 %: the first
    contact torque appears at that time (10 µs steps)."""
    expected = math.sqrt(2 * PLAY * J_DEMO / torque)
    dt = 1e-5
    times, _, torques = held_wheel_run(torque, dt, int(1.5 * expected / dt))
    crossed = times[int(np.argmax(torques != 0.0))]
    assert crossed == pytest.approx(expected, rel=0.02), "time to cross the play (s)"


def test_contact_design_is_sized_to_the_step():
    """The contact oscillates once per step on the lightest wheel (ω·dt = 1), damped at
    ζ = 0.7, with four sub-steps per radian of it: k = I_red ω², c = 2 ζ √(k I_red),
    I_red = 1/(1/J + mobility) (spring-mass oscillator [standard])."""
    design = ContactDesign.for_step(PLAY, J_DEMO, 5e5, 1e-3)
    reduced = 1.0 / (1.0 / J_DEMO + 5e5)
    assert design.stiffness == pytest.approx(reduced * 1e6, rel=1e-12)
    assert design.damping == pytest.approx(1.4 * math.sqrt(design.stiffness * reduced))
    assert design.substeps == 4
    with pytest.raises(ValueError, match="motor inertia"):
        ContactDesign.for_step(PLAY, 0.0, 5e5, 1e-3)


# ------------------------------------------------------------------ backlash in the world


def test_backlash_key_reads_an_angle_and_needs_a_rotor_inertia():
    """``motors.backlash`` is an angle (default 0); with no rotor inertia it is an error
    that says what to set."""
    assert robot("desk-mite").motors.backlash == 0.0
    spec = robot("desk-mite", {"motors.backlash": "1.5 deg"})
    assert spec.motors.backlash == pytest.approx(math.radians(1.5), rel=1e-12)
    with pytest.raises(RobotFileError, match="backlash needs a rotor inertia"):
        robot("desk-mite", {"motors.backlash": "1.5 deg", "motors.rotor_inertia": 0.0})


def test_no_torque_crosses_the_open_gap_in_the_world():
    """Floating with no gravity, a duty step on both motors: while the motor sides turn
    through the first half of the play (they start in the middle), the wheels and the
    body stay exactly at rest — the stator's torque and the rotor's reaction cancel on
    the body (Newton's third law; dead-zone model of SOURCES §11 [published]) — and once
    the play is taken up the wheels turn forward."""
    spec = robot("shelf-runner", {"motors.backlash": "1.5 deg"})
    with World(spec, tilt=0.0, gravity=0.0) as world:
        state = world.body_state()
        world.set_state((state.com[0], state.com[1], state.com[2] + 0.3), state.com_orientation)
        drive = DriveTrain(spec)
        drive.set_duty(0.3, 0.3)
        half = 0.5 * spec.motors.backlash
        open_steps, before = 0, 0.0
        for _ in range(40):
            world.advance(1, drive)
            travel = min(world.motor_angles())  # from the middle of the play
            _, _, rate_left, rate_right = world.wheel_state()
            if rate_left != 0.0 or rate_right != 0.0:
                break  # torque reached the wheels in this step
            open_steps += 1
            assert world.body_state().angular_velocity == (0.0, 0.0, 0.0), "body moved"
            before = travel
        assert before < half <= travel, "the wheels start to move as the half play is crossed"
        for _ in range(10):
            world.advance(1, drive)
        _, _, rate_left, rate_right = world.wheel_state()
        assert open_steps >= 3, "the gap stayed open for a few steps"
        assert rate_left > 0.0 and rate_right > 0.0, "the wheels turn once the play is taken up"


def test_without_backlash_the_world_has_no_play():
    """No backlash: no gearbox, no play angles (the trace gets no column)."""
    with World(robot("desk-mite")) as world:
        assert world.play_angles() is None and world.motor_angles() is None


@pytest.mark.parametrize("name", [
    "desk-mite",
    pytest.param("shelf-runner", marks=pytest.mark.slow),
    pytest.param("tall-mast", marks=pytest.mark.slow),
])
def test_cascade_still_balances_with_one_and_a_half_degrees_of_play(name):
    """End to end: 1.5° of gearbox play (typical of small plastic gearboxes, SOURCES §11
    [common practice]) and the example cascade controller with its default gains keeps
    the robot up for 4 s from a 3° start."""
    spec = robot(name, {"motors.backlash": "1.5 deg"})
    outcome = run(spec, RunSettings(controller=str(CONTROLLERS / "cascade.py"), duration=4.0,
                                    tilt=math.radians(3.0), seed=7))
    assert outcome.status == "completed", f"{name}: {outcome.summary}"
    assert outcome.summary["max_abs_pitch_deg"] < 5.0, "tilt stays near upright (deg)"


def _reference_side(backlash: Backlash, side: int, motor_torque: float, wheel_angle: float,
                    wheel_rate: float) -> float:
    """One side's step as first written, through ``contact_torque`` (the loop now has it
    written out): the same operations, for the bit-for-bit check below."""
    design = backlash.design
    mobility = design.wheel_mobility
    measured = (wheel_rate - backlash._wheel_rate[side]) / backlash.dt
    backlash._wheel_acceleration[side] = measured - mobility * backlash._torque[side]
    backlash._wheel_rate[side] = wheel_rate
    inverse_inertia = 1.0 / design.motor_inertia
    half_gap, k, c, h = backlash._half_gap, design.stiffness, design.damping, backlash._h
    free_acceleration = backlash._wheel_acceleration[side]
    motor, motor_rate = backlash.motor_angle[side], backlash.motor_rate[side]
    wheel = wheel_angle
    total = 0.0
    for _ in range(design.substeps):
        torque = contact_torque(motor - wheel, motor_rate - wheel_rate, half_gap, k, c)
        motor_acc = (motor_torque - torque) * inverse_inertia
        wheel_acc = free_acceleration + mobility * torque
        motor += h * (motor_rate + 0.5 * h * motor_acc)
        motor_rate += h * motor_acc
        wheel += h * (wheel_rate + 0.5 * h * wheel_acc)
        wheel_rate += h * wheel_acc
        total += torque
    backlash.motor_angle[side], backlash.motor_rate[side] = motor, motor_rate
    backlash._torque[side] = total / design.substeps
    return backlash._torque[side]


def test_the_written_out_contact_gives_contact_torques_floats():
    """Backlash.step (contact written out for speed) against the same step through
    contact_torque, bit for bit, over 2,000 random steps through and out of the play
    (random torques and wheel motion: the dead-zone model of Nordin & Gutman, 2002)."""
    design = ContactDesign.for_step(math.radians(1.5), 2e-4, 400.0, 1e-3)
    fast, slow = Backlash(design, 1e-3), Backlash(design, 1e-3)
    rng = np.random.default_rng(5)
    angles = np.zeros(2)
    rates = np.zeros(2)
    touching = open_gap = 0
    for _ in range(2000):
        torques = tuple(float(v) for v in rng.normal(0.0, 0.05, 2))
        rates = rates + rng.normal(0.0, 0.5, 2)
        angles = angles + rates * 1e-3
        a, r = tuple(float(v) for v in angles), tuple(float(v) for v in rates)
        got = fast.step(torques, a, r)
        if not slow._started:
            slow.start(a, r)
        want = tuple(_reference_side(slow, side, torques[side], a[side], r[side])
                     for side in (0, 1))
        assert got == want
        assert fast.motor_angle == slow.motor_angle and fast.motor_rate == slow.motor_rate
        touching += sum(t != 0.0 for t in got)
        open_gap += sum(t == 0.0 for t in got)
    assert touching > 200 and open_gap > 200, (touching, open_gap)
