"""`upright analyze`: the robot's linear model and, with --controller, a script's loop."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer

from .common import (
    EXIT_FELL,
    EXIT_OK,
    BadInput,
    ConfigOption,
    JsonOption,
    RobotArg,
    SetOption,
    _load_config_file,
    _print_warnings,
    _split_sets,
    handles_errors,
)


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
    from ..analysis import analysis_table, config_yaml
    from ..analysis import analyze as analyse_robot
    from ..robot import load_robot

    robot_sets, config_sets = _split_sets(set_)
    if script is None and (config_sets or config_file is not None or plot is not None):
        raise BadInput("--config, --set config.KEY and --plot need --controller FILE.py")
    from .. import bounds

    bounds.LATENCY.check(latency)
    spec = load_robot(robot, robot_sets)
    _print_warnings(spec, robot)
    probed = None
    if script is not None:
        from ..control import controller_rate, load_controller_class
        from ..probe import analyze_controller

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
            from ..identify import compare

            result["check"] = compare(spec)
        if probed is not None:
            result.update(probed)
        typer.echo(json.dumps(result, indent=2))
    else:
        typer.echo(analysis_table(result))
        if check:
            from ..identify import compare, compare_table

            typer.echo("")
            typer.echo(compare_table(compare(spec)))
        if probed is not None:
            from ..probe import controller_table

            typer.echo("")
            typer.echo(controller_table(probed))
    if try_gains:
        from ..identify import check_suggested, check_table

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
