"""Example controller: the spin test's duty sequence, as the board would drive it.

`upright run ROBOT controllers/spin_test.py --duration 30` shows the log's columns and
the duty sequence; the simulation has no stand yet, so the robot drives off and falls after
about a second (the spin's expected counts come from sandbox.fit.synthetic.spin_log). The
sequence: both wheels get
the same commanded duty (sandbox.fit.sequence: rest, step up, step down, reversal, stop,
a slow ramp up from zero, a slow ramp through zero), and the duty and encoder counts are
logged each tick. On the real robot, write the same sequence for your board and print
t_s, duty_l, duty_r, ticks_l, ticks_r (and battery_v if you measure it) as CSV.

Config keys: none. The sequence lasts sandbox.fit.sequence.SPIN_DURATION seconds; after it
the duty stays 0.
"""

from sandbox.fit.sequence import spin_duty


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.start = None

    def reset(self):
        self.start = None

    def step(self, r):
        if self.start is None:
            self.start = r.t
        duty = spin_duty(r.t - self.start)
        r.log("duty_cmd", duty)
        r.log("ticks_l", float(r.ticks[0]))
        r.log("ticks_r", float(r.ticks[1]))
        return duty, duty
