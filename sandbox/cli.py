"""The `upright` command line: parse, call the library, print. Exit codes:
0 ran and stayed up (or every test passed), 1 fell or a test failed,
2 bad input, 3 the controller script failed.
"""

from __future__ import annotations

import functools
import json
import math
import sys
from dataclasses import replace
from pathlib import Path
from typing import Annotated, Any

import typer

from .tables import fmt, table

app = typer.Typer(
    name="upright",
    help="Physics sandbox for two-wheeled self-balancing robots: describe, simulate, "
    "analyse, tune.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # Plain help: rich's renderer costs more start-up than all of upright's own imports.
    rich_markup_mode=None,
)

EXIT_OK, EXIT_FELL, EXIT_BAD_INPUT, EXIT_CONTROLLER = 0, 1, 2, 3


def _hide_flag_types() -> None:
    """Show no type for plain on/off flags in --help (typer labels them ``<bool>``)."""
    from typer.core import TyperOption

    shown = getattr(TyperOption, "display_type_rich", None)
    if shown is None or getattr(shown, "hides_flags", False):
        return  # another typer: leave its help as it is

    def display_type_rich(self, ctx):
        if self.is_flag and self.metavar is None:
            return None
        return shown(self, ctx)

    display_type_rich.hides_flags = True
    TyperOption.display_type_rich = display_type_rich


_hide_flag_types()


class BadInput(ValueError):
    """An argument the command line cannot use (exit code 2)."""


def _fail(message: str, code: int) -> None:
    typer.echo(message, err=True)
    raise typer.Exit(code)


def handles_errors(command):
    """Turn the library's exceptions into one-line messages and exit codes."""

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        try:
            return command(*args, **kwargs)
        except typer.Exit:
            raise
        except Exception as err:
            # Imported only on an error: the controller module pulls in numpy.
            from .control import ControllerError, ControllerLoadError

            if isinstance(err, ControllerLoadError):
                _fail(f"error: {err}", EXIT_BAD_INPUT)
            if isinstance(err, ControllerError):
                _fail(f"controller error: {err}", EXIT_CONTROLLER)
            if isinstance(err, (ValueError, OSError)):  # RobotFileError, UnitError, BadInput
                _fail(f"error: {err}", EXIT_BAD_INPUT)
            raise

    return wrapper


def _version(value: bool) -> None:
    if value:
        from . import __version__

        typer.echo(f"upright {__version__}")
        raise typer.Exit()


@app.callback()
def main(
    version: Annotated[
        bool | None,
        typer.Option("--version", callback=_version, is_eager=True, help="Print the version."),
    ] = None,
) -> None:
    """Physics sandbox for two-wheeled self-balancing robots."""


RobotArg = Annotated[Path, typer.Argument(help="Robot description file (YAML).")]
ControllerArg = Annotated[str, typer.Argument(
    help="Controller script: file.py or file.py:ClassName.")]
JsonOption = Annotated[bool, typer.Option("--json", help="Print JSON for programs.")]
RobotSetOption = Annotated[list[str] | None, typer.Option(
    "--set", help="Override a robot key, e.g. wheels.radius=40mm.")]
SetOption = Annotated[list[str] | None, typer.Option(
    "--set", help="Override a robot key or config value: wheels.friction=0.4, config.kp=30.")]
ConfigOption = Annotated[Path | None, typer.Option(
    "--config", help="Controller config file (YAML mapping of names to values).")]
SeedOption = Annotated[int, typer.Option("--seed", help="Seed for every random source.")]
WorkersOption = Annotated[int | None, typer.Option(
    "--workers", help="Parallel processes (default: all cores).")]
CAMERA_HELP = ("Video camera: side (forward to the right), front, three-quarter, or follow "
               "(behind the robot, turning with it).")
IsolateOption = Annotated[bool, typer.Option(
    "--isolate/--no-isolate", help="Each controller in a process of its own (readings in, "
    "duties out, stopped after a second per call); --no-isolate runs it in the worker.")]
