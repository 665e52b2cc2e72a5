"""Helpers a controller script may import: :class:`Pid`, the tilt estimators
:class:`ComplementaryTilt`, :func:`accel_tilt` and :class:`KalmanTilt`,
:class:`WheelOdometry`, and starting gains :func:`pendulum_gains`.

Scripts import them from :mod:`sandbox.control`. Everything is SI; pitch is the
rotation about body +y, positive when the top leans forward.
"""

from __future__ import annotations

import math

import numpy as np

from .contract import Reading, RobotFacts

__all__ = [
    "GRAVITY",
    "ComplementaryTilt",
    "KalmanTilt",
    "Pid",
    "WheelOdometry",
    "accel_tilt",
    "pendulum_gains",
]


class Pid:
    """PID with derivative on the measurement, a first-order derivative filter and
    back-calculation anti-windup (Åström & Murray, *Feedback Systems*, PID
    implementation):

    - ``D_k = T_f/(T_f+h)·D_{k-1} − k_d/(T_f+h)·(y_k − y_{k-1})``
    - ``v = k_p·e + I_k + D_k``, ``u = clip(v, output_limits)``
    - ``I_{k+1} = I_k + k_i·h·e + (h/T_t)·(u − v)``

    ``kp`` (output per unit error), ``ki`` (per unit error per second), ``kd``
    (per unit error rate). ``derivative_filter`` T_f (s); 0 differences without
    filtering, a common choice is T_d/N = kd/kp/N with N 5–20 [common practice].
    ``output_limits`` (low, high) or None for none. ``tracking_time`` T_t (s):
    None picks √(T_i·T_d) with T_i = kp/ki, T_d = kd/kp (or T_i without D, or one
    step for pure integral control, which holds the integrator at the limit);
    ``math.inf`` turns anti-windup off. Loops where more measurement needs more
    output (tilt in a balancing loop) use negative gains.
    """

    __slots__ = ("kp", "ki", "kd", "derivative_filter", "low", "high", "tracking_time",
                 "proportional", "integral", "derivative", "output", "_last_measurement")

    def __init__(
        self,
        kp: float,
        ki: float = 0.0,
        kd: float = 0.0,
        *,
        derivative_filter: float = 0.0,
        output_limits: tuple[float, float] | None = (-1.0, 1.0),
        tracking_time: float | None = None,
    ):
        for label, value in (("kp", kp), ("ki", ki), ("kd", kd)):
            if not math.isfinite(value):
                raise ValueError(f"Pid: {label} must be a finite number, got {value!r}")
        if not (derivative_filter >= 0 and math.isfinite(derivative_filter)):
            raise ValueError(f"Pid: derivative_filter must be >= 0 s, got {derivative_filter!r}")
        low, high = (-math.inf, math.inf) if output_limits is None else map(float, output_limits)
        if not low < high:
            raise ValueError(f"Pid: output_limits must be (low, high) with low < high, "
                             f"got {output_limits!r}")
        if tracking_time is not None and not tracking_time > 0:
            raise ValueError(f"Pid: tracking_time must be > 0 s, got {tracking_time!r}")
        self.kp, self.ki, self.kd = float(kp), float(ki), float(kd)
        self.derivative_filter = float(derivative_filter)
        self.low, self.high = low, high
        self.tracking_time = (float(tracking_time) if tracking_time is not None
                              else _default_tracking_time(self.kp, self.ki, self.kd))
        self.reset()

    def reset(self) -> None:
        """Forget the integral, the derivative state and the last measurement."""
        self.proportional = 0.0
        self.integral = 0.0
        self.derivative = 0.0
        self.output = 0.0
        self._last_measurement: float | None = None

    def update(
        self, setpoint: float, measurement: float, dt: float, measured_rate: float | None = None
    ) -> float:
        """One step of length ``dt`` (s): the (saturated) output.

        ``measured_rate`` (the measurement's time derivative, e.g. a gyro rate)
        replaces differencing: ``y_k − y_{k−1}`` becomes ``measured_rate·dt``.
        The first call has no previous measurement and takes its difference as 0.
        """
        if not dt > 0.0:
            raise ValueError(f"Pid.update: dt must be > 0 s, got {dt!r}")
        error = setpoint - measurement
        if measured_rate is not None:
            change = measured_rate * dt
        elif self._last_measurement is None:
            change = 0.0
        else:
            change = measurement - self._last_measurement
        self._last_measurement = measurement
        t_f = self.derivative_filter
        derivative = (t_f * self.derivative - self.kd * change) / (t_f + dt)
        proportional = self.kp * error
        unsaturated = proportional + self.integral + derivative
        output = unsaturated
        if output > self.high:
            output = self.high
        elif output < self.low:
            output = self.low
        tracking = self.tracking_time or dt  # 0.0 stands for "one step" (pure integral)
        self.integral += self.ki * dt * error + (dt / tracking) * (output - unsaturated)
        self.proportional = proportional
        self.derivative = derivative
        self.output = output
        return output


