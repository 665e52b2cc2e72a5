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

Without gains in the config they are worked out from the robot's facts (see
pid_tilt.starting_gains); `upright analyze ROBOT --emit-config FILE` writes
LQR-based gains with the same keys.
"""

import math

from sandbox.control import ComplementaryTilt

GRAVITY = 9.80665


def starting_gains(robot, speed_up=2.5, damping=0.7):
    """(tilt_kp, tilt_kd) so the tilt loop alone is 2.5 times as fast as the fall, damping 0.7."""
    lean = robot.body_mass * GRAVITY * robot.com_height
    omega = speed_up * math.sqrt(lean / robot.pitch_inertia)
    torque = 2.0 * robot.stall_torque
    kp = (lean + robot.pitch_inertia * omega**2) / torque
    kd = 2.0 * damping * omega * robot.pitch_inertia / torque
    return kp, kd


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        kp, kd = starting_gains(robot)
        self.tilt_kp = float(config.get("tilt_kp", kp))
        self.tilt_kd = float(config.get("tilt_kd", kd))
        # Outer loop, in rad of target tilt per m/s and per m: the ratios an LQR
        # design gives (speed ~0.3, position ~0.12) for all our demo robots.
        self.speed_kp = float(config.get("speed_kp", 0.3))
        self.position_kp = float(config.get("position_kp", 0.12))
        self.max_target = float(config.get("max_target_tilt", math.radians(5.0)))
        self.speed_filter = float(config.get("speed_filter", 0.05))
        self.turn_kp = float(config.get("turn_kp", 0.05))
        self.tilt = ComplementaryTilt(float(config.get("filter_time_constant", 1.0)))
        self.radius = robot.wheel_radius
        self.counts_per_rev = robot.counts_per_rev
        self.reset()

    def reset(self):
        self.tilt.reset()
        self.last_x = None
        self.speed = 0.0
        self.acceleration = 0.0
        self.x_target = 0.0

    def step(self, r):
        # The accelerometer feels the robot's own acceleration as well as gravity:
        # take the acceleration the encoders see out of it before reading a tilt.
        # When the body swings hard (a shove, a bump) the accelerometer reads far from
        # 1 g and its tilt is meaningless: trust the gyro alone until it settles.
        accel_x = r.accel[0] - self.acceleration
        magnitude = math.sqrt(accel_x**2 + r.accel[1] ** 2 + r.accel[2] ** 2)
        if abs(magnitude - GRAVITY) < 0.1 * GRAVITY and self.tilt.started:
            accel_tilt = math.atan2(-accel_x, r.accel[2])
        elif self.tilt.started:
            accel_tilt = self.tilt.angle + r.gyro[1] * r.dt  # no correction this tick
        else:
            accel_tilt = math.atan2(-accel_x, r.accel[2])
        tilt = self.tilt.update(r.gyro[1], accel_tilt, r.dt)
        # Wheel turn relative to the body plus the body's tilt = the wheel's turn on the floor.
        wheel = 2.0 * math.pi * 0.5 * (r.ticks[0] + r.ticks[1]) / self.counts_per_rev
        x = self.radius * (wheel + tilt)
        if self.last_x is not None:
            raw = (x - self.last_x) / r.dt
            blend = r.dt / (self.speed_filter + r.dt)
            previous = self.speed
            self.speed += blend * (raw - self.speed)
            self.acceleration += blend * ((self.speed - previous) / r.dt - self.acceleration)
        self.last_x = x
        self.x_target += r.setpoint.speed * r.dt
        target = -(self.speed_kp * (self.speed - r.setpoint.speed)
                   + self.position_kp * (x - self.x_target))
        target = max(-self.max_target, min(self.max_target, target))
        drive = self.tilt_kp * (tilt - target) + self.tilt_kd * r.gyro[1]
        steer = self.turn_kp * (r.setpoint.turn - r.gyro[2])
        r.log("tilt_est_rad", tilt)
        r.log("target_tilt_rad", target)
        r.log("speed_est_m_s", self.speed)
        return drive - steer, drive + steer
