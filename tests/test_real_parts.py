"""Real parts: static friction, per-side motors, the IMU's own filter, mounting, encoder shaft,
and the robot-file keys that describe them (none of these needs the physics engine but the
one differential-drive run)."""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal
from scipy.integrate import solve_ivp
from scipy.optimize import brentq
from scipy.spatial.transform import Rotation

from sandbox.actuators import DriveTrain, coulomb_friction, karnopp_friction
from sandbox.control import RobotFacts
from sandbox.imu import Encoders, Imu, mount_rotation, tilt_from_accel
from sandbox.robot import RobotFileError, figures_json, robot_from_dict
from sandbox.sweep.plan import nominal_value

G = 9.80665
DT = 0.001
BODY = {"frame": {"depth": 0.08, "width": 0.12, "height": 0.22, "mass": 0.18, "bottom": -0.01}}
WHEELS = {"radius": 0.034, "width": 0.025, "mass": 0.035, "track": 0.15}


def make_spec(**sections):
    data = {"name": "parts", "body": BODY, "wheels": WHEELS}
    data.update(sections)
    return robot_from_dict(data)


def wheel_inertia(spec, side="left"):
    """Wheel plus reflected rotor inertia about the axle (kg·m²): a wheel in the air."""
    f = getattr(spec.figures, side)
    return f.wheel_inertia_axle + f.reflected_inertia


# --------------------------------------------------------------------- static friction


def spin_in_air(spec, duty: float, seconds: float = 0.3) -> tuple[float, float, DriveTrain]:
    """A wheel in the air (the body held) at a constant duty, semi-implicit Euler at DT.
    Returns (largest |rate| rad/s, final angle rad, the drive)."""
    drive = DriveTrain(spec)
    drive.set_duty(duty, 0.0)
    inertia = wheel_inertia(spec)
    rate = angle = peak = 0.0
    for _ in range(int(round(seconds / DT))):
        torque, _ = drive.step(rate, 0.0, DT)
        rate += torque / inertia * DT
        angle += rate * DT
        peak = max(peak, abs(rate))
    return peak, angle, drive


def test_breakaway_duty_is_static_friction_over_stall_torque():
    """A wheel in the air starts to turn at the lowest duty whose stall torque exceeds the
    breakaway torque, D = T_static / T_stall at the battery and driver voltage (SOURCES.md
    §11 [derived] from the motor model of §5, Karnopp stick-slip [published]); below it the
    wheel does not move at all. Within one PWM step."""
    static = 0.02
    spec = make_spec(motors={"static_friction_torque": static, "friction_torque": 0.005})
    levels = (1 << spec.driver.pwm_bits) - 1
    motor = DriveTrain(spec).motor_left
    # the supply the bridge sees while the wheel is stuck at a duty near breakaway
    _, _, stuck = spin_in_air(spec, 0.1, 0.01)
    supply = stuck.battery_voltage - spec.driver.voltage_drop
    stall_at_supply = motor.torque_constant * supply / motor.resistance
    expected = static / stall_at_supply
    first = None
    for step in range(1, 80):
        peak, angle, _ = spin_in_air(spec, step / levels)
        if peak > 1.0:  # turning, not creeping
            first = step / levels
            break
        assert abs(angle) < 1e-6, f"the wheel crept at duty {step}/{levels}"
    assert first is not None
    assert abs(first - expected) <= 1.0 / levels, (first, expected)
    assert first >= expected - 1e-12, "started below the breakaway duty"


def test_without_static_friction_the_drive_keeps_its_written_out_step():
    """Absent keys keep today's arithmetic: the drive of a robot without static friction and
    with alike motors steps through DriveTrain.step itself. Karnopp friction with static ==
    kinetic is today's Coulomb friction wherever the wheel moves or sticks (same values)."""
    plain = DriveTrain(make_spec())
    assert plain.step.__func__ is DriveTrain.step
    sticky = DriveTrain(make_spec(motors={"static_friction_torque": 0.008}))
    assert sticky.step.__func__ is not DriveTrain.step
    for drive in np.linspace(-0.005, 0.005, 9):
        for rate in (-1.0, -1e-3, -1e-5, 0.0, 2e-5, 1e-3, 1.0):
            assert karnopp_friction(drive, drive, rate, 0.005, 0.005, 1e-3) == \
                coulomb_friction(drive, rate, 0.005, 1e-3)


