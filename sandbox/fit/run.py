"""``upright fit``: bench logs -> fitted parameters -> a robot file with them in place."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..robot import load_robot, parse_yaml
from .bench_models import PlanarBody
from .logs import read_log
from .robotfile import emit, get_dotted, set_dotted
from .spin import fit_play, fit_spin, torque_figures
from .stats import Estimate
from .swing import body_figures, fit_drop, fit_swing

UNITS = {"mass": "kg", "com": "m", "pitch_inertia": "kg*m^2", "no_load_speed": "rad/s",
         "friction_torque": "N*m", "static_friction_torque": "N*m", "rotor_inertia": "kg*m^2",
         "deadband": "duty", "backlash": "rad", "fall_pole": "1/s", "hanging_frequency": "rad/s",
         "time_constant": "s"}


@dataclass
class Parameter:
    key: str
    file: Any
    fitted: Any
    low: Any
    high: Any
    source: str
    written: bool = True

    def as_json(self) -> dict:
        return {"key": self.key, "file": self.file, "fitted": self.fitted, "low": self.low,
                "high": self.high, "from": self.source, "written": self.written}


@dataclass
class FitResult:
    robot: str
    parameters: list[Parameter] = field(default_factory=list)
    not_determined: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    text: str = ""
    fits: dict = field(default_factory=dict)

    def as_json(self) -> dict:
        return {"robot": self.robot, "parameters": [p.as_json() for p in self.parameters],
                "not_determined": self.not_determined, "notes": self.notes}


def _add(result: FitResult, key: str, file_value, est: Estimate | None, source: str,
         written: bool = True) -> None:
    if est is None:
        return
    result.parameters.append(Parameter(key, file_value, est.value, est.low, est.high, source,
                                       written))


def fit_robot(robot: Path, *, swing: Path | None = None, spin: Path | None = None,
              drop: Path | None = None, play: Path | None = None, mass: float | None = None,
              balance_point: float | None = None, scales: dict | None = None) -> FitResult:
    """Fit what the given logs determine; see the README's bench tests."""
    spec = load_robot(robot)
    fig = spec.figures
    raw = parse_yaml(Path(robot).read_text(encoding="utf-8"), str(robot))
    result = FitResult(spec.name)
    if not any((swing, spin, drop, play)):
        raise ValueError("no bench log given: pass --swing, --spin, --drop and/or --play")
    logs = {name: read_log(path, scales) for name, path in
            (("swing", swing), ("spin", spin), ("drop", drop), ("play", play)) if path}
    for log in logs.values():
        result.notes.append(log.summary())
        result.notes.extend(f"{log.source}: {n}" for n in log.notes)
    names = {k: Path(v.source).name for k, v in logs.items()}
    motors = spec.motors
    per_volt = motors.stall_torque / motors.rated_voltage  # g = K_t / R at the output shaft
    reflected = fig.reflected_inertia
    # ---------------------------------------------------------------- spin
    if "spin" in logs:
        counts_per_rad = spec.encoders.counts_per_rev * motors.gear_ratio / (2 * math.pi)
        fit = fit_spin(logs["spin"], counts_per_rad=counts_per_rad,
                       pwm_bits=spec.driver.pwm_bits, voltage_drop=spec.driver.voltage_drop,
                       nominal_supply=fig.drive_voltage)
        result.fits["spin"] = fit
        result.notes.append(f"spin: supply from the {fit.supply_from} "
                            f"({fit.supply_voltage:.2f} V); torques use the file's stall torque"
                            " / rated voltage (a no-load spin cannot measure it)")
        figures = [torque_figures(s, per_volt, fig.wheel_inertia_axle, motors.gear_ratio,
                                  motors.rated_voltage) for s in fit.sides]
        for side in fit.sides:
            result.notes.extend(f"spin ({side.side}): {n}" for n in side.notes)
            if side.deadband is not None and side.breakaway_duty is not None and (
                    side.breakaway_duty.low <= side.deadband.high):
                result.notes.append(f"spin ({side.side}): the wheel breaks away at the deadband,"
                                    " so static friction is at most the torque there")
        if "play" not in logs:
            result.notes.append("spin: with encoders on the motor shaft a free wheel follows "
                                "the motor at once, so free spinning cannot show the gearbox "
                                "play: give a play-check log (--play) to fit it")
        src = f"spin ({names['spin']})"
        file_values = {"no_load_speed": motors.no_load_speed,
                       "friction_torque": motors.friction_torque,
                       "rotor_inertia": motors.rotor_inertia}
        for name in ("no_load_speed", "friction_torque", "rotor_inertia"):
            _add_sides(result, f"motors.{name}", file_values[name],
                       [f.get(name) for f in figures], [s.side for s in fit.sides], src)
        statics = []
        for side in fit.sides:
            b = side.breakaway_duty
            if b is None or (side.deadband is not None and b.low <= side.deadband.high):
                statics.append(None)
                continue
            k = fit.supply_voltage * per_volt
            statics.append(Estimate(b.value * k, b.low * k, b.high * k))
        _add_sides(result, "motors.static_friction_torque",
                   getattr(motors, "static_friction_torque", None), statics,
                   [s.side for s in fit.sides], src)
        _add_sides(result, "driver.deadband", spec.driver.deadband,
                   [s.deadband for s in fit.sides], [s.side for s in fit.sides], src,
                   per_side=False)
        taus = [s.time_constant for s in fit.sides if s.time_constant is not None]
        for side in fit.sides:
            if side.time_constant is not None:
                tau_file = ((fig.wheel_inertia_axle + reflected) * fig.resistance
                            / (fig.torque_constant * fig.back_emf_constant))
                _add(result, f"spin.time_constant.{side.side}", tau_file, side.time_constant,
                     src, written=False)
        fitted_rotor = [f.get("rotor_inertia") for f in figures if f.get("rotor_inertia")]
        if taus and fitted_rotor:
            reflected = float(np.mean([r.value for r in fitted_rotor])) * motors.gear_ratio ** 2
    if "play" in logs:
        counts_per_rad = spec.encoders.counts_per_rev * motors.gear_ratio / (2 * math.pi)
        plays = fit_play(logs["play"], counts_per_rad)
        _add_sides(result, "motors.backlash", getattr(motors, "backlash", 0.0),
                   list(plays.values()), list(plays), f"play check ({names['play']})")
    # ---------------------------------------------------------------- swing and drop
    body_mass = None if mass is None else mass - 2 * fig.wheel_mass
    file_body = PlanarBody(fig.body.mass, float(fig.body.inertia[1, 1]), fig.com_height,
                           fig.wheel_mass, fig.wheel_inertia_axle, spec.wheels.radius,
                           fig.reflected_inertia)
    sw = fit_swing(logs["swing"]) if "swing" in logs else None
    dr = fit_drop(logs["drop"]) if "drop" in logs else None
    if dr is not None:
        result.notes.extend(f"drop: {n}" for n in dr.notes)
    if sw is not None:
        result.fits["swing"] = sw
        _add(result, "swing.hanging_frequency", file_body.hanging_omega(), sw.omega,
             f"swing ({names['swing']})", written=False)
    if body_mass is not None:
        _add(result, "body.measured.mass", fig.body.mass,
             Estimate(body_mass, body_mass - 0.001, body_mass + 0.001),
             "--mass minus the file's two wheels (±1 g)")
    figures_body = body_figures(body_mass=body_mass, swing=sw, drop=dr,
                                balance_point=balance_point, robot_mass=mass,
                                wheel_mass=fig.wheel_mass, wheel_inertia=fig.wheel_inertia_axle,
                                wheel_radius=spec.wheels.radius, reflected_inertia=reflected)
    result.notes.extend(figures_body.notes)
    if dr is not None:
        result.fits["drop"] = dr
        pole = figures_body.fall_pole or dr.pole
        _add(result, "drop.fall_pole", file_body.fall_pole(), pole, f"drop ({names['drop']})",
             written=False)
    if figures_body.com_height is not None:
        d = figures_body.com_height
        direction = fig.body.com / max(np.linalg.norm(fig.body.com[[0, 2]]), 1e-12)
        used = ", ".join(names[k] for k in ("swing", "drop") if k in names)
        src = f"{figures_body.com_from} ({used})"
        result.parameters.append(Parameter(
            "body.measured.com", fig.body.com.tolist(), (direction * d.value).tolist(),
            (direction * d.low).tolist(), (direction * d.high).tolist(), src))
        result.notes.append("body.measured.com: the distance from the axle is fitted; its "
                            "direction (forward offset) is the file's")
        _add(result, "body.measured.pitch_inertia", float(fig.body.inertia[1, 1]),
             figures_body.pitch_inertia, src)
    # ---------------------------------------------------------------- what is left alone
    fitted_keys = {p.key for p in result.parameters if p.written}
    for key in ("body.measured.mass", "body.measured.com", "body.measured.pitch_inertia",
                "motors.no_load_speed", "motors.friction_torque",
                "motors.static_friction_torque", "motors.backlash", "driver.deadband",
                "motors.stall_torque", "motors.stall_current"):
        if not any(k == key or k.startswith(key.replace("motors.", "motors.left.")) or
                   k.startswith(key.replace("motors.", "motors.right.")) for k in fitted_keys):
            result.not_determined.append(key)
    result.text = write_text(raw, result, Path(robot).name)
    return result