RateOption = Annotated[float | None, typer.Option(
    "--rate", help="Controller rate, Hz (default: the class's rate_hz, else 200).")]


def parse_sets(items: list[str] | None) -> dict[str, Any]:
    """``key=value`` strings -> dict; values read as the files read them ("0.4", "35 mm",
    "[0, 0, 1]", "1:48"); text YAML cannot read (e.g. '2020-13-45') is kept as text."""
    from .yamlfile import parse_scalar

    out: dict[str, Any] = {}
    for item in items or []:
        key, sep, text = item.partition("=")
        if not sep or not key.strip():
            raise BadInput(f"--set {item!r}: expected KEY=VALUE, e.g. wheels.friction=0.4")
        out[key.strip()] = parse_scalar(text)
    return out


def _split_sets(items: list[str] | None) -> tuple[dict[str, Any], dict[str, Any]]:
    """Split --set values into robot keys and controller ``config.`` keys."""
    robot: dict[str, Any] = {}
    config: dict[str, Any] = {}
    for key, value in parse_sets(items).items():
        if key.startswith("config."):
            config[key[len("config."):]] = value
        else:
            robot[key] = value
    return robot, config


@app.command()
@handles_errors
def inspect(
    robot: RobotArg,
    as_json: JsonOption = False,
    set_: RobotSetOption = None,
) -> None:
    """Derived figures of a robot: mass, centre of mass, inertia, motor constants, limits."""
    from .plausibility import efficiency
    from .robot import figures_json, load_robot

    spec = load_robot(robot, parse_sets(set_))
    data = figures_json(spec)
    data["gearbox_efficiency"] = efficiency(spec)
    data["warnings"] = list(spec.warnings)
    if as_json:
        typer.echo(json.dumps(data, indent=2))
        return
    typer.echo(_inspect_text(spec, data))


def _inspect_text(spec, data: dict[str, Any]) -> str:
    f = spec.figures
    mm = lambda v: f"{v * 1000:.1f} mm"  # noqa: E731
    rows = [
        ("robot", spec.name, ""),
        ("mass, whole robot", fmt(data["mass_kg"]), "kg"),
        ("centre of mass, whole robot (x, y, z)", ", ".join(mm(v) for v in f.com), "from axle"),
        ("body mass (no wheels)", fmt(f.body.mass), "kg"),
        ("body centre of mass (x, y, z)", ", ".join(mm(v) for v in f.body.com), "from axle"),
        ("body centre of mass above axle", mm(f.com_height), ""),
        ("body inertia about its centre of mass Ixx, Iyy, Izz",
         ", ".join(fmt(f.body.inertia[i, i]) for i in range(3)), "kg m^2"),
        ("body pitch inertia about the axle", fmt(data["body_pitch_inertia_about_axle_kg_m2"]),
         "kg m^2"),
        ("wheel inertia about its axle (one wheel)", fmt(f.wheel_inertia_axle), "kg m^2"),
        ("motor resistance", fmt(f.resistance), "ohm"),
        ("torque constant (output shaft)", fmt(f.torque_constant), "N m/A"),
        ("back-EMF constant (output shaft)", fmt(f.back_emf_constant), "V s/rad"),
        ("implied gearbox efficiency (torque / back-EMF constant)",
         f"{100 * data['gearbox_efficiency']:.0f}", "%"),
        ("reflected rotor inertia at the wheel", fmt(f.reflected_inertia), "kg m^2"),
        ("stall torque per wheel at rated voltage", fmt(f.stall_torque_wheel), "N m"),
        ("battery nominal voltage", fmt(f.battery_voltage), "V"),
        ("voltage left for the motors (after driver drop)", fmt(f.drive_voltage), "V"),
        ("stall torque per wheel from the battery", fmt(f.available_stall_torque), "N m"),
        ("top speed (no load)", fmt(f.top_speed), "m/s"),
        ("steepest tilt both motors can hold", fmt(math.degrees(f.steepest_hold_tilt)), "deg"),
    ]
    rows += _real_part_rows(f, spec)
    out = [table(rows, ("figure", "value", "unit")), "", "Description in force (SI units):"]
    flat = _flatten(data["description"])
    out.append(table([(k, v, _unit_of(k)) for k, v in flat], ("key", "value", "unit")))
    if data["warnings"]:
        out += ["", "Warnings (the robot still runs; check these values):"]
        out += [f"  {line}" for line in data["warnings"]]
    return "\n".join(out)


