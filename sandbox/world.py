"""The pybullet world: the only module (besides rendering) that talks to the engine.

It owns the client, the ground, contact settings, spawning the robot, applying
wheel torques and reading the true state through named accessors. It knows
nothing about controllers, sensors' noise or motors' electrics.
"""

from __future__ import annotations

import math
import os
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from .robot import RobotSpec
from .urdf import WHEEL_JOINTS, robot_urdf


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


@dataclass(frozen=True)
class Ground:
    """The floor: friction (wheel on floor), rolling resistance coefficient, slope.

    ``slope`` (rad) tilts the floor about the world y axis so that driving
    forward (+x) climbs it.
    """

    friction: float = 0.9
    rolling_resistance: float = 0.0
    slope: float = 0.0
    spinning_friction: float = 0.001


@dataclass
class BodyState:
    """True state at one instant. Positions m, velocities m/s, rates rad/s, world frame."""

    axle: np.ndarray  # axle-centre position
    rotation: np.ndarray  # body frame -> world (3×3)
    com: np.ndarray  # body centre-of-mass position
    velocity: np.ndarray  # body centre-of-mass velocity
    angular_velocity: np.ndarray  # world axes
    com_orientation: tuple[float, float, float, float]  # pybullet's base quaternion (for replay)
    axle_velocity: np.ndarray = field(default_factory=lambda: np.zeros(3))

    @property
    def pitch(self) -> float:
        """Rotation about body y, + when the top leans forward (rad)."""
        r = self.rotation
        return math.atan2(-r[2, 0], math.hypot(r[2, 1], r[2, 2]))

    @property
    def yaw(self) -> float:
        r = self.rotation
        return math.atan2(r[1, 0], r[0, 0])

    @property
    def pitch_rate(self) -> float:
        """Body angular rate about its own y axis (rad/s), what a gyro's y axis sees."""
        return float(self.angular_velocity @ self.rotation[:, 1])


