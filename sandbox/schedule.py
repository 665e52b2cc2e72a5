"""The run's schedule on the physics-step clock: when the board ticks, when its duties
reach the bridge, and when the IMU takes the samples a tick will see.

Each part owns its own state and answers "what is due next"; the loop in
:mod:`sandbox.runner` only advances the world from one due moment to the next.
Steps are counted from the release of the robot (step 0, the first tick).
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any

import numpy as np

# Jitter draws come from their own stream of the run's seed, so adding jitter to a
# robot moves no other random number (the IMU's noise stays the same).
_JITTER_STREAM = 0x6A17


class TickClock:
    """When controller tick ``k`` happens: its physics step, time and interval.

    Without jitter tick ``k`` is at ``k · period`` exactly. With ``loop_jitter``
    σ (s) each tick moves from its nominal time by an independent normal draw of
    standard deviation σ/√2, so the interval between two ticks (what a builder
    times on the board) has standard deviation σ and the ticks never drift; a
    tick lands on the nearest physics step, at least one step after the previous
    tick. A jitter much smaller than the physics step therefore mostly rounds
    away (at σ = 0.2 ms and a 1 ms step most ticks keep their nominal step): use
    a finer ``--physics-step`` to see it. Tick 0 is never moved.
    """

    def __init__(self, steps_per_tick: int, physics_dt: float, ticks: int,
                 loop_jitter: float = 0.0, seed: int = 0):
        self.steps_per_tick = steps_per_tick
        self.physics_dt = physics_dt
        self.period = steps_per_tick * physics_dt
        self._steps: np.ndarray | None = None
        if loop_jitter > 0.0:
            rng = np.random.default_rng([seed, _JITTER_STREAM])
            nominal = np.arange(ticks + 1, dtype=float) * steps_per_tick
            offset = rng.normal(0.0, loop_jitter / math.sqrt(2.0) / physics_dt, ticks + 1)
            steps = np.rint(nominal + offset).astype(np.int64)
            steps[0] = 0
            # at least one step apart, in order (a long stall pushes the next ticks on)
            steps = np.maximum.accumulate(steps - np.arange(ticks + 1)) + np.arange(ticks + 1)
            self._steps = steps

    @property
    def jittered(self) -> bool:
        return self._steps is not None

    def step_of(self, tick: int) -> int:
        """Physics step at which tick ``tick`` happens."""
        if self._steps is None:
            return tick * self.steps_per_tick
        return int(self._steps[tick])

    def time_of(self, tick: int) -> float:
        """Time of tick ``tick`` (s)."""
        if self._steps is None:
            return tick * self.period
        return int(self._steps[tick]) * self.physics_dt

    def interval(self, tick: int) -> float:
        """Time since the previous tick as the board's clock measures it (s); tick 0: the period."""
        if self._steps is None or tick == 0:
            return self.period
        return int(self._steps[tick] - self._steps[tick - 1]) * self.physics_dt

    def intervals(self) -> np.ndarray:
        """Every tick interval after the first tick (s)."""
        if self._steps is None:
            return np.full(0, self.period)
        return np.diff(self._steps) * self.physics_dt


class DutyLine:
    """Duties on their way from the controller to the bridge.

    A tick's duties reach the bridge ``delay_steps`` physics steps after the
    tick (the board's compute time plus any added latency) and are held there
    until the next ones arrive.
    """

    def __init__(self, delay_steps: int):
        self.delay_steps = delay_steps
        self._pending: deque[tuple[int, float, float]] = deque()  # (arrival step, left, right)

    def send(self, tick_step: int, left: float, right: float) -> None:
        self._pending.append((tick_step + self.delay_steps, left, right))

    def deliver(self, step: int, drive: Any) -> None:
        """Hand the bridge every duty that has arrived by ``step``."""
        pending = self._pending
        while pending and pending[0][0] <= step:
            _, left, right = pending.popleft()
            drive.set_duty(left, right)

    def deliver_then_next(self, step: int, drive: Any, limit: int) -> int:
        """:meth:`deliver` at ``step``, then :meth:`next_arrival` before ``limit`` (one call
        for the loop, which makes it at every stop)."""
        pending = self._pending
        while pending and pending[0][0] <= step:
            _, left, right = pending.popleft()
            drive.set_duty(left, right)
        if pending and pending[0][0] < limit:
            return pending[0][0]
        return limit

    def next_arrival(self, limit: int) -> int:
        """The next arrival step, or ``limit`` if none arrives before it."""
        pending = self._pending
        if pending and pending[0][0] < limit:
            return pending[0][0]
        return limit


