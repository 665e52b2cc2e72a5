"""The ranges every numeric command-line option must lie in, checked before any work.

A value outside its range (or not a finite number) is refused with one line that
names the option, the value and the range, before anything is allocated or looped
over: `--duration 1e12` would otherwise loop for days, `--physics-step 1e-7`
allocate a trace of billions of rows, `--fps 1e9` ask for tens of GiB of frames.
The ranges are wide enough for every robot this tool serves; each says why.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


class OutOfRange(ValueError):
    """A command-line number outside its allowed range (exit code 2)."""


@dataclass(frozen=True)
class Limit:
    """An option's allowed closed range, in the unit the option is written in."""

    option: str
    unit: str
    low: float
    high: float
    why: str = ""

    def check(self, value: float) -> float:
        """``value`` itself when finite and within [low, high]; else :class:`OutOfRange`."""
        number = float(value)
        if math.isfinite(number) and self.low <= number <= self.high:
            return number
        unit = f" {self.unit}" if self.unit else ""
        why = f" ({self.why})" if self.why else ""
        raise OutOfRange(f"{self.option} must be a number from {self.low:g} to "
                         f"{self.high:g}{unit}, got {value!r}{why}")


DURATION = Limit("--duration", "s", 0.001, 3600.0,
                 "an hour of simulated time; split longer studies into runs")
TILT = Limit("--tilt", "deg", -89.0, 89.0, "beyond 89 deg the robot starts on its side")
LATENCY = Limit("--latency", "ms", 0.0, 1000.0, "a second of delay no balancing loop survives")
PHYSICS_STEP = Limit("--physics-step", "ms", 0.05, 20.0,
                     "finer than 0.05 ms only costs time; coarser than 20 ms is not a simulation")
FALL_LIMIT = Limit("--fall-limit", "deg", 1.0, 90.0)
RATE = Limit("--rate", "Hz", 1.0, 20_000.0)
FPS = Limit("--fps", "frames/s", 1.0, 240.0)
FRAME_SIDE = Limit("--size", "pixels", 16.0, 3840.0, "each side, up to 4K")
WORKERS = Limit("--workers", "processes", 1.0, 256.0)
SAMPLES = Limit("--samples", "robots", 0.0, 100_000.0)
STEP_TIMEOUT = Limit("--step-timeout", "s", 0.001, 60.0)
EVALUATIONS = Limit("--max-evaluations", "runs", 1.0, 10_000.0)

# physics steps in one run: an hour at 1 ms; beyond it the trace alone is gigabytes
MAX_RUN_STEPS = 3_600_000
# runs in one sweep: the store, the table and the heatmap stay in memory
MAX_SWEEP_RUNS = 100_000
# a sweep larger than this asks for --yes first
ASK_ABOVE_RUNS = 2_000
# real-time factor of one worker on the demo robots (measured: 17-25x), for estimates
TYPICAL_REALTIME_FACTOR = 20.0


def check_run(duration: float, physics_step_ms: float) -> None:
    """A run's length in physics steps within :data:`MAX_RUN_STEPS`."""
    steps = DURATION.check(duration) / (PHYSICS_STEP.check(physics_step_ms) / 1000.0)
    if steps > MAX_RUN_STEPS:
        raise OutOfRange(f"--duration {duration:g} s at --physics-step {physics_step_ms:g} ms "
                         f"is {steps:,.0f} physics steps; at most {MAX_RUN_STEPS:,} "
                         "(shorten the run or coarsen the step)")


def frame_size(text: str) -> tuple[int, int]:
    """``WIDTHxHEIGHT`` as whole pixels, each within :data:`FRAME_SIDE` and divisible by 16."""
    parts = text.lower().split("x")
    if len(parts) != 2 or not all(p.strip().isdigit() and len(p.strip()) <= 6 for p in parts):
        raise OutOfRange(f"--size {text!r}: expected WIDTHxHEIGHT in whole pixels, e.g. 640x480")
    width, height = (int(FRAME_SIDE.check(int(p))) for p in parts)
    if width % 16 or height % 16:
        raise OutOfRange(f"--size {text!r}: each side must be divisible by 16 (the video "
                         "encoder's blocks), e.g. 640x480 or 1280x720")
    return width, height


def sweep_size(runs: int, seconds_each: float, workers: int, confirmed: bool) -> None:
    """Refuse a sweep beyond :data:`MAX_SWEEP_RUNS`; ask for ``--yes`` above
    :data:`ASK_ABOVE_RUNS`, saying how long it would take."""
    if runs > MAX_SWEEP_RUNS:
        raise OutOfRange(f"this sweep is {runs:,} runs; at most {MAX_SWEEP_RUNS:,} "
                         "(fewer --vary values or --samples)")
    if runs > ASK_ABOVE_RUNS and not confirmed:
        hours = runs * seconds_each / TYPICAL_REALTIME_FACTOR / max(workers, 1) / 3600.0
        raise OutOfRange(f"this sweep is {runs:,} runs of {seconds_each:g} s, about "
                         f"{hours:.1f} h on {workers} worker(s) at {TYPICAL_REALTIME_FACTOR:g}x "
                         "real time; add --yes to run it, or fewer values")
