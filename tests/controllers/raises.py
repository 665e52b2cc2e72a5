"""Test controller: zero duty, then raises ValueError from ``t >= fail_at`` (s, default 0.0999)."""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.fail_at = float(config.get("fail_at", 0.0999))

    def step(self, r):
        if r.t >= self.fail_at:
            return self.broken_estimate(r)
        return 0.0, 0.0

    def broken_estimate(self, r):
        raise ValueError("deliberate failure in the estimator")
