"""Test controller: zero duty, then a real Ctrl-C (SIGINT to its own process) from ``t >= at``.

``at`` in s, default 0.4999 (just before the tick at 0.5 s). A KeyboardInterrupt the
script raised itself would be a controller error; the signal is the user's.
"""

import os
import signal


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.at = float(config.get("at", 0.4999))

    def step(self, r):
        if r.t >= self.at:
            os.kill(os.getpid(), signal.SIGINT)
        return 0.0, 0.0
