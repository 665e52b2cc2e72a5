"""Watching a run live: the same world in the engine's own window, paced to the wall clock.

The physics is untouched (same steps, same solver, same torques): the window only draws
what the engine already computes, and the pacing only waits between controller ticks.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from typing import Any

from .world import World, look_at

# Opening a window on a display that refuses it can end the process from inside the
# engine's C code, so the display is first tried in a throwaway process.
_PROBE = "import sys, pybullet as p; sys.exit(0 if p.connect(p.GUI) >= 0 else 1)"


def display_problem() -> str | None:
    """Why the engine's window cannot open here, in one line; None when it can."""
    if not os.environ.get("DISPLAY"):
        return ("--watch needs a display, and DISPLAY is not set; run without --watch, "
                "or under xvfb-run for a virtual one")
    try:
        done = subprocess.run([sys.executable, "-c", _PROBE], capture_output=True, timeout=60)
    except (OSError, subprocess.TimeoutExpired):
        done = None
    if done is None or done.returncode != 0:
        return (f"--watch could not open a window on display {os.environ['DISPLAY']!r}; "
                "check the display, or run without --watch")
    return None


class WatchedWorld(World):
    """A :class:`World` in the engine's window, run at ``1 / slow_motion`` of real time."""

    def __init__(self, spec: Any, *args: Any, slow_motion: float = 1.0, **kwargs: Any):
        super().__init__(spec, *args, connection="gui", **kwargs)
        self.slow_motion = float(slow_motion)
        height = float(spec.body.frame.height)
        self._distance = max(0.3, 4.0 * height)
        self._simulated = 0.0  # s of physics run since the window opened
        self._start = time.perf_counter()
        self._follow()

    def _follow(self) -> None:
        look_at(self.client, self.robot_id, self._distance)

    def advance(self, steps: int, drive: Any, take_step: Any = None) -> None:
        super().advance(steps, drive, take_step)
        self._simulated += steps * self.dt
        self._follow()
        wait = self._start + self._simulated * self.slow_motion - time.perf_counter()
        if wait > 0.0:
            time.sleep(wait)


def watched_world_factory(slow_motion: float = 1.0):
    """A world factory for the runner: each world opens in the window, paced."""

    def make(spec: Any, *args: Any, **kwargs: Any) -> WatchedWorld:
        return WatchedWorld(spec, *args, slow_motion=slow_motion, **kwargs)

    return make
