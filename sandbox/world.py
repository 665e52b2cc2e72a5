"""The pybullet world: the only module (besides rendering) that talks to the engine.

It owns the client, the ground, contact settings, spawning the robot, applying
wheel torques and reading the true state through named accessors. It knows
nothing about controllers, sensors' noise or motors' electrics.
"""

from __future__ import annotations

import math
import os
import tempfile
from collections.abc import Callable
from contextlib import contextmanager

import numpy as np

from .bodystate import BodyState, Vector, _add, _cross, _matmul, _point_velocity
from .gearbox import Backlash, ContactDesign, CouplingGains
from .ground import (
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
from .inertia import cylinder_inertia_y
from .planar import PlanarParams
from .robot import RobotSpec
from .urdf import WHEEL_JOINTS, robot_urdf, wheel_of


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


def shape_key(spec: RobotSpec, physics_dt: float = 1e-3, tilt: float = 0.0,
              ground: Ground | None = None, gravity: float = 9.80665,
              rotor_coupling: bool = True) -> tuple:
    """What a settled world's engine state depends on: two runs with equal keys can share
    one world (saved and restored between them); anything else of the robot (motors'
    electrics, battery, sensors, controller) lives on the Python side."""
    backlash = float(getattr(spec.motors, "backlash", 0.0))
    ground = ground or Ground(friction=spec.wheels.friction,
                              rolling_resistance=spec.wheels.rolling_resistance)
    urdf = robot_urdf(spec, with_reflected_inertia=True, reflected_on_wheels=backlash == 0.0)
    return (urdf, float(physics_dt), float(tilt), ground, float(gravity), bool(rotor_coupling))


class World:
    """A pybullet world holding one robot on the ground, stepped at a fixed ``physics_dt``."""

    def __init__(
        self,
        spec: RobotSpec,
        physics_dt: float = 1e-3,
        tilt: float = 0.0,
        ground: Ground | None = None,
        gravity: float = 9.80665,
        rotor_coupling: bool = True,
        connection: str = "direct",
    ):
        self.spec = spec
        self.dt = float(physics_dt)
        # per-side wheels: the axle centre sits at the mean radius, rolled so both touch
        left, right = wheel_of(spec, "left").radius, wheel_of(spec, "right").radius
        self.wheel_radii = (left, right)
        self._axle_height = 0.5 * (left + right)
        self._roll = math.asin((left - right) / spec.wheels.track) if left != right else 0.0
        self.gravity = float(gravity)
        self.ground = ground or Ground(friction=spec.wheels.friction,
                                       rolling_resistance=spec.wheels.rolling_resistance)
        slope = self.ground.slope
        self._floor_normal = (-math.sin(slope), 0.0, math.cos(slope))
        # With backlash the rotor is the gearbox's motor side (sandbox.gearbox), joined to
        # the wheel through the play: the wheels in the engine carry no rotor inertia.
        self.backlash = float(getattr(spec.motors, "backlash", 0.0))
        self._gearbox: Backlash | None = None
        self.client = connect(connection)
        c = self.client
        pb.setGravity(0, 0, -self.gravity, physicsClientId=c)
        pb.setTimeStep(self.dt, physicsClientId=c)
        # The default iterative solver stops early on the wheels' line contacts and
        # makes an uncontrolled fall 16 % too fast; the direct LCP solver is within
        # 1 % of the equations of motion at about the same cost (measured here).
        with quiet():
            pb.setPhysicsEngineParameter(constraintSolverType=pb.CONSTRAINT_SOLVER_LCP_DANTZIG,
                                         physicsClientId=c)
        self.ground_id = self._make_ground()
        self.robot_id = self._spawn(tilt)
        self.wheel_joints = self._joint_indices()
        info = pb.getDynamicsInfo(self.robot_id, -1, physicsClientId=c)
        self._com_local = np.array(info[3])
        self._com_local_tuple = tuple(info[3])
        self._inertial_quaternion = info[4]
        self._inertial_rotation = np.array(
            pb.getMatrixFromQuaternion(info[4], physicsClientId=c)).reshape(3, 3)
        # (inertial frame -> body frame) = transpose of the inertial rotation, row-major
        self._body_from_inertial = tuple(self._inertial_rotation.T.flatten().tolist())
        self._identity_inertial = bool(np.allclose(self._inertial_rotation, np.eye(3)))
        self._rotor_coupling = rotor_coupling
        self._start_run_state(spec)
        self._settle(tilt)

    def _start_run_state(self, spec: RobotSpec) -> None:
        """The Python side of a world at the start of a run: what comes from ``spec``
        besides the shape in the engine, and no state carried from a run before."""
        self.spec = spec
        self.backlash = float(getattr(spec.motors, "backlash", 0.0))
        self._gearbox = None
        rotor_coupling = self._rotor_coupling
        # Reflected rotor inertia: the part on each coordinate alone is in the URDF;
        # the cross term couples wheel and body and is applied here every step.
        self.reflected_inertia = spec.figures.reflected_inertia if rotor_coupling else 0.0
        if self.backlash > 0.0:
            self._gearbox = self._make_gearbox()
            self.reflected_inertia = 0.0  # no cross term: the rotor is not on the wheels
        self._coupling = (CouplingGains.from_params(PlanarParams.from_spec(spec))
                          if self.reflected_inertia > 0.0 else None)
        self._axle_axis = (0.0, 1.0, 0.0)
        # (pitch rate, wheel rates (absolute), total motor torque) at the last step's start
        self._last_rates: tuple[float, float, float, float] | None = None
        # the body's (velocity, angular velocity) read at the start of the last step
        # by the rotor coupling, or None: lets the IMU model skip a read
        self.velocity_before_step: tuple | None = None
        # Engine reads of the present instant, kept until the next step or reset: the
        # controller tick and the first physics step after it share them.
        self._joints_now: tuple | None = None
        self._velocity_now: tuple | None = None
        self._pose_kept: tuple = (None, None)  # (the velocity read, _pose_now's answer)
        self._clear_tilt = self._tilt_before_touching()
        # what advance() binds to local names on every call (once per controller tick)
        self._hot_names = (self.robot_id, self.wheel_joints, self.client, self.dt, 1.0 / self.dt,
                           self.reflected_inertia,
                           (0.0, 0.0) if self._coupling is None else
                           (self._coupling.pitch, self._coupling.wheels),
                           pb.getJointStates, pb.getBaseVelocity,
                           pb.applyExternalTorque, pb.setJointMotorControlArray,
                           pb.stepSimulation, pb.TORQUE_CONTROL, pb.WORLD_FRAME)
        self._push: list | None = None  # [steps left, force (world), point (body frame)]
        self.payload_ids: list[int] = []

    def _settle(self, tilt: float, steps: int = 100) -> None:
        """Let the wheels sink to their resting contact depth while the body is held still.

        Spawned exactly touching, the robot would first drop a few micrometres and
        bounce, which kicks the pitch; holding the pose (free only to sink) for a
        tenth of a second removes that kick.
        """
        c = self.client
        rid = self.robot_id
        for _ in range(steps):
            pb.stepSimulation(physicsClientId=c)
            self._forget_reads()
            state = self.body_state()
            normal = np.array(self._floor_normal)
            sink = float(np.dot(state.axle, normal))
            target_axle = normal * sink
            link_quat = pb.getQuaternionFromEuler([self._roll, tilt, 0])
            rotation = np.array(pb.getMatrixFromQuaternion(link_quat)).reshape(3, 3)
            com = target_axle + rotation @ self._com_local
            quat = pb.multiplyTransforms([0, 0, 0], link_quat, [0, 0, 0],
                                         self._inertial_quaternion)[1]
            pb.resetBasePositionAndOrientation(rid, com.tolist(), quat, physicsClientId=c)
            pb.resetBaseVelocity(rid, [0, 0, 0], [0, 0, 0], physicsClientId=c)
            for j in self.wheel_joints:
                pb.resetJointState(rid, j, 0.0, 0.0, physicsClientId=c)
        self._forget_reads()

    # ------------------------------------------------------------- set-up
    def _make_ground(self) -> int:
        """Build the floor (pieces, patches, steps or a heightfield); returns the first id."""
        g = self.ground
        self._slope_quaternion = pb.getQuaternionFromEuler([0, -g.slope, 0])
        self._slope_rotation = np.array(pb.getMatrixFromQuaternion(self._slope_quaternion)
                                        ).reshape(3, 3)
        self.floor_ids: list[int] = []
        if g.rough is not None:
            self.floor_ids.append(self._make_heightfield(g.rough))
            # flat floor all round the rough stretch, so a long test cannot drive off it
            (x0, x1), (f0, f1), w = ROUGH_EXTENT, FLOOR_EXTENT, ROUGH_HALF_WIDTH
            for centre, half in (
                    (((f0 + x0) / 2, 0.0, -0.05), ((x0 - f0) / 2, FLOOR_HALF_WIDTH, 0.05)),
                    (((x1 + f1) / 2, 0.0, -0.05), ((f1 - x1) / 2, FLOOR_HALF_WIDTH, 0.05)),
                    (((x0 + x1) / 2, (w + FLOOR_HALF_WIDTH) / 2, -0.05),
                     ((x1 - x0) / 2, (FLOOR_HALF_WIDTH - w) / 2, 0.05)),
                    (((x0 + x1) / 2, -(w + FLOOR_HALF_WIDTH) / 2, -0.05),
                     ((x1 - x0) / 2, (FLOOR_HALF_WIDTH - w) / 2, 0.05))):
                self.floor_ids.append(self._floor_box(centre, half, FLOOR_COLOUR, g.friction))
        else:
            for start, end, friction in floor_pieces(g):
                colour = FLOOR_COLOUR if friction == g.friction else PATCH_COLOUR
                centre = (0.5 * (start + end), 0.0, -0.05)
                half = (0.5 * (end - start), FLOOR_HALF_WIDTH, 0.05)
                self.floor_ids.append(self._floor_box(centre, half, colour, friction))
        for step in g.steps:
            self.floor_ids.append(self._floor_box(
                (step.at + step.length / 2, 0.0, step.height / 2),
                (step.length / 2, FLOOR_HALF_WIDTH, step.height / 2), STEP_COLOUR, g.friction))
        return self.floor_ids[0]

    def _floor_box(self, centre, half_extents, colour, friction: float) -> int:
        """A static box given in floor coordinates (x along the slope, z up from it)."""
        c = self.client
        shape = pb.createCollisionShape(pb.GEOM_BOX, halfExtents=half_extents, physicsClientId=c)
        visual = pb.createVisualShape(pb.GEOM_BOX, halfExtents=half_extents, rgbaColor=colour,
                                      physicsClientId=c)
        position = (self._slope_rotation @ np.asarray(centre, dtype=float)).tolist()
        body = pb.createMultiBody(0, shape, visual, basePosition=position,
                                  baseOrientation=self._slope_quaternion, physicsClientId=c)
        self._floor_contact(body, friction)
        return body

    def _floor_contact(self, body: int, friction: float) -> None:
        g = self.ground
        # Bullet combines rolling friction as floor.rolling × wheel.friction (1 here):
        # the rolling resistance coefficient times the wheel radius is a torque per newton.
        pb.changeDynamics(body, -1, lateralFriction=friction,
                          rollingFriction=g.rolling_resistance * self._axle_height,
                          spinningFriction=g.spinning_friction, physicsClientId=self.client)

    def _make_heightfield(self, rough: Rough) -> int:
        c = self.client
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
        position = (self._slope_rotation @ np.array([middle_x, 0.0, middle_z])).tolist()
        body = pb.createMultiBody(0, shape, basePosition=position,
                                  baseOrientation=self._slope_quaternion, physicsClientId=c)
        pb.changeVisualShape(body, -1, rgbaColor=FLOOR_COLOUR, physicsClientId=c)
        self._floor_contact(body, self.ground.friction)
        return body

    def _spawn(self, tilt: float) -> int:
        c = self.client
        text = robot_urdf(self.spec, with_reflected_inertia=True,
                          reflected_on_wheels=self.backlash == 0.0)
        with tempfile.NamedTemporaryFile("w", suffix=".urdf", delete=False) as handle:
            handle.write(text)
            path = handle.name
        try:
            axle = np.array(self._floor_normal) * self._axle_height
            orientation = pb.getQuaternionFromEuler([self._roll, tilt, 0])
            with quiet():
                robot = pb.loadURDF(path, axle.tolist(), orientation, flags=LOAD_FLAGS,
                                    physicsClientId=c)
        finally:
            os.unlink(path)
        for j in range(pb.getNumJoints(robot, physicsClientId=c)):
            pb.setJointMotorControl2(robot, j, pb.VELOCITY_CONTROL, force=0, physicsClientId=c)
        for link in range(-1, pb.getNumJoints(robot, physicsClientId=c)):
            pb.changeDynamics(robot, link, linearDamping=0, angularDamping=0, jointDamping=0,
                              physicsClientId=c)
        for j in range(pb.getNumJoints(robot, physicsClientId=c)):
            pb.changeDynamics(robot, j, lateralFriction=1.0, rollingFriction=0.0,
                              spinningFriction=0.0, physicsClientId=c)
        return robot

    def _joint_indices(self) -> list[int]:
        c = self.client
        names = [pb.getJointInfo(self.robot_id, j, physicsClientId=c)[1].decode()
                 for j in range(pb.getNumJoints(self.robot_id, physicsClientId=c))]
        return [names.index(n) for n in WHEEL_JOINTS]

    def close(self) -> None:
        if self.client is not None and not self.hold_open:
            pb.disconnect(physicsClientId=self.client)
            self.client = None

    # ------------------------------------------------------------- reuse between runs
    # A kept world (sandbox.sweep.worlds) stays connected when a run closes it.
    hold_open = False

    def save_settled(self) -> None:
        """Keep the engine's state now (just built and settled) for :meth:`restore_settled`,
        with what a saved state leaves out: the floor's contact settings."""
        c = self.client
        self._settled_state = pb.saveState(physicsClientId=c)
        # the one piece of Python state the settling leaves (read by the first step)
        self._settled_axle_axis = self._axle_axis
        self._settled_floors = [pb.getDynamicsInfo(f, -1, physicsClientId=c) for f in
                                self.floor_ids]

    def restore_settled(self, spec: RobotSpec) -> None:
        """Put the world back as :meth:`save_settled` found it, for a new run of ``spec``
        (whose URDF, ground, tilt and physics step must be the saved world's: see
        :func:`shape_key`). Payloads and their joints go; friction the run changed
        comes back; the Python side starts afresh. Found by comparing trace bytes with
        fresh worlds: restoreState brings back poses, velocities and contacts, not
        bodies added since, user constraints or changeDynamics settings."""
        c = self.client
        while pb.getNumConstraints(physicsClientId=c):
            pb.removeConstraint(pb.getConstraintUniqueId(0, physicsClientId=c),
                                physicsClientId=c)
        for payload in self.payload_ids:
            pb.removeBody(payload, physicsClientId=c)
        pb.restoreState(self._settled_state, physicsClientId=c)
        for floor, info in zip(self.floor_ids, self._settled_floors):
            pb.changeDynamics(floor, -1, lateralFriction=info[1], rollingFriction=info[6],
                              spinningFriction=info[7], physicsClientId=c)
        self._start_run_state(spec)
        self._axle_axis = self._settled_axle_axis
        self._forget_reads()  # engine reads cached by the last run's final step

    def release(self) -> None:
        """Disconnect a kept world (its runs' ``close`` left it open)."""
        self.hold_open = False
        self.close()

    def __enter__(self) -> World:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------- hot path
    def wheel_state(self) -> tuple[float, float, float, float]:
        """Wheel angles and rates relative to the body: (angle_l, angle_r, rate_l, rate_r)."""
        joints = self._joints_now
        if joints is None:
            joints = self._joints_now = pb.getJointStates(self.robot_id, self.wheel_joints,
                                                          physicsClientId=self.client)
        left, right = joints
        return left[0], right[0], left[1], right[1]

    def _forget_reads(self) -> None:
        """The engine's state has changed: later reads must ask it again."""
        self._joints_now = self._velocity_now = None

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

    # ------------------------------------------------------------- true state
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

    # ------------------------------------------------------------- disturbances
    def push(self, force: Vector, body_point: Vector, steps: int) -> None:
        """Push the body with ``force`` (N, world axes) at a point fixed in the body
        (m, body frame) for the next ``steps`` physics steps."""
        self._push = [int(steps), tuple(force), tuple(body_point)]

    def set_friction(self, friction: float) -> None:
        """Change the wheel-on-floor friction everywhere."""
        for floor in self.floor_ids:
            pb.changeDynamics(floor, -1, lateralFriction=friction, physicsClientId=self.client)

    def add_payload(self, mass: float, size: Vector, body_point: Vector) -> int:
        """Fix a solid box (kg, m) to the body with its centre at ``body_point`` (body frame)."""
        c = self.client
        state = self.body_state()
        half = [0.5 * v for v in size]
        shape = pb.createCollisionShape(pb.GEOM_BOX, halfExtents=half, physicsClientId=c)
        visual = pb.createVisualShape(pb.GEOM_BOX, halfExtents=half,
                                      rgbaColor=[0.85, 0.33, 0.1, 1], physicsClientId=c)
        centre = _add(state.axle, state.to_world(body_point))
        link_quat = pb.multiplyTransforms([0, 0, 0], state.com_orientation, [0, 0, 0],
                                          pb.invertTransform([0, 0, 0],
                                                             self._inertial_quaternion)[1])[1]
        payload = pb.createMultiBody(mass, shape, visual, basePosition=centre,
                                     baseOrientation=link_quat, physicsClientId=c)
        pb.resetBaseVelocity(payload, state.velocity, state.angular_velocity, physicsClientId=c)
        # the constraint's parent frame is the body's centre-of-mass (inertial) frame
        local = self._inertial_rotation.T @ (np.asarray(body_point) - self._com_local)
        inverse = pb.invertTransform([0, 0, 0], self._inertial_quaternion)[1]
        joint = pb.createConstraint(self.robot_id, -1, payload, -1, pb.JOINT_FIXED, [0, 0, 0],
                                    local.tolist(), [0, 0, 0], inverse, physicsClientId=c)
        pb.changeConstraint(joint, maxForce=1e6, physicsClientId=c)
        for link in range(-1, pb.getNumJoints(self.robot_id, physicsClientId=c)):
            pb.setCollisionFilterPair(self.robot_id, payload, link, -1, 0, physicsClientId=c)
        self.payload_ids.append(payload)
        self._forget_reads()
        return payload

    def payload_mass(self) -> float:
        return sum(pb.getDynamicsInfo(p, -1, physicsClientId=self.client)[0]
                   for p in self.payload_ids)

    def gravity_vector(self) -> Vector:
        return (0.0, 0.0, -self.gravity)

    # ------------------------------------------------------------- reading the engine
    def link_masses(self) -> dict[str, float]:
        """Mass (kg) of each link as the engine holds it."""
        c = self.client
        out = {"body": pb.getDynamicsInfo(self.robot_id, -1, physicsClientId=c)[0]}
        for name, j in zip(("wheel_left", "wheel_right"), self.wheel_joints):
            out[name] = pb.getDynamicsInfo(self.robot_id, j, physicsClientId=c)[0]
        return out

    def body_inertia_world_axes(self) -> np.ndarray:
        """The body's inertia about its centre of mass, body axes (kg·m²), as the engine has it."""
        info = pb.getDynamicsInfo(self.robot_id, -1, physicsClientId=self.client)
        principal = np.diag(info[2])
        r = self._inertial_rotation
        return r @ principal @ r.T

    def set_state(self, com, orientation, velocity=(0, 0, 0), angular_velocity=(0, 0, 0)) -> None:
        """Place the body's centre of mass and orientation (pybullet base frame)."""
        c = self.client
        pb.resetBasePositionAndOrientation(self.robot_id, com, orientation, physicsClientId=c)
        pb.resetBaseVelocity(self.robot_id, velocity, angular_velocity, physicsClientId=c)
        self._forget_reads()
        self._last_rates = None  # velocities jumped: no acceleration to carry over