def _default_tracking_time(kp: float, ki: float, kd: float) -> float:
    """Åström & Murray's rule of thumb T_t = √(T_i·T_d); T_i without D; 0 = one step."""
    if ki == 0.0 or kp == 0.0:
        return 0.0
    integral_time = abs(kp / ki)
    if kd == 0.0:
        return integral_time
    return math.sqrt(integral_time * abs(kd / kp))


class ComplementaryTilt:
    """Tilt (rad) from gyro rate and accelerometer tilt, complementary filter.

    ``θ_n = α·(θ_{n−1} + ω_n·dt) + (1 − α)·θ_acc,n`` with ``α = τ/(τ + dt)``:
    low-pass 1/(τs+1) on the accelerometer tilt, high-pass on the integrated
    gyro. ``time_constant`` τ (s). The first update starts from the
    accelerometer tilt. A constant gyro bias b leaves a steady error τ·b.
    """

    __slots__ = ("time_constant", "angle", "started")

    def __init__(self, time_constant: float):
        if not (time_constant > 0 and math.isfinite(time_constant)):
            raise ValueError(f"ComplementaryTilt: time_constant must be > 0 s, "
                             f"got {time_constant!r}")
        self.time_constant = float(time_constant)
        self.reset()

    def reset(self) -> None:
        self.angle = 0.0
        self.started = False

    def alpha(self, dt: float) -> float:
        """Weight of the gyro path for a step ``dt`` (s): τ/(τ + dt)."""
        return self.time_constant / (self.time_constant + dt)

    def update(self, gyro_rate: float, accel_tilt: float | None, dt: float) -> float:
        """New tilt estimate (rad) from pitch rate (rad/s) and accelerometer tilt (rad).

        ``accel_tilt`` None means no usable accelerometer reading this tick (see
        :func:`accel_tilt`): the gyro alone carries the estimate (from 0 if it is
        the very first update).
        """
        if not dt > 0.0:
            raise ValueError(f"ComplementaryTilt.update: dt must be > 0 s, got {dt!r}")
        if accel_tilt is None:
            self.started = True
            self.angle += gyro_rate * dt
            return self.angle
        if not self.started:
            self.started = True
            self.angle = float(accel_tilt)
            return self.angle
        alpha = self.time_constant / (self.time_constant + dt)
        self.angle = alpha * (self.angle + gyro_rate * dt) + (1.0 - alpha) * accel_tilt
        return self.angle

    def update_from_reading(self, r: Reading) -> float:
        """Update from a :class:`Reading`: gyro y, and tilt atan2(−accel_x, accel_z)."""
        return self.update(r.gyro[1], math.atan2(-r.accel[0], r.accel[2]), r.dt)


GRAVITY = 9.80665  # m/s², standard gravity


def accel_tilt(r: Reading, forward_acceleration: float = 0.0,
               tolerance: float = 0.1) -> float | None:
    """Tilt (rad) from the accelerometer, atan2(−a_x, a_z), or None when it cannot be trusted.

    ``forward_acceleration`` (m/s², e.g. from :class:`WheelOdometry`) is the
    robot's own acceleration, which the accelerometer feels as much as gravity:
    it is taken out of a_x first. While the specific force is more than
    ``tolerance`` g away from 1 g (a shove, a bump) the result is None, so a
    filter can trust its gyro alone until the body settles.
    """
    ax = r.accel[0] - forward_acceleration
    ay, az = r.accel[1], r.accel[2]
    if abs(math.sqrt(ax * ax + ay * ay + az * az) - GRAVITY) > tolerance * GRAVITY:
        return None
    return math.atan2(-ax, az)


