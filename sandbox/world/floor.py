"""Building the floor in the engine: pieces, patches, steps or a heightfield.

What the floor is (pieces, colours, heights) is data in :mod:`sandbox.ground`; this
module makes the engine's static bodies of it, turned by the slope.
"""

from __future__ import annotations

import numpy as np

from ..ground import (
    FLOOR_COLOUR,
    FLOOR_EXTENT,
    FLOOR_HALF_WIDTH,
    PATCH_COLOUR,
    ROUGH_EXTENT,
    ROUGH_HALF_WIDTH,
    STEP_COLOUR,
    Ground,
    Rough,
    floor_pieces,
    rough_heights,
)
from .engine import pb


class _Slope:
    """The floor's frame: its turn by the slope about y, as a quaternion and a matrix."""

    def __init__(self, slope: float):
        self.quaternion = pb.getQuaternionFromEuler([0, -slope, 0])
        self.rotation = np.array(pb.getMatrixFromQuaternion(self.quaternion)).reshape(3, 3)


def build_floor(client: int, ground: Ground, axle_height: float) -> list[int]:
    """Build the floor of ``ground`` (pieces, patches, steps or a heightfield) in the
    engine; returns the bodies' ids, the first the main floor. ``axle_height`` (m) sizes
    the rolling resistance (a torque per newton)."""
    g = ground
    slope = _Slope(g.slope)
    floor_ids: list[int] = []
    if g.rough is not None:
        floor_ids.append(_heightfield(client, g, slope, axle_height))
        # flat floor all round the rough stretch, so a long test cannot drive off it
        (x0, x1), (f0, f1), w = ROUGH_EXTENT, FLOOR_EXTENT, ROUGH_HALF_WIDTH
        for centre, half in (
                (((f0 + x0) / 2, 0.0, -0.05), ((x0 - f0) / 2, FLOOR_HALF_WIDTH, 0.05)),
                (((x1 + f1) / 2, 0.0, -0.05), ((f1 - x1) / 2, FLOOR_HALF_WIDTH, 0.05)),
                (((x0 + x1) / 2, (w + FLOOR_HALF_WIDTH) / 2, -0.05),
                 ((x1 - x0) / 2, (FLOOR_HALF_WIDTH - w) / 2, 0.05)),
                (((x0 + x1) / 2, -(w + FLOOR_HALF_WIDTH) / 2, -0.05),
                 ((x1 - x0) / 2, (FLOOR_HALF_WIDTH - w) / 2, 0.05))):
            floor_ids.append(_floor_box(client, g, slope, axle_height, centre, half,
                                        FLOOR_COLOUR, g.friction))
    else:
        for start, end, friction in floor_pieces(g):
            colour = FLOOR_COLOUR if friction == g.friction else PATCH_COLOUR
            centre = (0.5 * (start + end), 0.0, -0.05)
            half = (0.5 * (end - start), FLOOR_HALF_WIDTH, 0.05)
            floor_ids.append(_floor_box(client, g, slope, axle_height, centre, half, colour,
                                        friction))
    for step in g.steps:
        floor_ids.append(_floor_box(
            client, g, slope, axle_height, (step.at + step.length / 2, 0.0, step.height / 2),
            (step.length / 2, FLOOR_HALF_WIDTH, step.height / 2), STEP_COLOUR, g.friction))
    return floor_ids


def _floor_box(client: int, ground: Ground, slope: _Slope, axle_height: float, centre,
               half_extents, colour, friction: float) -> int:
    """A static box given in floor coordinates (x along the slope, z up from it)."""
    c = client
    shape = pb.createCollisionShape(pb.GEOM_BOX, halfExtents=half_extents, physicsClientId=c)
    visual = pb.createVisualShape(pb.GEOM_BOX, halfExtents=half_extents, rgbaColor=colour,
                                  physicsClientId=c)
    position = (slope.rotation @ np.asarray(centre, dtype=float)).tolist()
    body = pb.createMultiBody(0, shape, visual, basePosition=position,
                              baseOrientation=slope.quaternion, physicsClientId=c)
    floor_contact(client, ground, axle_height, body, friction)
    return body


def floor_contact(client: int, ground: Ground, axle_height: float, body: int,
                  friction: float) -> None:
    """A floor body's contact settings: sliding, rolling and spinning friction."""
    # Bullet combines rolling friction as floor.rolling × wheel.friction (1 here):
    # the rolling resistance coefficient times the wheel radius is a torque per newton.
    pb.changeDynamics(body, -1, lateralFriction=friction,
                      rollingFriction=ground.rolling_resistance * axle_height,
                      spinningFriction=ground.spinning_friction, physicsClientId=client)


def _heightfield(client: int, ground: Ground, slope: _Slope, axle_height: float) -> int:
    rough: Rough = ground.rough
    c = client
    spacing = max(min(rough.wavelength / 6.0, 0.05), 0.01)
    heights = rough_heights(rough, spacing)
    nx, ny = heights.shape
    shape = pb.createCollisionShape(
        pb.GEOM_HEIGHTFIELD, meshScale=[spacing, spacing, 1.0],
        heightfieldData=heights.T.flatten().tolist(),  # x varies fastest
        numHeightfieldRows=nx, numHeightfieldColumns=ny, physicsClientId=c)
    # The engine centres a heightfield on its origin, heights included.
    middle_x = 0.5 * (ROUGH_EXTENT[0] + ROUGH_EXTENT[1])
    middle_z = 0.5 * (float(heights.max()) + float(heights.min()))
    position = (slope.rotation @ np.array([middle_x, 0.0, middle_z])).tolist()
    body = pb.createMultiBody(0, shape, basePosition=position,
                              baseOrientation=slope.quaternion, physicsClientId=c)
    pb.changeVisualShape(body, -1, rgbaColor=FLOOR_COLOUR, physicsClientId=c)
    floor_contact(client, ground, axle_height, body, ground.friction)
    return body
