"""The physics world against the equations of motion, and the IMU's true specific force.

Falls are compared with the unstable pole of the linear model in ``sandbox.analysis``
(SOURCES.md §1); the accelerometer with the static specific force (SOURCES.md §4).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from ideal_parts import ideal_robot
from scipy.optimize import least_squares, minimize_scalar

from sandbox.analysis import PlanarParams, duty_input_model, open_loop_poles, torque_input_model
from sandbox.ground import Ground
from sandbox.runner import RunSettings, Simulation, run
from sandbox.world import World

ROOT = Path(__file__).resolve().parents[1]
ROBOT_FILES = sorted((ROOT / "robots").glob("*.yaml"))
HELPERS = Path(__file__).resolve().parent / "controllers"
CONSTANT = str(HELPERS / "constant.py")
STANDARD_GRAVITY = 9.80665  # m/s², exact by definition (SOURCES.md §10)

# Torque-free wheels: no Coulomb friction, no rolling resistance.
FRICTIONLESS = {"motors.friction_torque": 0.0, "wheels.rolling_resistance": 0.0}
# A bridge that leaves the motors open at zero duty, and no rotor: zero wheel torque.
COASTING = {**FRICTIONLESS, "driver.off_state": "coast", "motors.rotor_inertia": 0.0}
# A perfect IMU: no white noise, no turn-on bias.
NOISELESS_IMU = {"imu.gyro.noise_density": 0.0, "imu.accel.noise_density": 0.0,
                 "imu.gyro.bias": 0.0, "imu.accel.bias": 0.0}


def unstable_pole(A: np.ndarray) -> float:
    """The largest real part of the eigenvalues of A (1/s)."""
    return float(max(open_loop_poles(A).real))


def robot_id(path: Path) -> str:
    return path.stem


# ------------------------------------------------------------------ uncontrolled falls


def _robot_params(marked: dict[str, pytest.MarkDecorator]) -> list:
    return [pytest.param(path, id=path.stem, marks=marked.get(path.stem, ()))
            for path in ROBOT_FILES]


def _coasting_fall_rate(spec, ground: Ground | None = None, tilt0: float = 1e-3,
                        seconds: float = 0.3) -> tuple[float, np.ndarray]:
    """Fitted p (1/s) of θ₀·cosh(p t) to a free fall from tilt0 (rad) with zero wheel torque."""
    times, pitches = [], []
    with World(spec, physics_dt=1e-3, tilt=tilt0, ground=ground) as world:
        assert world.body_state().pitch == pytest.approx(tilt0, abs=1e-9), "pitch at release"
        for k in range(int(round(seconds / world.dt)) + 1):
            times.append(k * world.dt)
            pitches.append(world.body_state().pitch)
            world.step(0.0, 0.0)
    t, pitch = np.array(times), np.array(pitches)
    fit = minimize_scalar(lambda p: float(np.sum((tilt0 * np.cosh(p * t) - pitch) ** 2)),
                          bounds=(0.1, 50.0), method="bounded")
    assert fit.success
    # the fall really happened (a robot that stayed put would fit badly, not pass)
    assert pitch[-1] > 3 * tilt0, f"pitch after {seconds} s only {pitch[-1]:.2e} rad"
    return float(fit.x), pitch


@pytest.mark.parametrize("robot_file", _robot_params({}))
def test_coasting_fall_follows_cosh_of_the_unstable_pole(robot_file):
    """Released at 1 mrad with no wheel torque, pitch grows as θ₀·cosh(p t).

    Source: SOURCES.md §1 (Franklin, Powell & Emami-Naeini, Example 2.7 class;
    wheeled form Pathak et al. 2005 [memory]): with τ = 0 the linearised pitch obeys
    θ̈ = p² θ, so from rest θ(t) = θ₀ cosh(p t), p from ``analysis.torque_input_model``.
    A coasting bridge passes no current, so no back-EMF torque; friction, rolling
    resistance and rotor inertia are set to 0. p is fitted over the first 0.3 s by
    ``scipy.optimize.minimize_scalar`` on the squared error; tolerance 5 % (SOURCES
    says 3–5 %; measured here within 1 %).
    """
    spec = ideal_robot(robot_file.stem, COASTING)
    p_model = unstable_pole(torque_input_model(PlanarParams.from_spec(spec))[0])
    p_fit, _ = _coasting_fall_rate(spec)
    assert p_fit == pytest.approx(p_model, rel=0.05), (
        f"fall rate p: fitted {p_fit:.4f} 1/s, model {p_model:.4f} 1/s")


@pytest.mark.parametrize("robot_file", ROBOT_FILES, ids=robot_id)
def test_braked_fall_grows_at_the_duty_model_pole(robot_file):
    """Zero duty on a braking bridge: the fall grows at the duty-input model's unstable pole.

    Source: SOURCES.md §1 (linearised wheeled pendulum) and §5 (DC motor, K_t = K_e,
    current (u·V − K_e ω)/R): at u = 0 the shorted motors are a damper
    2 K_t K_e / R on the wheel's angle relative to the body, which is exactly
    ``analysis.duty_input_model`` at zero input; rotor inertia as in the robot file
    (reflected J·G² in the mass matrix), Coulomb friction and rolling resistance 0.
    The whole loop runs (constant-zero controller at 1 kHz, DriveTrain, World).
    Fit a·e^{pt} + b·e^{−pt} over 0.15–0.4 s (scipy.optimize.least_squares):
    p within 5 % (measured here within 1.5 %).
    """
    spec = ideal_robot(robot_file.stem, FRICTIONLESS)
    assert spec.driver.off_state == "brake"
    p_model = unstable_pole(duty_input_model(PlanarParams.from_spec(spec))[0])
    tilt0 = 1e-3
    settings = RunSettings(controller=CONSTANT, duration=0.4, tilt=tilt0, rate_hz=1000.0)
    result = run(spec, settings)
    assert result.status == "completed", result.message
    t, pitch = result.trace["t_s"], result.trace["pitch_rad"]
    # from the second step on the wheels turn, so the shorted motors carry current
    assert np.all(result.trace["current_l_a"][2:] != 0.0), "no back-EMF current while braking"
    window = (t >= 0.15 - 1e-9) & (t <= 0.4 + 1e-9)
    tw, pw = t[window], pitch[window]

    def residual(v):
        a, b, p = v
        return (a * np.exp(p * tw) + b * np.exp(-p * tw) - pw) / tilt0

    fit = least_squares(residual, [tilt0 / 2, tilt0 / 2, p_model])
    p_fit = fit.x[2]
    assert p_fit == pytest.approx(p_model, rel=0.05), (
        f"braked fall rate p: fitted {p_fit:.4f} 1/s, duty-input model {p_model:.4f} 1/s")
    # Braking must slow the fall compared with free wheels (same figures, coasting).
    p_coast = unstable_pole(torque_input_model(PlanarParams.from_spec(spec))[0])
    assert p_fit < p_coast, f"braked {p_fit:.3f} 1/s not slower than coasting {p_coast:.3f} 1/s"


# ------------------------------------------------------------------ accelerometer truth


def _zero_controller_simulation(spec, tilt: float = 0.0, **kw) -> Simulation:
    settings = RunSettings(controller=CONSTANT, tilt=tilt, **kw)
    return Simulation(spec, settings)


@pytest.mark.parametrize("tilt_deg", [10.0, 0.0, -10.0, 30.0])
def test_noiseless_accelerometer_reads_static_tilt_at_first_tick(tilt_deg):
    """A perfect IMU (no noise, no bias) at tilt θ reads (−g sin θ, 0, g cos θ) at t = 0.

    Source: SOURCES.md §4, static tilt (specific force = acceleration − gravity, body x
    forward, pitch forward positive); at 10°, g = 9.80665: f_x = −1.702907,
    f_z = 9.657665 m/s² [derived]. The first tick has no previous velocity, so the
    acceleration is zero by construction: a static check. Through the whole runner with
    the robot's 16-bit ±2 g output word: tolerance one LSB (4 g / 2¹⁶ = 5.99e-4 m/s²).
    The gyro reads 0 within one of its LSBs; the accelerometer tilt atan2(−f_x, f_z)
    gives back θ within 0.01°.
    """
    spec = ideal_robot("shelf-runner", NOISELESS_IMU)
    accel_lsb = 2 * spec.imu.accel.range / 2**spec.imu.accel.bits
    gyro_lsb = 2 * spec.imu.gyro.range / 2**spec.imu.gyro.bits
    tilt = math.radians(tilt_deg)
    result = _zero_controller_simulation(spec, tilt, duration=0.01).run(None)
    tr = result.trace
    assert tr["pitch_rad"][0] == pytest.approx(tilt, abs=1e-6), "true pitch at the first tick"
    first = [tr[f"accel_{axis}_m_s2"][0] for axis in "xyz"]
    g = STANDARD_GRAVITY
    expected = (-g * math.sin(tilt), 0.0, g * math.cos(tilt))
    if tilt_deg == 10.0:  # the worked numbers of SOURCES.md §4
        assert expected[0] == pytest.approx(-1.702907, abs=1e-6)
        assert expected[2] == pytest.approx(9.657665, abs=1e-6)
    np.testing.assert_allclose(first, expected, atol=accel_lsb,
                               err_msg=f"specific force at the first tick at {tilt_deg} deg, m/s^2")
    for axis in "xyz":
        assert abs(tr[f"gyro_{axis}_rad_s"][0]) <= gyro_lsb, f"gyro {axis} at rest, rad/s"
    measured_tilt = math.degrees(math.atan2(-first[0], first[2]))
    assert measured_tilt == pytest.approx(tilt_deg, abs=0.01), "accelerometer tilt, deg"


def test_upright_robot_reads_plus_g_within_noise():
    """Upright and still, the accelerometer reads (0, 0, +g) within its noise and bias.

    Source: SOURCES.md §4 / IEEE Std 952 [memory]: one sample at rate f has white noise
    σ_w = N·√f; the turn-on bias has σ_b = ``bias``. Mean of n samples: tolerance
    5·√(σ_w²/n + σ_b²) per axis (plus one LSB). Eleven ticks (50 ms), default noise, seed 0.
    """
    spec = ideal_robot("shelf-runner")
    result = _zero_controller_simulation(spec, 0.0, duration=0.05, seed=0).run(None)
    tr = result.trace
    n = tr["t_s"].size
    assert n == 11
    assert np.max(np.abs(tr["pitch_rad"])) < 1e-4, "the robot did not stay upright"
    white = spec.imu.accel.noise_density * math.sqrt(spec.imu.rate)
    lsb = 2 * spec.imu.accel.range / 2**spec.imu.accel.bits
    tolerance = 5 * math.sqrt(white**2 / n + spec.imu.accel.bias**2) + lsb
    mean = [float(np.mean(tr[f"accel_{axis}_m_s2"])) for axis in "xyz"]
    np.testing.assert_allclose(mean, (0.0, 0.0, STANDARD_GRAVITY), atol=tolerance,
                               err_msg=f"mean specific force at rest (tolerance {tolerance:.3f})")
    # and the readings are noisy, not the bare truth
    assert np.std(tr["accel_x_m_s2"]) > 0.1 * white, "accelerometer noise missing"


def test_imu_sample_in_one_pass_equals_the_separate_reads():
    """World.imu_sample gives, bit for bit, imu_truth of body_state and the mount point's
    velocity from BodyState.point_velocity (rigid-body kinematics v + ω × r), on a robot
    tilted and driven so every term is non-zero."""
    from sandbox.schedule import imu_truth

    spec = ideal_robot("shelf-runner")
    world = World(spec, tilt=0.1)
    try:
        mount, gravity, dt = (0.01, -0.005, 0.08), world.gravity_vector(), world.dt
        before = None
        for step in range(60):
            world.step(0.02 * math.sin(step / 7.0), -0.01)
            state = world.body_state()
            want_truth = imu_truth(state, mount, gravity, before, dt)
            want_velocity = state.point_velocity(mount)
            world._forget_reads()  # read the engine afresh, as the loop does after a step
            truth, velocity = world.imu_sample(mount, before, gravity, dt)
            assert truth == want_truth and velocity == want_velocity
            before = velocity
    finally:
        world.close()


def test_pose_read_once_an_instant_follows_every_change_of_state():
    """The body's pose is kept with the velocity read of the instant: a second read at the
    same instant gives the same answer, and a step or a placing (set_state) is seen."""
    world = World(ideal_robot("desk-mite"), tilt=0.05)
    try:
        first = world.body_state()
        assert world.body_state().com == first.com
        world.step(0.01, 0.01)
        stepped = world.body_state()
        assert stepped.com != first.com
        moved = (stepped.com[0] + 0.25, stepped.com[1], stepped.com[2])
        world.set_state(moved, stepped.com_orientation, (0.1, 0.0, 0.0))
        placed = world.body_state()
        assert placed.com == pytest.approx(moved, abs=1e-12)
        assert placed.velocity == pytest.approx((0.1, 0.0, 0.0), abs=1e-12)
    finally:
        world.close()
