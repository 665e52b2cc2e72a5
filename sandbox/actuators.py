"""Battery -> H-bridge (PWM) -> DC gear motor -> wheel torque, for the two wheels.

Averaged (per physics step) model in SI units, plain Python floats: one ``DriveTrain.step``
costs a few microseconds, so it can run at every 1 ms physics step. The wheel torque returned
is a joint torque between body and wheel; the caller applies the opposite torque to the body.
Reflected rotor inertia is not modelled here: the physics world carries it.

Motor figures are catalogue figures at the gearbox output shaft. With V the rated voltage:
R = V / stall_current, K_t = stall_torque / stall_current, K_e = V / no_load_speed, so the
steady model reproduces stall torque and no-load speed exactly. Armature inductance is
neglected: L/R of a small gear motor is well under a millisecond, shorter than the step.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

# Open-circuit voltage relative to nominal against state of charge (0 = empty, 1 = full):
# the usual shape of NiMH and Li-ion discharge curves -- a steep fall near empty, a long flat
# middle through nominal, a rise near full (NiMH: 1.0 V cut-off, 1.2 V nominal, ~1.4 V full)
# [common practice; SOURCES.md section 9].
OCV_CURVE: tuple[tuple[float, float], ...] = (
    (0.0, 0.83),
    (0.1, 0.95),
    (0.5, 1.00),
    (0.9, 1.05),
    (1.0, 1.15),
)

# Lower bound of the "at rest" band of wheel rates (rad/s), used when friction is zero.
MIN_REST_RATE = 1e-6


@dataclass(frozen=True)
class MotorConstants:
    """One motor's constants at the gearbox output shaft, SI units."""

    resistance: float  # ohm
    torque_constant: float  # N·m/A
    back_emf_constant: float  # V·s/rad
    friction_torque: float  # N·m, Coulomb friction
    static_friction_torque: float | None = None  # N·m, breakaway; None: friction_torque

    @classmethod
    def from_spec(cls, motors: Any) -> MotorConstants:
        """Constants from the catalogue figures of a ``RobotSpec.motors`` section."""
        return cls(
            resistance=motors.rated_voltage / motors.stall_current,
            torque_constant=motors.stall_torque / motors.stall_current,
            back_emf_constant=motors.rated_voltage / motors.no_load_speed,
            friction_torque=motors.friction_torque,
            static_friction_torque=getattr(motors, "static_friction_torque", None),
        )

    @property
    def breakaway_torque(self) -> float:
        """Static friction (N·m): the drive torque a wheel at rest needs to start turning."""
        static = self.static_friction_torque
        return self.friction_torque if static is None else static


def quantise_duty(duty: float, pwm_bits: int, deadband: float) -> float:
    """The duty the bridge applies: clipped to [-1, 1], 0 inside the deadband, rounded to the
    nearest of the 2**pwm_bits - 1 steps of full scale, sign kept."""
    if not math.isfinite(duty):
        raise ValueError(f"duty must be a finite number, got {duty!r}")
    if pwm_bits < 1:
        raise ValueError(f"pwm_bits must be at least 1, got {pwm_bits}")
    magnitude = min(abs(duty), 1.0)
    if magnitude < deadband:
        return 0.0
    levels = (1 << pwm_bits) - 1
    steps = math.floor(magnitude * levels + 0.5)  # half-up, as a timer compare value would be
    return math.copysign(steps / levels, duty) if steps else 0.0


def open_circuit_voltage(charge: float, cells: int, cell_voltage: float) -> float:
    """Open-circuit battery voltage (V) at a state of charge in [0, 1] (clamped), from the
    nominal cell voltage and the OCV_CURVE shape."""
    charge = min(max(charge, 0.0), 1.0)
    low_charge, low_ratio = OCV_CURVE[0]
    for high_charge, high_ratio in OCV_CURVE[1:]:
        if charge <= high_charge:
            fraction = (charge - low_charge) / (high_charge - low_charge)
            return cells * cell_voltage * (low_ratio + fraction * (high_ratio - low_ratio))
        low_charge, low_ratio = high_charge, high_ratio
    return cells * cell_voltage * low_ratio