def _unit_of(key: str) -> str:
    """The SI unit of a flattened description key ('body.parts[0].size' -> 'm')."""
    import re

    from .robot import key_kind
    from .units import KINDS

    dotted = re.sub(r"\[(\d+)\]", r".\1", key)
    kind = key_kind(dotted) or key_kind(dotted + ".0")
    return KINDS[kind][0].replace("*", " ") if kind else ""


def _print_warnings(spec, source: Path) -> None:
    """Plausibility warnings on stderr, one line each; the command goes on."""
    for line in spec.warnings:
        typer.echo(f"warning: {source}: {line}", err=True)
def _real_part_rows(f, spec) -> list[tuple[str, str, str]]:
    """Rows for the imperfect parts in force: measured body figures, the figures of each
    side where the two differ, the IMU filters' group delay."""
    rows = []
    if f.measured:
        rows.append(("body figures from body.measured", ", ".join(f.measured), ""))
    if f.sides_differ:
        shown = (("stall torque at rated voltage", "stall_torque_wheel", "N m"),
                 ("stall torque from the battery", "available_stall_torque", "N m"),
                 ("motor resistance", "resistance", "ohm"),
                 ("torque constant", "torque_constant", "N m/A"),
                 ("back-EMF constant", "back_emf_constant", "V s/rad"),
                 ("reflected rotor inertia", "reflected_inertia", "kg m^2"),
                 ("friction torque (kinetic)", "friction_torque", "N m"),
                 ("static friction torque", "static_friction_torque", "N m"),
                 ("wheel radius", "wheel_radius", "m"),
                 ("wheel inertia about its axle", "wheel_inertia_axle", "kg m^2"),
                 ("top speed (no load)", "top_speed", "m/s"))
        for label, name, unit in shown:
            left, right = getattr(f.left, name), getattr(f.right, name)
            if left != right:
                rows.append((f"{label}, left / right", f"{fmt(left)} / {fmt(right)}", unit))
    for label, delay in (("gyro", f.gyro_group_delay), ("accelerometer", f.accel_group_delay)):
        if delay is not None:
            rows.append((f"{label} filter group delay (low frequency)", fmt(delay * 1000), "ms"))
    return rows + _imperfection_rows(spec)


def _imperfection_rows(spec) -> list[tuple[str, str, str]]:
    """The imperfections in force (play, static friction, IMU filters, mounting, scale
    errors, jitter, compute time; the per-side rows are above), or 'ideal parts'."""
    from .facts import imperfections

    rows = [tuple(r) for r in imperfections(spec)
            if not r[0].startswith(("motors.left", "motors.right", "wheels.left", "wheels.right"))]
    return [("parts", "ideal parts (no imperfections in the file)", "")] if not (
        rows or spec.figures.sides_differ) else rows


def _flatten(data: Any, prefix: str = "") -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    if isinstance(data, dict):
        for key, value in data.items():
            rows += _flatten(value, f"{prefix}.{key}" if prefix else str(key))
    elif isinstance(data, list) and data and isinstance(data[0], dict):
        for i, value in enumerate(data):
            rows += _flatten(value, f"{prefix}[{i}]")
    else:
        if isinstance(data, list):
            text = "[" + ", ".join(fmt(v) if isinstance(v, float) else str(v) for v in data) + "]"
        elif isinstance(data, float):
            text = fmt(data)
        else:
            text = str(data)
        rows.append((prefix, text))
    return rows


