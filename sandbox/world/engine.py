"""The engine itself: importing pybullet quietly, connections, the window's camera.

The world package (:mod:`sandbox.world`) is the only place that talks to pybullet
(besides rendering); this module holds what is about the connection, not the robot.
"""

from __future__ import annotations

import os
from contextlib import contextmanager

import numpy as np


@contextmanager
def quiet():
    """Silence pybullet's C-level prints (they bypass sys.stdout)."""
    try:
        saved = os.dup(1), os.dup(2)
    except OSError:  # no file descriptors to redirect (rare, e.g. some embedded hosts)
        yield
        return
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, 1)
        os.dup2(devnull, 2)
        yield
    finally:
        os.dup2(saved[0], 1)
        os.dup2(saved[1], 2)
        for fd in (*saved, devnull):
            os.close(fd)


with quiet():  # importing pybullet prints its build time from C
    import pybullet as pb

LOAD_FLAGS = pb.URDF_USE_IMPLICIT_CYLINDER | pb.URDF_USE_INERTIA_FROM_FILE


def engine_version() -> int:
    """pybullet's API version (for run records)."""
    return pb.getAPIVersion()


class NoDisplay(RuntimeError):
    """The engine's window cannot open: no display, or the display refused it."""


def connect(connection: str = "direct") -> int:
    """A new engine connection: "direct" (headless) or "gui" (the engine's own window;
    the physics is the same, the window only draws it)."""
    if connection == "direct":
        with quiet():
            return pb.connect(pb.DIRECT)
    if connection != "gui":
        raise ValueError(f"connection must be 'direct' or 'gui', got {connection!r}")
    client = pb.connect(pb.GUI, options="--width=800 --height=600")
    if client < 0:
        raise NoDisplay("the engine's window could not open on this display")
    for flag in (pb.COV_ENABLE_GUI, pb.COV_ENABLE_SHADOWS):  # just the scene, no side panels
        pb.configureDebugVisualizer(flag, 0, physicsClientId=client)
    return client


def look_at(client: int, body: int, distance: float, yaw_deg: float = 50.0,
            pitch_deg: float = -20.0) -> None:
    """Point the engine window's camera at ``body`` from ``distance`` m (a read only:
    the physics is not touched)."""
    target, _ = pb.getBasePositionAndOrientation(body, physicsClientId=client)
    pb.resetDebugVisualizerCamera(distance, yaw_deg, pitch_deg, list(target),
                                  physicsClientId=client)


def window_snapshot(client: int, width: int = 320, height: int = 240) -> np.ndarray:
    """The window's present view as an RGB array (height, width, 3), drawn by its OpenGL."""
    view = pb.getDebugVisualizerCamera(physicsClientId=client)
    _, _, rgba, _, _ = pb.getCameraImage(width, height, viewMatrix=view[2],
                                          projectionMatrix=view[3],
                                          renderer=pb.ER_BULLET_HARDWARE_OPENGL,
                                          physicsClientId=client)
    return np.reshape(np.asarray(rgba, dtype=np.uint8), (height, width, 4))[..., :3]
