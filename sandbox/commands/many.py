"""`upright sweep`, `tune` and `margins`: many runs (locally or on Dask) with a progress line."""

from __future__ import annotations

import json
import sys
from dataclasses import replace
from pathlib import Path
from typing import Annotated

import typer

from ..tables import table
from .common import (
    EXIT_FELL,
    EXIT_INTERRUPTED,
    EXIT_OK,
    BadInput,
    ConfigOption,
    ControllerArg,
    IsolateOption,
    RateOption,
    RobotArg,
    SeedOption,
    SetOption,
    WorkersOption,
    _check_workers,
    _controller_label,
    _fail,
    _robot_and_settings,
    _stderr_is_terminal,
    handles_errors,
)


class _ProgressLine:
    """A one-line progress bar on stderr: done/total, runs per second, time left."""

    def __init__(self, label: str):
        from ..sweep import ProgressClock

        self.label = label
        self.clock = ProgressClock()
        self.shown = False

    def __call__(self, done: int, total: int) -> None:
        rate, left = self.clock.update(done, total)
        if not _stderr_is_terminal():  # no carriage-return lines in logs and pipes
            return
        width = 24
        filled = int(width * done / total) if total else width
        bar = "#" * filled + "-" * (width - filled)
        speed = "" if rate is None else f", {rate:.2f} runs/s"
        eta = "" if left is None else f", {left:.0f} s left"
        sys.stderr.write(f"\r{self.label} [{bar}] {done}/{total}{speed}{eta}   ")
        sys.stderr.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            sys.stderr.write("\n")


ClusterOption = Annotated[str | None, typer.Option(
    "--cluster", help="Run on a Dask scheduler at this address, or 'local' to start a "
    "local Dask cluster.")]


@handles_errors
def sweep(
    robot: RobotArg,
    controller: ControllerArg,
    vary: Annotated[list[str] | None, typer.Option(
        "--vary", help="KEY=A,B,C (these values) or KEY=START..STOP,n=N (N values, both ends "
        "included); any key --set takes, SI numbers or unit strings as --set reads them "
        "(wheels.radius=30mm,35mm). Several make a grid.")] = None,
    samples: Annotated[int, typer.Option(
        "--samples", help="Monte Carlo: robots drawn within the --spread tolerances.")] = 0,
    spread: Annotated[list[str] | None, typer.Option(
        "--spread", help="KEY=±X% (relative) or KEY=±X (absolute: SI, or a unit string "
        "such as ±2mm), drawn uniformly.")] = None,
    test: Annotated[str | None, typer.Option(
        "--test", help="A built-in test name or a test file (YAML).")] = None,
    duration: Annotated[float | None, typer.Option(
        "--duration", help="Simulated seconds per run (default 10, or the test's own).")] = None,
    tilt: Annotated[float, typer.Option("--tilt", help="Starting tilt, degrees.")] = 0.0,
    figure: Annotated[str, typer.Option(
        "--figure", help="Figure shown in the table and heatmap.")] = "max_abs_pitch_deg",
    seed: SeedOption = 0,
    set_: SetOption = None,
    config_file: ConfigOption = None,
    rate: RateOption = None,
    workers: WorkersOption = None,
    isolate: IsolateOption = True,
    cluster: ClusterOption = None,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Sweep folder; rerunning with the same folder skips finished points.")
    ] = None,
    yes: Annotated[bool, typer.Option(
        "--yes", help="Run a sweep of more than 2,000 runs without asking.")] = False,
) -> None:
    """Many runs over a grid of values and/or robots drawn within part tolerances."""
    from .. import bounds
    from ..sweep import sweep_command

    _check_workers(workers)
    bounds.SAMPLES.check(samples)

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, tilt,
                                         seed, rate)
    settings = replace(settings, isolate=isolate)
    if not vary and not samples:
        raise BadInput("give at least one --vary KEY=A,B,C or KEY=START..STOP,n=N, or "
                       "--samples N with --spread")
    _show_axes(vary or [])
    progress = _ProgressLine("runs")
    try:
        report = sweep_command(spec, settings, vary=vary or [], spread=spread or [],
                               samples=samples, test=test, duration_given=duration is not None,
                               workers=workers, cluster=cluster, out=out, figure=figure,
                               progress=progress, confirmed=yes)
    finally:
        progress.close()
    typer.echo(report.text())
    raise typer.Exit(EXIT_INTERRUPTED if report.interrupted else EXIT_OK)


def _show_axes(vary: list[str]) -> None:
    """Print each --vary axis's values (and any deprecation note) before the runs start."""
    from ..sweep.plan import axis_text, parse_vary, vary_form

    for text in vary:
        note = vary_form(text).note
        if note:
            typer.echo(f"note: {note}", err=True)
        typer.echo(f"axis {axis_text(parse_vary(text))}")