def karnopp_reference(duty, t_end, inertia, kt, ke, resistance, supply, kinetic, static):
    """Reference stick-slip integration of one wheel (Karnopp 1985, exact switching).

    Slipping: J ω' = K_t (D(t) V − K_e ω) / R − T_k sign ω, integrated by solve_ivp until ω
    reaches 0. Stuck: ω = 0 until the drive torque K_t D(t) V / R exceeds T_s in size
    (found by root finding). Returns a function t -> (angle, stuck?).
    """
    def applied(t):
        return kt * duty(t) * supply / resistance

    pieces = []  # (t0, t1, dense solution or None for stuck, angle at t0)
    t, angle = 0.0, 0.0
    grid = np.linspace(0.0, t_end, 20001)
    while t < t_end:
        # stuck from t: the first grid time after t with |applied| > static, refined
        later = grid[grid > t]
        over = later[np.abs(applied(later)) > static]
        if abs(applied(t)) <= static:
            if over.size == 0:
                pieces.append((t, t_end, None, angle))
                break
            before = max(t, over[0] - (grid[1] - grid[0]))
            t_break = brentq(lambda s: abs(applied(s)) - static, before, over[0], xtol=1e-12)
            pieces.append((t, t_break, None, angle))
            t = t_break
        direction = 1.0 if applied(t) > 0 else -1.0

        def rhs(s, y, direction=direction):
            return [y[1], (kt * (duty(s) * supply - ke * y[1]) / resistance
                           - kinetic * direction) / inertia]

        def stops(s, y, direction=direction):
            return y[1] * direction

        stops.terminal, stops.direction = True, -1
        sol = solve_ivp(rhs, (t, t_end), [angle, 1e-12 * direction], events=stops,
                        dense_output=True, rtol=1e-10, atol=1e-12, max_step=1e-3)
        pieces.append((t, sol.t[-1], sol.sol, angle))
        angle = float(sol.y[0, -1])
        t = float(sol.t[-1])
        if sol.status == 1:  # came to rest: stuck if the drive is now small enough
            t += 1e-9

    def at(s):
        for t0, t1, solution, a0 in pieces:
            if t0 <= s <= t1:
                return (a0, True) if solution is None else (float(solution(s)[0]), False)
        return pieces[-1][3], True

    return at


def test_stick_slip_matches_a_reference_karnopp_integration():
    """A wheel in the air under a sine of duty sticks near each zero of the drive and slips
    between: the drive train's Karnopp friction, stepped at 1 ms, follows a reference
    integration of Karnopp's model with exact switching (Karnopp, J. Dyn. Sys. Meas.
    Control 107(1), 1985 [published]; solve_ivp as the integrator [reference library]):
    angle within 2 % of its range, stuck time within 2 % of the run."""
    static, kinetic = 0.012, 0.005
    spec = make_spec(
        motors={"static_friction_torque": static, "friction_torque": kinetic},
        driver={"pwm_bits": 16, "voltage_drop": 1.0},
        battery={"cell_resistance": 0.0, "capacity": 1e9, "charge": 0.5},
    )
    drive = DriveTrain(spec)
    motor = drive.motor_left
    supply = drive.battery_voltage - spec.driver.voltage_drop
    inertia = wheel_inertia(spec)

    def duty(t):
        return 0.15 * np.sin(2 * math.pi * 0.5 * t)

    t_end = 4.0
    reference = karnopp_reference(duty, t_end, inertia, motor.torque_constant,
                                  motor.back_emf_constant, motor.resistance, supply, kinetic,
                                  static)
    rate = angle = 0.0
    sim_angle, sim_stuck, ref_angle, ref_stuck = [], [], [], []
    for k in range(int(round(t_end / DT))):
        drive.set_duty(float(duty(k * DT)), 0.0)
        torque, _ = drive.step(rate, 0.0, DT)
        rate += torque / inertia * DT
        angle += rate * DT
        t = (k + 1) * DT
        sim_angle.append(angle)
        sim_stuck.append(abs(rate) < 1e-3)
        a, stuck = reference(t)
        ref_angle.append(a)
        ref_stuck.append(stuck)
    sim_angle, ref_angle = np.array(sim_angle), np.array(ref_angle)
    span = ref_angle.max() - ref_angle.min()
    assert np.max(np.abs(sim_angle - ref_angle)) < 0.02 * span
    stuck_ref = np.mean(ref_stuck)
    assert 0.1 < stuck_ref < 0.6, "the case must stick and slip"
    assert abs(np.mean(sim_stuck) - stuck_ref) < 0.02


