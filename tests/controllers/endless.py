"""Test controller: the first step never returns (an endless loop)."""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        pass

    def step(self, r):
        while True:
            pass
