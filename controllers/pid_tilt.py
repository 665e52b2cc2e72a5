"""Example controller: PID on the tilt from a complementary filter.

The loop you would put on the robot's microcontroller: read the gyro and the
accelerometer, fuse them into a tilt estimate, and drive both wheels towards
the side the robot is falling. A PID on tilt alone lets the robot creep ever
faster (the motors' back-EMF asks for more lean at more speed, a slow runaway
that the linear model shows as a small positive pole), so the wheel speed from
the encoders is damped too. It does not hold its position: expect slow drift.

Config keys (all optional; --set config.kp=30 and so on):
  kp     duty per rad of tilt
  ki     duty per rad*s of accumulated tilt
  kd     duty per rad/s of pitch rate (from the gyro)
  speed_kd               duty per m/s of wheel speed (from the encoders)
  filter_time_constant   s, complementary filter (gyro trusted below it, accel above)
  turn_kp                duty per rad/s of yaw-rate error when a turn is asked for

Without kp/kd in the config the gains are worked out from the robot's facts so
that the tilt loop alone (wheels held still) would have a natural frequency
2.5 times the robot's fall rate with damping ratio 0.7. `upright analyze ROBOT
--emit-config FILE` writes gains from an LQR design instead.
"""

import math

from sandbox.control import ComplementaryTilt, Pid

GRAVITY = 9.80665


def starting_gains(robot, speed_up=2.5, damping=0.7):
    """(kp, kd) from the body's pendulum figures and the motors' stall torque.

    Tilt loop alone: I*th'' = m*g*l*th - T*(kp*th + kd*th'), with T the stall
    torque of both wheels. Natural frequency w = speed_up * sqrt(m g l / I).
    """
    lean = robot.body_mass * GRAVITY * robot.com_height  # N*m per rad
    fall_rate = math.sqrt(lean / robot.pitch_inertia)  # 1/s
    omega = speed_up * fall_rate
    torque = 2.0 * robot.stall_torque  # N*m at full duty, both wheels
    kp = (lean + robot.pitch_inertia * omega**2) / torque
    kd = 2.0 * damping * omega * robot.pitch_inertia / torque
    return kp, kd


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        kp, kd = starting_gains(robot)
        self.kp = float(config.get("kp", kp))
        self.ki = float(config.get("ki", 0.0))
        self.kd = float(config.get("kd", kd))
        # 0.2 of kp per m/s: below the ~0.3 an LQR design gives, which saturates tall robots
        self.speed_kd = float(config.get("speed_kd", 0.2 * self.kp))
        self.turn_kp = float(config.get("turn_kp", 0.05))
        self.radius = robot.wheel_radius
        self.counts_per_rev = robot.counts_per_rev
        self.tilt = ComplementaryTilt(float(config.get("filter_time_constant", 0.5)))
        # Balance with negative-feedback sign conventions of Pid: setpoint 0 tilt,
        # the output must push the wheels the way the robot leans, so gains are negated.
        self.pid = Pid(-self.kp, -self.ki, -self.kd)

    def reset(self):
        self.tilt.reset()
        self.pid.reset()
        self.last_x = None
        self.speed = 0.0
        self.acceleration = 0.0

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
        pitch_rate = r.gyro[1]
        # distance on the floor = wheel radius * (wheel turn relative to body + body tilt)
        wheel = math.pi * (r.ticks[0] + r.ticks[1]) / self.counts_per_rev
        x = self.radius * (wheel + tilt)
        if self.last_x is not None:
            previous = self.speed
            self.speed += 0.2 * ((x - self.last_x) / r.dt - self.speed)  # light low-pass
            self.acceleration += 0.1 * ((self.speed - previous) / r.dt - self.acceleration)
        self.last_x = x
        drive = self.pid.update(0.0, tilt, r.dt, measured_rate=pitch_rate)
        drive += self.speed_kd * self.speed
        steer = self.turn_kp * (r.setpoint.turn - r.gyro[2])
        r.log("tilt_est_rad", tilt)
        return drive - steer, drive + steer
