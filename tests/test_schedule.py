"""The loop's schedule without an engine: the board's tick clock, the duty line to the
bridge, and which IMU samples the world must stop for."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sandbox.schedule import DutyLine, ImuSamples, TickClock, sample_step


def test_clock_without_jitter_is_exact() -> None:
    """Tick k is at k·period exactly (the same float the loop always wrote), one period apart."""
    clock = TickClock(steps_per_tick=5, physics_dt=1e-3, ticks=400)
    assert not clock.jittered
    for k in (0, 1, 7, 400):
        assert clock.step_of(k) == 5 * k
        assert clock.time_of(k) == k * (5 * 1e-3)
        assert clock.interval(k) == 5 * 1e-3


def test_jitter_has_the_configured_spread() -> None:
    """Tick intervals have the configured standard deviation within 10 % over 10,000 ticks.

    With a 0.01 ms physics step the rounding of ticks to steps adds a variance of
    2·dt²/12 (uniform rounding error, standard result), negligible beside σ = 0.5 ms.
    The sample standard deviation of 10,000 normal draws is within 10 % of σ with
    overwhelming probability (its relative error is about 1/√(2N) = 0.7 %).
    """
    sigma = 0.5e-3
    clock = TickClock(steps_per_tick=500, physics_dt=1e-5, ticks=10_000, loop_jitter=sigma,
                      seed=3)
    intervals = clock.intervals()
    assert intervals.size == 10_000
    assert abs(intervals.std() / sigma - 1.0) < 0.10, intervals.std()
    assert abs(intervals.mean() - 5e-3) < 1e-5, "ticks drift from their nominal times"
    assert np.all(intervals > 0), "two ticks on one step"


def test_jitter_is_seeded() -> None:
    """The same seed gives the same tick steps; another seed gives others."""
    def steps(seed: int) -> list[int]:
        clock = TickClock(5, 1e-4, 1000, loop_jitter=2e-4, seed=seed)
        return [clock.step_of(k) for k in range(1001)]

    assert steps(11) == steps(11)
    assert steps(11) != steps(12)
    assert steps(11)[0] == 0


def test_jitter_keeps_ticks_in_order_after_a_stall() -> None:
    """A jitter as large as the period still gives ticks one or more steps apart, in order."""
    clock = TickClock(2, 1e-3, 5000, loop_jitter=5e-3, seed=1)
    steps = [clock.step_of(k) for k in range(5001)]
    assert all(b > a for a, b in zip(steps, steps[1:]))
    assert clock.interval(0) == clock.period


def test_jitter_below_the_step_mostly_rounds_away() -> None:
    """σ = 0.1 ms at a 1 ms step: ticks land on their nominal step unless the draw passes
    half a step (|e| > 0.5 ms at e ~ N(0, σ/√2): about 5e-7 of them, normal tail)."""
    clock = TickClock(5, 1e-3, 2000, loop_jitter=1e-4, seed=5)
    moved = sum(clock.step_of(k) != 5 * k for k in range(2001))
    assert moved <= 2


class _Drive:
    def __init__(self) -> None:
        self.set: list[tuple[float, float]] = []

    def set_duty(self, left: float, right: float) -> None:
        self.set.append((left, right))


def test_duty_line_delivers_after_its_delay() -> None:
    """A tick's duties reach the bridge delay_steps later, in order, and are held."""
    line = DutyLine(delay_steps=3)
    drive = _Drive()
    line.send(0, 0.1, 0.2)
    line.send(5, 0.3, 0.4)
    assert line.next_arrival(10) == 3
    line.deliver(2, drive)
    assert drive.set == []
    line.deliver(3, drive)
    assert drive.set == [(0.1, 0.2)]
    assert line.next_arrival(10) == 8
    assert line.next_arrival(8) == 8
    line.deliver(20, drive)
    assert drive.set == [(0.1, 0.2), (0.3, 0.4)]
    assert line.next_arrival(10) == 10


def test_sample_step_is_the_newest_sample_before_the_latency() -> None:
    """A 250 Hz IMU at a 1 ms step takes samples at 0, 4, 8 ... ms. The tick at 10 ms sees
    the newest at or before 10 ms less the latency: 8 ms with none or 2 ms, 4 ms with 3 ms."""
    assert sample_step(10, 1e-3, 250.0, 0.0) == 8
    assert sample_step(10, 1e-3, 250.0, 2.0) == 8
    assert sample_step(10, 1e-3, 250.0, 3.0) == 4
    assert sample_step(1, 1e-3, 250.0, 2.0) == 0


class _State:
    def __init__(self, step: int) -> None:
        self.step = step
        self.angular_velocity = (0.0, float(step), 0.0)

    def point_velocity(self, mount):
        return (0.01 * self.step * self.step, 0.0, 0.0)  # accelerating along x

    def to_body(self, v):
        return tuple(v)


class _World:
    def __init__(self) -> None:
        self.step = 0

    def advance(self, steps: int, drive) -> None:
        self.step += steps

    def body_state(self) -> _State:
        return _State(self.step)

    def previous_point_velocity(self, state, mount):
        return _State(state.step - 1).point_velocity(mount)


class _FilteringImu:
    filtering = True

    def __init__(self) -> None:
        self.fed: list[float] = []

    def feed(self, rate, force):
        self.fed.append(rate[1])
        return rate, force


@pytest.mark.parametrize("coupled", [False, True])
def test_a_filtering_imu_is_fed_every_sample_in_order(coupled: bool) -> None:
    """A sensor with its own filter must see every sample at its rate, each once, in order,
    with the specific force of the velocity difference over the step before it
    (finite difference of v = 0.01 n² m/s: (v_n − v_{n−1})/dt)."""
    imu = _FilteringImu()
    dt = 1e-3
    samples = ImuSamples(imu, imu_rate=500.0, physics_dt=dt, sensor_latency=0.0,
                         mount=(0.0, 0.0, 0.1), gravity=(0.0, 0.0, -9.80665), coupled=coupled)
    world = _World()
    truth, _ = samples.seen(0, True, ((0.0, 0.0, 0.0), (0.0, 0.0, 9.80665)))
    forces = {}
    for tick in range(4):
        target = (tick + 1) * 5
        stops = samples.plan(world.step, target, world)
        step = world.step
        while step < target:
            stop = next((p for p in stops if p > step), target)
            world.advance(stop - step, None)
            step = stop
            samples.reached(step, target, world)
        samples.end_period(target, world)
        forces.update({k: v[1][0] for k, v in samples.truths.items()})
        truth, elapsed = samples.seen(target, False, ((0.0, 0.0, 0.0), (0.0, 0.0, 0.0)))
        assert truth[0][1] == float(target if target % 2 == 0 else target - 1)
    assert imu.fed == [0.0] + [float(s) for s in range(2, 21, 2)]
    for step, force in forces.items():
        if step:
            expected = 0.01 * (step * step - (step - 1) ** 2) / dt
            assert math.isclose(force, expected, rel_tol=1e-9), step
