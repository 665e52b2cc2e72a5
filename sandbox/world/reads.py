"""The true state the world reads from the engine: pose, velocities, IMU truth, contact.

:class:`TrueState` is the reading half of :class:`sandbox.world.World` (a mixin: the
state it uses is the world's, set up in ``world/core.py``). Reads of one instant are
kept until the engine's state changes, so a tick and the step after it share them.
"""

from __future__ import annotations

import math

from ..bodystate import BodyState, Vector, _cross, _matmul, _point_velocity
from .engine import pb


class TrueState:
    """Reading the engine's true state (part of ``World``)."""

    def body_state(self) -> BodyState:
        """The body's true pose and velocity now (world frame)."""
        com, quat, velocity, omega, rotation, axle = self._pose_now()
        # axle velocity = v + ω × (axle − com), written out
        ox, oy, oz = omega
        dx, dy, dz = axle[0] - com[0], axle[1] - com[1], axle[2] - com[2]
        return BodyState(axle, rotation, com, velocity, omega, quat,
                         (velocity[0] + oy * dz - oz * dy, velocity[1] + oz * dx - ox * dz,
                          velocity[2] + ox * dy - oy * dx))

    def _pose_now(self) -> tuple:
        """The engine's reads of the body now: (com, quaternion, velocity, angular velocity,
        rotation of the body frame (row-major), axle centre), world frame; the velocity is
        kept for the instant. The axle as :meth:`body_state` computes it, to the bit."""
        c = self.client
        velocity_now = self._velocity_now
        kept = self._pose_kept
        if velocity_now is not None and kept[0] is velocity_now:
            # the same instant as the last call (the velocity read is kept until the
            # state changes): a tick reads the pose two or three times
            return kept[1]
        com, quat = pb.getBasePositionAndOrientation(self.robot_id, physicsClientId=c)
        if velocity_now is None:
            velocity_now = self._velocity_now = pb.getBaseVelocity(self.robot_id,
                                                                   physicsClientId=c)
        r = pb.getMatrixFromQuaternion(quat, physicsClientId=c)
        if not self._identity_inertial:
            r = _matmul(r, self._body_from_inertial)
        self._axle_axis = (r[1], r[4], r[7])
        lx, ly, lz = self._com_local_tuple
        axle = (com[0] - (r[0] * lx + r[1] * ly + r[2] * lz),
                com[1] - (r[3] * lx + r[4] * ly + r[5] * lz),
                com[2] - (r[6] * lx + r[7] * ly + r[8] * lz))
        pose = com, quat, velocity_now[0], velocity_now[1], r, axle
        self._pose_kept = (velocity_now, pose)
        return pose

    def imu_sample(self, mount: Vector, before: Vector | None, gravity: Vector,
                   dt: float) -> tuple[tuple[Vector, Vector], Vector]:
        """An IMU sample's truth now, and the mount point's velocity (world, m/s).

        The truth is ``(body rate, specific force)`` in body axes, the force from the
        mount point's velocity change since ``before`` (its velocity one step ago, or
        None: gravity alone): bit for bit what :func:`sandbox.schedule.imu_truth` gives
        from :meth:`body_state`, in one pass, since between ticks it runs at every IMU
        sample (every physics step for a filtered 1 kHz IMU).
        """
        (com, quat, (vx, vy, vz), (ox, oy, oz), r,
         (axle_x, axle_y, axle_z)) = self._pose_now()
        r0, r1, r2, r3, r4, r5, r6, r7, r8 = r
        cx, cy, cz = com
        # (the operations of body_state, _point_velocity and to_body, in their order)
        mx, my, mz = mount
        dx = axle_x + r0 * mx + r1 * my + r2 * mz - cx
        dy = axle_y + r3 * mx + r4 * my + r5 * mz - cy
        dz = axle_z + r6 * mx + r7 * my + r8 * mz - cz
        v = (vx + oy * dz - oz * dy, vy + oz * dx - ox * dz, vz + ox * dy - oy * dx)
        gx, gy, gz = gravity
        if before is None:
            fx, fy, fz = -gx, -gy, -gz
        else:
            fx = (v[0] - before[0]) / dt - gx
            fy = (v[1] - before[1]) / dt - gy
            fz = (v[2] - before[2]) / dt - gz
        rate = (r0 * ox + r3 * oy + r6 * oz, r1 * ox + r4 * oy + r7 * oz,
                r2 * ox + r5 * oy + r8 * oz)
        force = (r0 * fx + r3 * fy + r6 * fz, r1 * fx + r4 * fy + r7 * fz,
                 r2 * fx + r5 * fy + r8 * fz)
        return (rate, force), v

    def tick_sense(self, mount: Vector) -> tuple:
        """What a controller tick records of the true state now, in one pass.

        Returns ``(pitch, pitch_rate, yaw, forward_speed, com, com_orientation,
        wheel_angle_left, wheel_angle_right, body_rate, specific_force)``: the
        same values as :meth:`body_state` with its properties, :meth:`forward_speed`
        and :meth:`wheel_state` give; ``body_rate`` is the angular velocity in body
        axes (rad/s) and ``specific_force`` (m/s², body axes) the acceleration less
        gravity of the body point ``mount`` (body frame, m), its acceleration being
        its velocity change over the last physics step (zero when the world did not
        keep the velocity before that step). Written out as one function because it
        runs every tick, where a chain of small calls costs more than the arithmetic.
        """
        (com, quat, (vx, vy, vz), (ox, oy, oz), r,
         (axle_x, axle_y, axle_z)) = self._pose_now()
        r0, r1, r2, r3, r4, r5, r6, r7, r8 = r
        cx, cy, cz = com
        # (the same operations, in the same order, as body_state, forward_speed and the
        # runner's IMU truth: the numbers are identical to the last bit)
        dx, dy, dz = axle_x - cx, axle_y - cy, axle_z - cz
        # forward speed: the axle centre's velocity along (axle axis × floor normal)
        nx, ny, nz = self._floor_normal
        fx, fy, fz = r4 * nz - r7 * ny, r7 * nx - r1 * nz, r1 * ny - r4 * nx
        norm = math.sqrt(fx * fx + fy * fy + fz * fz)
        if norm < 1e-9:
            fx, fy, fz, norm = r0, r3, r6, 1.0
        speed = ((vx + oy * dz - oz * dy) * fx + (vy + oz * dx - ox * dz) * fy
                 + (vz + ox * dy - oy * dx) * fz) / norm
        # the mount point's acceleration over the last step, less gravity, in body axes
        mx, my, mz = mount
        px = axle_x + r0 * mx + r1 * my + r2 * mz - cx
        py = axle_y + r3 * mx + r4 * my + r5 * mz - cy
        pz = axle_z + r6 * mx + r7 * my + r8 * mz - cz
        gx, gy, gz = 0.0, 0.0, -self.gravity
        before = self.velocity_before_step
        if before is None:
            wx, wy, wz = -gx, -gy, -gz
        else:
            (bx, by, bz), (qx, qy, qz) = before
            dt = self.dt
            wx = ((vx + oy * pz - oz * py) - (bx + qy * pz - qz * py)) / dt - gx
            wy = ((vy + oz * px - ox * pz) - (by + qz * px - qx * pz)) / dt - gy
            wz = ((vz + ox * py - oy * px) - (bz + qx * py - qy * px)) / dt - gz
        joints = self._joints_now
        if joints is None:
            joints = self._joints_now = pb.getJointStates(self.robot_id, self.wheel_joints,
                                                          physicsClientId=self.client)
        return (
            math.atan2(-r6, math.hypot(r7, r8)),
            ox * r1 + oy * r4 + oz * r7,
            math.atan2(r3, r0),
            speed,
            com,
            quat,
            joints[0][0],
            joints[1][0],
            (r0 * ox + r3 * oy + r6 * oz, r1 * ox + r4 * oy + r7 * oz,
             r2 * ox + r5 * oy + r8 * oz),
            (r0 * wx + r3 * wy + r6 * wz, r1 * wx + r4 * wy + r7 * wz,
             r2 * wx + r5 * wy + r8 * wz),
        )

    def forward_axis(self, state: BodyState) -> Vector:
        """Unit vector along the floor, perpendicular to the axle: the robot's heading."""
        r = state.rotation
        fx, fy, fz = _cross((r[1], r[4], r[7]), self._floor_normal)
        norm = math.sqrt(fx * fx + fy * fy + fz * fz)
        if norm < 1e-9:
            return (r[0], r[3], r[6])
        return (fx / norm, fy / norm, fz / norm)

    def floor_normal(self) -> Vector:
        """Unit normal of the floor (world), tilted by the slope about y."""
        return self._floor_normal

    def forward_speed(self, state: BodyState) -> float:
        """Axle-centre speed along the heading (m/s)."""
        # forward_axis written out (every controller tick)
        r, (nx, ny, nz) = state.rotation, self._floor_normal
        fx, fy, fz = r[4] * nz - r[7] * ny, r[7] * nx - r[1] * nz, r[1] * ny - r[4] * nx
        norm = math.sqrt(fx * fx + fy * fy + fz * fz)
        if norm < 1e-9:
            fx, fy, fz, norm = r[0], r[3], r[6], 1.0
        v = state.axle_velocity
        return (v[0] * fx + v[1] * fy + v[2] * fz) / norm

    def previous_point_velocity(self, state: BodyState, local_point: Vector) -> Vector | None:
        """Velocity one physics step before ``state`` of a point fixed in the body, or None.

        Uses the body velocity read during the last step (when the rotor coupling
        runs) and the present geometry: the lever arm turns by ω·dt, a few
        milliradians, in one step.
        """
        if self.velocity_before_step is None:
            return None
        velocity, omega = self.velocity_before_step
        return _point_velocity(state, velocity, omega, local_point)

    def _tilt_before_touching(self) -> float:
        """Smallest tilt (rad) at which a corner of a body box reaches flat floor."""
        radius = min(self.wheel_radii)
        corners = [(b.at[0] + sx * b.size[0] / 2, b.at[2] + sz * b.size[2] / 2)
                   for b in self.spec.figures.boxes for sx in (-1, 1) for sz in (-1, 1)]
        for degrees in range(0, 91):
            tilt = math.radians(degrees)
            for sign in (1.0, -1.0):
                c, s = math.cos(tilt), math.sin(sign * tilt)
                if any(-x * s + z * c <= -radius for x, z in corners):
                    return tilt
        return math.pi / 2

    def body_touching(self, pitch: float, check_anyway: bool = False) -> bool:
        """Whether the body touches the floor; the engine is asked only when it could.

        On a flat floor the body cannot touch below the tilt at which its lowest
        corner reaches the floor (less a 10° margin for slopes and bumps);
        ``check_anyway`` asks regardless.
        """
        if not check_anyway and abs(pitch) < self._clear_tilt - math.radians(10.0):
            return False
        return self.body_on_ground()

    def body_on_ground(self) -> bool:
        """True when any part of the body (not a wheel) touches the floor."""
        for floor in self.floor_ids:
            if pb.getContactPoints(self.robot_id, floor, -1, -1, physicsClientId=self.client):
                return True
        return False