# --------------------------------------------------------------------- motor mismatch


def test_unequal_motors_give_the_torques_of_their_own_catalogue_figures():
    """Equal duty, equal rates, a right motor 8 % weaker in stall torque: each wheel's torque
    is K_t (D V − K_e ω) / R − T_f with its own K_t = T_stall / I_stall, K_e = V / ω_0,
    R = V / I_stall (SOURCES.md §5 [published motor model])."""
    spec = make_spec(motors={"right": {"stall_torque": "1.38 kgf*cm"}},
                     battery={"cell_resistance": 0.0})
    drive = DriveTrain(spec)
    drive.set_duty(0.6, 0.6)
    supply = drive.battery_voltage - spec.driver.voltage_drop
    rate = 5.0
    left, right = drive.step(rate, rate, DT)
    for side, torque in (("left", left), ("right", right)):
        m = spec.motor_side(side)
        kt, ke, r = m.stall_torque / m.stall_current, m.rated_voltage / m.no_load_speed, \
            m.rated_voltage / m.stall_current
        expected = kt * (0.6 * supply - ke * rate) / r - m.friction_torque
        assert torque == pytest.approx(expected, rel=1e-12), side
    assert right < left
    assert spec.motor_side("right").stall_torque == pytest.approx(1.38 * G / 100)
    assert spec.motor_side("left").stall_torque == spec.motors.stall_torque


def test_weaker_right_motor_turns_the_robot_at_the_differential_drive_yaw_rate():
    """Equal duty, no controller, a weaker and slower right motor: the robot (slung low, so it
    stands without control) turns at yaw rate (v_r − v_l) / track, v = r · wheel rate over
    the floor (differential-drive kinematics, SOURCES.md §11 [published]), within 3 %."""
    pytest.importorskip("pybullet")
    from sandbox.world import World

    low_body = {"frame": {"depth": 0.06, "width": 0.10, "height": 0.03, "mass": 0.1,
                          "bottom": -0.04},
                "parts": [{"name": "ballast", "mass": 0.4, "size": [0.04, 0.06, 0.02],
                           "at": [0, 0, -0.03]}]}
    spec = robot_from_dict({
        "name": "low", "body": low_body,
        "wheels": {"radius": 0.05, "width": 0.02, "mass": 0.04, "track": 0.16, "friction": 1.0},
        "motors": {"right": {"stall_torque": "1.3 kgf*cm", "no_load_speed": "220 rpm"}},
    })
    drive = DriveTrain(spec)
    world = World(spec, physics_dt=DT)
    try:
        drive.set_duty(0.5, 0.5)
        world.advance(1500, drive)  # reach the steady turn
        yaw0 = world.body_state().yaw
        angles0 = world.wheel_state()[:2]
        pitch0 = world.body_state().pitch
        world.advance(1000, drive)
        state = world.body_state()
        angles1 = world.wheel_state()[:2]
        # wheel turn over the floor = turn relative to the body + the body's pitch change
        turn = [a1 - a0 + state.pitch - pitch0 for a0, a1 in zip(angles0, angles1)]
        yaw_rate = (state.yaw - yaw0) / 1.0
    finally:
        world.close()
    radius, track = spec.wheels.radius, spec.wheels.track
    expected = radius * (turn[1] - turn[0]) / 1.0 / track
    assert expected < -0.05, "the weaker right side must lag and turn the robot right"
    print(f"yaw rate {yaw_rate:.5f} rad/s, (v_r - v_l)/track {expected:.5f} rad/s")
    assert yaw_rate == pytest.approx(expected, rel=0.03)


# --------------------------------------------------------------------- the IMU's own filter


def quiet_imu_spec(**imu):
    """An IMU without noise, bias or visible quantisation (32-bit words)."""
    quiet = {"noise_density": 0.0, "bias": 0.0, "bits": 32}
    gyro = {**quiet, **imu.pop("gyro", {})}
    accel = {**quiet, **imu.pop("accel", {})}
    return make_spec(imu={"rate": 1000.0, "gyro": gyro, "accel": accel, **imu}).imu


