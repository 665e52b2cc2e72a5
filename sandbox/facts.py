"""What a report says about its run in words: the robot's key figures, the controller
(file, class, SHA-256, config), and what each test does. Plain data, JSON-ready."""

from __future__ import annotations

import hashlib
import math
from pathlib import Path
from typing import Any

from . import __version__


def robot_figures(spec) -> list[list[str]]:
    """[label, value, unit] rows a builder checks first."""
    f, w, m = spec.figures, spec.wheels, spec.motors
    rows = [
        ("mass, whole robot", f"{f.mass:.3g}", "kg"),
        ("body centre of mass above the axle", f"{1000 * f.com_height:.3g}", "mm"),
        ("body pitch inertia about its centre of mass", f"{f.body.inertia[1, 1]:.3g}",
         "kg·m²"),
        ("wheel radius", f"{1000 * w.radius:.3g}", "mm"),
        ("track (wheel centre to centre)", f"{1000 * w.track:.3g}", "mm"),
        ("gear ratio", f"{m.gear_ratio:g}", ""),
        ("stall torque per wheel from the battery", f"{f.available_stall_torque:.3g}", "N·m"),
        ("top speed (no load)", f"{f.top_speed:.3g}", "m/s"),
        ("battery nominal voltage", f"{f.battery_voltage:.3g}", "V"),
        ("steepest tilt both motors can hold", f"{math.degrees(f.steepest_hold_tilt):.3g}",
         "deg"),
    ]
    return [list(r) for r in rows]


def controller_facts(controller: str, config: dict[str, Any]) -> dict[str, Any]:
    """The script's path, class, SHA-256 of its bytes, and the config it ran with."""
    path, colon, name = controller.rpartition(":")
    if not (colon and path.endswith(".py") and name.isidentifier()):
        path, name = controller, "Controller"
    script = Path(path)
    digest = hashlib.sha256(script.read_bytes()).hexdigest() if script.is_file() else None
    return {"path": str(script), "class": name, "sha256": digest, "config": dict(config),
            "upright": __version__}


def _when(event) -> str:
    if event.at is not None:
        return f"at {event.at:g} s"
    return f"after {event.at_position:g} m"


def event_text(event) -> str:
    """One test event in words, e.g. ``at 2 s: push 0.0596 N·s forward, 188 mm up``."""
    if event.push is not None:
        p = event.push
        size = (f"{p.impulse:.3g} N·s" if p.impulse is not None
                else f"{p.force:.3g} N for {p.duration:g} s")
        where = "near the top of the frame" if p.height is None else f"{1000 * p.height:g} mm up"
        what = f"push {size} {p.direction}, {where}"
    elif event.payload is not None:
        what = f"payload of {1000 * event.payload.mass:g} g added"
    elif event.friction is not None:
        what = f"floor friction becomes {event.friction:g}"
    elif event.battery is not None:
        what = f"battery at {100 * event.battery.charge:g} % charge"
    elif event.gyro_bias is not None:
        what = "gyro bias of " + ", ".join(f"{math.degrees(v):.3g}" for v in event.gyro_bias) \
            + " deg/s (x, y, z)"
    elif event.accel_dropout is not None:
        what = f"accelerometer reads nothing for {event.accel_dropout:g} s"
    elif event.encoder_miss is not None:
        what = f"{event.encoder_miss.side} encoder misses {event.encoder_miss.counts} counts"
    elif event.setpoint is not None:
        what = (f"setpoint speed {event.setpoint.speed:g} m/s, "
                f"turn {event.setpoint.turn:g} rad/s")
    else:
        what = "event"
    return f"{_when(event)}: {what}"


def ground_text(ground) -> str:
    """The test's floor in words."""
    words = []
    if ground.slope:
        words.append(f"a {math.degrees(ground.slope):.3g}° slope")
    if ground.friction is not None:
        words.append(f"friction {ground.friction:g}")
    for patch in ground.patches:
        words.append(f"friction {patch.friction:g} from {patch.start:g} m to {patch.end:g} m")
    for step in ground.steps:
        words.append(f"a {1000 * step.height:g} mm step at {step.at:g} m")
    if ground.rough is not None:
        words.append(f"bumps of {1000 * ground.rough.amplitude:g} mm every "
                     f"{1000 * ground.rough.wavelength:g} mm")
    return ", ".join(words) or "flat floor"


def describe_test(plan) -> dict[str, Any]:
    """What a test does: its description, duration, floor and timeline in words."""
    return {"description": plan.description, "duration_s": plan.duration,
            "ground": ground_text(plan.ground_spec),
            "events": [event_text(e) for e in plan.events]}


def setpoint_changes(plan) -> list[tuple[float, float]]:
    """(t s, speed m/s) of the plan's timed speed setpoints, for charts."""
    return sorted((float(e.at), float(e.setpoint.speed)) for e in plan.events
                  if e.setpoint is not None and e.at is not None)


