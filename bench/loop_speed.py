"""Benchmark: a full upright run against a bare pybullet sense-and-actuate loop.

Both loops step the same generated URDF in the same world (ground, contact
solver, 1 ms step) for the same simulated time, in this process:

(a) bare: every physics step read the wheel joints and the body's pose and
    velocity, apply the wheel torques (and the body torque) upright applied at
    that step in a recorded run, step. pybullet is deterministic, so the robot
    goes through exactly the same motion and contacts as in (b): the cost of
    the physics is the same, and what differs is upright's own work.
    (A bare loop with its own control law moves differently: a stiffer, still
    robot has half the wheel contact points and a cheaper contact solve,
    which measured here made the ratio 0.2 worse for no reason of upright's.)
(c) independent: a bare loop of its own, sharing nothing with upright's runner:
    the same generated URDF (sandbox.urdf), load flags, solver and 1 ms step,
    on a plane; every step it reads the wheel joints and the body, applies the
    torque of its own averaged DC-motor law (τ = kt/R (u·V − ke·ω) per wheel),
    steps; at 200 Hz its own LQR state feedback (scipy's continuous Riccati
    solution on the duty model of sandbox.analysis, Bryson weights) sets u.
    This is the honest baseline of issue 13; the replay (a) stays beside it.
(b) upright: the real runner with a 200 Hz example controller, IMU, motors,
    battery, and the trace written to a folder.

Contact points per step (pybullet's getContactPoints of the robot, averaged
over a run counted apart from the timed ones) are printed for (b) and (c).

Prints the costs per physics step, the ratios (b)/(c) and (b)/(a) (targets: at
most 1.3 and 1.15), on each demo robot (robots/*.yaml),
upright's real-time factor, and the CPU time of the trace-writing process,
which formats the CSV on another core (see DEVELOPERS.md). The headline is
the median over rounds of the per-round ratio: on a shared machine whose
speed swings, that is steadier than a ratio of two minimums.
Usage: python bench/loop_speed.py [SECONDS [ROUNDS [ROBOT.yaml ...]]]
(default 2 s, 11 rounds, every robot in robots/)
"""

from __future__ import annotations

import math
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import scipy.linalg  # noqa: E402

from sandbox.analysis import PlanarParams, default_weights, duty_input_model  # noqa: E402
from sandbox.record import writing_process  # noqa: E402
from sandbox.robot import load_robot  # noqa: E402
from sandbox.runner import RunSettings, run  # noqa: E402
from sandbox.urdf import WHEEL_JOINTS, robot_urdf  # noqa: E402
from sandbox.world import LOAD_FLAGS, World, pb, quiet  # noqa: E402

ROBOTS = sorted((ROOT / "robots").glob("*.yaml"))
CONTROL_PERIOD = 5  # physics steps per control tick of the independent loop (200 Hz)
CONTROLLER = ROOT / "controllers" / "cascade.py"


def record_actuation(spec, seconds: float, folder: Path) -> tuple[list[tuple], float]:
    """The (wheel torques, body torque or None) upright applied at each physics step,
    and the robot's contact points per step of that run."""
    steps: list[tuple] = []
    pending = {"forces": None, "body": None, "recording": False, "world": None}
    contacts = [0]
    original = (pb.setJointMotorControlArray, pb.applyExternalTorque, pb.stepSimulation,
                World.advance)

    def set_torques(body, joints, mode, forces=None, **kwargs):
        pending["forces"] = tuple(forces)
        return original[0](body, joints, mode, forces=forces, **kwargs)

    def body_torque(body, link, torque, frame, **kwargs):
        pending["body"] = tuple(torque)
        return original[1](body, link, torque, frame, **kwargs)

    def step(**kwargs):
        if pending["recording"]:
            steps.append((pending["forces"], pending["body"]))
        pending["body"] = None
        done = original[2](**kwargs)
        world = pending["world"]
        if pending["recording"]:
            contacts[0] += len(pb.getContactPoints(world.robot_id, physicsClientId=world.client))
        return done

    def advance(self, count, drive, take_step=None):
        pending["recording"] = True  # from the first step of the run, not the settling
        pending["world"] = self
        return original[3](self, count, drive, take_step)

    pb.setJointMotorControlArray, pb.applyExternalTorque, pb.stepSimulation = (
        set_torques, body_torque, step)
    World.advance = advance
    try:
        upright_loop(spec, seconds, folder)
    finally:
        (pb.setJointMotorControlArray, pb.applyExternalTorque, pb.stepSimulation,
         World.advance) = original
    return steps, contacts[0] / max(len(steps), 1)


