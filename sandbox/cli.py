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

from . import __version__
from .tables import fmt, table

app = typer.Typer(
    name="upright",
    help="Physics sandbox for two-wheeled self-balancing robots: describe, simulate, "
    "analyse, tune.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

EXIT_OK, EXIT_FELL, EXIT_BAD_INPUT, EXIT_CONTROLLER = 0, 1, 2, 3


class BadInput(ValueError):
    """An argument the command line cannot use (exit code 2)."""


def _fail(message: str, code: int) -> None:
    typer.echo(message, err=True)
    raise typer.Exit(code)


def handles_errors(command):
    """Turn the library's exceptions into one-line messages and exit codes."""

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        from .control import ControllerError, ControllerLoadError

        try:
            return command(*args, **kwargs)
        except typer.Exit:
            raise
        except ControllerLoadError as err:
            _fail(f"error: {err}", EXIT_BAD_INPUT)
        except ControllerError as err:
            _fail(f"controller error: {err}", EXIT_CONTROLLER)
        except (ValueError, OSError) as err:  # RobotFileError, UnitError, BadInput, ...
            _fail(f"error: {err}", EXIT_BAD_INPUT)

    return wrapper


def _version(value: bool) -> None:
    if value:
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
RateOption = Annotated[float | None, typer.Option(
    "--rate", help="Controller rate, Hz (default: the class's rate_hz, else 200).")]


def parse_sets(items: list[str] | None) -> dict[str, Any]:
    """``key=value`` strings -> dict; values read as YAML scalars ("0.4", "35 mm", "[0, 0, 1]")."""
    import yaml

    out: dict[str, Any] = {}
    for item in items or []:
        key, sep, text = item.partition("=")
        if not sep or not key.strip():
            raise BadInput(f"--set {item!r}: expected KEY=VALUE, e.g. wheels.friction=0.4")
        try:
            value = yaml.safe_load(text)
        except (yaml.YAMLError, ValueError, RecursionError):  # e.g. '2020-13-45': keep the text
            value = text
        out[key.strip()] = value
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
    from .robot import figures_json, load_robot

    spec = load_robot(robot, parse_sets(set_))
    data = figures_json(spec)
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
        ("reflected rotor inertia at the wheel", fmt(f.reflected_inertia), "kg m^2"),
        ("stall torque per wheel at rated voltage", fmt(f.stall_torque_wheel), "N m"),
        ("battery nominal voltage", fmt(f.battery_voltage), "V"),
        ("voltage left for the motors (after driver drop)", fmt(f.drive_voltage), "V"),
        ("stall torque per wheel from the battery", fmt(f.available_stall_torque), "N m"),
        ("top speed (no load)", fmt(f.top_speed), "m/s"),
        ("steepest tilt both motors can hold", fmt(math.degrees(f.steepest_hold_tilt)), "deg"),
    ]
    out = [table(rows, ("figure", "value", "unit")), "", "Description in force (SI units):"]
    flat = _flatten(data["description"])
    out.append(table([(k, v) for k, v in flat], ("key", "value")))
    return "\n".join(out)


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

    text = robot_urdf(load_robot(robot, parse_sets(set_)))
    if output is None:
        sys.stdout.write(text)
        return
    output.write_text(text, encoding="utf-8")
    typer.echo(f"wrote {output}")


EXIT_INTERRUPTED = 130  # shell convention for Ctrl-C


def _load_config_file(path: Path | None) -> dict[str, Any]:
    if path is None:
        return {}
    import yaml

    from .robot import parse_yaml

    if not path.is_file():
        raise BadInput(f"{path}: no such config file")
    data = parse_yaml(path.read_text(encoding="utf-8"), str(path))
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise BadInput(f"{path}: a controller config must be a mapping of names to values")
    del yaml
    return data


def _controller_label(controller: str) -> str:
    name = Path(controller.split(".py:")[0]).stem
    return name + ("-" + controller.split(".py:")[1] if ".py:" in controller else "")


def _print_run(result, folder: Path | None) -> None:
    s = result.summary
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
    if folder is not None:
        files = [name for name in ("trace.csv", "summary.json", "run.yaml", "plots.png",
                                   "video.mp4", "controller_error.txt")
                 if (folder / name).is_file()]
        typer.echo(f"results in {folder}/ ({', '.join(files)})")


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
    plots: Annotated[bool, typer.Option("--plots/--no-plots", help="Write plots.png.")] = True,
) -> None:
    """One headless run of a controller on a robot; writes a run folder."""
    from .session import run_once

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, tilt,
                                         seed, rate)
    settings = replace(settings, physics_dt=physics_step / 1000.0, latency=latency / 1000.0,
                       fall_limit=math.radians(fall_limit))
    if settings.duration <= 0:
        raise BadInput(f"--duration must be positive, got {settings.duration:g}")
    folder = out
    result = run_once(spec, settings, test=test, folder=folder, default_root=Path("runs"),
                      label=_controller_label(controller), duration_given=duration is not None,
                      video=False, plots=plots)
    if video and result.trace["t_s"].size > 1:
        _render_with_bar(result.folder, 30.0, (640, 480), None)
    _print_run(result, result.folder)
    raise typer.Exit(_exit_code(result))