def cross(a, b) -> np.ndarray:
    """3-vector cross product (numpy's np.cross costs ~50 µs on tiny arrays)."""
    return np.array((a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2],
                     a[0] * b[1] - a[1] * b[0]))


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
    ):
        self.spec = spec
        self.dt = float(physics_dt)
        self.gravity = float(gravity)
        self.ground = ground or Ground(friction=spec.wheels.friction,
                                       rolling_resistance=spec.wheels.rolling_resistance)
        with quiet():
            self.client = pb.connect(pb.DIRECT)
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
        self._inertial_quaternion = info[4]
        self._inertial_rotation = np.array(
            pb.getMatrixFromQuaternion(info[4], physicsClientId=c)).reshape(3, 3)
        # Reflected rotor inertia: the part on each coordinate alone is in the URDF;
        # the cross term couples wheel and body and is applied here every step.
        self.reflected_inertia = spec.figures.reflected_inertia if rotor_coupling else 0.0
        self._axle_axis = np.array([0.0, 1.0, 0.0])
        self._last_rates: tuple[float, float, float] | None = None
        self._settle(tilt)

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
            state = self.body_state()
            sink = float(state.axle @ self.floor_normal())
            target_axle = self.floor_normal() * sink
            link_quat = pb.getQuaternionFromEuler([0, tilt, 0])
            rotation = np.array(pb.getMatrixFromQuaternion(link_quat)).reshape(3, 3)
            com = target_axle + rotation @ self._com_local
            quat = pb.multiplyTransforms([0, 0, 0], link_quat, [0, 0, 0],
                                         self._inertial_quaternion)[1]
            pb.resetBasePositionAndOrientation(rid, com.tolist(), quat, physicsClientId=c)
            pb.resetBaseVelocity(rid, [0, 0, 0], [0, 0, 0], physicsClientId=c)
            for j in self.wheel_joints:
                pb.resetJointState(rid, j, 0.0, 0.0, physicsClientId=c)

    # ------------------------------------------------------------- set-up
    def _make_ground(self) -> int:
        c = self.client
        g = self.ground
        size = 50.0
        shape = pb.createCollisionShape(pb.GEOM_BOX, halfExtents=[size, size, 0.05],
                                        physicsClientId=c)
        visual = pb.createVisualShape(pb.GEOM_BOX, halfExtents=[size, size, 0.05],
                                      rgbaColor=[0.82, 0.80, 0.74, 1], physicsClientId=c)
        orientation = pb.getQuaternionFromEuler([0, -g.slope, 0])
        # the box's top face passes through the world origin
        top = np.array(pb.getMatrixFromQuaternion(orientation)).reshape(3, 3) @ [0, 0, 0.05]
        ground = pb.createMultiBody(0, shape, visual, basePosition=(-top).tolist(),
                                    baseOrientation=orientation, physicsClientId=c)
        wheel_radius = self.spec.wheels.radius
        pb.changeDynamics(ground, -1, lateralFriction=g.friction,
                          rollingFriction=g.rolling_resistance * wheel_radius,
                          spinningFriction=g.spinning_friction, physicsClientId=c)
        return ground

    def _spawn(self, tilt: float) -> int:
        c = self.client
        text = robot_urdf(self.spec, with_reflected_inertia=True)
        with tempfile.NamedTemporaryFile("w", suffix=".urdf", delete=False) as handle:
            handle.write(text)
            path = handle.name
        try:
            slope = self.ground.slope
            up = np.array([math.sin(slope), 0.0, math.cos(slope)])  # floor normal
            axle = up * self.spec.wheels.radius
            orientation = pb.getQuaternionFromEuler([0, tilt, 0])
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
        if self.client is not None:
            pb.disconnect(physicsClientId=self.client)
            self.client = None

    def __enter__(self) -> World:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------- hot path
    def wheel_state(self) -> tuple[float, float, float, float]:
        """Wheel angles and rates relative to the body: (angle_l, angle_r, rate_l, rate_r)."""
        left, right = pb.getJointStates(self.robot_id, self.wheel_joints,
                                        physicsClientId=self.client)
        return left[0], right[0], left[1], right[1]

    def step(self, torque_left: float, torque_right: float,
             rate_left: float = 0.0, rate_right: float = 0.0) -> None:
        """Apply wheel torques (N·m, + forward, reaction on the body) and advance one step.

        ``rate_left``/``rate_right`` are this step's wheel rates relative to the
        body; they are needed only for the rotor-inertia coupling.
        """
        c = self.client
        j = self.reflected_inertia
        if j > 0.0:
            w = pb.getBaseVelocity(self.robot_id, physicsClientId=c)[1]
            axis = self._axle_axis
            body_rate = w[0] * axis[0] + w[1] * axis[1] + w[2] * axis[2]
            last = self._last_rates
            self._last_rates = (body_rate, rate_left + body_rate, rate_right + body_rate)
            if last is not None:
                inv_dt = 1.0 / self.dt
                body_acc = (body_rate - last[0]) * inv_dt
                left_acc = (rate_left + body_rate - last[1]) * inv_dt
                right_acc = (rate_right + body_rate - last[2]) * inv_dt
                # The kinetic energy ½J(φ̇−θ̇)² has a cross term −Jφ̇θ̇ that link inertias
                # cannot hold: it gives +Jθ̈ on each wheel (as a joint torque) and
                # +Jφ̈ on the body (the joint's reaction is undone by an external torque).
                torque_left += j * body_acc
                torque_right += j * body_acc
                body_torque = j * (left_acc + right_acc + 2.0 * body_acc)
                pb.applyExternalTorque(
                    self.robot_id, -1,
                    (axis[0] * body_torque, axis[1] * body_torque, axis[2] * body_torque),
                    pb.WORLD_FRAME, physicsClientId=c)
        pb.setJointMotorControlArray(self.robot_id, self.wheel_joints, pb.TORQUE_CONTROL,
                                     forces=(torque_left, torque_right), physicsClientId=c)
        pb.stepSimulation(physicsClientId=c)

    # ------------------------------------------------------------- true state
    def body_state(self) -> BodyState:
        """The body's true pose and velocity now (world frame)."""
        c = self.client
        com, quat = pb.getBasePositionAndOrientation(self.robot_id, physicsClientId=c)
        velocity, omega = pb.getBaseVelocity(self.robot_id, physicsClientId=c)
        inertial = np.array(pb.getMatrixFromQuaternion(quat, physicsClientId=c)).reshape(3, 3)
        rotation = inertial @ self._inertial_rotation.T
        com = np.array(com)
        axle = com - rotation @ self._com_local
        omega = np.array(omega)
        velocity = np.array(velocity)
        self._axle_axis = rotation[:, 1].copy()
        return BodyState(axle=axle, rotation=rotation, com=com, velocity=velocity,
                         angular_velocity=omega, com_orientation=quat,
                         axle_velocity=velocity + cross(omega, axle - com))

    def point_velocity(self, state: BodyState, local_point) -> np.ndarray:
        """World velocity (m/s) of a point fixed in the body, given in body coordinates (m)."""
        offset = state.rotation @ np.asarray(local_point) - (state.com - state.axle)
        return state.velocity + cross(state.angular_velocity, offset)

    def forward_axis(self, state: BodyState) -> np.ndarray:
        """Unit vector along the floor, perpendicular to the axle: the robot's heading."""
        normal = self.floor_normal()
        forward = cross(state.rotation[:, 1], normal)
        norm = np.linalg.norm(forward)
        return forward / norm if norm > 1e-9 else state.rotation[:, 0]

    def floor_normal(self) -> np.ndarray:
        s = self.ground.slope
        return np.array([-math.sin(s), 0.0, math.cos(s)])

    def forward_speed(self, state: BodyState) -> float:
        """Axle-centre speed along the heading (m/s)."""
        return float(state.axle_velocity @ self.forward_axis(state))

    def body_on_ground(self) -> bool:
        """True when any part of the body (not a wheel) touches the floor."""
        contacts = pb.getContactPoints(self.robot_id, self.ground_id, -1, -1,
                                       physicsClientId=self.client)
        return len(contacts) > 0

    def gravity_vector(self) -> np.ndarray:
        return np.array([0.0, 0.0, -self.gravity])

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
