"""Test controller: the same duties every tick.

Config: ``left``, ``right`` (duty, default 0). Zero duty with a braking bridge
shorts the motors, so the robot falls with back-EMF damping only.
"""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.left = float(config.get("left", 0.0))
        self.right = float(config.get("right", 0.0))

    def step(self, r):
        return self.left, self.right