class Independent:
    """The independent bare loop of one robot: its own world, gains and torque law."""

    def __init__(self, spec, dt: float = 1e-3, tilt: float = math.radians(2.0)):
        self.dt = dt
        params = PlanarParams.from_spec(spec)
        A, B = duty_input_model(params)
        Q, R = default_weights()
        P = scipy.linalg.solve_continuous_are(A, B, Q, R)
        self.gains = tuple(np.linalg.solve(R, B.T @ P).ravel().tolist())  # u = -K s
        fig = spec.figures
        self.conductance = fig.torque_constant / fig.resistance  # N·m per V, one motor
        self.emf, self.volts = fig.back_emf_constant, fig.drive_voltage
        self.radius = spec.wheels.radius
        c = self.client = pb.connect(pb.DIRECT)
        pb.setGravity(0, 0, -9.80665, physicsClientId=c)
        pb.setTimeStep(dt, physicsClientId=c)
        with quiet():
            pb.setPhysicsEngineParameter(constraintSolverType=pb.CONSTRAINT_SOLVER_LCP_DANTZIG,
                                         physicsClientId=c)
        plane = pb.createMultiBody(0, pb.createCollisionShape(pb.GEOM_PLANE, physicsClientId=c),
                                   physicsClientId=c)
        pb.changeDynamics(plane, -1, lateralFriction=spec.wheels.friction, physicsClientId=c)
        with tempfile.NamedTemporaryFile("w", suffix=".urdf", delete=False) as handle:
            handle.write(robot_urdf(spec, with_reflected_inertia=True))
        with quiet():
            self.robot = pb.loadURDF(handle.name, [0, 0, self.radius],
                                     pb.getQuaternionFromEuler([0, tilt, 0]), flags=LOAD_FLAGS,
                                     physicsClientId=c)
        os.unlink(handle.name)
        names = [pb.getJointInfo(self.robot, j, physicsClientId=c)[1].decode()
                 for j in range(pb.getNumJoints(self.robot, physicsClientId=c))]
        self.joints = [names.index(n) for n in WHEEL_JOINTS]
        for link in range(-1, len(names)):
            pb.changeDynamics(self.robot, link, linearDamping=0, angularDamping=0,
                              physicsClientId=c)
        for j in range(len(names)):
            pb.setJointMotorControl2(self.robot, j, pb.VELOCITY_CONTROL, force=0,
                                     physicsClientId=c)
        # the base frame is the body's inertial frame: undo its turn to get the link's pitch
        inertial = pb.getDynamicsInfo(self.robot, -1, physicsClientId=c)[4]
        self.link_from_base = pb.invertTransform([0, 0, 0], inertial)[1]

    def run(self, steps: int, count_contacts: bool = False) -> tuple[float, float, float]:
        """(wall seconds per step, contact points per step (0 unless counted), final pitch)."""
        robot, joints, c = self.robot, self.joints, self.client
        k_x, k_v, k_p, k_w = self.gains
        g, emf, volts, r = self.conductance, self.emf, self.volts, self.radius
        duty, contacts, pitch = 0.0, 0, 0.0
        start = time.perf_counter()
        for i in range(steps):
            (left, right) = pb.getJointStates(robot, joints, physicsClientId=c)
            _, quat = pb.getBasePositionAndOrientation(robot, physicsClientId=c)
            _, omega = pb.getBaseVelocity(robot, physicsClientId=c)
            if i % CONTROL_PERIOD == 0:
                link = pb.multiplyTransforms([0, 0, 0], quat, [0, 0, 0], self.link_from_base)[1]
                pitch = pb.getEulerFromQuaternion(link)[1]
                x = r * (0.5 * (left[0] + right[0]) + pitch)
                v = r * (0.5 * (left[1] + right[1]) + omega[1])
                duty = max(-1.0, min(1.0, -(k_x * x + k_v * v + k_p * pitch + k_w * omega[1])))
            forces = (g * (duty * volts - emf * left[1]), g * (duty * volts - emf * right[1]))
            pb.setJointMotorControlArray(robot, joints, pb.TORQUE_CONTROL, forces=forces,
                                         physicsClientId=c)
            pb.stepSimulation(physicsClientId=c)
            if count_contacts:
                contacts += len(pb.getContactPoints(robot, physicsClientId=c))
        elapsed = time.perf_counter() - start
        return elapsed / steps, contacts / steps, pitch

    def close(self) -> None:
        pb.disconnect(physicsClientId=self.client)


def independent_loop(spec, steps: int, count_contacts: bool = False) -> tuple[float, float]:
    """(wall seconds per step, contact points per step) of a fresh independent loop."""
    loop = Independent(spec)
    try:
        cost, contacts, pitch = loop.run(steps, count_contacts)
    finally:
        loop.close()
    if abs(pitch) > math.radians(30):
        raise SystemExit(f"the independent loop's {spec.name} fell: its gains do not balance it")
    return cost, contacts


def bare_loop(spec, actuation: list[tuple], dt: float = 1e-3) -> float:
    """Seconds of wall time per physics step for the bare loop replaying ``actuation``."""
    world = World(spec, physics_dt=dt, tilt=math.radians(2.0))
    robot, joints, client = world.robot_id, world.wheel_joints, world.client
    torque_mode, world_frame = pb.TORQUE_CONTROL, pb.WORLD_FRAME
    start = time.perf_counter()
    for forces, body in actuation:
        pb.getJointStates(robot, joints, physicsClientId=client)
        pb.getBasePositionAndOrientation(robot, physicsClientId=client)
        pb.getBaseVelocity(robot, physicsClientId=client)
        if body is not None:
            pb.applyExternalTorque(robot, -1, body, world_frame, physicsClientId=client)
        pb.setJointMotorControlArray(robot, joints, torque_mode, forces=forces,
                                     physicsClientId=client)
        pb.stepSimulation(physicsClientId=client)
    elapsed = time.perf_counter() - start
    final = world.body_state().pitch
    world.close()
    if abs(final) > math.radians(30):
        raise SystemExit("the bare loop's robot fell: the replay did not follow the run")
    return elapsed / len(actuation)


