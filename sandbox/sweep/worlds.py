"""Settled worlds kept by a sweep's worker between its runs.

Building a world (an engine connection, the floor, the URDF, a tenth of a
second of settling) costs a large part of a short run. A worker keeps the
worlds it built, each saved just after settling, and hands one back restored
to that state when the next run's robot has the same shape (URDF text,
physics step, starting tilt, ground: :func:`sandbox.world.shape_key`). The
runs are bit-identical to runs in fresh worlds (tests/test_world_reuse.py).
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Any

from ..ground import Ground
from ..world import World, shape_key

# Worlds kept per worker: a sweep or tuning over a few tests alternates between their
# grounds. Each engine connection holds about 30 MB.
KEPT_WORLDS = 4


class WorldKeeper:
    """A ``world_factory`` for :class:`sandbox.runner.Simulation` that reuses worlds."""

    def __init__(self, capacity: int = KEPT_WORLDS):
        self.capacity = capacity
        self.worlds: OrderedDict[tuple, World] = OrderedDict()
        self.built = 0
        self.reused = 0

    def __call__(self, spec: Any, physics_dt: float = 1e-3, tilt: float = 0.0,
                 ground: Ground | None = None) -> World:
        if float(getattr(spec.motors, "backlash", 0.0)) > 0.0:
            # With gearbox play a restored world drifted from a fresh one on the slippery
            # test (first differing bytes 0.3 s in; the engine's state, not the Python
            # side's, which is checked equal): such runs get a world of their own.
            self.built += 1
            return World(spec, physics_dt=physics_dt, tilt=tilt, ground=ground)
        key = shape_key(spec, physics_dt, tilt, ground)
        world = self.worlds.pop(key, None)
        if world is not None:
            world.restore_settled(spec)
            self.reused += 1
        else:
            world = World(spec, physics_dt=physics_dt, tilt=tilt, ground=ground)
            world.save_settled()
            world.hold_open = True
            self.built += 1
        self.worlds[key] = world  # most recently used last
        while len(self.worlds) > self.capacity:
            _, oldest = self.worlds.popitem(last=False)
            oldest.release()
        return world

    def close(self) -> None:
        while self.worlds:
            _, world = self.worlds.popitem()
            world.release()


_KEEPER: WorldKeeper | None = None


def worker_keeper() -> WorldKeeper:
    """This process's keeper (one per worker process; made on first use)."""
    global _KEEPER
    if _KEEPER is None:
        _KEEPER = WorldKeeper()
    return _KEEPER
