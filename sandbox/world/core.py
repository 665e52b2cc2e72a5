"""The world: one robot on the floor in its own engine connection, built and settled.

:class:`World` owns the client, the floor (``world/floor.py``), the contact settings
and the spawned robot; it keeps a settled world for the next run of the same shape
and answers for disturbances. Stepping is ``world/stepping.py`` and reading the true
state ``world/reads.py``, the two halves it is made of.
"""

from __future__ import annotations

import math
import os
import tempfile

import numpy as np

from ..bodystate import Vector, _add
from ..gearbox import Backlash, CouplingGains
from ..ground import Ground
from ..planar import PlanarParams
from ..robot import RobotSpec
from ..urdf import WHEEL_JOINTS, robot_urdf, wheel_of
from .engine import LOAD_FLAGS, connect, pb, quiet
from .floor import build_floor
from .reads import TrueState
from .stepping import Stepping


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


class World(Stepping, TrueState):
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
        """Build the floor (sandbox.world.floor); returns the first id."""
        self.floor_ids = build_floor(self.client, self.ground, self._axle_height)
        return self.floor_ids[0]

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