def upright_loop(spec, seconds: float, folder: Path) -> tuple[float, float]:
    """(seconds of wall time per physics step, real-time factor) of a full run."""
    settings = RunSettings(controller=str(CONTROLLER), duration=seconds, tilt=math.radians(2.0))
    result = run(spec, settings, folder=folder)
    if result.status != "completed":
        raise SystemExit(f"the benchmark run did not complete: {result.message}")
    steps = round(seconds / settings.physics_dt)
    rtf = result.summary["realtime_factor"]
    return seconds / rtf / steps, rtf


def writer_cpu_seconds() -> float:
    """CPU time (s) used so far by the trace-writing process (Linux /proc; NaN elsewhere)."""
    try:
        fields = Path(f"/proc/{writing_process().process.pid}/stat").read_text().split()
        return (int(fields[13]) + int(fields[14])) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return math.nan


def bench_robot(spec, label: str, seconds: float, rounds: int, tmp: Path) -> dict:
    """Every figure of one robot: costs per step, ratios, contacts, real-time factor."""
    actuation, upright_contacts = record_actuation(spec, seconds, tmp / f"{spec.name}-recorded")
    steps = len(actuation)
    _, independent_contacts = independent_loop(spec, steps, count_contacts=True)
    replay, independent, full, rtf = [], [], [], []
    writer_cpu = 0.0
    # Back to back in each round, so a machine that speeds up or slows down
    # (shared cores, frequency scaling) moves all figures alike; many short
    # rounds rather than a few long ones, for the same reason.
    for i in range(rounds):
        independent.append(independent_loop(spec, steps)[0])
        replay.append(bare_loop(spec, actuation))
        writer_before = writer_cpu_seconds()
        cost, factor = upright_loop(spec, seconds, tmp / f"{spec.name}-run{i}")
        writer_cpu += writer_cpu_seconds() - writer_before
        full.append(cost)
        rtf.append(factor)
    return {"robot": label, "replay": replay, "independent": independent, "full": full,
            "rtf": max(rtf), "writer_us": writer_cpu / (steps * rounds) * 1e6,
            "upright_contacts": upright_contacts, "independent_contacts": independent_contacts}


def _median_ratio(top: list[float], bottom: list[float]) -> tuple[float, float, float]:
    """Median and middle half of the per-round ratios top/bottom."""
    ratios = sorted(t / b for t, b in zip(top, bottom))
    n = len(ratios)
    return ratios[n // 2], ratios[n // 4], ratios[(3 * n) // 4]


def _robots(paths: list[Path]):
    """Each robot file as written (the demo robots list gearbox play, static friction,
    IMU filters...) and, for a demo robot, with ideal parts: the loop's own cost without
    the Python work each imperfection adds every physics step."""
    sys.path.insert(0, str(ROOT / "tests"))
    from ideal_parts import ideal_robot

    for path in paths:
        spec = load_robot(path)
        yield spec.name, spec
        if path.parent == ROOT / "robots":
            yield f"{spec.name} (ideal)", ideal_robot(path.stem)


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 2.0
    rounds = int(sys.argv[2]) if len(sys.argv) > 2 else 11
    robots = [Path(a) for a in sys.argv[3:]] or ROBOTS
    print(f"{rounds} rounds of {seconds:g} s simulated per robot, 1 ms physics step, "
          "200 Hz controllers; median of per-round ratios (middle half)")
    print(f"{'robot':<22}{'upright us':>11}{'indep us':>10}{'replay us':>10}"
          f"{'up/indep':>18}{'up/replay':>18}{'contacts up/indep':>19}{'rtf':>7}")
    with tempfile.TemporaryDirectory() as tmp:
        for label, spec in _robots(robots):
            r = bench_robot(spec, label, seconds, rounds, Path(tmp))
            mi, qi, ti = _median_ratio(r["full"], r["independent"])
            mr, qr, tr = _median_ratio(r["full"], r["replay"])
            print(f"{r['robot']:<22}{min(r['full']) * 1e6:>11.1f}"
                  f"{min(r['independent']) * 1e6:>10.1f}{min(r['replay']) * 1e6:>10.1f}"
                  f"{mi:>8.2f} ({qi:.2f}-{ti:.2f}){mr:>8.2f} ({qr:.2f}-{tr:.2f})"
                  f"{r['upright_contacts']:>11.2f} / {r['independent_contacts']:.2f}"
                  f"{r['rtf']:>6.1f}x")
            print(f"{'':<22}trace-writing process: {r['writer_us']:.1f} us of CPU per step, "
                  "on another core")
    print("targets: upright/independent <= 1.3, upright/replay <= 1.15 (costs: best round)")


if __name__ == "__main__":
    main()