def gyro_response(imu_spec, frequency: float, seconds: float = 3.0, settle: float = 1.0):
    """Gain and phase (rad) of the simulated gyro's y axis to a sine of pitch rate."""
    imu = Imu(imu_spec, seed=0)
    assert imu.filtering
    rate = imu_spec.rate
    t = np.arange(int(round(seconds * rate))) / rate
    out = np.empty_like(t)
    for k, tk in enumerate(t):
        true_rate = (0.0, math.sin(2 * math.pi * frequency * tk), 0.0)
        imu.feed(true_rate, (0.0, 0.0, G))
        out[k] = imu.read(true_rate, (0.0, 0.0, G), 1)[0][1]
    keep = t >= settle
    basis = np.column_stack([np.sin(2 * math.pi * frequency * t[keep]),
                             np.cos(2 * math.pi * frequency * t[keep])])
    (a, b), *_ = np.linalg.lstsq(basis, out[keep], rcond=None)
    return math.hypot(a, b), math.atan2(b, a)


@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("ratio", [0.5, 2.0])
def test_gyro_filter_matches_freqz_of_the_same_design(order, ratio):
    """The gyro's response to a sine of pitch rate at 0.5 f_c and 2 f_c has the gain and
    phase of scipy.signal.freqz of butter(order, f_c, fs=rate) [reference library]."""
    cutoff = 40.0
    spec = quiet_imu_spec(gyro={"bandwidth": cutoff}, filter_order=order)
    gain, phase = gyro_response(spec, ratio * cutoff)
    b, a = signal.butter(order, cutoff, fs=1000.0)
    _, h = signal.freqz(b, a, worN=[ratio * cutoff], fs=1000.0)
    assert gain == pytest.approx(abs(h[0]), rel=1e-6)
    assert phase == pytest.approx(np.angle(h[0]), abs=1e-6)


@pytest.mark.parametrize("order, factor", [(1, 1.0), (2, math.sqrt(2.0))])
def test_filter_group_delay_at_low_frequency(order, factor):
    """A ramp of rate comes out late by the filter's low-frequency group delay: first order
    1/(2π f_c), second-order Butterworth √2/(2π f_c) (SOURCES.md §11 [derived from H(s)]),
    within 0.5 % at f_c = 10 Hz sampled at 1 kHz; inspect reports the same figure."""
    cutoff, slope = 10.0, 0.2  # Hz, rad/s per s
    spec = quiet_imu_spec(gyro={"bandwidth": cutoff}, filter_order=order)
    imu = Imu(spec, seed=0)
    n = 2000
    for k in range(n):
        true = (0.0, slope * k / 1000.0, 0.0)
        imu.feed(true, (0.0, 0.0, G))
    reading = imu.read(true, (0.0, 0.0, G), 1)[0][1]
    lag = (slope * (n - 1) / 1000.0 - reading) / slope
    expected = factor / (2 * math.pi * cutoff)
    assert lag == pytest.approx(expected, rel=5e-3)
    robot = make_spec(imu={"gyro": {"bandwidth": cutoff}, "filter_order": order})
    assert figures_json(robot)["imu_gyro_group_delay_s"] == pytest.approx(expected, rel=1e-12)
    assert figures_json(robot)["imu_accel_group_delay_s"] is None


def test_filter_starts_settled_and_noise_is_added_after_it():
    """At rest the filtered accelerometer reads gravity from the first sample (the sensor
    ran before the run); the white noise on the output keeps its density N·√f (IEEE Std
    952, SOURCES.md §4): the filter acts on the true signal, not on the noise."""
    density = 0.002  # m/s²/√Hz
    spec = make_spec(imu={"rate": 1000.0,
                          "accel": {"bandwidth": 5.0, "noise_density": density, "bias": 0.0,
                                    "bits": 32}}).imu
    imu = Imu(spec, seed=3)
    readings = []
    for _ in range(4000):
        imu.feed((0.0, 0.0, 0.0), (0.0, 0.0, G))
        readings.append(imu.read((0.0, 0.0, 0.0), (0.0, 0.0, G), 1)[1][2])
    readings = np.array(readings)
    assert abs(readings[:10].mean() - G) < 0.5
    assert np.std(readings) == pytest.approx(density * math.sqrt(1000.0), rel=0.05)


