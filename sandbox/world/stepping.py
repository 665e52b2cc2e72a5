"""How the world steps: wheel torques in, physics steps out, the motors in the loop.

:class:`Stepping` is the stepping half of :class:`sandbox.world.World` (a mixin: the
state it uses is the world's, set up in ``world/core.py``): the plain loop with the
rotor coupling written out, the loop with the gearbox's play, pushes. The hot path of
every run, so names are bound to locals and small calls written out.
"""

from __future__ import annotations

from collections.abc import Callable

from ..bodystate import _add, _matmul
from ..gearbox import Backlash, ContactDesign
from ..inertia import cylinder_inertia_y
from ..urdf import wheel_of
from .engine import pb


def cylinder_axle_inertia(wheel) -> float:
    """A wheel's inertia about its axle (kg·m², solid cylinder, m r²/2)."""
    return float(cylinder_inertia_y(wheel.mass, wheel.radius, wheel.width)[1, 1])


class _HeldTorques:
    """Stands in for a drive train in :meth:`World.step`: the same torques at any rate."""

    __slots__ = ("torques",)

    def __init__(self, left: float, right: float):
        self.torques = (left, right)

    def step(self, rate_left: float, rate_right: float, dt: float) -> tuple[float, float]:
        return self.torques


class Stepping:
    """Advancing the world: :meth:`advance` and its loops (part of ``World``)."""

    def step(self, torque_left: float, torque_right: float) -> None:
        """Apply wheel torques (N·m, + forward, reaction on the body) and advance one step,
        with the rotor coupling and any push as in :meth:`advance`."""
        self.advance(1, _HeldTorques(torque_left, torque_right))

    def advance(self, steps: int, drive, take_step: Callable[[], None] | None = None) -> None:
        """Run ``steps`` physics steps with the motors in the loop.

        Each step: read the wheel rates relative to the body, let ``drive`` (an
        :class:`sandbox.actuators.DriveTrain`) turn them into wheel torques,
        apply them, step, then call ``take_step`` (if given: an IMU sample read
        at every step). The hot loop of every run, so names are bound locally
        and the rotor coupling is written out here rather than called. The
        first step uses the reads of the present instant if the controller
        tick already made them.
        """
        if self._push is not None:
            self._advance_pushed(steps, drive, take_step)
            return
        if self._gearbox is not None:
            self._advance_geared(steps, drive, take_step)
            return
        (robot, joints, client, dt, inv_dt, j, (pitch_gain, wheels_gain), read, read_body,
         push_body, apply, step, torque_mode, world_frame) = self._hot_names
        motors = drive.step
        ax, ay, az = self._axle_axis
        last = self._last_rates
        joints_now, velocity_now = self._joints_now, self._velocity_now
        self._joints_now = self._velocity_now = None
        for _ in range(steps):
            if joints_now is None:
                left, right = read(robot, joints, physicsClientId=client)
            else:
                left, right = joints_now
                joints_now = None
            rate_left, rate_right = left[1], right[1]
            torque_left, torque_right = motors(rate_left, rate_right, dt)
            if j > 0.0:
                # Rotor coupling. The kinetic energy ½J(φ̇−θ̇)² has a cross term −Jφ̇θ̇
                # that link inertias cannot hold: it gives +Jθ̈ on each wheel (as a joint
                # torque) and +Jφ̈ on the body (the joint's reaction is undone by an
                # external torque). The accelerations of this step are predicted: the
                # previous step's (from velocity differences) plus what the change of
                # motor torque adds through the planar mass matrix; on the first step
                # after a release, the planar model's accelerations from rest.
                if velocity_now is None:
                    velocity = read_body(robot, physicsClientId=client)
                else:
                    velocity = velocity_now
                    velocity_now = None
                w = velocity[1]
                body_rate = w[0] * ax + w[1] * ay + w[2] * az
                torque = torque_left + torque_right
                now = (body_rate, rate_left + body_rate, rate_right + body_rate, torque)
                if last is not None:
                    change = torque - last[3]
                    body_acc = (body_rate - last[0]) * inv_dt + pitch_gain * change
                    wheels_acc = ((now[1] - last[1]) * inv_dt + (now[2] - last[2]) * inv_dt
                                  + wheels_gain * change)
                else:
                    body_acc, wheels_acc = self._coupling.accelerations(
                        torque, self._gravity_torque())
                body_torque = j * (wheels_acc + 2.0 * body_acc)
                push_body(robot, -1, (ax * body_torque, ay * body_torque, az * body_torque),
                          world_frame, physicsClientId=client)
                torque_left += j * body_acc
                torque_right += j * body_acc
                last = now
                self.velocity_before_step = velocity
            apply(robot, joints, torque_mode, forces=(torque_left, torque_right),
                  physicsClientId=client)
            step(physicsClientId=client)
            if take_step is not None:
                self._velocity_now = None
                take_step()
        self._last_rates = last

    def _make_gearbox(self) -> Backlash:
        """The motor sides and their dead-zone contacts, sized to the physics step."""
        fig = self.spec.figures
        lightest = min(cylinder_axle_inertia(wheel_of(self.spec, side))
                       for side in ("left", "right"))
        # the wheel relative to the body, both free (in the air): the largest mobility
        mobility = 1.0 / lightest + 1.0 / float(fig.body.inertia[1, 1])
        design = ContactDesign.for_step(self.backlash, fig.reflected_inertia, mobility, self.dt)
        return Backlash(design, self.dt)

    def play_angles(self) -> tuple[float, float] | None:
        """Each gearbox's motor side less its wheel (rad, left and right), within ±half
        the play while the gap is open; None without backlash."""
        motor = self.motor_angles()
        if motor is None:
            return None
        left, right, _, _ = self.wheel_state()
        return motor[0] - left, motor[1] - right

    def motor_angles(self) -> tuple[float, float] | None:
        """Motor-side angles at the output shaft relative to the body (rad, left and
        right): what an encoder on the motor shaft counts (divided by the gear ratio);
        None without backlash, where they are the wheels' angles."""
        if self._gearbox is None:
            return None
        if not self._gearbox._started:  # before the first step: in the middle of the play
            left, right, _, _ = self.wheel_state()
            return left, right
        return self._gearbox.motor_angle[0], self._gearbox.motor_angle[1]

    def _advance_geared(self, steps: int, drive, take_step: Callable[[], None] | None) -> None:
        """As :meth:`advance`, with backlash: the motors drive their motor sides (their
        back-EMF sees the motor side's rate) and the wheels get the dead-zone contact's
        torque. The joint torque's reaction on the body is the stator's torque plus the
        rotor's inertial reaction (−τ_motor + J·ψ̈_motor = −τ_contact), so momentum is
        conserved with no further torque."""
        robot, joints, client = self.robot_id, self.wheel_joints, self.client
        gear, dt = self._gearbox, self.dt
        motor_rate, motors, contacts = gear.motor_rate, drive.step, gear.step
        read, apply, step, torque_mode = (pb.getJointStates, pb.setJointMotorControlArray,
                                          pb.stepSimulation, pb.TORQUE_CONTROL)
        joints_now = self._joints_now
        self._forget_reads()
        for _ in range(steps):  # names bound above: this runs every physics step
            if joints_now is None:
                joints_now = read(robot, joints, physicsClientId=client)
            left, right = joints_now
            joints_now = None
            torques = motors(motor_rate[0], motor_rate[1], dt)
            contact = contacts(torques, (left[0], right[0]), (left[1], right[1]))
            apply(robot, joints, torque_mode, forces=contact, physicsClientId=client)
            step(physicsClientId=client)
            if take_step is not None:
                self._velocity_now = None  # the sample reads (and keeps) the body anew
                take_step()

    def _gravity_torque(self) -> float:
        """Gravity's torque on the body about the axle axis now (N·m, + leaning forward)."""
        com, quat = pb.getBasePositionAndOrientation(self.robot_id, physicsClientId=self.client)
        r = pb.getMatrixFromQuaternion(quat, physicsClientId=self.client)
        if not self._identity_inertial:
            r = _matmul(r, self._body_from_inertial)
        lx, ly, lz = self._com_local_tuple
        cx, cy = r[0] * lx + r[1] * ly + r[2] * lz, r[3] * lx + r[4] * ly + r[5] * lz
        ax, ay, _ = r[1], r[4], r[7]
        return self.spec.figures.body.mass * self.gravity * (cx * ay - cy * ax)

    def _advance_pushed(self, steps: int, drive, take_step: Callable[[], None] | None) -> None:
        """Step one at a time while a push lasts (the force is re-applied every step)."""
        for _ in range(steps):
            if self._push is not None:
                left, force, point = self._push
                state = self.body_state()
                at = _add(state.axle, state.to_world(point))
                pb.applyExternalForce(self.robot_id, -1, force, at, pb.WORLD_FRAME,
                                      physicsClientId=self.client)
                self._push = [left - 1, force, point] if left > 1 else None
            pushed, self._push = self._push, None
            self.advance(1, drive, take_step)
            self._push = pushed
