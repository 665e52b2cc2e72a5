"""One run as the command line asks for it: resolve the test, run, then plots and video.

Kept apart from the runner so the loop stays free of files it does not need,
and apart from the CLI so programs (sweeps, the suite) can call it too.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

from .record import default_run_dir
from .robot import RobotSpec
from .runner import RunResult, RunSettings, run


def run_once(spec: RobotSpec, settings: RunSettings, *, test: str | None = None,
             folder: Path | None = None, default_root: Path = Path("runs"),
             label: str = "controller", duration_given: bool = False, video: bool = False,
             plots: bool = True, write: bool = True, world_factory: Any = None) -> RunResult:
    """Run ``settings`` on ``spec`` (optionally through a test) into a run folder.

    ``write=False`` keeps everything in memory (sweeps): no folder, plots or video;
    the summary (with the test's verdict) and the trace come back in the result.
    """
    timeline = ground = None
    test_name = "none"
    plan = None
    if test is not None:
        from .events import resolve_test

        plan = resolve_test(test, spec)
        test_name = plan.name
        timeline = plan.timeline()
        ground = plan.ground(spec)
        spec = plan.robot(spec)
        if not duration_given:
            settings = replace(settings, duration=plan.duration)
        if plan.tilt and not settings.tilt:
            settings = replace(settings, tilt=plan.tilt)
    settings = replace(settings, test_name=test_name)
    if not write:
        folder = None
    elif folder is None:
        folder = default_run_dir(default_root, spec.name, label, test_name)
    extra = {"test_definition": plan.describe()} if plan is not None else None
    more = {} if world_factory is None else {"world_factory": world_factory}
    result = run(spec, settings, folder=folder, ground=ground, timeline=timeline,
                 extra_record=extra, **more)
    if plan is not None:
        result.summary["test_result"] = plan.judge(result, timeline)
        result.summary["marks"] = [list(m) for m in timeline.marks]
    if add_diagnosis(result, spec, settings, plan) or plan is not None:
        from .record import write_json

        if folder is not None:
            write_json(folder / "summary.json", result.summary)
    if folder is None:
        return result
    if plots and result.trace["t_s"].size > 1:
        from .plots import plot_run

        plot_run(result.trace, folder / "plots.png", title=f"{spec.name} - {label} - {test_name}",
                 marks=timeline.marks if timeline is not None else (),
                 setpoints=timeline.setpoint_changes if timeline is not None else ())
    if video and result.trace["t_s"].size > 1:
        from .render import render_run

        render_run(folder)
    return result


def add_diagnosis(result: RunResult, spec: RobotSpec, settings: RunSettings, plan=None) -> bool:
    """Put ``diagnosis`` in the summary of a run that fell or failed its test; True if added.

    A controller error or an interrupted run gets none: its message says what happened.
    """
    from .diagnose import diagnose, needs_diagnosis

    summary = result.summary
    test_result = summary.get("test_result")
    if not needs_diagnosis(result.status, test_result):
        return False
    flat = plan is None or (not plan.ground_spec.slope and not plan.ground_spec.steps
                            and plan.ground_spec.rough is None)
    summary["diagnosis"] = diagnose(result.trace, summary, spec, marks=summary.get("marks", ()),
                                    test_result=test_result, settings=settings,
                                    flat_floor=flat)
    return True