# --------------------------------------------------------------------- mounting, scale


def test_mounting_rotation_is_roll_pitch_yaw():
    """mount_rotation(roll, pitch, yaw) = Rz·Ry·Rx, the extrinsic x-y-z Euler rotation of
    scipy.spatial.transform [reference library]."""
    angles = (0.1, -0.3, 1.2)
    expected = Rotation.from_euler("xyz", angles).as_matrix()
    np.testing.assert_allclose(mount_rotation(*angles), expected, atol=1e-15)


def test_board_pitched_two_degrees_reads_two_degrees_at_rest():
    """A robot at rest upright with its board pitched forward by 2°: the accelerometer reads
    f = (−g sin 2°, 0, g cos 2°) and the tilt atan2(−a_x, a_z) = 2° (rotation matrices,
    SOURCES.md §4 static tilt [derived]); the gyro's scale error scales its reading."""
    spec = quiet_imu_spec(rotation=[0, "2 deg", 0], gyro={"scale_error": 0.01})
    imu = Imu(spec, seed=0)
    assert not imu.filtering
    gyro, accel = imu.read((0.0, 0.5, 0.0), (0.0, 0.0, G), 1)
    assert tilt_from_accel(accel) == pytest.approx(math.radians(2.0), abs=1e-9)
    assert accel[0] == pytest.approx(-G * math.sin(math.radians(2.0)), abs=1e-8)
    assert gyro[1] == pytest.approx(1.01 * 0.5, abs=1e-8)


# --------------------------------------------------------------------- encoders, facts


def test_encoder_on_the_wheel_shaft_counts_per_wheel_turn():
    """shaft: wheel counts counts_per_rev per wheel turn; shaft: motor counts_per_rev ·
    gear_ratio (a gearbox of ratio n turns the motor n times per wheel turn [definition]).
    The controller facts carry counts_per_wheel_rev either way; the old name still reads,
    with a DeprecationWarning."""
    for shaft, per_wheel in (("wheel", 360), ("motor", 360 * 48)):
        spec = make_spec(encoders={"counts_per_rev": 360, "shaft": shaft})
        encoders = Encoders.from_spec(spec)
        one_turn = 2 * math.pi + 1e-9
        assert encoders.ticks(one_turn, -one_turn) == (per_wheel, -per_wheel - 1)
        facts = RobotFacts.from_spec(spec, 200.0, DT)
        assert facts.counts_per_wheel_rev == per_wheel
        with pytest.warns(DeprecationWarning, match="counts_per_wheel_rev"):
            assert facts.counts_per_rev == per_wheel
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        from sandbox.control import WheelOdometry

        WheelOdometry(facts)  # the helpers read the new name


def test_encoders_count_each_sides_gear_ratio():
    """A right gearbox of another ratio counts its own motor turns (definition of ratio)."""
    spec = make_spec(motors={"right": {"gear_ratio": 30}}, encoders={"counts_per_rev": 12})
    assert Encoders.from_spec(spec).ticks(2 * math.pi + 1e-9, 2 * math.pi + 1e-9) == (576, 360)


# --------------------------------------------------------------------- the robot file


REAL = {
    "body": {**BODY, "measured": {"mass": "0.62 kg", "com": ["2 mm", 0, "71 mm"],
                                  "pitch_inertia": 2.9e-3}},
    "wheels": {**WHEELS, "left": {"radius": "33.5 mm"}},
    "motors": {"static_friction_torque": 0.008, "right": {"stall_torque": "1.38 kgf*cm"}},
    "imu": {"rotation": [0, "1.5 deg", 0], "filter_order": 1,
            "gyro": {"bandwidth": "42 Hz", "scale_error": 0.01},
            "accel": {"bandwidth": "44 Hz", "scale_error": -0.02}},
    "encoders": {"counts_per_rev": 360, "shaft": "wheel"},
    "board": {"loop_jitter": "0.2 ms", "compute_time": "1.5 ms"},
}


