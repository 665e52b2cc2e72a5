"""The pybullet world: the only package (besides rendering) that talks to the engine.

It owns the client, the ground, contact settings, spawning the robot, applying
wheel torques and reading the true state through named accessors. It knows
nothing about controllers, sensors' noise or motors' electrics.

``engine`` (importing pybullet, connections, the window's camera), ``floor`` (the
floor's bodies), ``core`` (:class:`World`: building, settling, keeping, disturbances),
``stepping`` (advancing it) and ``reads`` (its true state). Everything is imported
from here.
"""

from __future__ import annotations

from .core import World, shape_key
from .engine import (
    LOAD_FLAGS,
    NoDisplay,
    connect,
    engine_version,
    look_at,
    pb,
    quiet,
    window_snapshot,
)
from .stepping import cylinder_axle_inertia

__all__ = ["LOAD_FLAGS", "NoDisplay", "World", "connect", "cylinder_axle_inertia",
           "engine_version", "look_at", "pb", "quiet", "shape_key", "window_snapshot"]
