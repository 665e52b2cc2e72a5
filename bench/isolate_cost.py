"""What running the controller in a process of its own costs: a 10 s run of
controllers/cascade.py on a demo robot, in-process against `--isolate`, rounds taking
turns; prints the median ratio of the loop's wall time (and of the CPU time of this
process plus its children) and the cost per controller tick.

    python bench/isolate_cost.py [ROBOT] [ROUNDS]

Target (issue 12): isolated at most 1.15 x in-process.
"""

from __future__ import annotations

import os
import statistics
import sys
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from sandbox.robot import load_robot  # noqa: E402
from sandbox.runner import RunSettings  # noqa: E402
from sandbox.session import run_once  # noqa: E402


def _cpu() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def one_run(spec, settings: RunSettings) -> tuple[float, float, int]:
    """Wall s of the loop (as the summary gives it), CPU s, ticks."""
    cpu = _cpu()
    result = run_once(spec, settings, write=False)
    ticks = int(result.trace["t_s"].size)
    wall = result.summary["duration_s"] / result.summary["realtime_factor"]
    return wall, _cpu() - cpu, ticks


def main() -> None:
    robot = sys.argv[1] if len(sys.argv) > 1 else str(ROOT / "robots" / "shelf-runner.yaml")
    rounds = int(sys.argv[2]) if len(sys.argv) > 2 else 7
    spec = load_robot(robot)
    base = RunSettings(controller=str(ROOT / "controllers" / "cascade.py"), duration=10.0)
    one_run(spec, base)  # warm caches, the fork server
    one_run(spec, replace(base, isolate=True))
    walls, cpus, per_tick = [], [], []
    for _ in range(rounds):
        started = time.perf_counter()
        here_wall, here_cpu, ticks = one_run(spec, base)
        box_wall, box_cpu, _ = one_run(spec, replace(base, isolate=True))
        walls.append(box_wall / here_wall)
        cpus.append(box_cpu / here_cpu)
        per_tick.append((box_wall - here_wall) / ticks * 1e6)
        print(f"round: in-process {here_wall:.3f} s, isolated {box_wall:.3f} s "
              f"({time.perf_counter() - started:.1f} s)", flush=True)
    print(f"isolated / in-process, loop wall time: median {statistics.median(walls):.3f} "
          f"(range {min(walls):.3f}-{max(walls):.3f}); CPU time: median "
          f"{statistics.median(cpus):.3f}; cost per tick {statistics.median(per_tick):.0f} us "
          f"(target <= 1.15); os.getloadavg {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