def test_real_part_keys_round_trip_and_absent_keys_stay_absent():
    """to_si_dict (run.yaml, robot.yaml) records every new key and reads back to the same
    robot; a file without them gains no None entries (so --set on them still works)."""
    spec = robot_from_dict({"name": "real", **REAL})
    data = spec.to_si_dict()
    assert robot_from_dict(data) == spec
    assert data["motors"]["right"] == {"stall_torque": pytest.approx(0.1353318)}
    assert data["board"] == {"loop_jitter": pytest.approx(2e-4), "compute_time": 1.5e-3}
    plain = make_spec().to_si_dict()
    assert "measured" not in plain["body"] and "right" not in plain["motors"]
    assert "static_friction_torque" not in plain["motors"]
    assert "bandwidth" not in plain["imu"]["gyro"]
    again = robot_from_dict(plain, overrides={"motors.right.stall_torque": "1.2 kgf*cm",
                                              "imu.gyro.bandwidth": "20 Hz"})
    assert again.motor_side("right").stall_torque == pytest.approx(1.2 * G / 100)
    assert again.motor_side("left").stall_torque == again.motors.stall_torque
    assert again.imu.gyro.bandwidth == 20.0


def test_measured_body_figures_override_the_parts():
    """body.measured replaces the body's mass, centre of mass and pitch inertia about its
    centre of mass; the whole robot's figures follow (centre of mass of a composite body,
    any statics text)."""
    spec = robot_from_dict({"name": "real", **REAL})
    f = spec.figures
    assert f.body.mass == pytest.approx(0.62)
    np.testing.assert_allclose(f.body.com, [0.002, 0.0, 0.071])
    assert f.body.inertia[1, 1] == pytest.approx(2.9e-3)
    assert f.mass == pytest.approx(0.62 + 2 * 0.035)
    np.testing.assert_allclose(f.com, f.body.com * 0.62 / f.mass)
    assert f.body.inertia[1, 1] <= f.body.inertia[0, 0] + f.body.inertia[2, 2]
    data = figures_json(spec)
    assert data["body_measured"] == ["mass", "com", "pitch_inertia"]
    assert data["sides_differ"] is True
    assert data["sides"]["left"]["wheel_radius_m"] == pytest.approx(0.0335)
    assert data["sides"]["right"]["stall_torque_n_m"] == pytest.approx(0.1353318)
    assert data["imu_gyro_group_delay_s"] == pytest.approx(1 / (2 * math.pi * 42))
    assert figures_json(make_spec())["sides_differ"] is False


@pytest.mark.parametrize("change, words", [
    ({"motors": {"static_friction_torque": 0.001}},
     ["static_friction_torque", "friction_torque", "0.001"]),
    ({"motors": {"right": {"friction_torque": 0.02}, "static_friction_torque": 0.01}},
     ["motors.right", "static_friction_torque"]),
    ({"motors": {"left": {"stal_torque": 0.1}}}, ["motors.left.stal_torque", "stall_torque"]),
    ({"wheels": {**WHEELS, "right": {"track": 0.2}}}, ["wheels.right.track", "unknown key"]),
    ({"imu": {"filter_order": 3}}, ["imu.filter_order", "1 or 2"]),
    ({"imu": {"gyro": {"bandwidth": "600 Hz"}}}, ["gyro.bandwidth", "500 Hz"]),
    ({"imu": {"rotation": [0, "2 mm", 0]}}, ["imu.rotation", "angle"]),
    ({"encoders": {"shaft": "axle"}}, ["encoders.shaft", "motor", "wheel"]),
    ({"board": {"loop_jitter": -0.001}}, ["board.loop_jitter"]),
])
def test_bad_real_part_keys_name_the_key(change, words):
    """Each bad value is one plain line naming the key and what is allowed."""
    data = {"name": "bad", "body": BODY, "wheels": WHEELS, **change}
    with pytest.raises(RobotFileError) as caught:
        robot_from_dict(data, "bad.yaml")
    text = str(caught.value)
    for word in words:
        assert word in text, (word, text)


@pytest.mark.parametrize("sets, words", [
    (["motors.left.stal_torque=0.1"], ["stall_torque"]),
    (["motors.static_friction_torque=0.001"], ["friction_torque"]),
    (["imu.filter_order=3"], ["filter_order"]),
])
def test_cli_rejects_bad_real_part_keys_with_exit_2(tmp_path, sets, words):
    """The command line maps a bad key to exit code 2 (DESIGN.md exit codes)."""
    import yaml
    from typer.testing import CliRunner

    from sandbox.cli import app

    path = tmp_path / "robot.yaml"
    path.write_text(yaml.safe_dump({"name": "r", "body": BODY, "wheels": WHEELS}))
    args = ["inspect", str(path)]
    for item in sets:
        args += ["--set", item]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 2, result.output
    for word in words:
        assert word in result.output


