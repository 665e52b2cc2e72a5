"""Test controller: PD on the tilt, the tilt integrated from the gyro.

duty = kp * tilt + kd * pitch rate + speed_kd * wheel speed (rad/s of the wheel
relative to the body, from the encoders), the same on both wheels. The tilt
starts from the accelerometer's reading at the first tick (the robot is at rest
then) and is integrated from the gyro afterwards, so with an ideal IMU it
follows the true tilt and the loop is the linear law the tests model.

Config: ``kp`` (duty/rad), ``kd`` (duty/(rad/s)), ``speed_kd`` (duty per rad/s
of wheel rate, default 0: no speed feedback), ``duty`` (a constant added duty).
"""

import math


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.kp = float(config.get("kp", 0.0))
        self.kd = float(config.get("kd", 0.0))
        self.speed_kd = float(config.get("speed_kd", 0.0))
        self.duty = float(config.get("duty", 0.0))
        self.counts_per_rad = robot.counts_per_rev / (2 * math.pi)
        self.tilt = None
        self.last_ticks = None

    def step(self, r):
        if self.tilt is None:
            self.tilt = math.atan2(-r.accel[0], r.accel[2])
        else:
            self.tilt += r.gyro[1] * r.dt
        ticks = 0.5 * (r.ticks[0] + r.ticks[1])
        rate = 0.0 if self.last_ticks is None else (ticks - self.last_ticks) / (
            self.counts_per_rad * r.dt)
        self.last_ticks = ticks
        duty = self.duty + self.kp * self.tilt + self.kd * r.gyro[1] + self.speed_kd * rate
        return duty, duty
