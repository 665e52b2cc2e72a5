"""Every example controller balances every example robot (the shipped examples never rot).

The same checks over everything shipped, as dm_control's ``suite_test.py`` runs over
every domain (STYLE.md). Default config, seed 0, released at 5° of tilt.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from sandbox.record import TEXT_COLUMNS
from sandbox.robot import load_robot
from sandbox.runner import RunSettings, run

ROOT = Path(__file__).resolve().parents[1]
ROBOT_FILES = sorted((ROOT / "robots").glob("*.yaml"))
# the balancing examples (spin_test.py drives the spin test's duty sequence on a stand)
CONTROLLER_FILES = sorted(p for p in (ROOT / "controllers").glob("*.py")
                          if p.stem != "spin_test")
START_TILT = math.radians(5.0)
SETTLED_AFTER_S = 3.0
SETTLED_LIMIT_DEG = 3.0  # our acceptance figure for a balancing example [common practice]


def check_balances(robot_file: Path, controller_file: Path, duration: float) -> None:
    """Run from 5°; the run completes and |pitch| stays under 3° after the first 3 s."""
    spec = load_robot(robot_file)
    settings = RunSettings(controller=str(controller_file), duration=duration, tilt=START_TILT,
                           seed=0)
    result = run(spec, settings)
    label = f"{robot_file.stem} + {controller_file.stem}"
    assert result.status == "completed", f"{label}: {result.status}: {result.message}"
    trace = result.trace
    assert trace["t_s"].size == round(duration * result.summary["rate_hz"]) + 1
    for name, column in trace.items():
        if name in TEXT_COLUMNS:  # event: text
            continue
        assert np.all(np.isfinite(column)), f"{label}: {name} has non-finite values"
    late = trace["t_s"] >= SETTLED_AFTER_S
    worst = float(np.degrees(np.max(np.abs(trace["pitch_rad"][late]))))
    assert worst < SETTLED_LIMIT_DEG, (
        f"{label}: max |pitch| after {SETTLED_AFTER_S:g} s is {worst:.2f} deg "
        f"(limit {SETTLED_LIMIT_DEG:g} deg)")


def test_representative_example_balances():
    """Fast representative of the matrix: shelf-runner with the cascade controller, 5 s."""
    check_balances(ROOT / "robots" / "shelf-runner.yaml", ROOT / "controllers" / "cascade.py",
                   duration=5.0)


def test_examples_are_present():
    """The matrix below is not empty: robots and controllers ship with the project."""
    assert len(ROBOT_FILES) >= 3 and len(CONTROLLER_FILES) >= 2


@pytest.mark.slow
@pytest.mark.parametrize("controller_file", CONTROLLER_FILES, ids=lambda p: p.stem)
@pytest.mark.parametrize("robot_file", ROBOT_FILES, ids=lambda p: p.stem)
def test_every_example_controller_balances_every_example_robot(robot_file, controller_file):
    """20 s from 5°, default config, seed 0: completed, max |pitch| after 3 s below 3°."""
    check_balances(robot_file, controller_file, duration=20.0)
