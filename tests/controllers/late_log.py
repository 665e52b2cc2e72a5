"""Test controller: zero duty; logs ``late`` only from ``t >= start`` (s, default 2.0).

A channel first seen after the first block of trace rows cannot join the CSV
header any more; the run counts it in the summary's dropped channels.
"""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.start = float(config.get("start", 2.0))

    def step(self, r):
        if r.t >= self.start:
            r.log("late", 1.0)
        return 0.0, 0.0
