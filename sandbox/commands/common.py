"""What the commands share: exit codes, the error wrapper, the common arguments and options,
--set parsing, loading a robot with its run settings, the progress bar."""

from __future__ import annotations

import functools
import math
import sys
from pathlib import Path
from typing import Annotated, Any

import typer

EXIT_OK, EXIT_FELL, EXIT_BAD_INPUT, EXIT_CONTROLLER = 0, 1, 2, 3
EXIT_INTERRUPTED = 130  # shell convention for Ctrl-C


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
            from ..control import ControllerError, ControllerLoadError

            if isinstance(err, ControllerLoadError):
                _fail(f"error: {err}", EXIT_BAD_INPUT)
            if isinstance(err, ControllerError):
                _fail(f"controller error: {err}", EXIT_CONTROLLER)
            if isinstance(err, (ValueError, OSError)):  # RobotFileError, UnitError, BadInput
                _fail(f"error: {err}", EXIT_BAD_INPUT)
            raise

    return wrapper


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
    from ..yamlfile import parse_scalar

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


def _print_warnings(spec, source: Path) -> None:
    """Plausibility warnings on stderr, one line each; the command goes on."""
    for line in spec.warnings:
        typer.echo(f"warning: {source}: {line}", err=True)


def _load_config_file(path: Path | None) -> dict[str, Any]:
    if path is None:
        return {}
    from ..yamlfile import read_yaml_file

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


def _check_workers(workers: int | None) -> None:
    from .. import bounds

    if workers is not None:
        bounds.WORKERS.check(workers)


def _settings_from(controller: str, config: dict, duration: float | None, tilt: float,
                   seed: int, rate: float | None):
    from .. import bounds
    from ..runner import RunSettings

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
    from ..robot import load_robot

    robot_sets, config_sets = _split_sets(sets)
    spec = load_robot(robot, robot_sets)
    _print_warnings(spec, robot)
    config = {**_load_config_file(config_file), **config_sets}
    return spec, _settings_from(controller, config, duration, tilt, seed, rate)


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