@app.command()
@handles_errors
def build(
    robot: RobotArg,
    output: Annotated[
        Path | None, typer.Option("-o", "--output", help="Write the URDF here (default: print).")
    ] = None,
    set_: RobotSetOption = None,
) -> None:
    """Write the robot's URDF (an open format other tools read)."""
    from .robot import load_robot
    from .urdf import robot_urdf

    spec = load_robot(robot, parse_sets(set_))
    _print_warnings(spec, robot)
    text = robot_urdf(spec)
    if output is None:
        sys.stdout.write(text)
        return
    output.write_text(text, encoding="utf-8")
    typer.echo(f"wrote {output}")


EXIT_INTERRUPTED = 130  # shell convention for Ctrl-C


def _load_config_file(path: Path | None) -> dict[str, Any]:
    if path is None:
        return {}
    from .yamlfile import read_yaml_file

    if not path.is_file():
        raise BadInput(f"{path}: no such config file")
    data = read_yaml_file(path)
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise BadInput(f"{path}: a controller config must be a mapping of names to values")
    return data


def _controller_label(controller: str) -> str:
    name = Path(controller.split(".py:")[0]).stem
    return name + ("-" + controller.split(".py:")[1] if ".py:" in controller else "")


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


@app.command()
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
    from .session import run_once

    _check_camera(camera)
    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, tilt,
                                         seed, rate)
    from . import bounds

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
    from .facts import parts_summary

    _print_run(result, result.folder, parts_summary(spec))
    raise typer.Exit(_exit_code(result))


def _check_workers(workers: int | None) -> None:
    from . import bounds

    if workers is not None:
        bounds.WORKERS.check(workers)


def _watch_factory(watch: bool, slow_motion: float):
    """The world factory for --watch (None without it); no display: one line, exit 2."""
    if not (math.isfinite(slow_motion) and 1.0 <= slow_motion <= 100.0):
        raise BadInput(f"--slow-motion must be from 1 to 100, got {slow_motion:g}")
    if not watch:
        return None
    from .watch import display_problem, watched_world_factory

    problem = display_problem()
    if problem is not None:
        raise BadInput(problem)
    return watched_world_factory(slow_motion)


def _check_camera(camera: str) -> None:
    if camera == "side":  # the default, one of CAMERAS: no need to import the renderer (15 ms)
        return
    from .render.frames import CAMERAS

    if camera not in CAMERAS:
        raise BadInput(f"--camera {camera!r}: choose one of {', '.join(CAMERAS)}")


def _settings_from(controller: str, config: dict, duration: float | None, tilt: float,
                   seed: int, rate: float | None):
    from . import bounds
    from .runner import RunSettings

    if duration is not None:
        bounds.DURATION.check(duration)
    bounds.TILT.check(tilt)
    if rate is not None:
        bounds.RATE.check(rate)
    return RunSettings(controller=controller, config=config,
                       duration=10.0 if duration is None else duration,
                       tilt=math.radians(tilt), seed=seed, rate_hz=rate)


def _robot_and_settings(robot: Path, controller: str, sets: list[str] | None,
                        config_file: Path | None, duration: float | None, tilt: float,
                        seed: int, rate: float | None):
    """The robot with its --set overrides, and run settings with the controller's config
    (--config file, then config.* --set values on top)."""
    from .robot import load_robot

    robot_sets, config_sets = _split_sets(sets)
    spec = load_robot(robot, robot_sets)
    _print_warnings(spec, robot)
    config = {**_load_config_file(config_file), **config_sets}
    return spec, _settings_from(controller, config, duration, tilt, seed, rate)


@app.command()
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
    from .control import load_controller_class
    from .events import BUILTIN_NAMES
    from .record import default_run_dir
    from .suite import run_suite

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
    from .facts import parts_summary

    typer.echo(f"parts: {parts_summary(spec)} (upright inspect ROBOT lists them)")
    typer.echo(f"{passed} of {len(rows)} passed; report: {folder / 'report.html'}")
    raise typer.Exit(EXIT_OK if result["passed"] else EXIT_FELL)