class WheelOdometry:
    """Distance (m), speed (m/s) and acceleration (m/s²) along the floor from the encoders.

    The encoders count the wheels' turn relative to the body; adding the body's
    tilt gives the wheels' turn on the floor, times the radius the distance.
    Speed and acceleration are differences through a first-order low-pass of
    time constant ``speed_filter`` (s).
    """

    __slots__ = ("radius", "counts_per_rev", "speed_filter", "distance", "speed",
                 "acceleration", "_started")

    def __init__(self, robot: RobotFacts, speed_filter: float = 0.05):
        self.radius = robot.wheel_radius
        self.counts_per_rev = robot.counts_per_wheel_rev
        self.speed_filter = float(speed_filter)
        self.reset()

    def reset(self) -> None:
        self.distance = 0.0
        self.speed = 0.0
        self.acceleration = 0.0
        self._started = False

    def update(self, ticks: tuple[int, int], tilt: float, dt: float) -> float:
        """New distance (m) from both encoder counts, the tilt (rad) and the tick (s)."""
        wheel = math.pi * (ticks[0] + ticks[1]) / self.counts_per_rev  # mean turn, rad
        distance = self.radius * (wheel + tilt)
        if self._started:
            blend = dt / (self.speed_filter + dt)
            previous = self.speed
            self.speed += blend * ((distance - self.distance) / dt - self.speed)
            self.acceleration += blend * ((self.speed - previous) / dt - self.acceleration)
        self._started = True
        self.distance = distance
        return distance


def pendulum_gains(robot: RobotFacts, speed_up: float = 2.5,
                   damping: float = 0.7) -> tuple[float, float]:
    """Starting (kp duty/rad, kd duty/(rad/s)) for a PD tilt loop, from the robot's facts.

    Tilt loop alone (wheels held): I·θ̈ = m g l θ − T (kp θ + kd θ̇), T the stall
    torque of both wheels, I the body's pitch inertia about the axle; gains that
    give natural frequency ``speed_up`` × √(m g l / I) with damping ratio
    ``damping`` (second-order pole placement).
    """
    lean = robot.body_mass * GRAVITY * robot.com_height  # N·m per rad
    omega = speed_up * math.sqrt(lean / robot.pitch_inertia)
    torque = 2.0 * robot.stall_torque
    kp = (lean + robot.pitch_inertia * omega**2) / torque
    kd = 2.0 * damping * omega * robot.pitch_inertia / torque
    return kp, kd


