"""Test controller: zero duty; logs config ``tilt_kp`` (default -1) and the tick's time.

Channels: ``log.tilt_kp`` every tick, ``log.t_seen`` (r.t as the controller saw it).
"""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.tilt_kp = float(config.get("tilt_kp", -1.0))

    def step(self, r):
        r.log("tilt_kp", self.tilt_kp)
        r.log("t_seen", r.t)
        return 0.0, 0.0
