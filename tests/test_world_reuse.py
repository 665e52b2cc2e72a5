"""Worlds kept between a sweep worker's runs (World.save_settled / restore_settled,
sandbox.sweep.worlds): a run in a restored world is the run in a fresh world, to the
byte, on every built-in test; a world is rebuilt when the robot's shape changes.

The reference is the engine itself: the same run in a newly built world (no outside
formula is involved; equality of the trace bytes is the check).
"""

from __future__ import annotations

import importlib
from pathlib import Path

import numpy as np
import pytest
from ideal_parts import ideal_robot

from sandbox.events import BUILTIN_NAMES
from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once
from sandbox.sweep import PointJob, tune
from sandbox.sweep.grid import make_common
from sandbox.sweep.jobs import run_point
from sandbox.sweep.worlds import WorldKeeper

tune_module = importlib.import_module("sandbox.sweep.tune")

ROOT = Path(__file__).resolve().parents[1]
CASCADE = str(ROOT / "controllers" / "cascade.py")
PID_TILT = str(ROOT / "controllers" / "pid_tilt.py")


@pytest.fixture(scope="module")
def shelf_runner():
    """shelf-runner with ideal parts: worlds are kept only for robots without gearbox
    play (see test_a_robot_with_play_gets_a_world_of_its_own)."""
    return ideal_robot("shelf-runner")


def test_a_robot_with_play_gets_a_world_of_its_own() -> None:
    """A robot with backlash is never run in a restored world: each run builds its own."""
    spec = load_robot(ROOT / "robots" / "shelf-runner.yaml")
    assert spec.motors.backlash > 0
    keeper = WorldKeeper()
    for _ in range(2):
        world = keeper(spec)
        world.close()
    assert (keeper.built, keeper.reused, len(keeper.worlds)) == (2, 0, 0)


def trace_bytes(result) -> bytes:
    """Every trace column's bytes, columns in name order."""
    return b"".join(name.encode() + np.ascontiguousarray(result.trace[name]).tobytes()
                    for name in sorted(result.trace))


def _run(spec, settings, test, keeper=None, short=False):
    return run_once(spec, settings, test=test, write=False, world_factory=keeper,
                    duration_given=short)


@pytest.mark.parametrize("test", BUILTIN_NAMES)
def test_restored_world_repeats_its_first_run_short(shelf_runner, test):
    """Each built-in test's first 3.5 s (past the first push, payload, setpoint, sensor
    fault), twice in one kept world: the run in the restored world is byte-identical to
    the run in the newly built one (the slow test below also compares a fresh World)."""
    settings = RunSettings(controller=CASCADE, seed=3, duration=3.5)
    keeper = WorldKeeper()
    first = _run(shelf_runner, settings, test, keeper, short=True)
    second = _run(shelf_runner, settings, test, keeper, short=True)
    assert (keeper.built, keeper.reused) == (1, 1)
    assert first.trace["t_s"].size == 701
    assert trace_bytes(second) == trace_bytes(first), f"{test}: the restored world differs"
    keeper.close()


@pytest.mark.slow
@pytest.mark.parametrize("test", BUILTIN_NAMES)
def test_restored_world_repeats_a_fresh_world_to_the_byte(shelf_runner, test):
    """Each built-in test, whole: in a fresh world, then twice in one kept world (the
    second run starts from the world the first left: pushed, slid, loaded with a payload,
    its friction changed). All three traces are byte-identical and the summaries equal."""
    settings = RunSettings(controller=CASCADE, seed=3)
    fresh = _run(shelf_runner, settings, test)
    keeper = WorldKeeper()
    first = _run(shelf_runner, settings, test, keeper)
    second = _run(shelf_runner, settings, test, keeper)
    assert (keeper.built, keeper.reused) == (1, 1)
    assert fresh.trace["t_s"].size > 1000
    assert trace_bytes(first) == trace_bytes(fresh)
    assert trace_bytes(second) == trace_bytes(fresh), f"{test}: the restored world differs"
    assert second.summary["test_result"] == fresh.summary["test_result"]
    keeper.close()


def test_restored_after_a_fall_and_across_tests(shelf_runner):
    """A run that falls (kp a tenth of its default) leaves the body on the floor; the
    next run in that restored world, and runs alternating between tests of different
    grounds in one keeper, match fresh worlds byte for byte."""
    keeper = WorldKeeper(capacity=2)
    weak = RunSettings(controller=PID_TILT, config={"kp": 1.0}, duration=4.0)
    fell = _run(shelf_runner, weak, "push", keeper, short=True)
    assert fell.status == "fell"
    plain = RunSettings(controller=PID_TILT, duration=4.0, seed=1)
    for test in ("push", "slope", "push", "bumps", "slope", "push"):
        reused = _run(shelf_runner, plain, test, keeper, short=True)
        assert trace_bytes(reused) == trace_bytes(_run(shelf_runner, plain, test,
                                                       short=True)), test
    # two kept (the least recently used goes): push, push again, slope, push again, then
    # bumps evicts slope, slope evicts push, push evicts bumps
    assert (keeper.built, keeper.reused) == (5, 2)
    keeper.close()


def test_shape_change_builds_a_new_world(shelf_runner):
    """Gains and the battery do not change the world's shape (one world serves); a
    heavier body does (a new world, its run equal to a fresh one)."""
    common = make_common(shelf_runner, RunSettings(controller=PID_TILT, duration=1.0),
                         [None], duration_given=True)
    from sandbox.sweep import worlds

    keeper = worlds.worker_keeper()
    keeper.close()  # worlds other tests left in this process's keeper
    built, reused = keeper.built, keeper.reused
    rows = [run_point(common, PointJob(i, {}, {"kp": 10.0 + i}, 0)) for i in range(3)]
    assert (keeper.built - built, keeper.reused - reused) == (1, 2)
    mass = float(shelf_runner.to_si_dict()["body"]["frame"]["mass"]) * 1.2
    heavy = PointJob(9, {"body.frame.mass": mass}, {}, 0)
    kept = run_point(common, heavy)
    assert keeper.built - built == 2
    fresh = run_point(common, heavy, reuse_worlds=False)
    for row in rows + [kept]:
        assert row["status"] == "completed"
    assert {k: v for k, v in kept.items() if k != "wall_s"} == \
        {k: v for k, v in fresh.items() if k != "wall_s"}


def test_tune_opens_one_executor(shelf_runner, monkeypatch):
    """A whole tuning (several evaluations) runs on one executor, not one per evaluation."""
    opened = []
    real = tune_module.open_executor

    def counting(*args, **kwargs):
        opened.append(kwargs)
        return real(*args, **kwargs)

    monkeypatch.setattr(tune_module, "open_executor", counting)
    result = tune(shelf_runner, PID_TILT, gains=["config.kp"], tests=["push"],
                  settings=RunSettings(controller=PID_TILT, duration=0.5),
                  duration_given=True, workers=1, max_evaluations=4)
    assert result.evaluations >= 3
    assert len(opened) == 1
