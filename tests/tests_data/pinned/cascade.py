"""Example controller: a tilt loop inside a wheel-speed and position loop.

Inner loop: PD on the complementary-filter tilt, towards a target tilt.
Outer loop: the encoders give the distance travelled and the speed; being
ahead of the target position, or faster than the asked-for speed, asks the
robot to lean back, which the inner loop does by driving the wheels forward
first. The robot therefore holds its spot, and follows speed and turn
setpoints from a test timeline.

Config keys (all optional):
  tilt_kp, tilt_kd        duty per rad, duty per rad/s (inner loop)
  speed_kp                rad of target tilt per m/s of speed error
  position_kp             rad of target tilt per m of position error
  max_target_tilt         rad, limit on the outer loop's target
  speed_filter            s, time constant of the speed estimate's low-pass filter
  filter_time_constant    s, complementary filter
  turn_kp                 duty per rad/s of yaw-rate error

Without gains in the config the tilt loop's come from the robot's facts
(`pendulum_gains`, as in pid_tilt.py) and the outer loop's are the ratios an
LQR design gives for the demo robots; `upright analyze ROBOT --emit-config
FILE --for cascade` writes LQR-based gains with the same keys.
"""

import math

from sandbox.control import ComplementaryTilt, WheelOdometry, accel_tilt, pendulum_gains


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        kp, kd = pendulum_gains(robot)
        self.tilt_kp = float(config.get("tilt_kp", kp))
        self.tilt_kd = float(config.get("tilt_kd", kd))
        # rad of target tilt per m/s and per m (LQR ratios: speed ~0.3, position ~0.12)
        self.speed_kp = float(config.get("speed_kp", 0.3))
        self.position_kp = float(config.get("position_kp", 0.12))
        self.max_target = float(config.get("max_target_tilt", math.radians(5.0)))
        self.turn_kp = float(config.get("turn_kp", 0.05))
        self.tilt = ComplementaryTilt(float(config.get("filter_time_constant", 1.0)))
        self.odometry = WheelOdometry(robot, float(config.get("speed_filter", 0.05)))
        self.reset()

    def reset(self):
        self.tilt.reset()
        self.odometry.reset()
        self.x_target = 0.0

    def step(self, r):
        # the accelerometer's tilt, with the robot's own acceleration taken out
        tilt = self.tilt.update(r.gyro[1], accel_tilt(r, self.odometry.acceleration), r.dt)
        x = self.odometry.update(r.ticks, tilt, r.dt)
        speed = self.odometry.speed
        self.x_target += r.setpoint.speed * r.dt
        target = -(self.speed_kp * (speed - r.setpoint.speed)
                   + self.position_kp * (x - self.x_target))
        target = max(-self.max_target, min(self.max_target, target))
        drive = self.tilt_kp * (tilt - target) + self.tilt_kd * r.gyro[1]
        steer = self.turn_kp * (r.setpoint.turn - r.gyro[2])
        r.log("tilt_est_rad", tilt)
        r.log("target_tilt_rad", target)
        r.log("speed_est_m_s", speed)
        return drive - steer, drive + steer