@handles_errors
def tune(
    robot: RobotArg,
    controller: ControllerArg,
    gains: Annotated[str, typer.Option(
        "--gains", help="Config keys to tune, comma-separated: config.kp,config.kd")],
    test: Annotated[list[str] | None, typer.Option(
        "--test", help="Test(s) the cost is measured on (default: push).")] = None,
    start: Annotated[list[str] | None, typer.Option(
        "--start", help="Starting value, e.g. --start config.kp=4 (default: config or the "
        "controller's own).")] = None,
    method: Annotated[str, typer.Option(
        "--method", help="nelder-mead or powell (scipy.optimize).")] = "nelder-mead",
    max_evaluations: Annotated[int, typer.Option(
        "--max-evaluations", help="At most this many gain sets are tried.")] = 40,
    duration: Annotated[float | None, typer.Option(
        "--duration", help="Simulated seconds per run (default: the test's own).")] = None,
    seed: SeedOption = 0,
    set_: SetOption = None,
    config_file: ConfigOption = None,
    rate: RateOption = None,
    workers: WorkersOption = None,
    isolate: IsolateOption = True,
    cluster: ClusterOption = None,
    out: Annotated[Path | None, typer.Option("--out", help="Tuning folder.")] = None,
) -> None:
    """Search controller gains that keep the robot up and steady through the tests."""
    from .. import bounds
    from ..sweep import tune_command

    _check_workers(workers)
    bounds.EVALUATIONS.check(max_evaluations)

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, 0.0,
                                         seed, rate)
    settings = replace(settings, isolate=isolate)
    keys = [k.strip() for k in gains.split(",") if k.strip()]
    progress = _ProgressLine("evaluations")
    try:
        result = tune_command(spec, settings, gains=keys, tests=tuple(test or ["push"]),
                              start=start or [], method=method, max_evaluations=max_evaluations,
                              duration_given=duration is not None, workers=workers,
                              cluster=cluster, out=out, progress=progress)
    except KeyboardInterrupt:
        progress.close()
        _fail("interrupted before the first evaluation finished", EXIT_INTERRUPTED)
    progress.close()
    typer.echo(result.text())
    if result.stopped == "interrupted":
        raise typer.Exit(EXIT_INTERRUPTED)
    raise typer.Exit(EXIT_OK if result.after.passed else EXIT_FELL)


@handles_errors
def margins(
    robot: RobotArg,
    controller: ControllerArg,
    test: Annotated[str, typer.Option(
        "--test", help="The test that must still pass (built-in name or test file).")] = "push",
    stress: Annotated[list[str] | None, typer.Option(
        "--stress", help="Only these stresses (repeat): delay, strength, weak_side, backlash, "
        "imu_bandwidth, payload, jitter.")] = None,
    latency: Annotated[float, typer.Option(
        "--latency", help="Delay from the controller's output to the bridge, ms.")] = 0.0,
    seed: SeedOption = 0,
    set_: SetOption = None,
    config_file: ConfigOption = None,
    rate: RateOption = None,
    workers: WorkersOption = None,
    isolate: IsolateOption = True,
    cluster: ClusterOption = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON for programs.")] = False,
) -> None:
    """How much of each imperfection the controller survives: bisection on full runs."""
    from .. import bounds
    from ..margins import STRESS_NAMES, find_margins, margins_table

    _check_workers(workers)
    bounds.LATENCY.check(latency)

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, None, 0.0,
                                         seed, rate)
    settings = replace(settings, latency=latency / 1000.0, isolate=isolate)
    progress = _ProgressLine("runs")
    try:
        result = find_margins(spec, settings, test=test, stresses=stress or STRESS_NAMES,
                              workers=workers, cluster=cluster, progress=progress)
    finally:
        progress.close()
    if as_json:
        typer.echo(json.dumps(result.json(), indent=2))
    elif not result.baseline_passed:
        typer.echo(f"{spec.name} with {_controller_label(controller)} already fails "
                   f"'{test}' without any stress ({result.baseline_message}): run "
                   f"`upright run ... --test {test}` to see why, and fix that first.")
    else:
        typer.echo(f"margins of {_controller_label(controller)} on {spec.name}, test '{test}'")
        typer.echo(table(margins_table(result),
                         ["stress", "robot's own", "survives up to", "resolution", "runs"]))
        for name, why in result.skipped.items():
            typer.echo(f"{name}: skipped ({why})")
        typer.echo("A margin belongs to this controller on this robot file, found on full runs "
                   "with one seed. The real robot has imperfections no file lists: keep some "
                   "of each margin in hand.")
    raise typer.Exit(EXIT_OK if result.baseline_passed else EXIT_FELL)
