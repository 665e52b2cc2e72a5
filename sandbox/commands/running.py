"""`upright run`, `suite`, `render` and `demo`: runs of one controller on one robot, the run
table, exit codes from a run's outcome, and video with a progress bar."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path
from typing import Annotated

import typer

from ..tables import table
from .common import (
    CAMERA_HELP,
    EXIT_CONTROLLER,
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
    _progress_bar,
    _robot_and_settings,
    _settings_from,
    handles_errors,
)


def _print_run(result, folder: Path | None, parts: str | None = None) -> None:
    s = result.summary
    for item in s.get("unread_config_keys") or ():
        typer.echo(f"warning: {item['text']}", err=True)
    deg = lambda v: "-" if v is None else f"{v:.2f} deg"  # noqa: E731
    rows = [
        ("status", s["status"]),
        ("simulated", f"{s['duration_s']:.2f} s"),
        ("fell at", "-" if s["fell_at_s"] is None else f"{s['fell_at_s']:.3f} s"),
        ("max |tilt|", deg(s["max_abs_pitch_deg"])),
        ("rms tilt", deg(s["rms_pitch_deg"])),
        ("drift", "-" if s["drift_m"] is None else f"{s['drift_m']:+.3f} m"),
        ("duty saturated", "-" if s["saturation_fraction"] is None
         else f"{100 * s['saturation_fraction']:.1f} % of ticks"),
        ("real-time factor", "-" if not s["realtime_factor"] else f"{s['realtime_factor']:.1f}x"),
    ]
    rows.insert(-1, ("duties clipped", _clipped_text(s.get("clipped_duties"),
                                                     result.trace["t_s"].size)))
    if parts:
        rows.insert(1, ("parts", parts))
    test = s.get("test_result")
    if test:
        rows.append(("test", f"{test['name']}: {'PASSED' if test['passed'] else 'FAILED'}"))
        for check in test["checks"]:
            mark = "ok  " if check["passed"] else "FAIL"
            rows.append(
                ("", f"{mark} {check['label']}: {check['measured']} (limit {check['limit']})"))
    typer.echo(table(rows))
    if result.message and result.status != "completed":
        typer.echo(result.message)
    _print_diagnosis(s.get("diagnosis"))
    if folder is not None:
        files = [name for name in ("trace.csv", "summary.json", "run.yaml", "robot.yaml",
                                   "robot.urdf", "plots.png", "video.mp4",
                                   "controller_error.txt")
                 if (folder / name).is_file()]
        typer.echo(f"results in {folder}/ ({', '.join(files)})")


def _print_diagnosis(findings: list[dict] | None) -> None:
    """The findings of a run that fell or failed, most likely cause first."""
    if not findings:
        return
    typer.echo("why (most likely first; figures in summary.json under diagnosis):")
    for number, item in enumerate(findings, 1):
        typer.echo(f"  {number}. [{item['code']}] {item['text']}")


def _clipped_text(clipped: int | None, ticks: int) -> str:
    """How many ticks' duties came back outside [-1, 1] and were clipped."""
    if clipped is None:
        return "-"
    if not clipped:
        return "none"
    share = f" ({100 * clipped / ticks:.1f} %)" if ticks else ""
    return f"{clipped} of {ticks} ticks{share}: the controller asked for more than full duty"


def _exit_code(result) -> int:
    status = result.status
    if status == "controller_error":
        return EXIT_CONTROLLER
    if status == "interrupted":
        return EXIT_INTERRUPTED
    test = result.summary.get("test_result")
    if status == "fell" or (test is not None and not test["passed"]):
        return EXIT_FELL
    return EXIT_OK


