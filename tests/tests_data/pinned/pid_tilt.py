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

Without kp/kd in the config the gains come from the robot's facts
(`pendulum_gains`: the tilt loop alone, wheels held, would have a natural
frequency 2.5 times the robot's fall rate with damping ratio 0.7).
`upright analyze ROBOT --emit-config FILE --for pid_tilt` writes LQR-based gains.
"""

from sandbox.control import ComplementaryTilt, Pid, WheelOdometry, accel_tilt, pendulum_gains


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        kp, kd = pendulum_gains(robot)
        self.kp = float(config.get("kp", kp))
        self.ki = float(config.get("ki", 0.0))
        self.kd = float(config.get("kd", kd))
        # 0.2 of kp per m/s: below the ~0.3 an LQR design gives, which saturates tall robots
        self.speed_kd = float(config.get("speed_kd", 0.2 * self.kp))
        self.turn_kp = float(config.get("turn_kp", 0.05))
        self.tilt = ComplementaryTilt(float(config.get("filter_time_constant", 0.5)))
        self.odometry = WheelOdometry(robot, speed_filter=0.02)
        # Pid works on setpoint - measurement; the wheels must chase the lean, so the
        # gains are negated (tilt forward -> drive forward).
        self.pid = Pid(-self.kp, -self.ki, -self.kd)

    def reset(self):
        self.tilt.reset()
        self.pid.reset()
        self.odometry.reset()

    def step(self, r):
        # the accelerometer's tilt, with the robot's own acceleration taken out
        tilt = self.tilt.update(r.gyro[1], accel_tilt(r, self.odometry.acceleration), r.dt)
        self.odometry.update(r.ticks, tilt, r.dt)
        drive = self.pid.update(0.0, tilt, r.dt, measured_rate=r.gyro[1])
        drive += self.speed_kd * self.odometry.speed
        steer = self.turn_kp * (r.setpoint.turn - r.gyro[2])
        r.log("tilt_est_rad", tilt)
        return drive - steer, drive + steer
