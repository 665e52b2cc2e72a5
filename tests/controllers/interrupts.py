"""Test controller: zero duty, then KeyboardInterrupt (as Ctrl-C) from ``t >= at``.

``at`` in s, default 0.4999 (just before the tick at 0.5 s).
"""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.at = float(config.get("at", 0.4999))

    def step(self, r):
        if r.t >= self.at:
            raise KeyboardInterrupt
        return 0.0, 0.0