@handles_errors
def run(
    robot: RobotArg,
    controller: ControllerArg,
    test: Annotated[str | None, typer.Option(
        "--test", help="A built-in test name or a test file (YAML).")] = None,
    duration: Annotated[float | None, typer.Option(
        "--duration", help="Simulated seconds (default 10, or the test's own).")] = None,
    tilt: Annotated[float, typer.Option(
        "--tilt", help="Starting tilt, degrees (+ forward).")] = 0.0,
    seed: SeedOption = 0,
    set_: SetOption = None,
    config_file: ConfigOption = None,
    rate: RateOption = None,
    latency: Annotated[float, typer.Option(
        "--latency", help="Delay from the controller's output to the bridge, ms.")] = 0.0,
    physics_step: Annotated[float, typer.Option(
        "--physics-step", help="Physics step, ms; must divide the controller period.")] = 1.0,
    fall_limit: Annotated[float, typer.Option(
        "--fall-limit", help="Tilt at which the robot counts as fallen, degrees.")] = 60.0,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Run folder (default runs/<robot>-<controller>-<test>-<time>/).")] = None,
    video: Annotated[bool, typer.Option("--video", help="Also render video.mp4.")] = False,
    isolate: Annotated[bool, typer.Option(
        "--isolate", help="Run the controller in a process of its own: it sees only the "
        "readings, returns only the duties, and is stopped after --step-timeout.")] = False,
    step_timeout: Annotated[float, typer.Option(
        "--step-timeout", help="With --isolate: wall-clock seconds a controller call may "
        "take (0.001 to 60).")] = 1.0,
    plots: Annotated[bool, typer.Option("--plots/--no-plots", help="Write plots.png.")] = True,
    camera: Annotated[str, typer.Option("--camera", help=CAMERA_HELP)] = "side",
    watch: Annotated[bool, typer.Option(
        "--watch", help="Show the run live in the engine's own window, in real time "
        "(needs a display).")] = False,
    slow_motion: Annotated[float, typer.Option(
        "--slow-motion", help="With --watch: wall-clock seconds per simulated second "
        "(1 to 100).")] = 1.0,
) -> None:
    """One headless run of a controller on a robot; writes a run folder."""
    from ..session import run_once

    _check_camera(camera)
    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, tilt,
                                         seed, rate)
    from .. import bounds

    bounds.STEP_TIMEOUT.check(step_timeout)
    bounds.LATENCY.check(latency)
    bounds.FALL_LIMIT.check(fall_limit)
    bounds.check_run(settings.duration, physics_step)
    settings = replace(settings, physics_dt=physics_step / 1000.0, latency=latency / 1000.0,
                       fall_limit=math.radians(fall_limit), isolate=isolate,
                       step_timeout=step_timeout)
    if settings.duration <= 0:
        raise BadInput(f"--duration must be positive, got {settings.duration:g}")
    folder = out
    result = run_once(spec, settings, test=test, folder=folder, default_root=Path("runs"),
                      label=_controller_label(controller), duration_given=duration is not None,
                      video=False, plots=plots, world_factory=_watch_factory(watch, slow_motion))
    if video and result.trace["t_s"].size > 1:
        _render_with_bar(result.folder, 30.0, (640, 480), None, camera)
    from ..facts import parts_summary

    _print_run(result, result.folder, parts_summary(spec))
    raise typer.Exit(_exit_code(result))


def _watch_factory(watch: bool, slow_motion: float):
    """The world factory for --watch (None without it); no display: one line, exit 2."""
    if not (math.isfinite(slow_motion) and 1.0 <= slow_motion <= 100.0):
        raise BadInput(f"--slow-motion must be from 1 to 100, got {slow_motion:g}")
    if not watch:
        return None
    from ..watch import display_problem, watched_world_factory

    problem = display_problem()
    if problem is not None:
        raise BadInput(problem)
    return watched_world_factory(slow_motion)


def _check_camera(camera: str) -> None:
    if camera == "side":  # the default, one of CAMERAS: no need to import the renderer (15 ms)
        return
    from ..render.frames import CAMERAS

    if camera not in CAMERAS:
        raise BadInput(f"--camera {camera!r}: choose one of {', '.join(CAMERAS)}")


@handles_errors
def suite(
    robot: RobotArg,
    controller: ControllerArg,
    seed: SeedOption = 0,
    set_: SetOption = None,
    config_file: ConfigOption = None,
    rate: RateOption = None,
    workers: WorkersOption = None,
    isolate: IsolateOption = True,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Suite folder (default runs/<robot>-<controller>-suite-<time>/).")] = None,
    video: Annotated[bool, typer.Option("--video", help="Render a video of every test.")] = False,
    plots: Annotated[bool, typer.Option(
        "--plots", help="Also write each test's plots.png (report.html has its own charts).")
    ] = False,
) -> None:
    """Run every built-in disturbance test; a pass/fail table, suite.json and report.html."""
    _check_workers(workers)
    from ..control import load_controller_class
    from ..events import BUILTIN_NAMES
    from ..record import default_run_dir
    from ..suite import run_suite

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, None, 0.0, seed,
                                         rate)
    settings = replace(settings, isolate=isolate)
    load_controller_class(controller)  # a broken script stops here, before any worker starts
    label = _controller_label(controller)
    folder = out or default_run_dir(Path("runs"), spec.name, label, "suite")
    try:
        with _progress_bar(len(BUILTIN_NAMES), "tests") as bar:
            result = run_suite(spec, settings, folder, video=video, label=label,
                               workers=workers, progress=lambda _name: bar.update(1),
                               plots=plots)
    except KeyboardInterrupt:
        _fail(f"interrupted (Ctrl-C): the tests that finished are in {folder / 'suite.json'} "
              f"and {folder / 'report.html'}; run the suite again for the rest",
              EXIT_INTERRUPTED)
    rows = []
    for test in result["tests"]:
        failed = "; ".join(c["label"] for c in test["checks"] if not c["passed"])
        f = test["figures"]
        rows.append((test["name"], "PASS" if test["passed"] else "FAIL", test["status"],
                     "-" if f["max_abs_pitch_deg"] is None else f"{f['max_abs_pitch_deg']:.1f}",
                     "-" if f["drift_m"] is None else f"{f['drift_m']:+.2f}", failed or "-"))
    typer.echo(table(rows, ("test", "verdict", "status", "max tilt deg", "drift m",
                            "failed checks")))
    for test in result["tests"]:
        if not test["passed"] and test.get("diagnosis"):
            first = test["diagnosis"][0]
            typer.echo(f"{test['name']}: [{first['code']}] {first['text']}")
    passed = sum(t["passed"] for t in result["tests"])
    from ..facts import parts_summary

    typer.echo(f"parts: {parts_summary(spec)} (upright inspect ROBOT lists them)")
    typer.echo(f"{passed} of {len(rows)} passed; report: {folder / 'report.html'}")
    raise typer.Exit(EXIT_OK if result["passed"] else EXIT_FELL)