def test_cli_inspect_shows_both_sides_where_they_differ(tmp_path):
    import yaml
    from typer.testing import CliRunner

    from sandbox.cli import app

    path = tmp_path / "robot.yaml"
    path.write_text(yaml.safe_dump({"name": "r", **REAL}))
    result = CliRunner().invoke(app, ["inspect", str(path)])
    assert result.exit_code == 0, result.output
    assert "stall torque at rated voltage, left / right" in result.output
    assert "wheel radius, left / right" in result.output
    assert "gyro filter group delay" in result.output
    plain = tmp_path / "plain.yaml"
    plain.write_text(yaml.safe_dump({"name": "r", "body": BODY, "wheels": WHEELS}))
    assert "left / right" not in CliRunner().invoke(app, ["inspect", str(plain)]).output


def test_sweeps_spread_a_side_key_around_the_sections_value():
    """--spread motors.right.stall_torque=±5% on a file without a right override spreads
    around the motors' own stall torque; with one, around it."""
    plain = make_spec().to_si_dict()
    assert nominal_value("motors.right.stall_torque", plain, {}) == plain["motors"]["stall_torque"]
    real = robot_from_dict({"name": "real", **REAL}).to_si_dict()
    assert nominal_value("motors.right.stall_torque", real, {}) == pytest.approx(0.1353318)
    assert nominal_value("wheels.left.radius", real, {}) == pytest.approx(0.0335)


SIDE_KEYS = st.sampled_from(["stall_torque", "gear_ratio", "friction_torque", "no_load_speed",
                             "static_friction_torque", "stal_torque", "radius", ""])
SIDE_VALUES = st.one_of(st.floats(allow_nan=True), st.text(max_size=8), st.none(),
                        st.integers(-5, 5), st.lists(st.floats(), max_size=2))


@settings(max_examples=150, deadline=None)
@given(st.dictionaries(SIDE_KEYS, SIDE_VALUES, max_size=3), st.sampled_from(["left", "right"]))
def test_fuzzed_side_overrides_give_a_robot_or_a_plain_error(side, which):
    """Any per-side map either validates or raises RobotFileError (never another exception)."""
    try:
        spec = robot_from_dict({"body": BODY, "wheels": WHEELS, "motors": {which: side}})
    except RobotFileError as err:
        assert str(err)
    else:
        assert spec.motor_side(which).stall_torque > 0


def test_a_loop_that_does_not_feed_holds_the_truth_over_the_samples():
    """Reading every 5th sample without feeding equals feeding the tick's truth 5 times: a
    zero-order hold of the input at the sample rate (definition of the fallback)."""
    spec = quiet_imu_spec(gyro={"bandwidth": 30.0})
    fed, held = Imu(spec, seed=1), Imu(spec, seed=1)
    for k in range(40):
        truth = (0.0, math.sin(0.3 * k), 0.0)
        for _ in range(5):
            fed.feed(truth, (0.0, 0.0, G))
        assert held.read(truth, (0.0, 0.0, G), 5) == fed.read(truth, (0.0, 0.0, G), 5)


def test_a_run_with_real_parts_records_them(tmp_path):
    """A short run of a robot with every new key completes and writes them to robot.yaml and
    run.yaml, which load back to the same robot (DESIGN.md run folder)."""
    pytest.importorskip("pybullet")
    import yaml

    from sandbox.runner import RunSettings
    from sandbox.session import run_once

    spec = robot_from_dict({"name": "real", **REAL})
    controller = str(Path(__file__).resolve().parents[1] / "controllers" / "cascade.py")
    settings = RunSettings(controller=controller, duration=0.3, seed=2)
    result = run_once(spec, settings, folder=tmp_path / "run", duration_given=True, plots=False)
    assert result.status in ("completed", "fell")
    saved = yaml.safe_load((tmp_path / "run" / "robot.yaml").read_text())
    assert robot_from_dict(saved) == spec
    recorded = yaml.safe_load((tmp_path / "run" / "run.yaml").read_text())["robot"]
    assert recorded["motors"]["static_friction_torque"] == 0.008
    assert recorded["imu"]["gyro"]["bandwidth"] == 42.0