@app.command()
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
    from . import bounds

    _check_camera(camera)
    bounds.FPS.check(fps)
    width, height = bounds.frame_size(size)
    _check_workers(workers)
    if not (run_dir / "trace.csv").is_file():
        raise BadInput(f"{run_dir}: not a run folder (no trace.csv)")
    path = _render_with_bar(run_dir, fps, (width, height), workers, camera)
    typer.echo(f"wrote {path}")


class _NoBar:
    """Stands in for a progress bar where stderr is not a terminal (logs, pipes, CI):
    a bar there leaves its label behind, without a newline, before the results."""

    length = 0

    def __enter__(self) -> _NoBar:
        return self

    def __exit__(self, *exc) -> None:
        return None

    def update(self, steps: int) -> None:
        return None


def _progress_bar(length: int, label: str):
    """A progress bar on stderr when it is a terminal, else nothing."""
    if not _stderr_is_terminal():
        return _NoBar()
    return typer.progressbar(length=length, label=label, file=sys.stderr)


def _stderr_is_terminal() -> bool:
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):  # replaced or closed stream
        return False


def _render_with_bar(run_dir: Path, fps: float, size: tuple[int, int],
                     workers: int | None, camera: str = "side") -> Path:
    from .render import render_run

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
    for root in (Path.cwd(), Path(__file__).resolve().parent.parent):
        if (root / "robots" / "shelf-runner.yaml").is_file() and (
                root / "controllers" / "cascade.py").is_file():
            return root
    raise BadInput("the bundled examples (robots/, controllers/) were not found: run "
                   "`upright demo` from a clone of the upright repository")


@app.command()
@handles_errors
def demo(
    out: Annotated[Path | None, typer.Option("--out", help="Run folder for the demo.")] = None,
    video: Annotated[bool, typer.Option("--video/--no-video", help="Render the video.")] = True,
) -> None:
    """Run a bundled robot and controller through the push test and write a video."""
    from .robot import load_robot
    from .session import run_once

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


def _floats(text: str | None, count: int, option: str) -> list[float] | None:
    if text is None:
        return None
    try:
        values = [float(v) for v in text.replace(" ", "").split(",") if v]
    except ValueError:
        raise BadInput(f"{option} {text!r}: expected {count} numbers separated by commas") from None
    if len(values) != count:
        raise BadInput(f"{option} {text!r}: expected {count} numbers, got {len(values)}")
    return values