def motor_current(volts: float, omega: float, motor: MotorConstants) -> float:
    """Steady armature current (A) at terminal volts and output-shaft rate omega (rad/s)."""
    return (volts - motor.back_emf_constant * omega) / motor.resistance


def steady_torque(volts: float, omega: float, motor: MotorConstants) -> float:
    """Output-shaft torque (N·m) on the torque-speed line, without friction."""
    return motor.torque_constant * motor_current(volts, omega, motor)


def coulomb_friction(drive_torque: float, rate: float, friction_torque: float,
                     rest_rate: float) -> float:
    """Friction torque (N·m) to add to a drive torque at a wheel rate relative to the body.

    Moving (|rate| > rest_rate): friction_torque against the motion. At rest it is static
    friction cancelling the drive torque up to friction_torque, so a weak drive does not creep;
    inside the band a term proportional to the rate also stops any residual drift and keeps
    the torque continuous at the band edge when the drive is idle.
    """
    if rate > rest_rate:
        return -friction_torque
    if rate < -rest_rate:
        return friction_torque
    hold = -drive_torque - friction_torque * rate / rest_rate
    return max(-friction_torque, min(friction_torque, hold))


def karnopp_friction(drive_torque: float, rest_drive_torque: float, rate: float,
                     kinetic: float, static: float, rest_rate: float) -> float:
    """Stick-slip friction torque (N·m) to add to a drive torque (Karnopp, J. Dyn. Sys. Meas.
    Control 107(1), 1985).

    ``drive_torque`` is the motor's torque now, ``rest_drive_torque`` the torque it would
    give with the wheel at rest (no back-EMF): the applied torque of Karnopp's test.
    Outside the band |rate| <= rest_rate the wheel slips: kinetic friction against the
    motion. Inside it the wheel is at rest: it sticks while |rest_drive_torque| <= static,
    friction cancelling the drive (and a term proportional to the rate bringing a residual
    drift to rest, as in :func:`coulomb_friction`); past the breakaway torque it slips at
    once, kinetic friction against the applied torque.
    """
    if rate > rest_rate:
        return -kinetic
    if rate < -rest_rate:
        return kinetic
    if rest_drive_torque > static:
        return -kinetic
    if rest_drive_torque < -static:
        return kinetic
    hold = -drive_torque - static * rate / rest_rate
    return max(-static, min(static, hold))


def _side_torque(duty: float, rate: float, supply: float, motor: MotorConstants, band: float,
                 brake_when_off: bool) -> tuple[float, float]:
    """One side of :meth:`DriveTrain.step` with its own motor and Karnopp friction:
    (current A, wheel torque N·m) at ``duty`` from ``supply`` (V), the wheel turning at
    ``rate`` (rad/s relative to the body), at rest within ``band`` (rad/s)."""
    if duty == 0.0 and not brake_when_off:
        current = rest_current = 0.0
    else:
        current = (duty * supply - motor.back_emf_constant * rate) / motor.resistance
        rest_current = None
    drive = motor.torque_constant * current
    # moving past the band: kinetic friction without the call (the call's floats)
    if rate > band:
        return current, drive - motor.friction_torque
    if rate < -band:
        return current, drive + motor.friction_torque
    if rest_current is None:
        rest_current = duty * supply / motor.resistance
    return current, drive + karnopp_friction(drive, motor.torque_constant * rest_current, rate,
                                             motor.friction_torque, motor.breakaway_torque, band)


