"""Sweep throughput: runs per second with 1 and 2 local workers and a 2-worker Dask cluster.

The same 16 points (shelf-runner, pid_tilt, kp over a grid, 2 s simulated, no
test) go through each executor. Executors are started and warmed up (one run
per worker) before the clock starts, so the figures are steady-state
throughput; start-up times are printed separately. The executors take turns
over several rounds; a ratio is given from the best round of each (other work
on the machine only ever slows a run down) and as the median over rounds of
each round's own ratio. Each round also measures how much two processes of
plain Python work gain over one at that moment: the ceiling for the ratio.
CPU time per run, summed over every process involved (scheduler included), is
printed too: unlike wall-clock rates it hardly depends on other work.

Targets: 2 local workers >= 1.8x one; Dask within 10 % of local processes at
the same worker count.

Reused worlds: one worker (this process) runs the same 16-point grid of the
10 s built-in push test in fresh worlds (a new engine, floor, URDF and settle
per run, as before worlds were kept) and in kept worlds restored between runs,
taking turns per round; the ratio of runs/s and the CPU per run of each.

    python bench/sweep_speed.py [--points 16] [--duration 2] [--repeats 5]
                                [--reuse-only] [--reuse-repeats 3]
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import time
from concurrent.futures import ProcessPoolExecutor
from contextlib import ExitStack
from pathlib import Path
from statistics import median

from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.sweep import PointJob, open_executor
from sandbox.sweep.grid import make_common

ROOT = Path(__file__).resolve().parents[1]


def jobs(count: int, first_index: int = 0) -> list[PointJob]:
    """``count`` points with kp spread over ±20 % of 12 (all of them balance)."""
    return [PointJob(first_index + i, {}, {"kp": 9.6 + 4.8 * i / max(count - 1, 1)}, 0)
            for i in range(count)]


def spin(loops: int) -> int:
    """Pure-Python busy work: what two processes can get out of this machine's cores."""
    total = 0
    for i in range(loops):
        total += i * i
    return total


def bare_scaling(pool, loops: int = 3_000_000) -> float:
    """Throughput of two processes over one on plain Python work, measured now."""
    clock = time.perf_counter()
    spin(loops)
    one = time.perf_counter() - clock
    clock = time.perf_counter()
    list(pool.map(spin, [loops, loops]))
    return 2 * one / (time.perf_counter() - clock)


def cpu_seconds() -> float:
    """CPU time (user + system) of this process and every process it started, so far."""
    import psutil  # comes with dask.distributed

    total = 0.0
    for process in [psutil.Process(), *psutil.Process().children(recursive=True)]:
        try:
            times = process.cpu_times()
        except psutil.Error:  # a process that just ended
            continue
        total += times.user + times.system
    return total


def timed(pool, points: int) -> tuple[float, float]:
    """(runs per second, CPU s per run over all our processes) for ``points`` runs."""
    cpu = cpu_seconds()
    clock = time.perf_counter()
    rows = list(pool.map_unordered(jobs(points)))
    elapsed = time.perf_counter() - clock
    assert len(rows) == points and all(r["status"] == "completed" for _, r in rows)
    return points / elapsed, (cpu_seconds() - cpu) / points


