"""Benchmark: a full upright run against a bare pybullet sense-and-actuate loop.

Both loops step the same generated URDF in the same world (ground, contact
solver, 1 ms step) for the same simulated time, in this process:

(a) bare: every physics step read the wheel joints and the body's pose and
    velocity, set the wheel torques from a PD law on the pitch, step: the
    least a hand-written pybullet balancing loop does. It keeps the robot
    up, so both loops step the same contacts.
(b) upright: the real runner with a 200 Hz example controller, IMU, motors,
    battery, and the trace written to a folder.

Prints both costs per physics step, the ratio (b)/(a) (target: at most 1.3)
and upright's real-time factor. Usage: python bench/loop_speed.py [SECONDS [ROUNDS]]
"""

from __future__ import annotations

import math
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from sandbox.robot import load_robot  # noqa: E402
from sandbox.runner import RunSettings, run  # noqa: E402
from sandbox.world import World, pb  # noqa: E402

ROBOT = ROOT / "robots" / "shelf-runner.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"


def bare_loop(spec, seconds: float, dt: float = 1e-3) -> float:
    """Seconds of wall time per physics step for the bare balancing loop."""
    world = World(spec, physics_dt=dt, tilt=math.radians(2.0))
    robot, joints, client = world.robot_id, world.wheel_joints, world.client
    steps = int(round(seconds / dt))
    stall = spec.figures.available_stall_torque
    radius = spec.wheels.radius
    kp, kd, kv = 20.0 * stall, 2.0 * stall, 0.5 * stall * radius  # per rad, rad/s, wheel rad/s
    start = time.perf_counter()
    for _ in range(steps):
        left, right = pb.getJointStates(robot, joints, physicsClientId=client)
        _, (qx, qy, qz, qw) = pb.getBasePositionAndOrientation(robot, physicsClientId=client)
        _, omega = pb.getBaseVelocity(robot, physicsClientId=client)
        pitch = math.asin(max(-1.0, min(1.0, 2.0 * (qw * qy - qz * qx))))
        torque = kp * pitch + kd * omega[1] + kv * (left[1] + right[1]) * 0.5
        torque = max(-stall, min(stall, torque))
        pb.setJointMotorControlArray(robot, joints, pb.TORQUE_CONTROL,
                                     forces=(torque, torque), physicsClientId=client)
        pb.stepSimulation(physicsClientId=client)
    elapsed = time.perf_counter() - start
    final = world.body_state().pitch
    world.close()
    if abs(final) > math.radians(30):
        raise SystemExit("the bare loop's robot fell: the comparison would not be fair")
    return elapsed / steps


def upright_loop(spec, seconds: float, folder: Path) -> tuple[float, float]:
    """(seconds of wall time per physics step, real-time factor) of a full run."""
    settings = RunSettings(controller=str(CONTROLLER), duration=seconds, tilt=math.radians(2.0))
    result = run(spec, settings, folder=folder)
    if result.status != "completed":
        raise SystemExit(f"the benchmark run did not complete: {result.message}")
    steps = round(seconds / settings.physics_dt)
    rtf = result.summary["realtime_factor"]
    return seconds / rtf / steps, rtf


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 2.0
    rounds = int(sys.argv[2]) if len(sys.argv) > 2 else 15
    spec = load_robot(ROBOT)
    bare_loop(spec, 1.0)  # warm up imports and caches
    bare, full, rtf = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        # Back to back in each round, so a machine that speeds up or slows down
        # (shared cores, frequency scaling) moves both figures alike.
        for i in range(rounds):
            bare.append(bare_loop(spec, seconds))
            cost, factor = upright_loop(spec, seconds, Path(tmp) / f"run{i}")
            full.append(cost)
            rtf.append(factor)
    ratios = sorted(f / b for f, b in zip(full, bare))
    median = ratios[len(ratios) // 2]
    b, f = min(bare), min(full)
    print(f"{rounds} rounds of {seconds:g} s simulated, 1 ms physics step, 200 Hz controller")
    print(f"bare pybullet sense-and-actuate, best: {b * 1e6:.1f} us per step ({1 / b:,.0f}/s)")
    print(f"upright full run, best:                {f * 1e6:.1f} us per step ({1 / f:,.0f}/s)")
    print(f"ratio upright / bare: median of rounds {median:.2f}, of the bests {f / b:.2f}"
          "  (target <= 1.3)")
    print(f"upright real-time factor: {max(rtf):.1f}x")


if __name__ == "__main__":
    main()