class DriveTrain:
    """Battery, H-bridge and the two wheel motors of one robot, stepped with the physics.

    ``set_duty`` holds the commanded duties until the next call; ``step`` turns wheel rates
    relative to the body (rad/s, + forward) into wheel torques (N·m, + forward).

    rest_rate (rad/s): wheel rates below it count as at rest for Coulomb friction. By default
    it is 2·friction·dt / J, J = wheel plus reflected rotor inertia about the axle: the band
    friction could clear in two steps, so the in-band term never makes the wheel chatter.

    Real parts: each side has its own motor constants (``spec.motor_side``), and a motor
    with ``static_friction_torque`` sticks and slips (:func:`karnopp_friction`, band
    2·static·dt / J). Such a drive steps through ``_step_sides``; two alike motors without
    static friction keep the written-out ``step`` below.
    """

    def __init__(self, spec: Any, *, rest_rate: float | None = None):
        if rest_rate is not None and not rest_rate > 0:
            raise ValueError(f"rest_rate must be positive (rad/s), got {rest_rate!r}")
        side_spec = getattr(spec, "motor_side", None)
        if side_spec is None:  # a bare description without per-side figures
            self.motor_left = self.motor_right = MotorConstants.from_spec(spec.motors)
        else:
            self.motor_left = MotorConstants.from_spec(side_spec("left"))
            self.motor_right = MotorConstants.from_spec(side_spec("right"))
        self.motor = self.motor_left  # both motors, when they are alike
        driver, battery = spec.driver, spec.battery
        self._pwm_bits = driver.pwm_bits
        self._pwm_levels = (1 << driver.pwm_bits) - 1
        self._deadband = driver.deadband
        self._brake_when_off = driver.off_state == "brake"
        self._voltage_drop = driver.voltage_drop
        self._cells = battery.cells
        self._cell_voltage = battery.cell_voltage
        self._internal_resistance = battery.cells * battery.cell_resistance
        self._ocv_charge = math.nan  # charge at which _ocv was last computed
        self._ocv = 0.0
        self._capacity = battery.capacity
        figures = spec.figures
        self._wheel_side_inertia = figures.wheel_inertia_axle + figures.reflected_inertia
        sides = (getattr(figures, "left", None), getattr(figures, "right", None))
        self._side_inertia = tuple(
            self._wheel_side_inertia if f is None else f.wheel_inertia_axle + f.reflected_inertia
            for f in sides)
        self._side_bands = (MIN_REST_RATE, MIN_REST_RATE)
        if (self.motor_left != self.motor_right
                or self.motor_left.static_friction_torque is not None
                or self.motor_right.static_friction_torque is not None):
            self.step = self._step_sides  # type: ignore[method-assign]
        self._fixed_rest_rate = rest_rate
        self._rest_rate = MIN_REST_RATE
        self._rest_rate_dt = math.nan  # the step the band was worked out for
        self._duty_left = self._duty_right = 0.0
        self._current_left = self._current_right = 0.0
        # (left, right) torque of the last step (N·m at the output shaft, friction in)
        self.last_torques = (0.0, 0.0)
        self._battery_current = 0.0
        self._charge = battery.charge
        self._terminal_voltage = self._terminal(self._charge, 0.0)

    # ----------------------------------------------------------------- state, read-only

    @property
    def duty_left(self) -> float:
        """Applied (clipped, quantised) left duty in [-1, 1]."""
        return self._duty_left

    @property
    def duty_right(self) -> float:
        """Applied (clipped, quantised) right duty in [-1, 1]."""
        return self._duty_right

    @property
    def current_left(self) -> float:
        """Left motor current in the last step (A, + when driving forward)."""
        return self._current_left

    @property
    def current_right(self) -> float:
        """Right motor current in the last step (A, + when driving forward)."""
        return self._current_right

    @property
    def battery_current(self) -> float:
        """Averaged battery current in the last step (A, negative when regenerating)."""
        return self._battery_current

    @property
    def battery_voltage(self) -> float:
        """Battery terminal voltage (V) after the last step; the next step drives with it."""
        return self._terminal_voltage

    @property
    def battery_charge(self) -> float:
        """State of charge, 0 (empty) to 1 (full)."""
        return self._charge

    @battery_charge.setter
    def battery_charge(self, charge: float) -> None:
        if not 0.0 <= charge <= 1.0:
            raise ValueError(f"battery charge must be between 0 and 1, got {charge!r}")
        self._charge = float(charge)
        self._terminal_voltage = self._terminal(self._charge, self._battery_current)

    # ----------------------------------------------------------------- commands

    def set_duty(self, left: float, right: float) -> None:
        """Command both duties (each nominally in [-1, 1]); held until the next call."""
        # Called every controller tick: duties already in range (the runner clips them)
        # take a short path; anything else, NaN included, goes through quantise_duty.
        levels, deadband = self._pwm_levels, self._deadband
        if -1.0 <= left <= 1.0 and (left >= deadband or -left >= deadband):
            steps = math.floor(abs(left) * levels + 0.5)
            self._duty_left = math.copysign(steps / levels, left) if steps else 0.0
        else:
            self._duty_left = quantise_duty(left, self._pwm_bits, deadband)
        if -1.0 <= right <= 1.0 and (right >= deadband or -right >= deadband):
            steps = math.floor(abs(right) * levels + 0.5)
            self._duty_right = math.copysign(steps / levels, right) if steps else 0.0
        else:
            self._duty_right = quantise_duty(right, self._pwm_bits, deadband)

    def step(self, rate_left: float, rate_right: float, dt: float) -> tuple[float, float]:
        """Wheel torques (N·m, + forward) for one physics step of dt seconds, given the wheel
        rates relative to the body (rad/s, + forward). Updates currents and battery state."""
        if dt != self._rest_rate_dt:  # first step, or a new dt (also rejects bad dt)
            self._set_rest_rate(dt)
        # The bridge sees the terminal voltage left by the previous step's current: a one-step
        # lag that avoids an algebraic loop; the currents move on the mechanical time scale
        # (tens of ms), so at 1 ms the error is tiny. It stays stable while
        # cells·cell_resistance < motor resistance / (duty_l² + duty_r²).
        supply = self._terminal_voltage - self._voltage_drop
        if supply < 0.0:
            supply = 0.0
        duty_left, duty_right = self._duty_left, self._duty_right
        motor = self.motor
        ke, resistance = motor.back_emf_constant, motor.resistance
        # both wheels written out: this runs every physics step (friction in _with_friction)
        if duty_left == 0.0 and not self._brake_when_off:
            current_left = 0.0
        else:
            current_left = (duty_left * supply - ke * rate_left) / resistance
        if duty_right == 0.0 and not self._brake_when_off:
            current_right = 0.0
        else:
            current_right = (duty_right * supply - ke * rate_right) / resistance
        # Coulomb friction: a wheel moving either way (the usual case) written out here,
        # one at rest through _with_friction
        kt, friction, rest_rate = motor.torque_constant, motor.friction_torque, self._rest_rate
        if rate_left > rest_rate:
            torque_left = kt * current_left - friction
        elif rate_left < -rest_rate:
            torque_left = kt * current_left + friction
        else:
            torque_left = self._with_friction(kt * current_left, rate_left)
        if rate_right > rest_rate:
            torque_right = kt * current_right - friction
        elif rate_right < -rest_rate:
            torque_right = kt * current_right + friction
        else:
            torque_right = self._with_friction(kt * current_right, rate_right)
        self._current_left, self._current_right = current_left, current_right
        # Averaged sign-magnitude PWM: the supply carries the motor current for the duty
        # fraction of each period; a shorted (braking) motor draws nothing from it.
        battery_current = duty_left * current_left + duty_right * current_right
        self._battery_current = battery_current
        charge = self._charge - battery_current * dt / self._capacity
        charge = 0.0 if charge < 0.0 else 1.0 if charge > 1.0 else charge
        self._charge = charge
        # _terminal written out for the usual step, when the charge has barely moved
        if abs(charge - self._ocv_charge) <= 1e-6:
            terminal = self._ocv - self._internal_resistance * battery_current
            self._terminal_voltage = terminal if terminal > 0.0 else 0.0
        else:
            self._terminal_voltage = self._terminal(charge, battery_current)
        torques = self.last_torques = (torque_left, torque_right)
        return torques

    def _step_sides(self, rate_left: float, rate_right: float, dt: float) -> tuple[float, float]:
        """``step`` for two motors that differ or that stick and slip: the same model, each
        side with its own constants and Karnopp friction."""
        if dt != self._rest_rate_dt:
            self._set_rest_rate(dt)
        supply = self._terminal_voltage - self._voltage_drop
        if supply < 0.0:
            supply = 0.0
        duty_left, duty_right = self._duty_left, self._duty_right
        band_left, band_right = self._side_bands
        brake = self._brake_when_off
        # one call a side (measured here: 3.7 us a step with the loop over zipped sides and a
        # friction call each, 2.2 us so, 1.2 us with both sides written out in place)
        current_left, torque_left = _side_torque(duty_left, rate_left, supply, self.motor_left,
                                                 band_left, brake)
        current_right, torque_right = _side_torque(duty_right, rate_right, supply,
                                                   self.motor_right, band_right, brake)
        self._current_left, self._current_right = current_left, current_right
        self._draw(duty_left * current_left + duty_right * current_right, dt)
        out = self.last_torques = (torque_left, torque_right)
        return out

    # ----------------------------------------------------------------- internals

    def _draw(self, battery_current: float, dt: float) -> None:
        """Take ``battery_current`` (A) from the battery for dt seconds (as ``step`` does)."""
        self._battery_current = battery_current
        charge = self._charge - battery_current * dt / self._capacity
        self._charge = 0.0 if charge < 0.0 else 1.0 if charge > 1.0 else charge
        self._terminal_voltage = self._terminal(self._charge, battery_current)

    def _with_friction(self, drive: float, rate: float) -> float:
        """Wheel torque (N·m): the motor's ``drive`` torque with Coulomb friction added.

        At zero duty an open bridge (coast) passes no current: the back-EMF stays
        below the supply plus the diodes' drop.
        """
        rest_rate = self._rest_rate
        if rate > rest_rate:  # moving: the usual case, without a further call
            return drive - self.motor.friction_torque
        if rate < -rest_rate:
            return drive + self.motor.friction_torque
        return drive + coulomb_friction(drive, rate, self.motor.friction_torque, rest_rate)

    def _terminal(self, charge: float, battery_current: float) -> float:
        """Terminal voltage (V): open-circuit voltage minus the internal drop, never below 0."""
        # The open-circuit voltage moves by microvolts per step: recompute it only when the
        # charge has moved by 1e-6 of capacity (saves a table look-up every physics step).
        if not abs(charge - self._ocv_charge) <= 1e-6:  # (NaN at first: always computes)
            self._ocv = open_circuit_voltage(charge, self._cells, self._cell_voltage)
            self._ocv_charge = charge
        terminal = self._ocv - self._internal_resistance * battery_current
        return terminal if terminal > 0.0 else 0.0

    def _set_rest_rate(self, dt: float) -> None:
        if not dt > 0:
            raise ValueError(f"dt must be positive (s), got {dt!r}")
        if self._fixed_rest_rate is not None:
            self._rest_rate = self._fixed_rest_rate
        else:
            band = 2.0 * self.motor.friction_torque * dt / self._wheel_side_inertia
            self._rest_rate = max(band, MIN_REST_RATE)
        # each side's band: the friction that holds it at rest (static, if it has one)
        # could clear it in two steps
        self._side_bands = tuple(
            self._fixed_rest_rate if self._fixed_rest_rate is not None
            else max(2.0 * motor.breakaway_torque * dt / inertia, MIN_REST_RATE)
            for motor, inertia in zip((self.motor_left, self.motor_right), self._side_inertia))
        self._rest_rate_dt = dt
