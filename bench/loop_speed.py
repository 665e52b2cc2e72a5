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
(b) upright: the real runner with a 200 Hz example controller, IMU, motors,
    battery, and the trace written to a folder.

Prints both costs per physics step, the ratio (b)/(a) (target: at most 1.3),
upright's real-time factor, and the CPU time of the trace-writing process,
which formats the CSV on another core (see DEVELOPERS.md). The headline is
the median over rounds of the per-round ratio: on a shared machine whose
speed swings, that is steadier than a ratio of two minimums.
Usage: python bench/loop_speed.py [SECONDS [ROUNDS]]  (default 2 s, 21 rounds)
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

from sandbox.record import writing_process  # noqa: E402
from sandbox.robot import load_robot  # noqa: E402
from sandbox.runner import RunSettings, run  # noqa: E402
from sandbox.world import World, pb  # noqa: E402

ROBOT = ROOT / "robots" / "shelf-runner.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"


def record_actuation(spec, seconds: float, folder: Path) -> list[tuple]:
    """The (wheel torques, body torque or None) upright applied at each physics step."""
    steps: list[tuple] = []
    pending = {"forces": None, "body": None, "recording": False}
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
        return original[2](**kwargs)

    def advance(self, count, drive):
        pending["recording"] = True  # from the first step of the run, not the settling
        return original[3](self, count, drive)

    pb.setJointMotorControlArray, pb.applyExternalTorque, pb.stepSimulation = (
        set_torques, body_torque, step)
    World.advance = advance
    try:
        upright_loop(spec, seconds, folder)
    finally:
        (pb.setJointMotorControlArray, pb.applyExternalTorque, pb.stepSimulation,
         World.advance) = original
    return steps


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


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 2.0
    rounds = int(sys.argv[2]) if len(sys.argv) > 2 else 21
    spec = load_robot(ROBOT)
    bare, full, rtf = [], [], []
    writer_cpu = 0.0
    with tempfile.TemporaryDirectory() as tmp:
        actuation = record_actuation(spec, seconds, Path(tmp) / "recorded")
        # Back to back in each round, so a machine that speeds up or slows down
        # (shared cores, frequency scaling) moves both figures alike; many short
        # rounds rather than a few long ones, for the same reason.
        for i in range(rounds):
            bare.append(bare_loop(spec, actuation))
            writer_before = writer_cpu_seconds()
            cost, factor = upright_loop(spec, seconds, Path(tmp) / f"run{i}")
            writer_cpu += writer_cpu_seconds() - writer_before
            full.append(cost)
            rtf.append(factor)
    ratios = sorted(f / b for f, b in zip(full, bare))
    median = ratios[len(ratios) // 2]
    quarter, three_quarters = ratios[len(ratios) // 4], ratios[(3 * len(ratios)) // 4]
    b, f = min(bare), min(full)
    steps = len(actuation) * rounds
    print(f"{rounds} rounds of {seconds:g} s simulated, 1 ms physics step, 200 Hz controller")
    print(f"bare pybullet sense-and-actuate, best: {b * 1e6:.1f} us per step ({1 / b:,.0f}/s)")
    print(f"upright full run, best:                {f * 1e6:.1f} us per step ({1 / f:,.0f}/s)")
    print(f"ratio upright / bare: median of rounds {median:.2f} (middle half {quarter:.2f}-"
          f"{three_quarters:.2f}), of the bests {f / b:.2f}  (target <= 1.3)")
    print(f"upright real-time factor: {max(rtf):.1f}x")
    print(f"trace-writing process: {writer_cpu / steps * 1e6:.1f} us of CPU per step, "
          "on another core")


if __name__ == "__main__":
    main()