@app.command()
@handles_errors
def analyze(
    robot: RobotArg,
    as_json: JsonOption = False,
    q: Annotated[str | None, typer.Option(
        "--q", help="LQR state weights for x, v, pitch, pitch rate, e.g. 4,4,131,1.3 "
        "(default: Bryson's rule, see DEVELOPERS.md).")] = None,
    r: Annotated[float | None, typer.Option("--r", help="LQR duty weight (default 1).")] = None,
    rate: Annotated[float | None, typer.Option(
        "--rate", help="Controller rate, Hz (default 200, or the --controller's rate_hz).")
    ] = None,
    emit_config: Annotated[Path | None, typer.Option(
        "--emit-config", help="Write suggested gains as a config file for --config.")] = None,
    controller: Annotated[str, typer.Option(
        "--for", help="Which controller the emitted config is for: pid_tilt, cascade, or a "
        "script path (others get raw state-feedback gains).")] = "cascade",
    check: Annotated[bool, typer.Option(
        "--check", help="Also identify A and B from small-perturbation runs of the physics "
        "model and print them beside the analytic model.")] = False,
    try_gains: Annotated[bool, typer.Option(
        "--try", help="Also run the example controllers with the suggested gains "
        "(20 s from 5 deg) and report whether they stay up.")] = False,
    script: Annotated[str | None, typer.Option(
        "--controller", help="Your controller script (file.py or file.py:Class): identify "
        "its response and give its loop's poles and margins on this robot.")] = None,
    config_file: ConfigOption = None,
    latency: Annotated[float, typer.Option(
        "--latency", help="With --controller: delay from the controller's output to the "
        "bridge, ms (as `upright run --latency`).")] = 0.0,
    plot: Annotated[Path | None, typer.Option(
        "--plot", help="With --controller: write Bode and Nyquist plots of the loop (PNG).")
    ] = None,
    set_: SetOption = None,
) -> None:
    """Linear model of the robot: poles, fall time, LQR gains, suggested starting gains;
    with --controller, your script's identified law and its loop's poles and margins."""
    from .analysis import analysis_table, config_yaml
    from .analysis import analyze as analyse_robot
    from .robot import load_robot

    robot_sets, config_sets = _split_sets(set_)
    if script is None and (config_sets or config_file is not None or plot is not None):
        raise BadInput("--config, --set config.KEY and --plot need --controller FILE.py")
    from . import bounds

    bounds.LATENCY.check(latency)
    spec = load_robot(robot, robot_sets)
    _print_warnings(spec, robot)
    probed = None
    if script is not None:
        from .control import controller_rate, load_controller_class
        from .probe import analyze_controller

        rate = controller_rate(load_controller_class(script), rate)
        config = {**_load_config_file(config_file), **config_sets}
        probed = analyze_controller(spec, script, config, rate_hz=rate,
                                    latency=latency / 1000.0, plot=plot)
    result = analyse_robot(spec, q_diag=_floats(q, 4, "--q"), r=r,
                           rate_hz=200.0 if rate is None else rate)
    if emit_config is not None:
        emit_config.write_text(config_yaml(result, controller), encoding="utf-8")
    code = EXIT_OK
    if as_json:
        if check:
            from .identify import compare

            result["check"] = compare(spec)
        if probed is not None:
            result.update(probed)
        typer.echo(json.dumps(result, indent=2))
    else:
        typer.echo(analysis_table(result))
        if check:
            from .identify import compare, compare_table

            typer.echo("")
            typer.echo(compare_table(compare(spec)))
        if probed is not None:
            from .probe import controller_table

            typer.echo("")
            typer.echo(controller_table(probed))
    if try_gains:
        from .identify import check_suggested, check_table

        rows = check_suggested(spec, result)
        if not as_json:
            typer.echo("")
            typer.echo(check_table(rows))
        code = EXIT_OK if all(row["status"] == "completed" for row in rows) else EXIT_FELL
    if not as_json:
        if emit_config is not None:
            typer.echo(f"wrote {emit_config} (use it with --config)")
        if plot is not None:
            typer.echo(f"wrote {plot}")
    raise typer.Exit(code)


class _ProgressLine:
    """A one-line progress bar on stderr: done/total, runs per second, time left."""

    def __init__(self, label: str):
        from .sweep import ProgressClock

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


@app.command()
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
    from . import bounds
    from .sweep import sweep_command

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
    from .sweep.plan import axis_text, parse_vary, vary_form

    for text in vary:
        note = vary_form(text).note
        if note:
            typer.echo(f"note: {note}", err=True)
        typer.echo(f"axis {axis_text(parse_vary(text))}")


@app.command()
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
    from . import bounds
    from .sweep import tune_command

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


@app.command()
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
    from . import bounds
    from .margins import STRESS_NAMES, find_margins, margins_table

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


