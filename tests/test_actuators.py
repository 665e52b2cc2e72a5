"""Tests of the battery -> H-bridge -> DC gear motor -> wheel torque model."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp
from scipy.optimize import minimize_scalar

from sandbox.actuators import (
    DriveTrain,
    MotorConstants,
    coulomb_friction,
    open_circuit_voltage,
    quantise_duty,
    steady_torque,
)
from sandbox.robot import robot_from_dict

DT = 0.001  # s, the default physics step

BODY = {"frame": {"depth": 0.08, "width": 0.12, "height": 0.22, "mass": 0.18, "bottom": -0.01}}
WHEELS = {"radius": 0.034, "width": 0.025, "mass": 0.035, "track": 0.15}
# 5 NiMH cells at half charge: open-circuit 6.0 V; with no bridge drop the motors see exactly
# their rated voltage on the first step (no previous current, so no sag).
RATED_SUPPLY = {"cells": 5, "cell_voltage": 1.2, "charge": 0.5}


def make_spec(motors=None, driver=None, battery=None):
    """A small valid robot; sections not given keep the defaults."""
    data = {"body": BODY, "wheels": WHEELS}
    for key, value in (("motors", motors), ("driver", driver), ("battery", battery)):
        if value is not None:
            data[key] = value
    return robot_from_dict(data)


def rated_drive(off_state="brake", friction=0.0, **driver):
    """A drive train whose motors see their rated 6 V on the first step, frictionless by
    default."""
    spec = make_spec(
        motors={"friction_torque": friction},
        driver={"voltage_drop": 0.0, "off_state": off_state, **driver},
        battery=RATED_SUPPLY,
    )
    return spec, DriveTrain(spec)


def supply_voltage(drive, spec):
    """The voltage the bridge can put across a motor on the next step (V)."""
    return max(drive.battery_voltage - spec.driver.voltage_drop, 0.0)


# ------------------------------------------------------------------- motor constants


def test_constants_from_catalogue_figures():
    """R = V/I_stall, K_t = T_stall/I_stall, K_e = V/w_nl (SOURCES.md §5, catalogue figures at
    the output shaft [published]); the same numbers robot.derive reports."""
    spec = make_spec()
    m = spec.motors
    motor = MotorConstants.from_spec(m)
    assert motor.resistance == pytest.approx(m.rated_voltage / m.stall_current, rel=1e-12)
    assert motor.torque_constant == pytest.approx(m.stall_torque / m.stall_current, rel=1e-12)
    assert motor.back_emf_constant == pytest.approx(m.rated_voltage / m.no_load_speed, rel=1e-12)
    assert motor.friction_torque == m.friction_torque
    figures = spec.figures
    assert motor.resistance == pytest.approx(figures.resistance, rel=1e-12), "resistance"
    assert motor.torque_constant == pytest.approx(figures.torque_constant, rel=1e-12), "K_t"
    assert motor.back_emf_constant == pytest.approx(figures.back_emf_constant, rel=1e-12), "K_e"


def test_reproduces_stall_torque_exactly():
    """At w = 0 and full duty at rated voltage the torque is the catalogue stall torque,
    T_stall = K_t V / R (SOURCES.md §5 [published])."""
    spec, drive = rated_drive()
    motor = drive.motor
    stall = spec.motors.stall_torque
    assert steady_torque(spec.motors.rated_voltage, 0.0, motor) == pytest.approx(stall, rel=1e-12)
    drive.set_duty(1.0, -1.0)
    left, right = drive.step(0.0, 0.0, DT)
    assert left == pytest.approx(stall, rel=1e-12), "left stall torque (N·m)"
    assert right == pytest.approx(-stall, rel=1e-12), "right stall torque (N·m)"
    assert drive.current_left == pytest.approx(spec.motors.stall_current, rel=1e-12), "I_stall"


def test_reproduces_no_load_speed_exactly():
    """Torque and current are zero at w_nl = V / K_e at rated voltage (SOURCES.md §5
    [published])."""
    spec, drive = rated_drive()
    no_load = spec.motors.no_load_speed
    assert steady_torque(spec.motors.rated_voltage, no_load, drive.motor) == pytest.approx(
        0.0, abs=1e-12
    ), "torque at no-load speed (N·m)"
    drive.set_duty(1.0, 1.0)
    left, _ = drive.step(no_load, 0.0, DT)
    assert left == pytest.approx(0.0, abs=1e-12), "wheel torque at no-load speed (N·m)"
    assert drive.current_left == pytest.approx(0.0, abs=1e-12), "current at no-load speed (A)"


def test_torque_speed_line():
    """T = T_stall (1 - w/w_nl), the steady DC motor line (SOURCES.md §5 [published])."""
    spec = make_spec()
    motor = MotorConstants.from_spec(spec.motors)
    volts, stall, no_load = (spec.motors.rated_voltage, spec.motors.stall_torque,
                             spec.motors.no_load_speed)
    for omega in np.linspace(-0.5 * no_load, 1.5 * no_load, 41):
        expected = stall * (1.0 - omega / no_load)
        assert steady_torque(volts, omega, motor) == pytest.approx(
            expected, rel=1e-12, abs=1e-15
        ), f"torque at {omega:.3f} rad/s (N·m)"


def test_peak_power_at_half_no_load_speed():
    """Mechanical power T·w peaks at w_nl/2 with T_stall·w_nl/4 (SOURCES.md §5 [published]);
    the maximum found with scipy.optimize.minimize_scalar [reference library]."""
    spec = make_spec()
    motor = MotorConstants.from_spec(spec.motors)
    volts, stall, no_load = (spec.motors.rated_voltage, spec.motors.stall_torque,
                             spec.motors.no_load_speed)
    found = minimize_scalar(lambda w: -steady_torque(volts, w, motor) * w,
                            bounds=(0.0, no_load), method="bounded",
                            options={"xatol": 1e-9})
    assert found.x == pytest.approx(no_load / 2, rel=1e-6), "speed of peak power (rad/s)"
    assert -found.fun == pytest.approx(stall * no_load / 4, rel=1e-9), "peak power (W)"


def test_kt_equals_ke_for_consistent_figures():
    """K_t = K_e in SI units (SOURCES.md §5, any electric machines text [published]): figures
    of a lossless motor (T_stall = K I_stall, w_nl = V/K with K = 0.24) give equal constants."""
    k = 0.24
    spec = make_spec(motors={"rated_voltage": 6.0, "stall_current": 1.6,
                             "stall_torque": k * 1.6, "no_load_speed": 6.0 / k})
    motor = MotorConstants.from_spec(spec.motors)
    assert motor.torque_constant == pytest.approx(motor.back_emf_constant, rel=1e-12), "K_t/K_e"
    assert motor.torque_constant == pytest.approx(k, rel=1e-12), "K_t (N·m/A)"


def test_messner_tilbury_dc_gain():
    """Messner & Tilbury motor (J=0.01, b=0.1, K=0.01, R=1, L=0.5) [published]: w/V DC gain
    0.0999001 rad/s/V (SOURCES.md §5 [derived]). Our L-neglected current relation integrated with
    scipy solve_ivp reaches it, and python-control gives the same gain with L = 0.5 and L = 0."""
    inertia, damping, k, resistance = 0.01, 0.1, 0.01, 1.0
    motor = MotorConstants(resistance=resistance, torque_constant=k, back_emf_constant=k,
                           friction_torque=0.0)
    volts = 1.0

    def rate_change(_t, state):
        omega = state[0]
        return [(steady_torque(volts, omega, motor) - damping * omega) / inertia]

    solution = solve_ivp(rate_change, (0.0, 3.0), [0.0], rtol=1e-10, atol=1e-12)
    assert solution.success
    gain = solution.y[0, -1] / volts
    assert gain == pytest.approx(0.0999001, rel=1e-6), "DC gain w/V (rad/s/V)"
    for inductance in (0.5, 0.0):
        plant = control.tf([k], [inertia * inductance, inertia * resistance + damping * inductance,
                                 damping * resistance + k * k])
        assert control.dcgain(plant) == pytest.approx(gain, rel=1e-6), f"DC gain at L={inductance}"


# ------------------------------------------------------------------- PWM and driver


def test_quantise_duty_steps():
    """An n-bit PWM counter gives 2**n - 1 steps of full scale; the duty rounds to the nearest
    step with its sign kept [common practice; DESIGN.md driver contract]."""
    step = 1.0 / 255
    assert quantise_duty((100 + 0.3) * step, 8, 0.0) == pytest.approx(100 * step, abs=1e-15)
    assert quantise_duty((100 + 0.7) * step, 8, 0.0) == pytest.approx(101 * step, abs=1e-15)
    assert quantise_duty(-(100 + 0.7) * step, 8, 0.0) == pytest.approx(-101 * step, abs=1e-15)
    assert quantise_duty(0.4 * step, 8, 0.0) == 0.0, "below half a step rounds to zero"
    assert quantise_duty(0.4, 1, 0.0) == 0.0 and quantise_duty(0.6, 1, 0.0) == 1.0, "1 bit"
    assert quantise_duty(-0.6, 1, 0.0) == -1.0, "1 bit, reverse"
    assert quantise_duty(1234.4 / 65535, 16, 0.0) == pytest.approx(1234 / 65535, abs=1e-15)


def test_deadband_and_clipping():
    """|duty| < deadband gives 0; duties clip to [-1, 1]; non-finite duties are refused
    (DESIGN.md driver contract)."""
    assert quantise_duty(0.04, 8, 0.05) == 0.0
    assert quantise_duty(-0.049, 8, 0.05) == 0.0
    assert quantise_duty(0.06, 8, 0.05) == pytest.approx(round(0.06 * 255) / 255, abs=1e-15)
    assert quantise_duty(1.7, 8, 0.0) == 1.0
    assert quantise_duty(-3.0, 8, 0.0) == -1.0
    for bad in (math.nan, math.inf):
        with pytest.raises(ValueError, match="finite"):
            quantise_duty(bad, 8, 0.0)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(duty=st.floats(-2.0, 2.0), bits=st.integers(1, 16))
def test_quantise_duty_property(duty, bits):
    """For any duty the applied value is a whole number of 1/(2**n - 1) steps, within half a
    step of the clipped duty, never of the opposite sign [common practice: PWM counter]."""
    levels = 2**bits - 1
    applied = quantise_duty(duty, bits, 0.0)
    clipped = min(max(duty, -1.0), 1.0)
    assert abs(applied * levels - round(applied * levels)) < 1e-9, "whole number of steps"
    assert abs(applied - clipped) <= 0.5 / levels + 1e-12, "within half a step"
    assert applied * clipped >= 0.0, "sign kept"


def test_set_duty_holds_quantised_values():
    """set_duty applies the driver settings of the robot file (DESIGN.md driver contract)."""
    spec = make_spec(driver={"pwm_bits": 4, "deadband": 0.1})
    drive = DriveTrain(spec)
    drive.set_duty(0.52, -0.05)
    assert drive.duty_left == pytest.approx(8 / 15, abs=1e-15), "4-bit left duty"
    assert drive.duty_right == 0.0, "right duty inside the deadband"
    drive.step(0.0, 0.0, DT)
    assert drive.duty_left == pytest.approx(8 / 15, abs=1e-15), "duty held over a step"


def test_brake_versus_coast_at_zero_duty():
    """At zero duty a shorted (braking) motor gives T = -K_t K_e w / R, from V = R i + K_e w
    with V = 0; an open (coasting) one carries no current (SOURCES.md §5 [published])."""
    omega = 12.0
    _, braking = rated_drive("brake")
    motor = braking.motor
    left, right = braking.step(omega, -omega, DT)
    expected = -motor.torque_constant * motor.back_emf_constant * omega / motor.resistance
    assert left == pytest.approx(expected, rel=1e-12), "brake torque (N·m)"
    assert right == pytest.approx(-expected, rel=1e-12), "brake torque, reverse (N·m)"
    assert braking.current_left == pytest.approx(-motor.back_emf_constant * omega
                                                 / motor.resistance, rel=1e-12), "brake current"
    assert braking.battery_current == 0.0, "a shorted motor draws nothing from the battery"

    _, coasting = rated_drive("coast")
    assert coasting.step(omega, -omega, DT) == (0.0, 0.0), "coast torque (N·m)"
    assert coasting.current_left == 0.0, "coast current (A)"

    _, rough = rated_drive("coast", friction=0.005)
    left, right = rough.step(omega, -omega, DT)
    assert left == pytest.approx(-0.005, abs=1e-15), "coast: only friction, against motion"
    assert right == pytest.approx(0.005, abs=1e-15), "coast: only friction, against motion"


def test_off_state_does_not_matter_when_driven():
    """At non-zero duty both off states use the same averaged bridge model (DESIGN.md: the
    off state only matters at exactly zero duty)."""
    results = []
    for off_state in ("brake", "coast"):
        _, drive = rated_drive(off_state)
        drive.set_duty(0.3, -0.6)
        results.append(drive.step(4.0, -2.0, DT))
    assert results[0] == results[1]


# ------------------------------------------------------------------- Coulomb friction


def test_static_friction_holds_a_weak_drive():
    """At rest, Coulomb (static) friction cancels a drive torque up to its limit, and only the
    excess turns the wheel (Coulomb friction model, e.g. Olsson et al., Eur. J. Control 1998
    [memory])."""
    friction = 0.005
    spec, drive = rated_drive(friction=friction)
    motor = drive.motor
    weak = 0.5 * friction * motor.resistance / (motor.torque_constant * 6.0)  # half of friction
    drive.set_duty(weak, -weak)
    assert drive.step(0.0, 0.0, DT) == (0.0, 0.0), "weak drive held at rest"
    _, drive = rated_drive(friction=friction)
    drive.set_duty(1.0, -1.0)
    left, right = drive.step(0.0, 0.0, DT)
    stall = spec.motors.stall_torque
    assert left == pytest.approx(stall - friction, rel=1e-12), "stall torque less friction"
    assert right == pytest.approx(-(stall - friction), rel=1e-12), "reverse stall less friction"


def test_kinetic_friction_opposes_motion():
    """Moving, Coulomb friction is a constant torque against the motion whatever the drive
    (Coulomb friction model [memory: Olsson et al. 1998])."""
    friction, rest_rate = 0.005, 0.01
    for drive_torque in (-0.1, 0.0, 0.003, 0.1):
        assert coulomb_friction(drive_torque, 2.0, friction, rest_rate) == -friction
        assert coulomb_friction(drive_torque, -2.0, friction, rest_rate) == friction
    for rate in np.linspace(-3 * rest_rate, 3 * rest_rate, 61):
        value = coulomb_friction(0.0, rate, friction, rest_rate)
        assert abs(value) <= friction + 1e-18, "never more than the friction torque"
        assert value * rate <= 0.0, "never drives the wheel"


def test_free_wheel_stops_in_coulomb_time_and_stays():
    """A wheel spun to w0 against Coulomb friction F alone decelerates uniformly and stops after
    J w0 / F (constant-torque kinematics, any dynamics text [published]); afterwards it stays
    stopped without chattering. Explicit Euler at 1 ms on the wheel-side inertia."""
    spec, drive = rated_drive("coast", friction=0.005)
    inertia = spec.figures.wheel_inertia_axle + spec.figures.reflected_inertia
    omega0 = 2.0
    expected_stop = inertia * omega0 / 0.005
    omega, t, stopped_at = omega0, 0.0, None
    while t < 2 * expected_stop:
        torque, _ = drive.step(omega, 0.0, DT)
        omega += torque / inertia * DT
        t += DT
        if stopped_at is None and abs(omega) < 1e-3:
            stopped_at = t
    assert stopped_at == pytest.approx(expected_stop, abs=5 * DT), "stopping time (s)"
    assert abs(omega) < 1e-9, "residual wheel rate after stopping (rad/s)"


# ------------------------------------------------------------------- battery


def test_open_circuit_curve_shape():
    """The OCV curve is monotone, within 0.8-1.2x nominal, nominal at half charge; a NiMH cell
    (1.2 V nominal) reads about 1.0 V empty and about 1.4 V full [common practice, SOURCES.md
    §9]."""
    charges = np.linspace(0.0, 1.0, 1001)
    volts = np.array([open_circuit_voltage(c, 6, 1.2) for c in charges])
    assert np.all(np.diff(volts) >= 0.0), "OCV monotone in charge"
    assert volts.min() >= 0.8 * 7.2 and volts.max() <= 1.2 * 7.2, "OCV within 0.8-1.2x"
    assert open_circuit_voltage(0.5, 6, 1.2) == pytest.approx(7.2, rel=1e-12), "nominal"
    assert open_circuit_voltage(0.0, 1, 1.2) == pytest.approx(1.0, abs=0.05), "NiMH empty (V)"
    assert open_circuit_voltage(1.0, 1, 1.2) == pytest.approx(1.4, abs=0.05), "NiMH full (V)"
    assert open_circuit_voltage(1.5, 6, 1.2) == open_circuit_voltage(1.0, 6, 1.2), "clamped"


def test_terminal_voltage_sags_by_internal_drop():
    """Terminal voltage = OCV - R_int I with I = d_l i_l + d_r i_r, the averaged PWM supply
    current (Ohm's law; SOURCES.md §5 averaged sign-magnitude PWM [published])."""
    spec = make_spec()
    drive = DriveTrain(spec)
    battery = spec.battery
    internal = battery.cells * battery.cell_resistance
    assert drive.battery_voltage == pytest.approx(
        open_circuit_voltage(battery.charge, battery.cells, battery.cell_voltage), rel=1e-12
    ), "no load: terminal voltage is the OCV"
    drive.set_duty(1.0, 0.5)
    drive.step(0.0, 3.0, DT)
    current = drive.duty_left * drive.current_left + drive.duty_right * drive.current_right
    assert drive.battery_current == pytest.approx(current, rel=1e-12), "battery current (A)"
    ocv = open_circuit_voltage(drive.battery_charge, battery.cells, battery.cell_voltage)
    # the model refreshes the OCV each 1e-6 of charge: microvolts, hence rel 1e-6
    assert drive.battery_voltage == pytest.approx(ocv - internal * current, rel=1e-6), "sag (V)"
    assert drive.battery_voltage < ocv - 0.1, "a loaded battery sags visibly"


def test_lagged_sag_settles_on_the_circuit_solution():
    """Held at stall, the one-step-lagged sag settles where Kirchhoff's voltage law puts it:
    V_t = OCV - R_int (2 (V_t - V_drop) / R) for two stalled motors at full duty [derived]."""
    spec = make_spec()
    drive = DriveTrain(spec)
    drive.set_duty(1.0, 1.0)
    for _ in range(50):
        drive.step(0.0, 0.0, DT)
    battery = spec.battery
    internal = battery.cells * battery.cell_resistance
    ocv = open_circuit_voltage(drive.battery_charge, battery.cells, battery.cell_voltage)
    ratio = 2 * internal / drive.motor.resistance
    expected = (ocv + ratio * spec.driver.voltage_drop) / (1 + ratio)
    assert drive.battery_voltage == pytest.approx(expected, abs=1e-6), "settled terminal (V)"


def test_charge_decreases_by_current_times_time():
    """State of charge falls by I dt / capacity each step (charge conservation, Q = I t
    [published: any circuits text]); a regenerating motor (I < 0) puts charge back."""
    spec = make_spec()
    drive = DriveTrain(spec)
    drive.set_duty(0.8, 0.8)
    start, drawn = drive.battery_charge, 0.0
    for _ in range(200):
        drive.step(5.0, 5.0, DT)
        drawn += drive.battery_current * DT
    assert drawn > 0.0
    assert drive.battery_charge == pytest.approx(start - drawn / spec.battery.capacity,
                                                 rel=1e-12), "state of charge"

    drive.set_duty(0.1, 0.1)
    no_load = supply_voltage(drive, spec) / drive.motor.back_emf_constant
    before = drive.battery_charge
    drive.step(no_load, no_load, DT)
    assert drive.battery_current < 0.0, "overrunning motor regenerates"
    assert drive.battery_charge > before, "regeneration raises the charge"


def test_set_charge_changes_voltage():
    """Setting the charge (a timeline event) moves the terminal voltage along the OCV curve
    [common practice, SOURCES.md §9]; out-of-range values are refused."""
    spec = make_spec()
    drive = DriveTrain(spec)
    drive.battery_charge = 0.2
    assert drive.battery_charge == 0.2
    assert drive.battery_voltage == pytest.approx(
        open_circuit_voltage(0.2, spec.battery.cells, spec.battery.cell_voltage), rel=1e-12)
    for bad in (-0.1, 1.5, math.nan):
        with pytest.raises(ValueError, match="between 0 and 1"):
            drive.battery_charge = bad


def test_terminal_voltage_never_negative():
    """A battery far too weak for its load reads no less than 0 V at its terminals and the
    bridge never reverses the supply (physical bound; Ohm's law)."""
    spec = make_spec(battery={"cell_resistance": 50.0})
    drive = DriveTrain(spec)
    drive.set_duty(1.0, -1.0)
    for _ in range(20):
        left, right = drive.step(0.0, 0.0, DT)
        assert drive.battery_voltage >= 0.0, "terminal voltage (V)"
        assert left >= 0.0 >= right, "torque follows the duty's sign"


# ------------------------------------------------------------------- envelope


@settings(max_examples=300, deadline=None, derandomize=True)
@given(duty=st.floats(-1.0, 1.0), fraction=st.floats(-1.0, 1.0),
       friction=st.sampled_from([0.0, 0.005]))
def test_torque_within_stall_torque(duty, fraction, friction):
    """Driving or coasting along its torque-speed line (duty and rate not of opposite signs,
    |w| <= w_nl at the present voltage) the wheel torque stays within the stall torque at the
    present voltage, plus Coulomb friction (SOURCES.md §5 [published]); in every quadrant
    within T_stall (|d| + |w|/w_nl) + F."""
    spec = make_spec(motors={"friction_torque": friction})
    drive = DriveTrain(spec)
    motor = drive.motor
    supply = supply_voltage(drive, spec)
    stall = motor.torque_constant * supply / motor.resistance
    no_load = supply / motor.back_emf_constant
    rate = fraction * no_load
    drive.set_duty(duty, duty)
    torque, _ = drive.step(rate, rate, DT)
    slack = 1e-12
    if drive.duty_left * rate >= 0.0:
        assert abs(torque) <= stall + friction + slack, "torque in the motoring quadrants (N·m)"
    bound = stall * (abs(drive.duty_left) + abs(rate) / no_load) + friction
    assert abs(torque) <= bound + slack, "torque in any quadrant (N·m)"


def test_plugging_exceeds_stall_torque():
    """Reversing a motor at no-load speed (plugging) draws twice the stall current: the
    torque-speed line extended to w = -w_nl gives 2 T_stall (SOURCES.md §5 [derived]), which is
    why the stall bound above applies only along the line."""
    spec, drive = rated_drive()
    drive.set_duty(1.0, 1.0)
    left, _ = drive.step(-spec.motors.no_load_speed, 0.0, DT)
    assert left == pytest.approx(2 * spec.motors.stall_torque, rel=1e-12), "plugging torque"
    assert drive.current_left == pytest.approx(2 * spec.motors.stall_current, rel=1e-12)


def test_matches_available_stall_torque_of_figures():
    """At nominal battery voltage the first full-duty step at rest gives the available stall
    torque robot.derive reports, K_t (V_batt - V_drop) / R, less static friction (SOURCES.md §5
    [published]; Coulomb friction [memory])."""
    spec = make_spec(battery={"charge": 0.5})
    drive = DriveTrain(spec)
    drive.set_duty(1.0, 1.0)
    left, right = drive.step(0.0, 0.0, DT)
    expected = spec.figures.available_stall_torque - spec.motors.friction_torque
    assert left == pytest.approx(expected, rel=1e-12), "left available stall torque (N·m)"
    assert right == pytest.approx(expected, rel=1e-12), "right available stall torque (N·m)"


def test_bad_arguments_are_refused():
    """A non-positive step or rest band is a ValueError naming the quantity."""
    drive = DriveTrain(make_spec())
    for dt in (0.0, -0.001, math.nan):
        with pytest.raises(ValueError, match="dt must be positive"):
            drive.step(0.0, 0.0, dt)
    with pytest.raises(ValueError, match="rest_rate"):
        DriveTrain(make_spec(), rest_rate=0.0)


@settings(max_examples=300, deadline=None)
@given(left=st.floats(allow_nan=True, allow_infinity=False, width=64),
       right=st.floats(min_value=-1.5, max_value=1.5),
       bits=st.integers(min_value=1, max_value=16),
       deadband=st.floats(min_value=0.0, max_value=0.5))
def test_set_duty_applies_quantise_duty_exactly(left, right, bits, deadband):
    """DriveTrain.set_duty (with its short path for in-range duties) holds exactly what
    quantise_duty gives, sign of zero included, and refuses NaN alike."""
    _, drive = rated_drive(pwm_bits=bits, deadband=deadband)
    if math.isnan(left):
        with pytest.raises(ValueError, match="finite"):
            drive.set_duty(left, right)
        return
    drive.set_duty(left, right)
    assert repr(drive.duty_left) == repr(quantise_duty(left, bits, deadband)), "left duty"
    assert repr(drive.duty_right) == repr(quantise_duty(right, bits, deadband)), "right duty"