def _add_sides(result: FitResult, key: str, file_value, estimates: list, sides: list[str],
               source: str, per_side: bool = True) -> None:
    """One row for both sides where they agree (intervals overlap), else one per side."""
    found = [(s, e) for s, e in zip(sides, estimates) if e is not None]
    if not found:
        return
    if len(found) == 1:
        _add(result, key, file_value, found[0][1], f"{source}, {found[0][0]} side only")
        return
    (_, a), (_, b) = found
    if not per_side or (a.low <= b.high and b.low <= a.high):
        mean = (a.value + b.value) / 2
        half = max(a.half_width, b.half_width, abs(a.value - b.value) / 2)
        _add(result, key, file_value, Estimate(mean, mean - half, mean + half),
             f"{source}, both sides")
        return
    section, name = key.split(".", 1)
    for side, est in found:
        _add(result, f"{section}.{side}.{name}", file_value, est, f"{source}, {side} side")


def write_text(raw: dict, result: FitResult, original: str) -> str:
    """The robot file's data with fitted values set, as YAML text with comments."""
    import copy

    data = copy.deepcopy(raw)
    comments = {}
    for p in result.parameters:
        if not p.written:
            continue
        value = [float(f"{v:.6g}") for v in p.fitted] if isinstance(p.fitted, list) else p.fitted
        set_dotted(data, p.key, value)
        unit = UNITS.get(p.key.rsplit(".", 1)[-1], "")
        if isinstance(p.low, list):
            span = f"distance {np.linalg.norm(p.low):.4g}..{np.linalg.norm(p.high):.4g} {unit}"
        else:
            span = f"{p.low:.4g}..{p.high:.4g} {unit}"
        comments[p.key] = f"fitted from {p.source}; 95 % {span}"
        if get_dotted(raw, p.key) is not None:
            comments[p.key] += f"; was {get_dotted(raw, p.key)}"
    header = (f"{result.robot}: fitted by `upright fit` from {original} and bench logs.\n"
              "Values with a comment were fitted (SI units); the rest are the original's.\n"
              f"Not determined by the logs given, left alone: {', '.join(result.not_determined)}"
              if result.not_determined else "")
    return emit(data, comments, header)
