"""`upright inspect` and `upright build`: a robot file's derived figures and its URDF."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path
from typing import Annotated, Any

import typer

from ..tables import fmt, table
from .common import (
    JsonOption,
    RobotArg,
    RobotSetOption,
    _print_warnings,
    handles_errors,
    parse_sets,
)


@handles_errors
def inspect(
    robot: RobotArg,
    as_json: JsonOption = False,
    set_: RobotSetOption = None,
) -> None:
    """Derived figures of a robot: mass, centre of mass, inertia, motor constants, limits."""
    from ..plausibility import efficiency
    from ..robot import figures_json, load_robot

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

    from ..robot import key_kind
    from ..units import KINDS

    dotted = re.sub(r"\[(\d+)\]", r".\1", key)
    kind = key_kind(dotted) or key_kind(dotted + ".0")
    return KINDS[kind][0].replace("*", " ") if kind else ""


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
    from ..facts import imperfections

    # the report typesets N·m; the other rows of this table write N m
    rows = [(r[0], r[1], r[2].replace("N·m", "N m"))
            for r in imperfections(spec)
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


@handles_errors
def build(
    robot: RobotArg,
    output: Annotated[
        Path | None, typer.Option("-o", "--output", help="Write the URDF here (default: print).")
    ] = None,
    set_: RobotSetOption = None,
) -> None:
    """Write the robot's URDF (an open format other tools read)."""
    from ..robot import load_robot
    from ..urdf import robot_urdf

    spec = load_robot(robot, parse_sets(set_))
    _print_warnings(spec, robot)
    text = robot_urdf(spec)
    if output is None:
        sys.stdout.write(text)
        return
    output.write_text(text, encoding="utf-8")
    typer.echo(f"wrote {output}")
