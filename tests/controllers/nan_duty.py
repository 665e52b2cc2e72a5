"""Test controller: zero duty, then a NaN left duty from ``t >= fail_at`` (s, default 0.0999)."""

import math


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.fail_at = float(config.get("fail_at", 0.0999))

    def step(self, r):
        if r.t >= self.fail_at:
            return math.nan, 0.0
        return 0.0, 0.0
