"""Test controller: zero duty, then the wrong shape from ``t >= fail_at`` (s, default 0.0999).

Config ``shape``: ``"three"`` returns three values, ``"none"`` returns None
(a forgotten return statement).
"""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.fail_at = float(config.get("fail_at", 0.0999))
        self.shape = config.get("shape", "three")

    def step(self, r):
        if r.t < self.fail_at:
            return 0.0, 0.0
        if self.shape == "three":
            return 0.0, 0.0, 0.0
        return None
