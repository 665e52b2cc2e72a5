"""What running the controller in a process of its own costs: a 10 s run of
controllers/cascade.py on a demo robot, in-process against `--isolate`, rounds taking
turns; prints the median ratio of the loop's wall time (and of the CPU time of this
process plus its children) and the cost per controller tick.

    python bench/isolate_cost.py [ROBOT] [ROUNDS]

Two ways: with the shared request page (a single run on a machine with a core to spare)
and through the pipe only (as in pool, suite and Dask workers). CPU time counts the
controller's process too (read from /proc: it is the fork server's child).

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

from sandbox import wire  # noqa: E402
from sandbox.isolate import IsolatedController  # noqa: E402
from sandbox.robot import load_robot  # noqa: E402
from sandbox.runner import RunSettings  # noqa: E402
from sandbox.session import run_once  # noqa: E402

_CONTROLLER_CPU = [0.0]  # s used by isolated controllers' processes (children of the
# fork server, not of this process: read from /proc before each one ends)
_close = IsolatedController.close


def _close_counting(self) -> None:
    try:
        fields = Path(f"/proc/{self.process.pid}/stat").read_text().rsplit(")", 1)[1].split()
        _CONTROLLER_CPU[0] += (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError, TypeError):
        pass
    _close(self)


IsolatedController.close = _close_counting


def _cpu() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system + _CONTROLLER_CPU[0]


def one_run(spec, settings: RunSettings) -> tuple[float, float, float, int]:
    """Wall s of the whole run (world build, controller start, loop, summary), wall s of
    the loop alone (as the summary gives it), CPU s, ticks."""
    cpu = _cpu()
    started = time.perf_counter()
    result = run_once(spec, settings, write=False)
    whole = time.perf_counter() - started
    ticks = int(result.trace["t_s"].size)
    wall = result.summary["duration_s"] / result.summary["realtime_factor"]
    return whole, wall, _cpu() - cpu, ticks


def main() -> None:
    robot = sys.argv[1] if len(sys.argv) > 1 else str(ROOT / "robots" / "shelf-runner.yaml")
    rounds = int(sys.argv[2]) if len(sys.argv) > 2 else 7
    spec = load_robot(robot)
    base = RunSettings(controller=str(ROOT / "controllers" / "cascade.py"), duration=10.0)
    one_run(spec, base)  # warm caches, the fork server
    one_run(spec, replace(base, isolate=True))
    for mode in ("shared page", "pipe only"):
        # "pipe only" is what pool, suite and Dask workers use (sandbox.wire)
        wire._pool_worker = mode == "pipe only"
        wholes, walls, cpus, per_tick = [], [], [], []
        for _ in range(rounds):
            here_whole, here_wall, here_cpu, ticks = one_run(spec, base)
            box_whole, box_wall, box_cpu, _ = one_run(spec, replace(base, isolate=True))
            wholes.append(box_whole / here_whole)
            walls.append(box_wall / here_wall)
            cpus.append(box_cpu / here_cpu)
            per_tick.append((box_whole - here_whole) / ticks * 1e6)
            print(f"round ({mode}): whole run in-process {here_whole:.3f} s, isolated "
                  f"{box_whole:.3f} s; loop {here_wall:.3f} s, {box_wall:.3f} s", flush=True)
        print(f"{mode}: isolated / in-process, whole run: median "
              f"{statistics.median(wholes):.3f} (range {min(wholes):.3f}-{max(wholes):.3f}); "
              f"loop alone {statistics.median(walls):.3f}; CPU time "
              f"{statistics.median(cpus):.3f}; cost per tick "
              f"{statistics.median(per_tick):.0f} us (target <= 1.15); os.getloadavg "
              f"{os.getloadavg()[0]:.1f}", flush=True)

if __name__ == "__main__":
    main()