def reuse_rounds(spec, points: int, repeats: int) -> None:
    """One worker: the push grid in fresh worlds against kept, restored ones."""
    from sandbox.sweep.jobs import run_point

    settings = RunSettings(controller=str(ROOT / "controllers" / "pid_tilt.py"))
    common = make_common(spec, settings, ["push"], duration_given=False)
    grid = [PointJob(i, {}, {"kp": 9.6 + 4.8 * i / max(points - 1, 1)}, 0, "push")
            for i in range(points)]
    run_point(common, grid[0])  # warm up: imports, the controller, the first kept world
    rates: dict[bool, list[float]] = {False: [], True: []}
    cpu: dict[bool, list[float]] = {False: [], True: []}
    for _ in range(repeats):
        for reuse in (False, True):
            used, clock = time.process_time(), time.perf_counter()
            rows = [run_point(common, job, reuse_worlds=reuse) for job in grid]
            rates[reuse].append(points / (time.perf_counter() - clock))
            cpu[reuse].append((time.process_time() - used) / points)
            assert all(r["status"] == "completed" for r in rows)
    for reuse, label in ((False, "fresh worlds"), (True, "kept worlds")):
        print(f"push grid, {label:<13} median {median(rates[reuse]):5.2f} runs/s, CPU per run "
              f"median {1000 * median(cpu[reuse]):5.0f} ms")
    within = median(b / a for a, b in zip(rates[False], rates[True]))
    print(f"kept / fresh     runs/s median of rounds {within:5.2f}, CPU per run "
          f"{median(cpu[False]) / median(cpu[True]):5.2f}x less   (target >= 1.5)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=16)
    parser.add_argument("--duration", type=float, default=2.0, help="simulated s per run")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--reuse-only", action="store_true",
                        help="only the fresh against kept worlds comparison")
    parser.add_argument("--reuse-repeats", type=int, default=3)
    parser.add_argument("--robot", type=Path, default=ROOT / "robots" / "shelf-runner.yaml",
                        help="robot file (default: the demo shelf-runner as written)")
    args = parser.parse_args()
    spec = load_robot(args.robot)
    print(f"load average before: {os.getloadavg()[0]:.2f}")
    reuse_rounds(spec, args.points, args.reuse_repeats)
    if args.reuse_only:
        return
    settings = RunSettings(controller=str(ROOT / "controllers" / "pid_tilt.py"),
                           duration=args.duration)
    common = make_common(spec, settings, [None], duration_given=True)
    print(f"{args.points} runs of {args.duration:g} s simulated each, {args.repeats} rounds; "
          f"load average before: {os.getloadavg()[0]:.2f}")
    with ExitStack() as stack:
        spinners = stack.enter_context(
            ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("spawn")))
        list(spinners.map(spin, [1, 1]))
        inline = start(stack, common, "1 worker (this process)", workers=1)
        local = start(stack, common, "2 local processes", workers=2)
        # The Dask scheduler of a local cluster lives in this process: measure the
        # in-process worker before it starts, so its event loop does not slow those runs.
        first = rounds({"1 worker (this process)": inline, "2 local processes": local},
                       spinners, args)
        dask = start(stack, common, "Dask local cluster, 2", workers=2, cluster="local")
        second = rounds({"2 local processes": local, "Dask local cluster, 2": dask},
                        spinners, args)
    report("2 local / 1", first, "2 local processes", "1 worker (this process)", 1.8)
    report("Dask 2 / local 2", second, "Dask local cluster, 2", "2 local processes", 0.9)
    print(f"load average after: {os.getloadavg()[0]:.2f}")


def start(stack: ExitStack, common, label: str, **where):
    """An executor, started and warmed up (one run per worker)."""
    started = time.perf_counter()
    pool = stack.enter_context(open_executor(common, **where))
    list(pool.map_unordered(jobs(pool.workers, first_index=10_000)))
    print(f"{label:<26} start-up and warm-up {time.perf_counter() - started:4.1f} s")
    return pool


def rounds(pools: dict, spinners, args) -> dict[str, list[float]]:
    """Runs per second of each executor over rounds that take turns (so a burst of other
    work on the machine hits all of them), plus the plain-Python ceiling per round."""
    rates: dict[str, list[float]] = {label: [] for label in pools}
    rates["ceiling"] = []
    cpu: dict[str, list[float]] = {label: [] for label in pools}
    for _ in range(args.repeats):
        rates["ceiling"].append(bare_scaling(spinners))
        for label, pool in pools.items():
            rate, cpu_per_run = timed(pool, args.points)
            rates[label].append(rate)
            cpu[label].append(cpu_per_run)
    for label in pools:
        print(f"{label:<26} best {max(rates[label]):6.2f} runs/s, "
              f"median {median(rates[label]):6.2f}; CPU per run (all processes) "
              f"{1000 * min(cpu[label]):5.1f} ms")
    return rates


def report(name: str, rates: dict[str, list[float]], top: str, bottom: str,
           target: float) -> None:
    """The ratio from the best rounds, and the median of the ratios within each round."""
    best = max(rates[top]) / max(rates[bottom])
    within = median(a / b for a, b in zip(rates[top], rates[bottom]))
    print(f"{name:<17} best {best:5.2f}, median of rounds {within:5.2f}   (target >= "
          f"{target:g}; plain Python work in 2 processes / 1 meanwhile: median "
          f"{median(rates['ceiling']):.2f}x)")


if __name__ == "__main__":
    main()