class KalmanTilt:
    """Tilt (rad) and gyro bias (rad/s) by a two-state discrete Kalman filter.

    Model: ``angle' = gyro_rate − bias − n_g``, ``bias' = n_b``; measurement:
    accelerometer tilt with white error of standard deviation ``angle_noise``.
    Noise parameters, SI:

    - ``angle_noise`` (rad): standard deviation of one accelerometer tilt sample.
      The robot's own accelerations disturb it, so values well above the pure
      sensor noise work better [common practice].
    - ``rate_noise`` (rad/s/√Hz = rad/√s): gyro white-noise density (angle random
      walk), as in IEEE Std 952; adds ``rate_noise²·dt`` to the angle variance.
    - ``bias_noise`` (rad/s/√s): gyro bias random-walk density; adds ``bias_noise²·dt``
      to the bias variance. 0 treats the bias as constant.
    - ``initial_bias_std`` (rad/s): spread of the turn-on bias; default 5 °/s, the
      top of the consumer MEMS range [common practice].

    Process noise is the exact discretisation of the continuous model (Van Loan).
    The first update starts the angle from the accelerometer with variance
    ``angle_noise²``. ``angle``, ``bias``, ``rate`` (bias-corrected), ``gain`` (K),
    ``covariance`` (posterior P) and ``prior_covariance`` are readable.
    """

    __slots__ = ("angle_noise", "rate_noise", "bias_noise", "initial_bias", "initial_bias_std",
                 "angle", "bias", "rate", "started", "_p", "_prior", "_gain")

    def __init__(
        self,
        angle_noise: float,
        rate_noise: float,
        bias_noise: float,
        *,
        initial_bias: float = 0.0,
        initial_bias_std: float = math.radians(5.0),
    ):
        if not (angle_noise > 0 and math.isfinite(angle_noise)):
            raise ValueError(f"KalmanTilt: angle_noise must be > 0 rad, got {angle_noise!r}")
        for label, value in (("rate_noise", rate_noise), ("bias_noise", bias_noise),
                             ("initial_bias_std", initial_bias_std)):
            if not (value >= 0 and math.isfinite(value)):
                raise ValueError(f"KalmanTilt: {label} must be >= 0, got {value!r}")
        self.angle_noise = float(angle_noise)
        self.rate_noise = float(rate_noise)
        self.bias_noise = float(bias_noise)
        self.initial_bias = float(initial_bias)
        self.initial_bias_std = float(initial_bias_std)
        self.reset()

    def reset(self) -> None:
        self.angle = 0.0
        self.bias = self.initial_bias
        self.rate = 0.0
        self.started = False
        # symmetric 2×2 matrices kept as (p_aa, p_ab, p_bb) for speed
        self._p = (self.angle_noise**2, 0.0, self.initial_bias_std**2)
        self._prior = self._p
        self._gain = (1.0, 0.0)

    def matrices(self, dt: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The filter's model for a step ``dt`` (s): (F, H, Q, R)."""
        q_aa, q_ab, q_bb = self._process_noise(dt)
        return (
            np.array([[1.0, -dt], [0.0, 1.0]]),
            np.array([[1.0, 0.0]]),
            np.array([[q_aa, q_ab], [q_ab, q_bb]]),
            np.array([[self.angle_noise**2]]),
        )

    def _process_noise(self, dt: float) -> tuple[float, float, float]:
        walk = self.bias_noise * self.bias_noise
        return (self.rate_noise * self.rate_noise * dt + walk * dt**3 / 3.0,
                -walk * dt * dt / 2.0,
                walk * dt)

    def predict(self, gyro_rate: float, dt: float) -> float:
        """Propagate with the pitch rate (rad/s) over ``dt`` (s); returns the angle (rad)."""
        if not dt > 0.0:
            raise ValueError(f"KalmanTilt: dt must be > 0 s, got {dt!r}")
        self.rate = gyro_rate - self.bias
        self.angle += self.rate * dt
        p_aa, p_ab, p_bb = self._p
        q_aa, q_ab, q_bb = self._process_noise(dt)
        # F P Fᵀ + Q with F = [[1, −dt], [0, 1]]
        self._p = self._prior = (
            p_aa - 2.0 * dt * p_ab + dt * dt * p_bb + q_aa,
            p_ab - dt * p_bb + q_ab,
            p_bb + q_bb,
        )
        return self.angle

    def correct(self, accel_tilt: float) -> float:
        """Update with an accelerometer tilt (rad); returns the angle (rad)."""
        p_aa, p_ab, p_bb = self._p
        innovation_var = p_aa + self.angle_noise * self.angle_noise
        k_angle = p_aa / innovation_var
        k_bias = p_ab / innovation_var
        residual = accel_tilt - self.angle
        self.angle += k_angle * residual
        self.bias += k_bias * residual
        self.rate -= k_bias * residual
        self._p = ((1.0 - k_angle) * p_aa, (1.0 - k_angle) * p_ab, p_bb - k_bias * p_ab)
        self._gain = (k_angle, k_bias)
        return self.angle

    def update(self, gyro_rate: float, accel_tilt: float, dt: float) -> float:
        """Predict with the pitch rate (rad/s), correct with the accelerometer tilt (rad)."""
        if not self.started:
            if not dt > 0.0:
                raise ValueError(f"KalmanTilt: dt must be > 0 s, got {dt!r}")
            self.started = True
            self.angle = float(accel_tilt)
            self.rate = gyro_rate - self.bias
            return self.angle
        self.predict(gyro_rate, dt)
        return self.correct(accel_tilt)

    def update_from_reading(self, r: Reading) -> float:
        """Update from a :class:`Reading`: gyro y, and tilt atan2(−accel_x, accel_z)."""
        return self.update(r.gyro[1], math.atan2(-r.accel[0], r.accel[2]), r.dt)

    @property
    def covariance(self) -> np.ndarray:
        """Posterior covariance P of (angle rad, bias rad/s)."""
        return _symmetric(self._p)

    @property
    def prior_covariance(self) -> np.ndarray:
        """Covariance after the last prediction, before its correction."""
        return _symmetric(self._prior)

    @property
    def gain(self) -> np.ndarray:
        """Kalman gain K of the last correction: (angle, bias) per rad of residual."""
        return np.array(self._gain)


def _symmetric(p: tuple[float, float, float]) -> np.ndarray:
    return np.array([[p[0], p[1]], [p[1], p[2]]])
