"""Benchmark: the nine-test suite without video, as a whole process and in its parts.

(1) whole: ``upright suite robots/desk-mite.yaml controllers/cascade.py`` as a
    process, ROUNDS times: wall time, and CPU time of it and its children
    (os.times of the children, so the workers and trace writers count).
(2) parts, in this process, each test one after another (one worker):
    start-up (importing the CLI, in a fresh interpreter), the process pool's
    start with its first trivial task, and per test the world's build and
    settle, the loop, the report's chart, and the rest (run folder, summary,
    verdict, diagnosis). The sum of the serial parts over the two workers,
    plus start-up, is about what the whole process can reach on 2 idle cores.

Wall times on a shared machine swing: read the medians, and the CPU times,
which neighbours move less. Target (issue 13): whole suite <= 2.5 s on an
idle 2-core machine, plotting at most a quarter of it (plots.png are drawn
only with ``--plots``; the report's SVG charts are counted as "chart").
Usage: python bench/suite_speed.py [ROUNDS]  (default 5)
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

ROBOT = ROOT / "robots" / "desk-mite.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"


def _children_cpu() -> float:
    t = os.times()
    return t.children_user + t.children_system


def whole_suite(rounds: int) -> tuple[list[float], list[float]]:
    """(wall s, CPU s) of each whole-process suite run."""
    walls, cpus = [], []
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(rounds):
            cpu, start = _children_cpu(), time.perf_counter()
            subprocess.run([sys.executable, "-m", "sandbox.cli", "suite", str(ROBOT),
                            str(CONTROLLER), "--out", f"{tmp}/s{i}"], env=env,
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)
            walls.append(time.perf_counter() - start)
            cpus.append(_children_cpu() - cpu)
    return walls, cpus


def start_up(rounds: int) -> float:
    """Median wall s of a fresh interpreter importing the CLI and the suite."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", "import sandbox.cli, sandbox.suite"], env=env,
                       check=True)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _nothing(_index: int) -> int:
    return 0


def pool_start(rounds: int) -> float:
    """Median wall s to start a 2-process pool, run two trivial tasks and close it."""
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        with ProcessPoolExecutor(max_workers=2) as pool:
            list(pool.map(_nothing, range(2)))
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def serial_parts() -> dict[str, float]:
    """Wall s of each part of the nine tests run one after another in this process."""
    from sandbox import suite, world
    from sandbox.events import BUILTIN_NAMES
    from sandbox.robot import load_robot
    from sandbox.runner import RunSettings

    parts = {"world build and settle": 0.0, "loop": 0.0, "chart": 0.0}
    original_init, original_chart = world.World.__init__, suite._chart

    def timed_init(self, *args, **kwargs):
        start = time.perf_counter()
        original_init(self, *args, **kwargs)
        parts["world build and settle"] += time.perf_counter() - start

    def timed_chart(*args, **kwargs):
        start = time.perf_counter()
        try:
            return original_chart(*args, **kwargs)
        finally:
            parts["chart"] += time.perf_counter() - start

    spec = load_robot(ROBOT)
    settings = RunSettings(controller=str(CONTROLLER))
    world.World.__init__, suite._chart = timed_init, timed_chart
    total = 0.0
    try:
        with tempfile.TemporaryDirectory() as tmp:
            for test in BUILTIN_NAMES:
                start = time.perf_counter()
                summary = suite._run_test(spec.to_si_dict(), settings, test, Path(tmp) / test,
                                          False, "cascade")["summary"]
                total += time.perf_counter() - start
                steps = summary["duration_s"] / settings.physics_dt
                parts["loop"] += summary["duration_s"] / summary["realtime_factor"]
                parts.setdefault("physics steps", 0.0)
                parts["physics steps"] += steps
    finally:
        world.World.__init__, suite._chart = original_init, original_chart
    parts["rest (folder, records, verdict)"] = (
        total - parts["world build and settle"] - parts["loop"] - parts["chart"])
    parts["all nine tests, one worker"] = total
    return parts


def main() -> None:
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 5
    walls, cpus = whole_suite(rounds)
    print(f"whole suite as a process, {rounds} runs: wall median {statistics.median(walls):.2f} s "
          f"(min {min(walls):.2f}, max {max(walls):.2f}); CPU median "
          f"{statistics.median(cpus):.2f} s   (target: wall <= 2.5 s on an idle 2-core machine)")
    print(f"  start-up (import sandbox.cli and sandbox.suite, fresh interpreter): "
          f"{start_up(rounds):.2f} s")
    print(f"  process pool start (2 workers, two trivial tasks): {pool_start(rounds):.3f} s")
    parts = serial_parts()
    steps = parts.pop("physics steps")
    for name, seconds in parts.items():
        print(f"  {name:<34}{seconds:6.2f} s")
    print(f"  ({steps:,.0f} physics steps; loop {parts['loop'] / steps * 1e6:.1f} us per step)")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average at the end: {load:.2f} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
