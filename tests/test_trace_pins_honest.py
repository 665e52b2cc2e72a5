"""Whole trace bytes of the demo robots with their imperfections, pinned.

Copies of the demo robots as they were when these hashes were taken (with gearbox
play, breakaway friction, mismatched sides, IMU filters, mounting and scale errors,
loop jitter and compute time) live under ``tests_data/pinned/honest``; the example
controller is the pinned ``cascade.py``. Each pin is the SHA-256 of the whole
trace.csv as the run wrote it. Work that makes the loop faster must leave every
byte where it is.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once

PINNED = Path(__file__).resolve().parent / "tests_data" / "pinned"

# name -> (robot, test, latency s)
CASES = {
    "desk-mite": ("desk-mite", None, 0.0),
    "shelf-runner": ("shelf-runner", None, 0.0),
    "tall-mast": ("tall-mast", None, 0.0),
    "desk-mite-push": ("desk-mite", "push", 0.0),
    "shelf-runner-bumps-latency": ("shelf-runner", "bumps", 0.004),
    "tall-mast-sensor-fault": ("tall-mast", "sensor-fault", 0.0),
}

PINS: dict[str, str] = {
    "desk-mite": "9c9b08a78b2666e3644640b8f70b3631a9f04dc8ea7956f6012a64e608e4eb1c",
    "desk-mite-push": "886ea3b2b5d918984d547712b688793870052560a0d8ac74424c39e540a5d88b",
    "shelf-runner": "fcd58816405352741d3b4ba617a3e98093ed71fe305bca2fe26a19a4e48f04b8",
    "shelf-runner-bumps-latency": "e8b5fd2ba66b372d57256d6ac60acc678a3292461b83ebf7181be3bfe9b0c32f",  # noqa: E501
    "tall-mast": "5d3fd88b70723fb637b56d0bf12e275f9e8a023344df4b19a20d16f19addeefc",
    "tall-mast-sensor-fault": "742bcaee9fab944ae7f0767f41b47f9cf666233197e38fe51b94eaebe35d74ee",
}


def run_case(name: str, folder: Path) -> str:
    robot, test, latency = CASES[name]
    spec = load_robot(PINNED / "honest" / f"{robot}.yaml")
    settings = RunSettings(controller=str(PINNED / "cascade.py"),
                           duration=5.5 if test else 2.0, tilt=0.05, seed=11,
                           latency=latency)
    run_once(spec, settings, test=test, folder=folder, duration_given=True, plots=False)
    return hashlib.sha256((folder / "trace.csv").read_bytes()).hexdigest()


@pytest.mark.parametrize("name", sorted(CASES))
def test_honest_trace_bytes_are_pinned(name: str, tmp_path: Path) -> None:
    assert run_case(name, tmp_path) == PINS[name], f"trace of {name} changed"


@pytest.mark.parametrize("name", ["desk-mite", "desk-mite-push"])
def test_sampling_in_the_step_loop_is_taken_and_changes_no_byte(name: str, tmp_path: Path,
                                                                monkeypatch) -> None:
    """The demo robots' filtered 1 kHz IMU is read by the world's step loop
    (``ImuSamples.take_step``); with that path turned off the schedule stops at every
    step instead, and the trace is the same to the byte."""
    from sandbox.schedule import ImuSamples

    plan = ImuSamples._plan_every_sample
    taken = []

    def counting(self, step, target, world):
        stops = plan(self, step, target, world)
        taken.append(self.take_step is not None)
        return stops

    monkeypatch.setattr(ImuSamples, "_plan_every_sample", counting)
    fused = run_case(name, tmp_path / "fused")
    assert taken and all(taken), "the demo robot's IMU was not read in the step loop"
    original_init = ImuSamples.__init__

    def without_fusion(self, *args, **kwargs):
        original_init(self, *args, **kwargs)
        self.each_step = False

    monkeypatch.setattr(ImuSamples, "__init__", without_fusion)
    taken.clear()
    stopping = run_case(name, tmp_path / "stopping")
    assert taken and not any(taken)
    assert fused == stopping == PINS[name]


if __name__ == "__main__":  # print the pins (only when taking them anew, on purpose)
    import tempfile

    for case in sorted(CASES):
        with tempfile.TemporaryDirectory() as tmp:
            print(f'    "{case}": "{run_case(case, Path(tmp))}",')