# ------------------------------------------------------------ imperfections in force

_SIDE_UNITS = {"stall_torque": ("N·m", 1.0), "no_load_speed": ("rpm", 60 / (2 * math.pi)),
               "radius": ("mm", 1000.0), "width": ("mm", 1000.0), "mass": ("g", 1000.0),
               "backlash": ("deg", 180 / math.pi), "friction_torque": ("N·m", 1.0),
               "static_friction_torque": ("N·m", 1.0), "stall_current": ("A", 1.0),
               "rated_voltage": ("V", 1.0), "rotor_inertia": ("kg·m²", 1.0),
               "gear_ratio": ("", 1.0)}


def _side_rows(section, name: str) -> list[tuple[str, str, str]]:
    """One row per key a side overrides: ``motors.right.stall_torque``, both sides' values."""
    rows = []
    for side in ("left", "right"):
        override = getattr(section, side)
        if override is None:
            continue
        for key, value in override.model_dump(exclude_none=True).items():
            base = getattr(section, key)
            if value == base or not isinstance(value, (int, float)):
                continue
            unit, scale = _SIDE_UNITS.get(key, ("SI", 1.0))
            change = f" ({100 * (value / base - 1):+.1f} %)" if base else ""
            rows.append((f"{name}.{side}.{key} (the other side {base * scale:.4g})",
                         f"{value * scale:.4g}{change}", unit))
    return rows


def imperfections(spec) -> list[list[str]]:
    """[label, value, unit] rows for every imperfect part the robot file puts in force
    (gearbox play, static friction, per-side differences, the IMU's filters with their
    low-frequency group delay, mounting and scale errors, loop jitter, compute time);
    empty for ideal parts."""
    from .robot import filter_group_delay

    m, imu, board = spec.motors, spec.imu, spec.board
    rows: list[tuple[str, str, str]] = []
    plays = {side: spec.motor_side(side).backlash for side in ("left", "right")}
    if any(plays.values()):
        value = (f"{math.degrees(plays['left']):.3g}" if plays["left"] == plays["right"] else
                 f"{math.degrees(plays['left']):.3g} / {math.degrees(plays['right']):.3g}")
        rows.append(("gearbox play (backlash), total at the output", value, "deg"))
    if m.static_friction_torque is not None and m.static_friction_torque != m.friction_torque:
        rows.append(("static (breakaway) friction torque, kinetic "
                     f"{m.friction_torque:.3g}", f"{m.static_friction_torque:.3g}", "N·m"))
    rows += _side_rows(m, "motors") + _side_rows(spec.wheels, "wheels")
    for label, sensor in (("gyro", imu.gyro), ("accelerometer", imu.accel)):
        if sensor.bandwidth is not None:
            delay = filter_group_delay(sensor.bandwidth, imu.filter_order)
            rows.append((f"{label} low-pass (Butterworth, order {imu.filter_order}), "
                         f"group delay {1000 * delay:.2g} ms", f"{sensor.bandwidth:.3g}", "Hz"))
        if sensor.scale_error:
            rows.append((f"{label} scale error", f"{100 * sensor.scale_error:+.3g}", "%"))
    if any(imu.rotation):
        rows.append(("IMU mounting error (roll, pitch, yaw)",
                     ", ".join(f"{math.degrees(a):.3g}" for a in imu.rotation), "deg"))
    if board.loop_jitter:
        rows.append(("loop jitter (standard deviation of the tick interval)",
                     f"{1e6 * board.loop_jitter:.3g}", "µs"))
    if board.compute_time:
        rows.append(("compute time (reading to duties)", f"{1000 * board.compute_time:.3g}",
                     "ms"))
    return [list(r) for r in rows]


def parts_summary(spec) -> str:
    """One line for a run's or suite's table: 'ideal parts', or the imperfections in short."""
    m, imu, board = spec.motors, spec.imu, spec.board
    words = []
    plays = [spec.motor_side(side).backlash for side in ("left", "right")]
    if any(plays):
        words.append(f"play {math.degrees(max(plays)):.3g}°")
    if m.static_friction_torque is not None and m.static_friction_torque != m.friction_torque:
        words.append("static friction")
    if _side_rows(m, "motors") or _side_rows(spec.wheels, "wheels"):
        words.append("sides differ")
    cutoffs = [s.bandwidth for s in (imu.gyro, imu.accel) if s.bandwidth is not None]
    if cutoffs:
        words.append(f"IMU filter {min(cutoffs):.3g} Hz")
    if any(imu.rotation) or imu.gyro.scale_error or imu.accel.scale_error:
        words.append("IMU mounting/scale errors")
    if board.loop_jitter:
        words.append(f"jitter {1e6 * board.loop_jitter:.3g} µs")
    if board.compute_time:
        words.append(f"compute {1000 * board.compute_time:.3g} ms")
    if not words:
        return "ideal parts (the robot file lists no imperfections)"
    return ", ".join(words)