@handles_errors
def render(
    run_dir: Annotated[Path, typer.Argument(help="A run folder written by `upright run`.")],
    fps: Annotated[float, typer.Option("--fps", help="Frames per second.")] = 30.0,
    size: Annotated[str, typer.Option(
        "--size", help="WIDTHxHEIGHT in pixels, each divisible by 16.")] = "640x480",
    workers: Annotated[int | None, typer.Option(
        "--workers", help="Parallel render processes (default: all cores).")] = None,
    camera: Annotated[str, typer.Option("--camera", help=CAMERA_HELP)] = "side",
) -> None:
    """Render video.mp4 of a recorded run by replaying its trace."""
    from .. import bounds

    _check_camera(camera)
    bounds.FPS.check(fps)
    width, height = bounds.frame_size(size)
    _check_workers(workers)
    if not (run_dir / "trace.csv").is_file():
        raise BadInput(f"{run_dir}: not a run folder (no trace.csv)")
    path = _render_with_bar(run_dir, fps, (width, height), workers, camera)
    typer.echo(f"wrote {path}")


def _render_with_bar(run_dir: Path, fps: float, size: tuple[int, int],
                     workers: int | None, camera: str = "side") -> Path:
    from ..render import render_run

    with _progress_bar(1, "frames") as bar:
        state = {"done": 0}

        def progress(done: int, total: int) -> None:
            bar.length = total
            bar.update(done - state["done"])
            state["done"] = done

        return render_run(run_dir, fps=fps, size=size, workers=workers, progress=progress,
                          camera=camera)


def _examples_root() -> Path:
    """The folder holding robots/ and controllers/: here, or beside the package's source."""
    for root in (Path.cwd(), Path(__file__).resolve().parents[2]):
        if (root / "robots" / "shelf-runner.yaml").is_file() and (
                root / "controllers" / "cascade.py").is_file():
            return root
    raise BadInput("the bundled examples (robots/, controllers/) were not found: run "
                   "`upright demo` from a clone of the upright repository")


@handles_errors
def demo(
    out: Annotated[Path | None, typer.Option("--out", help="Run folder for the demo.")] = None,
    video: Annotated[bool, typer.Option("--video/--no-video", help="Render the video.")] = True,
) -> None:
    """Run a bundled robot and controller through the push test and write a video."""
    from ..robot import load_robot
    from ..session import run_once

    root = _examples_root()
    robot_file = root / "robots" / "shelf-runner.yaml"
    controller = str(root / "controllers" / "cascade.py")
    typer.echo(f"robot {robot_file.relative_to(root)}, controller controllers/cascade.py, "
               "test push (three shoves at the top of the frame)")
    spec = load_robot(robot_file)
    settings = _settings_from(controller, {}, None, 0.0, 0, None)
    result = run_once(spec, settings, test="push", folder=out, default_root=Path("runs"),
                      label="cascade", plots=True, video=False)
    if video and result.trace["t_s"].size > 1:
        _render_with_bar(result.folder, 30.0, (640, 480), None)
    _print_run(result, result.folder)
    shown = "video.mp4 and plots.png" if video else "plots.png"
    typer.echo(f"next: open {shown} there; then try "
               "`upright suite robots/shelf-runner.yaml controllers/cascade.py`")
    raise typer.Exit(_exit_code(result))
