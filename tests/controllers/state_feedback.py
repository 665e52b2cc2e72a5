"""Test controller: the raw state feedback `upright analyze --emit-config` writes, exactly.

duty = -(k_position*x + k_speed*v + k_pitch*pitch + k_pitch_rate*pitch_rate) on both
wheels, with the state rebuilt from the readings so that, on the robot's sampled
linear model with an ideal tilt sensor, it is the true state at the tick:

- pitch from the accelerometer's tilt atan2(-a_x, a_z), pitch rate from the gyro;
- x = r * (n / c + pitch), n the mean of the two encoders' counts, c counts per rad;
- v from the one-tick model s_k = F s_{k-1} + g u_{k-1} (``step_matrix`` F and
  ``step_input`` g in the config: the zero-order-hold discretisation at the controller
  period): the position row gives v_{k-1}, the speed row then v_k (a deadbeat
  reconstruction; the first tick takes v = 0).

Config: the four gains (duty per SI unit), ``step_matrix`` (4 x 4), ``step_input`` (4).
"""

import math


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.k = [float(config[key]) for key in
                  ("k_position", "k_speed", "k_pitch", "k_pitch_rate")]
        self.F = [[float(v) for v in row] for row in config["step_matrix"]]
        self.g = [float(v) for v in config["step_input"]]
        self.r = robot.wheel_radius
        self.c = robot.counts_per_wheel_rev / (2 * math.pi)
        self.last = None  # (x, pitch, pitch_rate, duty) of the previous tick

    def reset(self):
        self.last = None

    def step(self, reading):
        pitch = math.atan2(-reading.accel[0], reading.accel[2])
        rate = reading.gyro[1]
        x = self.r * (0.5 * (reading.ticks[0] + reading.ticks[1]) / self.c + pitch)
        if self.last is None:
            v = 0.0
        else:
            x0, p0, w0, u0 = self.last
            F, g = self.F, self.g
            v0 = (x - F[0][0] * x0 - F[0][2] * p0 - F[0][3] * w0 - g[0] * u0) / F[0][1]
            v = F[1][0] * x0 + F[1][1] * v0 + F[1][2] * p0 + F[1][3] * w0 + g[1] * u0
        k = self.k
        duty = -(k[0] * x + k[1] * v + k[2] * pitch + k[3] * rate)
        self.last = (x, pitch, rate, duty)
        return duty, duty