def _settings_from(controller: str, config: dict, duration: float | None, tilt: float,
                   seed: int, rate: float | None):
    from .runner import RunSettings

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
    out: Annotated[Path | None, typer.Option(
        "--out", help="Suite folder (default runs/<robot>-<controller>-suite-<time>/).")] = None,
    video: Annotated[bool, typer.Option("--video", help="Render a video of every test.")] = False,
) -> None:
    """Run every built-in disturbance test; a pass/fail table, suite.json and report.html."""
    from .control import load_controller_class
    from .events import BUILTIN_NAMES
    from .record import default_run_dir
    from .suite import run_suite

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, None, 0.0, seed,
                                         rate)
    load_controller_class(controller)  # a broken script stops here, before any worker starts
    label = _controller_label(controller)
    folder = out or default_run_dir(Path("runs"), spec.name, label, "suite")
    with typer.progressbar(length=len(BUILTIN_NAMES), label="tests", file=sys.stderr) as bar:
        result = run_suite(spec, settings, folder, video=video, label=label, workers=workers,
                           progress=lambda _name: bar.update(1))
    rows = []
    for test in result["tests"]:
        failed = "; ".join(c["label"] for c in test["checks"] if not c["passed"])
        f = test["figures"]
        rows.append((test["name"], "PASS" if test["passed"] else "FAIL", test["status"],
                     "-" if f["max_abs_pitch_deg"] is None else f"{f['max_abs_pitch_deg']:.1f}",
                     "-" if f["drift_m"] is None else f"{f['drift_m']:+.2f}", failed or "-"))
    typer.echo(table(rows, ("test", "verdict", "status", "max tilt deg", "drift m",
                            "failed checks")))
    passed = sum(t["passed"] for t in result["tests"])
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
) -> None:
    """Render video.mp4 of a recorded run by replaying its trace."""
    if not (run_dir / "trace.csv").is_file():
        raise BadInput(f"{run_dir}: not a run folder (no trace.csv)")
    try:
        width, height = (int(v) for v in size.lower().split("x"))
    except ValueError:
        raise BadInput(f"--size {size!r}: expected WIDTHxHEIGHT, e.g. 640x480") from None
    path = _render_with_bar(run_dir, fps, (width, height), workers)
    typer.echo(f"wrote {path}")


def _render_with_bar(run_dir: Path, fps: float, size: tuple[int, int],
                     workers: int | None) -> Path:
    from .render import render_run

    with typer.progressbar(length=1, label="frames", file=sys.stderr) as bar:
        state = {"done": 0}

        def progress(done: int, total: int) -> None:
            bar.length = total
            bar.update(done - state["done"])
            state["done"] = done

        return render_run(run_dir, fps=fps, size=size, workers=workers, progress=progress)


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
    typer.echo("next: open video.mp4 and plots.png there; then try "
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
    rate: Annotated[float, typer.Option("--rate", help="Controller rate, Hz.")] = 200.0,
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
    set_: RobotSetOption = None,
) -> None:
    """Linear model of the robot: poles, fall time, LQR gains, suggested starting gains."""
    from .analysis import analysis_table, config_yaml
    from .analysis import analyze as analyse_robot
    from .robot import load_robot

    spec = load_robot(robot, parse_sets(set_))
    result = analyse_robot(spec, q_diag=_floats(q, 4, "--q"), r=r, rate_hz=rate)
    if emit_config is not None:
        emit_config.write_text(config_yaml(result, controller), encoding="utf-8")
    code = EXIT_OK
    if as_json:
        if check:
            from .identify import compare

            result["check"] = compare(spec)
        typer.echo(json.dumps(result, indent=2))
    else:
        typer.echo(analysis_table(result))
        if check:
            from .identify import compare, compare_table

            typer.echo("")
            typer.echo(compare_table(compare(spec)))
    if try_gains:
        from .identify import check_suggested, check_table

        rows = check_suggested(spec, result)
        if not as_json:
            typer.echo("")
            typer.echo(check_table(rows))
        code = EXIT_OK if all(row["status"] == "completed" for row in rows) else EXIT_FELL
    if emit_config is not None and not as_json:
        typer.echo(f"wrote {emit_config} (use it with --config)")
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
        "--vary", help="KEY=START:STOP:N (or KEY=A,B,C); any key --set takes, SI numbers. "
        "Several make a grid.")] = None,
    samples: Annotated[int, typer.Option(
        "--samples", help="Monte Carlo: robots drawn within the --spread tolerances.")] = 0,
    spread: Annotated[list[str] | None, typer.Option(
        "--spread", help="KEY=±X% (relative) or KEY=±X (absolute), drawn uniformly.")] = None,
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
    cluster: ClusterOption = None,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Sweep folder; rerunning with the same folder skips finished points.")
    ] = None,
) -> None:
    """Many runs over a grid of values and/or robots drawn within part tolerances."""
    from .sweep import sweep_command

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, tilt,
                                         seed, rate)
    if not vary and not samples:
        raise BadInput("give at least one --vary KEY=START:STOP:N, or --samples N with --spread")
    progress = _ProgressLine("runs")
    try:
        report = sweep_command(spec, settings, vary=vary or [], spread=spread or [],
                               samples=samples, test=test, duration_given=duration is not None,
                               workers=workers, cluster=cluster, out=out, figure=figure,
                               progress=progress)
    finally:
        progress.close()
    typer.echo(report.text())
    raise typer.Exit(EXIT_INTERRUPTED if report.interrupted else EXIT_OK)


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
    cluster: ClusterOption = None,
    out: Annotated[Path | None, typer.Option("--out", help="Tuning folder.")] = None,
) -> None:
    """Search controller gains that keep the robot up and steady through the tests."""
    from .sweep import tune_command

    spec, settings = _robot_and_settings(robot, controller, set_, config_file, duration, 0.0,
                                         seed, rate)
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


if __name__ == "__main__":
    app()