@app.command()
@handles_errors
def fit(
    robot: RobotArg,
    out: Annotated[Path, typer.Option("-o", "--out", help="Fitted robot file to write.")],
    swing: Annotated[Path | None, typer.Option("--swing", help="Swing test log (CSV).")] = None,
    spin: Annotated[Path | None, typer.Option("--spin", help="Spin test log (CSV).")] = None,
    drop: Annotated[Path | None, typer.Option("--drop", help="Drop test log (CSV).")] = None,
    play: Annotated[Path | None, typer.Option(
        "--play", help="Play check log (CSV, wheels clamped).")] = None,
    mass: Annotated[str | None, typer.Option(
        "--mass", help="Whole robot as weighed, e.g. 0.61 or '610 g'.")] = None,
    balance_point: Annotated[str | None, typer.Option(
        "--balance-point", help="Axle to balance point, e.g. '71 mm'.")] = None,
    scale: Annotated[list[str] | None, typer.Option(
        "--scale", help="Raw column scale, e.g. gyro_y=131/deg/s.")] = None,
    json_out: JsonOption = False,
    plot: Annotated[Path | None, typer.Option("--plot", help="Write fit.png here.")] = None,
) -> None:
    """Fit a robot file to bench logs (swing, spin, drop, play check), with 95 % intervals."""
    import numpy as np

    from .fit.logs import parse_scales
    from .fit.plot import plot_fits
    from .fit.robotfile import dumps
    from .fit.run import fit_robot
    from .units import to_si

    result = fit_robot(robot, swing=swing, spin=spin, drop=drop, play=play,
                       mass=to_si(mass, "mass") if mass is not None else None,
                       balance_point=(to_si(balance_point, "length")
                                      if balance_point is not None else None),
                       scales=parse_scales(scale))
    out.write_text(result.text, encoding="utf-8")
    if plot is not None:
        plot_fits(result.fits, plot)
    if json_out:
        typer.echo(dumps(result.as_json()))
        return
    rows = []
    for p in result.parameters:
        if isinstance(p.fitted, list):
            file_v = fmt(float(np.linalg.norm(p.file))) if p.file is not None else "-"
            fitted = float(np.linalg.norm(p.fitted))
            low, high = float(np.linalg.norm(p.low)), float(np.linalg.norm(p.high))
            change = fitted / float(np.linalg.norm(p.file)) - 1 if p.file else None
            key = p.key + " (distance)"
        else:
            file_v = fmt(p.file) if p.file is not None else "-"
            fitted, low, high, key = p.fitted, p.low, p.high, p.key
            change = fitted / p.file - 1 if p.file else None
        rows.append([key + ("" if p.written else " (check)"), file_v, fmt(fitted),
                     f"{fmt(low)} .. {fmt(high)}",
                     f"{change * 100:+.1f} %" if change is not None else "new", p.source])
    typer.echo(table(rows, ["parameter (SI)", "file", "fitted", "95 % interval", "change",
                            "from"]))
    if result.not_determined:
        typer.echo("left alone (not determined by these logs): "
                   + ", ".join(result.not_determined))
    for note in result.notes:
        typer.echo(f"note: {note}")
    typer.echo(f"wrote {out}; try it: upright inspect {out}")


@app.command()
@handles_errors
def compare(
    run_dir: Annotated[Path, typer.Argument(help="Run folder (upright run --out).")],
    real: Annotated[Path, typer.Argument(help="The real robot's log of the same manoeuvre.")],
    event: Annotated[str | None, typer.Option(
        "--event", help="Align on the first row whose event column holds this.")] = None,
    out: Annotated[Path | None, typer.Option("-o", "--out", help="Overlay plot path.")] = None,
    scale: Annotated[list[str] | None, typer.Option(
        "--scale", help="Raw column scale, e.g. gyro_y=131/deg/s.")] = None,
    json_out: JsonOption = False,
) -> None:
    """A real robot's log against a simulated run: lag, RMS differences, overlay plot."""
    from .fit.compare import compare_run, plot_compare
    from .fit.logs import parse_scales

    result, sim, real_curves = compare_run(run_dir, real, event, parse_scales(scale))
    path = out or (run_dir / "compare.png")
    plot_compare(sim, real_curves, path)
    if json_out:
        typer.echo(json.dumps({"lag_s": result.lag, "aligned_by": result.aligned_by,
                               "overlap_s": result.overlap, "rms": result.rms,
                               "plot": str(path)}, indent=2))
        return
    rows = [[name, fmt(v) if v is not None else "not in both"] for name, v in result.rms.items()]
    typer.echo(f"aligned by {result.aligned_by}: lag {result.lag * 1000:.0f} ms, "
               f"overlap {result.overlap:.2f} s")
    typer.echo(table(rows, ["channel", "RMS difference (SI)"]))
    typer.echo(f"overlay: {path}")


if __name__ == "__main__":
    app()
