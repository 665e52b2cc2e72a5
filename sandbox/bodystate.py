"""The body's true state at one instant, and the small vector arithmetic on it.

Plain tuples and floats (no engine calls, no numpy): these run at every tick and
every IMU sample, where small arrays cost more than the arithmetic.
"""

from __future__ import annotations

import math
from typing import NamedTuple

Vector = tuple[float, float, float]
Matrix = tuple[float, float, float, float, float, float, float, float, float]  # row-major


class BodyState(NamedTuple):
    """True state at one instant, world frame: positions m, velocities m/s, rates rad/s.

    Plain tuples rather than numpy arrays, and a named tuple rather than a
    dataclass: the loop makes one every controller tick, and tiny arrays or a
    frozen dataclass's constructor cost more than the arithmetic.
    """

    axle: Vector  # axle-centre position
    rotation: Matrix  # body frame -> world, row-major 3×3
    com: Vector  # body centre-of-mass position
    velocity: Vector  # body centre-of-mass velocity
    angular_velocity: Vector  # world axes
    com_orientation: tuple[float, float, float, float]  # pybullet's base quaternion (replay)
    axle_velocity: Vector

    @property
    def pitch(self) -> float:
        """Rotation about body y, + when the top leans forward (rad)."""
        r = self.rotation
        return math.atan2(-r[6], math.hypot(r[7], r[8]))

    @property
    def yaw(self) -> float:
        r = self.rotation
        return math.atan2(r[3], r[0])

    @property
    def pitch_rate(self) -> float:
        """Body angular rate about its own y axis (rad/s), what a gyro's y axis sees."""
        r, w = self.rotation, self.angular_velocity
        return w[0] * r[1] + w[1] * r[4] + w[2] * r[7]

    def to_body(self, vector: Vector) -> Vector:
        """A world vector in body axes (Rᵀ v)."""
        r = self.rotation
        x, y, z = vector
        return (r[0] * x + r[3] * y + r[6] * z, r[1] * x + r[4] * y + r[7] * z,
                r[2] * x + r[5] * y + r[8] * z)

    def to_world(self, vector: Vector) -> Vector:
        """A body vector in world axes (R v)."""
        r = self.rotation
        x, y, z = vector
        return (r[0] * x + r[1] * y + r[2] * z, r[3] * x + r[4] * y + r[5] * z,
                r[6] * x + r[7] * y + r[8] * z)

    def point_velocity(self, local_point: Vector) -> Vector:
        """World velocity of a point fixed in the body, given in body coordinates (m)."""
        return _point_velocity(self, self.velocity, self.angular_velocity, local_point)


def _point_velocity(state: BodyState, velocity: Vector, omega: Vector, point: Vector) -> Vector:
    """v + ω × (p − com) for a point p fixed in the body (body coordinates, from the axle
    centre) at the pose of ``state``; written out, as it runs every controller tick."""
    r, (ax, ay, az), (cx, cy, cz) = state.rotation, state.axle, state.com
    x, y, z = point
    dx = ax + r[0] * x + r[1] * y + r[2] * z - cx
    dy = ay + r[3] * x + r[4] * y + r[5] * z - cy
    dz = az + r[6] * x + r[7] * y + r[8] * z - cz
    ox, oy, oz = omega
    return (velocity[0] + oy * dz - oz * dy, velocity[1] + oz * dx - ox * dz,
            velocity[2] + ox * dy - oy * dx)


def _cross(a: Vector, b: Vector) -> Vector:
    return (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])


def _add(a: Vector, b: Vector) -> Vector:
    return (a[0] + b[0], a[1] + b[1], a[2] + b[2])


def _matmul(a: Matrix, b: Matrix) -> Matrix:
    return tuple(sum(a[3 * i + k] * b[3 * k + j] for k in range(3))
                 for i in range(3) for j in range(3))
