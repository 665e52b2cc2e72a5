"""The standard battery: every built-in test on one robot and controller, in parallel.

Each test is an ordinary run folder inside the suite folder; ``suite.json``
collects every test's status and figures and ``report.html`` shows them.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import replace
from pathlib import Path
from typing import Any

from .events import BUILTIN_NAMES
from .record import write_json
from .robot import RobotSpec
from .runner import RunSettings


def _run_test(spec_data: dict, settings: RunSettings, test: str, folder: Path,
              video: bool, label: str, plots: bool = False) -> dict[str, Any]:
    """One test in a worker process; returns its summary (JSON-ready)."""
    from .robot import robot_from_dict
    from .session import run_once

    spec = robot_from_dict(spec_data, "<suite robot>")
    result = run_once(spec, settings, test=test, folder=folder, label=label, video=False,
                      plots=plots)
    chart = _chart(spec, test, result)
    if video and result.trace["t_s"].size > 1:
        from .render import render_run

        render_run(folder, workers=1)
    return {"test": test, "folder": folder.name, "status": result.status,
            "message": result.message, "summary": result.summary, "chart": chart}


def _chart(spec: RobotSpec, test: str, result) -> str:
    """The report's small chart of one test, drawn where the trace already is."""
    from .charts import chart_svg
    from .events import builtin_tests
    from .facts import setpoint_changes

    plan = builtin_tests(spec).get(test)
    return chart_svg(result.trace, result.summary.get("marks", ()),
                     setpoint_changes(plan) if plan is not None else (), title=test)


def _worker_start(parent: int) -> None:
    """A suite worker: Ctrl-C is the parent's to handle; leave when the parent dies."""
    import signal

    from .interrupts import end_with_parent
    from .wire import no_spare_core

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    end_with_parent(parent)
    no_spare_core()  # the pool fills the cores: isolated controllers wait on their pipes


def run_suite(spec: RobotSpec, settings: RunSettings, folder: Path, *,
              tests: tuple[str, ...] = BUILTIN_NAMES, workers: int | None = None,
              video: bool = False, label: str = "controller",
              progress: Callable[[str], None] | None = None,
              plots: bool = False) -> dict[str, Any]:
    """Run ``tests`` (built-in names) into ``folder``; write suite.json and report.html.

    ``plots``: also write each test's plots.png (off by default: drawing them cost
    a third of a suite; report.html draws its own small charts from the traces).
    """
    folder.mkdir(parents=True, exist_ok=True)
    workers = max(1, min(workers or os.cpu_count() or 1, len(tests)))
    spec_data = spec.to_si_dict()
    results: dict[str, dict[str, Any]] = {}
    jobs = {test: (spec_data, replace(settings), test, folder / test, video, label, plots)
            for test in tests}
    try:
        _run_tests(spec, tests, jobs, results, workers, progress)
    except KeyboardInterrupt:
        # cut short: what finished is written all the same, the rest named as not run
        done = [t for t in tests if t in results]
        _write_suite(spec, settings, folder, done, results,
                     interrupted=[t for t in tests if t not in results])
        raise
    return _write_suite(spec, settings, folder, tests, results)


def _run_tests(spec: RobotSpec, tests: Sequence[str], jobs: dict, results: dict,
               workers: int, progress: Callable[[str], None] | None) -> None:
    """Run each test's job into ``results`` (one after another, or side by side)."""
    if workers == 1:
        for test, args in jobs.items():
            results[test] = _run_test(*args)
            if progress:
                progress(test)
        return
    pool = ProcessPoolExecutor(max_workers=workers, initializer=_worker_start,
                               initargs=(os.getpid(),))
    try:
        futures = {pool.submit(_run_test, *jobs[test]): test
                   for test in _longest_first(spec, tests)}
        for future in as_completed(futures):
            results[futures[future]] = future.result()
            if progress:
                progress(futures[future])
    except BaseException:
        pool.shutdown(wait=False, cancel_futures=True)
        for process in list((getattr(pool, "_processes", None) or {}).values()):
            process.terminate()  # a test cut mid-run keeps the trace it streamed
        raise
    pool.shutdown()


def _write_suite(spec: RobotSpec, settings: RunSettings, folder: Path, tests: Sequence[str],
                 results: dict, interrupted: Sequence[str] = ()) -> dict[str, Any]:
    """suite.json and report.html for the tests in ``results``."""
    ordered = [results[t] for t in tests]
    suite = {
        "robot": spec.name,
        "controller": settings.controller,
        "seed": settings.seed,
        "passed": all(_passed(r) for r in ordered) and not interrupted,
        "interrupted": list(interrupted),
        "tests": [{"name": r["test"], "status": r["status"], "passed": _passed(r),
                   "folder": r["folder"], "message": r["message"],
                   "checks": r["summary"].get("test_result", {}).get("checks", []),
                   "diagnosis": r["summary"].get("diagnosis", []),
                   "figures": {k: r["summary"].get(k) for k in (
                       "max_abs_pitch_deg", "rms_pitch_deg", "drift_m", "saturation_fraction",
                       "fell_at_s", "duration_s")}}
                  for r in ordered],
    }
    suite.update(_about(spec, settings, tests))
    write_json(folder / "suite.json", suite)
    from .report import write_report

    write_report(folder, suite, charts={r["test"]: r.get("chart", "") for r in ordered})
    return suite


def _longest_first(spec: RobotSpec, tests: tuple[str, ...]) -> list[str]:
    """``tests`` with the longest simulated durations first (ties keep their order), so the
    last test to start is a short one and no worker idles long at the end; the results
    are reported in the order of ``tests`` all the same."""
    from .events import builtin_tests

    plans = builtin_tests(spec)
    return sorted(tests, key=lambda t: -plans[t].duration if t in plans else 0.0)


def _about(spec: RobotSpec, settings: RunSettings, tests: tuple[str, ...]) -> dict[str, Any]:
    """What the report says about the robot, the controller and each test."""
    from .events import builtin_tests
    from .facts import controller_facts, describe_test, imperfections, parts_summary, robot_figures

    plans = builtin_tests(spec)
    return {"robot_figures": robot_figures(spec),
            "imperfections": imperfections(spec), "parts": parts_summary(spec),
            "controller_facts": controller_facts(settings.controller, settings.config),
            "test_facts": {t: describe_test(plans[t]) for t in tests if t in plans}}


def _passed(result: dict[str, Any]) -> bool:
    verdict = result["summary"].get("test_result")
    return bool(verdict and verdict.get("passed")) and result["status"] == "completed"