def sample_step(tick_step: int, physics_dt: float, imu_rate: float, latency_steps: float) -> int:
    """Physics step of the newest IMU sample a controller sees at ``tick_step``.

    Samples are taken at multiples of 1/imu_rate; the newest one at or before
    the tick time less the sensor's latency.
    """
    t = (tick_step - latency_steps) * physics_dt
    if t <= 0:
        return 0
    n = math.floor(t * imu_rate + 1e-9)
    return min(tick_step, round(n / imu_rate / physics_dt))


def imu_truth(state: Any, mount, gravity, prev_mount_velocity, dt: float):
    """True gyro rate and specific force at the IMU (sensor axes = body axes).

    The acceleration is the mount point's velocity change over the last
    physics step, so an IMU high on the body feels the robot's own motion.
    """
    gx, gy, gz = gravity
    if prev_mount_velocity is None:
        force = (-gx, -gy, -gz)
    else:
        v = state.point_velocity(mount)
        p = prev_mount_velocity
        force = ((v[0] - p[0]) / dt - gx, (v[1] - p[1]) / dt - gy, (v[2] - p[2]) / dt - gz)
    return state.to_body(state.angular_velocity), state.to_body(force)


class ImuSamples:
    """The IMU samples a run takes: which steps they fall on, their true values, and which
    one a tick sees.

    Samples fall at multiples of 1/``imu.rate``; a tick sees the newest one at or
    before its time less ``imu.latency``. The true value of a sample (body rate and
    the mount point's specific force) is read from the world where the sample
    falls: the world stops one step before it (for the velocity difference) and
    at it. Only the samples some tick will see are read, unless the sensor has
    its own filter (``imu.filtering``), which must see every sample.

    The usual case costs nothing extra: with no sensor latency and a world that
    remembers the body's velocity before its last step (rotor coupling), the
    sample a tick sees is the one taken at the tick itself, read with the tick.
    """

    def __init__(self, imu: Any, imu_rate: float, physics_dt: float, sensor_latency: float,
                 mount, gravity, coupled: bool):
        self.imu = imu
        self.rate = imu_rate
        self.dt = physics_dt
        self.latency_steps = sensor_latency / physics_dt
        self.mount = mount
        self.gravity = gravity
        self.coupled = coupled
        self.filtering = bool(getattr(imu, "filtering", False))
        if self.filtering:
            imu.fed_by_loop = True
        self.every_step = not self.latency_steps and abs(imu_rate * physics_dt - 1.0) < 1e-9
        self.fast = coupled and not self.latency_steps and not self.filtering
        self.at_tick = False  # the sample the next tick sees is taken at the tick
        self.truth: tuple | None = None  # the last sample a tick saw
        self.truths: dict[int, tuple] = {}  # read, not yet seen, by step
        self.last_index = -1
        self.due: set[int] | frozenset = frozenset()
        self.before: dict[int, Any] = {}  # mount velocities one step before a due sample
        self.last_fed = -1  # (with a filter) step of the last sample fed to it
        # A filtered IMU sampled at every physics step of an uncoupled world (the demo
        # robots: their gearbox play leaves no rotor cross term) is read by the world's
        # own step loop through take_step (set by plan, None otherwise): the schedule
        # then has no stops, and each step costs one call instead of a stop.
        self.each_step = self.filtering and self.every_step and not coupled
        self.take_step: Any = None
        self._read = None  # the world's imu_sample, bound
        self._mount_velocity = None  # the mount point's velocity at the last sample
        self._step = -1  # the step of the last sample take_step read

    # ------------------------------------------------------------- at a tick
    def seen(self, step: int, first: bool, tick_truth: tuple) -> tuple[tuple, int]:
        """The true (rate, specific force) of the sample seen at ``step``, and how many
        samples were taken since the previous tick's."""
        if self.filtering and first:
            self.truths[step] = self.imu.feed(*tick_truth)
            self.last_fed = step
        if self.at_tick or first:
            at, self.truth = step, tick_truth
        else:
            at = sample_step(step, self.dt, self.rate, self.latency_steps)
        truths = self.truths
        if at in truths:
            self.truth = truths[at]
            if len(truths) > 1:
                self.truths = {k: v for k, v in truths.items() if k >= at}
        index = math.floor(at * self.dt * self.rate + 1e-9)
        elapsed = max(index - self.last_index, 0)
        self.last_index = index
        return self.truth, elapsed

    # ------------------------------------------------------------- between ticks
    def plan(self, step: int, target: int, world: Any) -> list[int]:
        """Steps in (step, target) where the world must stop before the next tick at
        ``target``; reads what is due at ``step`` itself."""
        if self.filtering:
            return self._plan_every_sample(step, target, world)
        dt, rate = self.dt, self.rate
        next_sample = target if self.every_step else sample_step(target, dt, rate,
                                                                 self.latency_steps)
        self.at_tick = self.fast and next_sample == target
        if self.at_tick:
            self.due = frozenset()
            return []
        # with sensor latency the newest sample of this period may be seen only a tick later
        newest = sample_step(target, dt, rate, 0.0) if self.latency_steps else next_sample
        due = self.due = {n for n in (next_sample, newest) if n > step}
        self.before = {}
        if step + 1 in due:
            self.before[step + 1] = world.body_state().point_velocity(self.mount)
        # at the tick a coupled world remembers the velocity before its last step
        return sorted({p for n in due if not (self.coupled and n == target)
                       for p in (n - 1, n) if step < p < target})

    def _plan_every_sample(self, step: int, target: int, world: Any) -> list[int]:
        if self.each_step and hasattr(world, "imu_sample"):
            self.due, self.before = frozenset(), {}
            # the mount's velocity now: the last sample's, when it was taken at this step
            # (nothing at a tick moves the body), else read
            if target > step and not (self.take_step is not None and self._step == step):
                self._mount_velocity = world.body_state().point_velocity(self.mount)
            self._read = world.imu_sample
            self._step = step
            self.take_step = self._take_step
            return []
        dt, rate = self.dt, self.rate
        first = math.floor(step * dt * rate + 1e-9) + 1
        last = math.floor(target * dt * rate + 1e-9)
        due = self.due = {s for s in (round(n / rate / dt) for n in range(first, last + 1))
                          if step < s <= target}
        self.before = {}
        if self.coupled:  # the world remembers the velocity before each step
            return sorted(s for s in due if s < target)
        if step + 1 in due:
            self.before[step + 1] = world.body_state().point_velocity(self.mount)
        return sorted({p for n in due for p in (n - 1, n) if step < p < target})

    def _take_step(self) -> None:
        """The world has just made one physics step: read the sample there and feed it to
        the sensor's filter (the same numbers as :meth:`reached` and :meth:`end_period`)."""
        step = self._step = self._step + 1
        truth, self._mount_velocity = self._read(self.mount, self._mount_velocity,
                                                 self.gravity, self.dt)
        self.last_fed = step
        self.truths = {step: self.imu.feed(*truth)}

    def reached(self, step: int, target: int, world: Any) -> None:
        """The world has stopped at ``step`` on its way to ``target``: read what is due."""
        due = self.due
        if step != target and (step in due or step + 1 in due):
            if not self.coupled and hasattr(world, "imu_sample"):
                # the same numbers in one pass (World.imu_sample)
                truth, velocity = world.imu_sample(self.mount, self.before.get(step),
                                                   self.gravity, self.dt)
                if step + 1 in due:
                    self.before[step + 1] = velocity
                if step in due:
                    if self.filtering:
                        truth = self.imu.feed(*truth)
                        self.last_fed = step
                    self.truths[step] = truth
                return
            here = world.body_state()
            if step + 1 in due:
                self.before[step + 1] = here.point_velocity(self.mount)
            if step in due:
                self._take(step, here, world)

    def end_period(self, target: int, world: Any) -> None:
        """The world has reached the next tick's step: read the sample due there."""
        if target in self.due:
            self._take(target, world.body_state(), world)

    def _take(self, step: int, state: Any, world: Any) -> None:
        if step in self.before:
            prev = self.before[step]
        elif self.coupled:
            prev = world.previous_point_velocity(state, self.mount)
        else:
            prev = None
        truth = imu_truth(state, self.mount, self.gravity, prev, self.dt)
        if self.filtering:
            truth = self.imu.feed(*truth)
            self.last_fed = step
        self.truths[step] = truth
